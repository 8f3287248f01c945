"""Tests of the batched permutation engine against statsmodels, direct refits, full enumeration
and seeded simulations of the test's level."""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import pytest
import scipy.stats
import statsmodels.api as sm

from spatial_ev.stats.canonical import redundancy_analysis
from spatial_ev.stats.linear import explained_fraction
from spatial_ev.errors import InputError
from spatial_ev.inference.permutation import (
    SharedStepPermutations,
    PermutationTest, axis_tests, orthonormal_permutation_test, permutation_test, permutations,
    term_tests)
from spatial_ev.inference.null import BLOCK_SIZE, SequentialRule


def data(seed: int, n: int = 30, p: int = 5, m: int = 3, k: int = 2, effect: float = 0.5):
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, m))
    w = rng.normal(size=(n, k)) + 0.6 * x[:, :1]
    y = effect * x @ rng.normal(size=(m, p)) + w @ rng.normal(size=(k, p)) \
        + rng.normal(size=(n, p))
    return y, x, w


def refit_f(y: np.ndarray, x: np.ndarray, w: np.ndarray | None) -> float:
    """Pseudo-F by two least-squares fits (reduced [1, W] and full [1, W, X] models)."""
    n = len(y)
    reduced = np.ones((n, 1)) if w is None else np.column_stack([np.ones(n), w])
    full = np.column_stack([reduced, x])
    rss = [float(((y - d @ np.linalg.lstsq(d, y, rcond=None)[0]) ** 2).sum())
           for d in (reduced, full)]
    df_model, df_res = x.shape[1], n - full.shape[1]
    return ((rss[0] - rss[1]) / df_model) / (rss[1] / df_res)


def binomial_interval(n: int, alpha: float = 0.05, level: float = 0.99) -> tuple[float, float]:
    lo, hi = scipy.stats.binom.interval(level, n, alpha)
    return lo / n, hi / n


