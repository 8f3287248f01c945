"""Directional spatial structure: asymmetric eigenvector maps (AEM) on river networks and along
a prevailing bearing, and distance-based eigenvectors of along-network distances.

AEM (Blanchet, Legendre & Borcard 2008, Ecol. Model. 215:325–336) describe a process that
travels in one direction (drift downstream, a current, a wind) through a connection diagram
whose edges are oriented with the process:

* the **site-by-edge matrix** E (sites × edges) has E_ij = 1 when edge j lies upstream of site i
  — whatever passes edge j reaches site i — and 0 otherwise; with
  ``orientation="against_flow"`` the roles swap (edges downstream of the site count), for
  processes moving against the flow. A site with no edge upstream of it (at a headwater end,
  or a site no neighbour points to under a bearing) gets a virtual edge of its own from a
  fictitious origin, so that no two sites share an all-zero row;
* **edge weights** multiply the entries: equal (``"binary"``), or a decreasing function of the
  edge's length or of the along-network distance from the edge's midpoint to the site
  (``"linear"`` 1 − d/d_max, ``"concave_down"`` 1 − (d/d_max)^α, ``"concave_up"`` d^−β, as for
  neighbour graphs); under a bearing every edge is also weighted by the cosine of the angle
  between the edge and the bearing (the paper's weighting for currents and winds);
* the **AEM eigenvectors** are the left singular vectors of the column-centred weighted E
  (equivalently, the principal components of E), ordered by decreasing eigenvalue
  μ_k = s_k², the eigenvalues of C·Ẽ·Ẽᵀ·C (C = I − 11ᵀ/n); the PCA eigenvalues of E are
  μ_k/(n − 1). Their Moran's I is computed on the network graph between sites (sites are
  neighbours when the channel between them passes no other site), or on the neighbour graph
  for a bearing.

The symmetric alternative for rivers is the distance-based MEM of along-network distances
(shortest path lengths on the undirected network; Borcard & Legendre 2002, Ecol. Model.
153:51–68; Dray, Legendre & Peres-Neto 2006, Ecol. Model. 196:483–493): w_ij = 1 − (d_ij/4t)²
for d_ij ≤ t, t the longest edge of the minimum spanning tree of the along-network distances,
then the same dense eigen-solver as :mod:`spatial_ev.space.eigen`.

Scales are equivalent wavelengths measured along the network (see
:func:`equivalent_wavelength`). Graph work uses :mod:`scipy.sparse.csgraph`; nothing loops over
sites or edges in Python (reachability is propagated one step along the network at a time).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy import sparse, special
from scipy.sparse import csgraph
from scipy.sparse.linalg import LinearOperator, eigsh
from threadpoolctl import threadpool_limits

from spatial_ev._validation import check_int, check_option, check_real
from spatial_ev.errors import InputError
from spatial_ev.input.network import RiverNetwork
from spatial_ev.space.eigen import DENSE_LIMIT, SpatialBasis, finish_vectors, solve_dense
from spatial_ev.space.graphs import NeighbourGraph, check_weighting_exponent, edge_weight_values

__all__ = ["DirectionalGraph", "river_graph", "bearing_graph", "SiteEdgeMatrix",
           "site_edge_matrix", "NetworkBasis", "aem_eigenvectors", "network_distances",
           "network_distance_eigenvectors", "equivalent_wavelength", "points_along_network",
           "river_schemes", "bearing_schemes",
           "ORIENTATIONS", "EDGE_WEIGHTINGS", "WEIGHT_BY"]

ORIENTATIONS = ("with_flow", "against_flow")
EDGE_WEIGHTINGS = ("binary", "linear", "concave_down", "concave_up")
WEIGHT_BY = ("edge_length", "network_distance")
_SIGNS = ("positive", "negative", "all")
_SOLVERS = ("auto", "dense", "sparse")
_BLOCK_ELEMENTS = 2 ** 22          # bound of one block of shortest-path rows in memory


# ------------------------------------------------------------------------ directional graphs

@dataclass(frozen=True)
class DirectionalGraph:
    """A connection diagram oriented with a directional process, with the sites on its nodes.

    Attributes
    ----------
    tail, head : ndarray of int, shape (m,)
        Nodes at the upstream and downstream end of each edge (in the process direction:
        with the flow, or along the bearing).
    length : ndarray, shape (m,)
        Edge lengths (map units).
    base_weight : ndarray, shape (m,)
        Weight of each edge before any length weighting: 1 on a river network, the cosine of
        the angle between edge and bearing under a bearing.
    node_xy : ndarray, shape (k, 2)
        Node coordinates (working CRS).
    site_nodes : ndarray of int, shape (n,)
        Node of each site.
    site_ids : pandas.Index
        Site ids.
    neighbours : scipy.sparse.csr_matrix, shape (n, n)
        Symmetric lengths between neighbouring sites (the graph Moran's I and scales use):
        along the network, sites whose connecting channel passes no other site; under a
        bearing, the neighbour graph the directions came from. Sites sharing a position are
        neighbours at distance 0 (stored as the explicit value 0).
    kind : str
        ``"river_network"`` or ``"bearing"``.
    downstream_distance : ndarray or None, shape (k,)
        Along-network distance from each node to its outlet (river networks only).
    parent : ndarray of int or None, shape (k,)
        Downstream neighbour of each node, −1 at an outlet (river networks only).
    bearing : float or None
        Bearing in degrees clockwise from grid north (bearing graphs only).
    network : RiverNetwork or None
        The network the graph was built from (locating new points along it).
    distance_unit : str
        Map unit of the lengths.
    """

    tail: np.ndarray
    head: np.ndarray
    length: np.ndarray
    base_weight: np.ndarray
    node_xy: np.ndarray
    site_nodes: np.ndarray
    site_ids: pd.Index
    neighbours: sparse.csr_matrix
    kind: str
    downstream_distance: np.ndarray | None = None
    parent: np.ndarray | None = None
    bearing: float | None = None
    network: RiverNetwork | None = field(default=None, repr=False)
    distance_unit: str = "map unit"

    @property
    def n_sites(self) -> int:
        """Number of sites."""
        return len(self.site_nodes)

    @property
    def n_nodes(self) -> int:
        """Number of nodes."""
        return len(self.node_xy)

    @property
    def n_edges(self) -> int:
        """Number of (oriented) edges."""
        return len(self.tail)

    def undirected(self) -> sparse.csr_matrix:
        """Symmetric node × node matrix of edge lengths.

        Examples
        --------
        >>> from spatial_ev.space.graphs import neighbour_graph
        >>> g = bearing_graph(neighbour_graph([[0, 0], [2, 0]], "delaunay"), bearing=90)
        >>> g.undirected().toarray().tolist()
        [[0.0, 2.0], [2.0, 0.0]]
        """
        k = self.n_nodes
        return sparse.coo_matrix(
            (np.concatenate([self.length, self.length]),
             (np.concatenate([self.tail, self.head]), np.concatenate([self.head, self.tail]))),
            shape=(k, k)).tocsr()

    def neighbour_weights(self) -> sparse.csr_matrix:
        """Binary symmetric weights between neighbouring sites (for Moran's I).

        Examples
        --------
        >>> from spatial_ev.space.graphs import neighbour_graph
        >>> g = bearing_graph(neighbour_graph([[0, 0], [2, 0]], "delaunay"), bearing=90)
        >>> g.neighbour_weights().toarray().tolist()
        [[0.0, 1.0], [1.0, 0.0]]
        """
        w = self.neighbours.copy()
        w.data = np.ones_like(w.data)
        return w


def river_graph(network: RiverNetwork) -> DirectionalGraph:
    """The directional graph of a river network: edges with the flow, sites on nodes.

    Parameters
    ----------
    network : RiverNetwork
        From :func:`spatial_ev.input.network.read_river_network` or
        :func:`~spatial_ev.input.network.build_river_network`.

    Returns
    -------
    DirectionalGraph
        ``neighbours`` links sites whose connecting channel passes no other site, with the
        along-network distance between them.

    Examples
    --------
    >>> import shapely
    >>> from spatial_ev.input.network import build_river_network
    >>> line = shapely.LineString([(0, 0), (10, 0)])
    >>> sites = pd.DataFrame({"x": [2.0, 5.0, 9.0], "y": 0.0}, index=list("abc"))
    >>> g = river_graph(build_river_network([line], sites, snap_tolerance=1))
    >>> g.neighbours.toarray().tolist()
    [[0.0, 3.0, 0.0], [3.0, 0.0, 4.0], [0.0, 4.0, 0.0]]
    """
    if not isinstance(network, RiverNetwork):
        raise InputError("`network` must be a RiverNetwork (read_river_network); got "
                         f"{type(network).__name__}")
    e = network.edges
    tail = e["upstream_node"].to_numpy(dtype=np.int64)
    head = e["downstream_node"].to_numpy(dtype=np.int64)
    length = e["length"].to_numpy(dtype=np.float64)
    node_xy = network.nodes[["x", "y"]].to_numpy(dtype=np.float64)
    k = len(node_xy)
    parent = np.full(k, -1, dtype=np.int64)
    parent[tail] = head
    step = np.zeros(k)
    step[tail] = length
    und = network.adjacency()
    outlets = np.asarray(network.outlets, dtype=np.int64)
    dto = csgraph.dijkstra(und, directed=False, indices=outlets, min_only=True)
    depth = csgraph.dijkstra(und, directed=False, indices=outlets, min_only=True,
                             unweighted=True).astype(np.int64)
    site_nodes = network.site_nodes
    i, j = _river_neighbour_pairs(und, site_nodes, parent, depth)
    a, b = site_nodes[i], site_nodes[j]
    lca = _lowest_common_ancestor(parent, depth, a, b)
    d = np.maximum(dto[a] + dto[b] - 2 * dto[lca], 0.0)
    n = len(site_nodes)
    neighbours = _symmetric_with_zeros(n, i, j, d)
    return DirectionalGraph(tail=tail, head=head, length=length, base_weight=np.ones(len(tail)),
                            node_xy=node_xy, site_nodes=site_nodes, site_ids=network.site_ids,
                            neighbours=neighbours, kind="river_network",
                            downstream_distance=dto, parent=parent, network=network,
                            distance_unit=network.distance_unit)


def bearing_graph(graph: NeighbourGraph, *, bearing: float,
                  distance_unit: str = "map unit") -> DirectionalGraph:
    """Orient a neighbour graph along a prevailing current or wind.

    Each edge i–j is directed so that it points with the bearing (from i to j when the
    vector from i to j has a positive component along the bearing) and weighted by |cos θ|,
    θ the angle between the edge and the bearing (Blanchet, Legendre & Borcard 2008);
    edges perpendicular to the bearing (|cos θ| < 1e-9) carry no direction and are dropped
    from the diagram (they stay in the neighbour graph used for Moran's I).

    Parameters
    ----------
    graph : NeighbourGraph
        From :func:`spatial_ev.space.graphs.neighbour_graph` (planar coordinates).
    bearing : float
        Direction the current or wind moves *towards*, in degrees clockwise from grid north
        (the map's +y axis): 0 = northward, 90 = eastward. A wind reported as "from the
        west" blows towards 90.
    distance_unit : str
        Unit of the graph's coordinates, used in summaries (``Survey.distance_unit``).

    Returns
    -------
    DirectionalGraph

    Examples
    --------
    >>> from spatial_ev.space.graphs import neighbour_graph
    >>> g = neighbour_graph([[0, 0], [1, 0], [2, 0]], "delaunay")
    >>> d = bearing_graph(g, bearing=90.0)
    >>> d.tail.tolist(), d.head.tolist(), d.base_weight.round(6).tolist()
    ([0, 1], [1, 2], [1.0, 1.0])
    """
    if not isinstance(graph, NeighbourGraph):
        raise InputError("`graph` must be a NeighbourGraph (neighbour_graph); got "
                         f"{type(graph).__name__}")
    if graph.metric != "euclidean":
        raise InputError("`graph` must use planar coordinates (a bearing needs a grid north); "
                         "project the survey first")
    bearing = check_real("bearing", bearing)
    if not isinstance(distance_unit, str) or not distance_unit.strip():
        raise InputError(f"`distance_unit` must be a non-empty name; got {distance_unit!r}")
    theta = np.radians(bearing)
    direction = np.array([np.sin(theta), np.cos(theta)])
    up = sparse.triu(graph.lengths, k=1).tocoo()
    i, j, d = up.row.astype(np.int64), up.col.astype(np.int64), up.data
    vec = graph.coords[j] - graph.coords[i]
    cos = (vec @ direction) / np.where(d > 0, d, 1.0)
    keep = np.abs(cos) >= 1e-9
    i, j, d, cos = i[keep], j[keep], d[keep], cos[keep]
    tail = np.where(cos > 0, i, j)
    head = np.where(cos > 0, j, i)
    n = graph.n_sites
    return DirectionalGraph(tail=tail, head=head, length=d, base_weight=np.abs(cos),
                            node_xy=np.asarray(graph.coords, dtype=np.float64),
                            site_nodes=np.arange(n), site_ids=graph.site_ids,
                            neighbours=sparse.csr_matrix(graph.lengths), kind="bearing",
                            bearing=bearing % 360.0, distance_unit=distance_unit)


def _symmetric_with_zeros(n: int, i: np.ndarray, j: np.ndarray, d: np.ndarray
                          ) -> sparse.csr_matrix:
    """Symmetric sparse matrix that keeps explicit zeros (sites at the same position)."""
    m = sparse.csr_matrix((np.concatenate([d, d]), (np.concatenate([i, j]),
                                                    np.concatenate([j, i]))), shape=(n, n))
    m.sum_duplicates()
    return m


def _river_neighbour_pairs(und, site_nodes, parent, depth) -> tuple[np.ndarray, np.ndarray]:
    """Site pairs whose connecting channel passes no other site (i < j, site indices)."""
    k = und.shape[0]
    is_site = np.zeros(k, bool)
    is_site[site_nodes] = True
    coo = sparse.triu(und, k=1).tocoo()
    a, b = coo.row, coo.col
    # components of the network once site nodes are removed
    keep = ~is_site[a] & ~is_site[b]
    inner = sparse.coo_matrix((np.ones(keep.sum()), (a[keep], b[keep])), shape=(k, k))
    _, label = csgraph.connected_components(inner, directed=False)
    # site node pairs joined directly, or through one component of non-site nodes
    direct = is_site[a] & is_site[b]
    pa, pb = [a[direct]], [b[direct]]
    touch = is_site[a] ^ is_site[b]
    s = np.where(is_site[a], a, b)[touch]
    c = label[np.where(is_site[a], b, a)[touch]]
    sc = np.unique(np.column_stack([c, s]), axis=0)
    starts = np.flatnonzero(np.r_[True, np.diff(sc[:, 0]) != 0])
    sizes = np.diff(np.r_[starts, len(sc)])
    # all pairs within each group, vectorised over groups
    g_of = np.repeat(np.arange(len(starts)), sizes * sizes)
    local = np.arange(len(g_of)) - np.repeat(np.cumsum(sizes * sizes) - sizes * sizes,
                                             sizes * sizes)
    r = local // np.repeat(sizes, sizes * sizes)
    q = local % np.repeat(sizes, sizes * sizes)
    ok = r < q
    base = starts[g_of]
    pa.append(sc[base + r, 1][ok])
    pb.append(sc[base + q, 1][ok])
    na, nb = np.concatenate(pa), np.concatenate(pb)
    node_pairs = np.unique(np.column_stack([np.minimum(na, nb), np.maximum(na, nb)]), axis=0)
    # node pairs -> site pairs (several sites may share a node)
    order = np.argsort(site_nodes, kind="stable")
    sorted_nodes = site_nodes[order]
    first = np.searchsorted(sorted_nodes, np.arange(k))
    count = np.searchsorted(sorted_nodes, np.arange(k), side="right") - first
    ii, jj = [], []
    if len(node_pairs):
        u, v = node_pairs[:, 0], node_pairs[:, 1]
        cu, cv = count[u], count[v]
        rep = cu * cv
        idx = np.arange(rep.sum()) - np.repeat(np.cumsum(rep) - rep, rep)
        ii.append(order[np.repeat(first[u], rep) + idx // np.repeat(cv, rep)])
        jj.append(order[np.repeat(first[v], rep) + idx % np.repeat(cv, rep)])
    shared = np.flatnonzero(count > 1)
    if len(shared):
        rep = count[shared] ** 2
        idx = np.arange(rep.sum()) - np.repeat(np.cumsum(rep) - rep, rep)
        cs = np.repeat(count[shared], rep)
        r, q = idx // cs, idx % cs
        ok = r < q
        f = np.repeat(first[shared], rep)
        ii.append(order[(f + r)[ok]])
        jj.append(order[(f + q)[ok]])
    if not ii:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    i, j = np.concatenate(ii), np.concatenate(jj)
    return np.minimum(i, j), np.maximum(i, j)


def _lowest_common_ancestor(parent: np.ndarray, depth: np.ndarray, a: np.ndarray,
                            b: np.ndarray) -> np.ndarray:
    """Lowest common ancestor (towards the outlet) of node pairs, by binary lifting."""
    if len(a) == 0:
        return a.copy()
    root_self = np.where(parent < 0, np.arange(len(parent)), parent)
    levels = max(1, int(depth.max()).bit_length())
    up = [root_self]
    for _ in range(1, levels):                 # log2(depth) levels
        up.append(up[-1][up[-1]])
    swap = depth[a] < depth[b]
    a, b = np.where(swap, b, a), np.where(swap, a, b)
    diff = depth[a] - depth[b]
    for lvl in range(levels):
        a = np.where((diff >> lvl) & 1 == 1, up[lvl][a], a)
    for lvl in reversed(range(levels)):
        ua, ub = up[lvl][a], up[lvl][b]
        move = ua != ub
        a, b = np.where(move, ua, a), np.where(move, ub, b)
    return np.where(a == b, a, up[0][a])


# ------------------------------------------------------------------------ site-by-edge matrix

@dataclass(frozen=True)
class SiteEdgeMatrix:
    """The weighted site-by-edge matrix of an AEM.

    Attributes
    ----------
    matrix : scipy.sparse.csr_matrix, shape (n_sites, n_columns)
        Weighted entries; columns are the diagram's edges that reach at least one site, then
        the virtual edges of sites with nothing upstream.
    edges : pandas.DataFrame
        One row per column: ``tail``, ``head`` (the edge's ends in the process direction, so
        with ``orientation="against_flow"`` ``tail`` is the downstream node; ``tail`` −1 for a
        virtual edge), ``length``, ``base_weight`` and ``graph_edge`` (index into the
        directional graph's edges, −1 for a virtual edge).
    site_ids : pandas.Index
    orientation, weighting, weight_by : str
    exponent, max_distance : float or None
        Settings used (``max_distance`` = the d_max actually applied).
    """

    matrix: sparse.csr_matrix
    edges: pd.DataFrame
    site_ids: pd.Index
    orientation: str
    weighting: str
    weight_by: str
    exponent: float | None
    max_distance: float | None

    def to_frame(self) -> pd.DataFrame:
        """Dense sites × columns table (columns ``e0001``, … and ``origin_<node>``).

        Examples
        --------
        >>> from spatial_ev.space.graphs import neighbour_graph
        >>> g = bearing_graph(neighbour_graph([[0, 0], [2, 0]], "delaunay"), bearing=90)
        >>> site_edge_matrix(g).to_frame().to_numpy().tolist()
        [[0.0, 1.0], [1.0, 1.0]]
        """
        return pd.DataFrame(self.matrix.toarray(), index=self.site_ids,
                            columns=self.edges.index)


def site_edge_matrix(graph: DirectionalGraph, *, orientation: str = "with_flow",
                     weighting: str = "binary", weight_by: str = "edge_length",
                     exponent: float | None = None,
                     max_distance: float | None = None) -> SiteEdgeMatrix:
    """The (weighted) site-by-edge matrix E of an asymmetric eigenvector map.

    Parameters
    ----------
    graph : DirectionalGraph
        From :func:`river_graph` or :func:`bearing_graph`.
    orientation : {"with_flow", "against_flow"}
        ``"with_flow"``: E_ij ≠ 0 when edge j lies upstream of site i (the process travels
        with the flow or along the bearing). ``"against_flow"``: when edge j lies downstream
        of site i (e.g. upstream dispersal of adults).
    weighting : {"binary", "linear", "concave_down", "concave_up"}
        Equal weights, or 1 − d/d_max, 1 − (d/d_max)^α, d^−β of the distance chosen by
        ``weight_by``.
    weight_by : {"edge_length", "network_distance"}
        d is the edge's length, or the along-network distance from the edge's midpoint to the
        site (river networks only).
    exponent : float, optional
        α or β of the concave weightings (required for them, refused otherwise).
    max_distance : float, optional
        d_max; default the largest d among the entries (whose weight then becomes 0 under
        ``"linear"`` / ``"concave_down"``: pass a larger value to keep it).

    Returns
    -------
    SiteEdgeMatrix
        Virtual edges (sites with nothing upstream) always weigh 1 (times nothing else).

    Examples
    --------
    >>> import shapely
    >>> from spatial_ev.input.network import build_river_network
    >>> line = shapely.LineString([(0, 0), (10, 0)])
    >>> sites = pd.DataFrame({"x": [2.0, 5.0, 9.0], "y": 0.0}, index=list("abc"))
    >>> g = river_graph(build_river_network([line], sites, snap_tolerance=1))
    >>> site_edge_matrix(g).matrix.toarray().tolist()
    [[1.0, 0.0, 0.0], [1.0, 1.0, 0.0], [1.0, 1.0, 1.0]]
    """
    if not isinstance(graph, DirectionalGraph):
        raise InputError("`graph` must be a DirectionalGraph (river_graph or bearing_graph); "
                         f"got {type(graph).__name__}")
    orientation = check_option("orientation", orientation, ORIENTATIONS)
    weighting, exponent, weight_by, max_distance = _check_edge_weighting(
        graph, weighting, exponent, weight_by, max_distance)
    ptail, phead = (graph.tail, graph.head) if orientation == "with_flow" else \
        (graph.head, graph.tail)
    k, n = graph.n_nodes, graph.n_sites
    # virtual edges into site nodes that nothing reaches
    indeg = np.bincount(phead, minlength=k)
    lonely = np.unique(graph.site_nodes[indeg[graph.site_nodes] == 0])
    targets = graph.site_nodes
    reach = _reach(ptail, phead, k, targets)           # node x site: node reaches the site
    all_head = np.concatenate([phead, lonely])
    e = sparse.csr_matrix(reach[all_head].T)            # sites x (edges + virtual)
    e.eliminate_zeros()
    coo = e.tocoo()
    site, col = coo.row, coo.col
    m = graph.n_edges
    real = col < m
    length = np.concatenate([graph.length, np.zeros(len(lonely))])
    if weight_by == "edge_length":
        d = length[col]
    else:
        phi = graph.downstream_distance if orientation == "with_flow" else \
            -graph.downstream_distance
        d = phi[all_head[col]] - phi[targets[site]] + length[col] / 2
    d_used = d[real]
    d_max = max_distance if max_distance is not None else \
        (float(d_used.max()) if len(d_used) else 1.0)
    w = np.ones(len(col))
    if weighting != "binary" and real.any():
        w[real] = edge_weight_values(d_used, weighting, exponent, d_max)
    w[real] *= graph.base_weight[col[real]]
    if real.any() and not (w[real] > 0).any():
        raise InputError(f"weighting={weighting!r} gives every edge weight 0 (every distance "
                         f"equals d_max = {d_max:g}, e.g. equally long edges); pass "
                         f"`max_distance` larger than {d_max:g}, or use weighting='binary'")
    mat = sparse.csr_matrix((w, (site, col)), shape=(n, len(all_head)))
    mat.eliminate_zeros()
    used = np.flatnonzero(np.asarray((mat != 0).sum(axis=0)).ravel() > 0)
    mat = sparse.csr_matrix(mat[:, used])
    graph_edge = np.concatenate([np.arange(m), np.full(len(lonely), -1)])[used]
    names = np.where(graph_edge >= 0, [f"e{g + 1:04d}" for g in graph_edge],
                     [f"origin_{v}" for v in all_head[used]])
    edges = pd.DataFrame({"tail": np.where(graph_edge >= 0, ptail[np.maximum(graph_edge, 0)],
                                           -1),
                          "head": all_head[used], "length": length[used],
                          "base_weight": np.where(graph_edge >= 0,
                                                  graph.base_weight[np.maximum(graph_edge, 0)],
                                                  1.0),
                          "graph_edge": graph_edge}, index=pd.Index(names, name="edge"))
    return SiteEdgeMatrix(matrix=mat, edges=edges, site_ids=graph.site_ids,
                          orientation=orientation, weighting=weighting, weight_by=weight_by,
                          exponent=exponent,
                          max_distance=None if weighting == "binary" else float(d_max))


def _check_edge_weighting(graph, weighting, exponent, weight_by, max_distance):
    weighting = check_option("weighting", weighting, EDGE_WEIGHTINGS)
    weight_by = check_option("weight_by", weight_by, WEIGHT_BY)
    exponent = check_weighting_exponent(weighting, exponent)
    if max_distance is not None:
        if weighting == "binary":
            raise InputError("`max_distance` applies to the linear and concave weightings; "
                             "got it with weighting='binary'; drop it")
        max_distance = check_real("max_distance", max_distance, low=0, low_inclusive=False)
    if weight_by == "network_distance" and graph.downstream_distance is None:
        raise InputError("weight_by='network_distance' needs a river network (along-network "
                         "distances); under a bearing use weight_by='edge_length'")
    if weighting == "concave_up" and weight_by == "edge_length" and (graph.length <= 0).any():
        raise InputError("weighting='concave_up' needs edges of positive length; the diagram "
                         "has a zero-length edge (two sites at one position)")
    return weighting, exponent, weight_by, max_distance


def _reach(ptail: np.ndarray, phead: np.ndarray, k: int, targets: np.ndarray
           ) -> sparse.csr_matrix:
    """Boolean node × target matrix: node reaches the target's node along the edges.

    Propagated one step at a time (P·F), vectorised over all nodes and targets; the number of
    steps is the longest path of the diagram. A cycle (impossible for a checked network or
    a bearing) is refused.
    """
    t = len(targets)
    p = sparse.csr_matrix((np.ones(len(ptail)), (ptail, phead)), shape=(k, k))
    front = sparse.csr_matrix((np.ones(t), (targets, np.arange(t))), shape=(k, t))
    acc = front.copy()
    for _ in range(k + 1):                     # one step along the diagram per pass
        front = p @ front
        if front.nnz == 0:
            break
        front.data[:] = 1.0
        acc = acc + front
    else:
        raise InputError("the directional graph has a cycle; an AEM needs a diagram without "
                         "directed cycles")
    acc.data[:] = 1.0
    return acc.tocsr()


# ------------------------------------------------------------------------ bases

@dataclass(frozen=True)
class NetworkBasis(SpatialBasis):
    """A :class:`~spatial_ev.space.eigen.SpatialBasis` built on a directional graph or network.

    ``method`` is ``"aem_river"``, ``"aem_bearing"`` or ``"network_distance_based"``;
    ``weights`` is the neighbour weight matrix Moran's I uses (binary network neighbours for
    AEM, the distance-based similarity otherwise); ``scale`` is measured along the network.

    Extra attributes
    ----------------
    directional : DirectionalGraph
        The graph the vectors describe.
    site_edges : SiteEdgeMatrix or None
        The AEM's site-by-edge matrix (AEM only).
    loadings : ndarray or None, shape (n_columns, k)
        Ẽ_cᵀ·u_k / μ_k, so that a new row e of the site-by-edge matrix has values
        (e − column means)·loadings (AEM only).
    column_means : ndarray or None
        Column means of the weighted site-by-edge matrix (AEM only).
    """

    directional: DirectionalGraph | None = field(default=None, repr=False)
    site_edges: SiteEdgeMatrix | None = field(default=None, repr=False)
    loadings: np.ndarray | None = field(default=None, repr=False)
    column_means: np.ndarray | None = field(default=None, repr=False)

    def summary(self) -> str:
        """Short text description (assumptions included).

        Examples
        --------
        >>> import shapely
        >>> from spatial_ev.input.network import build_river_network
        >>> line = shapely.LineString([(0, 0), (10, 0)])
        >>> xy = pd.DataFrame({"x": [1.0, 3, 4, 6, 9], "y": 0.0}, index=list("abcde"))
        >>> b = aem_eigenvectors(build_river_network([line], xy, snap_tolerance=1))
        >>> b.summary().split(";")[0]
        '2 asymmetric eigenvector maps (AEM, with_flow, binary edge weights) for 5 sites'
        """
        n_sites = self.vectors.shape[0]
        if self.site_edges is not None:
            e = self.site_edges
            what = (f"{self.n_vectors} asymmetric eigenvector maps (AEM, {e.orientation}, "
                    f"{e.weighting} edge weights"
                    + (f" of {e.weight_by.replace('_', ' ')}" if e.weighting != "binary" else "")
                    + f") for {n_sites} sites")
            assumption = ("AEM assume a process travelling one way along the diagram "
                          "(with the flow or along the bearing)")
        else:
            what = (f"{self.n_vectors} distance-based eigenvectors of along-network distances "
                    f"(threshold {self.threshold:.6g}) for {n_sites} sites")
            assumption = "they assume a process spreading both ways along the channels"
        unit = self.directional.distance_unit if self.directional is not None else "map unit"
        river = self.directional is None or self.directional.kind == "river_network"
        if self.n_vectors:
            i, sc = self.moran_i.to_numpy(), self.scale.to_numpy()
            what += (f"; Moran's I on the {'network' if river else 'graph'} neighbours from "
                     f"{i.max():.4f} to {i.min():.4f}; scales from {sc.max():.6g} to "
                     f"{sc.min():.6g} {unit}{' along the network' if river else ''} "
                     f"(equivalent wavelength)")
        return f"{what}. {assumption}."

    def extend(self, new_coords: Any) -> pd.DataFrame:
        """Values of the vectors at new points on the river network.

        Points are placed on the nearest edge (within the network's snap tolerance; a point
        farther away is an error naming it). AEM: a point a fraction t along edge j counts
        every edge upstream of j's upstream end as a site there would, and edge j with t
        times its weight; its value is (e − column means)·loadings, which reproduces the
        vectors at the sites. Distance-based: the add-a-point (Nyström) form with along-network
        distances, as :meth:`SpatialBasis.extend` does with straight-line distances.

        Parameters
        ----------
        new_coords : DataFrame with ``x``, ``y`` (optionally ``edge`` and ``offset`` from
            :func:`points_along_network`, used as given) or an (m, 2) array.

        Returns
        -------
        DataFrame, shape (m, k)

        Examples
        --------
        >>> import shapely
        >>> from spatial_ev.input.network import build_river_network
        >>> line = shapely.LineString([(0, 0), (10, 0)])
        >>> xy = pd.DataFrame({"x": [1.0, 3, 4, 6, 9], "y": 0.0}, index=list("abcde"))
        >>> b = aem_eigenvectors(river_graph(build_river_network([line], xy, snap_tolerance=1)))
        >>> bool(np.allclose(b.extend(xy).to_numpy(), b.vectors.to_numpy()))
        True
        """
        g = self.directional
        if g is None or g.network is None:
            raise InputError("this basis is not tied to a river network: values at new points "
                             "are available for river-network bases only (a bearing basis "
                             "describes the sampled sites; build it again with the new sites)")
        edge, offset, ids = _locate(g, new_coords)
        if self.method == "network_distance_based":
            return self._extend_distance(edge, offset, ids)
        rows = _point_rows(g, self.site_edges, edge, offset)
        values = (rows @ self.loadings) - self.column_means @ self.loadings
        return pd.DataFrame(np.asarray(values), index=ids, columns=self.vectors.columns)

    def _extend_distance(self, edge, offset, ids) -> pd.DataFrame:
        g = self.directional
        t = self.threshold
        d = _point_site_distances(g, edge, offset, limit=t)          # dense (m, n)
        kp = np.where(d <= t * (1 + 1e-9), 1.0 - (d / (4 * t)) ** 2, 0.0)
        n = self.vectors.shape[0]
        u = self.vectors.to_numpy()
        row_mean = (np.asarray(self.weights.sum(axis=1)).ravel() + 1.0) / n
        denom = self.eigenvalues + 1.0
        values = (kp @ u - row_mean @ u) / np.where(np.abs(denom) > 1e-8, denom, np.nan)
        return pd.DataFrame(values, index=ids, columns=self.vectors.columns)


def aem_eigenvectors(graph: DirectionalGraph | RiverNetwork, *,
                     orientation: str = "with_flow", weighting: str = "binary",
                     weight_by: str = "edge_length", exponent: float | None = None,
                     max_distance: float | None = None, keep: str = "positive",
                     max_vectors: int | None = None, solver: str = "auto") -> NetworkBasis:
    """Asymmetric eigenvector maps (AEM) of a river network or a bearing-oriented graph.

    Parameters
    ----------
    graph : DirectionalGraph or RiverNetwork
        A river network is converted with :func:`river_graph`.
    orientation, weighting, weight_by, exponent, max_distance
        See :func:`site_edge_matrix`.
    keep : {"positive", "negative", "all"}
        Keep the vectors whose Moran's I (on the network neighbour graph) is positive
        (default), negative, or all of them. Names ``aem001``, … follow the rank by
        eigenvalue among all vectors, so a kept vector keeps its name.
    max_vectors : int, optional
        Keep at most this many (largest eigenvalues first, after ``keep``).
    solver : {"auto", "dense", "sparse"}
        Dense eigensolver on C·Ẽ·Ẽᵀ·C (≤ 3000 sites under "auto") or Lanczos on the
        implicitly centred Ẽ·Ẽᵀ (needs ``max_vectors``; ``keep="all"`` is refused).

    Returns
    -------
    NetworkBasis
        ``eigenvalues`` μ_k = s_k² (eigenvalues of C·Ẽ·Ẽᵀ·C; PCA eigenvalues are
        μ_k/(n − 1)), ``moran_i`` on the network neighbours, ``scale`` as along-network
        equivalent wavelength (map units), ``method`` ``"aem_river"`` or ``"aem_bearing"``.

    Notes
    -----
    Assumes the process is directional along the diagram; a process spreading both ways is
    better described by :func:`network_distance_eigenvectors`. AEM vectors are not
    orthogonal to every kind of trend: fit a trend first if the community has one.

    Examples
    --------
    >>> import shapely
    >>> from spatial_ev.input.network import build_river_network
    >>> line = shapely.LineString([(0, 0), (10, 0)])
    >>> xy = pd.DataFrame({"x": [1.0, 3, 4, 6, 9], "y": 0.0}, index=list("abcde"))
    >>> b = aem_eigenvectors(build_river_network([line], xy, snap_tolerance=1), keep="all")
    >>> b.eigenvalues.round(4).tolist()   # 1 / (4 sin²(πk/10)), k = 1..4 [derived]
    [2.618, 0.7236, 0.382, 0.2764]
    """
    if isinstance(graph, RiverNetwork):
        graph = river_graph(graph)
    keep = check_option("keep", keep, _SIGNS)
    solver = check_option("solver", solver, _SOLVERS)
    if max_vectors is not None:
        max_vectors = check_int("max_vectors", max_vectors, low=1)
    e = site_edge_matrix(graph, orientation=orientation, weighting=weighting,
                         weight_by=weight_by, exponent=exponent, max_distance=max_distance)
    n = graph.n_sites
    if n < 3:
        raise InputError(f"an AEM needs at least 3 sites; got {n}")
    solver = _pick_solver(solver, n, max_vectors, keep)
    means = np.asarray(e.matrix.mean(axis=0)).ravel()
    if solver == "dense":
        # eigenvalues of C·Ẽ·Ẽᵀ·C by the dense solver of the MEM families (Ẽ·Ẽᵀ: shared
        # weighted edges between two sites); equal to the squared singular values of Ẽc
        mu, u = solve_dense(sparse.csr_matrix(e.matrix @ e.matrix.T), None, "LA")
    else:
        mu, u = _lanczos(_centred_gram(e.matrix, means), max_vectors, "LA")
    mu, u = finish_vectors(mu, u, "positive")       # drops the null space (μ = 0)
    names = np.array([f"aem{i + 1:03d}" for i in range(len(mu))])
    w = graph.neighbour_weights()
    moran = _moran(u, w)
    kept = {"positive": moran > 0, "negative": moran < 0, "all": np.ones(len(mu), bool)}[keep]
    mu, u, moran, names = mu[kept], u[:, kept], moran[kept], names[kept]
    if max_vectors is not None:
        mu, u, moran, names = (mu[:max_vectors], u[:, :max_vectors], moran[:max_vectors],
                               names[:max_vectors])
    if len(mu) == 0:
        raise InputError(f"no AEM vector has {keep} Moran's I on this network; use "
                         f"keep='all'")
    ec_t_u = np.asarray(e.matrix.T @ u) - np.outer(means, u.sum(axis=0))
    loadings = ec_t_u / mu
    scale = equivalent_wavelength(u, w, graph.neighbours, one_dimensional=graph.kind ==
                                  "river_network")
    cols = pd.Index(names)
    return NetworkBasis(
        vectors=pd.DataFrame(u, index=graph.site_ids, columns=cols), eigenvalues=mu,
        moran_i=pd.Series(moran, index=cols, name="moran_i"),
        scale=pd.Series(scale, index=cols, name="scale"),
        method="aem_river" if graph.kind == "river_network" else "aem_bearing",
        threshold=None, weights=w, solver=solver, weighting=e.weighting, exponent=e.exponent,
        coords=_site_xy(graph), metric="network", max_distance=e.max_distance,
        directional=graph, site_edges=e, loadings=loadings, column_means=means)


def network_distances(graph: DirectionalGraph | RiverNetwork) -> pd.DataFrame:
    """Along-network distances between all sites (shortest paths on the undirected network).

    Parameters
    ----------
    graph : DirectionalGraph or RiverNetwork

    Returns
    -------
    DataFrame, shape (n_sites, n_sites)
        Map units; ``inf`` between separate catchments.

    Examples
    --------
    >>> import shapely
    >>> from spatial_ev.input.network import build_river_network
    >>> lines = [shapely.LineString([(0, 10), (0, 0)]), shapely.LineString([(5, 5), (0, 5)])]
    >>> xy = pd.DataFrame({"x": [0.0, 4.0, 0.0], "y": [9.0, 5.0, 1.0]}, index=list("abc"))
    >>> network_distances(build_river_network(lines, xy, snap_tolerance=1)).to_numpy().tolist()
    [[0.0, 8.0, 8.0], [8.0, 0.0, 8.0], [8.0, 8.0, 0.0]]
    """
    if isinstance(graph, RiverNetwork):
        graph = river_graph(graph)
    if not isinstance(graph, DirectionalGraph):
        raise InputError("`graph` must be a DirectionalGraph or RiverNetwork; got "
                         f"{type(graph).__name__}")
    d = csgraph.dijkstra(graph.undirected(), directed=False, indices=graph.site_nodes)
    d = d[:, graph.site_nodes]
    return pd.DataFrame(d, index=graph.site_ids, columns=graph.site_ids)


def network_distance_eigenvectors(graph: DirectionalGraph | RiverNetwork, *,
                                  threshold: float | None = None, keep: str = "positive",
                                  max_vectors: int | None = None,
                                  solver: str = "auto") -> NetworkBasis:
    """Distance-based MEM of along-network distances (the symmetric alternative to AEM).

    Parameters
    ----------
    graph : DirectionalGraph or RiverNetwork
        A river network (a bearing graph has no network distances).
    threshold : float, optional
        Truncation distance t (map units along the network); default the longest edge of
        the minimum spanning tree of the along-network distances, the smallest t keeping all
        sites connected.
    keep, max_vectors, solver
        As in :func:`spatial_ev.space.eigen.distance_eigenvectors`.

    Returns
    -------
    NetworkBasis
        ``method`` ``"network_distance_based"``; ``eigenvalues`` μ of C·W·C,
        ``pcoa_eigenvalues`` 8t²(μ + 1), Moran's I (n/S₀)μ, along-network scales.

    Examples
    --------
    >>> import shapely
    >>> from spatial_ev.input.network import build_river_network
    >>> line = shapely.LineString([(0, 0), (11, 0)])
    >>> xy = pd.DataFrame({"x": np.arange(1.0, 11.0), "y": 0.0})
    >>> b = network_distance_eigenvectors(build_river_network([line], xy, snap_tolerance=1))
    >>> b.n_vectors, round(float(b.moran_i.iloc[0]), 5)     # as on a straight transect
    (4, 0.93473)
    """
    if isinstance(graph, RiverNetwork):
        graph = river_graph(graph)
    if not isinstance(graph, DirectionalGraph) or graph.kind != "river_network":
        raise InputError("`graph` must be a river network (RiverNetwork or river_graph); "
                         f"got {type(graph).__name__}")
    keep = check_option("keep", keep, _SIGNS)
    solver = check_option("solver", solver, _SOLVERS)
    if max_vectors is not None:
        max_vectors = check_int("max_vectors", max_vectors, low=1)
    n = graph.n_sites
    if n < 3:
        raise InputError(f"network eigenvectors need at least 3 sites; got {n}")
    solver = _pick_solver(solver, n, max_vectors, keep)
    if threshold is None:
        threshold = _network_mst_threshold(graph)
    else:
        threshold = check_real("threshold", threshold, low=0, low_inclusive=False)
    i, j, d = _pairs_within(graph, threshold)
    w = _symmetric_with_zeros(n, i, j, 1.0 - (d / (4.0 * threshold)) ** 2)
    if solver == "dense":
        mu, u = solve_dense(w, None, "LA")
    else:
        mu, u = _lanczos(_centred_similarity(w), max_vectors,
                         "SA" if keep == "negative" else "LA")
    mu, u = finish_vectors(mu, u, keep)
    if max_vectors is not None:
        mu, u = mu[:max_vectors], u[:, :max_vectors]
    names = pd.Index([f"ndb{k + 1:03d}" for k in range(len(mu))])
    s0 = float(w.sum())
    lengths = _symmetric_with_zeros(n, i, j, d)
    scale = equivalent_wavelength(u, w, lengths, one_dimensional=True)
    return NetworkBasis(
        vectors=pd.DataFrame(u, index=graph.site_ids, columns=names), eigenvalues=mu,
        moran_i=pd.Series(n / s0 * mu, index=names, name="moran_i"),
        scale=pd.Series(scale, index=names, name="scale"), method="network_distance_based",
        threshold=threshold, weights=w, pcoa_eigenvalues=8.0 * threshold ** 2 * (mu + 1.0),
        solver=solver, coords=_site_xy(graph), metric="network", directional=graph)


def _pick_solver(solver: str, n: int, max_vectors, keep: str) -> str:
    if solver == "auto":
        solver = "dense" if n <= DENSE_LIMIT else "sparse"
    if solver == "sparse":
        if max_vectors is None:
            raise InputError(f"{n} sites: the Lanczos solver computes only the broadest "
                             f"vectors; give `max_vectors` (e.g. 200), or solver='dense'")
        if keep == "all":
            raise InputError("keep='all' needs every eigenvector: use solver='dense'")
    return solver


def _site_xy(graph: DirectionalGraph) -> np.ndarray:
    return graph.node_xy[graph.site_nodes]


def _moran(u: np.ndarray, w: sparse.csr_matrix) -> np.ndarray:
    """Moran's I of centred unit columns: (n/S₀)·uᵀWu (Moran 1950)."""
    n = u.shape[0]
    s0 = float(w.sum())
    if s0 <= 0:
        raise InputError("the sites have no neighbours along the network; Moran's I is "
                         "undefined")
    return n / s0 * np.einsum("ik,ik->k", u, np.asarray(w @ u))


def _centred_gram(e: sparse.csr_matrix, means: np.ndarray) -> LinearOperator:
    """x ↦ Ẽc·Ẽcᵀ·x with Ẽc = Ẽ − 1·meansᵀ, never forming either matrix densely."""
    n = e.shape[0]

    def matmat(x):
        x = np.asarray(x, dtype=np.float64)
        x = x - x.mean(axis=0)
        z = e @ (e.T @ x)                             # C·Ẽ·Ẽᵀ·C x
        return z - z.mean(axis=0)
    return LinearOperator((n, n), matvec=matmat, matmat=matmat, rmatvec=matmat,
                          dtype=np.float64)


def _centred_similarity(w: sparse.csr_matrix) -> LinearOperator:
    n = w.shape[0]

    def matmat(x):
        x = np.asarray(x, dtype=np.float64)
        y = w @ (x - x.mean(axis=0))
        return y - y.mean(axis=0)
    return LinearOperator((n, n), matvec=matmat, matmat=matmat, rmatvec=matmat,
                          dtype=np.float64)


def _lanczos(op: LinearOperator, k: int, which: str) -> tuple[np.ndarray, np.ndarray]:
    n = op.shape[0]
    k = min(k, n - 2)
    v0 = np.random.default_rng(20240607).standard_normal(n)
    v0 -= v0.mean()
    ncv = min(n - 1, max(2 * k + 1, k + 64))
    with threadpool_limits(limits=1, user_api="blas"):
        mu, u = eigsh(op, k=k, which=which, v0=v0, ncv=ncv, tol=0.0,
                      maxiter=max(1000, 20 * n // ncv))
    return mu, u


def _network_mst_threshold(graph: DirectionalGraph) -> float:
    """Longest edge of the minimum spanning tree of along-network distances.

    Every pair of sites with another site on the channel between them is the heaviest edge
    of a cycle, so the tree lies within the network neighbour graph.
    """
    nb = graph.neighbours.tocoo()
    keep = nb.row < nb.col
    d = nb.data[keep]
    if len(d) == 0 or not (d > 0).any():
        raise InputError("all sites share one position on the network; no distance scale")
    tiny = 1e-12 * float(d.max())
    m = sparse.coo_matrix((np.maximum(d, tiny), (nb.row[keep], nb.col[keep])),
                          shape=graph.neighbours.shape).tocsr()
    n_comp = csgraph.connected_components(m, directed=False)[0]
    if n_comp > 1:
        raise InputError(f"the sites lie on {n_comp} separate parts of the network; "
                         f"along-network distances between catchments are infinite: analyse "
                         f"each catchment, or use straight-line distances")
    tree = csgraph.minimum_spanning_tree(m)
    return float(tree.data.max())


def _pairs_within(graph: DirectionalGraph, limit: float):
    """Site pairs (i < j) within ``limit`` along the network, and their distances."""
    und = graph.undirected()
    nodes = graph.site_nodes
    n = len(nodes)
    block = max(1, _BLOCK_ELEMENTS // max(graph.n_nodes, 1))
    ii, jj, dd = [], [], []
    for start in range(0, n, block):               # blocks of sites, bounded memory
        rows = np.arange(start, min(n, start + block))
        reach = limit * (1 + 1e-9)                  # the threshold pair itself, whatever rounding
        dist = csgraph.dijkstra(und, directed=False, indices=nodes[rows], limit=reach)
        dist = dist[:, nodes]
        r, c = np.nonzero(np.isfinite(dist) & (dist <= reach))
        keep = rows[r] < c
        ii.append(rows[r][keep])
        jj.append(c[keep])
        dd.append(dist[r[keep], c[keep]])
    return np.concatenate(ii), np.concatenate(jj), np.concatenate(dd)


# ------------------------------------------------------------------------ scales

def equivalent_wavelength(vectors: np.ndarray, weights: sparse.csr_matrix,
                          lengths: sparse.csr_matrix, *,
                          one_dimensional: bool) -> np.ndarray:
    """Equivalent wavelength (map units) of centred unit vectors on a weighted graph.

    The wavelength 2π/κ of a wave whose neighbour-lag autocorrelation Σw f(κd)/Σw equals the
    vector's ρ = uᵀWu/uᵀDu (D = weighted degrees; f = cos along a line or a network, J0 in
    the plane) — the definition of :attr:`spatial_ev.space.eigen.SpatialBasis.scale`, here
    with lengths measured along the network. Vectors finer than the lags can resolve get the
    finest resolvable wavelength.

    Parameters
    ----------
    vectors : ndarray, shape (n, k)
        Centred, unit-norm columns.
    weights : scipy.sparse matrix, shape (n, n)
        Symmetric neighbour weights W.
    lengths : scipy.sparse matrix, shape (n, n)
        Lengths of the same pairs (map units; explicit zeros allowed).
    one_dimensional : bool
        Lines and networks (cos) or the plane (J0).

    Returns
    -------
    ndarray, shape (k,)

    Examples
    --------
    >>> n = 50
    >>> x = np.cos(np.pi * (np.arange(n) + 0.5) / n)            # half a wave over 50 units
    >>> x = (x - x.mean()) / np.linalg.norm(x - x.mean())
    >>> w = sparse.diags([np.ones(n - 1), np.ones(n - 1)], [-1, 1], format="csr")
    >>> round(float(equivalent_wavelength(x[:, None], w, w, one_dimensional=True)[0]), -1)
    100.0
    """
    u = np.asarray(vectors, dtype=np.float64)
    if u.ndim != 2:
        raise InputError(f"`vectors` must be 2-D (sites x vectors); got {u.ndim} dimensions")
    if u.shape[1] == 0:
        return np.zeros(0)
    w = sparse.csr_matrix(weights, dtype=np.float64)
    ln = sparse.csr_matrix(lengths, dtype=np.float64)
    deg = np.asarray(w.sum(axis=1)).ravel()
    rho = np.clip(np.einsum("ik,ik->k", u, np.asarray(w @ u)) / (deg @ (u * u)), -1.0, 1.0)
    wc, lc = w.tocoo(), ln.tocsr()
    d = np.asarray(lc[wc.row, wc.col]).ravel()
    pos = (wc.data > 0) & (d > 0)
    d, wb = d[pos], wc.data[pos]
    if len(d) == 0:
        raise InputError("`lengths` has no positive length among the weighted pairs")
    lo, hi = float(d.min()), float(d.max())
    if hi - lo <= 1e-12 * hi:
        d, wb = np.array([float(np.average(d, weights=wb))]), np.ones(1)
    else:
        hist_w, edges = np.histogram(d, bins=256, weights=wb)
        hist_d, _ = np.histogram(d, bins=edges, weights=wb * d)
        nz = hist_w > 0
        d, wb = hist_d[nz] / hist_w[nz], hist_w[nz] / hist_w[nz].sum()
    kappa = np.geomspace(1e-3, 20.0, 4000) / float(wb @ d)
    x = kappa[:, None] * d[None, :]
    if one_dimensional:
        gap = (2 * np.sin(x / 2) ** 2) @ wb
    else:
        series = x ** 2 / 4 - x ** 4 / 64 + x ** 6 / 2304
        gap = np.where(x < 1e-2, series, 1.0 - special.j0(x)) @ wb
    stop = np.flatnonzero(np.diff(gap) <= 0)
    last = stop[0] + 1 if len(stop) else len(gap)
    kappa, gap = kappa[:last], gap[:last]
    target = np.clip(1.0 - rho, 1e-300, None)
    k_est = np.exp(np.interp(np.log(target), np.log(gap), np.log(kappa)))
    c = 0.5 if one_dimensional else 0.25
    small = target < gap[0]
    k_est[small] = np.sqrt(target[small] / (c * float(wb @ d ** 2)))
    return 2 * np.pi / k_est


# ------------------------------------------------------------------------ candidate schemes

def river_schemes(network: RiverNetwork | DirectionalGraph, *,
                  orientations: tuple[str, ...] = ("with_flow",),
                  weightings: tuple[str, ...] = ("binary", "linear"),
                  weight_by: str = "edge_length", network_distance: bool = True,
                  keep: str = "positive",
                  max_vectors: int | None = None) -> dict[str, NetworkBasis]:
    """Named directional bases of a river network, ready to compare as weighting schemes.

    Names: ``"river_aem/<weighting>"`` (with the flow), ``"river_aem_against/<weighting>"``
    (against it), a concave weighting as ``"river_aem/concave_down:<exponent>"``, and
    ``"river_distance"`` (distance-based eigenvectors of along-network distances). Each counts
    as one scheme in a Šidák-corrected comparison
    (:func:`spatial_ev.selection.weighting.compare_weighting_schemes` takes this mapping as
    ``schemes``, alone or merged with straight-line schemes).

    Parameters
    ----------
    network : RiverNetwork or DirectionalGraph
    orientations : tuple of {"with_flow", "against_flow"}
    weightings : tuple of str
        ``"binary"``, ``"linear"``, ``"concave_down:<α>"``, ``"concave_up:<β>"``.
    weight_by : {"edge_length", "network_distance"}
        What the non-binary weightings are a function of (see :func:`site_edge_matrix`).
    network_distance : bool
        Also the symmetric along-network distance-based basis.
    keep, max_vectors
        As in :func:`aem_eigenvectors`.

    Returns
    -------
    dict of str to NetworkBasis

    Examples
    --------
    >>> import shapely
    >>> from spatial_ev.input.network import build_river_network
    >>> line = shapely.LineString([(0, 0), (30, 0)])
    >>> xy = pd.DataFrame({"x": [1.0, 2, 4, 7, 11, 16, 22, 29], "y": 0.0})
    >>> sorted(river_schemes(build_river_network([line], xy, snap_tolerance=1)))
    ['river_aem/binary', 'river_aem/linear', 'river_distance']
    """
    graph = river_graph(network) if isinstance(network, RiverNetwork) else network
    if not isinstance(graph, DirectionalGraph) or graph.kind != "river_network":
        raise InputError("`network` must be a RiverNetwork (or its river_graph); got "
                         f"{type(network).__name__}")
    if isinstance(orientations, str) or isinstance(weightings, str):
        raise InputError("`orientations` and `weightings` must be tuples of names, e.g. "
                         "('with_flow',) and ('binary', 'linear')")
    out: dict[str, NetworkBasis] = {}
    for orientation in orientations:                      # a handful of schemes
        check_option("orientations", orientation, ORIENTATIONS)
        prefix = "river_aem" if orientation == "with_flow" else "river_aem_against"
        for spec in weightings:
            weighting, exponent = _weighting_spec(spec)
            out[f"{prefix}/{spec}"] = aem_eigenvectors(
                graph, orientation=orientation, weighting=weighting, exponent=exponent,
                weight_by=weight_by, keep=keep, max_vectors=max_vectors)
    if network_distance:
        out["river_distance"] = network_distance_eigenvectors(graph, keep=keep,
                                                              max_vectors=max_vectors)
    if not out:
        raise InputError("no scheme requested: give at least one orientation and weighting, "
                         "or network_distance=True")
    return out


def bearing_schemes(graph: NeighbourGraph, *, bearing: float,
                    orientations: tuple[str, ...] = ("with_flow",),
                    weightings: tuple[str, ...] = ("binary",), keep: str = "positive",
                    max_vectors: int | None = None,
                    distance_unit: str = "map unit") -> dict[str, NetworkBasis]:
    """Named AEM bases of a neighbour graph oriented along a bearing (currents, winds).

    Names: ``"bearing_<degrees>/<weighting>"`` (``"bearing_90/binary"``), and
    ``"bearing_<degrees>_against/<weighting>"``. Every edge also carries the cosine of its
    angle with the bearing (:func:`bearing_graph`); ``weightings`` are functions of the edge
    length, as in :func:`river_schemes`.

    Parameters
    ----------
    graph : NeighbourGraph
    bearing : float
        Direction of travel, degrees clockwise from grid north.
    orientations, weightings, keep, max_vectors
        As in :func:`river_schemes`.
    distance_unit : str
        As in :func:`bearing_graph`.

    Returns
    -------
    dict of str to NetworkBasis

    Examples
    --------
    >>> from spatial_ev.space.graphs import neighbour_graph
    >>> g = neighbour_graph(np.column_stack([np.arange(8.0), np.zeros(8)]), "delaunay")
    >>> list(bearing_schemes(g, bearing=90))
    ['bearing_90/binary']
    """
    directed = bearing_graph(graph, bearing=bearing, distance_unit=distance_unit)
    if isinstance(orientations, str) or isinstance(weightings, str):
        raise InputError("`orientations` and `weightings` must be tuples of names, e.g. "
                         "('with_flow',) and ('binary',)")
    label = f"bearing_{directed.bearing:g}"
    out: dict[str, NetworkBasis] = {}
    for orientation in orientations:
        check_option("orientations", orientation, ORIENTATIONS)
        prefix = label if orientation == "with_flow" else f"{label}_against"
        for spec in weightings:
            weighting, exponent = _weighting_spec(spec)
            out[f"{prefix}/{spec}"] = aem_eigenvectors(
                directed, orientation=orientation, weighting=weighting, exponent=exponent,
                keep=keep, max_vectors=max_vectors)
    if not out:
        raise InputError("no scheme requested: give at least one orientation and weighting")
    return out


def _weighting_spec(spec: Any) -> tuple[str, float | None]:
    if not isinstance(spec, str):
        raise InputError(f"`weightings` entries must be strings such as 'binary' or "
                         f"'concave_down:0.5'; got {spec!r}")
    name, _, exp_text = spec.partition(":")
    check_option("weightings", name, EDGE_WEIGHTINGS)
    if not exp_text:
        return name, None
    try:
        return name, float(exp_text)
    except ValueError:
        raise InputError(f"`weightings` entry {spec!r}: exponent {exp_text!r} is not a number; "
                         f"write e.g. 'concave_down:0.5'") from None


# ------------------------------------------------------------------------ points on the network

def points_along_network(network: RiverNetwork | DirectionalGraph, *, spacing: float
                         ) -> pd.DataFrame:
    """Points spaced along every edge of a river network (for maps and predictions).

    Each edge of length L gets ⌈L/spacing⌉ points at offsets (i + ½)·L/⌈L/spacing⌉ from its
    upstream end, so points never sit on nodes and every stretch is covered.

    Parameters
    ----------
    network : RiverNetwork or DirectionalGraph (of a river network)
    spacing : float
        Target distance between points (map units, > 0).

    Returns
    -------
    DataFrame
        Columns ``x``, ``y``, ``edge`` (edge index), ``offset`` (from the edge's upstream
        end); index ``point``.

    Examples
    --------
    >>> import shapely
    >>> from spatial_ev.input.network import build_river_network
    >>> line = shapely.LineString([(0, 0), (10, 0)])
    >>> net = build_river_network([line], pd.DataFrame({"x": [4.0], "y": 0.0}),
    ...                           snap_tolerance=1)
    >>> points_along_network(net, spacing=2.0)["x"].tolist()
    [1.0, 3.0, 5.0, 7.0, 9.0]
    """
    import shapely

    if isinstance(network, DirectionalGraph):
        network = network.network
    if not isinstance(network, RiverNetwork):
        raise InputError("`network` must be a RiverNetwork (or its river_graph); got "
                         f"{type(network).__name__}")
    spacing = check_real("spacing", spacing, low=0, low_inclusive=False)
    length = network.edges["length"].to_numpy(dtype=np.float64)
    count = np.maximum(1, np.ceil(length / spacing - 1e-9)).astype(np.int64)
    if count.sum() > 10_000_000:
        raise InputError(f"spacing={spacing:g} gives {int(count.sum())} points; use a larger "
                         f"spacing")
    edge = np.repeat(np.arange(len(length)), count)
    i = np.arange(count.sum()) - np.repeat(np.cumsum(count) - count, count)
    offset = (i + 0.5) * length[edge] / count[edge]
    pts = shapely.line_interpolate_point(network.edges.geometry.to_numpy()[edge], offset)
    xy = shapely.get_coordinates(pts)
    return pd.DataFrame({"x": xy[:, 0], "y": xy[:, 1], "edge": edge, "offset": offset},
                        index=pd.RangeIndex(len(edge), name="point"))


def _locate(g: DirectionalGraph, new_coords: Any) -> tuple[np.ndarray, np.ndarray, pd.Index]:
    """Edge and offset (from the edge's upstream end) of each new point on the network."""
    import shapely

    net = g.network
    geoms = net.edges.geometry.to_numpy()
    if isinstance(new_coords, pd.DataFrame) and {"edge", "offset"} <= set(new_coords.columns):
        edge = new_coords["edge"].to_numpy(dtype=np.int64)
        offset = new_coords["offset"].to_numpy(dtype=np.float64)
        if ((edge < 0) | (edge >= len(geoms))).any():
            raise InputError("`new_coords` column 'edge' holds indices outside the network's "
                             f"edges (0..{len(geoms) - 1})")
        return edge, np.clip(offset, 0, g.length[edge]), new_coords.index
    if isinstance(new_coords, pd.DataFrame):
        if {"x", "y"} - set(new_coords.columns):
            raise InputError("`new_coords` DataFrame must have columns 'x' and 'y'; got "
                             f"{list(new_coords.columns)!r}")
        xy, ids = new_coords[["x", "y"]].to_numpy(dtype=np.float64), new_coords.index
    else:
        try:
            xy = np.array(new_coords, dtype=np.float64).reshape(-1, 2)
        except (TypeError, ValueError) as exc:
            raise InputError(f"`new_coords` must be numeric (m, 2) coordinates ({exc})") \
                from None
        ids = pd.RangeIndex(len(xy), name="point")
    if not np.isfinite(xy).all():
        raise InputError("`new_coords` must hold finite coordinates")
    pts = shapely.points(xy)
    pairs = shapely.STRtree(geoms).query_nearest(pts, all_matches=False)
    edge = pairs[1][np.argsort(pairs[0], kind="stable")]
    dist = shapely.distance(pts, geoms[edge])
    far = np.flatnonzero(dist > net.snap_tolerance)
    if len(far):
        shown = ", ".join(f"{ids[i]!r} ({dist[i]:.4g})" for i in far[:6])
        raise InputError(f"{len(far)} point(s) lie farther than the network's snap tolerance "
                         f"({net.snap_tolerance:g} {net.distance_unit}) from every edge: "
                         f"{shown}; values are defined along the network only")
    offset = shapely.line_locate_point(geoms[edge], pts)
    return edge, offset, ids


def _point_rows(g: DirectionalGraph, e: SiteEdgeMatrix, edge: np.ndarray,
                offset: np.ndarray) -> sparse.csr_matrix:
    """Rows of the site-by-edge matrix for points on edges (see NetworkBasis.extend)."""
    with_flow = e.orientation == "with_flow"
    length = g.length[edge]
    start = g.tail[edge] if with_flow else g.head[edge]      # process-upstream end
    along = offset if with_flow else length - offset         # from that end, with the process
    frac = np.where(length > 0, along / np.where(length > 0, length, 1.0), 1.0)
    ptail, phead = (g.tail, g.head) if with_flow else (g.head, g.tail)
    starts, inv = np.unique(start, return_inverse=True)
    reach = _reach(ptail, phead, g.n_nodes, starts)          # node x distinct start
    cols = e.edges
    col_head = cols["head"].to_numpy()
    sub = sparse.csr_matrix(reach[col_head].T)               # distinct start x columns
    rows = sparse.csr_matrix(sub[inv])                       # point x columns (pattern)
    coo = rows.tocoo()
    p, c = coo.row, coo.col
    gedge = cols["graph_edge"].to_numpy()
    real = gedge[c] >= 0
    w = np.ones(len(c))
    if e.weighting != "binary":
        if e.weight_by == "edge_length":
            d = cols["length"].to_numpy()[c]
        else:
            phi = g.downstream_distance if with_flow else -g.downstream_distance
            d = phi[col_head[c]] - phi[start[p]] + along[p] + cols["length"].to_numpy()[c] / 2
        w[real] = edge_weight_values(d[real], e.weighting, e.exponent, e.max_distance)
    w[real] *= cols["base_weight"].to_numpy()[c][real]
    out = sparse.csr_matrix((w, (p, c)), shape=(len(edge), len(cols)))
    # the point's own edge, counted for the stretch already travelled
    col_of_edge = np.full(g.n_edges, -1)
    col_of_edge[gedge[gedge >= 0]] = np.flatnonzero(gedge >= 0)
    own = col_of_edge[edge]
    has = own >= 0
    w_own = cols["base_weight"].to_numpy()[np.maximum(own, 0)]
    if e.weighting != "binary":
        d_own = g.length[edge] if e.weight_by == "edge_length" else along / 2
        w_own = w_own * edge_weight_values(d_own, e.weighting, e.exponent, e.max_distance)
    own_m = sparse.csr_matrix(((frac * w_own)[has], (np.flatnonzero(has), own[has])),
                              shape=out.shape)
    return out + own_m


def _point_site_distances(g: DirectionalGraph, edge: np.ndarray, offset: np.ndarray,
                          limit: float) -> np.ndarray:
    """Along-network distances from points on edges to every site (dense, inf beyond limit)."""
    und = g.undirected()
    ends = np.unique(np.concatenate([g.tail[edge], g.head[edge]]))
    dist = csgraph.dijkstra(und, directed=False, indices=ends,
                            limit=limit + float(g.length[edge].max()))[:, g.site_nodes]
    ti = np.searchsorted(ends, g.tail[edge])
    hi = np.searchsorted(ends, g.head[edge])
    d = np.minimum(offset[:, None] + dist[ti], (g.length[edge] - offset)[:, None] + dist[hi])
    return d
