"""Tests of spatial_ev.stats.canonical against statsmodels, scikit-learn, numpy and published values."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy.spatial.distance import pdist
from sklearn.decomposition import PCA

from spatial_ev.stats.canonical import redundancy_analysis
from spatial_ev.stats.linear import ExplainedFraction, adjusted_r2, explained_fraction
from spatial_ev.errors import InputError


def survey(seed: int, n: int = 40, p: int = 6, m: int = 3, k: int = 2):
    rng = np.random.default_rng(seed)
    sites = [f"site{i:02d}" for i in range(n)]
    x = pd.DataFrame(rng.normal(size=(n, m)), index=sites,
                     columns=[f"env{j}" for j in range(m)])
    w = pd.DataFrame(rng.normal(size=(n, k)) + 0.5 * x.to_numpy()[:, :1], index=sites,
                     columns=[f"cov{j}" for j in range(k)])
    y = pd.DataFrame(x.to_numpy() @ rng.normal(size=(m, p)) + w.to_numpy() @ rng.normal(
        size=(k, p)) + rng.normal(size=(n, p)) * 1.5, index=sites,
        columns=[f"sp{j}" for j in range(p)])
    return y, x, w


def ols_r2(y: np.ndarray, design: np.ndarray) -> tuple[float, np.ndarray]:
    """Multivariate R² and fitted values from one statsmodels OLS per response column."""
    exog = sm.add_constant(design, has_constant="add")
    fits = [sm.OLS(y[:, j], exog).fit() for j in range(y.shape[1])]
    fitted = np.column_stack([f.fittedvalues for f in fits])
    ss_fit = sum(f.ess for f in fits)
    ss_tot = sum(f.centered_tss for f in fits)
    return ss_fit / ss_tot, fitted


class TestRedundancyAnalysis:
    def test_r2_and_fitted_values_match_statsmodels(self):
        # statsmodels OLS per species column as the regression oracle
        y, x, _ = survey(918273645)
        rda = redundancy_analysis(y, x)
        r2, fitted = ols_r2(y.to_numpy(), x.to_numpy())
        assert rda.r2 == pytest.approx(r2, rel=1e-12)
        rebuilt = rda.site_scores(1, kind="fitted") @ rda.species_scores(1).T
        np.testing.assert_allclose(rebuilt.to_numpy(), fitted - y.to_numpy().mean(axis=0),
                                   atol=1e-10)
        assert rda.canonical_eigenvalues.sum() == pytest.approx(r2 * rda.total_variance)

    def test_adjusted_r2_is_ezekiel(self):
        # Ezekiel (1930): 1 - (1 - R²)(n - 1)/(n - m - 1); statsmodels' rsquared_adj for one column
        y, x, _ = survey(1122334455, p=1)
        rda = redundancy_analysis(y, x)
        fit = sm.OLS(y.to_numpy()[:, 0], sm.add_constant(x.to_numpy())).fit()
        assert rda.r2_adj == pytest.approx(fit.rsquared_adj, rel=1e-12)
        assert rda.r2_adj == pytest.approx(1 - (1 - rda.r2) * 39 / 36, rel=1e-12)

    def test_partial_rda_matches_differences_of_models(self):
        # partial R² and R²adj are differences of the [X+W] and [W] models
        # (Peres-Neto, Legendre, Dray & Borcard 2006, Ecology 87:2614-2625)
        y, x, w = survey(5647382910)
        rda = redundancy_analysis(y, x, conditioning=w)
        r2_xw, _ = ols_r2(y.to_numpy(), np.hstack([x, w]))
        r2_w, _ = ols_r2(y.to_numpy(), w.to_numpy())
        n = len(y)
        assert rda.r2 == pytest.approx(r2_xw - r2_w, rel=1e-10)
        assert rda.r2_adj == pytest.approx(adjusted_r2(r2_xw, n, 5) - adjusted_r2(r2_w, n, 2),
                                           rel=1e-10)
        parts = (rda.canonical_eigenvalues.sum() + rda.residual_eigenvalues.sum()
                 + rda.conditional_variance)
        assert parts == pytest.approx(rda.total_variance, rel=1e-12)
        assert rda.conditional_variance / rda.total_variance == pytest.approx(r2_w, rel=1e-10)

    def test_partition_check_values(self):
        # REFERENCES.md [derived] (Borcard et al. 1992; Peres-Neto et al. 2006): n = 20,
        # orthogonal groups of 2 and 3 variables with R² 0.3 and 0.2 -> [a] 0.271429,
        # [b] -0.053782, [c] 0.103782
        rng = np.random.default_rng(2718281828)
        basis = np.linalg.qr(np.column_stack([np.ones(20), rng.normal(size=(20, 6))]))[0][:, 1:]
        x, w = basis[:, :2], basis[:, 2:5]
        y = np.sqrt(0.3) * basis[:, 0] + np.sqrt(0.2) * basis[:, 2] + np.sqrt(0.5) * basis[:, 5]
        a = explained_fraction(y, x, conditioning=w).r2_adj
        c = explained_fraction(y, w, conditioning=x).r2_adj
        b = (explained_fraction(y, x).r2_adj + explained_fraction(y, w).r2_adj
             - explained_fraction(y, np.hstack([x, w])).r2_adj)
        assert (a, b, c) == pytest.approx((0.271429, -0.053782, 0.103782), abs=5e-7)

    def test_pca_matches_scikit_learn(self):
        # without X the analysis is a PCA: scikit-learn PCA as oracle
        y, _, _ = survey(1357924680, p=5)
        rda = redundancy_analysis(y)
        pca = PCA().fit(y.to_numpy())
        np.testing.assert_allclose(rda.residual_eigenvalues.to_numpy(),
                                   pca.explained_variance_, rtol=1e-10)
        scores = rda.site_scores(1).to_numpy()
        ref = pca.transform(y.to_numpy())
        np.testing.assert_allclose(np.abs(scores), np.abs(ref), atol=1e-10)
        assert rda.residual_eigenvalues.sum() == pytest.approx(rda.total_variance, rel=1e-12)
        assert rda.total_variance == pytest.approx(y.var(ddof=1).sum(), rel=1e-12)
        assert rda.r2 == 0 and rda.rank == 0 and len(rda.canonical_eigenvalues) == 0

    def test_scaling_1_keeps_euclidean_distances(self):
        y, _, _ = survey(246813579, p=7)
        rda = redundancy_analysis(y)
        np.testing.assert_allclose(pdist(rda.site_scores(1).to_numpy()), pdist(y.to_numpy()),
                                   rtol=1e-10)

    @pytest.mark.parametrize("scaling", [1, 2])
    def test_biplot_rule_rebuilds_centred_data(self, scaling):
        # Gabriel (1971) biplot: site scores x species scores^T = centred data, in both scalings
        y, _, _ = survey(987654321, p=6)
        rda = redundancy_analysis(y)
        rebuilt = rda.site_scores(scaling) @ rda.species_scores(scaling).T
        np.testing.assert_allclose(rebuilt.to_numpy(), (y - y.mean()).to_numpy(), atol=1e-10)

    def test_scaling_2_site_scores_have_unit_variance(self):
        y, x, _ = survey(192837465)
        s = redundancy_analysis(y, x).site_scores(2)
        np.testing.assert_allclose(s.var(ddof=1).to_numpy(), 1.0, rtol=1e-10)

    def test_weighted_sum_scores_are_species_projections(self):
        y, x, _ = survey(1029384756)
        rda = redundancy_analysis(y, x)
        ws = rda.site_scores(1, kind="weighted_sum").to_numpy()
        np.testing.assert_allclose(ws, (y - y.mean()).to_numpy() @ rda.species_scores(1),
                                   atol=1e-12)
        assert not np.allclose(ws, rda.site_scores(1, kind="fitted").to_numpy())

    def test_biplot_scores_are_correlations(self):
        y, x, _ = survey(564738291)
        rda = redundancy_analysis(y, x)
        b = rda.biplot_scores(2)
        fitted_scores = rda.site_scores(1, kind="fitted")
        for var in x.columns:
            for axis in b.columns:
                r = np.corrcoef(x[var], fitted_scores[axis])[0, 1]
                assert b.loc[var, axis] == pytest.approx(r, abs=1e-12)
        lam = rda.canonical_eigenvalues.to_numpy()
        np.testing.assert_allclose(rda.biplot_scores(1).to_numpy(),
                                   b.to_numpy() * np.sqrt(lam / rda.total_variance))

    def test_rank_deficient_x(self):
        y, x, _ = survey(31415926535)
        wide = x.assign(copy=x["env0"], combo=x["env1"] - 2 * x["env2"], const=3.0)
        full, deficient = redundancy_analysis(y, x), redundancy_analysis(y, wide)
        assert deficient.rank == 3
        assert deficient.r2 == pytest.approx(full.r2, rel=1e-12)
        assert deficient.r2_adj == pytest.approx(full.r2_adj, rel=1e-12)
        np.testing.assert_allclose(deficient.canonical_eigenvalues, full.canonical_eigenvalues)
        assert deficient.biplot_scores().loc["const"].isna().all()

    def test_labels_kept_and_inputs_unchanged(self):
        y, x, w = survey(8675309)
        copies = [y.copy(), x.copy(), w.copy()]
        rda = redundancy_analysis(y, x, conditioning=w)
        assert rda.site_scores().index.equals(y.index)
        assert rda.species_scores().index.equals(y.columns)
        assert rda.biplot_scores().index.equals(x.columns)
        for before, after in zip(copies, [y, x, w]):
            pd.testing.assert_frame_equal(before, after)

    def test_to_frame_and_summary(self):
        y, x, _ = survey(13579)
        rda = redundancy_analysis(y, x)
        table = rda.to_frame()
        assert table["cumulative"].iloc[-1] == pytest.approx(1.0)
        assert list(table["axis_type"].unique()) == ["canonical", "residual"]
        assert "adjusted R²" in rda.summary() and rda.n_predictors == 3

    # input validation -------------------------------------------------------------------------
    def test_row_count_mismatch(self):
        y, x, _ = survey(1001)
        with pytest.raises(InputError, match=r"`X` has 39 rows but `Y` has 40 sites"):
            redundancy_analysis(y, x.iloc[1:])

    def test_site_order_mismatch(self):
        y, x, _ = survey(1002)
        with pytest.raises(InputError, match=r"different sites or a different order: row 0 is "
                                             r"site 'site39' in `X` but 'site00'"):
            redundancy_analysis(y, x.iloc[::-1])

    def test_constant_x(self):
        y, x, _ = survey(1003)
        with pytest.raises(InputError, match="no usable variation"):
            redundancy_analysis(y, x.assign(env0=1.0, env1=1.0, env2=1.0))

    def test_x_inside_conditioning(self):
        y, x, w = survey(1004)
        with pytest.raises(InputError, match="fully explained by `conditioning`"):
            redundancy_analysis(y, x[["env0"]], conditioning=x)

    def test_saturated_model(self):
        y, x, _ = survey(1005, n=4)
        with pytest.raises(InputError, match="no residual degrees of freedom"):
            redundancy_analysis(y, x)

    def test_constant_y(self):
        y, x, _ = survey(1006)
        with pytest.raises(InputError, match="no variation to explain"):
            redundancy_analysis(y * 0 + 1, x)

    def test_bad_scaling_and_kind(self):
        y, x, _ = survey(1007)
        rda = redundancy_analysis(y, x)
        with pytest.raises(InputError, match=r"`scaling` must be 1.*got 3"):
            rda.site_scores(3)
        with pytest.raises(InputError, match=r"`kind` must be one of.*got 'lc'"):
            rda.site_scores(1, kind="lc")

    def test_biplot_without_x(self):
        y, _, _ = survey(1008)
        with pytest.raises(InputError, match="need explanatory variables"):
            redundancy_analysis(y).biplot_scores()


class TestExplainedFraction:
    def test_matches_redundancy_analysis(self):
        y, x, w = survey(777888999)
        for cond in (None, w):
            fast = explained_fraction(y, x, conditioning=cond)
            full = redundancy_analysis(y, x, conditioning=cond)
            assert isinstance(fast, ExplainedFraction)
            assert fast == pytest.approx((full.r2, full.r2_adj, full.rank), rel=1e-12)

    def test_mean_adjusted_r2_near_zero_under_null(self):
        # Peres-Neto et al. (2006): adjusted R² is unbiased (mean 0 with no effect); raw R² is
        # biased upwards to about m/(n-1) [derived from the Ezekiel formula]
        rng = np.random.default_rng(4242424242)
        values = np.array([explained_fraction(rng.normal(size=(20, 3)),
                                              rng.normal(size=(20, 4)))[:2] for _ in range(400)])
        r2, adj = values[:, 0], values[:, 1]
        assert abs(adj.mean()) < 3 * adj.std(ddof=1) / np.sqrt(len(adj))
        assert r2.mean() == pytest.approx(4 / 19, abs=0.02)

    def test_requires_x(self):
        y, _, _ = survey(1009)
        with pytest.raises(InputError, match="`X` is required"):
            explained_fraction(y, None)


class TestAdjustedR2:
    def test_values(self):
        # Ezekiel (1930)
        assert adjusted_r2(0.3, 20, 2) == pytest.approx(1 - 0.7 * 19 / 17)
        assert adjusted_r2(0.4, 10, 0) == 0.4
        assert np.isnan(adjusted_r2(0.9, 5, 4))
