"""Selection of spatial eigenvectors that removes residual spatial autocorrelation.

Griffith & Peres-Neto (2006, Ecology 87:2603–2613): add, one at a time, the eigenvector that
reduces the Moran's I of the model residuals most, until that Moran's I is no longer significant.
The aim is residuals free of spatial autocorrelation (e.g. before testing environmental effects),
not the best description of spatial structure; for the latter use
:func:`spatial_ev.selection.forward.forward_selection`. Bauman, Drouet, Dray & Vleminckx (2018,
Ecography 41:1638–1649) found correct type I error rates for this criterion.

Multivariate responses use the pooled residual Moran's I,
I = (n/S₀)·tr(EᵀWE)/tr(EᵀE), the variance-weighted mean of the Moran's I of each residual column
(for a single response it is the ordinary Moran's I of the residuals; Moran 1950, Biometrika
37:17–23). Its significance is judged by permuting the rows of the residual matrix (one-sided,
positive autocorrelation), an approximation: residuals of a regression are not exactly
exchangeable. Permutations, p-value and tie rule are those of the null service
(:mod:`spatial_ev.inference.null`), through :func:`spatial_ev.inference.autocorrelation.morans_i`.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from scipy import sparse

from spatial_ev._validation import check_int, check_real, check_rng
from spatial_ev.stats.linear import adjusted_r2
from spatial_ev.errors import InputError
from spatial_ev.inference.autocorrelation import morans_i
from spatial_ev.inference.null import permutation_p_value
from spatial_ev.space.moran import check_weights
from spatial_ev.selection.forward import (check_selection_data, remove_conditioning,
                                         SequentialRanking)

__all__ = ["select_by_residual_moran", "ResidualMoranSelection"]


@dataclass(frozen=True)
class ResidualMoranSelection:
    """Result of :func:`select_by_residual_moran`.

    Attributes
    ----------
    selected : tuple[str, ...]
        Candidates added, in order (the last one made the residual Moran's I non-significant).
    steps : pandas.DataFrame
        One row per added candidate: ``variable``, ``residual_moran_i`` (pooled Moran's I of the
        residuals after adding it), ``p_value``, ``r2`` and ``r2_adj`` (of the selected model,
        net of conditioning variables).
    initial_moran_i, initial_p_value : float
        Residual Moran's I of the response (after conditioning variables) and its p-value.
    stop_reason : str
        Why selection ended.
    residuals_autocorrelated : bool
        Whether the final residual Moran's I is still significant (e.g. candidates ran out).
    alpha : float
    n_permutations : int
    n_candidates : int
    """

    selected: tuple
    steps: pd.DataFrame
    initial_moran_i: float
    initial_p_value: float
    stop_reason: str
    residuals_autocorrelated: bool
    alpha: float
    n_permutations: int
    n_candidates: int

    def to_frame(self) -> pd.DataFrame:
        """Return a copy of the step table."""
        return self.steps.copy()

    def summary(self) -> str:
        """Return a plain-text account of the selection."""
        lines = [f"Selection minimising residual Moran's I among {self.n_candidates} candidates "
                 f"(alpha = {self.alpha:g}, {self.n_permutations} permutations per test)",
                 f"Start: residual Moran's I = {self.initial_moran_i:.4f}, "
                 f"p = {self.initial_p_value:.4f}"]
        for _, row in self.steps.iterrows():
            lines.append(f"  + {row['variable']:<16s} residual I = {row['residual_moran_i']: .4f}"
                         f"  p = {row['p_value']:.4f}  R²adj = {row['r2_adj']:.4f}")
        lines.append(f"Selected ({len(self.selected)}): {', '.join(self.selected) or 'none'}")
        lines.append(f"Stopped because: {self.stop_reason}")
        lines.append("The pooled Moran's I weights each response by its residual variance; the "
                     "permutation test treats residuals as exchangeable (approximate).")
        return "\n".join(lines)


def select_by_residual_moran(
    Y: Any,
    candidates: Any,
    weights: Any,
    *,
    conditioning: Any = None,
    alpha: float = 0.05,
    n_permutations: int = 999,
    seed: None | int | np.random.Generator = None,
    max_variables: int | None = None,
    progress: Callable[[str], None] | None = None,
) -> ResidualMoranSelection:
    """Add spatial eigenvectors until the residuals show no significant Moran's I.

    Parameters
    ----------
    Y : array-like or DataFrame, shape (n_sites, n_responses)
        Response. Not modified.
    candidates : DataFrame or SpatialBasis, shape (n_sites, n_candidates)
        Candidate eigenvectors (columns = names).
    weights : scipy.sparse matrix, ndarray (n_sites, n_sites), NeighbourGraph or SpatialBasis
        Spatial weights W for Moran's I, as accepted by
        :func:`spatial_ev.inference.autocorrelation.morans_i`
        (a graph gives binary weights, a basis its own weights).
    conditioning : array-like or DataFrame, optional
        Variables always in the model (e.g. environment).
    alpha : float, default 0.05
        Level of the residual Moran's I tests.
    n_permutations : int, default 999
    seed : None, int or numpy.random.Generator
    max_variables : int, optional
    progress : callable, optional
        Called with a short message after each step.

    Returns
    -------
    ResidualMoranSelection

    Examples
    --------
    >>> from scipy import sparse
    >>> n = 30
    >>> W = sparse.diags([np.ones(n - 1), np.ones(n - 1)], [-1, 1])
    >>> t = np.arange(n)
    >>> U = pd.DataFrame({f"c{k}": np.cos(np.pi * k * (t + 0.5) / n) for k in range(1, 6)})
    >>> Y = 3 * U[["c1"]].to_numpy() + np.random.default_rng(5).normal(size=(n, 1))
    >>> select_by_residual_moran(Y, U, W, n_permutations=199, seed=2).selected[0]
    'c1'
    """
    Yc, Z, names, cond = check_selection_data(Y, candidates, conditioning)
    W = check_weights(weights, Yc.shape[0])
    W = ((W + W.T) * 0.5).tocsr()  # symmetric part: same Moran's I, simpler algebra below
    alpha = check_real("alpha", alpha, low=0, high=1, low_inclusive=False)
    n_permutations = check_int("n_permutations", n_permutations, low=1)
    if max_variables is not None:
        max_variables = check_int("max_variables", max_variables, low=1)
    rng = check_rng(seed)
    n = Yc.shape[0]
    s0 = float(W.sum())
    total_ss = float(np.sum(Yc * Yc))
    if total_ss <= 0:
        raise InputError("`Y` has no variation (every column is constant); nothing to explain")

    E, Zr, Qc, raw2, dead = remove_conditioning(Yc, Z, cond, names, stacklevel=3)
    m_c = Qc.shape[1]
    r2_c = 1.0 - float(np.sum(E * E)) / total_ss
    base_adj = adjusted_r2(r2_c, n, m_c)
    state = SequentialRanking(E, Zr, ~dead, raw2, total_ss)

    i0, p0 = _pooled_moran_test(E, W, n_permutations, rng.spawn(1)[0])
    rows, chosen, reason = [], [], ""
    p_now = p0
    if p0 > alpha:
        reason = f"residuals not significantly autocorrelated to begin with (p = {p0:.4g})"
    while p_now <= alpha:
        if max_variables is not None and len(chosen) >= max_variables:
            reason = f"reached max_variables = {max_variables}"
            break
        if n - m_c - len(chosen) - 2 < 1:
            reason = "no residual degrees of freedom left for another variable"
            break
        z2, live = state.live()
        live[chosen] = False
        if not live.any():
            reason = "no candidate left; residuals still autocorrelated"
            break
        # residual Moran's I after adding each candidate, all at once:
        # E_j = E − z_j b_j with b_j = z_jᵀE/‖z_j‖²
        E, Zw = state.residual, state.candidates
        WZ = W @ Zw
        b = (Zw.T @ E) / np.maximum(z2, 1e-300)[:, None]          # (m, p)
        bb = np.einsum("jp,jp->j", b, b)
        num = (float(np.sum(E * (W @ E))) - 2 * np.einsum("jp,jp->j", b, WZ.T @ E)
               + np.einsum("ij,ij->j", Zw, WZ) * bb)
        den = float(np.sum(E * E)) - z2 * bb
        with np.errstate(divide="ignore", invalid="ignore"):
            moran_after = np.where(live, (n / s0) * num / den, np.inf)
        j = int(np.argmin(moran_after))
        state.enter(j)
        E = state.residual
        chosen.append(j)
        i_now, p_now = _pooled_moran_test(E, W, n_permutations, rng.spawn(1)[0])
        r2 = 1.0 - float(np.sum(E * E)) / total_ss - r2_c
        rows.append({"variable": names[j], "residual_moran_i": i_now, "p_value": p_now,
                     "r2": r2, "r2_adj": adjusted_r2(r2_c + r2, n, m_c + len(chosen)) - base_adj})
        if progress is not None:
            progress(f"added {names[j]}: residual Moran's I = {i_now:.4f}, p = {p_now:.4g}")
        if p_now > alpha:
            reason = f"residual Moran's I no longer significant (p = {p_now:.4g} > {alpha:g})"
    steps = pd.DataFrame(rows, columns=["variable", "residual_moran_i", "p_value", "r2",
                                        "r2_adj"])
    steps.index = pd.RangeIndex(1, len(steps) + 1, name="step")
    return ResidualMoranSelection(
        selected=tuple(names[j] for j in chosen), steps=steps, initial_moran_i=i0,
        initial_p_value=p0, stop_reason=reason, residuals_autocorrelated=bool(p_now <= alpha),
        alpha=alpha, n_permutations=n_permutations, n_candidates=len(names))


def _pooled_moran_test(E: np.ndarray, W: sparse.csr_matrix, n_permutations: int,
                       rng: np.random.Generator) -> tuple[float, float]:
    """Pooled Moran's I of the residual matrix E and its one-sided permutation p-value.

    :func:`spatial_ev.inference.autocorrelation.morans_i` permutes the rows of all columns
    together, so the pooled statistic of each permutation is the variance-weighted mean of the
    columns' statistics; the p-value follows the null service's rule.
    """
    den = np.einsum("ij,ij->j", E, E)
    keep = den > 1e-20 * max(float(den.sum()), 1e-300)
    if not keep.any():
        return float("nan"), 1.0
    weight = den[keep] / den[keep].sum()
    result = morans_i(E[:, keep], W, n_permutations=n_permutations, seed=rng)
    observed = float(result.statistic.to_numpy() @ weight)
    return observed, permutation_p_value(observed, result.null_distribution @ weight)
