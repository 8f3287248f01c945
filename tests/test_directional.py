"""Tests of spatial_ev.space.directional: AEM on river networks and bearings, along-network
distances and their eigenvectors.

External checks and their sources:

* site-by-edge matrices written out by hand from the definitions of Blanchet, Legendre &
  Borcard (2008), Ecol. Model. 215:325–336 (E_ij = 1 when edge j lies on the way from the
  origin of the process to site i), and the AEM eigenvalues as the principal components of that
  hand-made matrix (scikit-learn PCA; eigenvalue = explained variance × (n − 1)) [derived];
* on a single channel with n sites and equal weights, S = E·Eᵀ has S_ij = min(i, j), and
  C·S·C = −½·C·D·C with D the path distance, the pseudo-inverse of the path's Laplacian, so
  μ_k = 1/(4 sin²(πk/(2n))), k = 1..n−1, and u_k ∝ cos(πk(i + ½)/n) [derived];
* along-network distances against networkx shortest paths on a graph built independently
  from the layer's vertices;
* distance-based eigenvectors of along-network distances on a straight channel against the
  regular-transect values of REFERENCES.md (Borcard & Legendre 2002; Dray et al. 2006)
  [derived];
* Moran's I against the formula I = (n/S₀)·zᵀWz/zᵀz (Moran 1950, Biometrika 37:17–23)
  evaluated with numpy on a hand-made neighbour matrix;
* the shipped river survey: the directional basis explains the downstream-drift field better
  than straight-line eigenvectors (adjusted R², Ezekiel 1930 / Peres-Neto et al. 2006).
"""

from __future__ import annotations

import json
import pickle
import warnings

import networkx as nx
import numpy as np
import pandas as pd
import pytest
import shapely
from sklearn.decomposition import PCA

from spatial_ev.errors import InputError, SpatialEVWarning
from spatial_ev.input.network import build_river_network, read_river_network
from spatial_ev.input.survey import read_survey
from spatial_ev.space import directional as D
from spatial_ev.space.eigen import SpatialBasis, distance_eigenvectors
from spatial_ev.space.graphs import neighbour_graph
from spatial_ev.stats.linear import explained_fraction

UPPER = shapely.LineString([(0, 20), (0, 10)])          # digitised downstream
LOWER = shapely.LineString([(0, 10), (0, 0)])
TRIB = shapely.LineString([(10, 20), (0, 10)])
SITES = pd.DataFrame({"x": [0.0, 5.0, 0.0, 0.0], "y": [15.0, 15.0, 5.0, 2.0]},
                     index=pd.Index(["s1", "s2", "s3", "s4"], name="site"))
R50 = np.sqrt(50.0)
# the stretches named "upstream point -> downstream point", with the flow
A, B = "(0, 20)->(0, 15)", "(0, 15)->(0, 10)"
C, DD = "(10, 20)->(5, 15)", "(5, 15)->(0, 10)"
E, F, G = "(0, 10)->(0, 5)", "(0, 5)->(0, 2)", "(0, 2)->(0, 0)"


@pytest.fixture(scope="module")
def y_net():
    return build_river_network([UPPER, LOWER, TRIB], SITES, snap_tolerance=0.5)


def labelled(matrix: D.SiteEdgeMatrix, graph: D.DirectionalGraph) -> pd.DataFrame:
    """The site-by-edge matrix with columns named by (upstream point, downstream point) in the
    flow's direction (the matrix gives each edge's ends in the process direction)."""
    xy = graph.node_xy
    frame = matrix.to_frame()
    names = []
    for e in matrix.edges.itertuples():
        a = tuple(int(v) for v in xy[e.tail]) if e.tail >= 0 else "origin"
        b = tuple(int(v) for v in xy[e.head])
        if matrix.orientation == "against_flow" and a != "origin":
            a, b = b, a
        names.append(f"{a}->{b}")
    frame.columns = names
    return frame


def chain(n: int, spacing: float = 1.0):
    """A straight channel with n equally spaced sites, digitised downstream."""
    line = shapely.LineString([(0, 0), ((n + 1) * spacing, 0)])
    xy = pd.DataFrame({"x": spacing * np.arange(1.0, n + 1), "y": 0.0},
                      index=pd.Index([f"c{i:02d}" for i in range(n)], name="site"))
    return build_river_network([line], xy, snap_tolerance=0.1)


