"""River networks read from a line layer: noding, flow direction, snapping sites, checks.

A river (or any dendritic channel) network arrives as a GIS line layer. This module turns it
into a directed graph whose nodes are line ends, confluences and the survey's sites, and whose
edges are stretches of channel oriented with the flow:

1. lines are exploded to single parts, reduced to x/y, and reprojected to the survey's working
   CRS (the layer's own CRS is required when the survey has one);
2. **noding**: line ends closer than ``node_tolerance`` (map units) become one node (linked in
   chains, single linkage); a dangling line end within ``node_tolerance`` of the *interior* of
   another line (a tributary digitised onto a main stem without a vertex there) splits that
   line and becomes a confluence. Lines that cross without such an end are not joined;
3. **snapping**: each site goes to the nearest point of the nearest line (shapely); a site
   farther than ``snap_tolerance`` is an error naming it; each site's snap distance is kept.
   The line is split at the snapped point, which becomes the site's node (a site within
   ``node_tolerance`` of a node takes that node);
4. **direction**: from the digitised direction of the lines (first vertex upstream), or from
   declared outlet points (every edge oriented towards the outlet of its part of the network);
5. **checks** for a dendritic network: no loop (a braided reach, side channel or duplicated
   line), flow never splits (a node with two downstream edges), one outlet per connected part,
   and one connected part unless several separate catchments are declared. Every failure is
   an :class:`~spatial_ev.errors.InputError` naming the place with its coordinates.

Graph work uses :mod:`scipy.sparse.csgraph`; geometry uses shapely. No step loops over sites in
Python except the final cutting of lines into pieces (once per split point).
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from typing import Any

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj
import shapely
from scipy import sparse
from scipy.sparse import csgraph
from scipy.spatial import cKDTree

from spatial_ev._validation import check_option, check_real
from spatial_ev.errors import CRSError, InputError
from spatial_ev.input.crs import crs_label, distance_unit_of, parse_crs
from spatial_ev.input.io import file_format, read_vector

__all__ = ["RiverNetwork", "read_river_network", "build_river_network", "DIRECTIONS",
           "COMPONENT_RULES"]

DIRECTIONS = ("digitised", "outlet")
COMPONENT_RULES = ("single", "several")
_LISTED = 6


@dataclass(frozen=True)
class RiverNetwork:
    """A directed dendritic network with the survey's sites on its nodes.

    Attributes
    ----------
    nodes : pandas.DataFrame
        Index ``node`` (0..k−1); columns ``x``, ``y`` (working CRS), ``kind`` (``"outlet"``,
        ``"source"`` (a headwater end), ``"confluence"``, ``"site"`` or ``"joint"`` (two
        lines meeting end to end), in that order of precedence) and ``component``.
    edges : geopandas.GeoDataFrame
        Index ``edge`` (0..m−1); columns ``upstream_node``, ``downstream_node``, ``length``
        (map units) and ``feature`` (row of the input layer the stretch comes from); line
        geometry digitised with the flow (first vertex upstream).
    sites : pandas.DataFrame
        Index = site ids in the survey's order; columns ``node``, ``snap_distance`` (map
        units, shapely ``distance`` from the site to the line), ``x``, ``y`` (the snapped
        point), ``feature`` (input row of the line the site was snapped to).
    outlets : tuple of int
        Outlet node of each component.
    crs : pyproj.CRS or None
        Working CRS (the survey's), ``None`` for local planar coordinates.
    distance_unit : str
        Map unit of every length.
    node_tolerance, snap_tolerance : float
        Tolerances used (map units).
    direction : str
        ``"digitised"`` or ``"outlet"``.
    source : str
        Where the lines came from.
    notes : tuple of str
        What the checks changed (dropped parts, lines joined to interiors, ...).
    """

    nodes: pd.DataFrame
    edges: gpd.GeoDataFrame
    sites: pd.DataFrame
    outlets: tuple[int, ...]
    crs: pyproj.CRS | None
    distance_unit: str
    node_tolerance: float
    snap_tolerance: float
    direction: str
    source: str
    notes: tuple[str, ...] = field(default=())

    @property
    def n_sites(self) -> int:
        """Number of sites on the network."""
        return len(self.sites)

    @property
    def site_ids(self) -> pd.Index:
        """Site ids in the survey's order."""
        return self.sites.index

    @property
    def site_nodes(self) -> np.ndarray:
        """Node of each site (int array, site order)."""
        return self.sites["node"].to_numpy(dtype=np.int64)

    @property
    def total_length(self) -> float:
        """Summed length of all edges (map units)."""
        return float(self.edges["length"].sum())

    def adjacency(self) -> sparse.csr_matrix:
        """Symmetric node × node matrix of edge lengths (the undirected network).

        Examples
        --------
        >>> import shapely
        >>> net = build_river_network(gpd.GeoSeries([shapely.LineString([(0, 0), (3, 0)])]),
        ...     pd.DataFrame({"x": [1.0], "y": [0.5]}, index=["a"]), snap_tolerance=1)
        >>> net.adjacency().toarray().tolist()
        [[0.0, 0.0, 1.0], [0.0, 0.0, 2.0], [1.0, 2.0, 0.0]]
        """
        e = self.edges
        k = len(self.nodes)
        a = e["upstream_node"].to_numpy()
        b = e["downstream_node"].to_numpy()
        d = e["length"].to_numpy(dtype=np.float64)
        m = sparse.coo_matrix((np.concatenate([d, d]), (np.concatenate([a, b]),
                                                        np.concatenate([b, a]))),
                              shape=(k, k)).tocsr()
        return m

    def summary(self) -> dict[str, Any]:
        """Plain description (JSON-friendly).

        Examples
        --------
        >>> import shapely
        >>> net = build_river_network(gpd.GeoSeries([shapely.LineString([(0, 0), (3, 0)])]),
        ...     pd.DataFrame({"x": [1.0], "y": [0.5]}, index=["a"]), snap_tolerance=1)
        >>> net.summary()["n_edges"], net.summary()["snap_distance"]["max"]
        (2, 0.5)
        """
        snap = self.sites["snap_distance"].to_numpy()
        kinds = self.nodes["kind"].value_counts()
        return {
            "source": self.source, "crs": crs_label(self.crs),
            "distance_unit": self.distance_unit, "direction": self.direction,
            "n_sites": self.n_sites, "n_nodes": int(len(self.nodes)),
            "n_edges": int(len(self.edges)), "n_components": len(self.outlets),
            "total_length": self.total_length,
            "n_confluences": int(kinds.get("confluence", 0)),
            "n_sources": int(kinds.get("source", 0)),
            "outlets": [[float(self.nodes.at[o, "x"]), float(self.nodes.at[o, "y"])]
                        for o in self.outlets],
            "node_tolerance": self.node_tolerance, "snap_tolerance": self.snap_tolerance,
            "snap_distance": {"median": float(np.median(snap)), "max": float(snap.max()),
                              "farthest_site": str(self.site_ids[int(np.argmax(snap))])},
            "notes": list(self.notes),
        }

    def describe(self) -> str:
        """Multi-line text description.

        Examples
        --------
        >>> import shapely
        >>> net = build_river_network(gpd.GeoSeries([shapely.LineString([(0, 0), (3, 0)])]),
        ...     pd.DataFrame({"x": [1.0], "y": [0.5]}, index=["a"]), snap_tolerance=1)
        >>> print(net.describe().splitlines()[0])
        river network: 2 edges, 3 nodes, 1 component(s), total length 3 map unit
        """
        s = self.summary()
        u = self.distance_unit
        lines = [f"river network: {s['n_edges']} edges, {s['n_nodes']} nodes, "
                 f"{s['n_components']} component(s), total length {s['total_length']:.6g} {u}",
                 f"  flow direction: {self.direction}; {s['n_sources']} headwater end(s), "
                 f"{s['n_confluences']} confluence(s)",
                 f"  sites snapped: {s['n_sites']}, median distance "
                 f"{s['snap_distance']['median']:.4g} {u}, largest "
                 f"{s['snap_distance']['max']:.4g} {u} (site "
                 f"{s['snap_distance']['farthest_site']!r}; tolerance {self.snap_tolerance:g})",
                 f"  line ends joined within {self.node_tolerance:g} {u}"]
        lines += [f"  note: {n}" for n in self.notes]
        return "\n".join(lines)


# ------------------------------------------------------------------------------ reading

def read_river_network(path: str | os.PathLike, sites: Any, *, snap_tolerance: float,
                       layer: str | int | None = None, crs: Any = None,
                       node_tolerance: float | None = None, direction: str = "digitised",
                       outlet: Any = None, components: str = "single") -> RiverNetwork:
    """Read a river line layer and build the directed network holding the survey's sites.

    Parameters
    ----------
    path : path
        GeoPackage, GeoJSON or Shapefile of (multi)line features.
    sites : Survey
        The survey (its working CRS, site ids and coordinates are used). A DataFrame with
        columns ``x``, ``y`` (index = site ids) is taken as local planar coordinates: the
        layer must then declare no CRS.
    snap_tolerance : float
        Largest distance (map units) from a site to the nearest line; sites beyond it are an
        error naming them.
    layer : str or int, optional
        Layer of a multi-layer file.
    crs : int or str, optional
        CRS of a layer that declares none (EPSG code or WKT); a layer's own CRS always wins
        and a different ``crs`` is an error.
    node_tolerance : float, optional
        Line ends closer than this (map units) are joined; default 1e-9 × the layer's extent
        (ends that coincide up to rounding).
    direction : {"digitised", "outlet"}
        Flow direction from the digitised direction of the lines (first vertex upstream), or
        towards the declared ``outlet`` points.
    outlet : (x, y) or sequence of (x, y), optional
        Outlet point(s) in the working CRS, one per connected part (``direction="outlet"``);
        each is taken to the nearest node within ``snap_tolerance``.
    components : {"single", "several"}
        ``"single"``: the lines must form one connected network (a disconnected piece is an
        error naming where it ends and how far it is from the rest). ``"several"``: separate
        catchments are accepted; parts without any site are dropped (noted).

    Returns
    -------
    RiverNetwork

    Examples
    --------
    >>> from spatial_ev.input.survey import read_survey
    >>> s = read_survey("data_demo/river/sites.gpkg",
    ...                 "data_demo/river/species.csv")  # doctest: +SKIP
    >>> net = read_river_network("data_demo/river/network.gpkg", s,
    ...                          snap_tolerance=30)  # doctest: +SKIP
    >>> net.n_sites  # doctest: +SKIP
    120
    """
    file_format(path, role="network")
    gdf = read_vector(path, role="network", layer=layer)
    source = f"network file {str(path)!r}"
    if not isinstance(gdf, gpd.GeoDataFrame):
        raise InputError(f"{source}: the layer has no geometry; give a layer of lines")
    coords, target_crs, unit = _site_frame(sites)
    given = None if crs is None else parse_crs(crs, argument="crs")
    layer_crs = gdf.crs
    if layer_crs is not None and given is not None and not pyproj.CRS(layer_crs).equals(
            given, ignore_axis_order=True):
        raise CRSError(f"{source} is in {crs_label(pyproj.CRS(layer_crs))} but "
                       f"crs={crs_label(given)} was given; the layer's own CRS is used: drop "
                       f"the crs option, or reproject the layer first")
    layer_crs = layer_crs if layer_crs is not None else given
    geoms = gdf.geometry
    if target_crs is None:
        if layer_crs is not None:
            if _degrees_out_of_range(pyproj.CRS(layer_crs), geoms):
                first = shapely.get_coordinates(geoms.iloc[0])[0]   # any line type
                raise CRSError(f"{source} says {crs_label(pyproj.CRS(layer_crs))} (every "
                               f"GeoJSON file does: its coordinates are longitude/latitude by "
                               f"definition), but its coordinates, e.g. {_xy(first)}, are "
                               f"not degrees; for lines in the survey's local planar "
                               f"coordinates, save them as a GeoPackage or Shapefile without "
                               f"a CRS")
            raise CRSError(f"{source} is in {crs_label(pyproj.CRS(layer_crs))} but the survey "
                           f"has local planar coordinates without a CRS; declare the "
                           f"survey's CRS when reading it (the sites file's own, or the CRS "
                           f"option of a CSV survey) so that both can be aligned, or give "
                           f"lines in the same local coordinates without a CRS")
    else:
        if layer_crs is None:
            raise CRSError(f"{source} declares no CRS; pass crs= (EPSG code or WKT) for the "
                           f"layer, e.g. the survey's {crs_label(target_crs)}")
        try:
            geoms = gpd.GeoSeries(geoms.to_numpy(), crs=layer_crs).to_crs(target_crs)
        except Exception as exc:  # pyproj transformation failures
            raise CRSError(f"{source}: lines cannot be projected from "
                           f"{crs_label(pyproj.CRS(layer_crs))} to the survey's "
                           f"{crs_label(target_crs)} ({exc})") from None
    return build_river_network(geoms, coords, snap_tolerance=snap_tolerance,
                               node_tolerance=node_tolerance, direction=direction,
                               outlet=outlet, components=components, source=source,
                               crs=target_crs, distance_unit=unit)


def _degrees_out_of_range(crs: pyproj.CRS, geoms: gpd.GeoSeries) -> bool:
    """Whether a geographic CRS is declared for coordinates that cannot be degrees."""
    if not crs.is_geographic or geoms.empty:
        return False
    x0, y0, x1, y1 = geoms.total_bounds
    return bool(x0 < -360 or x1 > 360 or y0 < -90 or y1 > 90)


def _site_frame(sites: Any) -> tuple[pd.DataFrame, pyproj.CRS | None, str]:
    if hasattr(sites, "coords") and hasattr(sites, "distance_unit"):       # Survey
        return sites.coords, sites.crs, sites.distance_unit
    if isinstance(sites, pd.DataFrame) and {"x", "y"} <= set(sites.columns):
        return sites[["x", "y"]], None, "map unit"
    raise InputError(f"`sites` must be a Survey (read_survey) or a DataFrame with columns "
                     f"'x', 'y'; got {type(sites).__name__}")


# ------------------------------------------------------------------------------ building

def build_river_network(lines: Any, sites: pd.DataFrame, *, snap_tolerance: float,
                        node_tolerance: float | None = None, direction: str = "digitised",
                        outlet: Any = None, components: str = "single",
                        source: str = "lines", crs: pyproj.CRS | None = None,
                        distance_unit: str | None = None) -> RiverNetwork:
    """Build the directed network from lines already in the working CRS.

    Parameters
    ----------
    lines : GeoSeries, GeoDataFrame or sequence of shapely (multi)line strings
        Channel lines in the sites' map units.
    sites : pandas.DataFrame
        Columns ``x``, ``y``; index = site ids.
    snap_tolerance, node_tolerance, direction, outlet, components
        As in :func:`read_river_network`.
    source : str
        Description of the lines used in messages.
    crs : pyproj.CRS, optional
        Working CRS recorded in the result; default the GeoSeries' CRS.
    distance_unit : str, optional
        Map unit recorded in the result; default from ``crs`` (``"map unit"`` without one).

    Returns
    -------
    RiverNetwork

    Examples
    --------
    >>> import shapely
    >>> main = shapely.LineString([(0, 10), (0, 0)])            # digitised downstream
    >>> trib = shapely.LineString([(-5, 15), (0, 5)])           # ends on main's interior
    >>> s = pd.DataFrame({"x": [0.2, -3.0, 0.1], "y": [8.0, 11.0, 1.0]}, index=list("abc"))
    >>> net = build_river_network([main, trib], s, snap_tolerance=1.0, node_tolerance=0.5)
    >>> dict(sorted(net.nodes["kind"].value_counts().items()))
    {'confluence': 1, 'outlet': 1, 'site': 3, 'source': 2}
    """
    direction = check_option("direction", direction, DIRECTIONS)
    components = check_option("components", components, COMPONENT_RULES)
    snap_tolerance = check_real("snap_tolerance", snap_tolerance, low=0)
    if crs is None:
        crs = getattr(lines, "crs", None)
        crs = None if crs is None else pyproj.CRS(crs)
    if crs is not None and crs.is_geographic:
        raise CRSError(f"{source} is in the geographic CRS {crs_label(crs)} (degrees); lengths "
                       f"along the network need map units: reproject the lines to the survey's "
                       f"working CRS first (read_river_network does this)")
    unit = distance_unit or (distance_unit_of(crs) if crs is not None and crs.is_projected
                             else "map unit")
    geoms, feature = _line_parts(lines, source)
    xy, ids = _site_coordinates(sites)
    ends = np.concatenate([shapely.get_coordinates(shapely.get_point(geoms, 0)),
                           shapely.get_coordinates(shapely.get_point(geoms, -1))])
    extent = float(np.ptp(np.vstack([ends, xy]), axis=0).max()) or 1.0
    if node_tolerance is None:
        node_tolerance = 1e-9 * extent
    else:
        node_tolerance = check_real("node_tolerance", node_tolerance, low=0)
    if direction == "outlet" and outlet is None:
        raise InputError("direction='outlet' needs `outlet`: the (x, y) of the river mouth in "
                         "the working CRS (one point per connected part)")
    if direction == "digitised" and outlet is not None:
        raise InputError("`outlet` applies to direction='outlet'; with direction='digitised' "
                         "the flow follows the lines' digitised direction: drop `outlet` or "
                         "set direction='outlet'")
    notes: list[str] = []

    # 1. noding of line ends (single linkage within the tolerance)
    n_lines = len(geoms)
    end_node, node_xy = _cluster_ends(ends, node_tolerance)
    tail, head = end_node[:n_lines], end_node[n_lines:]
    loops = np.flatnonzero(tail == head)
    if len(loops):
        short = shapely.length(geoms[loops]) <= 2 * node_tolerance
        if (~short).any():
            j = loops[~short][0]
            raise InputError(f"{source}: line (feature {feature[j]}) starts and ends at the "
                             f"same point {_xy(node_xy[tail[j]])}: a closed loop cannot be part of "
                             f"a dendritic network; remove or split it")
        keep = np.ones(n_lines, bool)
        keep[loops] = False
        notes.append(f"{len(loops)} line(s) shorter than the node tolerance dropped")
        geoms, feature, tail, head = geoms[keep], feature[keep], tail[keep], head[keep]
        n_lines = len(geoms)

    # 2. dangling ends on the interior of another line -> split points
    degree = np.bincount(np.concatenate([tail, head]), minlength=len(node_xy))
    tree = shapely.STRtree(geoms)
    dangling = np.flatnonzero(degree == 1)
    split_line, split_pos, split_node = [], [], []
    if len(dangling) and node_tolerance > 0:
        pts = shapely.points(node_xy[dangling])
        p_idx, l_idx = tree.query(pts, predicate="dwithin", distance=node_tolerance)
        own = (tail[l_idx] == dangling[p_idx]) | (head[l_idx] == dangling[p_idx])
        p_idx, l_idx = p_idx[~own], l_idx[~own]
        if len(p_idx):
            pos = shapely.line_locate_point(geoms[l_idx], pts[p_idx])
            length = shapely.length(geoms[l_idx])
            inner = (pos > 0) & (pos < length)
            p_idx, l_idx, pos = p_idx[inner], l_idx[inner], pos[inner]
            first = np.unique(p_idx, return_index=True)[1]      # one line per dangling end
            p_idx, l_idx, pos = p_idx[first], l_idx[first], pos[first]
            node_xy[dangling[p_idx]] = shapely.get_coordinates(
                shapely.line_interpolate_point(geoms[l_idx], pos))
            split_line.append(l_idx)
            split_pos.append(pos)
            split_node.append(dangling[p_idx])
            if len(p_idx):
                notes.append(f"{len(p_idx)} line end(s) joined to the interior of another line "
                             f"(within {node_tolerance:g} {unit})")

    # 3. snapping sites
    site_pts = shapely.points(xy)
    pairs = tree.query_nearest(site_pts, all_matches=False)
    snap_line = pairs[1][np.argsort(pairs[0], kind="stable")]
    snap_dist = shapely.distance(site_pts, geoms[snap_line])
    far = np.flatnonzero(snap_dist > snap_tolerance)
    if len(far):
        order = far[np.argsort(-snap_dist[far], kind="stable")]
        shown = ", ".join(f"{ids[i]!r} ({snap_dist[i]:.4g} {unit})" for i in order[:_LISTED])
        more = f" and {len(far) - _LISTED} more" if len(far) > _LISTED else ""
        raise InputError(f"{len(far)} site(s) lie farther than snap_tolerance="
                         f"{snap_tolerance:g} {unit} from every line of {source}: {shown}{more};"
                         f" check their coordinates and the network layer, or raise "
                         f"snap_tolerance if they really belong to the nearest channel")
    site_pos = shapely.line_locate_point(geoms[snap_line], site_pts)
    snapped = shapely.get_coordinates(shapely.line_interpolate_point(geoms[snap_line], site_pos))
    length = shapely.length(geoms[snap_line])
    at_tail = site_pos <= node_tolerance
    at_head = ~at_tail & (site_pos >= length - node_tolerance)
    site_node = np.full(len(ids), -1, dtype=np.int64)
    site_node[at_tail] = tail[snap_line[at_tail]]
    site_node[at_head] = head[snap_line[at_head]]
    # a site at a confluence made in step 2 (within the node tolerance) takes that node
    if split_line:
        t_line, t_pos, t_node = split_line[0], split_pos[0], split_node[0]
        cand = np.flatnonzero((site_node < 0) & np.isin(snap_line, t_line))
        same = (snap_line[cand, None] == t_line[None, :]) & \
            (np.abs(site_pos[cand, None] - t_pos[None, :]) <= node_tolerance)
        hit = same.any(axis=1)
        site_node[cand[hit]] = t_node[np.argmax(same[hit], axis=1)]
    inner = np.flatnonzero(site_node < 0)
    inner = inner[np.lexsort((site_pos[inner], snap_line[inner]))]
    # sites at the same position of a line (within the node tolerance) share one node
    fresh = np.ones(len(inner), bool)
    fresh[1:] = (np.diff(snap_line[inner]) != 0) | (np.diff(site_pos[inner]) > node_tolerance)
    new_nodes = len(node_xy) + np.cumsum(fresh) - 1
    site_node[inner] = new_nodes
    node_xy = np.vstack([node_xy, snapped[inner[fresh]]])
    split_line.append(snap_line[inner[fresh]])
    split_pos.append(site_pos[inner[fresh]])
    split_node.append(new_nodes[fresh])

    # 4. cut lines at split points
    e_geom, e_tail, e_head, e_feature = _cut(geoms, tail, head, feature,
                                             np.concatenate(split_line),
                                             np.concatenate(split_pos),
                                             np.concatenate(split_node), node_xy)
    n_nodes = len(node_xy)
    is_site = np.zeros(n_nodes, bool)
    is_site[site_node] = True

    # 5. connected parts, loops, direction
    und = _undirected(e_tail, e_head, n_nodes)
    n_comp, label = csgraph.connected_components(und, directed=False)
    _check_loops(und, e_tail, e_head, label, n_comp, node_xy, e_feature, source, unit)
    keep_comp = np.unique(label[site_node])
    if n_comp > 1:
        if components == "single":
            _disconnected(label, node_xy, e_geom, e_tail, e_head, site_node, source, unit)
        dropped = n_comp - len(keep_comp)
        if dropped:
            notes.append(f"{dropped} connected part(s) of the network without any site dropped")
    if direction == "digitised":
        e_tail, e_head, outlets = _digitised(e_tail, e_head, label, keep_comp, node_xy,
                                             source, unit)
    else:
        e_tail, e_head, e_geom, outlets = _towards_outlets(
            outlet, e_tail, e_head, e_geom, und, label, keep_comp, node_xy, snap_tolerance,
            source, unit)

    # keep the parts with sites, renumber nodes and edges
    node_keep = np.isin(label, keep_comp)
    new_id = np.cumsum(node_keep) - 1
    edge_keep = node_keep[e_tail]
    e_tail, e_head = new_id[e_tail[edge_keep]], new_id[e_head[edge_keep]]
    e_geom, e_feature = e_geom[edge_keep], e_feature[edge_keep]
    node_xy, label, is_site = node_xy[node_keep], label[node_keep], is_site[node_keep]
    site_node = new_id[site_node]
    outlets = tuple(int(new_id[o]) for o in outlets)
    comp_new = np.searchsorted(keep_comp, label)
    e_geom = _pin_ends(e_geom, node_xy[e_tail], node_xy[e_head])

    k = len(node_xy)
    up_deg = np.bincount(e_head, minlength=k)      # edges arriving from upstream
    kind = np.full(k, "joint", dtype=object)
    kind[is_site] = "site"
    kind[up_deg >= 2] = "confluence"
    kind[up_deg == 0] = "source"
    kind[list(outlets)] = "outlet"
    nodes = pd.DataFrame({"x": node_xy[:, 0], "y": node_xy[:, 1], "kind": kind,
                          "component": comp_new}, index=pd.RangeIndex(k, name="node"))
    edges = gpd.GeoDataFrame({"upstream_node": e_tail, "downstream_node": e_head,
                              "length": shapely.length(e_geom), "feature": e_feature},
                             geometry=e_geom, crs=crs, index=pd.RangeIndex(len(e_geom),
                                                                           name="edge"))
    site_table = pd.DataFrame({"node": site_node, "snap_distance": snap_dist,
                               "x": snapped[:, 0], "y": snapped[:, 1],
                               "feature": feature[snap_line]}, index=ids)
    shared = site_table["node"].duplicated(keep=False)
    if shared.any():
        notes.append(f"{int(shared.sum())} sites share a network position with another site")
    return RiverNetwork(nodes=nodes, edges=edges, sites=site_table, outlets=outlets, crs=crs,
                        distance_unit=unit, node_tolerance=float(node_tolerance),
                        snap_tolerance=float(snap_tolerance), direction=direction,
                        source=source, notes=tuple(notes))


# ------------------------------------------------------------------------------ internals

def _line_parts(lines: Any, source: str) -> tuple[np.ndarray, np.ndarray]:
    """Single-part 2-D line strings and the input row each comes from."""
    if isinstance(lines, gpd.GeoDataFrame):
        lines = lines.geometry
    arr = np.asarray(getattr(lines, "values", lines), dtype=object)
    if arr.ndim != 1 or len(arr) == 0:
        raise InputError(f"{source}: give at least one line geometry; got {len(arr)}")
    valid = np.array([isinstance(g, shapely.Geometry) for g in arr])
    if not valid.all():
        raise InputError(f"{source}: feature {int(np.flatnonzero(~valid)[0])} has no geometry "
                         f"(or is not a shapely geometry); remove it")
    kinds = shapely.get_type_id(arr)
    bad = np.flatnonzero(~np.isin(kinds, [1, 5]))          # LineString, MultiLineString
    if len(bad):
        raise InputError(f"{source}: feature {int(bad[0])} is a {arr[bad[0]].geom_type}; a "
                         f"river network needs line features (LineString / MultiLineString)")
    parts, index = shapely.get_parts(shapely.force_2d(arr), return_index=True)
    length = shapely.length(parts)
    ok = np.isfinite(length) & (length > 0)
    if not ok.any():
        raise InputError(f"{source}: every line has zero length")
    coords = shapely.get_coordinates(parts[ok])
    if not np.isfinite(coords).all():
        raise InputError(f"{source}: a line has non-finite coordinates; check the layer")
    return parts[ok], index[ok]


def _site_coordinates(sites: Any) -> tuple[np.ndarray, pd.Index]:
    if not isinstance(sites, pd.DataFrame) or {"x", "y"} - set(sites.columns):
        raise InputError("`sites` must be a DataFrame with columns 'x' and 'y' (index = site "
                         f"ids); got {type(sites).__name__}")
    xy = sites[["x", "y"]].to_numpy(dtype=np.float64)
    if len(xy) == 0 or not np.isfinite(xy).all():
        raise InputError("`sites` needs at least one site with finite x, y coordinates")
    return xy, sites.index


def _cluster_ends(ends: np.ndarray, tol: float) -> tuple[np.ndarray, np.ndarray]:
    """Node of each line end (single linkage within tol) and node positions (first end).

    Nodes are numbered by their first end, so the numbering follows the layer's order.
    """
    m = len(ends)
    if tol > 0:
        pairs = cKDTree(ends).query_pairs(tol, output_type="ndarray")
        link = sparse.coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])),
                                 shape=(m, m))
        lab = csgraph.connected_components(link, directed=False)[1]
    else:
        lab = np.unique(ends, axis=0, return_inverse=True)[1].ravel()
    first = np.full(lab.max() + 1, m, dtype=np.int64)
    np.minimum.at(first, lab, np.arange(m))
    order = np.argsort(first, kind="stable")
    rank = np.empty_like(order)
    rank[order] = np.arange(len(order))
    return rank[lab], ends[first[order]].copy()


