"""The one null-distribution service: the p-value and tie rule, the seed-block scheme and the
run options that every resampling test of the package shares.

p-value. ``(k + 1) / (N + 1)`` with k the number of resampled statistics at least as extreme as
the observed one (Phipson & Smyth 2010, Stat. Appl. Genet. Mol. Biol. 9:39 [memory]); NaN when
N = 0. Tie rule: a resampled value counts as "as extreme" when it is within a relative
``TIE_TOLERANCE`` of the observed one (``null >= observed·(1 − TIE_TOLERANCE)`` for a
non-negative observed value, ``null >= observed·(1 + TIE_TOLERANCE)`` for a negative one), so
that rounding in the last digits (the identity permutation, symmetric designs) never turns a
tie into a miss. Other alternatives are the same rule on a transformed statistic: ``"less"``
on −T, ``"two_sided"`` on |T − centre| (:func:`count_as_extreme`).

Seed blocks. Resampled quantities (permutations, sign vectors, random keys, ...) are drawn in
fixed blocks of ``block_size`` (default ``BLOCK_SIZE``); block b comes from its own generator
``PCG64(SeedSequence(entropy, spawn_key=key + (offset + b,)))``. A task that needs draws
``start`` to ``stop - 1`` regenerates exactly those, so the same seed gives the same null
distribution whatever the chunk size, thread count, engine or number of workers. The entropy
and key come from the user's generator in one of two ways (:func:`seed_blocks`): one integer
drawn from it (the default, key ``()``), or the generator's own seed sequence, whose next
children are reserved for the blocks (``derivation="spawn"``).

Sequential decisions. A test whose only use is the decision "p ≤ α?" (a step of forward
selection) may stop drawing once that decision is settled (:class:`SequentialRule`,
:func:`sequential_decision`). The null distribution is drawn in rounds ending at fixed looks
(multiples of ``look_every`` permutations, and the maximum N), so the same seed stops at the
same permutation whatever the chunk size, engine or number of workers. Two boundaries:

* not significant: stop at the h-th exceedance, h = the smallest count with h/N > α
  (Besag & Clifford 1991, Biometrika 78:301–304 [paper]); p = h/L with L the draw at which the
  h-th exceedance occurred. Any count ≥ h makes the fixed-count p (k + 1)/(N + 1) exceed α as
  well, so this stop never changes the decision the full N permutations would give.
* significant: stop at a look after L draws with k exceedances when P(Bin(L, α) ≤ k) is at
  most that look's share of the risk ε and (k + 1)/(L + 1) ≤ α; shares follow the spending
  function ε·L/(L + 1000) of Gandy (2009, JASA 104:1504–1511 [paper]). Permutations are drawn
  independently, so when the p-value over all permutations is ≥ α the chance of ever stopping
  here is at most Σ shares ≤ ε (union bound over the looks [derived]). The p reported is
  (k + 1)/(L + 1) over the L drawn (below α; an estimate, the decision is what is bounded).

Without an early stop the test ends at N with the fixed-count p-value and decision.

Run options. The number of resamples, seed, engine, scheduler, workers, chunk size and progress
callback travel together as one frozen :class:`RunOptions`, validated once by
:meth:`RunOptions.checked` (one rule: count ≥ 0, chunk ≥ 1, engine one of ``ENGINES``, a
scheduler only with dask, workers ≥ 1, ``progress(done, total)`` callable or None).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import stats

from spatial_ev._validation import check_int, check_option, check_real, check_rng
from spatial_ev.errors import InputError
from spatial_ev.inference.engines import ENGINES, run_tasks

__all__ = ["BLOCK_SIZE", "TIE_TOLERANCE", "DEFAULT_CHUNK", "ALTERNATIVES", "SeedBlocks",
           "seed_blocks", "FreePermutations", "count_as_extreme", "p_value_from_count",
           "permutation_p_values", "permutation_p_value", "RunOptions",
           "check_run_options", "SequentialRule", "SequentialOutcome", "sequential_decision"]

BLOCK_SIZE = 128
TIE_TOLERANCE = 1e-10
DEFAULT_CHUNK = 2 * BLOCK_SIZE
ALTERNATIVES = ("greater", "less", "two_sided")
_DERIVATIONS = ("draw", "spawn")


# ----------------------------------------------------------------------------------------------
# seed blocks
# ----------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class SeedBlocks:
    """Draws of a resampling scheme in fixed, independently seeded blocks.

    Attributes
    ----------
    entropy : int or tuple of int
        Entropy of every block's seed sequence (:func:`seed_blocks`).
    draw : callable
        ``draw(rng, m) -> ndarray`` of shape ``(m, ...)``: ``m`` draws from generator ``rng``.
        Must be picklable for the dask engine (a top-level function or class instance).
    spawn_key : tuple of int
        Key prefix of the blocks' seed sequences; block b has key ``spawn_key + (offset + b,)``.
    offset : int
        Number of the first block's child key.
    block_size : int
        Draws per block.

    Examples
    --------
    >>> blocks = seed_blocks(np.random.default_rng(5), FreePermutations(4))
    >>> np.array_equal(blocks.rows(3, 200)[:2], blocks.rows(0, 5)[3:5])
    True
    """

    entropy: int | tuple[int, ...]
    draw: Callable[[np.random.Generator, int], np.ndarray]
    spawn_key: tuple[int, ...] = ()
    offset: int = 0
    block_size: int = BLOCK_SIZE

    def generator(self, b: int) -> np.random.Generator:
        """The generator of block ``b`` (fresh at every call)."""
        return np.random.Generator(np.random.PCG64(np.random.SeedSequence(
            self.entropy, spawn_key=self.spawn_key + (self.offset + b,))))

    def block(self, b: int) -> np.ndarray:
        """Draws number ``b * block_size`` to ``(b + 1) * block_size - 1``."""
        return self.draw(self.generator(b), self.block_size)

    def rows(self, start: int, stop: int) -> np.ndarray:
        """Draws number ``start`` to ``stop - 1``, shape ``(stop - start, ...)``."""
        first, last = start // self.block_size, (stop - 1) // self.block_size
        drawn = np.concatenate([self.block(b) for b in range(first, last + 1)])
        return drawn[start - first * self.block_size: stop - first * self.block_size]

    def pieces(self, start: int, stop: int, size: int) -> Iterator[np.ndarray]:
        """Draws ``start`` to ``stop - 1`` in consecutive pieces of at most ``size`` rows.

        Each block's generator is called once per piece, so the pieces join into
        :meth:`rows` only for a *sequential* ``draw`` (``m₁`` then ``m₂`` draws from one
        generator equal ``m₁ + m₂`` draws, e.g. ``rng.random((m, ...))`` and functions of it
        row by row). Memory stays O(size) draws whatever the block size.
        """
        b = start // self.block_size
        while start < stop:
            rng = self.generator(b)
            position = b * self.block_size
            end = min(position + self.block_size, stop)
            while position < start:                 # skip the draws before start
                m = min(size, start - position)
                self.draw(rng, m)
                position += m
            while position < end:
                m = min(size, end - position)
                yield self.draw(rng, m)
                position += m
            start, b = end, b + 1


def seed_blocks(rng: np.random.Generator,
                draw: Callable[[np.random.Generator, int], np.ndarray], *,
                block_size: int = BLOCK_SIZE, derivation: str = "draw",
                n_draws: int | None = None) -> SeedBlocks:
    """The seed-block scheme of a resampling test, derived from the user's generator.

    Parameters
    ----------
    rng : numpy.random.Generator
        The generator made from the user's seed at the public boundary.
    draw : callable
        ``draw(rng, m)``: ``m`` draws of the scheme (rows of the returned array).
    block_size : int, keyword-only
        Draws per block (default ``BLOCK_SIZE``). Part of the stream: changing it changes the
        draws.
    derivation : {"draw", "spawn"}, keyword-only
        ``"draw"``: the entropy is one integer drawn from ``rng`` (``rng`` advances by one
        draw). ``"spawn"``: the blocks are the next ``ceil(n_draws / block_size)`` children of
        ``rng``'s own seed sequence, which are reserved (spawned) so that later children of
        that sequence never repeat them; ``rng``'s state is untouched.
    n_draws : int, keyword-only
        Number of draws the test needs; required (and only used) with ``"spawn"``.

    Returns
    -------
    SeedBlocks

    Examples
    --------
    >>> blocks = seed_blocks(np.random.default_rng(1), lambda rng, m: rng.random((m, 2)))
    >>> blocks.rows(0, 3).shape
    (3, 2)
    >>> spawned = seed_blocks(np.random.default_rng(1), lambda rng, m: rng.random((m, 2)),
    ...                       derivation="spawn", n_draws=10, block_size=4)
    >>> spawned.spawn_key, spawned.offset
    ((), 0)
    """
    if not isinstance(rng, np.random.Generator):
        raise InputError(f"`rng` must be a numpy.random.Generator; got {type(rng).__name__}")
    if not callable(draw):
        raise InputError("`draw` must be a callable draw(rng, m)")
    block_size = check_int("block_size", block_size, low=1)
    derivation = check_option("derivation", derivation, _DERIVATIONS)
    if derivation == "draw":
        return SeedBlocks(int(rng.integers(0, 2 ** 63)), draw, block_size=block_size)
    if n_draws is None:
        raise InputError("derivation='spawn' needs `n_draws`, the number of draws the test uses")
    n_draws = check_int("n_draws", n_draws, low=0)
    sequence = rng.bit_generator.seed_seq
    if not isinstance(sequence, np.random.SeedSequence):
        raise InputError("`rng` has no seed sequence to spawn from (it was built from a raw "
                         "state); make it with numpy.random.default_rng(seed)")
    first = sequence.n_children_spawned
    sequence.spawn(-(-n_draws // block_size))       # reserve the blocks' children
    entropy = sequence.entropy
    entropy = int(entropy) if np.isscalar(entropy) else tuple(int(e) for e in entropy)
    return SeedBlocks(entropy, draw, tuple(int(k) for k in sequence.spawn_key), first,
                      block_size)


@dataclass(frozen=True)
class FreePermutations:
    """``draw(rng, m)``: ``m`` unrestricted permutations of ``n`` sites, shape (m, n).

    Row i maps site positions to the position whose value they receive. Picklable, so that
    the dask engine can ship it.

    Examples
    --------
    >>> FreePermutations(5)(np.random.default_rng(3), 2).shape
    (2, 5)
    """

    n: int

    def __call__(self, rng: np.random.Generator, m: int) -> np.ndarray:
        return rng.permuted(np.broadcast_to(np.arange(self.n, dtype=np.intp), (m, self.n)),
                            axis=1)


# ----------------------------------------------------------------------------------------------
# p-values
# ----------------------------------------------------------------------------------------------

def _threshold(observed: np.ndarray) -> np.ndarray:
    """Smallest resampled value that counts as at least as large as ``observed``."""
    return np.where(observed >= 0, observed * (1.0 - TIE_TOLERANCE),
                    observed * (1.0 + TIE_TOLERANCE))


def count_as_extreme(observed: Any, null: Any, *, alternative: str = "greater",
                     centre: Any = 0.0) -> np.ndarray:
    """Number of resampled statistics at least as extreme as the observed ones (tie rule).

    Parameters
    ----------
    observed : float or ndarray, shape (p,)
        Observed statistics (one per column of ``null``).
    null : ndarray, shape (N,) or (N, p)
        Resampled statistics, one row per resample.
    alternative : {"greater", "less", "two_sided"}, keyword-only
        ``"greater"``: large values are extreme; ``"less"``: small values;
        ``"two_sided"``: values far from ``centre`` (``|T − centre|``).
    centre : float or ndarray, shape (p,), keyword-only
        Centre of the two-sided alternative (e.g. the expectation under the null).

    Returns
    -------
    ndarray of int, shape (p,) (shape () for a scalar ``observed`` and 1-d ``null``)

    Examples
    --------
    >>> count_as_extreme(2.0, np.array([1.0, 2.0, 3.0]))
    array(2)
    >>> count_as_extreme([-0.5], np.array([[0.4], [-0.6], [0.1]]), alternative="two_sided")
    array([1])
    """
    alternative = check_option("alternative", alternative, ALTERNATIVES)
    observed = np.asarray(observed, dtype=float)
    null = np.asarray(null, dtype=float)
    if observed.ndim > 1 or null.ndim != observed.ndim + 1 or null.shape[1:] != observed.shape:
        raise InputError(f"`null` must have shape (N,) for a scalar observed value or (N, p) "
                         f"for p observed values; got {null.shape} for observed shape "
                         f"{observed.shape}")
    if alternative == "less":
        observed, null = -observed, -null
    elif alternative == "two_sided":
        centre = np.asarray(centre, dtype=float)
        observed, null = np.abs(observed - centre), np.abs(null - centre)
    return np.asarray(np.count_nonzero(null >= _threshold(observed), axis=0))


def p_value_from_count(count: Any, n_resamples: int) -> np.ndarray:
    """``(k + 1) / (N + 1)`` from counts k of :func:`count_as_extreme` over N resamples.

    Examples
    --------
    >>> p_value_from_count(np.array([0, 4]), 99)
    array([0.01, 0.05])
    """
    count = np.asarray(count)
    if n_resamples == 0:
        return np.full(count.shape, np.nan)
    return (count + 1) / (n_resamples + 1)


def permutation_p_values(observed: Any, null: Any, *, alternative: str = "greater",
                         centre: Any = 0.0) -> np.ndarray:
    """p-values ``(k + 1)/(N + 1)`` of several statistics at once (NaN when N = 0).

    Parameters
    ----------
    observed : ndarray, shape (p,)
    null : ndarray, shape (N, p)
    alternative, centre
        As in :func:`count_as_extreme`.

    Examples
    --------
    >>> permutation_p_values([2.0, 0.0], np.array([[1.0, 1.0], [2.0, 1.0], [3.0, -1.0]]))
    array([0.75, 0.75])
    """
    null = np.asarray(null, dtype=float)
    return p_value_from_count(count_as_extreme(observed, null, alternative=alternative,
                                               centre=centre), null.shape[0])


def permutation_p_value(observed: float, null: np.ndarray, *, alternative: str = "greater",
                        centre: float = 0.0) -> float:
    """``(k + 1)/(N + 1)``: k resampled statistics at least as extreme (within the tie rule).

    Parameters
    ----------
    observed : float
        The statistic of the data.
    null : ndarray, shape (N,)
        Resampled statistics; NaN when N = 0.
    alternative, centre
        As in :func:`count_as_extreme` (default: larger is more extreme).

    Examples
    --------
    >>> permutation_p_value(2.0, np.array([1.0, 2.0, 3.0]))
    0.75
    """
    null = np.asarray(null, dtype=float).reshape(-1)
    return float(permutation_p_values(float(observed), null, alternative=alternative,
                                      centre=centre))


# ----------------------------------------------------------------------------------------------
# run options
# ----------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class _Tasks:
    """Several kernels as one picklable task function: task = (kernel number, range)."""

    kernels: tuple

    def __call__(self, task):
        which, rows = task
        return self.kernels[which](rows)


@dataclass(frozen=True)
class RunOptions:
    """How many resamples a test draws, from which seed, and where the batches run.

    Build it with :meth:`checked` (the one validation); the fields are then trusted.

    Attributes
    ----------
    n_permutations : int
        Number of resamples N (≥ 0; 0 gives no null distribution and NaN p-values).
    seed : numpy.random.Generator
        The generator made from the user's seed; each test derives its seed blocks from it.
    engine : {"local", "dask"}
    scheduler : str, distributed.Client or None
        Only with ``engine="dask"``.
    n_workers : int or None
    chunk_size : int
        Resamples per task handed to the engine; never changes results.
    progress : callable or None
        ``progress(done, total)`` after each finished task.

    Examples
    --------
    >>> options = RunOptions.checked(300, seed=1, chunk_size=128)
    >>> options.ranges()
    [(0, 128), (128, 256), (256, 300)]
    """

    n_permutations: int
    seed: np.random.Generator
    engine: str = "local"
    scheduler: Any = None
    n_workers: int | None = None
    chunk_size: int = DEFAULT_CHUNK
    progress: Callable[[int, int], Any] | None = None

    @classmethod
    def checked(cls, n_permutations: Any, *, seed: Any = None, engine: Any = "local",
                scheduler: Any = None, n_workers: Any = None, chunk_size: Any = None,
                progress: Any = None, count_name: str = "n_permutations") -> RunOptions:
        """Validate every run option with the package's one rule; errors name the argument.

        Parameters
        ----------
        n_permutations : int
            Number of resamples, ≥ 0 (named ``count_name`` in messages).
        seed : None, int or numpy.random.Generator, keyword-only
        engine : {"local", "dask"}, keyword-only
        scheduler : str or distributed.Client, keyword-only
            A dask scheduler address or Client; only with ``engine="dask"``.
        n_workers : int, keyword-only
            ≥ 1, or None for the engine's default.
        chunk_size : int, keyword-only
            ≥ 1, or None for ``DEFAULT_CHUNK``.
        progress : callable, keyword-only
            ``progress(done, total)`` or None.
        count_name : str, keyword-only
            The caller's name for the count (e.g. ``"n_randomisations"``).

        Returns
        -------
        RunOptions

        Examples
        --------
        >>> RunOptions.checked(99).chunk_size
        256
        >>> RunOptions.checked(-1)
        Traceback (most recent call last):
        ...
        spatial_ev.errors.InputError: parameter `n_permutations` must be >= 0; got -1
        """
        n_permutations = check_int(count_name, n_permutations, low=0)
        if chunk_size is not None:
            chunk_size = check_int("chunk_size", chunk_size, low=1)
        engine = check_option("engine", engine, ENGINES)
        if n_workers is not None:
            n_workers = check_int("n_workers", n_workers, low=1)
        if engine != "dask" and scheduler is not None:
            raise InputError("parameter `scheduler` is only used with engine='dask'; got "
                             f"{scheduler!r} with engine={engine!r}")
        if scheduler is not None and not isinstance(scheduler, str) \
                and type(scheduler).__name__ != "Client":
            raise InputError("parameter `scheduler` must be a scheduler address such as "
                             "'tcp://10.0.0.5:8786' or a dask.distributed Client; got "
                             f"{scheduler!r}")
        if progress is not None and not callable(progress):
            raise InputError("parameter `progress` must be a callable progress(done, total) "
                             "or None")
        return cls(n_permutations, check_rng(seed), engine, scheduler, n_workers,
                   chunk_size or DEFAULT_CHUNK, progress)

    def ranges(self) -> list[tuple[int, int]]:
        """Consecutive ``(start, stop)`` ranges of at most ``chunk_size`` resamples."""
        return [(a, min(a + self.chunk_size, self.n_permutations))
                for a in range(0, self.n_permutations, self.chunk_size)]

    def run(self, kernels: Sequence[Callable[[tuple[int, int]], Any]]) -> list[list]:
        """Every kernel on every range, all tasks sent to the engine at once.

        Returns
        -------
        list of list
            ``out[i][t]`` = ``kernels[i](ranges()[t])``, in range order whatever the engine.
        """
        ranges = self.ranges()
        tasks = [(i, r) for i in range(len(kernels)) for r in ranges]
        out = run_tasks(_Tasks(tuple(kernels)), tasks, engine=self.engine,
                        scheduler=self.scheduler, n_workers=self.n_workers,
                        progress=self.progress)
        per = len(ranges)
        return [out[i * per:(i + 1) * per] for i in range(len(kernels))]


def check_run_options(n_permutations, chunk_size, engine, progress, *,
                      count_name: str = "n_permutations") -> tuple[int, int, str]:
    """The checks of :meth:`RunOptions.checked` for callers that keep the options apart.

    Returns
    -------
    (n_permutations, chunk_size, engine)
        ``chunk_size`` defaults to ``DEFAULT_CHUNK``.

    Examples
    --------
    >>> check_run_options(99, None, "local", None)
    (99, 256, 'local')
    """
    options = RunOptions.checked(n_permutations, seed=0, engine=engine, chunk_size=chunk_size,
                                 progress=progress, count_name=count_name)
    return options.n_permutations, options.chunk_size, options.engine


# ----------------------------------------------------------------------------------------------
# sequential decisions
# ----------------------------------------------------------------------------------------------

#: the constant k of Gandy's (2009) spending function ε·n/(n + k)
SPENDING_CONSTANT = 1000


@dataclass(frozen=True)
class SequentialRule:
    """When a test of "p ≤ α?" may stop drawing permutations (module notes).

    Attributes
    ----------
    alpha : float
        Level of the decision, in (0, 1).
    risk : float
        Bound ε on the chance of stopping early as significant when the p-value over all
        permutations is ≥ α, in (0, 0.5).
    look_every : int
        Permutations between looks (≥ 1); part of the rule, so the same for every engine.

    Examples
    --------
    >>> rule = SequentialRule.checked(0.05)
    >>> rule.exceedances(999), rule.looks(999)[-2:]
    (50, [896, 999])
    """

    alpha: float
    risk: float = 1e-3
    look_every: int = BLOCK_SIZE

    @classmethod
    def checked(cls, alpha: Any, *, risk: Any = 1e-3, look_every: Any = BLOCK_SIZE
                ) -> SequentialRule:
        """Validate the rule's parameters (errors name the argument and the allowed range).

        Examples
        --------
        >>> SequentialRule.checked(0.05, risk=0.01).risk
        0.01
        """
        alpha = check_real("alpha", alpha, low=0, high=1, low_inclusive=False,
                           high_inclusive=False)
        risk = check_real("decision_risk", risk, low=0, high=0.5, low_inclusive=False,
                          high_inclusive=False)
        look_every = check_int("look_every", look_every, low=1)
        return cls(alpha, risk, look_every)

    def exceedances(self, n_max: int) -> int:
        """h: the smallest count with h/N > α (any count ≥ h is not significant at N either).

        Examples
        --------
        >>> SequentialRule(0.05).exceedances(199)
        10
        """
        h = int(np.floor(self.alpha * n_max)) + 1
        while h / n_max <= self.alpha:
            h += 1
        while h > 1 and (h - 1) / n_max > self.alpha:
            h -= 1
        return h

    def looks(self, n_max: int) -> list[int]:
        """Numbers of permutations drawn at each look: multiples of ``look_every``, then N."""
        return [*range(self.look_every, n_max, self.look_every), n_max]

    def significant_counts(self, n_max: int) -> np.ndarray:
        """Largest count allowing an early significant stop at each look but the last (−1:
        none); the last look decides by the fixed-count rule.

        Examples
        --------
        >>> SequentialRule(0.05).significant_counts(999)[:3]
        array([-1,  1,  4])
        """
        looks = np.asarray(self.looks(n_max)[:-1], dtype=float)
        spent = self.risk * looks / (looks + SPENDING_CONSTANT)
        share = np.diff(np.concatenate([[0.0], spent]))
        out = np.full(looks.size, -1, dtype=int)
        for i, (size, eps) in enumerate(zip(looks, share)):
            k = int(stats.binom.ppf(eps, size, self.alpha))     # P(Bin ≤ k) ≥ eps
            while k >= 0 and stats.binom.cdf(k, size, self.alpha) > eps:
                k -= 1
            while (k + 1) / (size + 1) > self.alpha and k >= 0:
                k -= 1
            out[i] = k
        return out


@dataclass(frozen=True)
class SequentialOutcome:
    """Result of :func:`sequential_decision`.

    Attributes
    ----------
    p_value : float
        h/L (stopped as not significant), (k + 1)/(L + 1) (stopped as significant) or
        (k + 1)/(N + 1) (ran to N).
    n_used : int
        Permutations the p-value rests on (L, or N).
    n_drawn : int
        Permutations computed (rounds end at looks, so n_drawn ≥ n_used).
    stop : str
        ``"not_significant"``, ``"significant"`` (early) or ``"full"``.
    null : ndarray, shape (n_used,)
        The resampled statistics the p-value rests on.
    """

    p_value: float
    n_used: int
    n_drawn: int
    stop: str
    null: np.ndarray = field(repr=False)


def sequential_decision(null_between: Callable[[int, int], np.ndarray], observed: float,
                        n_max: int, rule: SequentialRule) -> SequentialOutcome:
    """Draw a null distribution in rounds until "p ≤ α?" is settled (module notes).

    Parameters
    ----------
    null_between : callable
        ``null_between(start, stop)``: the resampled statistics number ``start`` to
        ``stop - 1`` (the same values whatever the engine, as for seed blocks).
    observed : float
        The observed statistic (larger is more extreme; tie rule of :func:`count_as_extreme`).
    n_max : int
        The most permutations to draw, N ≥ 1.
    rule : SequentialRule

    Returns
    -------
    SequentialOutcome

    Examples
    --------
    >>> draws = np.random.default_rng(1).random(999)
    >>> out = sequential_decision(lambda a, b: draws[a:b], 0.5, 999, SequentialRule(0.05))
    >>> out.stop, out.n_used < 128, out.p_value > 0.05
    ('not_significant', True, True)
    """
    n_max = check_int("n_max", n_max, low=1)
    if not isinstance(rule, SequentialRule):
        raise InputError(f"`rule` must be a SequentialRule; got {type(rule).__name__}")
    h = rule.exceedances(n_max)
    looks = rule.looks(n_max)
    early = rule.significant_counts(n_max)
    threshold = _threshold(np.asarray(float(observed)))
    parts: list[np.ndarray] = []
    count, start = 0, 0
    for i, stop in enumerate(looks):
        part = np.asarray(null_between(start, stop), dtype=float).reshape(-1)
        if part.size != stop - start:
            raise InputError(f"`null_between({start}, {stop})` returned {part.size} values; "
                             f"expected {stop - start}")
        parts.append(part)
        hits = np.flatnonzero(part >= threshold)
        if count + hits.size >= h:
            used = start + int(hits[h - count - 1]) + 1
            null = np.concatenate(parts)[:used]
            return SequentialOutcome(h / used, used, stop, "not_significant", null)
        count += hits.size
        start = stop
        if i < len(early) and count <= early[i]:
            return SequentialOutcome((count + 1) / (stop + 1), stop, stop, "significant",
                                     np.concatenate(parts))
    return SequentialOutcome((count + 1) / (n_max + 1), n_max, n_max, "full",
                             np.concatenate(parts))
