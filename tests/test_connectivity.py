"""Tests of spatial_ev.space.graphs: neighbour graphs and edge weightings."""

from __future__ import annotations

import types
import warnings

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import shapely
from scipy import sparse
from scipy.sparse import csgraph
from scipy.spatial import Delaunay
from scipy.spatial.distance import cdist

from spatial_ev.space.geometry import EARTH_RADIUS_M, mst_threshold
from spatial_ev.space.graphs import NeighbourGraph, insertion_neighbours, neighbour_graph
from spatial_ev.errors import (DisconnectedGraphWarning, GeographicCoordinatesWarning,
                               GraphError, InputError)

SEEDS = [104_729, 7_368_787, 982_451_653]


def _random_xy(seed: int, n: int = 150) -> np.ndarray:
    return np.random.default_rng(seed).uniform(0, 1000, size=(n, 2))


def _edge_set(graph: NeighbourGraph) -> set[tuple[int, int]]:
    upper = sparse.triu(graph.lengths, k=1).tocoo()
    return set(zip(upper.row.tolist(), upper.col.tolist()))


def _grid(nx: int, ny: int) -> np.ndarray:
    xx, yy = np.meshgrid(np.arange(float(nx)), np.arange(float(ny)))
    return np.column_stack([xx.ravel(), yy.ravel()])


