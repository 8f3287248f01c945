"""Beta diversity as the total variance of the community table, and its site and species shares.

Local contributions to beta diversity (LCBD) and species contributions (SCBD) follow Legendre &
De Cáceres (2013, Ecology Letters 16:951–963): with ``s_ij = (y_ij − ȳ_j)²`` on a transformed
table (Hellinger or chord by default), ``SS = Σ s_ij``, ``BD_total = SS/(n − 1)``,
``LCBD_i = Σ_j s_ij / SS`` and ``SCBD_j = Σ_i s_ij / SS``.

The LCBD test permutes each species column independently (which keeps each species' values and
the total SS, and breaks the association among species within sites): a site is significant when
its composition is unusual compared with random recombinations of the same species' values.
Limits: the test is per site, so many sites mean many tests — the result carries Holm-adjusted
p-values as well; an unusual site is unusual in composition (rich, poor, or different), not
necessarily of conservation value.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from spatial_ev._validation import as_matrix, check_int, check_rng
from spatial_ev.errors import InputError

__all__ = ["beta_diversity", "BetaDiversity"]

_BLOCK = 64  # permutations generated per seed block (independent of memory chunking)


@dataclass(frozen=True)
class BetaDiversity:
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
    p_value : pandas.Series or None
        Shape (n_sites,): permutation p-value of each LCBD, ``(k + 1)/(N + 1)``.
    p_holm : pandas.Series or None
        The same p-values adjusted for testing every site (Holm 1979).
    n_permutations : int
    """

    total: float
    sum_of_squares: float
    lcbd: pd.Series
    scbd: pd.Series
    p_value: pd.Series | None
    p_holm: pd.Series | None
    n_permutations: int

    def to_frame(self) -> pd.DataFrame:
        """Site table: LCBD, p-value and Holm-adjusted p-value."""
        frame = pd.DataFrame({"lcbd": self.lcbd})
        if self.p_value is not None:
            frame["p"] = self.p_value
            frame["p_holm"] = self.p_holm
        return frame


def beta_diversity(Y, *, n_permutations: int = 999, seed=None,
                   chunk_size: int = 16) -> BetaDiversity:
    """Compute total beta diversity, LCBD (with a permutation test) and SCBD.

    Parameters
    ----------
    Y : array-like or DataFrame, shape (n_sites, n_species)
        An already transformed community table (e.g. ``transform(counts, "hellinger")``).
    n_permutations : int, keyword-only
        Permutations for the LCBD test; 0 skips the test.
    seed : None, int or numpy.random.Generator, keyword-only
    chunk_size : int, keyword-only
        Permutations evaluated per vectorised step; memory O(chunk_size · n · p). The result
        does not depend on it.

    Examples
    --------
    >>> import numpy as np
    >>> hel = np.sqrt(np.array([[10, 10, 20], [10, 15, 10], [15, 5, 5]]) /
    ...               np.array([[40], [35], [25]]))
    >>> res = beta_diversity(hel, n_permutations=0)
    >>> round(res.total, 6)
    0.051486
    """
    y, rows, cols = as_matrix("Y", Y, min_rows=2)
    n_permutations = check_int("n_permutations", n_permutations, low=0)
    chunk_size = check_int("chunk_size", chunk_size, low=1)
    rows = pd.RangeIndex(y.shape[0]) if rows is None else rows
    cols = pd.RangeIndex(y.shape[1]) if cols is None else cols
    s = (y - y.mean(axis=0)) ** 2
    ss = float(s.sum())
    if ss <= 0:
        raise InputError("`Y` has no variation (every site has the same composition); "
                         "beta diversity is zero and LCBD is undefined")
    lcbd = s.sum(axis=1) / ss
    scbd = s.sum(axis=0) / ss
    p = p_holm = None
    if n_permutations:
        exceed = _count_exceedances(s, lcbd * ss, n_permutations, check_rng(seed), chunk_size)
        p_arr = (exceed + 1.0) / (n_permutations + 1.0)
        p = pd.Series(p_arr, index=rows, name="p")
        p_holm = pd.Series(_holm(p_arr), index=rows, name="p_holm")
    return BetaDiversity(total=ss / (y.shape[0] - 1), sum_of_squares=ss,
                         lcbd=pd.Series(lcbd, index=rows, name="lcbd"),
                         scbd=pd.Series(scbd, index=cols, name="scbd"),
                         p_value=p, p_holm=p_holm, n_permutations=n_permutations)


def _count_exceedances(s: np.ndarray, observed: np.ndarray, n_permutations: int,
                       rng: np.random.Generator, chunk_size: int) -> np.ndarray:
    """Count, per site, permutations whose row sum of ``s`` reaches the observed one.

    Column means are invariant under within-column permutation, so permuting the squared
    deviations ``s`` column by column is the same as permuting ``Y`` and recomputing.
    Permutation keys come from seed blocks of fixed size, so the counts do not depend on
    ``chunk_size``.
    """
    n, p = s.shape
    seeds = rng.bit_generator.seed_seq.spawn(-(-n_permutations // _BLOCK)) \
        if hasattr(rng.bit_generator, "seed_seq") else None
    if seeds is None:  # pragma: no cover - every numpy BitGenerator has seed_seq
        raise InputError("the random generator cannot spawn independent streams")
    tol = observed * (1 - 1e-10)
    exceed = np.zeros(n)
    col = np.arange(p)
    for b, block_seed in enumerate(seeds):
        size = min(_BLOCK, n_permutations - b * _BLOCK)
        stream = np.random.default_rng(block_seed)
        for start in range(0, size, chunk_size):
            # drawing the block's keys in pieces consumes the same stream as one draw
            keys = stream.random((min(chunk_size, size - start), n, p))
            order = np.argsort(keys, axis=1)  # an independent permutation of each column
            sums = s[order, col].sum(axis=2)  # (chunk, n)
            exceed += (sums >= tol).sum(axis=0)
    return exceed


def _holm(p: np.ndarray) -> np.ndarray:
    """Holm's step-down adjustment (Holm 1979, Scand. J. Statist. 6:65–70)."""
    m = p.size
    order = np.argsort(p)
    adjusted = np.minimum(1.0, np.maximum.accumulate(p[order] * (m - np.arange(m))))
    out = np.empty(m)
    out[order] = adjusted
    return out
