"""The linear-model core of the statistics floor, shared by RDA, the permutation tests, forward
selection and variation partitioning.

* Checks: :func:`check_response` (sites x species table), :func:`check_explanatory` (an
  explanatory or conditioning table, aligned with the response) and :func:`check_rows` (same
  rows, same site ids in the same order).
* Rank-revealing basis: :func:`column_basis`, a column-pivoted QR of the centred, unit-length
  columns, after removing a conditioning basis; columns whose pivot falls below
  ``RANK_TOLERANCE`` are dropped.
* :class:`LinearModel` (checked, centred inputs of a possibly partial model) from
  :func:`prepare_model`; :func:`model_fraction` gives its R², adjusted R² and rank; the public
  :func:`explained_fraction` does the same from tables.
* :func:`adjusted_r2` (Ezekiel 1930; unbiased for RDA, Peres-Neto, Legendre, Dray & Borcard
  2006, Ecology 87:2614-2625) and :func:`reduce_response` (the n x rank singular-value form of a
  response with more species than sites, same sums of squares).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
import pandas as pd
import scipy.linalg

from spatial_ev._validation import as_matrix
from spatial_ev.errors import InputError

__all__ = ["RANK_TOLERANCE", "TINY", "Table", "check_response", "check_explanatory", "check_rows",
           "has_site_ids", "column_basis", "adjusted_r2", "LinearModel", "prepare_model",
           "ExplainedFraction", "model_fraction", "explained_fraction", "reduce_response"]


RANK_TOLERANCE = 1e-10


Table = pd.DataFrame | pd.Series | np.ndarray   # sites x variables; labels kept when given


TINY = np.finfo(np.float64).tiny


def check_response(Y) -> tuple[np.ndarray, pd.Index | None, pd.Index | None]:
    y, rows, cols = as_matrix("Y", Y, min_rows=3)
    if not (np.ptp(y, axis=0) > 0).any():
        raise InputError("`Y` has the same values at every site, so there is no variation to "
                         "explain; check that the right table was passed")
    return y, rows, cols


def check_explanatory(name: str, X, n_sites: int, rows: pd.Index | None):
    x, xrows, xcols = as_matrix(name, X)
    if x.shape[0] != n_sites:
        raise InputError(f"`{name}` has {x.shape[0]} rows but `Y` has {n_sites} sites; both "
                         "must describe the same sites in the same order")
    if rows is not None and xrows is not None and not xrows.equals(rows):
        bad = int(np.flatnonzero(np.asarray(xrows) != np.asarray(rows))[0]) \
            if len(xrows) == len(rows) else 0
        raise InputError(f"`{name}` and `Y` list different sites or a different order: row "
                         f"{bad} is site {xrows[bad]!r} in `{name}` but {rows[bad]!r} in `Y`; "
                         f"align them first, e.g. `{name}.loc[Y.index]`")
    if xcols is None:
        xcols = pd.Index([f"x{i + 1}" for i in range(x.shape[1])])
    return x, xcols


def column_basis(x: np.ndarray, against: np.ndarray | None = None
                  ) -> tuple[np.ndarray, np.ndarray]:
    """Orthonormal basis of the centred columns of ``x`` after removing span(``against``).

    Returns ``(Q, kept)`` with Q of shape (n, rank), orthogonal to the constant and to
    ``against``, and ``kept`` the indices of the columns of ``x`` that span it.
    """
    n = x.shape[0]
    xc = x - x.mean(axis=0)
    ref = np.linalg.norm(xc, axis=0)
    raw = np.linalg.norm(x, axis=0)
    ok = np.flatnonzero(ref > RANK_TOLERANCE * np.maximum(raw, TINY))
    if ok.size == 0:
        return np.zeros((n, 0)), ok
    xn = xc[:, ok] / ref[ok]
    if against is not None and against.shape[1]:
        for _ in range(2):  # twice: re-orthogonalisation keeps rounding errors at eps level
            xn -= against @ (against.T @ xn)
    q, r, piv = scipy.linalg.qr(xn, mode="economic", pivoting=True, check_finite=False)
    rank = int(np.count_nonzero(np.abs(np.diag(r)) > RANK_TOLERANCE))
    return np.ascontiguousarray(q[:, :rank]), ok[piv[:rank]]


def adjusted_r2(r2: float, n_sites: int, n_predictors: int) -> float:
    """Ezekiel's adjusted R²: ``1 - (1 - R²)(n - 1)/(n - m - 1)`` (Ezekiel 1930).

    Unbiased for RDA where the raw R² is not (Peres-Neto et al. 2006). Returns NaN when the
    model is saturated (``n - m - 1 <= 0``) and ``r2`` itself when ``m = 0``.

    Examples
    --------
    >>> round(adjusted_r2(0.5, 20, 5), 6)
    0.321429
    """
    if n_predictors == 0:
        return float(r2)
    df = n_sites - n_predictors - 1
    if df <= 0:
        return float("nan")
    return float(1.0 - (1.0 - r2) * (n_sites - 1) / df)


@dataclass(frozen=True)
class LinearModel:
    """Checked and centred inputs of a (partial) linear model, shared with the permutations."""

    y: np.ndarray            # (n, p) centred response
    rows: pd.Index | None
    cols: pd.Index | None
    qw: np.ndarray           # (n, q) basis of the centred conditioning table
    qx: np.ndarray           # (n, r) basis of the centred X after removing W
    x: np.ndarray | None     # (n, m) X as given (None without X)
    x_cols: pd.Index
    x_kept: np.ndarray       # columns of X spanning qx
    w_cols: pd.Index

    @property
    def n(self) -> int:
        return self.y.shape[0]


def prepare_model(Y, X, conditioning, *, require_x: bool = False) -> LinearModel:
    y, rows, cols = check_response(Y)
    n = y.shape[0]
    yc = y - y.mean(axis=0)
    qw, w_cols = np.zeros((n, 0)), pd.Index([])
    if conditioning is not None:
        w, w_cols = check_explanatory("conditioning", conditioning, n, rows)
        qw, _ = column_basis(w)
    if X is None:
        if require_x:
            raise InputError("`X` is required: pass the explanatory table (sites x variables)")
        return LinearModel(yc, rows, cols, qw, np.zeros((n, 0)), None, pd.Index([]),
                      np.zeros(0, int), w_cols)
    x, x_cols = check_explanatory("X", X, n, rows)
    qx, kept = column_basis(x, qw)
    if qx.shape[1] == 0:
        what = "constant or fully explained by `conditioning`" if qw.shape[1] else "constant"
        raise InputError(f"`X` has no usable variation: every column is {what}; "
                         "pass explanatory variables that vary among sites")
    if n - qw.shape[1] - qx.shape[1] - 1 <= 0:
        raise InputError(
            f"the model has {qw.shape[1] + qx.shape[1]} independent predictors for {n} sites, "
            "which leaves no residual degrees of freedom; use fewer predictors (e.g. forward "
            "selection) or more sites")
    return LinearModel(yc, rows, cols, qw, qx, x, x_cols, kept, w_cols)


class ExplainedFraction(NamedTuple):
    """R², adjusted R² and rank of a (partial) linear model (see :func:`explained_fraction`)."""

    r2: float
    r2_adj: float
    rank: int


def model_fraction(model: LinearModel) -> ExplainedFraction:
    n, q, r = model.n, model.qw.shape[1], model.qx.shape[1]
    ss_total = float(np.einsum("ij,ij->", model.y, model.y))
    ss_w = float(np.square(model.qw.T @ model.y).sum()) if q else 0.0
    ss_x = float(np.square(model.qx.T @ model.y).sum()) if r else 0.0
    r2_w, r2_xw = ss_w / ss_total, (ss_w + ss_x) / ss_total
    adj = adjusted_r2(r2_xw, n, q + r) - (adjusted_r2(r2_w, n, q) if q else 0.0)
    return ExplainedFraction(r2_xw - r2_w, adj, r)


def explained_fraction(Y: Table, X: Table, *,
                       conditioning: Table | None = None) -> ExplainedFraction:
    """R², adjusted R² and rank of the regression of Y on X (after ``conditioning``), no scores.

    The fast path of :func:`redundancy_analysis` for model comparison and variation
    partitioning. With ``conditioning`` W the values are those of X *given* W, as fractions of
    the total variation of Y: ``r2 = R²(X+W) - R²(W)``, ``r2_adj = R²adj(X+W) - R²adj(W)``
    (Peres-Neto et al. 2006), ``rank`` = number of independent columns X adds to W.

    Parameters
    ----------
    Y : DataFrame or array, shape (n_sites, n_species)
    X : DataFrame or array, shape (n_sites, n_variables)
    conditioning : DataFrame or array, shape (n_sites, n_covariables), optional

    Returns
    -------
    ExplainedFraction
        Named tuple ``(r2, r2_adj, rank)``.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(2024)
    >>> x = rng.normal(size=(30, 2)); y = x @ rng.normal(size=(2, 4)) + rng.normal(size=(30, 4))
    >>> explained_fraction(y, x).rank
    2
    """
    return model_fraction(prepare_model(Y, X, conditioning, require_x=True))


def check_rows(name, arr, rows, n, y_rows):
    """Same number of rows as Y and, when both carry site ids, the same ids in the same order.

    A default 0..n−1 index (a table built from a bare array) carries no site ids.
    """
    if arr.shape[0] != n:
        raise InputError(f"`{name}` has {arr.shape[0]} rows but `Y` has {n}; every table must "
                         f"have one row per site")
    if has_site_ids(rows) and has_site_ids(y_rows) and not rows.equals(y_rows):
        diff = next(i for i, (a, b) in enumerate(zip(rows, y_rows)) if a != b)
        raise InputError(f"`{name}` rows are not the sites of `Y` in the same order: row {diff} "
                         f"is {rows[diff]!r} but `Y` has {y_rows[diff]!r}; reindex it like `Y`")


def has_site_ids(index) -> bool:
    return index is not None and not (isinstance(index, pd.RangeIndex) and index.start == 0
                                      and index.step == 1 and index.name is None)


def reduce_response(response: np.ndarray) -> np.ndarray:
    """More species than sites: keep the n x rank singular-value form (same sums of squares)."""
    n, p = response.shape
    if p <= n:
        return np.ascontiguousarray(response)
    u, s, _ = np.linalg.svd(response, full_matrices=False)
    keep = s > s[0] * max(n, p) * np.finfo(float).eps
    return np.ascontiguousarray(u[:, keep] * s[keep])