class TestPermutationTest:
    def test_statistic_is_statsmodels_f(self):
        # one response column: pseudo-F = the classical F statistic (statsmodels OLS fvalue;
        # partial: statsmodels compare_f_test of nested models)
        y, x, w = data(918273645, p=1)
        fit = sm.OLS(y[:, 0], sm.add_constant(x)).fit()
        assert permutation_test(y, x, n_permutations=0).statistic == pytest.approx(fit.fvalue)
        full = sm.OLS(y[:, 0], sm.add_constant(np.hstack([w, x]))).fit()
        reduced = sm.OLS(y[:, 0], sm.add_constant(w)).fit()
        f_ref = full.compare_f_test(reduced)[0]
        assert permutation_test(y, x, conditioning=w, n_permutations=0).statistic == \
            pytest.approx(f_ref)

    def test_raw_null_equals_refits_of_permuted_data(self):
        y, x, _ = data(1122334455, p=4)
        test = permutation_test(y, x, n_permutations=300, seed=20240101)
        perms = permutations(len(y), 300, seed=20240101)
        direct = [refit_f(y[perm], x, None) for perm in perms]
        np.testing.assert_allclose(test.null_distribution, direct, rtol=1e-10)
        assert test.method == "raw"

    def test_reduced_residual_null_equals_refits(self):
        # Freedman & Lane (1983): permute residuals of the reduced model; the variant that adds
        # the reduced model's fitted values back gives the same pseudo-F
        y, x, w = data(5647382910, p=6)
        test = permutation_test(y, x, conditioning=w, n_permutations=300, seed=777)
        reduced = np.column_stack([np.ones(len(y)), w])
        fitted = reduced @ np.linalg.lstsq(reduced, y, rcond=None)[0]
        resid = y - fitted
        perms = permutations(len(y), 300, seed=777)
        added_back = [refit_f(fitted + resid[perm], x, w) for perm in perms]
        residual_only = [refit_f(resid[perm], x, w) for perm in perms]
        np.testing.assert_allclose(test.null_distribution, added_back, rtol=1e-10)
        np.testing.assert_allclose(test.null_distribution, residual_only, rtol=1e-10)
        assert test.method == "reduced_residual"

    @pytest.mark.parametrize("shape", [(25, 8, 3), (25, 2, 6), (12, 30, 4), (20, 4, 14),
                                       (20, 40, 13)])
    def test_both_gather_sides_and_wide_tables(self, shape):
        # fewer predictors than species (basis gathered), more (response gathered), more
        # species than sites (SVD-reduced response), more predictors than residual degrees of
        # freedom (residual-space complement used)
        n, p, m = shape
        y, x, w = data(31415926, n=n, p=p, m=m)
        test = permutation_test(y, x, conditioning=w, n_permutations=150, seed=99)
        reduced = np.column_stack([np.ones(n), w])
        resid = y - reduced @ np.linalg.lstsq(reduced, y, rcond=None)[0]
        direct = [refit_f(resid[perm], x, w) for perm in permutations(n, 150, seed=99)]
        np.testing.assert_allclose(test.null_distribution, direct, rtol=1e-9)
        assert test.statistic == pytest.approx(refit_f(y, x, w), rel=1e-10)
        raw = permutation_test(y, x, n_permutations=150, seed=99)
        direct = [refit_f(y[perm], x, None) for perm in permutations(n, 150, seed=99)]
        np.testing.assert_allclose(raw.null_distribution, direct, rtol=1e-9)

    def test_p_value_formula_with_tie_tolerance(self):
        y, x, _ = data(246813579, effect=0.2)
        test = permutation_test(y, x, n_permutations=499, seed=4)
        k = np.count_nonzero(test.null_distribution >= test.statistic * (1 - 1e-10))
        # Phipson & Smyth (2010): p = (k + 1) / (N + 1) [memory]
        assert test.p_value == (k + 1) / 500

    def test_identity_permutation_counts_as_tie(self):
        # cyclic shifts of 7 sites: shift 0 (identity) reproduces the observed statistic up to
        # rounding and must be counted
        y, x, _ = data(135792468, n=7, p=3, m=2)
        test = permutation_test(y, x, n_permutations=300, seed=11, restriction="cyclic")
        perms = permutations(7, 300, seed=11, restriction="cyclic")
        identity = np.all(perms == np.arange(7), axis=1)
        assert identity.sum() > 10
        k = np.count_nonzero(test.null_distribution >= test.statistic * (1 - 1e-10))
        assert k >= identity.sum()
        np.testing.assert_allclose(test.null_distribution[identity], test.statistic, rtol=1e-12)

    def test_exact_against_full_enumeration(self):
        # n = 6: all 720 permutations enumerated give the exact permutation p-value; the sampled
        # test must agree within its Monte Carlo error, and every sampled statistic is one of
        # the enumerated values
        y, x, _ = data(8675309, n=6, p=2, m=1, effect=0.8)
        observed = refit_f(y, x, None)
        exact_values = np.array([refit_f(y[list(perm)], x, None)
                                 for perm in itertools.permutations(range(6))])
        p_exact = np.mean(exact_values >= observed * (1 - 1e-10))
        test = permutation_test(y, x, n_permutations=20000, seed=123456789)
        assert test.statistic == pytest.approx(observed, rel=1e-12)
        assert abs(test.p_value - p_exact) < 4 * np.sqrt(p_exact * (1 - p_exact) / 20000)
        nearest = np.abs(test.null_distribution[:, None] - exact_values[None, :]).min(axis=1)
        assert nearest.max() < 1e-9 * exact_values.max()

    @pytest.mark.parametrize("chunk_size", [1, 7, BLOCK_SIZE, 300, 5000])
    def test_same_result_for_every_chunk_size(self, chunk_size):
        y, x, w = data(192837465)
        ref = permutation_test(y, x, conditioning=w, n_permutations=400, seed=2468)
        test = permutation_test(y, x, conditioning=w, n_permutations=400, seed=2468,
                                chunk_size=chunk_size)
        assert test.p_value == ref.p_value
        np.testing.assert_allclose(test.null_distribution, ref.null_distribution, rtol=1e-12)

    @pytest.mark.parametrize("n_workers", [1, 2, 3])
    def test_same_result_for_every_thread_count(self, n_workers):
        y, x, _ = data(564738291)
        ref = permutation_test(y, x, n_permutations=400, seed=97531, chunk_size=50)
        test = permutation_test(y, x, n_permutations=400, seed=97531, chunk_size=50,
                                n_workers=n_workers)
        assert test.p_value == ref.p_value
        np.testing.assert_allclose(test.null_distribution, ref.null_distribution, rtol=1e-12)

    def test_same_result_on_dask(self):
        distributed = pytest.importorskip("distributed")
        y, x, w = data(1029384756)
        ref = permutation_test(y, x, conditioning=w, n_permutations=500, seed=314159)
        with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                      dashboard_address=":0") as cluster, \
                distributed.Client(cluster) as client:
            test = permutation_test(y, x, conditioning=w, n_permutations=500, seed=314159,
                                    chunk_size=100, engine="dask", scheduler=client)
        assert test.p_value == ref.p_value
        np.testing.assert_allclose(test.null_distribution, ref.null_distribution, rtol=1e-12)

    def test_work_is_picklable_for_process_workers(self, monkeypatch):
        # dask workers in other processes receive the batched kernel by pickling
        import pickle

        from spatial_ev.inference import permutation as engine_module

        y, x, w = data(1357913579)
        sent = []
        real = engine_module.run_tasks

        def through_pickle(function, tasks, **kw):
            sent.append(pickle.loads(pickle.dumps(function)))
            return real(sent[-1], tasks, **kw)

        ref = permutation_test(y, x, conditioning=w, n_permutations=200, seed=3)
        monkeypatch.setattr(engine_module, "run_tasks", through_pickle)
        test = permutation_test(y, x, conditioning=w, n_permutations=200, seed=3)
        assert sent and test.p_value == ref.p_value
        np.testing.assert_allclose(test.null_distribution, ref.null_distribution, rtol=1e-12)

    def test_seed_reproducible_and_generator_accepted(self):
        y, x, _ = data(111222333)
        a = permutation_test(y, x, n_permutations=200, seed=55)
        b = permutation_test(y, x, n_permutations=200, seed=np.random.default_rng(55))
        c = permutation_test(y, x, n_permutations=200, seed=56)
        np.testing.assert_array_equal(a.null_distribution, b.null_distribution)
        assert not np.array_equal(a.null_distribution, c.null_distribution)

    def test_progress_reports_every_task(self):
        y, x, _ = data(444555666)
        calls = []
        permutation_test(y, x, n_permutations=250, seed=1, chunk_size=100, n_workers=1,
                         progress=lambda done, total: calls.append((done, total)))
        assert calls == [(1, 3), (2, 3), (3, 3)]

    def test_fields_and_frame(self):
        y, x, w = data(777666555)
        test = permutation_test(pd.DataFrame(y), x, conditioning=w, n_permutations=99, seed=3)
        frac = explained_fraction(y, x, conditioning=w)
        assert isinstance(test, PermutationTest)
        assert (test.r2, test.r2_adj, test.df_model) == pytest.approx(frac)
        assert test.df_residual == 30 - 1 - 2 - 3
        assert test.null_distribution.shape == (99,)
        assert test.to_frame()["p_value"].iloc[0] == test.p_value
        assert "exchangeable" in test.summary()
        zero = permutation_test(y, x, n_permutations=0)
        assert np.isnan(zero.p_value) and zero.null_distribution.shape == (0,)

    def test_input_unchanged(self):
        y, x, w = data(999000111)
        copies = [y.copy(), x.copy(), w.copy()]
        permutation_test(y, x, conditioning=w, n_permutations=50, seed=1)
        for before, after in zip(copies, [y, x, w]):
            np.testing.assert_array_equal(before, after)

    @pytest.mark.slow
    def test_level_under_no_effect(self):
        # no true effect: rejection rate at alpha = 0.05 inside the binomial 99% interval
        # (scipy.stats.binom), and mean adjusted R² ~ 0 (Peres-Neto et al. 2006)
        rng = np.random.default_rng(20260101)
        reps = 500
        p_values, adj = np.empty(reps), np.empty(reps)
        for i in range(reps):
            y, x = rng.normal(size=(30, 5)), rng.normal(size=(30, 3))
            test = permutation_test(y, x, n_permutations=199, seed=rng, n_workers=1)
            p_values[i], adj[i] = test.p_value, test.r2_adj
        lo, hi = binomial_interval(reps)
        assert lo <= np.mean(p_values <= 0.05) <= hi
        assert abs(adj.mean()) < 3 * adj.std(ddof=1) / np.sqrt(reps)

    @pytest.mark.slow
    def test_partial_level_with_strong_covariable(self):
        # X has no effect given W, but W drives Y strongly and X is correlated with W:
        # reduced-model residual permutation keeps the level (Anderson & Legendre 1999)
        rng = np.random.default_rng(20260202)
        reps = 500
        rejected = 0
        for _ in range(reps):
            w = rng.normal(size=(30, 1)) ** 3                      # skewed, outlying covariable
            x = 0.7 * w + rng.normal(size=(30, 2))
            y = 4.0 * w @ rng.normal(size=(1, 4)) + rng.normal(size=(30, 4))
            test = permutation_test(y, x, conditioning=w, n_permutations=199, seed=rng,
                                    n_workers=1)
            rejected += test.p_value <= 0.05
        lo, hi = binomial_interval(reps)
        assert lo <= rejected / reps <= hi

    # input validation -------------------------------------------------------------------------
    def test_bad_parameters(self):
        y, x, _ = data(1)
        with pytest.raises(InputError, match=r"`n_permutations` must be >= 0; got -5"):
            permutation_test(y, x, n_permutations=-5)
        with pytest.raises(InputError, match=r"`chunk_size` must be >= 1; got 0"):
            permutation_test(y, x, chunk_size=0)
        with pytest.raises(InputError, match=r"`engine` must be one of.*got 'gpu'"):
            permutation_test(y, x, engine="gpu")
        with pytest.raises(InputError, match=r"`restriction` must be one of.*got 'spatial'"):
            permutation_test(y, x, restriction="spatial")
        with pytest.raises(InputError, match=r"`seed` must be a non-negative integer"):
            permutation_test(y, x, seed=-1)
        with pytest.raises(InputError, match=r"`X` is required"):
            permutation_test(y, None)

    def test_bad_restrictions(self):
        y, x, _ = data(2)
        with pytest.raises(InputError, match="restriction='blocks' needs `blocks`"):
            permutation_test(y, x, restriction="blocks")
        with pytest.raises(InputError, match=r"one stratum label per site \(30\)"):
            permutation_test(y, x, restriction="blocks", blocks=[1, 2, 3])
        with pytest.raises(InputError, match="every site in its own stratum"):
            permutation_test(y, x, restriction="blocks", blocks=np.arange(30))
        with pytest.raises(InputError, match=r"`blocks` is used only with restriction='blocks'"):
            permutation_test(y, x, blocks=np.zeros(30))
        with pytest.raises(InputError, match=r"n_rows \* n_cols = 30.*got \(4, 4\)"):
            permutation_test(y, x, restriction="toroidal", grid_shape=(4, 4))
        with pytest.raises(InputError, match=r"`grid_shape` is used only with"):
            permutation_test(y, x, grid_shape=(5, 6))


