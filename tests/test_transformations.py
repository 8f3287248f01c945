"""Tests of spatial_ev.stats.transform against published transformation values and formulas."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import scipy.stats
from scipy.spatial.distance import pdist

from spatial_ev.errors import InputError, StandardisedCountsWarning
from spatial_ev.stats.transform import TRANSFORMATIONS, standardise_environment, transform

# The 3 x 3 table of Legendre & Gallagher (2001, Oecologia 129:271-280), see REFERENCES.md
TABLE = pd.DataFrame([[10, 10, 20], [10, 15, 10], [15, 5, 5]], index=["s1", "s2", "s3"],
                     columns=["sp1", "sp2", "sp3"], dtype=float)


def random_counts(seed: int, n: int = 25, p: int = 8) -> np.ndarray:
    rng = np.random.default_rng(seed)
    y = rng.poisson(rng.gamma(0.6, 4.0, size=(n, p))).astype(float)
    y[:, 0] += 1  # no empty site
    return y


class TestTransform:
    def test_chord_matches_published_table(self):
        # Legendre & Gallagher 2001, chord-transformed example table [paper]
        expected = [[0.40825, 0.40825, 0.81650], [0.48507, 0.72761, 0.48507],
                    [0.90453, 0.30151, 0.30151]]
        np.testing.assert_allclose(transform(TABLE, "chord").to_numpy(), expected, atol=5e-6)

    def test_hellinger_matches_derived_table(self):
        # sqrt(y_ij / y_i+) (Legendre & Gallagher 2001) on the same table [derived]
        expected = [[0.5, 0.5, 0.70711], [0.53452, 0.65465, 0.53452],
                    [0.77460, 0.44721, 0.44721]]
        np.testing.assert_allclose(transform(TABLE).to_numpy(), expected, atol=5e-6)

    @pytest.mark.parametrize("method", ["chord", "hellinger", "log_chord"])
    def test_distances_bounded_by_sqrt2(self, method):
        # chord and Hellinger distances lie in [0, sqrt 2] (Legendre & Gallagher 2001) [paper]
        y = random_counts(918273645, n=40)
        d = pdist(transform(y, method).to_numpy())
        assert d.max() <= np.sqrt(2) + 1e-12
        # sites with no species in common reach the bound
        disjoint = np.array([[3.0, 0, 0], [0, 5.0, 2.0]])
        assert pdist(transform(disjoint, method).to_numpy())[0] == pytest.approx(np.sqrt(2))

    def test_chi_square_gives_chi_square_distance(self):
        # chi-square distance D = sqrt(y++ sum_j (y1j/y1+ - y2j/y2+)^2 / y+j)
        # (Legendre & Gallagher 2001, distance version) [derived]
        y = random_counts(1357924680)
        rows, cols, total = y.sum(axis=1), y.sum(axis=0), y.sum()
        prof = y / rows[:, None]
        direct = np.sqrt(total * ((prof[:, None, :] - prof[None, :, :]) ** 2
                                  / cols).sum(axis=2))
        d = pdist(transform(y, "chi_square").to_numpy())
        np.testing.assert_allclose(d, direct[np.triu_indices(len(y), 1)], rtol=1e-12)

    def test_log_chord_is_chord_of_log1p(self):
        y = random_counts(246813579)
        expected = np.log1p(y) / np.linalg.norm(np.log1p(y), axis=1, keepdims=True)
        np.testing.assert_allclose(transform(y, "log_chord").to_numpy(), expected, rtol=1e-14)

    def test_presence_absence(self):
        out = transform(TABLE.assign(sp2=[0.0, 3.0, 0.0]), "presence_absence")
        assert out.to_numpy().tolist() == [[1, 0, 1], [1, 1, 1], [1, 0, 1]]

    def test_standardise_matches_scipy_and_warns(self):
        y = random_counts(112233445566)
        with pytest.warns(StandardisedCountsWarning, match="rare"):
            out = transform(y, "standardise")
        # scipy.stats.zscore with ddof=1 as oracle
        np.testing.assert_allclose(out.to_numpy(), scipy.stats.zscore(y, ddof=1), rtol=1e-12)

    def test_other_methods_do_not_warn(self):
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            for method in set(TRANSFORMATIONS) - {"standardise"}:
                transform(TABLE, method)

    def test_none_returns_values(self):
        assert transform(TABLE, "none").equals(TABLE)

    def test_labels_kept_and_input_unchanged(self):
        before = TABLE.copy()
        out = transform(TABLE, "hellinger")
        assert out.index.equals(TABLE.index) and out.columns.equals(TABLE.columns)
        pd.testing.assert_frame_equal(TABLE, before)

    # input validation -------------------------------------------------------------------------
    def test_empty_site_named(self):
        y = TABLE.copy()
        y.loc["s2"] = 0.0
        with pytest.raises(InputError, match=r"no species occurs.*'s2'"):
            transform(y, "hellinger")

    def test_negative_value_named(self):
        y = TABLE.copy()
        y.loc["s3", "sp2"] = -1.0
        with pytest.raises(InputError, match=r">= 0.*'s3'.*'sp2'"):
            transform(y, "chord")

    def test_unknown_method(self):
        with pytest.raises(InputError, match=r"`method` must be one of.*got 'wisconsin'"):
            transform(TABLE, "wisconsin")

    def test_chi_square_absent_species(self):
        with pytest.raises(InputError, match=r"occur at no site.*'sp3'"):
            transform(TABLE.assign(sp3=0.0), "chi_square")

    def test_standardise_constant_column(self):
        with pytest.raises(InputError, match=r"same value at every site.*'sp1'"):
            transform(TABLE.assign(sp1=2.0), "standardise")

    def test_missing_value(self):
        y = TABLE.copy()
        y.loc["s1", "sp1"] = np.nan
        with pytest.raises(InputError, match="missing or infinite"):
            transform(y)


class TestStandardiseEnvironment:
    def test_numeric_standardised_indicators_kept(self):
        env = pd.DataFrame({"depth_m": [1.0, 4.0, 2.5, 8.0], "sand": [0.0, 1.0, 1.0, 0.0],
                            "ph": [6.1, 7.2, 6.8, 5.9]}, index=list("abcd"))
        out = standardise_environment(env)
        assert out["sand"].tolist() == [0.0, 1.0, 1.0, 0.0]
        np.testing.assert_allclose(out[["depth_m", "ph"]].to_numpy(),
                                   scipy.stats.zscore(env[["depth_m", "ph"]], ddof=1))
        assert out.index.equals(env.index) and out.columns.equals(env.columns)

    def test_constant_variable_named(self):
        env = pd.DataFrame({"depth_m": [1.0, 4.0, 2.5], "year": [2020.0] * 3})
        with pytest.raises(InputError, match=r"same value at every site.*'year'"):
            standardise_environment(env)
