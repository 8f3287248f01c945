"""Beta diversity as the total variance of the community table, and its site and species shares.

Local contributions to beta diversity (LCBD) and species contributions (SCBD) follow Legendre &
De Cáceres (2013, Ecology Letters 16:951–963): with ``s_ij = (y_ij − ȳ_j)²`` on a transformed
table (Hellinger or chord by default), ``SS = Σ s_ij``, ``BD_total = SS/(n − 1)``,
``LCBD_i = Σ_j s_ij / SS`` and ``SCBD_j = Σ_i s_ij / SS``.

This module holds the statistics; the permutation test of each site's LCBD is in
:mod:`spatial_ev.inference.lcbd`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from spatial_ev._validation import as_matrix
from spatial_ev.errors import InputError

__all__ = ["BetaComponents", "beta_components"]


@dataclass(frozen=True)
class BetaComponents:
    """Total beta diversity and its site (LCBD) and species (SCBD) shares.

    Attributes
    ----------
    total : float
        ``BD_total = SS/(n − 1)``; at most 1 for Hellinger- or chord-transformed data.
    sum_of_squares : float
        ``SS``, the total sum of squares of the table.
    lcbd : pandas.Series
        Shape (n_sites,), sums to 1, indexed by site id.
    scbd : pandas.Series
        Shape (n_species,), sums to 1, indexed by species.
    squared_deviations : ndarray, shape (n_sites, n_species)
        ``s_ij = (y_ij − ȳ_j)²``; the LCBD test permutes its columns.
    """

    total: float
    sum_of_squares: float
    lcbd: pd.Series
    scbd: pd.Series
    squared_deviations: np.ndarray = field(repr=False)


def beta_components(Y: Any) -> BetaComponents:
    """Total beta diversity, LCBD and SCBD of a (transformed) community table.

    Parameters
    ----------
    Y : array-like or DataFrame, shape (n_sites, n_species)
        An already transformed community table (e.g. ``transform(counts, "hellinger")``);
        at least 2 sites, no missing values, not every site the same.

    Returns
    -------
    BetaComponents

    Examples
    --------
    >>> hel = np.sqrt(np.array([[10, 10, 20], [10, 15, 10], [15, 5, 5]]) /
    ...               np.array([[40], [35], [25]]))
    >>> round(beta_components(hel).total, 6)
    0.051486
    """
    y, rows, cols = as_matrix("Y", Y, min_rows=2)
    rows = pd.RangeIndex(y.shape[0]) if rows is None else rows
    cols = pd.RangeIndex(y.shape[1]) if cols is None else cols
    s = (y - y.mean(axis=0)) ** 2
    ss = float(s.sum())
    if ss <= 0:
        raise InputError("`Y` has no variation (every site has the same composition); "
                         "beta diversity is zero and LCBD is undefined")
    return BetaComponents(total=ss / (y.shape[0] - 1), sum_of_squares=ss,
                          lcbd=pd.Series(s.sum(axis=1) / ss, index=rows, name="lcbd"),
                          scbd=pd.Series(s.sum(axis=0) / ss, index=cols, name="scbd"),
                          squared_deviations=s)