class TestPermutations:
    def test_blocks_stay_within_strata(self):
        strata = np.repeat(["north", "south", "east"], [4, 6, 5])
        perms = permutations(15, 300, seed=42, restriction="blocks", blocks=strata)
        assert np.all(strata[perms] == strata[None, :])
        assert np.all(np.sort(perms, axis=1) == np.arange(15))
        assert len({tuple(p) for p in perms}) > 250

    def test_cyclic_shifts(self):
        perms = permutations(9, 200, seed=7, restriction="cyclic")
        shifts = (perms[:, 0])[:, None]
        np.testing.assert_array_equal(perms, (np.arange(9) + shifts) % 9)
        assert len(np.unique(shifts)) == 9

    def test_toroidal_shifts_keep_grid_neighbours(self):
        perms = permutations(12, 200, seed=8, restriction="toroidal", grid_shape=(3, 4))
        grid = np.arange(12).reshape(3, 4)
        for perm in perms[:20]:
            moved = perm[grid]  # which site each grid cell now takes its value from
            row, col = moved // 4, moved % 4
            # right-hand neighbours stay right-hand neighbours (wrapping around), rows stay rows
            assert np.all((col[:, 1:] - col[:, :-1]) % 4 == 1)
            assert np.all(row[:, 1:] == row[:, :-1])
            assert np.all((row[1:] - row[:-1]) % 3 == 1)
            assert np.all(col[1:] == col[:-1])
        assert len({tuple(p) for p in perms}) == 12

    def test_free_permutations_are_uniform(self):
        # each site lands in each position with probability 1/n (chi-square goodness of fit)
        perms = permutations(5, 20000, seed=20240607)
        counts = np.stack([np.bincount(perms[:, j], minlength=5) for j in range(5)])
        assert scipy.stats.chisquare(counts.ravel()).pvalue > 0.001

    def test_blocks_of_permutations_do_not_depend_on_count(self):
        np.testing.assert_array_equal(permutations(10, 300, seed=3)[:130],
                                      permutations(10, 130, seed=3))


