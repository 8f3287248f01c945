"""Neighbour graphs between survey sites and their edge weightings, as scipy.sparse matrices.

Graphs: Delaunay triangulation, Gabriel graph, relative neighbourhood graph, minimum spanning
tree (the Delaunay family, nested as MST ⊆ RNG ⊆ Gabriel ⊆ Delaunay; Toussaint 1980, Matula &
Sokal 1980), k nearest neighbours (symmetrised by union), distance band and polygon contiguity.
Every graph is built from scipy.spatial (Delaunay, cKDTree), scipy.sparse.csgraph and shapely's
STRtree; no step loops over sites in Python.

Distances are Euclidean in map units (metres for projected surveys). Coordinates in degrees
are never used as planar: pass ``distance="great_circle"`` (haversine-equivalent distances on a
sphere of radius 6,371,008.8 m, the IUGG mean Earth radius) or project them first.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy import sparse
from scipy.sparse import csgraph
from scipy.spatial import Delaunay, cKDTree

from spatial_ev._validation import check_int, check_option, check_real
from spatial_ev.errors import DisconnectedGraphWarning, GraphError, InputError
from spatial_ev.space.geometry import (REL_TOL, Layout, band_pairs, check_coordinates,
                                       chord_to_distance, delaunay_edges, distance_to_chord,
                                       layout_points, mst_edges, pair_lengths, symmetric_matrix)

__all__ = ["NeighbourGraph", "neighbour_graph", "insertion_neighbours", "edge_weight_values",
           "check_weighting", "check_weighting_exponent", "METHODS",
           "WEIGHTINGS"]

METHODS = ("delaunay", "gabriel", "relative_neighbourhood", "minimum_spanning_tree",
           "k_nearest", "distance_band", "contiguity")
WEIGHTINGS = ("binary", "linear", "concave_down", "concave_up")


def _gabriel_filter(layout: Layout, tree: cKDTree, i: np.ndarray, j: np.ndarray) -> np.ndarray:
    """Keep edges whose closed diametral disk holds no other site (d_ik² + d_jk² ≤ d_ij²)."""
    p = layout.points
    mid = 0.5 * (p[i] + p[j])
    radius = 0.5 * np.sqrt(((p[i] - p[j]) ** 2).sum(axis=1))
    counts = tree.query_ball_point(mid, radius * (1 + REL_TOL), return_length=True)
    return counts <= 2  # only i and j themselves


def _rng_filter(layout: Layout, tree: cKDTree, i: np.ndarray, j: np.ndarray) -> np.ndarray:
    """Keep edges whose open lune holds no site k with max(d_ik, d_jk) < d_ij."""
    p = layout.points
    d = np.sqrt(((p[i] - p[j]) ** 2).sum(axis=1))
    r = d * (1 - REL_TOL)
    hits = tree.query_ball_point(p[i], r)
    lengths = np.fromiter((len(h) for h in hits), dtype=np.int64, count=len(hits))
    if lengths.sum() == 0:
        return np.ones(len(i), dtype=bool)
    k = np.concatenate([np.asarray(h, dtype=np.int64) for h in hits])
    edge = np.repeat(np.arange(len(i)), lengths)
    djk = np.sqrt(((p[j[edge]] - p[k]) ** 2).sum(axis=1))
    blocked = (djk < r[edge]) & (k != i[edge]) & (k != j[edge])
    return ~np.bincount(edge, weights=blocked, minlength=len(i)).astype(bool)


@dataclass(frozen=True)
class NeighbourGraph:
    """A symmetric neighbour graph between sites.

    Attributes
    ----------
    lengths : scipy.sparse.csr_matrix, shape (n, n)
        Symmetric; ``lengths[i, j]`` is the length of edge i–j in map units (no self loops).
    site_ids : pandas.Index
        Site identifiers, in row order.
    method : str
        How the graph was built (one of ``"delaunay"``, ``"gabriel"``,
        ``"relative_neighbourhood"``, ``"minimum_spanning_tree"``, ``"k_nearest"``,
        ``"distance_band"``, ``"contiguity"``).
    threshold : float or None
        Distance band threshold (map units), for ``"distance_band"``.
    coords : ndarray, shape (n, 2)
        Site coordinates (map units, or lon/lat degrees when ``metric == "great_circle"``).
    metric : str
        ``"euclidean"`` or ``"great_circle"``.
    parameters : dict
        Other construction settings (``k``, ``contiguity``) needed to extend the graph.
    geometry : GeoSeries or None
        Site polygons of a contiguity graph.
    """

    lengths: sparse.csr_matrix
    site_ids: pd.Index
    method: str
    threshold: float | None
    coords: np.ndarray
    metric: str = "euclidean"
    parameters: dict = field(default_factory=dict)
    geometry: Any = None

    @property
    def n_sites(self) -> int:
        """Number of sites (vertices)."""
        return self.lengths.shape[0]

    @property
    def n_edges(self) -> int:
        """Number of undirected edges."""
        return int(self.lengths.nnz // 2)

    @property
    def n_components(self) -> int:
        """Number of connected components."""
        return int(csgraph.connected_components(self.lengths, directed=False)[0])

    @property
    def longest_edge(self) -> float:
        """Length of the longest edge (map units)."""
        return float(self.lengths.data.max()) if self.lengths.nnz else 0.0

    def edges(self) -> pd.DataFrame:
        """Edge list with columns ``from``, ``to`` (site ids) and ``length`` (i < j)."""
        upper = sparse.triu(self.lengths, k=1).tocoo()
        return pd.DataFrame({"from": self.site_ids[upper.row], "to": self.site_ids[upper.col],
                             "length": upper.data})

    def weights(self, weighting: str = "binary", *, exponent: float | None = None,
                max_distance: float | None = None) -> sparse.csr_matrix:
        """Symmetric edge-weight matrix W = B∘A for a weighting of edge length d.

        ``"binary"``: 1; ``"linear"``: 1 − d/d_max; ``"concave_down"``: 1 − (d/d_max)^α;
        ``"concave_up"``: d^(−β) (Dray, Legendre & Peres-Neto 2006, Ecol. Model. 196:483–493;
        Bauman, Drouet, Fortin & Dray 2018, Ecology 99:2159–2166 [memory for exact forms]).
        ``d_max`` defaults to the longest edge of the graph, which then gets weight 0; pass a
        larger ``max_distance`` to keep it. ``exponent`` (α or β > 0) is required for the
        concave weightings and refused otherwise. Concave-up weights depend on the map unit
        (Moran's I and the eigenvectors do not).

        Examples
        --------
        >>> g = neighbour_graph([[0, 0], [1, 0], [3, 0]], method="delaunay")
        >>> float(g.weights("linear", max_distance=4).toarray()[0, 1])
        0.75
        """
        weighting, exponent, d_max = check_weighting(self, weighting, exponent, max_distance)
        w = self.lengths.copy()
        w.data = edge_weight_values(w.data, weighting, exponent, d_max)
        return w


def check_weighting_exponent(weighting: str, exponent: Any) -> float | None:
    """The exponent of a concave edge weighting: required (> 0) for ``concave_down`` and
    ``concave_up``, refused for the others.

    Examples
    --------
    >>> check_weighting_exponent("concave_down", 0.5), check_weighting_exponent("linear", None)
    (0.5, None)
    """
    if weighting in ("concave_down", "concave_up"):
        if exponent is None:
            raise InputError(f"weighting={weighting!r} needs `exponent` (a number > 0, e.g. "
                             "0.5, 1 or 2); got None")
        return check_real("exponent", exponent, low=0, low_inclusive=False)
    if exponent is not None:
        raise InputError(f"`exponent` applies only to the concave weightings; got "
                         f"exponent={exponent!r} with weighting={weighting!r}; drop it")
    return None


def check_weighting(graph: NeighbourGraph, weighting: str, exponent: Any,
                     max_distance: Any) -> tuple[str, float | None, float]:
    weighting = check_option("weighting", weighting, WEIGHTINGS)
    exponent = check_weighting_exponent(weighting, exponent)
    d_max = graph.longest_edge
    if max_distance is not None:
        max_distance = check_real("max_distance", max_distance, low=0, low_inclusive=False)
        if max_distance < d_max:
            raise InputError(f"`max_distance` must be at least the longest edge "
                             f"({d_max:g}); got {max_distance:g}")
        d_max = max_distance
    return weighting, exponent, d_max


def edge_weight_values(d: np.ndarray, weighting: str, exponent: float | None,
                   d_max: float) -> np.ndarray:
    rules = {
        "binary": lambda: np.ones_like(d),
        "linear": lambda: np.clip(1.0 - d / d_max, 0.0, None),
        "concave_down": lambda: np.clip(1.0 - (d / d_max) ** exponent, 0.0, None),
        "concave_up": lambda: np.where(d > 0, d, np.inf) ** (-exponent),
    }
    return rules[weighting]()


def _build_delaunay_family(layout: Layout, method: str, **_: Any):
    if method == "minimum_spanning_tree":
        i, j, d = mst_edges(layout)
        return i, j, d, None
    i, j = delaunay_edges(layout)
    if method in ("gabriel", "relative_neighbourhood") and not layout.collinear:
        tree = cKDTree(layout.points)
        keep = _gabriel_filter(layout, tree, i, j)
        i, j = i[keep], j[keep]
        if method == "relative_neighbourhood":
            keep = _rng_filter(layout, tree, i, j)
            i, j = i[keep], j[keep]
    return i, j, pair_lengths(layout, i, j), None


def _build_k_nearest(layout: Layout, method: str, *, k: int | None, **_: Any):
    if k is None:
        raise InputError("method='k_nearest' needs `k` (number of neighbours, e.g. 4); got None")
    k = check_int("k", k, low=1, high=layout.n - 1)
    _, idx = cKDTree(layout.points).query(layout.points, k=k + 1)
    i = np.repeat(np.arange(layout.n), k)
    j = idx[:, 1:].ravel()
    pairs = np.unique(np.column_stack([np.minimum(i, j), np.maximum(i, j)]), axis=0)
    return pairs[:, 0], pairs[:, 1], pair_lengths(layout, pairs[:, 0], pairs[:, 1]), None


def _build_distance_band(layout: Layout, method: str, *, threshold: float | None, **_: Any):
    if threshold is None:
        threshold = float(mst_edges(layout)[2].max())
    else:
        threshold = check_real("threshold", threshold, low=0, low_inclusive=False)
    i, j, d = band_pairs(layout, threshold)
    return i, j, d, threshold


def _build_contiguity(layout: Layout, method: str, *, polygons: Any, contiguity: str, **_: Any):
    import shapely

    geoms = np.asarray(getattr(polygons, "values", polygons), dtype=object)
    if len(geoms) != layout.n:
        raise InputError(f"`polygons` has {len(geoms)} geometries for {layout.n} sites; "
                         "give one polygon per site in the same order")
    kinds = shapely.get_type_id(geoms)
    if not np.isin(kinds, [3, 6]).all():
        bad = int(np.flatnonzero(~np.isin(kinds, [3, 6]))[0])
        raise InputError(f"method='contiguity' needs polygon sites; site "
                         f"{layout.site_ids[bad]!r} is a {shapely.get_type_id(geoms[bad])!r} "
                         "geometry type; use a distance or Delaunay-family method for points")
    tree = shapely.STRtree(geoms)
    a, b = tree.query(geoms, predicate="intersects")
    keep = a < b
    a, b = a[keep], b[keep]
    if contiguity == "edge" and len(a):
        shared = shapely.intersection(shapely.boundary(geoms[a]), shapely.boundary(geoms[b]))
        extent = np.ptp(layout.xy, axis=0).max()
        overlap = shapely.area(shapely.intersection(geoms[a], geoms[b])) > 0
        keep = (shapely.length(shared) > REL_TOL * extent) | overlap
        a, b = a[keep], b[keep]
    a, b = a.astype(np.int64), b.astype(np.int64)
    return a, b, pair_lengths(layout, a, b), None


_BUILDERS = {
    "delaunay": _build_delaunay_family,
    "gabriel": _build_delaunay_family,
    "relative_neighbourhood": _build_delaunay_family,
    "minimum_spanning_tree": _build_delaunay_family,
    "k_nearest": _build_k_nearest,
    "distance_band": _build_distance_band,
    "contiguity": _build_contiguity,
}


def _components_text(lengths: sparse.csr_matrix, site_ids: pd.Index) -> str:
    n_comp, labels = csgraph.connected_components(lengths, directed=False)
    sizes = np.bincount(labels)
    order = np.argsort(-sizes, kind="stable")
    parts = []
    for c in order[:6]:
        first = site_ids[np.flatnonzero(labels == c)[0]]
        parts.append(f"{sizes[c]} (e.g. site {first!r})")
    more = f" and {n_comp - 6} more" if n_comp > 6 else ""
    return f"{n_comp} components of sizes " + ", ".join(parts) + more


def neighbour_graph(coords: Any = None, method: str = "gabriel", *, k: int | None = None,
                    threshold: float | None = None, polygons: Any = None,
                    contiguity: str = "edge", disconnected: str = "raise",
                    distance: str = "auto") -> NeighbourGraph:
    """Build a symmetric neighbour graph between sites.

    Parameters
    ----------
    coords : (n, 2) array, DataFrame with columns ``x``, ``y`` (index = site ids), or Survey
        Site positions in a projected CRS (map units). A Survey's ``coords`` are used, and its
        polygons for ``method="contiguity"``. May be None when ``polygons`` is given.
    method : str
        ``"delaunay"``, ``"gabriel"``, ``"relative_neighbourhood"``,
        ``"minimum_spanning_tree"``, ``"k_nearest"``, ``"distance_band"`` or ``"contiguity"``.
        Gabriel and RNG edges are filtered from Delaunay edges with KD-tree queries (diametral
        disk, lune), with a relative tolerance of 1e-9 for sites on a circle or lune boundary.
        On a transect (all sites collinear) the Delaunay family is the path along the line.
    k : int
        Neighbours per site for ``"k_nearest"``; the graph is the union of the k-nearest
        relations, so some sites have more than k neighbours.
    threshold : float
        Distance band (map units) for ``"distance_band"``; default the longest edge of the
        minimum spanning tree, the smallest distance that connects all sites (exact).
    polygons : GeoSeries or array of shapely polygons
        Site polygons for ``"contiguity"`` (default: the Survey's polygons).
    contiguity : {"edge", "vertex"}
        Polygons are neighbours when they share a boundary segment of positive length, or any
        boundary point. Overlapping polygons are neighbours under both rules.
    disconnected : {"raise", "allow"}
        A graph with several components raises :class:`GraphError` naming their sizes, or
        (``"allow"``) is returned with a :class:`DisconnectedGraphWarning`; eigenvectors of a
        disconnected graph then partly contrast the components.
    distance : {"auto", "euclidean", "great_circle"}
        ``"great_circle"`` reads coords as lon/lat degrees and measures great-circle distances
        on a sphere (radius 6,371,008.8 m). ``"auto"`` is Euclidean and warns when raw
        coordinates look like degrees.

    Returns
    -------
    NeighbourGraph

    Examples
    --------
    >>> g = neighbour_graph([[0, 0], [1, 0], [0, 1], [1, 1]], method="gabriel")
    >>> g.n_edges
    4
    """
    method = check_option("method", method, METHODS)
    contiguity = check_option("contiguity", contiguity, ("edge", "vertex"))
    disconnected = check_option("disconnected", disconnected, ("raise", "allow"))
    if coords is None:
        if polygons is None:
            raise InputError("give `coords` (or a Survey), or `polygons` for contiguity")
        rep = polygons.representative_point()
        coords = pd.DataFrame({"x": rep.x.to_numpy(), "y": rep.y.to_numpy()},
                              index=polygons.index)
    layout = check_coordinates(coords, distance=distance)
    if method == "contiguity":
        polygons = layout.geometry if polygons is None else polygons
        if polygons is None:
            raise InputError("method='contiguity' needs site polygons: pass `polygons=` (a "
                             "GeoSeries) or a Survey of polygon sites")
    if threshold is not None and method != "distance_band":
        raise InputError(f"`threshold` applies to method='distance_band'; got "
                         f"method={method!r}; drop it")
    if k is not None and method != "k_nearest":
        raise InputError(f"`k` applies to method='k_nearest'; got method={method!r}; drop it")
    i, j, d, used_threshold = _BUILDERS[method](
        layout, method, k=k, threshold=threshold, polygons=polygons, contiguity=contiguity)
    lengths = symmetric_matrix(layout.n, i, j, d)
    graph = NeighbourGraph(lengths=lengths, site_ids=layout.site_ids, method=method,
                           threshold=used_threshold, coords=layout.xy, metric=layout.metric,
                           parameters={"k": k, "contiguity": contiguity},
                           geometry=polygons if method == "contiguity" else None)
    if graph.n_components > 1:
        text = _components_text(lengths, layout.site_ids)
        if disconnected == "raise":
            fix = {"k_nearest": "increase `k`", "distance_band": "increase `threshold` or "
                   "leave it None (smallest connecting distance)",
                   "contiguity": "use contiguity='vertex', or a distance-based graph for "
                   "islands"}.get(method, "check the sites")
            raise GraphError(f"the {method} graph is disconnected: {text}; {fix}, or pass "
                             "disconnected='allow'")
        warnings.warn(f"the {method} graph is disconnected: {text}", DisconnectedGraphWarning,
                      stacklevel=2)
    return graph


def insertion_neighbours(graph: NeighbourGraph, new_xy: np.ndarray
                         ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Edges a new point would get if it were added to ``graph`` (sites unchanged).

    Rules: Delaunay — sites of the triangles whose circumcircle contains the point (on a
    transect, the nearest site on each side); Gabriel and relative neighbourhood — those
    Delaunay candidates whose diametral disk / lune holds no site; minimum spanning tree — the
    nearest site; k nearest — the k nearest sites; distance band — sites within the threshold.
    A point that coincides with a site (within 1e-9 of the layout's extent) takes that site's
    edges. Returns ``(point, site, length, coincident_site)`` with ``coincident_site`` = −1
    where the point coincides with no site. Contiguity graphs are not extendable from points.
    """
    layout = check_coordinates(graph.coords, distance=graph.metric if graph.metric ==
                           "great_circle" else "euclidean")
    new = layout_points(layout, new_xy)
    tree = cKDTree(layout.points)
    extent = max(np.ptp(layout.points, axis=0).max(), 1e-300)
    nearest_d, nearest = tree.query(new, k=1)
    coincident = np.where(nearest_d <= 1e-9 * extent, nearest, -1)
    free = np.flatnonzero(coincident < 0)
    method = graph.method
    if method == "contiguity":
        raise GraphError("a contiguity graph cannot be extended to points; use the polygon "
                         "that contains each point instead")
    if method == "distance_band":
        chord = distance_to_chord(graph.threshold, layout.metric) * (1 + REL_TOL)
        hits = cKDTree(new[free]).sparse_distance_matrix(tree, chord, output_type="ndarray")
        p, s = free[hits["i"].astype(np.int64)], hits["j"].astype(np.int64)
    elif method in ("minimum_spanning_tree", "k_nearest"):
        kk = 1 if method == "minimum_spanning_tree" else int(graph.parameters["k"])
        _, idx = tree.query(new[free], k=kk)
        idx = np.asarray(idx).reshape(len(free), kk)
        p, s = np.repeat(free, kk), idx.ravel()
    else:
        p, s = _delaunay_candidates(layout, new, free)
        if method in ("gabriel", "relative_neighbourhood"):
            mid = 0.5 * (new[p] + layout.points[s])
            half = 0.5 * np.sqrt(((new[p] - layout.points[s]) ** 2).sum(axis=1))
            ok = tree.query_ball_point(mid, half * (1 + REL_TOL), return_length=True) <= 1
            p, s = p[ok], s[ok]
        if method == "relative_neighbourhood" and len(p):
            r = np.sqrt(((new[p] - layout.points[s]) ** 2).sum(axis=1)) * (1 - REL_TOL)
            hits = tree.query_ball_point(new[p], r)
            lens = np.fromiter((len(h) for h in hits), dtype=np.int64, count=len(hits))
            blocked = np.zeros(len(p), dtype=bool)
            if lens.sum():
                k = np.concatenate([np.asarray(h, dtype=np.int64) for h in hits])
                e = np.repeat(np.arange(len(p)), lens)
                djk = np.sqrt(((layout.points[s[e]] - layout.points[k]) ** 2).sum(axis=1))
                blocked = np.bincount(e, weights=(djk < r[e]) & (k != s[e]),
                                      minlength=len(p)).astype(bool)
            p, s = p[~blocked], s[~blocked]
    chord = np.sqrt(((new[p] - layout.points[s]) ** 2).sum(axis=1))
    return p, s, chord_to_distance(chord, layout.metric), coincident


def _delaunay_candidates(layout: Layout, new: np.ndarray, free: np.ndarray
                         ) -> tuple[np.ndarray, np.ndarray]:
    """Delaunay neighbours of each free new point in the triangulation sites ∪ {point}."""
    if layout.collinear:
        axis0 = layout.xy.mean(axis=0)
        direction = np.linalg.svd(layout.xy - axis0, full_matrices=False)[2][0]
        proj = (layout.xy - axis0) @ direction
        order = np.argsort(proj, kind="stable")
        pos = np.searchsorted(proj[order], (new[free] - axis0) @ direction)
        left, right = pos - 1, pos
        p = np.concatenate([free[left >= 0], free[right < len(order)]])
        s = np.concatenate([order[left[left >= 0]], order[right[right < len(order)]]])
        return p, s
    if layout.metric == "great_circle":
        raise GraphError("extension of great-circle Delaunay-family graphs is not available; "
                         "project the survey to a planar CRS")
    tri = Delaunay(layout.xy)
    v = layout.xy[tri.simplices]                      # (m, 3, 2)
    a, b, c = v[:, 0], v[:, 1], v[:, 2]
    dd = 2 * (a[:, 0] * (b[:, 1] - c[:, 1]) + b[:, 0] * (c[:, 1] - a[:, 1])
              + c[:, 0] * (a[:, 1] - b[:, 1]))
    sa, sb, sc = (a ** 2).sum(1), (b ** 2).sum(1), (c ** 2).sum(1)
    ux = (sa * (b[:, 1] - c[:, 1]) + sb * (c[:, 1] - a[:, 1]) + sc * (a[:, 1] - b[:, 1])) / dd
    uy = (sa * (c[:, 0] - b[:, 0]) + sb * (a[:, 0] - c[:, 0]) + sc * (b[:, 0] - a[:, 0])) / dd
    centre = np.column_stack([ux, uy])
    radius = np.sqrt(((a - centre) ** 2).sum(1))
    # each triangle looks up the points in its own circumcircle: a query from the points
    # with the largest circumradius (a sliver on the hull can span the whole survey) would
    # pair every point with most triangles, O(points × triangles) memory
    hits = cKDTree(new[free]).query_ball_point(centre, radius * (1 + REL_TOL))
    lens = np.fromiter((len(h) for h in hits), dtype=np.int64, count=len(hits))
    local = np.concatenate([np.asarray(h, dtype=np.int64) for h in hits]) if lens.sum() \
        else np.zeros(0, dtype=np.int64)
    owner, t = free[local], np.repeat(np.arange(len(centre), dtype=np.int64), lens)
    inside = ((new[owner] - centre[t]) ** 2).sum(1) < radius[t] ** 2 * (1 - REL_TOL)
    owner, t = owner[inside], t[inside]
    # points outside the hull also see the hull vertices of the edges facing them
    hull_i, hull_j = tri.convex_hull[:, 0], tri.convex_hull[:, 1]
    ext = free[tri.find_simplex(new[free]) < 0]
    pe, se = [], []
    if len(ext):
        pa, pb = layout.xy[hull_i], layout.xy[hull_j]
        inner = layout.xy.mean(axis=0)
        ab, ai = pb - pa, inner - pa
        side_in = np.sign(ab[:, 0] * ai[:, 1] - ab[:, 1] * ai[:, 0])
        side_p = np.sign((pb[None, :, 0] - pa[None, :, 0]) * (new[ext][:, None, 1] - pa[None, :, 1])
                         - (pb[None, :, 1] - pa[None, :, 1]) * (new[ext][:, None, 0] - pa[None, :, 0]))
        facing = side_p * side_in[None, :] < 0
        r, c2 = np.nonzero(facing)
        pe = [ext[r], ext[r]]
        se = [hull_i[c2], hull_j[c2]]
    p = np.concatenate([np.repeat(owner, 3)] + list(pe))
    s = np.concatenate([tri.simplices[t].ravel()] + list(se))
    pairs = np.unique(np.column_stack([p, s]), axis=0)
    return pairs[:, 0], pairs[:, 1]
