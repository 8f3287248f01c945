"""Tests of Moran's I (spatial_ev.space.moran), its moments and tests, and correlograms
(spatial_ev.inference.autocorrelation)."""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import pytest
from scipy import sparse
from scipy.spatial.distance import cdist

from spatial_ev.errors import InputError
from spatial_ev.inference.autocorrelation import moran_correlogram, morans_i

SEEDS = [31_415_926_535, 27_182_818_284, 16_180_339_887]


def _ring(n: int) -> np.ndarray:
    return np.eye(n, k=1) + np.eye(n, k=-1) + np.eye(n, k=n - 1) + np.eye(n, k=-(n - 1))


class TestMoransI:
    def test_ring_check_values(self):
        # Moran 1950 (Biometrika 37:17-23); moments after Cliff & Ord 1981 [memory];
        # values [derived] in REFERENCES: ring n = 10, x = 1..10.
        res = morans_i(np.arange(1.0, 11.0), sparse.csr_matrix(_ring(10)))
        assert res.statistic.iloc[0] == pytest.approx(0.454545, abs=1e-6)
        assert res.expected == pytest.approx(-0.111111, abs=1e-6)
        assert res.variance_normal == pytest.approx(0.07856341, abs=1e-8)
        assert res.variance_randomisation.iloc[0] == pytest.approx(0.08799102, abs=1e-8)
        z = (0.454545454545 + 1 / 9) / np.sqrt(0.07856341)
        assert res.z_normal.iloc[0] == pytest.approx(z, rel=1e-6)

    @pytest.mark.parametrize("seed", SEEDS)
    def test_randomisation_moments_equal_exact_permutation_moments(self, seed):
        # Cliff & Ord 1981 [memory]: E[I] and Var_R are the exact mean and variance of I over
        # all n! relabelings; n = 7 → 5040 permutations, asymmetric weights.
        rng = np.random.default_rng(seed)
        n = 7
        w = rng.uniform(size=(n, n)) * (rng.uniform(size=(n, n)) < 0.6)
        np.fill_diagonal(w, 0)
        x = rng.gamma(2.0, size=n)
        res = morans_i(x, w)
        perms = np.array(list(itertools.permutations(range(n))))
        z = x - x.mean()
        zp = z[perms]
        exact = n / w.sum() * np.einsum("pi,ij,pj->p", zp, w, zp) / (z @ z)
        assert exact.mean() == pytest.approx(res.expected, abs=1e-12)
        assert exact.var() == pytest.approx(res.variance_randomisation.iloc[0], rel=1e-10)

    def test_many_variables_equal_one_at_a_time(self):
        rng = np.random.default_rng(SEEDS[0])
        xy = rng.uniform(0, 10, size=(40, 2))
        d = cdist(xy, xy)
        w = ((d > 0) & (d < 2.5)).astype(float)
        values = pd.DataFrame(rng.normal(size=(40, 3)), columns=["a", "b", "c"])
        res = morans_i(values, w, n_permutations=199, seed=SEEDS[1])
        assert list(res.statistic.index) == ["a", "b", "c"]
        for name in values:
            one = morans_i(values[name], w)
            assert res.statistic[name] == pytest.approx(one.statistic.iloc[0], rel=1e-12)
            assert res.variance_randomisation[name] == pytest.approx(
                one.variance_randomisation.iloc[0], rel=1e-12)
        assert res.null_distribution.shape == (199, 3)
        assert set(np.round(res.p_permutation * 200, 9)) <= set(np.arange(1.0, 201.0))

    def test_permutations_repeat_with_seed_and_match_randomisation_moments(self):
        # Phipson & Smyth 2010 [memory]: p = (k + 1)/(N + 1). The permutation null has mean
        # E[I] and variance Var_R (Cliff & Ord 1981 [memory]).
        rng = np.random.default_rng(SEEDS[2])
        x = rng.normal(size=30)
        w = _ring(30)
        a = morans_i(x, w, n_permutations=2000, seed=SEEDS[0])
        b = morans_i(x, w, n_permutations=2000, seed=SEEDS[0])
        assert np.array_equal(a.null_distribution, b.null_distribution)
        null = a.null_distribution[:, 0]
        assert null.mean() == pytest.approx(a.expected, abs=4 * null.std() / np.sqrt(2000))
        assert null.var() == pytest.approx(a.variance_randomisation.iloc[0], rel=0.1)
        k = (null >= a.statistic.iloc[0] - 1e-12).sum()
        assert a.p_permutation.iloc[0] == pytest.approx((k + 1) / 2001)

    def test_alternatives(self):
        x = np.arange(1.0, 11.0)
        w = _ring(10)
        g = morans_i(x, w, alternative="greater")
        l_ = morans_i(x, w, alternative="less")
        t = morans_i(x, w, alternative="two_sided")
        assert g.p_normal.iloc[0] + l_.p_normal.iloc[0] == pytest.approx(1.0)
        assert t.p_normal.iloc[0] == pytest.approx(2 * g.p_normal.iloc[0])

    def test_accepts_graph_and_basis(self):
        from spatial_ev.space.graphs import neighbour_graph
        xy = np.column_stack([np.arange(12.0), np.zeros(12)])
        g = neighbour_graph(xy, "gabriel")
        res = morans_i(np.sin(np.arange(12) / 2), g)
        direct = morans_i(np.sin(np.arange(12) / 2), g.weights("binary"))
        assert res.statistic.iloc[0] == direct.statistic.iloc[0]
        assert "permutation" in res.summary()