class TestAxisTests:
    def test_one_true_axis(self):
        rng = np.random.default_rng(3141592653)
        x = rng.normal(size=(50, 4))
        y = 1.2 * x[:, :1] @ rng.normal(size=(1, 8)) + rng.normal(size=(50, 8))
        table = axis_tests(y, x, n_permutations=499, seed=17)
        rda = redundancy_analysis(y, x)
        np.testing.assert_allclose(table["variance"], rda.canonical_eigenvalues.to_numpy())
        assert table["p_value"].iloc[0] == 1 / 500
        assert table["p_value"].iloc[1] > 0.05
        # first axis statistic: sigma_1² / (RSS / df_residual)
        rss = rda.residual_eigenvalues.sum() * 49
        assert table["pseudo_f"].iloc[0] == pytest.approx(
            rda.canonical_eigenvalues.iloc[0] * 49 / (rss / 45))

    def test_marginal_and_partial(self):
        rng = np.random.default_rng(2718281828)
        x, w = rng.normal(size=(40, 3)), rng.normal(size=(40, 2))
        y = x[:, :2] @ rng.normal(size=(2, 6)) * 1.5 + w @ rng.normal(size=(2, 6)) \
            + rng.normal(size=(40, 6))
        table = axis_tests(y, x, conditioning=w, method="marginal", max_axes=2,
                           n_permutations=199, seed=5)
        assert list(table.index) == ["canonical_1", "canonical_2"]
        assert (table["p_value"] <= 0.01).all() and (table["method"] == "marginal").all()

    @pytest.mark.slow
    def test_second_axis_keeps_level_when_only_one_is_real(self):
        # Legendre, Oksanen & ter Braak (2011): forward tests of later axes are valid when
        # earlier axes are real; the rate of rejecting the (null) second axis stays <= alpha
        rng = np.random.default_rng(1618033988)
        reps, rejected = 300, 0
        for _ in range(reps):
            x = rng.normal(size=(30, 3))
            y = 1.5 * x[:, :1] @ rng.normal(size=(1, 5)) + rng.normal(size=(30, 5))
            table = axis_tests(y, x, max_axes=2, n_permutations=99, seed=rng, n_workers=1)
            rejected += table["p_value"].iloc[1] <= 0.05
        assert rejected / reps <= binomial_interval(reps)[1]

    def test_bad_method(self):
        y, x, _ = data(3)
        with pytest.raises(InputError, match=r"`method` must be one of 'forward', 'marginal'"):
            axis_tests(y, x, method="all")


