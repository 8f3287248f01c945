"""Which sites changed in an exceptional way between two surveys, and did they lose or gain?

For every site the dissimilarity D between its two surveys and its loss and gain parts come
from :func:`spatial_ev.stats.temporal_beta.change_components` (Legendre 2019, Ecology and
Evolution 9:3500–3514).

Test of each site (Legendre 2019). H0: the site's assemblages at the two surveys are no more
different than assemblages that could have been observed there under H0. Resampling: the values
of each species are permuted at random among the sites, independently for every species and
(by default, ``pairing="independent"``) independently in the two surveys [memory: the
published default]; ``pairing="kept"`` applies the same permutation to a species in both
surveys, which keeps each species' before/after pair together and tests whether a site's set of
changes is exceptional among the changes observed. D is recomputed for every site and every
permutation; p = (k + 1)/(N + 1) through the null service
(:func:`spatial_ev.inference.null.permutation_p_value` and its tie rule). The site p-values
are adjusted for multiple testing with Holm's method (Holm 1979); a site is *exceptional* when
its adjusted p-value is at most ``alpha``.

Losses versus gains over all sites (Legendre 2019): paired t-test of the per-site gains minus
losses (Student's t with n − 1 degrees of freedom) and a permutation version that flips the sign
of each site's difference at random (the pairs are exchangeable under H0 of equal losses and
gains), both two-sided. Only for the indices with a loss/gain decomposition.

Work is cut into tasks of ``chunk_size`` permutations for the engine
(:func:`spatial_ev.inference.engines.run_tasks`); random draws come from the null service's
seed blocks, so the result does not depend on chunk size, engine or workers. Memory: one seed
block holds 128 × 2 × n_species × n_sites permutation indices (int32).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from functools import partial
from typing import Any

import numpy as np
import pandas as pd
import scipy.stats

from spatial_ev._validation import check_option, check_real
from spatial_ev.errors import InputError
from spatial_ev.inference.engines import run_tasks
from spatial_ev.inference.multiple import holm_adjust
from spatial_ev.inference.null import (TIE_TOLERANCE, SeedBlocks, check_run_options,
                                       permutation_p_value, seed_blocks)
from spatial_ev._validation import check_rng
from spatial_ev.stats.temporal_beta import CHANGE_INDICES, DECOMPOSABLE, change_components

__all__ = ["site_change_test", "SiteChange", "LossGainBalance", "PAIRINGS"]

PAIRINGS = ("independent", "kept")
_BATCH_BYTES = 32 * 2 ** 20


# ------------------------------------------------------------------------------------ draws

def _draw_species_permutations(n_sites: int, n_species: int, pairing: str,
                               rng: np.random.Generator, m: int) -> np.ndarray:
    """(m, 2, n_species, n_sites) int32: a permutation of the sites per species and survey."""
    surveys = 2 if pairing == "independent" else 1
    base = np.broadcast_to(np.arange(n_sites, dtype=np.int32), (m, surveys, n_species, n_sites))
    drawn = rng.permuted(base, axis=-1)
    return drawn if surveys == 2 else np.repeat(drawn, 2, axis=1)


def _draw_signs(n_sites: int, rng: np.random.Generator, m: int) -> np.ndarray:
    return rng.choice(np.array([-1.0, 1.0]), size=(m, n_sites))


@dataclass(frozen=True)
class _ExceedanceKernel:
    """Counts, per site, permuted D values at least as large as the observed D."""

    before_t: np.ndarray      # (p, n)
    after_t: np.ndarray       # (p, n)
    observed: np.ndarray      # (n,)
    index: str
    blocks: SeedBlocks

    def __call__(self, task: tuple[int, int]) -> np.ndarray:
        start, stop = task
        p, n = self.before_t.shape
        step = max(1, _BATCH_BYTES // (8 * 6 * p * n))
        limit = self.observed * (1.0 - TIE_TOLERANCE)
        counts = np.zeros(n, dtype=np.int64)
        for a in range(start, stop, step):
            perms = self.blocks.rows(a, min(a + step, stop))           # (m, 2, p, n)
            m = perms.shape[0]
            b = np.take_along_axis(np.broadcast_to(self.before_t, (m, p, n)), perms[:, 0], axis=2)
            c = np.take_along_axis(np.broadcast_to(self.after_t, (m, p, n)), perms[:, 1], axis=2)
            d = change_components(b.transpose(0, 2, 1), c.transpose(0, 2, 1),
                                  index=self.index).dissimilarity        # (m, n)
            counts += (d >= limit).sum(axis=0)
        return counts


# ----------------------------------------------------------------------------------- results

@dataclass(frozen=True)
class LossGainBalance:
    """Paired comparison of per-site losses and gains (gains − losses) over all sites.

    Attributes
    ----------
    mean_losses, mean_gains : float
        Means over sites of the loss and gain parts of D.
    t_statistic : float
        Paired t of gains − losses (positive: gains dominate).
    df : int
        n_sites − 1.
    p_parametric : float
        Two-sided p-value from Student's t.
    p_permutation : float
        Two-sided p-value from random sign flips of the per-site differences (NaN with 0
        permutations).
    n_permutations : int
    """

    mean_losses: float
    mean_gains: float
    t_statistic: float
    df: int
    p_parametric: float
    p_permutation: float
    n_permutations: int

    @property
    def dominant(self) -> str:
        """``"losses"``, ``"gains"`` or ``"balanced"`` (equal means)."""
        if self.mean_losses > self.mean_gains:
            return "losses"
        return "gains" if self.mean_gains > self.mean_losses else "balanced"

    def to_dict(self) -> dict[str, Any]:
        """JSON-friendly fields.

        Examples
        --------
        >>> LossGainBalance(0.2, 0.1, -2.0, 9, 0.07, 0.08, 99).to_dict()["dominant"]
        'losses'
        """
        return {"mean_losses": self.mean_losses, "mean_gains": self.mean_gains,
                "t_statistic": self.t_statistic, "df": self.df,
                "p_parametric": self.p_parametric, "p_permutation": self.p_permutation,
                "n_permutations": self.n_permutations, "dominant": self.dominant}


@dataclass(frozen=True)
class SiteChange:
    """Per-site change between two surveys (result of :func:`site_change_test`).

    Attributes
    ----------
    table : pandas.DataFrame
        One row per site (index = site ids): ``dissimilarity``, ``losses``, ``gains``,
        ``direction`` ("loss", "gain", "even" or "" without decomposition), ``p_value``,
        ``p_adjusted`` (Holm) and ``exceptional`` (p_adjusted ≤ alpha).
    index : str
        Dissimilarity used.
    before, after : str
        Labels of the two surveys compared.
    n_permutations : int
    pairing : str
        ``"independent"`` or ``"kept"`` (module notes).
    alpha : float
    balance : LossGainBalance or None
        None for the Hellinger and chord distances (no decomposition).
    """

    table: pd.DataFrame = field(repr=False)
    index: str
    before: str
    after: str
    n_permutations: int
    pairing: str
    alpha: float
    balance: LossGainBalance | None

    @property
    def exceptional_sites(self) -> list:
        """Ids of the sites whose adjusted p-value is at most ``alpha``."""
        return self.table.index[self.table["exceptional"].to_numpy()].tolist()

    def to_frame(self) -> pd.DataFrame:
        """The per-site table (a copy).

        Examples
        --------
        >>> rng = np.random.default_rng(3)
        >>> a = pd.DataFrame(rng.poisson(3.0, (8, 5)) + 1.0)
        >>> site_change_test(a, a * 0.5, n_permutations=19, seed=3).to_frame().shape
        (8, 7)
        """
        return self.table.copy()

    def summary(self) -> dict[str, Any]:
        """JSON-friendly summary (counts of exceptional sites, balance test).

        Examples
        --------
        >>> rng = np.random.default_rng(3)
        >>> a = pd.DataFrame(rng.poisson(3.0, (8, 5)) + 1.0)
        >>> site_change_test(a, a, n_permutations=19, seed=3).summary()["n_exceptional"]
        0
        """
        t = self.table
        exceptional = t[t["exceptional"]]
        return {
            "index": self.index, "before": self.before, "after": self.after,
            "n_sites": int(len(t)), "n_permutations": self.n_permutations,
            "pairing": self.pairing, "alpha": self.alpha, "adjustment": "holm",
            "mean_dissimilarity": float(t["dissimilarity"].mean()),
            "n_exceptional": int(len(exceptional)),
            "exceptional_sites": [_plain(s) for s in exceptional.index],
            "exceptional_losing": int((exceptional["direction"] == "loss").sum()),
            "exceptional_gaining": int((exceptional["direction"] == "gain").sum()),
            "balance": None if self.balance is None else self.balance.to_dict(),
        }


def _plain(value: Any) -> Any:
    return value.item() if isinstance(value, np.generic) else value


# ------------------------------------------------------------------------------------- test

def _check_pair(before: Any, after: Any) -> tuple[pd.DataFrame, pd.DataFrame]:
    frames = []
    for name, table in (("before", before), ("after", after)):
        if isinstance(table, pd.DataFrame):
            frame = table
        else:
            arr = np.asarray(table, dtype=float) if not isinstance(table, pd.Series) else None
            if arr is None or arr.ndim != 2:
                raise InputError(f"`{name}` must be a (sites x species) DataFrame or 2-D array;"
                                 f" got {type(table).__name__}")
            frame = pd.DataFrame(arr)
        frames.append(frame)
    a, b = frames
    if a.shape != b.shape or not a.index.equals(b.index) or not a.columns.equals(b.columns):
        raise InputError(f"`before` {a.shape} and `after` {b.shape} must have the same sites "
                         f"(index) and species (columns) in the same order; align them, e.g. "
                         f"after = after.loc[before.index, before.columns]")
    if len(a) < 3 or a.shape[1] < 1:
        raise InputError(f"site change needs at least 3 sites and 1 species; got {a.shape}")
    values = []
    for name, frame in (("before", a), ("after", b)):
        try:
            arr = frame.to_numpy(dtype=np.float64)
        except (TypeError, ValueError):
            raise InputError(f"`{name}` must hold numbers (abundances or 0/1)") from None
        bad = ~np.isfinite(arr) | (arr < 0)
        if bad.any():
            i, j = np.argwhere(bad)[0]
            raise InputError(f"`{name}`: site {frame.index[i]!r}, species {frame.columns[j]!r} "
                             f"holds {arr[i, j]!r}; values must be finite and >= 0")
        values.append(arr)
    return a, b


def _balance(losses: np.ndarray, gains: np.ndarray, n_permutations: int,
             rng: np.random.Generator) -> LossGainBalance:
    diff = gains - losses
    n = diff.size
    sd = diff.std(ddof=1)
    t = float(diff.mean() / (sd / np.sqrt(n))) if sd > 0 else 0.0
    p_par = float(2.0 * scipy.stats.t.sf(abs(t), n - 1)) if sd > 0 else 1.0
    p_perm = float("nan")
    if n_permutations:
        signs = seed_blocks(rng, partial(_draw_signs, n)).rows(0, n_permutations)  # (N, n)
        flipped = signs * diff
        sd_p = flipped.std(axis=1, ddof=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            t_perm = np.where(sd_p > 0, flipped.mean(axis=1) / (sd_p / np.sqrt(n)), 0.0)
        p_perm = permutation_p_value(abs(t), np.abs(t_perm)) if sd > 0 else 1.0
    return LossGainBalance(float(losses.mean()), float(gains.mean()), t, int(n - 1), p_par,
                           p_perm, int(n_permutations))


def site_change_test(before: pd.DataFrame, after: pd.DataFrame, *,
                     index: str = "percentage_difference", n_permutations: int = 999,
                     seed: None | int | np.random.Generator = None,
                     pairing: str = "independent", alpha: float = 0.05,
                     labels: tuple[str, str] = ("before", "after"),
                     chunk_size: int | None = None, engine: str = "local",
                     scheduler: Any = None, n_workers: int | None = None,
                     progress: Callable[[int, int], Any] | None = None) -> SiteChange:
    """Dissimilarity of each site between two surveys, its losses and gains, and its test.

    Parameters
    ----------
    before, after : DataFrame, shape (n_sites, n_species)
        Raw abundances (or presence–absence) of the same sites and species at the two surveys.
    index : {"percentage_difference", "ruzicka", "sorensen", "jaccard", "hellinger", "chord"}
        Dissimilarity (:mod:`spatial_ev.stats.temporal_beta`).
    n_permutations : int
        Permutations of the per-site tests and of the balance test (0: no tests, p = NaN).
    seed : None, int or numpy Generator
        Fixes every permutation.
    pairing : {"independent", "kept"}
        Species permuted independently in the two surveys (default, as published) or with the
        same permutation in both (module notes).
    alpha : float
        Level at which a site's Holm-adjusted p-value makes it exceptional.
    labels : (str, str)
        Names of the two surveys (reported).
    chunk_size, engine, scheduler, n_workers, progress
        As in :func:`spatial_ev.inference.permutation.permutation_test`; none changes results.

    Returns
    -------
    SiteChange

    Examples
    --------
    >>> rng = np.random.default_rng(7)
    >>> a = pd.DataFrame(rng.poisson(4.0, (12, 6)) + 1.0)
    >>> b = a.copy(); b.iloc[0] = [0, 0, 0, 0, 0, 9]
    >>> r = site_change_test(a, b, n_permutations=199, seed=1)
    >>> r.table["dissimilarity"].idxmax()
    0
    """
    index = check_option("index", index, CHANGE_INDICES)
    pairing = check_option("pairing", pairing, PAIRINGS)
    alpha = check_real("alpha", alpha, low=0, high=1, low_inclusive=False)
    n_permutations, chunk_size, engine = check_run_options(n_permutations, chunk_size, engine,
                                                           progress)
    if (not isinstance(labels, (tuple, list)) or len(labels) != 2
            or not all(isinstance(v, str) for v in labels)):
        raise InputError(f"`labels` must be two survey names (str, str); got {labels!r}")
    a, b = _check_pair(before, after)
    rng = check_rng(seed)
    y1, y2 = a.to_numpy(dtype=np.float64), b.to_numpy(dtype=np.float64)
    observed = change_components(y1, y2, index=index)
    n, p = y1.shape
    p_values = np.full(n, np.nan)
    if n_permutations:
        blocks = seed_blocks(rng, partial(_draw_species_permutations, n, p, pairing))
        kernel = _ExceedanceKernel(np.ascontiguousarray(y1.T), np.ascontiguousarray(y2.T),
                                   observed.dissimilarity, index, blocks)
        tasks = [(s, min(s + chunk_size, n_permutations))
                 for s in range(0, n_permutations, chunk_size)]
        counts = np.sum(run_tasks(kernel, tasks, engine=engine, scheduler=scheduler,
                                  n_workers=n_workers, progress=progress), axis=0)
        p_values = (counts + 1.0) / (n_permutations + 1.0)
    adjusted = holm_adjust(p_values)
    decomposed = index in DECOMPOSABLE
    direction = np.where(observed.losses > observed.gains, "loss",
                         np.where(observed.gains > observed.losses, "gain", "even"))
    table = pd.DataFrame({
        "dissimilarity": observed.dissimilarity,
        "losses": observed.losses, "gains": observed.gains,
        "direction": direction if decomposed else np.full(n, "", dtype=object),
        "p_value": p_values, "p_adjusted": adjusted,
        "exceptional": np.nan_to_num(adjusted, nan=1.0) <= alpha}, index=a.index)
    balance = (_balance(observed.losses, observed.gains, n_permutations, rng)
               if decomposed else None)
    return SiteChange(table=table, index=index, before=str(labels[0]), after=str(labels[1]),
                      n_permutations=n_permutations, pairing=pairing, alpha=alpha,
                      balance=balance)