class TestSiteEdgeMatrixByHand:
    def test_with_flow(self, y_net):
        g = D.river_graph(y_net)
        got = labelled(D.site_edge_matrix(g), g)
        # Blanchet et al. (2008): an edge counts for a site when it lies upstream of it
        hand = pd.DataFrame([[1, 0, 0, 0, 0, 0],
                             [0, 0, 1, 0, 0, 0],
                             [1, 1, 1, 1, 1, 0],
                             [1, 1, 1, 1, 1, 1]], index=SITES.index,
                            columns=[A, B, C, DD, E, F], dtype=float)
        pd.testing.assert_frame_equal(got[hand.columns], hand, check_names=False)
        assert set(got.columns) == set(hand.columns)         # G reaches no site: dropped

    def test_against_flow(self, y_net):
        g = D.river_graph(y_net)
        got = labelled(D.site_edge_matrix(g, orientation="against_flow"), g)
        hand = pd.DataFrame([[1, 0, 1, 1, 1],
                             [0, 1, 1, 1, 1],
                             [0, 0, 0, 1, 1],
                             [0, 0, 0, 0, 1]], index=SITES.index,
                            columns=[B, DD, E, F, G], dtype=float)
        assert set(got.columns) == set(hand.columns)
        pd.testing.assert_frame_equal(got[hand.columns], hand, check_names=False)

    def test_length_weighting(self, y_net):
        g = D.river_graph(y_net)
        got = labelled(D.site_edge_matrix(g, weighting="linear", max_distance=10.0), g)
        w = {A: 0.5, B: 0.5, C: 1 - R50 / 10, DD: 1 - R50 / 10, E: 0.5, F: 0.7}   # 1 − L/10
        assert got.loc["s4", list(w)].to_numpy() == pytest.approx(list(w.values()))
        assert got.loc["s1", A] == 0.5 and got.loc["s1", B] == 0.0
        got = labelled(D.site_edge_matrix(g, weighting="concave_up", exponent=1.0), g)
        assert got.loc["s4", F] == pytest.approx(1 / 3) and got.loc["s2", C] == \
            pytest.approx(1 / R50)

    def test_network_distance_weighting(self, y_net):
        g = D.river_graph(y_net)
        got = labelled(D.site_edge_matrix(g, weighting="linear", weight_by="network_distance",
                                          max_distance=20.0), g)
        # midpoint of A (0, 17.5) to s4 (0, 2) along the channel: 15.5; of F to s4: 1.5;
        # midpoint of C to s2: R50 / 2; of DD to s3: R50 / 2 + 5
        assert got.loc["s4", A] == pytest.approx(1 - 15.5 / 20)
        assert got.loc["s4", F] == pytest.approx(1 - 1.5 / 20)
        assert got.loc["s2", C] == pytest.approx(1 - R50 / 2 / 20)
        assert got.loc["s3", DD] == pytest.approx(1 - (R50 / 2 + 5) / 20)
        back = labelled(D.site_edge_matrix(g, orientation="against_flow", weighting="linear",
                                           weight_by="network_distance", max_distance=20.0), g)
        assert back.loc["s1", G] == pytest.approx(1 - 14 / 20)       # (0, 15) -> mid of G (0, 1)

    def test_site_at_a_headwater_end_gets_an_edge_from_the_origin(self):
        sites = pd.concat([SITES, pd.DataFrame({"x": [0.0], "y": [20.0]},
                                               index=pd.Index(["top"], name="site"))])
        net = build_river_network([UPPER, LOWER, TRIB], sites, snap_tolerance=0.5)
        g = D.river_graph(net)
        got = labelled(D.site_edge_matrix(g), g)
        origin = "origin->(0, 20)"
        assert got.loc["top"].to_dict() == {c: (1.0 if c == origin else 0.0)
                                            for c in got.columns}
        assert got.loc[["s1", "s3", "s4"], origin].tolist() == [1.0, 1.0, 1.0]
        assert got.loc["s2", origin] == 0.0


