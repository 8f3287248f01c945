"""Tests of spatial_ev.selection.forward (forward selection with the double stopping criterion)."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats

from spatial_ev.errors import DroppedVariablesWarning, InputError
from spatial_ev.inference.permutation import permutation_test
from spatial_ev.pipeline.steps import large_survey_candidates
from spatial_ev.selection.forward import ForwardSelection, GrowingBasis, forward_selection
from spatial_ev.selection.weighting import compare_weighting_schemes


def _orthonormal_frame(n: int, k: int, seed: int) -> pd.DataFrame:
    a = np.random.default_rng(seed).normal(size=(n, k))
    a -= a.mean(axis=0)
    q = np.linalg.qr(a)[0]
    return pd.DataFrame(q, columns=[f"sv{j + 1:03d}" for j in range(k)])


def _ols(y, X):
    return sm.OLS(y, sm.add_constant(X, has_constant="add")).fit()


class TestForwardSelection:
    def test_selects_the_true_orthogonal_vectors(self):
        # Blanchet, Legendre & Borcard 2008 (Ecology 89:2623–2632): a strong signal on two of
        # twenty orthogonal vectors is recovered, nothing else passes the double stopping rule.
        U = _orthonormal_frame(50, 20, 918273645)
        rng = np.random.default_rng(55501)
        Y = np.outer(U["sv004"], [4, 3, 2]) + np.outer(U["sv011"], [3, -2, 2]) \
            + 0.3 * rng.normal(size=(50, 3))
        sel = forward_selection(Y, U, n_permutations=199, seed=1234567)
        assert isinstance(sel, ForwardSelection)
        assert sel.ranking == "orthogonal"
        assert set(sel.selected) == {"sv004", "sv011"}
        assert sel.global_test.p_value == pytest.approx(0.005)
        assert sel.r2_adj <= sel.r2_adj_global
        # orthogonal contribution of each vector is ‖Yᵀu‖²/SS [derived]
        Yc = Y - Y.mean(axis=0)
        first = sel.steps.iloc[0]
        u = U[first["variable"]].to_numpy()
        assert first["r2"] == pytest.approx(np.sum((u @ Yc) ** 2) / np.sum(Yc ** 2), rel=1e-12)

    def test_general_candidates_match_ordinary_regression(self):
        # Correlated candidates: each step must add the candidate with the largest R² gain
        # (brute-force refits with statsmodels as the oracle), and report that model's R²,
        # adjusted R² and nested-model F (statsmodels compare_f_test).
        rng = np.random.default_rng(1357924680)
        n = 45
        X = pd.DataFrame(rng.normal(size=(n, 6)), columns=["ph", "depth", "silt", "temp",
                                                           "salinity", "slope"])
        X["silt"] = 0.7 * X["depth"] + 0.5 * X["silt"]
        X["slope"] = 0.5 * X["ph"] + 0.8 * X["slope"]
        y = 1.5 * X["depth"] - 1.0 * X["temp"] + 0.6 * X["ph"] + rng.normal(size=n)
        sel = forward_selection(y.to_frame("y"), X, n_permutations=199, seed=24680)
        assert sel.ranking == "sequential"
        assert {"depth", "temp"} <= set(sel.selected)
        chosen: list[str] = []
        for _, step in sel.steps.iterrows():
            rest = [c for c in X.columns if c not in chosen]
            best = max(rest, key=lambda c: _ols(y, X[chosen + [c]]).rsquared)
            assert step["variable"] == best
            fit = _ols(y, X[chosen + [best]])
            assert step["r2"] == pytest.approx(fit.rsquared, abs=1e-12)
            assert step["r2_adj"] == pytest.approx(fit.rsquared_adj, abs=1e-12)
            if np.isfinite(step["p_value"]):
                reduced = _ols(y, X[chosen]) if chosen else sm.OLS(y, np.ones(n)).fit()
                f_value = fit.compare_f_test(reduced)[0]
                assert step["pseudo_f"] == pytest.approx(f_value, rel=1e-10)
            if not step["added"]:
                break
            chosen.append(best)
        assert list(sel.selected) == chosen
        assert sel.r2_adj_global == pytest.approx(_ols(y, X).rsquared_adj, abs=1e-12)

    def test_global_test_gates_everything(self):
        # Blanchet et al. 2008: no selection unless the global model is significant.
        U = _orthonormal_frame(40, 10, 192837465)
        y = np.random.default_rng(31).normal(size=(40, 2))
        sel = forward_selection(y, U, n_permutations=199, seed=8)
        assert sel.global_test.p_value > 0.05
        assert sel.selected == () and len(sel.steps) == 0
        assert sel.stop_reason.startswith("global test not significant")
        assert "Selected (0): none" in sel.summary()

    def test_adjusted_r2_ceiling_stops_selection(self):
        # Second stopping rule (Blanchet et al. 2008): the selected model's adjusted R² never
        # exceeds the global model's; the candidate that would cross it is listed, not added.
        rng = np.random.default_rng(20240611)
        X = pd.DataFrame(rng.normal(size=(40, 6)), columns=list("abcdef"))
        X["c"] = 0.5 * X["b"] + 0.5 * X["c"]
        Y = 2 * X[["b"]].to_numpy() + X[["e"]].to_numpy() + rng.normal(size=(40, 1))
        sel = forward_selection(Y, X, n_permutations=199, seed=1)
        last = sel.steps.iloc[-1]
        assert sel.r2_adj <= sel.r2_adj_global
        assert not last["added"] and last["r2_adj"] > sel.r2_adj_global
        assert np.isnan(last["p_value"])                     # not tested: the ceiling came first
        assert sel.stop_reason.startswith("adjusted R² would exceed the global model's")
        free = forward_selection(Y, X, n_permutations=199, seed=1, r2_adj_limit=np.inf)
        assert len(free.selected) >= len(sel.selected)

    def test_ceiling_can_stop_at_the_first_candidate(self):
        # Published rule (Blanchet et al. 2008) applied literally: one real variable among weak
        # ones can alone exceed the diluted global adjusted R²; nothing is selected and the stop
        # reason explains it.
        rng = np.random.default_rng(20240611)
        X = pd.DataFrame(rng.normal(size=(40, 4)), columns=["a", "b", "c", "d"])
        Y = 2 * X[["b"]].to_numpy() + rng.normal(size=(40, 1))
        sel = forward_selection(Y, X, n_permutations=199, seed=1)
        assert sel.global_test.p_value <= 0.05 and sel.selected == ()
        assert sel.steps.iloc[0]["variable"] == "b"
        assert "first candidate alone exceeds it" in sel.stop_reason
        kept = forward_selection(Y, X, n_permutations=199, seed=1, ceiling="keep_last")
        assert kept.selected == ("b",) and kept.ceiling == "keep_last"
        assert kept.stop_reason == "adjusted R² reached the global model's adjusted R²"
        assert kept.steps.iloc[0]["p_value"] <= 0.05
        assert kept.r2_adj > kept.r2_adj_global

    def test_conditioning_gives_partial_statistics(self):
        # With conditioning C the steps report R²(S + C) − R²(C) and R²adj(S + C) − R²adj(C)
        # (Peres-Neto et al. 2006, Ecology 87:2614–2625); oracle statsmodels.
        U = _orthonormal_frame(40, 8, 56473829)
        rng = np.random.default_rng(74839201)
        C = pd.DataFrame({"trend": np.linspace(0, 1, 40) + 0.1 * rng.normal(size=40)})
        y = 3 * U["sv002"] + 2 * C["trend"] + 0.4 * rng.normal(size=40)
        sel = forward_selection(y.to_frame(), U, conditioning=C, n_permutations=199, seed=3)
        assert sel.ranking == "sequential"          # the trend is not orthogonal to the vectors
        assert sel.selected[0] == "sv002"
        step = sel.steps.iloc[0]
        both, cond_only = _ols(y, pd.concat([U[["sv002"]], C], axis=1)), _ols(y, C)
        assert step["r2"] == pytest.approx(both.rsquared - cond_only.rsquared, abs=1e-12)
        assert step["r2_adj"] == pytest.approx(both.rsquared_adj - cond_only.rsquared_adj,
                                               abs=1e-12)
        assert sel.global_test.method == "reduced_residual"

    def test_skip_global_test_and_many_candidates(self):
        U = _orthonormal_frame(30, 29, 11223344)                # n − 1 candidates: no global model
        y = 3 * U[["sv005"]].to_numpy() + 0.2 * np.random.default_rng(4).normal(size=(30, 1))
        with pytest.raises(InputError, match=r"too many to test.*global_test='skip'"):
            forward_selection(y, U, n_permutations=99, seed=2)
        sel = forward_selection(y, U, n_permutations=99, seed=2, global_test="skip",
                                r2_adj_limit=np.inf)
        assert sel.global_test is None and sel.r2_adj_global is None
        assert sel.selected[0] == "sv005"
        assert "Global test skipped" in sel.summary()

    def test_reproducible_labels_and_inputs_untouched(self):
        U = _orthonormal_frame(36, 12, 99887766)
        U.index = pd.Index([f"q{i:02d}" for i in range(36)], name="site")
        Y = pd.DataFrame(np.outer(U["sv003"], [2, 1]) + 0.5 * np.random.default_rng(9)
                         .normal(size=(36, 2)), index=U.index, columns=["sp_a", "sp_b"])
        before_u, before_y = U.copy(), Y.copy()
        a = forward_selection(Y, U, n_permutations=199, seed=424242)
        b = forward_selection(Y, SimpleNamespace(vectors=U), n_permutations=199, seed=424242)
        pd.testing.assert_frame_equal(a.steps, b.steps)
        pd.testing.assert_frame_equal(U, before_u)
        pd.testing.assert_frame_equal(Y, before_y)
        assert a.selected[0] == "sv003"
        assert a.to_frame().equals(a.steps)

    def test_same_result_on_dask_engine(self):
        # One seed, same p-values whatever the engine (project contract, DESIGN.md).
        rng = np.random.default_rng(3)
        X = pd.DataFrame(rng.normal(size=(40, 4)), columns=["a", "b", "c", "d"])
        Y = X[["b"]].to_numpy() + rng.normal(size=(40, 1))
        local = forward_selection(Y, X, n_permutations=199, seed=1)
        remote = forward_selection(Y, X, n_permutations=199, seed=1, engine="dask")
        pd.testing.assert_frame_equal(local.steps, remote.steps)
        assert local.global_test.p_value == remote.global_test.p_value

    def test_progress_messages(self):
        U = _orthonormal_frame(30, 6, 777111)
        y = 3 * U[["sv002"]].to_numpy() + 0.3 * np.random.default_rng(2).normal(size=(30, 1))
        messages: list[str] = []
        sel = forward_selection(y, U, n_permutations=99, seed=5, progress=messages.append,
                                ceiling="keep_last")
        assert messages[0] == "global test of 6 candidates"
        assert messages[1] == "step 1: testing sv002"
        assert len(messages) == 1 + int(np.isfinite(sel.steps["p_value"]).sum())

    def test_max_variables(self):
        U = _orthonormal_frame(40, 10, 5647382910)
        Y = U[["sv001"]].to_numpy() * 5 + U[["sv002"]].to_numpy() * 4 + U[["sv003"]].to_numpy() * 3
        sel = forward_selection(Y + 0.1 * np.random.default_rng(3).normal(size=(40, 1)), U,
                                n_permutations=99, seed=5, max_variables=2)
        assert sel.selected == ("sv001", "sv002")
        assert sel.stop_reason == "reached max_variables = 2"

    def test_collinear_candidate_is_dropped_with_warning(self):
        rng = np.random.default_rng(6655443322)
        X = pd.DataFrame(rng.normal(size=(30, 3)), columns=["a", "b", "c"])
        C = X[["a"]] * 2.0
        y = X[["b"]].to_numpy() * 2 + rng.normal(size=(30, 1))
        with pytest.warns(DroppedVariablesWarning, match=r"\['a'\].*collinear"):
            sel = forward_selection(y, X, conditioning=C, n_permutations=99, seed=1)
        assert "a" not in sel.selected

    @pytest.mark.slow
    @pytest.mark.parametrize("m", [5, 10])
    def test_type_one_error_with_and_without_global_test(self, m):
        # Blanchet et al. 2008: under no effect, forward selection with the global test
        # selects something at rate alpha; without it (and without the R²adj ceiling) at
        # 1 − (1 − alpha)^m: 0.226 (m = 5), 0.401 (m = 10) [derived]. Counts must fall inside the
        # binomial 99% interval (scipy.stats.binom).
        reps, alpha, n = 500, 0.05, 40
        rng = np.random.default_rng(314159 + m)
        hit_global = hit_skip = 0
        for _ in range(reps):
            U = _orthonormal_frame(n, m, int(rng.integers(2**32)))
            y = rng.normal(size=(n, 1))
            seed = int(rng.integers(2**32))
            with_test = forward_selection(y, U, n_permutations=99, seed=seed)
            without = forward_selection(y, U, n_permutations=99, seed=seed, global_test="skip",
                                        r2_adj_limit=np.inf, max_variables=1)
            hit_global += bool(with_test.selected)
            hit_skip += bool(without.selected)
        low, high = stats.binom.interval(0.99, reps, alpha)
        assert low <= hit_global <= high
        expected = 1 - (1 - alpha) ** m
        low, high = stats.binom.interval(0.99, reps, expected)
        assert low <= hit_skip <= high


class TestIncrementalBasis:
    def test_growing_basis_spans_what_numpy_qr_spans(self):
        # nearly collinear columns: Gram–Schmidt with one reorthogonalisation stays orthonormal
        # to rounding level and spans the columns' space (projector of numpy.linalg.qr)
        rng = np.random.default_rng(20261202)
        base = rng.normal(size=(200, 1))
        cols = base + 1e-7 * rng.normal(size=(200, 30))
        cols -= cols.mean(axis=0)
        cond = np.linalg.qr(rng.normal(size=(200, 3)) - rng.normal(size=(200, 3)).mean(0))[0]
        basis = GrowingBasis(cond)
        for j in range(30):
            basis.append(basis.orthonormalise(cols[:, j]))
        q = basis.columns
        assert np.abs(q.T @ q - np.eye(33)).max() < 1e-12
        ref = np.linalg.qr(np.column_stack([cond, cols]))[0]
        np.testing.assert_allclose(q @ q.T, ref @ ref.T, atol=1e-9)
        with pytest.raises(InputError, match=r"lies in the span"):
            basis.orthonormalise(cols[:, 4] + cond[:, 0])

    def test_step_tests_equal_tests_refitted_from_scratch(self):
        # Each step's test on the incrementally grown basis gives the p-value (same seed
        # stream) and, to rounding, the pseudo-F of a permutation test that refactorises
        # [conditioning, selected] from scratch; and the pseudo-F is the nested-model F of
        # statsmodels (compare_f_test) for one response column.
        rng = np.random.default_rng(97531)
        n = 80
        X = pd.DataFrame(rng.normal(size=(n, 8)), columns=[f"e{j}" for j in range(8)])
        X["e3"] = 0.7 * X["e1"] + 0.3 * X["e3"]
        C = rng.normal(size=(n, 2))
        y = (X[["e1", "e5", "e6"]].to_numpy() @ [[1.0], [0.8], [0.6]] + C[:, :1]
             + rng.normal(size=(n, 1)))
        sel = forward_selection(y, X, conditioning=C, n_permutations=199, seed=11)
        assert len(sel.selected) >= 2
        streams = np.random.default_rng(11)
        streams.spawn(1)                                    # the global test's stream
        tested = sel.steps[np.isfinite(sel.steps["p_value"])]
        for i, (_, row) in enumerate(tested.iterrows()):
            given = np.column_stack([C, X[list(sel.selected[:i])].to_numpy()])
            ref = permutation_test(y, X[[row["variable"]]], conditioning=given,
                                   n_permutations=199, seed=streams.spawn(1)[0])
            assert row["p_value"] == ref.p_value
            assert row["pseudo_f"] == pytest.approx(ref.statistic, rel=1e-12)
            full = _ols(y, np.column_stack([given, X[[row["variable"]]]]))
            assert row["pseudo_f"] == pytest.approx(full.compare_f_test(_ols(y, given))[0],
                                                    rel=1e-9)


class TestSequentialSteps:
    def test_same_selection_fewer_permutations(self):
        # A strong signal on three of thirty orthonormal vectors: sequential step decisions
        # select what the full count selects; the clearly significant steps stop at an early
        # look and the final non-significant one at its h-th exceedance (Besag & Clifford
        # 1991), so the steps draw far fewer permutations; the global test keeps all 999.
        U = _orthonormal_frame(120, 30, 1212)
        rng = np.random.default_rng(3434)
        Y = (np.outer(U["sv002"], [3, 2, 1]) + np.outer(U["sv009"], [2, -2, 1])
             + np.outer(U["sv017"], [1, 1, -2]) + 0.5 * rng.normal(size=(120, 3)))
        fixed = forward_selection(Y, U, n_permutations=999, seed=77)
        seq = forward_selection(Y, U, n_permutations=999, seed=77, sequential_steps=True)
        assert seq.selected == fixed.selected
        assert {"sv002", "sv009", "sv017"} <= set(seq.selected)
        assert seq.global_test.n_permutations == 999
        assert seq.global_test.p_value == fixed.global_test.p_value
        drawn = seq.steps["permutations"]
        assert seq.step_permutations == drawn.sum() < 0.5 * 999 * len(drawn)
        assert "permutations" not in fixed.steps.columns and fixed.step_permutations == \
            999 * int(np.isfinite(fixed.steps["p_value"]).sum())
        last = seq.steps.iloc[-1]
        if not last["added"] and np.isfinite(last["p_value"]):
            assert last["p_value"] > 0.05 and last["permutations"] < 999
        assert seq.sequential and seq.decision_risk == 0.001
        assert "stopping once the decision is settled" in seq.summary()

    def test_bad_input(self):
        X = _orthonormal_frame(20, 4, 1)
        y = X[["sv001"]].to_numpy()
        with pytest.raises(InputError, match=r"`sequential_steps` must be True or False"):
            forward_selection(y, X, sequential_steps="yes")
        with pytest.raises(InputError, match=r"`decision_risk` must be"):
            forward_selection(y, X, sequential_steps=True, decision_risk=0.0)


class TestLargeSurveyCandidates:
    """Candidate counts above the dense-solver limit (spatial_ev.pipeline.steps)."""

    def test_grid_count_is_weyls_lattice_count(self):
        # Square of side L with Neumann modes cos(iπx/L)cos(jπy/L): wavelength ≥ s iff
        # i² + j² ≤ (2L/s)²; counting the lattice points is the oracle for Weyl's π·L²/s²
        # [derived: Weyl's law for the Laplacian on the square]
        gx, gy = np.meshgrid(np.arange(100.0), np.arange(100.0))
        count = large_survey_candidates(pd.DataFrame({"x": gx.ravel(), "y": gy.ravel()}))
        assert count.spacing == 1.0 and count.finest_scale == 3.0
        i, j = np.meshgrid(np.arange(200), np.arange(200))
        lattice = np.count_nonzero(i ** 2 + j ** 2 <= (2 * 99 / 3.0) ** 2)
        assert abs(count.design_vectors - lattice) <= 0.03 * lattice
        # budget: 2 million values over 10,000 sites, never fewer than 200 vectors
        assert count.budget_vectors == 200 and count.n_vectors == 200
        assert "200 per scheme were candidates" in count.reason
        assert "Finer scales were not examined" in count.reason

    def test_transect_and_budget(self):
        # transect: modes cos(kπx/L) have wavelength 2L/k ≥ s iff k ≤ 2L/s [derived], capped
        # at n // 2 (about the positively autocorrelated vectors of a transect, REFERENCES)
        x = np.arange(3001.0) * 2.0
        count = large_survey_candidates(pd.DataFrame({"x": x, "y": np.zeros_like(x)}))
        assert count.finest_scale == 6.0
        assert count.design_vectors == min(int(np.ceil(2 * 6000 / 6.0)), 3001 // 2) == 1500
        assert count.budget_vectors == 2_000_000 // 3001 == count.n_vectors
        wide = np.random.default_rng(5).uniform(0, 100, size=(4000, 2))
        irregular = large_survey_candidates(pd.DataFrame(wide, columns=["x", "y"]))
        assert irregular.budget_vectors == 500 == irregular.n_vectors < irregular.design_vectors

    def test_bad_input(self):
        with pytest.raises(InputError, match=r"columns \['x', 'y'\]"):
            large_survey_candidates(np.zeros((5, 2)))
        with pytest.raises(InputError, match=r"all the same point"):
            large_survey_candidates(pd.DataFrame({"x": [1.0] * 4, "y": [2.0] * 4}))


class TestForwardSelectionValidation:
    def setup_method(self):
        rng = np.random.default_rng(1928374650)
        self.Y = rng.normal(size=(20, 2))
        self.X = pd.DataFrame(rng.normal(size=(20, 3)), columns=["a", "b", "c"])

    def test_alpha(self):
        with pytest.raises(InputError, match=r"`alpha` must be > 0 and <= 1; got 0.0"):
            forward_selection(self.Y, self.X, alpha=0.0)

    def test_string_options(self):
        with pytest.raises(InputError, match=r"`global_test` must be one of 'required', 'skip'"):
            forward_selection(self.Y, self.X, global_test="off")
        with pytest.raises(InputError, match=r"`ceiling` must be one of 'strict', 'keep_last'"):
            forward_selection(self.Y, self.X, ceiling="loose")

    def test_duplicate_names(self):
        X = self.X.set_axis(["a", "a", "c"], axis=1)
        with pytest.raises(InputError, match=r"column names must be unique; 'a' occurs 2 times"):
            forward_selection(self.Y, X)

    def test_rows(self):
        with pytest.raises(InputError, match=r"`candidates` has 19 rows but `Y` has 20"):
            forward_selection(self.Y, self.X.iloc[:19])

    def test_constant_response(self):
        with pytest.raises(InputError, match=r"`Y` has no variation"):
            forward_selection(np.ones((20, 1)), self.X, n_permutations=9)

    def test_permutations_and_limits(self):
        with pytest.raises(InputError, match=r"`n_permutations` must be >= 1; got 0"):
            forward_selection(self.Y, self.X, n_permutations=0)
        with pytest.raises(InputError, match=r"`r2_adj_limit` must be <= 1; got 2.0"):
            forward_selection(self.Y, self.X, r2_adj_limit=2.0)
        with pytest.raises(InputError, match=r"`max_variables` must be >= 1; got 0"):
            forward_selection(self.Y, self.X, max_variables=0)


class TestSiteIdentity:
    def test_table_from_bare_array_has_no_site_ids(self):
        rng = np.random.default_rng(3141592653)
        ids = pd.Index([f"s{i}" for i in range(30)], name="site")
        Y = pd.DataFrame(rng.normal(size=(30, 2)), index=ids)
        X = pd.DataFrame(rng.normal(size=(30, 3)))              # default 0..n-1 index
        sel = forward_selection(Y, X, n_permutations=19, seed=1)
        assert sel.n_candidates == 3 and list(X.columns) == [0, 1, 2]
        with pytest.raises(InputError, match=r"row 0 is 5 but `Y` has 's0'"):
            forward_selection(Y, X.set_axis(range(5, 35)), n_permutations=19, seed=1)


class TestPublicNames:
    def test_scheme_comparison_is_the_top_level_name(self):
        import spatial_ev
        assert compare_weighting_schemes is spatial_ev.compare_weighting_schemes
