"""Repeated surveys: per-site change (losses/gains, tests), Holm's adjustment and the space–time
tests, checked against scipy, statsmodels and published formulas."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import scipy.spatial.distance as ssd
import scipy.stats
import statsmodels.formula.api as smf
from statsmodels.stats.anova import anova_lm
from statsmodels.stats.multitest import multipletests

from spatial_ev.errors import InputError
from spatial_ev.inference.multiple import holm_adjust
from spatial_ev.inference.null import permutation_p_value
from spatial_ev.inference.permutation import permutation_test
from spatial_ev.inference.site_change import site_change_test
from spatial_ev.inference.space_time import (helmert_contrasts, space_time_tests,
                                             temporal_eigenvectors)
from spatial_ev.stats.temporal_beta import change_components


@pytest.fixture(scope="module")
def pair():
    rng = np.random.default_rng(20261202)
    a = rng.poisson(rng.gamma(1.0, 4.0, (25, 9))).astype(float)
    b = rng.poisson(rng.gamma(1.0, 4.0, (25, 9))).astype(float)
    a[:, 0] += 1
    b[:, 1] += 1
    return a, b


class TestChangeComponents:
    def test_percentage_difference_equals_scipy_braycurtis(self, pair):
        # percentage difference = Bray-Curtis (Legendre 2019, Ecol. Evol. 9:3500-3514);
        # oracle: scipy.spatial.distance.braycurtis
        a, b = pair
        d = change_components(a, b, index="percentage_difference").dissimilarity
        expected = [ssd.braycurtis(x, y) for x, y in zip(a, b)]
        np.testing.assert_allclose(d, expected, rtol=1e-12)

    @pytest.mark.parametrize("index", ["percentage_difference", "ruzicka", "sorensen",
                                       "jaccard"])
    def test_losses_plus_gains_equal_dissimilarity(self, pair, index):
        # D = B/den + C/den (Legendre 2019, Ecol. Evol. 9:3500-3514)
        c = change_components(*pair, index=index)
        np.testing.assert_allclose(c.losses + c.gains, c.dissimilarity, rtol=1e-13)
        assert (c.losses >= 0).all() and (c.gains >= 0).all()

    def test_presence_absence_indices_equal_scipy(self, pair):
        # Sørensen = Dice and Jaccard on presence-absence (scipy.spatial.distance oracles)
        a, b = (x > 0 for x in pair)
        s = change_components(*pair, index="sorensen").dissimilarity
        j = change_components(*pair, index="jaccard").dissimilarity
        np.testing.assert_allclose(s, [ssd.dice(x, y) for x, y in zip(a, b)], rtol=1e-12)
        np.testing.assert_allclose(j, [ssd.jaccard(x, y) for x, y in zip(a, b)], rtol=1e-12)

    def test_ruzicka_equals_weighted_jaccard(self, pair):
        # Ružička D = 1 - Σmin/Σmax (Legendre 2019) [derived]
        a, b = pair
        d = change_components(a, b, index="ruzicka").dissimilarity
        np.testing.assert_allclose(d, 1 - np.minimum(a, b).sum(1) / np.maximum(a, b).sum(1))

    def test_hellinger_and_chord_distances(self, pair):
        # Legendre & Gallagher 2001 (Oecologia 129:271-280): Euclidean distance of profiles;
        # oracle: scipy.spatial.distance.euclidean
        a, b = pair
        h = change_components(a, b, index="hellinger")
        ha, hb = np.sqrt(a / a.sum(1, keepdims=True)), np.sqrt(b / b.sum(1, keepdims=True))
        np.testing.assert_allclose(h.dissimilarity,
                                   [ssd.euclidean(x, y) for x, y in zip(ha, hb)], rtol=1e-12)
        assert np.isnan(h.losses).all() and (h.dissimilarity <= np.sqrt(2)).all()
        c = change_components(a, b, index="chord").dissimilarity
        ca = a / np.linalg.norm(a, axis=1, keepdims=True)
        cb = b / np.linalg.norm(b, axis=1, keepdims=True)
        np.testing.assert_allclose(c, np.linalg.norm(ca - cb, axis=1), rtol=1e-12)

    def test_worked_example(self):
        # A = 4, B = 2, C = 2: D = 4/12, losses = gains = 2/12 [derived, Legendre 2019 formula]
        c = change_components(np.array([4.0, 2, 0]), np.array([2.0, 2, 2]))
        assert (float(c.dissimilarity), float(c.losses), float(c.gains)) == \
            pytest.approx((1 / 3, 1 / 6, 1 / 6))

    def test_bad_input(self):
        with pytest.raises(InputError, match="same shape"):
            change_components(np.ones((2, 3)), np.ones((3, 3)))
        with pytest.raises(InputError, match=">= 0"):
            change_components(-np.ones(3), np.ones(3))
        with pytest.raises(InputError, match="index"):
            change_components(np.ones(3), np.ones(3), index="bray")


class TestHolm:
    def test_equals_statsmodels(self):
        # Holm 1979 (Scand. J. Statist. 6:65-70); oracle: statsmodels multipletests
        p = np.random.default_rng(3).uniform(0, 0.2, 30)
        np.testing.assert_allclose(holm_adjust(p), multipletests(p, method="holm")[1])

    def test_nan_left_out(self):
        out = holm_adjust(np.array([0.01, np.nan, 0.02]))
        assert np.isnan(out[1]) and out[0] == pytest.approx(0.02) and out[2] == pytest.approx(0.02)


class TestSiteChangeTest:
    def test_balance_equals_paired_t_test(self, pair):
        # paired t of gains vs losses (Legendre 2019); oracle: scipy.stats.ttest_rel
        a, b = pair
        r = site_change_test(pd.DataFrame(a), pd.DataFrame(b), n_permutations=99, seed=1)
        ref = scipy.stats.ttest_rel(r.table["gains"], r.table["losses"])
        assert r.balance.t_statistic == pytest.approx(ref.statistic, rel=1e-12)
        assert r.balance.p_parametric == pytest.approx(ref.pvalue, rel=1e-10)
        assert 0 < r.balance.p_permutation <= 1

    def test_same_result_whatever_chunks_and_threads(self, pair):
        a, b = (pd.DataFrame(x) for x in pair)
        r1 = site_change_test(a, b, n_permutations=300, seed=9, chunk_size=300, n_workers=1)
        r2 = site_change_test(a, b, n_permutations=300, seed=9, chunk_size=37, n_workers=2)
        pd.testing.assert_frame_equal(r1.table, r2.table)

    def test_changed_site_has_smallest_p_and_holm_applied(self):
        rng = np.random.default_rng(5)
        a = pd.DataFrame(rng.poisson(6.0, (30, 8)) + 1.0)
        b = a.copy()
        b.iloc[4] = [0, 0, 0, 0, 0, 0, 1, 30]
        r = site_change_test(a, b, n_permutations=999, seed=5)
        assert r.table["p_value"].idxmin() == 4
        assert r.table.loc[4, "direction"] == "loss"
        np.testing.assert_allclose(r.table["p_adjusted"],
                                   multipletests(r.table["p_value"], method="holm")[1])
        assert r.exceptional_sites == [4]

    def test_pairing_kept_uses_one_permutation_per_species(self):
        # with identical surveys and the same permutation in both, every permuted D is 0,
        # so p = 1 at every site [derived]
        a = pd.DataFrame(np.random.default_rng(1).poisson(4.0, (10, 5)) + 1.0)
        r = site_change_test(a, a, n_permutations=49, seed=2, pairing="kept")
        assert (r.table["p_value"] == 1.0).all()

    def test_p_value_rule_is_the_null_service(self):
        # a site with D above every permuted value: p = 1/(N+1) (Phipson & Smyth 2010)
        rng = np.random.default_rng(8)
        a = pd.DataFrame(rng.poisson(5.0, (20, 6)) + 2.0)
        b = a.copy()
        b.iloc[0] = 0.0
        b.iloc[0, 0] = 1.0
        r = site_change_test(a, b, n_permutations=99, seed=8, index="sorensen")
        assert r.table.loc[0, "p_value"] == permutation_p_value(1.0, np.zeros(99))

    def test_validation(self, pair):
        a, b = (pd.DataFrame(x) for x in pair)
        with pytest.raises(InputError, match="pairing"):
            site_change_test(a, b, pairing="same")
        with pytest.raises(InputError, match="same sites"):
            site_change_test(a, b.iloc[:-1])
        bad = b.copy()
        bad.iloc[2, 3] = -1
        with pytest.raises(InputError, match="site 2, species 3"):
            site_change_test(a, bad)


def _design(rng, s=12, t=4, p=3):
    sites = pd.Index([f"s{i:02d}" for i in range(s)], name="site")
    coords = pd.DataFrame({"x": rng.uniform(0, 100, s), "y": rng.uniform(0, 100, s)},
                          index=sites)
    times = pd.Series([2001.0, 2002, 2004, 2007][:t], index=list("abcd")[:t])
    rows = pd.MultiIndex.from_product([times.index, sites], names=["survey", "site"])
    y = pd.DataFrame(rng.normal(size=(s * t, p)) + np.repeat(rng.normal(size=(t, 1)), s, 0),
                     index=rows, columns=[f"v{j}" for j in range(p)])
    return y, coords, times


class TestSpaceTimeTests:
    def test_helmert_contrasts_orthogonal(self):
        h = helmert_contrasts(5)
        np.testing.assert_allclose(h.sum(axis=0), 0, atol=1e-15)
        g = h.T @ h
        np.testing.assert_allclose(g, np.diag(np.diag(g)), atol=1e-12)

    def test_temporal_eigenvectors_irregular(self):
        v = temporal_eigenvectors(pd.Series([0.0, 1.0, 5.0, 6.0, 7.0]))
        assert v.shape[0] == 5 and v.shape[1] >= 1
        np.testing.assert_allclose(v.to_numpy().T @ v.to_numpy(), np.eye(v.shape[1]),
                                   atol=1e-10)
        np.testing.assert_allclose(v.sum(axis=0), 0, atol=1e-10)

    def test_main_effects_equal_two_way_anova_without_replication(self):
        # F of a two-way ANOVA without replication (Legendre, De Cáceres & Borcard 2010,
        # Ecology 91:262-272); oracle: statsmodels ols + anova_lm, univariate and with sums of
        # squares summed over the responses [derived]
        y, coords, times = _design(np.random.default_rng(31))
        r = space_time_tests(y, coords=coords, times=times, interaction=False,
                             n_permutations=0)
        data = y.reset_index()
        tables = [anova_lm(smf.ols(f"{c} ~ C(site) + C(survey)", data).fit()) for c in y]
        for c, tab in zip(y, tables):
            one = space_time_tests(y[[c]], coords=coords, times=times, interaction=False,
                                   n_permutations=0)
            assert one.table.loc["space", "pseudo_f"] == pytest.approx(tab.loc["C(site)", "F"],
                                                                        rel=1e-10)
            assert one.table.loc["time", "pseudo_f"] == pytest.approx(
                tab.loc["C(survey)", "F"], rel=1e-10)
        total = sum(tables)
        s, t = len(coords), len(times)
        res = total.loc["Residual", "sum_sq"] / ((s - 1) * (t - 1))
        assert r.table.loc["space", "pseudo_f"] == pytest.approx(
            total.loc["C(site)", "sum_sq"] / (s - 1) / res, rel=1e-10)
        assert r.table.loc["time", "pseudo_f"] == pytest.approx(
            total.loc["C(survey)", "sum_sq"] / (t - 1) / res, rel=1e-10)
        assert r.table.loc["space", "df_residual"] == (s - 1) * (t - 1)

    def test_interaction_detected_and_follow_ups(self):
        rng = np.random.default_rng(2)
        y, coords, times = _design(rng, s=30, t=4)
        wave = np.cos(coords["x"].to_numpy() / 15.0)
        trend = np.array([-1.5, -0.5, 0.5, 1.5])
        y = y + 3.0 * np.outer(np.kron(trend, wave), [1, -1, 0.5])
        r = space_time_tests(y, coords=coords, times=times, n_permutations=199, seed=3)
        assert r.interaction_significant
        assert r.table.loc["interaction", "p_value"] <= 0.01
        assert r.within_surveys is not None and len(r.within_surveys) == 4
        assert r.within_sites is not None and len(r.within_sites) == 30
        assert any("significant" in n for n in r.notes)

    def test_within_site_statistics_equal_permutation_test(self):
        # the batched per-site F equals the package's RDA test of the same site
        y, coords, times = _design(np.random.default_rng(4), s=8, t=4)
        r = space_time_tests(y, coords=coords, times=times, n_permutations=9, seed=1,
                             follow_up="always")
        tv = temporal_eigenvectors(times.astype(float)).to_numpy()
        for site in coords.index[:3]:
            block = y.xs(site, level=1).loc[times.index].to_numpy()
            ref = permutation_test(block, tv, n_permutations=0)
            assert r.within_sites.loc[site, "pseudo_f"] == pytest.approx(ref.statistic,
                                                                          rel=1e-10)

    def test_space_permuted_within_surveys_time_within_sites(self):
        y, coords, times = _design(np.random.default_rng(5))
        r = space_time_tests(y, coords=coords, times=times, n_permutations=19, seed=1)
        assert r.table.loc["space", "within"] == "survey"
        assert r.table.loc["time", "within"] == "site"
        assert r.table.loc["interaction", "within"].startswith("none")

    def test_same_seed_same_result(self):
        y, coords, times = _design(np.random.default_rng(6))
        a = space_time_tests(y, coords=coords, times=times, n_permutations=49, seed=7)
        b = space_time_tests(y, coords=coords, times=times, n_permutations=49, seed=7)
        pd.testing.assert_frame_equal(a.table, b.table)

    def test_two_surveys(self):
        # two surveys: one temporal vector, which leaves no residual within a site
        y, coords, times = _design(np.random.default_rng(8), s=15, t=2)
        r = space_time_tests(y, coords=coords, times=times, n_permutations=19, seed=2,
                             follow_up="always")
        assert r.n_time_vectors == 1 and r.within_sites is None
        assert r.within_surveys is not None and len(r.within_surveys) == 2
        assert any("not tested" in n for n in r.notes)
        assert r.table.loc["interaction", "df_residual"] == 14 - r.table.loc[
            "interaction", "df_model"]

    def test_no_follow_up_without_interaction(self):
        y, coords, times = _design(np.random.default_rng(9))
        r = space_time_tests(y, coords=coords, times=times, n_permutations=19, seed=2)
        assert r.interaction_significant is False      # pure noise, fixed seed
        assert r.within_surveys is None and r.within_sites is None
        never = space_time_tests(y, coords=coords, times=times, n_permutations=19, seed=2,
                                 follow_up="never")
        assert never.within_surveys is None and never.within_sites is None

    def test_validation(self):
        y, coords, times = _design(np.random.default_rng(7))
        with pytest.raises(InputError, match="MultiIndex"):
            space_time_tests(y.reset_index(drop=True), coords=coords, times=times)
        with pytest.raises(InputError, match="every"):
            space_time_tests(y.iloc[1:], coords=coords, times=times)
        with pytest.raises(InputError, match="follow_up"):
            space_time_tests(y, coords=coords, times=times, follow_up="sometimes")
        with pytest.raises(InputError, match="at least 2 surveys"):
            space_time_tests(y, coords=coords, times=times.iloc[:1])