class TestNeighbourGraph:
    @pytest.mark.parametrize("seed", SEEDS)
    def test_graph_inclusion_chain(self, seed):
        # Toussaint 1980, Pattern Recogn. 12:261-268; Matula & Sokal 1980, Geogr. Anal.
        # 12:205-222 [memory]: NN ⊆ MST ⊆ RNG ⊆ Gabriel ⊆ Delaunay.
        xy = _random_xy(seed)
        sets = {m: _edge_set(neighbour_graph(xy, m, distance="euclidean"))
                for m in ("minimum_spanning_tree", "relative_neighbourhood", "gabriel",
                          "delaunay")}
        assert sets["minimum_spanning_tree"] <= sets["relative_neighbourhood"]
        assert sets["relative_neighbourhood"] <= sets["gabriel"] <= sets["delaunay"]
        assert len(sets["minimum_spanning_tree"]) == len(xy) - 1
        d = cdist(xy, xy)
        np.fill_diagonal(d, np.inf)
        nn = {tuple(sorted((i, int(j)))) for i, j in enumerate(d.argmin(axis=1))}
        assert nn <= sets["minimum_spanning_tree"]

    @pytest.mark.parametrize("seed", SEEDS)
    def test_gabriel_and_rng_equal_brute_force_definitions(self, seed):
        # Definitions (Gabriel & Sokal 1969; Toussaint 1980) [memory], checked by an O(n³)
        # oracle: Gabriel i–j iff no k with d_ik² + d_jk² ≤ d_ij²; RNG iff no k with
        # max(d_ik, d_jk) < d_ij.
        xy = _random_xy(seed, n=45)
        d = cdist(xy, xy)
        n = len(xy)
        gab, rng_ = set(), set()
        for i in range(n):
            for j in range(i + 1, n):
                others = np.array([k for k in range(n) if k not in (i, j)])
                if not np.any(d[i, others] ** 2 + d[j, others] ** 2 <= d[i, j] ** 2):
                    gab.add((i, j))
                if not np.any(np.maximum(d[i, others], d[j, others]) < d[i, j]):
                    rng_.add((i, j))
        assert _edge_set(neighbour_graph(xy, "gabriel", distance="euclidean")) == gab
        assert _edge_set(neighbour_graph(xy, "relative_neighbourhood",
                                         distance="euclidean")) == rng_

    def test_regular_grid_gabriel_and_rng_are_rook(self):
        # [derived] on a square lattice the diagonals have the other two corners on their
        # diametral circle (removed from Gabriel) and in their lune (removed from RNG).
        xy = _grid(5, 5)
        d = cdist(xy, xy)
        rook = {(i, j) for i in range(25) for j in range(i + 1, 25) if abs(d[i, j] - 1) < 1e-12}
        assert _edge_set(neighbour_graph(xy, "gabriel")) == rook
        assert _edge_set(neighbour_graph(xy, "relative_neighbourhood")) == rook

    def test_delaunay_edges_match_scipy_triangulation(self):
        xy = _random_xy(SEEDS[0], n=80)
        tri = Delaunay(xy).simplices
        expected = {tuple(sorted((int(a), int(b)))) for t in tri for a, b in
                    ((t[0], t[1]), (t[1], t[2]), (t[0], t[2]))}
        assert _edge_set(neighbour_graph(xy, "delaunay", distance="euclidean")) == expected

    @pytest.mark.parametrize("seed", SEEDS)
    def test_mst_threshold_equals_scipy_mst_on_full_distance_matrix(self, seed):
        # Borcard & Legendre 2002, Ecol. Model. 153:51-68: t = longest MST edge [paper];
        # oracle: scipy's MST of the complete distance graph.
        xy = _random_xy(seed, n=120)
        full = csgraph.minimum_spanning_tree(cdist(xy, xy))
        assert mst_threshold(xy, distance="euclidean") == pytest.approx(full.data.max(),
                                                                       rel=1e-14)
        g = neighbour_graph(xy, "minimum_spanning_tree", distance="euclidean")
        assert g.lengths.sum() / 2 == pytest.approx(full.sum(), rel=1e-12)

    def test_distance_band_default_is_smallest_connecting_threshold(self):
        xy = _random_xy(SEEDS[1], n=200)
        g = neighbour_graph(xy, "distance_band", distance="euclidean")
        assert g.n_components == 1
        d = cdist(xy, xy)
        expected = ((d <= g.threshold) & (d > 0)).sum() // 2
        assert g.n_edges == expected
        with pytest.raises(GraphError, match=r"disconnected: 2 components of sizes"):
            neighbour_graph(xy, "distance_band", threshold=g.threshold * (1 - 1e-9),
                            distance="euclidean")

    @pytest.mark.filterwarnings("ignore::spatial_ev.errors.DisconnectedGraphWarning")
    def test_k_nearest_contains_each_sites_k_nearest(self):
        xy = _random_xy(SEEDS[2], n=100)
        g = neighbour_graph(xy, "k_nearest", k=4, distance="euclidean", disconnected="allow")
        d = cdist(xy, xy)
        np.fill_diagonal(d, np.inf)
        knn = np.argsort(d, axis=1)[:, :4]
        dense = g.lengths.toarray()
        assert np.all(dense[np.arange(100)[:, None], knn] > 0)
        assert (abs(g.lengths - g.lengths.T)).max() == 0
        assert np.allclose(dense[dense > 0], d[dense > 0])

    def test_transect_delaunay_family_is_the_path(self):
        # collinear sites: qhull cannot triangulate; the exact 1-D graph is the path.
        xy = np.column_stack([np.array([0.0, 3, 1, 7, 2]), np.array([0.0, 6, 2, 14, 4])])
        for m in ("delaunay", "gabriel", "relative_neighbourhood", "minimum_spanning_tree"):
            g = neighbour_graph(xy, m)
            assert _edge_set(g) == {(0, 2), (2, 4), (1, 4), (1, 3)}
        assert mst_threshold(xy) == pytest.approx(np.hypot(4, 8))

    def test_contiguity_edge_and_vertex_rules(self):
        squares = [shapely.box(i, j, i + 1, j + 1) for j in range(3) for i in range(3)]
        polys = gpd.GeoSeries(squares, index=pd.Index([f"p{k}" for k in range(9)], name="id"))
        rook = neighbour_graph(polygons=polys, method="contiguity", contiguity="edge",
                               distance="euclidean")
        queen = neighbour_graph(polygons=polys, method="contiguity", contiguity="vertex",
                                distance="euclidean")
        assert rook.n_edges == 12 and queen.n_edges == 20
        assert list(rook.site_ids) == list(polys.index)
        assert rook.lengths[0, 1] == pytest.approx(1.0)

    def test_survey_duck_typing_uses_coords_ids_and_polygons(self):
        squares = [shapely.box(i, 0, i + 1, 1) for i in range(4)]
        ids = pd.Index(["a", "b", "c", "d"], name="site")
        sites = gpd.GeoDataFrame(geometry=squares, index=ids)
        coords = pd.DataFrame({"x": [0.5, 1.5, 2.5, 3.5], "y": 0.5}, index=ids)
        survey = types.SimpleNamespace(coords=coords, sites=sites, geometry_type="polygon",
                                       crs=None)
        g = neighbour_graph(survey, "contiguity")
        assert list(g.site_ids) == ["a", "b", "c", "d"] and g.n_edges == 3

    def test_great_circle_lengths_match_haversine(self):
        lonlat = np.array([[-3.0, 51.0], [-2.9, 51.05], [-2.95, 51.1], [-3.05, 51.08]])
        g = neighbour_graph(lonlat, "delaunay", distance="great_circle")
        coo = sparse.triu(g.lengths, 1).tocoo()
        lon, lat = np.radians(lonlat[:, 0]), np.radians(lonlat[:, 1])
        i, j = coo.row, coo.col
        # haversine formula (Sinnott 1984, Sky Telesc. 68:159 [memory])
        h = np.sin((lat[j] - lat[i]) / 2) ** 2 + np.cos(lat[i]) * np.cos(lat[j]) * \
            np.sin((lon[j] - lon[i]) / 2) ** 2
        assert np.allclose(coo.data, 2 * EARTH_RADIUS_M * np.arcsin(np.sqrt(h)), rtol=1e-10)
        assert g.n_edges == 5

    def test_disconnected_allowed_with_warning(self):
        xy = np.array([[0.0, 0], [1, 0], [0, 1], [100, 100], [101, 100], [100, 101.5]])
        with pytest.warns(DisconnectedGraphWarning, match="2 components of sizes 3"):
            g = neighbour_graph(xy, "k_nearest", k=2, disconnected="allow")
        assert g.n_components == 2

    def test_inputs_not_modified_and_ids_kept(self):
        frame = pd.DataFrame(_random_xy(SEEDS[0], 30), columns=["x", "y"],
                             index=pd.Index([f"s{i}" for i in range(30)], name="site"))
        before = frame.copy()
        g = neighbour_graph(frame, "gabriel", distance="euclidean")
        pd.testing.assert_frame_equal(frame, before)
        assert g.site_ids.equals(frame.index)
        assert set(g.edges().columns) == {"from", "to", "length"}