class TestAemEigenvalues:
    def test_equal_the_principal_components_of_the_hand_matrix(self, y_net):
        hand = np.array([[1, 0, 0, 0, 0, 0], [0, 0, 1, 0, 0, 0], [1, 1, 1, 1, 1, 0],
                         [1, 1, 1, 1, 1, 1]], dtype=float)
        basis = D.aem_eigenvectors(y_net, keep="all")
        # AEM = PCA of E (Blanchet et al. 2008); scikit-learn's explained variance is s²/(n−1)
        pca = PCA().fit(hand)
        mu = pca.explained_variance_ * (hand.shape[0] - 1)
        mu = mu[mu > 1e-10]
        assert basis.eigenvalues == pytest.approx(mu, rel=1e-10)
        scores = pca.transform(hand)[:, : len(mu)]
        scores /= np.linalg.norm(scores, axis=0)
        np.testing.assert_allclose(np.abs(basis.vectors.to_numpy()), np.abs(scores),
                                   atol=1e-10)

    @pytest.mark.parametrize("n", [5, 12, 30])
    def test_single_channel_closed_form(self, n):
        basis = D.aem_eigenvectors(chain(n), keep="all")
        k = np.arange(1, n)
        # μ_k = 1/(4 sin²(πk/2n)) [derived: pseudo-inverse of the path Laplacian]
        assert basis.eigenvalues == pytest.approx(1 / (4 * np.sin(np.pi * k / (2 * n)) ** 2),
                                                  rel=1e-9)
        i = np.arange(n)
        expected = np.cos(np.pi * np.outer(i + 0.5, k) / n)
        expected /= np.linalg.norm(expected, axis=0)
        np.testing.assert_allclose(np.abs(basis.vectors.to_numpy()), np.abs(expected),
                                   atol=1e-8)

    def test_scale_of_the_broadest_vector_is_twice_the_channel(self):
        basis = D.aem_eigenvectors(chain(50, spacing=20.0))
        # a half cosine over 50 sites 20 m apart: wavelength ≈ 2 · 50 · 20 m [derived]
        assert basis.scale.iloc[0] == pytest.approx(2000.0, rel=0.05)
        assert basis.scale.is_monotonic_decreasing

    def test_moran_on_the_network_neighbours(self, y_net):
        basis = D.aem_eigenvectors(y_net, keep="all")
        g = basis.directional
        # neighbours: sites whose connecting channel passes no other site (by hand)
        hand = np.zeros((4, 4))
        for a, b, d in [(0, 1, 5 + R50), (0, 2, 10.0), (1, 2, R50 + 5), (2, 3, 3.0)]:
            hand[a, b] = hand[b, a] = d
        np.testing.assert_allclose(g.neighbours.toarray(), hand, atol=1e-12)
        w = (hand > 0).astype(float)
        z = basis.vectors.to_numpy() - basis.vectors.to_numpy().mean(axis=0)
        moran = 4 / w.sum() * np.einsum("ik,ij,jk->k", z, w, z) / (z * z).sum(axis=0)
        assert basis.moran_i.to_numpy() == pytest.approx(moran, abs=1e-12)
        positive = D.aem_eigenvectors(y_net)
        assert (positive.moran_i > 0).all()
        assert set(positive.vectors.columns) == set(basis.moran_i.index[basis.moran_i > 0])

    def test_neighbours_agree_with_networkx_paths(self, river):
        net, _, _ = river
        g = D.river_graph(net)
        nxg = nx.Graph()
        for e in net.edges.itertuples():
            nxg.add_edge(e.upstream_node, e.downstream_node, length=e.length)
        sites = set(g.site_nodes.tolist())
        nb = g.neighbours.tocoo()
        got = {(min(a, b), max(a, b)) for a, b in zip(nb.row, nb.col)}
        expected = set()
        nodes = g.site_nodes
        for i in range(len(nodes)):
            paths = nx.single_source_dijkstra_path(nxg, int(nodes[i]), weight="length")
            for j in range(i + 1, len(nodes)):
                inner = paths[int(nodes[j])][1:-1]
                if not sites.intersection(inner):
                    expected.add((i, j))
        assert got == expected