class TestMoranCorrelogram:
    def test_pair_counts_and_class_values_match_brute_force(self):
        rng = np.random.default_rng(SEEDS[1])
        xy = rng.uniform(0, 100, size=(60, 2))
        x = np.sin(xy[:, 0] / 15) + 0.1 * rng.normal(size=60)
        c = moran_correlogram(x, xy, n_classes=5, max_distance=50.0, distance="euclidean")
        d = cdist(xy, xy)
        edges = np.linspace(0, 50, 6)
        for k in range(5):
            w = ((d > edges[k]) & (d <= edges[k + 1])).astype(float)
            assert c.classes.loc[k, "n_pairs"] == w.sum() / 2
            assert c.table.loc[k, "moran_i"] == pytest.approx(
                morans_i(x, w).statistic.iloc[0], rel=1e-12)
        assert c.table["moran_i"].iloc[0] > 0.5
        assert np.all(c.table["p_holm"] >= c.table["p"])

    def test_default_max_distance_is_half_the_largest(self):
        xy = np.column_stack([np.arange(20.0), np.zeros(20)])
        c = moran_correlogram(np.cos(np.arange(20) / 2), xy, n_classes=3)
        assert c.classes["upper"].iloc[-1] == pytest.approx(9.5)
        assert len(c.to_frame()) == 3


class TestInputValidation:
    def test_messages(self):
        w = _ring(6)
        with pytest.raises(InputError, match="column 'b' is constant"):
            morans_i(pd.DataFrame({"a": np.arange(6.0), "b": 1.0}), w)
        with pytest.raises(InputError, match=r"must be 6 x 6"):
            morans_i(np.arange(6.0), np.ones((5, 5)))
        with pytest.raises(InputError, match="zero diagonal"):
            morans_i(np.arange(6.0), np.ones((6, 6)))
        with pytest.raises(InputError, match="non-negative"):
            morans_i(np.arange(6.0), -w)
        with pytest.raises(InputError, match="parameter `alternative` must be one of"):
            morans_i(np.arange(6.0), w, alternative="both")
        with pytest.raises(InputError, match="parameter `n_permutations` must be >= 0"):
            morans_i(np.arange(6.0), w, n_permutations=-1)
        with pytest.raises(InputError, match="at least 4 sites"):
            morans_i(np.arange(3.0), _ring(3))
        with pytest.raises(InputError, match="missing or infinite value"):
            morans_i(np.array([1.0, np.nan, 2, 3, 4, 5]), w)
        with pytest.raises(InputError, match="has 6 rows for 7 sites"):
            moran_correlogram(np.arange(6.0), np.column_stack([np.arange(7.0), np.zeros(7)]))