class TestInsertionNeighbours:
    def test_delaunay_insertion_matches_retriangulation(self):
        # oracle: scipy's Delaunay of sites ∪ {p}, neighbours of p
        xy = _random_xy(SEEDS[0], n=60)
        g = neighbour_graph(xy, "delaunay", distance="euclidean")
        new = np.random.default_rng(SEEDS[1]).uniform(-200, 1200, size=(25, 2))
        p, s, _, coincident = insertion_neighbours(g, new)
        assert np.all(coincident == -1)
        for m in range(len(new)):
            tri = Delaunay(np.vstack([xy, new[m]]))
            indptr, nb = tri.vertex_neighbor_vertices
            expected = set(nb[indptr[60]:indptr[61]].tolist())
            assert set(s[p == m].tolist()) == expected

    def test_delaunay_insertion_with_hull_slivers(self):
        # sites nearly in line along one side make thin hull triangles whose circumcircles
        # span the layout; each point must still get exactly its retriangulated neighbours
        rng = np.random.default_rng(SEEDS[2])
        edge = np.column_stack([np.linspace(0, 1000, 12), 1e-3 * rng.normal(size=12)])
        xy = np.vstack([edge, rng.uniform([0, 50], [1000, 1000], size=(40, 2))])
        g = neighbour_graph(xy, "delaunay", distance="euclidean")
        new = rng.uniform([0, 1], [1000, 1000], size=(30, 2))
        p, s, _, _ = insertion_neighbours(g, new)
        for m in range(len(new)):
            tri = Delaunay(np.vstack([xy, new[m]]))
            indptr, nb = tri.vertex_neighbor_vertices
            expected = set(nb[indptr[len(xy)]:indptr[len(xy) + 1]].tolist())
            assert set(s[p == m].tolist()) == expected

    def test_gabriel_insertion_matches_rebuilt_graph(self):
        xy = _random_xy(SEEDS[2], n=50)
        g = neighbour_graph(xy, "gabriel", distance="euclidean")
        new = np.random.default_rng(SEEDS[0]).uniform(0, 1000, size=(10, 2))
        p, s, _, _ = insertion_neighbours(g, new)
        for m in range(len(new)):
            full = neighbour_graph(np.vstack([xy, new[m]]), "gabriel", distance="euclidean")
            assert set(s[p == m].tolist()) == set(full.lengths[50].indices.tolist())