@pytest.fixture(scope="module")
def river(repo_root):
    folder = repo_root / "data_demo" / "river"
    truth = json.loads((folder / "truth.json").read_text())
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SpatialEVWarning)
        survey = read_survey(folder / "sites.gpkg", folder / "species.csv",
                             folder / "environment.csv")
    net = read_river_network(folder / "network.gpkg", survey,
                             snap_tolerance=truth["snap_tolerance_m"])
    return net, survey, truth


class TestAlongNetworkDistances:
    def test_equal_networkx_shortest_paths_on_the_layer_vertices(self, river, repo_root):
        import geopandas as gpd

        net, survey, _ = river
        lines = gpd.read_file(repo_root / "data_demo" / "river" / "network.gpkg")
        # an independent graph: every vertex of the layer a node, every segment an edge
        g = nx.Graph()
        for line in lines.geometry:
            xy = [tuple(p) for p in shapely.get_coordinates(line)]
            for p, q in zip(xy[:-1], xy[1:]):
                g.add_edge(p, q, length=float(np.hypot(q[0] - p[0], q[1] - p[1])))
        # each site inserted into the segment holding its nearest point (shapely projection)
        on_segment: dict = {}
        for sid, pt in zip(survey.site_ids, shapely.points(survey.coords.to_numpy())):
            segs = [(shapely.distance(pt, shapely.LineString([p, q])), p, q)
                    for p, q in g.edges]
            _, p, q = min(segs)
            seg = shapely.LineString([p, q])
            along = shapely.line_locate_point(seg, pt)
            on_segment.setdefault((p, q), []).append((along, sid))
        for (p, q), items in on_segment.items():
            total = g.edges[p, q]["length"]
            g.remove_edge(p, q)
            chain_nodes = [p] + [sid for _, sid in sorted(items)] + [q]
            chain_pos = [0.0] + [a for a, _ in sorted(items)] + [total]
            for u, v, a, b in zip(chain_nodes[:-1], chain_nodes[1:], chain_pos[:-1],
                                  chain_pos[1:]):
                g.add_edge(u, v, length=b - a)
        got = D.network_distances(net)
        ids = list(survey.site_ids)
        for sid in ids[::7]:                                  # 18 sources x 120 targets
            ref = nx.single_source_dijkstra_path_length(g, sid, weight="length")
            np.testing.assert_allclose(got.loc[sid, ids].to_numpy(), [ref[t] for t in ids],
                                       rtol=1e-9, atol=1e-6)

    def test_distance_eigenvectors_on_a_straight_channel_match_the_transect(self):
        basis = D.network_distance_eigenvectors(chain(10))
        # REFERENCES.md, regular transect n = 10, spacing 1, t = 1 [derived]
        assert basis.threshold == pytest.approx(1.0)
        assert basis.moran_i.to_numpy() == pytest.approx([0.93473, 0.75861, 0.46157, 0.17941],
                                                         abs=5e-6)
        assert basis.pcoa_eigenvalues == pytest.approx([20.6188, 18.2413, 14.2312, 10.4220],
                                                       abs=5e-5)
        straight = distance_eigenvectors(np.column_stack([np.arange(10.0), np.zeros(10)]))
        np.testing.assert_allclose(basis.vectors.to_numpy(), straight.vectors.to_numpy(),
                                   atol=1e-10)

    def test_sites_close_across_a_bend_are_far_along_it(self):
        u = shapely.LineString([(0, 10), (0, 0), (1, 0), (1, 10)])   # a hairpin, 21 long
        xy = pd.DataFrame({"x": [0.0, 0, 0, 1, 1, 1], "y": [9.0, 5, 1, 1, 5, 9]},
                          index=list("abcdef"))
        net = build_river_network([u], xy, snap_tolerance=0.1)
        d = D.network_distances(net)
        assert d.loc["a", "f"] == pytest.approx(19.0) and d.loc["c", "d"] == pytest.approx(3.0)
        basis = D.network_distance_eigenvectors(net)
        assert basis.threshold == pytest.approx(4.0)
        w = basis.weights.toarray()
        assert w[0, 5] == 0.0 and w[2, 3] == pytest.approx(1 - (3 / 16) ** 2)