def _cut(geoms, tail, head, feature, s_line, s_pos, s_node, node_xy):
    """Cut every line at its split points; return edge geometries, end nodes, features.

    Edges are numbered by input line, then by position along it.
    """
    from shapely.ops import substring

    order = np.lexsort((s_pos, s_line))
    s_line, s_pos, s_node = s_line[order], s_pos[order], s_node[order]
    cut_lines = np.unique(s_line)
    untouched = np.setdiff1d(np.arange(len(geoms)), cut_lines)
    starts = np.searchsorted(s_line, cut_lines)
    stops = np.append(starts[1:], len(s_line))
    pieces: list[tuple] = []
    for line, a, b in zip(cut_lines, starts, stops):         # once per cut line
        bounds = np.concatenate([[0.0], s_pos[a:b], [shapely.length(geoms[line])]])
        ends = np.concatenate([[tail[line]], s_node[a:b], [head[line]]])
        for i in range(len(bounds) - 1):
            if ends[i] != ends[i + 1]:
                pieces.append((line, i, substring(geoms[line], bounds[i], bounds[i + 1]),
                               ends[i], ends[i + 1]))
    p_line = np.array([p[0] for p in pieces], dtype=np.int64)
    key_line = np.concatenate([untouched, p_line])
    key_piece = np.concatenate([np.zeros(len(untouched)), [p[1] for p in pieces]])
    g = np.concatenate([geoms[untouched], np.array([p[2] for p in pieces] or [], dtype=object)])
    t = np.concatenate([tail[untouched], np.array([p[3] for p in pieces], dtype=np.int64)])
    h = np.concatenate([head[untouched], np.array([p[4] for p in pieces], dtype=np.int64)])
    f = np.concatenate([feature[untouched], feature[p_line]])
    order = np.lexsort((key_piece, key_line))
    return g[order], t[order], h[order], f[order]