class TestWeights:
    def test_weighting_formulas(self):
        # Dray et al. 2006, Ecol. Model. 196:483-493; Bauman et al. 2018, Ecology
        # 99:2159-2166 [memory for exact forms]
        g = neighbour_graph(np.array([[0.0, 0], [1, 0], [3, 0]]), "delaunay")
        assert g.weights("binary").toarray()[0, 1] == 1
        assert g.weights("linear").toarray()[0, 1] == pytest.approx(0.5)
        assert g.weights("linear").toarray()[1, 2] == 0
        assert g.weights("concave_down", exponent=2).toarray()[0, 1] == pytest.approx(0.75)
        assert g.weights("concave_up", exponent=2).toarray()[1, 2] == pytest.approx(0.25)
        w = g.weights("linear", max_distance=4)
        assert w[0, 1] == pytest.approx(0.75) and (abs(w - w.T)).max() == 0


class TestInputValidation:
    def test_duplicate_sites(self):
        xy = pd.DataFrame({"x": [0.0, 1, 0], "y": [0.0, 1, 0]}, index=["a", "b", "c"])
        with pytest.raises(InputError, match=r"sites 'a' and 'c' share coordinates"):
            neighbour_graph(xy, "delaunay")

    def test_bad_shapes_and_values(self):
        with pytest.raises(InputError, match=r"shape \(n_sites, 2\)"):
            neighbour_graph(np.zeros((4, 3)))
        with pytest.raises(InputError, match="missing or infinite coordinate at site 1"):
            neighbour_graph(np.array([[0.0, 0], [np.nan, 1], [2, 2]]))
        with pytest.raises(InputError, match="columns 'x' and 'y'"):
            neighbour_graph(pd.DataFrame({"e": [0.0, 1], "n": [0.0, 1]}))

    def test_options(self):
        xy = _grid(3, 3)
        with pytest.raises(InputError, match="parameter `method` must be one of"):
            neighbour_graph(xy, "voronoi")
        with pytest.raises(InputError, match="needs `k`"):
            neighbour_graph(xy, "k_nearest")
        with pytest.raises(InputError, match="`threshold` applies to method='distance_band'"):
            neighbour_graph(xy, "gabriel", threshold=2.0)
        with pytest.raises(InputError, match="needs site polygons"):
            neighbour_graph(xy, "contiguity")
        g = neighbour_graph(xy, "gabriel")
        with pytest.raises(InputError, match="needs `exponent`"):
            g.weights("concave_up")
        with pytest.raises(InputError, match="applies only to the concave weightings"):
            g.weights("linear", exponent=2)
        with pytest.raises(InputError, match="at least the longest edge"):
            g.weights("linear", max_distance=0.5)

    def test_degrees(self):
        lonlat = np.array([[-3.01, 51.0], [-2.9, 51.05], [-2.95, 51.1]])
        with pytest.warns(GeographicCoordinatesWarning, match="longitude/latitude ranges"):
            neighbour_graph(lonlat, "delaunay")
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            neighbour_graph(lonlat, "delaunay", distance="euclidean")
        with pytest.raises(InputError, match="longitude/latitude columns"):
            neighbour_graph(pd.DataFrame({"x": lonlat[:, 0], "y": lonlat[:, 1],
                                          "lat": lonlat[:, 1]}))
        with pytest.raises(InputError, match=r"needs longitude/latitude in degrees"):
            neighbour_graph(lonlat * 1000, distance="great_circle")
        crs = types.SimpleNamespace(is_geographic=True, __str__=lambda self: "EPSG:4326")
        survey = types.SimpleNamespace(coords=pd.DataFrame({"x": lonlat[:, 0],
                                                            "y": lonlat[:, 1]}), crs=crs)
        with pytest.raises(InputError, match="geographic CRS"):
            neighbour_graph(survey)
