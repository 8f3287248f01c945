"""Tests of spatial_ev.selection.residual_moran (selection minimising residual Moran's I)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import sparse, stats

from spatial_ev.errors import InputError
from spatial_ev.inference.autocorrelation import morans_i
from spatial_ev.selection.residual_moran import (ResidualMoranSelection,
                                                 select_by_residual_moran)


def _ring(n: int) -> sparse.csr_matrix:
    i = np.arange(n)
    return sparse.csr_matrix((np.ones(2 * n), (np.r_[i, i], np.r_[(i + 1) % n, (i - 1) % n])),
                             shape=(n, n))


def _path_basis(n: int, k: int) -> tuple[sparse.csr_matrix, pd.DataFrame]:
    """Path graph of n sites and its first k cosine eigenvectors (broad to fine scale)."""
    t = np.arange(n)
    W = sparse.diags([np.ones(n - 1), np.ones(n - 1)], [-1, 1], format="csr")
    U = pd.DataFrame({f"sv{j:03d}": np.cos(np.pi * j * (t + 0.5) / n) for j in range(1, k + 1)})
    return W, U / np.sqrt((U ** 2).sum())


def _residuals(Y: np.ndarray, X: np.ndarray) -> np.ndarray:
    A = np.column_stack([np.ones(len(Y)), X])
    return Y - A @ np.linalg.lstsq(A, Y, rcond=None)[0]


class TestSelectByResidualMoran:
    def test_ring_check_value(self):
        # Moran 1950 (Biometrika 37:17–23); REFERENCES.md [derived]: ring of 10 sites with
        # binary neighbours i ± 1 and x = 1..10 gives I = 0.454545.
        x = np.arange(1.0, 11.0)
        candidate = pd.DataFrame({"c": np.cos(2 * np.pi * np.arange(10) / 10)})
        out = select_by_residual_moran(x, candidate, _ring(10), n_permutations=99, seed=1)
        assert out.initial_moran_i == pytest.approx(0.454545, abs=1e-6)

    def test_each_step_adds_the_vector_that_lowers_residual_moran_most(self):
        # Griffith & Peres-Neto 2006 (Ecology 87:2603–2613): the vector minimising residual
        # Moran's I enters first. Oracle: refit every candidate by least squares and compute
        # the residual Moran's I with spatial_ev.inference.autocorrelation.morans_i (a separate
        # implementation).
        W, U = _path_basis(40, 10)
        rng = np.random.default_rng(192837465)
        y = 3 * U[["sv002"]].to_numpy() + 2 * U[["sv005"]].to_numpy() \
            + 0.3 * rng.normal(size=(40, 1)) + 0.2 * np.linspace(0, 1, 40)[:, None]
        out = select_by_residual_moran(y, U, W, n_permutations=199, seed=5)
        chosen: list[str] = []
        for _, step in out.steps.iterrows():
            after = {c: float(morans_i(_residuals(y, U[chosen + [c]].to_numpy()), W)
                              .statistic.iloc[0]) for c in U.columns if c not in chosen}
            assert step["variable"] == min(after, key=after.get)
            assert step["residual_moran_i"] == pytest.approx(after[step["variable"]], abs=1e-10)
            chosen.append(step["variable"])
        assert {"sv002", "sv005"} <= set(out.selected)
        assert not out.residuals_autocorrelated
        assert out.steps["p_value"].iloc[-1] > 0.05
        assert (out.steps["p_value"].iloc[:-1] <= 0.05).all()
        assert out.stop_reason.startswith("residual Moran's I no longer significant")

    def test_pooled_statistic_is_variance_weighted_mean(self):
        # Pooled residual Moran's I = Σ_j I_j·SS_j / Σ_j SS_j [derived from Moran 1950].
        W, U = _path_basis(30, 6)
        rng = np.random.default_rng(564738291)
        Y = np.outer(U["sv001"], [3, 1, 0.5]) + rng.normal(size=(30, 3)) * [0.2, 1, 2]
        out = select_by_residual_moran(Y, U, W, n_permutations=99, seed=11)
        Yc = Y - Y.mean(axis=0)
        per_column = morans_i(Yc, W).statistic.to_numpy()
        ss = (Yc ** 2).sum(axis=0)
        assert out.initial_moran_i == pytest.approx(per_column @ ss / ss.sum(), abs=1e-12)
        assert isinstance(out, ResidualMoranSelection)
        assert "Selected" in out.summary() and out.to_frame().equals(out.steps)

    def test_nothing_selected_without_autocorrelation(self):
        W, U = _path_basis(40, 8)
        y = np.random.default_rng(1122334455).normal(size=(40, 2))
        out = select_by_residual_moran(y, U, W, n_permutations=199, seed=2)
        assert out.initial_p_value > 0.05
        assert out.selected == () and len(out.steps) == 0
        assert out.stop_reason.startswith("residuals not significantly autocorrelated")

    def test_conditioning_and_reproducibility(self):
        W, U = _path_basis(40, 10)
        rng = np.random.default_rng(99001122)
        env = pd.DataFrame({"depth": rng.normal(size=40)})
        y = 2 * U[["sv003"]].to_numpy() + env.to_numpy() + 0.3 * rng.normal(size=(40, 1))
        a = select_by_residual_moran(y, U, W, conditioning=env, n_permutations=99, seed=7)
        b = select_by_residual_moran(y, U, W, conditioning=env, n_permutations=99, seed=7)
        pd.testing.assert_frame_equal(a.steps, b.steps)
        assert a.selected[0] == "sv003"
        expected = float(morans_i(_residuals(y, env.to_numpy()), W).statistic.iloc[0])
        assert a.initial_moran_i == pytest.approx(expected, abs=1e-12)

    def test_max_variables(self):
        W, U = _path_basis(40, 10)
        y = U[["sv001"]].to_numpy() * 3 + U[["sv002"]].to_numpy() * 2
        out = select_by_residual_moran(y + 0.01 * np.random.default_rng(3).normal(size=(40, 1)),
                                       U, W, n_permutations=99, seed=1, max_variables=1)
        assert len(out.selected) == 1 and out.stop_reason == "reached max_variables = 1"

    @pytest.mark.slow
    def test_type_one_error_of_the_initial_test(self):
        # Under no autocorrelation the first residual Moran's I test (which gates any
        # selection) rejects at rate alpha; binomial 99% interval (scipy.stats.binom).
        W, U = _path_basis(30, 5)
        rng = np.random.default_rng(7654321)
        reps = 400
        hits = sum(bool(select_by_residual_moran(rng.normal(size=(30, 2)), U, W,
                                                 n_permutations=99, max_variables=1,
                                                 seed=int(rng.integers(2**32))).selected)
                   for _ in range(reps))
        low, high = stats.binom.interval(0.99, reps, 0.05)
        assert low <= hits <= high


class TestSelectByResidualMoranValidation:
    def setup_method(self):
        self.W, self.U = _path_basis(20, 4)
        self.y = np.random.default_rng(5).normal(size=(20, 1))

    def test_weights_shape(self):
        with pytest.raises(InputError, match=r"`weights` must be 20 x 20"):
            select_by_residual_moran(self.y, self.U, _ring(10))

    def test_weights_without_neighbours(self):
        with pytest.raises(InputError, match=r"no positive weight"):
            select_by_residual_moran(self.y, self.U, sparse.csr_matrix((20, 20)))

    def test_alpha_and_permutations(self):
        with pytest.raises(InputError, match=r"`alpha` must be > 0 and <= 1; got -0.1"):
            select_by_residual_moran(self.y, self.U, self.W, alpha=-0.1)
        with pytest.raises(InputError, match=r"`n_permutations` must be >= 1; got 0"):
            select_by_residual_moran(self.y, self.U, self.W, n_permutations=0)

    def test_rows(self):
        with pytest.raises(InputError, match=r"`candidates` has 19 rows but `Y` has 20"):
            select_by_residual_moran(self.y, self.U.iloc[:19], self.W)
