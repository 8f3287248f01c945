"""Beta diversity with a permutation test of each site's local contribution (LCBD).

The statistics (``BD_total``, LCBD, SCBD; Legendre & De Cáceres 2013, Ecology Letters
16:951–963) come from :func:`spatial_ev.stats.beta.beta_components`. The test permutes each
species column independently (which keeps each species' values and the total SS, and breaks the
association among species within sites): a site is significant when its composition is unusual
compared with random recombinations of the same species' values. Column means are invariant
under within-column permutation, so permuting the squared deviations ``s`` column by column is
the same as permuting ``Y`` and recomputing.

p-values, tie rule, seed blocks and run options are those of the null service
(:mod:`spatial_ev.inference.null`). The column orders are the argsort of uniform keys drawn in
seed blocks of ``LCBD_BLOCK_SIZE`` spawned from the seed's own sequence; keys are drawn piece by
piece inside a block (memory O(piece · n · p)), which gives the same keys as one draw.

Limits: the test is per site, so many sites mean many tests — the result carries Holm-adjusted
p-values as well; an unusual site is unusual in composition (rich, poor, or different), not
necessarily of conservation value.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from spatial_ev.inference.multiple import holm_adjust
from spatial_ev.inference.null import (RunOptions, SeedBlocks, count_as_extreme,
                                       p_value_from_count, seed_blocks)
from spatial_ev.stats.beta import beta_components

__all__ = ["beta_diversity", "BetaDiversity", "ColumnOrders", "LCBD_BLOCK_SIZE"]

LCBD_BLOCK_SIZE = 64     # part of the test's random stream: changing it changes the p-values
_PIECE_BYTES = 8 * 2 ** 20


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


@dataclass(frozen=True)
class ColumnOrders:
    """``draw(rng, m)``: m independent orders of each of p columns of n sites, shape (m, n, p).

    The argsort of uniform keys ``rng.random((m, n, p))``, so drawing m₁ then m₂ orders from
    one generator gives the same orders as drawing m₁ + m₂ (what
    :meth:`~spatial_ev.inference.null.SeedBlocks.pieces` needs).

    Examples
    --------
    >>> ColumnOrders(4, 3)(np.random.default_rng(1), 2).shape
    (2, 4, 3)
    """

    n: int
    p: int

    def __call__(self, rng: np.random.Generator, m: int) -> np.ndarray:
        return np.argsort(rng.random((m, self.n, self.p)), axis=1)


@dataclass(frozen=True)
class _Kernel:
    """Per site, the number of permutations in a range whose SS reaches the observed one."""

    squared: np.ndarray       # s (n, p)
    observed: np.ndarray      # SS of each site (n,)
    blocks: SeedBlocks

    def __call__(self, task: tuple[int, int]) -> np.ndarray:
        n, p = self.squared.shape
        piece = max(1, _PIECE_BYTES // (8 * n * p))
        col = np.arange(p)
        count = np.zeros(n, dtype=np.int64)
        for orders in self.blocks.pieces(*task, piece):
            sums = self.squared[orders, col].sum(axis=2)       # (m, n)
            count += count_as_extreme(self.observed, sums)
        return count


def beta_diversity(Y: Any, *, n_permutations: int = 999,
                   seed: None | int | np.random.Generator = None,
                   chunk_size: int | None = None, engine: str = "local", scheduler: Any = None,
                   n_workers: int | None = None,
                   progress: Callable[[int, int], Any] | None = None) -> BetaDiversity:
    """Compute total beta diversity, LCBD (with a permutation test) and SCBD.

    Parameters
    ----------
    Y : array-like or DataFrame, shape (n_sites, n_species)
        An already transformed community table (e.g. ``transform(counts, "hellinger")``).
    n_permutations : int, keyword-only
        Permutations for the LCBD test; 0 skips the test.
    seed : None, int or numpy.random.Generator, keyword-only
        The same seed gives the same p-values.
    chunk_size : int, keyword-only
        Permutations per task handed to the engine (default 256); does not change results.
        Inside a task, memory stays O(piece · n · p) with pieces of about 8 MiB.
    engine, scheduler, n_workers, progress : keyword-only
        Where the tasks run (see :func:`spatial_ev.inference.engines.run_tasks`); they do not
        change results.

    Returns
    -------
    BetaDiversity

    Examples
    --------
    >>> import numpy as np
    >>> hel = np.sqrt(np.array([[10, 10, 20], [10, 15, 10], [15, 5, 5]]) /
    ...               np.array([[40], [35], [25]]))
    >>> res = beta_diversity(hel, n_permutations=0)
    >>> round(res.total, 6)
    0.051486
    """
    options = RunOptions.checked(n_permutations, seed=seed, chunk_size=chunk_size,
                                 engine=engine, scheduler=scheduler, n_workers=n_workers,
                                 progress=progress)
    parts = beta_components(Y)
    rows = parts.lcbd.index
    p = p_holm = None
    if options.n_permutations:
        count = _lcbd_counts(parts.squared_deviations,
                             parts.lcbd.to_numpy() * parts.sum_of_squares, options)
        p_arr = p_value_from_count(count, options.n_permutations)
        p = pd.Series(p_arr, index=rows, name="p")
        p_holm = pd.Series(holm_adjust(p_arr), index=rows, name="p_holm")
    return BetaDiversity(total=parts.total, sum_of_squares=parts.sum_of_squares,
                         lcbd=parts.lcbd, scbd=parts.scbd, p_value=p, p_holm=p_holm,
                         n_permutations=options.n_permutations)


def _lcbd_counts(squared: np.ndarray, observed: np.ndarray, options: RunOptions) -> np.ndarray:
    """Per site, the permutations whose SS reaches the observed SS (tie rule of the service)."""
    n, p = squared.shape
    blocks = seed_blocks(options.seed, ColumnOrders(n, p), block_size=LCBD_BLOCK_SIZE,
                         derivation="spawn", n_draws=options.n_permutations)
    (parts,) = options.run([_Kernel(squared, observed, blocks)])
    return np.sum(parts, axis=0)
