"""Tests of spatial_ev.space.eigen: distance-based and graph-based spatial eigenvectors."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.spatial.distance import cdist

from spatial_ev.space.geometry import mst_threshold
from spatial_ev.space.graphs import neighbour_graph
from spatial_ev.space.eigen import SpatialBasis, distance_eigenvectors, graph_eigenvectors
from spatial_ev.errors import InputError
from spatial_ev.inference.autocorrelation import morans_i

SEEDS = [2_147_483_647, 305_175_781, 9_999_991]


def _transect(n: int) -> np.ndarray:
    return np.column_stack([np.arange(float(n)), np.zeros(n)])


def _grid(nx: int, ny: int) -> np.ndarray:
    xx, yy = np.meshgrid(np.arange(float(nx)), np.arange(float(ny)))
    return np.column_stack([xx.ravel(), yy.ravel()])


def _pcoa_truncated(xy: np.ndarray, t: float) -> tuple[np.ndarray, np.ndarray]:
    """Dense PCoA of the distance matrix truncated at t (distances > t set to 4t)."""
    d = cdist(xy, xy)
    d[d > t] = 4 * t
    n = len(xy)
    c = np.eye(n) - 1.0 / n
    g = c @ (-0.5 * d ** 2) @ c
    lam, u = np.linalg.eigh(g)
    return lam[::-1], u[:, ::-1]


def _check_basis_contract(b: SpatialBasis) -> None:
    u = b.vectors.to_numpy()
    k = u.shape[1]
    assert list(b.vectors.columns) == [f"sv{i + 1:03d}" for i in range(k)]
    assert np.allclose(u.T @ u, np.eye(k), atol=1e-10)
    assert np.allclose(u.sum(axis=0), 0, atol=1e-10)
    assert np.all(np.diff(b.eigenvalues) <= 1e-12)
    a = np.abs(u)
    first = np.argmax(a >= a.max(axis=0) * (1 - 1e-8), axis=0)
    assert np.all(u[first, np.arange(k)] > 0)


class TestDistanceEigenvectors:
    def test_transect_n10_check_values(self):
        # REFERENCES [derived] from Borcard & Legendre 2002 (Ecol. Model. 153:51-68) and the
        # sparse equivalence of Dray et al. 2006 (Ecol. Model. 196:483-493).
        b = distance_eigenvectors(_transect(10), keep="all")
        lam = b.pcoa_eigenvalues[b.pcoa_eigenvalues > 1e-9]
        assert np.allclose(lam, [20.6188, 18.2413, 14.2312, 10.4220, 5.8653, 1.9156], atol=1e-4)
        assert np.allclose(b.moran_i.to_numpy()[:6],
                           [0.93473, 0.75861, 0.46157, 0.17941, -0.15813, -0.45070], atol=1e-5)
        assert distance_eigenvectors(_transect(10)).n_vectors == 4
        _check_basis_contract(b)

    @pytest.mark.parametrize(("xy", "n_pos_lambda", "n_pos_i"), [
        (_transect(100), 67, 49), (_transect(30), 20, 14), (_grid(10, 10), 69, 44)])
    def test_counts_of_positive_eigenvalues_and_moran(self, xy, n_pos_lambda, n_pos_i):
        # REFERENCES [derived]: transect n = 100 → 67 / 49, n = 30 → 20 / 14; grid 69 / 44.
        b = distance_eigenvectors(xy, keep="all")
        assert int((b.pcoa_eigenvalues > 1e-9 * b.pcoa_eigenvalues.max()).sum()) == n_pos_lambda
        assert distance_eigenvectors(xy).n_vectors == n_pos_i
        assert b.n_vectors == len(xy) - 1

    @pytest.mark.parametrize("seed", SEEDS)
    def test_sparse_identity_against_dense_truncated_pcoa(self, seed):
        # λ = 8t²(μ + 1) and identical eigenvectors [derived] vs the PCoA of the truncated
        # distance matrix (Borcard & Legendre 2002; Dray et al. 2006).
        xy = np.random.default_rng(seed).uniform(0, 100, size=(70, 2))
        b = distance_eigenvectors(xy, keep="all", distance="euclidean")
        t = mst_threshold(xy, distance="euclidean")
        assert b.threshold == t
        lam, u = _pcoa_truncated(xy, t)
        const = np.argmax(np.abs(u.sum(axis=0)))    # drop the constant (eigenvalue 0 of G)
        lam, u = np.delete(lam, const), np.delete(u, const, axis=1)
        order = np.argsort(-lam)
        assert np.allclose(b.pcoa_eigenvalues, lam[order], rtol=1e-9, atol=1e-9 * lam.max())
        gaps = np.abs(np.diff(lam[order]))
        ok = np.flatnonzero((np.r_[gaps, np.inf] > 1e-6) & (np.r_[np.inf, gaps] > 1e-6))
        cos = np.abs((b.vectors.to_numpy()[:, ok] * u[:, order][:, ok]).sum(axis=0))
        assert np.all(cos > 1 - 1e-8)

    def test_moran_i_equals_n_over_s0_mu_and_morans_i(self):
        # I = (n/S₀)μ (Dray et al. 2006) vs an independent Moran's I computation.
        xy = np.random.default_rng(SEEDS[0]).uniform(0, 100, size=(60, 2))
        b = distance_eigenvectors(xy, distance="euclidean")
        res = morans_i(b.vectors, b.weights)
        assert np.allclose(res.statistic.to_numpy(), b.moran_i.to_numpy(), atol=1e-12)
        s0 = b.weights.sum()
        assert np.allclose(b.moran_i, 60 / s0 * b.eigenvalues)
        _check_basis_contract(b)

    def test_scale_on_a_regular_transect(self):
        # [derived] with t = 1 the weights are the path graph's; odd vectors are exactly
        # sin(2πj(i − m)/(n + 1)), wavelength 2(n + 1)/(k + 1) spacings, so the scale ∝ 2n/k
        # as k grows (≈ k sign changes; REFERENCES).
        n = 100
        b = distance_eigenvectors(_transect(n))
        k = np.arange(1, b.n_vectors + 1)
        scale = b.scale.to_numpy()
        odd = (k % 2 == 1) & (k <= n // 4)
        assert np.allclose(scale[odd], 2 * (n + 1) / (k[odd] + 1), rtol=0.03)
        ratio = scale * k / (2 * n)
        assert np.all((ratio[4:25] > 0.8) & (ratio[4:25] < 1.05))
        signs = np.sign(b.vectors.to_numpy())
        changes = (np.diff(signs, axis=0) != 0).sum(axis=0)
        assert np.all(np.abs(changes[:20] - k[:20]) <= 1)

    def test_scale_on_equal_edges_is_the_plane_wave_match(self):
        # [derived] on a unit grid with t = 1 every edge has length 1, the amplitude weights
        # cancel and the scale is the plane wave whose neighbour-lag correlation J0(κ)
        # equals ρ = uᵀWu/uᵀDu (J0 for a random direction: Watson 1944, Bessel Functions
        # §2.2 [memory]); scipy's brentq and j0 are the oracle
        from scipy.optimize import brentq
        from scipy.special import j0

        b = distance_eigenvectors(_grid(10, 10))
        u = b.vectors.to_numpy()
        w = b.weights
        rho = np.einsum("ik,ik->k", u, w @ u) / (np.asarray(w.sum(axis=1)).ravel() @ u ** 2)
        expected = [2 * np.pi / brentq(lambda k, r=r: j0(k) - r, 1e-9, 3.8317) for r in rho]
        assert np.allclose(b.scale.to_numpy(), expected, rtol=1e-5)

    def test_transect_scales_are_the_cosine_match(self):
        # [derived] on a transect with t = 1 (equal edges) the scale solves
        # 1 − cos(κ) = 1 − ρ exactly: κ = arccos(ρ) (numpy as the oracle); the odd,
        # sine-like vectors keep these values whatever the estimator's mixed-density form
        b = distance_eigenvectors(_transect(60))
        u = b.vectors.to_numpy()
        rho = np.einsum("ik,ik->k", u, b.weights @ u) / (
            np.asarray(b.weights.sum(axis=1)).ravel() @ u ** 2)
        assert np.allclose(b.scale.to_numpy(), 2 * np.pi / np.arccos(rho), rtol=1e-5)

    def test_scale_solves_the_local_amplitude_equation(self):
        # [derived] on a mixed-density layout each vector's κ = 2π/scale balances
        # Σ w (u_i − u_j)² = Σ w (u_i² + u_j²) g(κ d_ij), g = 1 − J0(min(x, j₁,₁)) the monotone
        # envelope (j₁,₁ = 3.8317, first zero of J1, from scipy); evaluated edge by edge with
        # scipy.special.j0 (the estimator bins lags, hence the 2 % tolerance)
        from scipy import sparse
        from scipy.special import j0, jn_zeros

        rng = np.random.default_rng(SEEDS[0])
        xy = np.vstack([rng.normal(150, 25, (60, 2)), rng.uniform(0, 600, (40, 2))])
        b = distance_eigenvectors(xy)
        w = sparse.triu(b.weights).tocoo()
        d = np.hypot(*(xy[w.row] - xy[w.col]).T)
        u = b.vectors.to_numpy()
        left = w.data @ (u[w.row] - u[w.col]) ** 2
        kappa = 2 * np.pi / b.scale.to_numpy()
        x = np.minimum(np.outer(d, kappa), jn_zeros(1, 1)[0])
        right = np.einsum("e,ek,ek->k", w.data, u[w.row] ** 2 + u[w.col] ** 2, 1 - j0(x))
        assert np.allclose(left, right, rtol=0.02)
        # no clamping: every positive-I vector has its own scale (a first-crossing rule
        # gave many vectors the same value on such layouts)
        assert np.unique(b.scale.round(6)).size == b.n_vectors

    @pytest.mark.parametrize("seed", range(6))
    def test_adding_sites_inside_never_coarsens_the_finest_scale(self, seed):
        # property: clustered sites plus 30 sites inside their convex hull (shapely decides
        # inside); the finest resolvable scale (5 % quantile of the vector scales) does not
        # rise beyond 5 % (the quantile of a discrete spectrum moves by one vector), the
        # broadest (twice the extent's long side) does not move at all
        from shapely.geometry import MultiPoint, Point

        from spatial_ev.space.scales import resolvable_scales

        rng = np.random.default_rng(seed)
        centres = rng.uniform(100, 500, (4, 2))
        xy = np.vstack([c + rng.normal(0, 40, (20, 2)) for c in centres]
                       + [rng.uniform(0, 600, (15, 2))])
        hull = MultiPoint([tuple(p) for p in xy]).convex_hull
        extra = []
        while len(extra) < 30:
            p = rng.uniform(0, 600, 2)
            if hull.contains(Point(*p)):
                extra.append(p)
        more = np.vstack([xy, extra])
        fine1, broad1 = resolvable_scales(distance_eigenvectors(xy).scale, xy)
        fine2, broad2 = resolvable_scales(distance_eigenvectors(more).scale, more)
        assert fine2 <= fine1 * 1.05
        assert broad2 == pytest.approx(broad1, rel=1e-12)

    @pytest.mark.parametrize("solver", ["dense", "sparse"])
    def test_extension_reproduces_sites(self, solver):
        # Nyström / add-a-point extension [derived]: exact at the original sites.
        xy = np.random.default_rng(SEEDS[1]).uniform(0, 100, size=(150, 2))
        b = distance_eigenvectors(xy, max_vectors=20, solver=solver, distance="euclidean")
        ext = b.extend(pd.DataFrame(xy[:30], columns=["x", "y"]))
        assert np.allclose(ext.to_numpy(), b.vectors.to_numpy()[:30], atol=1e-10)

    def test_extension_equals_gower_add_a_point(self):
        # Gower 1968 (Biometrika 55:582-585) [memory]: u_new = ½Λ⁻¹Uᵀ(g − δ), g = diag(G),
        # δ = squared truncated distances from the new point, U unit-norm PCoA vectors.
        xy = np.random.default_rng(SEEDS[2]).uniform(0, 100, size=(50, 2))
        b = distance_eigenvectors(xy, distance="euclidean")
        t = b.threshold
        lam, u = _pcoa_truncated(xy, t)
        new = np.array([[50.0, 50.0], [10.0, 91.0], [300.0, 300.0]])
        d = cdist(new, xy)
        d[d > t] = 4 * t
        dd = cdist(xy, xy)
        dd[dd > t] = 4 * t
        a = -0.5 * dd ** 2
        g = np.diag(a - a.mean(0) - a.mean(1)[:, None] + a.mean())
        k = b.n_vectors
        expected = 0.5 * ((g[None, :] - d ** 2) @ u[:, :k]) / lam[:k]
        signs = np.sign((u[:, :k] * b.vectors.to_numpy()).sum(axis=0))
        assert np.allclose(b.extend(new).to_numpy(), expected * signs, atol=1e-10)

    def test_sparse_and_dense_paths_agree(self):
        # Lanczos on the implicitly centred operator vs a dense solver.
        xy = np.random.default_rng(SEEDS[2]).uniform(0, 1000, size=(800, 2))
        dense = distance_eigenvectors(xy, max_vectors=40, solver="dense", distance="euclidean")
        lanczos = distance_eigenvectors(xy, max_vectors=40, solver="sparse",
                                        distance="euclidean")
        assert lanczos.solver == "sparse" and dense.solver == "dense"
        mu_d, mu_s = dense.eigenvalues, lanczos.eigenvalues
        assert np.allclose(mu_s, mu_d, rtol=1e-8, atol=0)
        rel_gap = np.abs(np.diff(mu_d)) / mu_d.max()
        sep = (np.r_[rel_gap, np.inf] > 1e-4) & (np.r_[np.inf, rel_gap] > 1e-4)
        cos = np.abs((dense.vectors.to_numpy() * lanczos.vectors.to_numpy()).sum(axis=0))
        assert np.all(cos[sep] >= 0.9999) and sep.sum() >= 30
        assert np.allclose(dense.scale[sep], lanczos.scale[sep], rtol=1e-6)

    def test_negative_and_finest_scale(self):
        xy = np.random.default_rng(SEEDS[0]).uniform(0, 1000, size=(300, 2))
        neg = distance_eigenvectors(xy, keep="negative", distance="euclidean")
        assert np.all(neg.moran_i < 0)
        fine = distance_eigenvectors(xy, finest_scale=250.0, distance="euclidean")
        allv = distance_eigenvectors(xy, distance="euclidean")
        assert np.all(fine.scale >= 250.0)
        assert fine.n_vectors == int((allv.scale >= 250.0).sum())
        sparse_fine = distance_eigenvectors(xy, finest_scale=250.0, solver="sparse",
                                            distance="euclidean")
        assert sparse_fine.n_vectors == fine.n_vectors

    def test_site_ids_kept_and_input_unchanged(self):
        frame = pd.DataFrame(_grid(6, 5), columns=["x", "y"],
                             index=pd.Index([f"q{i}" for i in range(30)], name="quadrat"))
        before = frame.copy()
        b = distance_eigenvectors(frame)
        pd.testing.assert_frame_equal(frame, before)
        assert b.vectors.index.equals(frame.index)
        assert list(b.to_frame().columns) == ["eigenvalue", "moran_i", "scale",
                                              "pcoa_eigenvalue"]
        assert "spatial eigenvectors" in b.summary()


class TestGraphEigenvectors:
    @pytest.mark.parametrize(("xy", "method", "kw", "imax", "imin"), [
        (_transect(10), "delaunay", {}, 0.934726, -1.066103),
        (_transect(100), "gabriel", {}, 1.008147, -1.009612),
        (_grid(5, 5), "gabriel", {}, 0.853766, -1.082485)])
    def test_moran_bounds(self, xy, method, kw, imax, imin):
        # de Jong, Sprenger & van Veen 1984 (Geogr. Anal. 16:17-24) [memory]: bounds
        # (n/S₀)μ_max, (n/S₀)μ_min; values [derived] in REFERENCES.
        b = graph_eigenvectors(neighbour_graph(xy, method, **kw), keep="all")
        assert b.n_vectors == len(xy) - 1
        assert b.moran_i.iloc[0] == pytest.approx(imax, abs=1e-6)
        assert b.moran_i.iloc[-1] == pytest.approx(imin, abs=1e-6)
        _check_basis_contract(b)

    def test_ring_moran_values(self):
        # ring n = 10: I_k = cos(2πk/10) [derived], each k < 5 twice, k = 5 once.
        ang = 2 * np.pi * np.arange(10) / 10
        g = neighbour_graph(np.column_stack([np.cos(ang), np.sin(ang)]) * 10, "k_nearest", k=2,
                            distance="euclidean")
        b = graph_eigenvectors(g, keep="all")
        expected = np.sort(np.cos(2 * np.pi * np.r_[1, 1, 2, 2, 3, 3, 4, 4, 5] / 10))[::-1]
        assert np.allclose(b.moran_i.to_numpy(), expected, atol=1e-12)
        assert b.moran_i.iloc[0] == pytest.approx(0.809017, abs=1e-6)

    @pytest.mark.parametrize("weighting,exponent", [("binary", None), ("linear", None),
                                                    ("concave_down", 2.0),
                                                    ("concave_up", 1.0)])
    def test_weightings_and_moran_identity(self, weighting, exponent):
        xy = np.random.default_rng(SEEDS[1]).uniform(0, 100, size=(60, 2))
        g = neighbour_graph(xy, "delaunay", distance="euclidean")
        b = graph_eigenvectors(g, weighting=weighting, exponent=exponent,
                               max_distance=None if weighting == "binary" else None)
        w = b.weights
        assert abs(w - w.T).max() < 1e-15
        res = morans_i(b.vectors, w)
        assert np.allclose(res.statistic.to_numpy(), b.moran_i.to_numpy(), atol=1e-12)
        assert np.all(b.moran_i > 0)
        _check_basis_contract(b)

    @pytest.mark.parametrize("method,kw", [("delaunay", {}), ("gabriel", {}),
                                           ("relative_neighbourhood", {}),
                                           ("minimum_spanning_tree", {}),
                                           ("k_nearest", {"k": 5}), ("distance_band", {})])
    def test_extension_reproduces_sites(self, method, kw):
        xy = np.random.default_rng(SEEDS[2]).uniform(0, 100, size=(80, 2))
        g = neighbour_graph(xy, method, distance="euclidean", **kw)
        b = graph_eigenvectors(g, weighting="linear", max_distance=2 * g.longest_edge)
        assert np.allclose(b.extend(xy[::4]).to_numpy(), b.vectors.to_numpy()[::4], atol=1e-10)
        new = b.extend(xy[:5] + 0.37)
        assert np.isfinite(new.to_numpy()).all()

    def test_sparse_and_dense_agree_for_graphs(self):
        xy = np.random.default_rng(SEEDS[0]).uniform(0, 100, size=(600, 2))
        g = neighbour_graph(xy, "gabriel", distance="euclidean")
        d = graph_eigenvectors(g, max_vectors=25, solver="dense")
        s = graph_eigenvectors(g, max_vectors=25, solver="sparse")
        assert np.allclose(s.eigenvalues, d.eigenvalues, rtol=1e-8, atol=0)


class TestInputValidation:
    def test_messages(self):
        xy = _grid(4, 4)
        with pytest.raises(InputError, match="parameter `keep` must be one of"):
            distance_eigenvectors(xy, keep="both")
        with pytest.raises(InputError, match="parameter `solver` must be one of"):
            distance_eigenvectors(xy, solver="arpack")
        with pytest.raises(InputError, match="parameter `max_vectors` must be >= 1"):
            distance_eigenvectors(xy, max_vectors=0)
        with pytest.raises(InputError, match="give `max_vectors`"):
            distance_eigenvectors(xy, solver="sparse")
        with pytest.raises(InputError, match="keep='all' needs every eigenvector"):
            distance_eigenvectors(xy, solver="sparse", keep="all", max_vectors=3)
        with pytest.raises(InputError, match="must be a NeighbourGraph"):
            graph_eigenvectors(xy)
        with pytest.raises(InputError, match="no edges"):
            distance_eigenvectors(xy, threshold=0.5)
        b = distance_eigenvectors(xy)
        with pytest.raises(InputError, match=r"finite \(m, 2\) array"):
            b.extend(np.zeros((3, 3)))


class TestGreatCircle:
    def test_matches_local_equidistant_projection(self):
        # oracle: pyproj's azimuthal equidistant projection on the same sphere; over a few km
        # planar distances differ from great-circle ones by ~1e-7 relative [derived].
        import pyproj

        from spatial_ev.space.geometry import EARTH_RADIUS_M
        rng = np.random.default_rng(SEEDS[0])
        lonlat = np.column_stack([-4.0 + rng.uniform(0, 0.05, 120),
                                  52.0 + rng.uniform(0, 0.03, 120)])
        proj = pyproj.Proj(proj="aeqd", lon_0=-3.975, lat_0=52.015, R=EARTH_RADIUS_M)
        xy = np.column_stack(proj(lonlat[:, 0], lonlat[:, 1]))
        sphere = distance_eigenvectors(lonlat, distance="great_circle", max_vectors=10)
        plane = distance_eigenvectors(xy, distance="euclidean", max_vectors=10)
        assert sphere.threshold == pytest.approx(plane.threshold, rel=1e-5)
        assert np.allclose(sphere.moran_i, plane.moran_i, rtol=1e-4)
        assert np.allclose(sphere.scale, plane.scale, rtol=1e-3)


class TestExtendAtEigenvalueMinusOne:
    def test_binary_gabriel_grid_reproduces_its_sites(self):
        """4 x 4 integer grid, Gabriel graph = the lattice (networkx grid_2d_graph as the
        oracle). The lattice is the Cartesian product of two 4-site paths, whose adjacency
        eigenvalues are 2cos(kπ/5) (Cvetković, Doob & Sachs 1980, Spectra of Graphs), so it has
        2cos(2π/5) + 2cos(4π/5) = −1 exactly [derived], twice, on vectors orthogonal to the
        constant; the Nyström form divides by μ + 1 there. At the sites the extension must
        still be the vectors themselves."""
        import networkx as nx

        xy = np.array([[i, j] for i in range(4) for j in range(4)], dtype=float)
        graph = neighbour_graph(xy, "gabriel")
        lattice = nx.grid_2d_graph(4, 4)
        index = {(int(x), int(y)): k for k, (x, y) in enumerate(xy)}
        expected = {tuple(sorted((index[a], index[b]))) for a, b in lattice.edges}
        w = graph.weights("binary").tocoo()
        assert {tuple(sorted(e)) for e in zip(w.row.tolist(), w.col.tolist())} == expected
        basis = graph_eigenvectors(graph, keep="all")
        minus_one = np.isclose(basis.eigenvalues, -1.0, atol=1e-12)
        assert minus_one.sum() == 2
        at_sites = basis.extend(xy)
        assert np.isfinite(at_sites.to_numpy()).all()
        np.testing.assert_allclose(at_sites.to_numpy(), basis.vectors.to_numpy(), atol=1e-12)
        # between sites those two vectors cannot be extended; the others can
        between = basis.extend(np.array([[0.5, 0.5], [1.5, 2.0]])).to_numpy()
        assert np.isnan(between[:, minus_one]).all() and np.isfinite(between[:, ~minus_one]).all()

    def test_distance_based_point_on_a_site(self):
        xy = np.array([[i, j] for i in range(4) for j in range(4)], dtype=float)
        basis = distance_eigenvectors(xy, keep="all")
        np.testing.assert_allclose(basis.extend(xy).to_numpy(), basis.vectors.to_numpy(),
                                   atol=1e-12)