class TestBearing:
    def test_transect_along_the_bearing_is_a_single_channel(self):
        n = 8
        g = neighbour_graph(np.column_stack([np.arange(n, dtype=float), np.zeros(n)]),
                            "delaunay")
        east = D.aem_eigenvectors(D.bearing_graph(g, bearing=90.0), keep="all")
        k = np.arange(1, n)
        # the origin edge of the first site plus n − 1 edges: E lower-triangular [derived]
        assert east.eigenvalues == pytest.approx(1 / (4 * np.sin(np.pi * k / (2 * n)) ** 2))
        west = D.aem_eigenvectors(D.bearing_graph(g, bearing=270.0), keep="all")
        np.testing.assert_allclose(np.abs(west.vectors.to_numpy()[::-1]),
                                   np.abs(east.vectors.to_numpy()), atol=1e-10)
        e = D.site_edge_matrix(D.bearing_graph(g, bearing=90.0))
        # columns: edges i -> i+1 (they reach every site east of i), then site 0's origin
        hand = np.zeros((n, n))
        for j in range(n - 1):
            hand[j + 1:, j] = 1.0
        hand[:, n - 1] = 1.0
        np.testing.assert_array_equal(e.to_frame().to_numpy(), hand)
        assert e.edges["tail"].tolist() == list(range(n - 1)) + [-1]

    def test_edges_weighted_by_the_cosine_of_their_angle(self):
        xy = np.array([[0.0, 0.0], [2.0, 0.0], [1.0, np.sqrt(3.0)]])   # equilateral
        g = neighbour_graph(xy, "delaunay", distance="euclidean")
        d = D.bearing_graph(g, bearing=90.0)                                   # towards +x
        got = {(int(t), int(h)): w for t, h, w in zip(d.tail, d.head, d.base_weight)}
        # 0->1 along the bearing (cos 0); 0->2 and 2->1 at 60 degrees (cos 60 = 0.5)
        assert got == pytest.approx({(0, 1): 1.0, (0, 2): 0.5, (2, 1): 0.5})
        e = D.site_edge_matrix(d)
        frame = e.to_frame()
        frame.columns = [f"{t}->{h}" for t, h in zip(e.edges["tail"], e.edges["head"])]
        # site 0 has nothing upstream (its origin edge reaches all); site 1 gets every edge
        hand = pd.DataFrame({"-1->0": [1.0, 1.0, 1.0], "0->1": [0.0, 1.0, 0.0],
                             "0->2": [0.0, 0.5, 0.5], "2->1": [0.0, 0.5, 0.0]})
        pd.testing.assert_frame_equal(frame[hand.columns].reset_index(drop=True), hand,
                                      check_exact=False, rtol=1e-12)
        assert set(frame.columns) == set(hand.columns)

    def test_bearing_errors(self):
        g = neighbour_graph([[0, 0], [1, 0], [0, 1], [1, 1.5]], "delaunay", distance="euclidean")
        with pytest.raises(InputError, match="`bearing`"):
            D.bearing_graph(g, bearing=float("nan"))
        with pytest.raises(InputError, match="network_distance"):
            D.site_edge_matrix(D.bearing_graph(g, bearing=10.0), weight_by="network_distance")
        b = D.aem_eigenvectors(D.bearing_graph(g, bearing=10.0), keep="all")
        assert b.method == "aem_bearing"
        with pytest.raises(InputError, match="river-network bases only"):
            b.extend([[0.5, 0.5]])


