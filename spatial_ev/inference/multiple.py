"""Adjustment of p-values for multiple tests."""

from __future__ import annotations

import numpy as np

from spatial_ev.errors import InputError

__all__ = ["holm_adjust"]


def holm_adjust(p_values: np.ndarray) -> np.ndarray:
    """Holm's step-down adjustment of a family of p-values (Holm 1979, Scand. J. Statist.
    6:65–70); NaN entries stay NaN and do not count in the family.

    Parameters
    ----------
    p_values : array, shape (m,)
        Unadjusted p-values in [0, 1] (NaN for tests that could not be made).

    Returns
    -------
    ndarray, shape (m,)
        Adjusted p-values, in the input order.

    Examples
    --------
    >>> holm_adjust(np.array([0.01, 0.04, 0.03])).round(3).tolist()
    [0.03, 0.06, 0.06]
    """
    p = np.asarray(p_values, dtype=np.float64)
    if p.ndim != 1:
        raise InputError(f"`p_values` must be one-dimensional; got shape {p.shape}")
    valid = ~np.isnan(p)
    if ((p[valid] < 0) | (p[valid] > 1)).any():
        raise InputError("`p_values` must lie in [0, 1]; pass p-values, not statistics")
    out = np.full(p.shape, np.nan)
    q = p[valid]
    m = q.size
    if m == 0:
        return out
    order = np.argsort(q, kind="stable")
    adjusted = np.minimum(1.0, np.maximum.accumulate(q[order] * (m - np.arange(m))))
    ranked = np.empty(m)
    ranked[order] = adjusted
    out[valid] = ranked
    return out
