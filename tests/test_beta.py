"""Tests of LCBD / SCBD (spatial_ev.stats.beta) and the LCBD permutation test
(spatial_ev.inference.lcbd)."""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import pytest
from statsmodels.stats.multitest import multipletests

from spatial_ev.inference.lcbd import beta_diversity
from spatial_ev.errors import InputError

TABLE = np.array([[10, 10, 20], [10, 15, 10], [15, 5, 5]], dtype=float)


def hellinger(y):
    return np.sqrt(y / y.sum(axis=1, keepdims=True))


class TestBetaDiversity:
    def test_check_values(self):
        # Legendre & De Cáceres 2013, Ecol. Lett. 16:951-963: formulas; the values for this
        # table are [derived] in REFERENCES.md (Hellinger transformation, Legendre & Gallagher 2001).
        res = beta_diversity(hellinger(TABLE), n_permutations=0)
        assert res.sum_of_squares == pytest.approx(0.102973, abs=1e-6)
        assert res.total == pytest.approx(0.051486, abs=1e-6)
        np.testing.assert_allclose(res.lcbd, [0.31612, 0.19491, 0.48897], atol=1e-5)
        np.testing.assert_allclose(res.scbd, [0.43452, 0.22574, 0.33974], atol=1e-5)
        assert res.p_value is None

    def test_hellinger_total_at_most_one(self):
        # BD_total <= 1 for Hellinger-transformed data (Legendre & De Cáceres 2013) [paper]
        rng = np.random.default_rng(20240611)
        y = rng.poisson(rng.gamma(0.3, 5, size=(60, 25))) + np.eye(60, 25)
        assert beta_diversity(hellinger(y), n_permutations=0).total <= 1.0

    def test_labels_preserved(self):
        frame = pd.DataFrame(hellinger(TABLE), index=["s1", "s2", "s3"], columns=list("abc"))
        res = beta_diversity(frame, n_permutations=9, seed=1)
        assert list(res.lcbd.index) == ["s1", "s2", "s3"]
        assert list(res.scbd.index) == list("abc")
        assert list(res.to_frame().columns) == ["lcbd", "p", "p_holm"]

    def test_permutation_p_matches_exact_enumeration(self):
        # The test permutes each column independently; with 3 sites and 3 species all
        # (3!)^3 = 216 recombinations can be enumerated: the exact p-value is the share of
        # them reaching the observed LCBD. A large Monte Carlo run must agree within its
        # binomial error (common practice for checking permutation tests).
        y = hellinger(TABLE)
        s = (y - y.mean(axis=0)) ** 2
        observed = s.sum(axis=1)
        perms = list(itertools.permutations(range(3)))
        counts = np.zeros(3)
        for combo in itertools.product(perms, repeat=3):
            sums = sum(s[list(combo[j]), j] for j in range(3))
            counts += sums >= observed * (1 - 1e-10)
        exact = counts / len(perms) ** 3
        res = beta_diversity(y, n_permutations=20000, seed=987654321)
        se = np.sqrt(exact * (1 - exact) / 20000)
        assert np.all(np.abs(res.p_value.to_numpy() - exact) < 5 * se + 1e-4)

    def test_same_seed_any_chunk_size(self):
        rng = np.random.default_rng(31415926)
        y = hellinger(rng.poisson(3, size=(30, 8)) + 1.0)
        a = beta_diversity(y, n_permutations=333, seed=42, chunk_size=5).p_value
        b = beta_diversity(y, n_permutations=333, seed=42, chunk_size=200).p_value
        pd.testing.assert_series_equal(a, b)

    def test_holm_matches_statsmodels(self):
        # Holm 1979 step-down adjustment, statsmodels as the reference implementation
        rng = np.random.default_rng(27182818)
        y = hellinger(rng.poisson(2, size=(25, 6)) + 1.0)
        res = beta_diversity(y, n_permutations=199, seed=3)
        expected = multipletests(res.p_value.to_numpy(), method="holm")[1]
        np.testing.assert_allclose(res.p_holm.to_numpy(), expected)

    def test_input_not_modified(self):
        y = hellinger(TABLE)
        before = y.copy()
        beta_diversity(y, n_permutations=9, seed=1)
        np.testing.assert_array_equal(y, before)

    # --- input validation -------------------------------------------------------------
    def test_constant_table(self):
        with pytest.raises(InputError, match="no variation"):
            beta_diversity(np.ones((4, 3)), n_permutations=0)

    def test_missing_value(self):
        y = hellinger(TABLE)
        y[1, 2] = np.nan
        with pytest.raises(InputError, match="row 1, column 2"):
            beta_diversity(y)

    def test_bad_permutations(self):
        with pytest.raises(InputError, match="n_permutations"):
            beta_diversity(hellinger(TABLE), n_permutations=-1)