class TestShippedRiver:
    def test_directional_basis_explains_the_drift_better(self, river):
        net, survey, truth = river
        drift = pd.Series(truth["drift_at_sites"]).reindex(survey.site_ids).to_numpy()
        aem = D.aem_eigenvectors(net)
        straight = distance_eigenvectors(survey)
        for m in (10, 20):
            a = explained_fraction(drift, aem.vectors.iloc[:, :m]).r2_adj
            s = explained_fraction(drift, straight.vectors.iloc[:, :m]).r2_adj
            assert a > s + 0.15, (m, a, s)
        a = explained_fraction(drift, aem.vectors).r2_adj
        s = explained_fraction(drift, straight.vectors).r2_adj
        assert a > s + 0.05
        # drift travels with the flow: the against-flow orientation describes it less well
        back = D.aem_eigenvectors(net, orientation="against_flow")
        assert explained_fraction(drift, back.vectors.iloc[:, :20]).r2_adj < \
            explained_fraction(drift, aem.vectors.iloc[:, :20]).r2_adj - 0.05

    def test_sparse_solver_matches_the_dense_one(self, river):
        net, _, _ = river
        dense = D.aem_eigenvectors(net)
        sparse_ = D.aem_eigenvectors(net, solver="sparse", max_vectors=8)
        common = sparse_.vectors.columns
        assert set(common) <= set(dense.vectors.columns)
        assert sparse_.eigenvalues == pytest.approx(dense.eigenvalues[
            [dense.vectors.columns.get_loc(c) for c in common]], rel=1e-9)
        np.testing.assert_allclose(sparse_.vectors.to_numpy(), dense.vectors[common].to_numpy(),
                                   atol=1e-8)
        nd = D.network_distance_eigenvectors(net)
        nd_sparse = D.network_distance_eigenvectors(net, solver="sparse", max_vectors=6)
        assert nd_sparse.eigenvalues == pytest.approx(nd.eigenvalues[:6], rel=1e-9)

    def test_basis_contract(self, river):
        net, survey, _ = river
        b = D.aem_eigenvectors(net, weighting="concave_down", exponent=2.0,
                               weight_by="network_distance", max_distance=30_000.0)
        assert isinstance(b, SpatialBasis)
        assert b.vectors.index.equals(survey.site_ids)
        u = b.vectors.to_numpy()
        np.testing.assert_allclose(u.T @ u, np.eye(b.n_vectors), atol=1e-10)
        np.testing.assert_allclose(u.sum(axis=0), 0.0, atol=1e-10)
        assert (np.diff(b.eigenvalues) <= 0).all() and (b.scale > 0).all()
        assert pickle.loads(pickle.dumps(b)).eigenvalues == pytest.approx(b.eigenvalues)
        assert set(b.to_frame().columns) == {"eigenvalue", "moran_i", "scale"}
        assert "concave_down edge weights of network distance" in b.summary()
        assert "along the network" in D.network_distance_eigenvectors(net).summary()
        with pytest.raises(AttributeError):
            b.method = "other"                                     # frozen


class TestValuesAlongTheNetwork:
    @pytest.mark.parametrize("options", [{}, {"orientation": "against_flow"},
                                         {"weighting": "linear", "max_distance": 40_000.0,
                                          "weight_by": "network_distance"},
                                         {"weighting": "concave_up", "exponent": 0.5}])
    def test_extension_reproduces_the_sites(self, river, options):
        net, survey, _ = river
        b = D.aem_eigenvectors(net, **options)
        np.testing.assert_allclose(b.extend(survey.coords).to_numpy(), b.vectors.to_numpy(),
                                   atol=1e-9)

    def test_distance_based_extension_reproduces_the_sites(self, river):
        net, survey, _ = river
        b = D.network_distance_eigenvectors(net)
        np.testing.assert_allclose(b.extend(survey.coords).to_numpy(), b.vectors.to_numpy(),
                                   atol=1e-9)

    def test_between_two_sites_on_a_channel_values_are_interpolated(self):
        net = chain(6)
        b = D.aem_eigenvectors(net, keep="all")
        pts = pd.DataFrame({"x": [2.25, 4.5], "y": [0.0, 0.0]})
        got = b.extend(pts).to_numpy()
        u = b.vectors.to_numpy()
        # binary AEM: a point a fraction t past site i counts t of the next edge [derived]
        np.testing.assert_allclose(got[0], 0.75 * u[1] + 0.25 * u[2], atol=1e-12)
        np.testing.assert_allclose(got[1], 0.5 * u[3] + 0.5 * u[4], atol=1e-12)

    def test_points_along_the_network(self, river):
        net, _, _ = river
        pts = D.points_along_network(net, spacing=250.0)
        # every point lies on its edge (shapely distance), spacing ≤ the request
        geoms = net.edges.geometry.to_numpy()[pts["edge"]]
        assert (shapely.distance(shapely.points(pts[["x", "y"]].to_numpy()), geoms)
                < 1e-6).all()
        per_edge = pts.groupby("edge").size()
        assert (net.edges["length"] / per_edge <= 250.0 + 1e-9).all()
        b = D.aem_eigenvectors(net)
        values = b.extend(pts)
        assert values.shape == (len(pts), b.n_vectors) and np.isfinite(values.to_numpy()).all()
        with pytest.raises(InputError, match="farther than the network's snap tolerance"):
            b.extend([[0.0, 0.0]])