class TestTermTests:
    def test_matches_partial_tests(self):
        y, x, w = data(1234567890)
        table = term_tests(y, {"environment": x, "covariables": w}, n_permutations=199, seed=8)
        for name, (a, b) in {"environment": (x, w), "covariables": (w, x)}.items():
            single = permutation_test(y, a, conditioning=b, n_permutations=199, seed=8)
            row = table.loc[name]
            assert row["p_value"] == single.p_value
            assert row["pseudo_f"] == pytest.approx(single.statistic)
            assert (row["r2"], row["r2_adj"], row["df"]) == pytest.approx(
                explained_fraction(y, a, conditioning=b))

    def test_collinear_term_named(self):
        y, x, w = data(4)
        with pytest.raises(InputError, match=r"term 'copy' cannot be tested"):
            term_tests(y, {"env": x, "copy": x[:, :1]})

    def test_terms_must_be_mapping(self):
        y, x, _ = data(5)
        with pytest.raises(InputError, match=r"`terms` must be a non-empty mapping"):
            term_tests(y, [x])


class TestOrthonormalEntry:
    """The entry that takes the caller's orthonormal bases (forward selection's steps)."""

    @staticmethod
    def _bases(x, w):
        n = len(x)
        qw = np.linalg.qr(w - w.mean(axis=0))[0]
        xc = x - x.mean(axis=0)
        xr = xc - qw @ (qw.T @ xc)
        return qw, np.linalg.qr(xr)[0]

    def test_same_null_and_p_as_the_table_entry(self):
        # Same spans, same seed: the null distribution equals permutation_test's (which refits
        # with its own rank-revealing QR) and both equal direct least-squares refits of the
        # permuted reduced-model residuals (Freedman & Lane 1983).
        y, x, w = data(600613, n=40, p=6)
        qw, qx = self._bases(x, w)
        yc = y - y.mean(axis=0)
        test = orthonormal_permutation_test(yc, qw, qx, n_permutations=300, seed=31)
        ref = permutation_test(y, x, conditioning=w, n_permutations=300, seed=31)
        np.testing.assert_allclose(test.null_distribution, ref.null_distribution, rtol=1e-12)
        assert test.p_value == ref.p_value
        assert test.statistic == pytest.approx(refit_f(y, x, w), rel=1e-12)
        assert (test.df_model, test.df_residual, test.method) == (3, 40 - 1 - 2 - 3,
                                                                  "reduced_residual")
        assert test.r2_adj == pytest.approx(ref.r2_adj, rel=1e-12)
        assert test.stop == "full"

    def test_statistic_is_statsmodels_partial_f(self):
        # one response column: the partial pseudo-F is the nested-model F test
        # (statsmodels compare_f_test)
        y, x, w = data(8080, n=35, p=1)
        qw, qx = self._bases(x, w)
        full = sm.OLS(y, sm.add_constant(np.column_stack([w, x]))).fit()
        reduced = sm.OLS(y, sm.add_constant(w)).fit()
        f = full.compare_f_test(reduced)[0]
        test = orthonormal_permutation_test(y - y.mean(axis=0), qw, qx, n_permutations=0)
        assert test.statistic == pytest.approx(f, rel=1e-10)
        assert np.isnan(test.p_value)

    @pytest.mark.parametrize("chunk_size,n_workers", [(1, 1), (7, 2), (BLOCK_SIZE, 1),
                                                      (1000, 2)])
    def test_sequential_decision_same_for_every_chunk_and_worker_count(self, chunk_size,
                                                                        n_workers):
        # the looks are fixed multiples of the block size, so a seed stops at the same
        # permutation with the same p whatever the task split (DESIGN: same seed, same result)
        rule = SequentialRule.checked(0.05)
        y, x, w = data(7171, n=50, p=4, effect=0.05)
        qw, qx = self._bases(x[:, :1], w)
        yc = y - y.mean(axis=0)
        ref = orthonormal_permutation_test(yc, qw, qx, n_permutations=999, seed=5,
                                           decision=rule)
        test = orthonormal_permutation_test(yc, qw, qx, n_permutations=999, seed=5,
                                            decision=rule, chunk_size=chunk_size,
                                            n_workers=n_workers)
        assert (test.p_value, test.n_permutations, test.stop) == \
            (ref.p_value, ref.n_permutations, ref.stop)
        np.testing.assert_allclose(test.null_distribution, ref.null_distribution, rtol=1e-12)

    def test_sequential_stops_use_the_fixed_tests_permutations(self):
        # a weak effect stops at its h-th exceedance (Besag & Clifford 1991: p = h/L); a strong
        # one stops early as significant; both read the same permutations as the full test.
        rule = SequentialRule.checked(0.05)
        y, x, w = data(4242, n=60, p=4, effect=0.0)
        qw, qx = self._bases(x, w)
        yc = y - y.mean(axis=0)
        full = orthonormal_permutation_test(yc, qw, qx, n_permutations=999, seed=8)
        weak = orthonormal_permutation_test(yc, qw, qx, n_permutations=999, seed=8,
                                            decision=rule)
        assert weak.stop == "not_significant" and weak.n_permutations < 999
        np.testing.assert_array_equal(weak.null_distribution,
                                      full.null_distribution[:weak.n_permutations])
        h = rule.exceedances(999)
        hits = np.flatnonzero(full.null_distribution >= full.statistic * (1 - 1e-10))
        assert weak.n_permutations == hits[h - 1] + 1
        assert weak.p_value == h / weak.n_permutations
        assert full.p_value > 0.05       # the decision of the full count is the same
        ys, xs, ws = data(4243, n=60, p=4, effect=2.0)
        qw, qx = self._bases(xs, ws)
        strong = orthonormal_permutation_test(ys - ys.mean(axis=0), qw, qx,
                                              n_permutations=999, seed=8, decision=rule)
        assert strong.stop == "significant" and strong.n_permutations in rule.looks(999)
        assert strong.p_value == 1 / (strong.n_permutations + 1)

    def test_bad_input(self):
        y, x, w = data(1, n=20)
        qw, qx = self._bases(x, w)
        yc = y - y.mean(axis=0)
        with pytest.raises(InputError, match=r"`tested` must have orthonormal columns"):
            orthonormal_permutation_test(yc, qw, 2 * qx)
        with pytest.raises(InputError, match=r"`within` has 19 rows but `y` has 20"):
            orthonormal_permutation_test(yc, qw[:19], qx)
        with pytest.raises(InputError, match=r"`tested` has no columns"):
            orthonormal_permutation_test(yc, qw, qx[:, :0])
        with pytest.raises(InputError, match=r"`y` must be a 2-d numpy array"):
            orthonormal_permutation_test(list(yc), qw, qx)
        with pytest.raises(InputError, match=r"`decision` must be a SequentialRule"):
            orthonormal_permutation_test(yc, qw, qx, decision=0.05)
        with pytest.raises(InputError, match=r"needs n_permutations >= 1"):
            orthonormal_permutation_test(yc, qw, qx, n_permutations=0,
                                         decision=SequentialRule.checked(0.05))