def _undirected(tail: np.ndarray, head: np.ndarray, k: int) -> sparse.csr_matrix:
    return sparse.coo_matrix((np.ones(2 * len(tail)), (np.concatenate([tail, head]),
                                                       np.concatenate([head, tail]))),
                             shape=(k, k)).tocsr()


def _xy(p: np.ndarray) -> str:
    """A point as written in messages: plain decimals to the centimetre (no exponent)."""
    def plain(v: float) -> str:
        return f"{v:.2f}".rstrip("0").rstrip(".")
    return f"({plain(p[0])}, {plain(p[1])})"


def _check_loops(und, tail, head, label, n_comp, node_xy, feature, source, unit) -> None:
    """A dendritic network is a forest: edges = nodes − parts. Name a loop when not."""
    n_edges, n_nodes = len(tail), und.shape[0]
    parallel = und.data > 1                      # two lines between the same two nodes
    if n_edges - n_nodes + n_comp == 0 and not parallel.any():
        return
    # a spanning forest by breadth-first search; an edge outside it closes a loop
    tree_edges = set()
    for c in np.unique(label):                   # once per connected part
        root = int(np.flatnonzero(label == c)[0])
        _, pred = csgraph.breadth_first_order(und, root, directed=False)
        child = np.flatnonzero(pred >= 0)
        tree_edges.update(zip(np.minimum(child, pred[child]).tolist(),
                              np.maximum(child, pred[child]).tolist()))
    a, b = np.minimum(tail, head), np.maximum(tail, head)
    seen: set = set()
    for i, pair in enumerate(zip(a.tolist(), b.tolist())):
        if pair in tree_edges and pair not in seen:
            seen.add(pair)
            continue
        p, q = node_xy[pair[0]], node_xy[pair[1]]
        raise InputError(f"{source}: the network has a loop (a braided reach, side channel or "
                         f"duplicated line) closed by the stretch of feature {feature[i]} "
                         f"between {_xy(p)} and {_xy(q)}; a dendritic network needs one path "
                         f"between any two points: keep one channel of the braid (delete or "
                         f"disconnect the others) in the layer")