class TestArguments:
    def test_messages_name_the_argument(self, y_net):
        g = D.river_graph(y_net)
        with pytest.raises(InputError, match="`orientation`"):
            D.site_edge_matrix(g, orientation="sideways")
        with pytest.raises(InputError, match="needs `exponent`"):
            D.site_edge_matrix(g, weighting="concave_down")
        with pytest.raises(InputError, match="`max_distance` applies"):
            D.site_edge_matrix(g, max_distance=3.0)
        with pytest.raises(InputError, match="`graph` must be a DirectionalGraph"):
            D.site_edge_matrix(y_net)
        with pytest.raises(InputError, match="`max_vectors`"):
            D.aem_eigenvectors(g, solver="sparse")
        with pytest.raises(InputError, match="`spacing`"):
            D.points_along_network(y_net, spacing=0.0)


class TestSchemes:
    def test_river_schemes_compare_with_straight_line_schemes(self, river):
        from spatial_ev.selection.weighting import compare_weighting_schemes
        from spatial_ev.stats.transform import transform

        net, survey, _ = river
        schemes = D.river_schemes(net, weightings=("binary", "concave_down:1"))
        assert list(schemes) == ["river_aem/binary", "river_aem/concave_down:1",
                                 "river_distance"]
        assert schemes["river_aem/concave_down:1"].exponent == 1.0
        Y = transform(survey.species, "hellinger")
        mixed = {**schemes, "distance": distance_eigenvectors(survey)}
        out = compare_weighting_schemes(Y, survey, schemes=mixed, n_permutations=199, seed=7,
                                        conditioning=survey.environment)
        assert out.n_schemes == 4
        # the community's spatial part is the downstream drift: a river scheme wins
        assert out.best is not None and out.best.startswith("river")
        assert out.table.loc["river_aem/binary", "r2_adj"] > out.table.loc["distance", "r2_adj"]

    def test_bearing_schemes(self):
        g = neighbour_graph(np.column_stack([np.arange(8.0), np.zeros(8)]), "delaunay",
                            distance="euclidean")
        out = D.bearing_schemes(g, bearing=-270, orientations=("with_flow", "against_flow"))
        assert list(out) == ["bearing_90/binary", "bearing_90_against/binary"]
        assert out["bearing_90/binary"].method == "aem_bearing"
        # scales are reported in the survey's unit, not a generic one
        metres = D.bearing_schemes(g, bearing=90, distance_unit="metre")["bearing_90/binary"]
        assert "metre (equivalent wavelength)" in metres.summary()
        assert "map unit" not in metres.summary()
        with pytest.raises(InputError, match="distance_unit"):
            D.bearing_graph(g, bearing=90, distance_unit="")

    def test_equal_edges_under_a_linear_weighting_are_refused_clearly(self):
        with pytest.raises(InputError, match=r"every edge weight 0.*`max_distance`"):
            D.site_edge_matrix(D.river_graph(chain(6)), weighting="linear")
        ok = D.site_edge_matrix(D.river_graph(chain(6)), weighting="linear", max_distance=2.0)
        assert ok.matrix.max() == pytest.approx(0.5) and ok.max_distance == 2.0
        with pytest.raises(InputError, match="`weightings` entry 'concave_down:x'"):
            D.river_schemes(chain(6), weightings=("concave_down:x",))
