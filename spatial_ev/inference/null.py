"""The one null-distribution service: the p-value and tie rule, the seed-block scheme and the
run options that every resampling test of the package shares.

p-value. ``(k + 1) / (N + 1)`` with k the number of resampled statistics at least as extreme as
the observed one (Phipson & Smyth 2010, Stat. Appl. Genet. Mol. Biol. 9:39 [memory]). A
resampled value counts as "as extreme" when it is within a relative ``TIE_TOLERANCE`` of the
observed one, so that rounding in the last digits (the identity permutation, symmetric designs)
never turns a tie into a miss.

Seed blocks. Resampled quantities (permutations, sign vectors, ...) are drawn in fixed blocks of
``BLOCK_SIZE`` from ``SeedSequence(entropy, spawn_key=(block,))``, where ``entropy`` is drawn
once from the user's seed. A task that needs draws ``start`` to ``stop - 1`` regenerates exactly
those, so the same seed gives the same null distribution whatever the chunk size, thread count,
engine or number of workers.

Run options. The number of resamples, chunk size, engine and progress callback are checked by
one function with one rule (:func:`check_run_options`); progress callbacks have one shape,
``progress(done, total)``.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from spatial_ev._validation import check_int, check_option
from spatial_ev.errors import InputError
from spatial_ev.inference.engines import ENGINES

__all__ = ["BLOCK_SIZE", "TIE_TOLERANCE", "DEFAULT_CHUNK", "SeedBlocks", "seed_blocks",
           "permutation_p_value", "check_run_options"]

BLOCK_SIZE = 128
TIE_TOLERANCE = 1e-10
DEFAULT_CHUNK = 2 * BLOCK_SIZE


@dataclass(frozen=True)
class SeedBlocks:
    """Draws of a resampling scheme in fixed, independently seeded blocks.

    Attributes
    ----------
    entropy : int
        Drawn once from the user's seed (:func:`seed_blocks`).
    draw : callable
        ``draw(rng, m) -> ndarray`` of shape ``(m, ...)``: ``m`` draws from generator ``rng``.

    Examples
    --------
    >>> blocks = seed_blocks(np.random.default_rng(5), lambda rng, m: rng.permutation(
    ...     np.tile(np.arange(4), (m, 1)), axis=1))
    >>> np.array_equal(blocks.rows(3, 200)[:2], blocks.rows(0, 5)[3:5])
    True
    """

    entropy: int
    draw: Callable[[np.random.Generator, int], np.ndarray]

    def block(self, b: int) -> np.ndarray:
        """Draws number ``b * BLOCK_SIZE`` to ``(b + 1) * BLOCK_SIZE - 1``."""
        rng = np.random.Generator(np.random.PCG64(
            np.random.SeedSequence(self.entropy, spawn_key=(b,))))
        return self.draw(rng, BLOCK_SIZE)

    def rows(self, start: int, stop: int) -> np.ndarray:
        """Draws number ``start`` to ``stop - 1``, shape ``(stop - start, ...)``."""
        first, last = start // BLOCK_SIZE, (stop - 1) // BLOCK_SIZE
        drawn = np.concatenate([self.block(b) for b in range(first, last + 1)])
        return drawn[start - first * BLOCK_SIZE: stop - first * BLOCK_SIZE]


def seed_blocks(rng: np.random.Generator,
                draw: Callable[[np.random.Generator, int], np.ndarray]) -> SeedBlocks:
    """The seed-block scheme of a resampling test: entropy drawn once from ``rng``.

    Parameters
    ----------
    rng : numpy.random.Generator
        The generator made from the user's seed at the public boundary.
    draw : callable
        ``draw(rng, m)``: ``m`` draws of the scheme (rows of the returned array).

    Returns
    -------
    SeedBlocks

    Examples
    --------
    >>> blocks = seed_blocks(np.random.default_rng(1), lambda rng, m: rng.random((m, 2)))
    >>> blocks.rows(0, 3).shape
    (3, 2)
    """
    if not isinstance(rng, np.random.Generator):
        raise InputError(f"`rng` must be a numpy.random.Generator; got {type(rng).__name__}")
    if not callable(draw):
        raise InputError("`draw` must be a callable draw(rng, m)")
    return SeedBlocks(int(rng.integers(0, 2 ** 63)), draw)


def permutation_p_value(observed: float, null: np.ndarray) -> float:
    """``(k + 1)/(N + 1)``: k resampled statistics ≥ the observed one (within the tie rule).

    Parameters
    ----------
    observed : float
        The statistic of the data (larger = more extreme).
    null : ndarray, shape (N,)
        Resampled statistics; NaN when N = 0.

    Examples
    --------
    >>> permutation_p_value(2.0, np.array([1.0, 2.0, 3.0]))
    0.75
    """
    null = np.asarray(null, dtype=float)
    if null.size == 0:
        return float("nan")
    k = int(np.count_nonzero(null >= observed * (1.0 - TIE_TOLERANCE)))
    return (k + 1) / (null.size + 1)


def check_run_options(n_permutations, chunk_size, engine, progress, *,
                      count_name: str = "n_permutations") -> tuple[int, int, str]:
    """Validate the options every batched resampling test shares (count named by the caller).

    Returns
    -------
    (n_permutations, chunk_size, engine)
        ``chunk_size`` defaults to ``DEFAULT_CHUNK``.

    Examples
    --------
    >>> check_run_options(99, None, "local", None)
    (99, 256, 'local')
    """
    n_permutations = check_int(count_name, n_permutations, low=0)
    if chunk_size is not None:
        chunk_size = check_int("chunk_size", chunk_size, low=1)
    engine = check_option("engine", engine, ENGINES)
    if progress is not None and not callable(progress):
        raise InputError("parameter `progress` must be a callable progress(done, total) or None")
    return n_permutations, chunk_size or DEFAULT_CHUNK, engine