class TestSharedStepPermutations:
    """Step tests of a selection on one shared set of permutations, updated as columns enter."""

    @staticmethod
    def _data(seed: int, n: int = 60, p: int = 5):
        rng = np.random.default_rng(seed)
        z = rng.normal(size=(n, 6))
        z -= z.mean(axis=0)
        q, _ = np.linalg.qr(z)
        y = z[:, :3] @ rng.normal(size=(3, p)) + rng.normal(size=(n, p))
        return y - y.mean(axis=0), q

    def test_every_step_is_the_freedman_lane_test_on_those_permutations(self):
        # Oracle: Freedman & Lane (1983, J. Bus. Econ. Stat. 1:292-298) by brute force with
        # numpy least squares: Y* = fitted(reduced) + permuted residuals, F from the residual
        # sums of squares of the reduced and full models, for the same permutations.
        y, q = self._data(5)
        n = len(y)
        steps = SharedStepPermutations(y, q[:, :1], 99, seed=11)
        perms = permutations(n, 99, seed=11)
        for j in range(1, 5):
            test = steps.test(q[:, j])
            w = np.column_stack([np.ones(n), q[:, :j]])
            x = np.column_stack([w, q[:, j]])
            fit = w @ np.linalg.lstsq(w, y, rcond=None)[0]
            resid = y - fit
            expected = []
            for m in range(12):
                ys = fit + resid[perms[m]]
                rss_w = np.sum((ys - w @ np.linalg.lstsq(w, ys, rcond=None)[0]) ** 2)
                rss_x = np.sum((ys - x @ np.linalg.lstsq(x, ys, rcond=None)[0]) ** 2)
                expected.append((rss_w - rss_x) / (rss_x / (n - j - 2)))
            np.testing.assert_allclose(test.null_distribution[:12], expected, rtol=1e-10)
            # the updated state equals the one computed afresh for this model
            fresh = SharedStepPermutations(y, q[:, :j], 99, seed=11).test(q[:, j])
            np.testing.assert_allclose(test.null_distribution, fresh.null_distribution,
                                       rtol=1e-10)
            assert test.p_value == fresh.p_value and test.df_residual == n - j - 2
            steps.add(q[:, j])
        assert steps.n_columns == 5

    def test_same_permutations_as_a_per_step_test_with_that_seed(self):
        y, q = self._data(6)
        shared = SharedStepPermutations(y, q[:, :2], 199, seed=3).test(q[:, 2])
        single = orthonormal_permutation_test(y, q[:, :2], q[:, 2:3], n_permutations=199,
                                              seed=3)
        np.testing.assert_allclose(shared.null_distribution, single.null_distribution,
                                   rtol=1e-10)
        assert shared.p_value == single.p_value
        assert shared.r2 == pytest.approx(single.r2) and shared.r2_adj == pytest.approx(
            single.r2_adj)

    def test_type_one_error_after_updates(self):
        # A null column tested after three real ones entered through add(): its rejection rate
        # at α = 0.05 over 600 data sets lies in the binomial 99 % interval [0.033, 0.069]
        # (scipy.stats.binom) [practice: exact permutation test, Phipson & Smyth 2010 rule].
        rejected = 0
        for rep in range(600):
            rng = np.random.default_rng(rep)
            n = 40
            z = rng.normal(size=(n, 5))
            z -= z.mean(axis=0)
            q, _ = np.linalg.qr(z)
            y = z[:, :3] @ rng.normal(size=(3, 4)) + rng.normal(size=(n, 4))
            steps = SharedStepPermutations(y - y.mean(axis=0), q[:, :0], 99, seed=rep)
            for j in range(3):
                steps.add(q[:, j])
            rejected += steps.test(q[:, 4]).p_value <= 0.05
        low, high = scipy.stats.binom.interval(0.99, 600, 0.05)
        assert low / 600 <= rejected / 600 <= high / 600

    def test_bad_input_is_named(self):
        y, q = self._data(7)
        steps = SharedStepPermutations(y, q[:, :1], 19, seed=1)
        with pytest.raises(InputError, match="unit norm"):
            steps.test(2 * q[:, 1])
        with pytest.raises(InputError, match="one per site"):
            steps.add(q[:-1, 1])
        with pytest.raises(InputError, match="rows"):
            SharedStepPermutations(y, q[:-1, :1], 19)
        with pytest.raises(InputError, match="n_permutations"):
            SharedStepPermutations(y, q[:, :1], 0)