def _disconnected(label, node_xy, e_geom, e_tail, e_head, site_node, source, unit) -> None:
    sizes = np.bincount(label[e_tail], minlength=label.max() + 1)
    main = int(np.argmax(sizes))
    other = np.flatnonzero((np.arange(len(sizes)) != main))
    main_geom = shapely.union_all(e_geom[label[e_tail] == main])
    parts = []
    for c in other[:_LISTED]:                    # once per disconnected part (few)
        nodes = np.flatnonzero(label == c)
        pts = shapely.points(node_xy[nodes])
        d = shapely.distance(pts, main_geom)
        j = int(np.argmin(d))
        n_sites = int(np.isin(site_node, nodes).sum())
        parts.append(f"a part with {int(sizes[c])} stretch(es) and {n_sites} site(s) whose end "
                     f"at {_xy(node_xy[nodes[j]])} is {d[j]:.4g} {unit} from the main network")
    more = f" and {len(other) - _LISTED} more" if len(other) > _LISTED else ""
    raise InputError(f"{source}: the lines form {len(sizes)} separate parts: "
                     + "; ".join(parts) + more + ". A disconnected tributary: join its end to "
                     "the channel it flows into (or raise node_tolerance above that gap); for "
                     "separate catchments on purpose pass components='several'")


def _digitised(tail, head, label, keep_comp, node_xy, source, unit):
    out_deg = np.bincount(tail, minlength=len(node_xy))
    split = np.flatnonzero((out_deg >= 2) & np.isin(label, keep_comp))
    if len(split):
        v = int(split[0])
        sinks = np.flatnonzero((out_deg == 0) & (label == label[v]))
        where = ", ".join(_xy(node_xy[s]) for s in sinks[:_LISTED])
        raise InputError(f"{source}: {int(out_deg[v])} lines leave the point {_xy(node_xy[v])} "
                         f"in their digitised direction, so flow would split there and this "
                         f"part of the network has {len(sinks)} outlets ({where}); a line is "
                         f"digitised against the flow (reverse it) or the reach is braided; "
                         f"or declare the outlet (direction='outlet') to orient every line "
                         f"towards it")
    sinks = np.flatnonzero(out_deg == 0)
    outlets = tuple(int(s) for s in sinks[np.argsort(label[sinks], kind="stable")]
                    if label[s] in set(keep_comp.tolist()))
    return tail, head, outlets


def _towards_outlets(outlet, tail, head, geom, und, label, keep_comp, node_xy, tol, source,
                     unit):
    try:
        pts = np.array(outlet, dtype=np.float64).reshape(-1, 2)
    except (TypeError, ValueError):
        raise InputError(f"`outlet` must be an (x, y) point or a list of them in the working "
                         f"CRS; got {outlet!r}") from None
    if not np.isfinite(pts).all():
        raise InputError(f"`outlet` must hold finite coordinates; got {outlet!r}")
    d, nearest = cKDTree(node_xy).query(pts)
    far = np.flatnonzero(d > tol)
    if len(far):
        i = int(far[0])
        raise InputError(f"outlet {_xy(pts[i])} lies {d[i]:.4g} {unit} from the nearest line "
                         f"end or junction of {source} (more than snap_tolerance={tol:g}); "
                         f"give the outlet's coordinates in the working CRS, at the river's "
                         f"downstream end")
    comp = label[nearest]
    dup = pd.Series(comp).duplicated(keep=False).to_numpy()
    if dup.any():
        a, b = np.flatnonzero(dup)[:2]
        raise InputError(f"outlets {_xy(pts[a])} and {_xy(pts[b])} lie on the same connected "
                         f"part of {source}; a dendritic network has one outlet per part: "
                         f"keep the downstream one")
    missing = np.setdiff1d(keep_comp, comp)
    if len(missing):
        nodes = np.flatnonzero(label == missing[0])
        raise InputError(f"the part of {source} around {_xy(node_xy[nodes[0]])} holds sites "
                         f"but no declared outlet; give one outlet per connected part")
    parent = np.full(len(node_xy), -1, dtype=np.int64)
    for root in nearest[np.isin(comp, keep_comp)]:          # once per outlet
        _, pred = csgraph.breadth_first_order(und, int(root), directed=False)
        reached = pred >= 0
        parent[reached] = pred[reached]
    flip = parent[head] == tail              # the line's head is upstream of its tail
    new_tail = np.where(flip, head, tail)
    new_head = np.where(flip, tail, head)
    geom = geom.copy()
    if flip.any():
        geom[flip] = shapely.reverse(geom[flip])
    outlets = tuple(int(o) for o in nearest[np.isin(comp, keep_comp)][
        np.argsort(comp[np.isin(comp, keep_comp)], kind="stable")])
    return new_tail, new_head, geom, outlets


def _pin_ends(geom: np.ndarray, start: np.ndarray, stop: np.ndarray) -> np.ndarray:
    """Move each edge's first / last vertex exactly onto its nodes (joined ends)."""
    coords, index = shapely.get_coordinates(geom, return_index=True)
    first = np.searchsorted(index, np.arange(len(geom)))
    last = np.append(first[1:], len(index)) - 1
    coords[first] = start
    coords[last] = stop
    return shapely.set_coordinates(geom.copy(), coords)
