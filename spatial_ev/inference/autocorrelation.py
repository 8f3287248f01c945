"""Tests of Moran's I for many variables at once, and Moran's I correlograms by distance class.

The statistic, its moments under normality and randomisation (Moran 1950, Biometrika 37:17–23;
Cliff & Ord 1981, Spatial Processes [memory]) and the distance classes come from
:mod:`spatial_ev.space.moran`. Normal-approximation p-values use those moments; permutation
p-values use the null service (:mod:`spatial_ev.inference.null`): free permutations of the sites
in seed blocks, ``(k + 1)/(N + 1)`` with its tie rule (two-sided: distance from E[I]), tasks of
``chunk_size`` permutations on the chosen engine. All variables share one sparse product per
piece of permutations; nothing loops over permutations or sites in Python.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from spatial_ev._validation import check_option
from spatial_ev.errors import InputError
from spatial_ev.inference.multiple import holm_adjust
from spatial_ev.inference.null import (ALTERNATIVES, FreePermutations, RunOptions, SeedBlocks,
                                       permutation_p_values, seed_blocks)
from spatial_ev.space.moran import (MoranInputs, check_moran_values, distance_classes,
                                    moran_inputs)

__all__ = ["MoranTest", "morans_i", "MoranCorrelogram", "moran_correlogram"]

_PIECE_BYTES = 4 * 2 ** 20   # a permuted piece n × (orders × variables); measured: 1–8 MiB
                             # within ±30 %, 4 MiB never far from the best


@dataclass(frozen=True)
class MoranTest:
    """Moran's I of several variables under one weight matrix.

    Attributes
    ----------
    statistic : Series, shape (p,)
        Moran's I per variable.
    expected : float
        E[I] = −1/(n − 1) under no autocorrelation.
    variance_normal : float
        Var[I] under normality (same for all variables).
    variance_randomisation : Series, shape (p,)
        Var[I] under randomisation (depends on each variable's kurtosis b₂).
    z_normal, z_randomisation : Series, shape (p,)
        (I − E[I]) / √Var.
    p_normal, p_randomisation : Series, shape (p,)
        Normal-approximation p-values for ``alternative``.
    p_permutation : Series or None, shape (p,)
        (k + 1)/(N + 1) over N random permutations of the sites (the null service's tie rule).
    null_distribution : ndarray or None, shape (N, p)
        Moran's I of each permutation.
    alternative : str
        ``"greater"`` (positive autocorrelation), ``"less"`` or ``"two_sided"``.
    n_permutations : int
    """

    statistic: pd.Series
    expected: float
    variance_normal: float
    variance_randomisation: pd.Series
    z_normal: pd.Series
    z_randomisation: pd.Series
    p_normal: pd.Series
    p_randomisation: pd.Series
    p_permutation: pd.Series | None
    null_distribution: np.ndarray | None
    alternative: str
    n_permutations: int

    def to_frame(self) -> pd.DataFrame:
        """One row per variable with I, E[I], variances, z-scores and p-values."""
        out = pd.DataFrame({"moran_i": self.statistic, "expected": self.expected,
                            "variance_normal": self.variance_normal,
                            "variance_randomisation": self.variance_randomisation,
                            "z_normal": self.z_normal, "z_randomisation": self.z_randomisation,
                            "p_normal": self.p_normal, "p_randomisation": self.p_randomisation})
        if self.p_permutation is not None:
            out["p_permutation"] = self.p_permutation
        return out

    def summary(self) -> str:
        """Short text; states the assumptions behind each p-value."""
        return (f"Moran's I of {len(self.statistic)} variable(s), alternative "
                f"{self.alternative!r}; normal p-values assume normality or random labelling "
                "with enough sites, permutation p-values assume exchangeable sites"
                + (f" ({self.n_permutations} permutations)" if self.n_permutations else ""))


def _p_normal(z: np.ndarray, alternative: str) -> np.ndarray:
    return {"greater": stats.norm.sf(z), "less": stats.norm.cdf(z),
            "two_sided": 2 * stats.norm.sf(np.abs(z))}[alternative]


@dataclass(frozen=True)
class _Kernel:
    """Moran's I of every variable for the permutations of a range; picklable for dask."""

    inputs: MoranInputs
    blocks: SeedBlocks

    def __call__(self, task: tuple[int, int]) -> np.ndarray:
        perms = self.blocks.rows(*task)
        n, p = self.inputs.centred.shape
        step = max(1, _PIECE_BYTES // (8 * n * p))
        return np.concatenate([self.inputs.permuted_statistic(perms[a:a + step])
                               for a in range(0, len(perms), step)])


def _tests(inputs: list[MoranInputs], options: RunOptions, alternative: str) -> list[MoranTest]:
    """Moran's I tests of several (variables, weights) pairs; one engine call for all."""
    kernels = [_Kernel(x, seed_blocks(options.seed, FreePermutations(x.centred.shape[0])))
               for x in inputs] if options.n_permutations else []
    nulls = [np.concatenate(parts) for parts in options.run(kernels)] if kernels else []
    out = []
    for k, x in enumerate(inputs):
        obs = x.statistic()
        moments = x.moments()
        e = moments.expected
        zn = (obs - e) / np.sqrt(moments.variance_normal)
        zr = (obs - e) / np.sqrt(moments.variance_randomisation)
        null = p_perm = None
        if kernels:
            null = nulls[k]
            p_perm = pd.Series(permutation_p_values(obs, null, alternative=alternative,
                                                    centre=e), index=x.names)

        def series(a, names=x.names):
            return pd.Series(a, index=names)
        out.append(MoranTest(series(obs), e, moments.variance_normal,
                             series(moments.variance_randomisation), series(zn), series(zr),
                             series(_p_normal(zn, alternative)),
                             series(_p_normal(zr, alternative)), p_perm, null, alternative,
                             options.n_permutations))
    return out


def morans_i(values: Any, weights: Any, *, n_permutations: int = 0,
             seed: None | int | np.random.Generator = None, alternative: str = "greater",
             chunk_size: int | None = None, engine: str = "local", scheduler: Any = None,
             n_workers: int | None = None,
             progress: Callable[[int, int], Any] | None = None) -> MoranTest:
    """Moran's I of one or many variables, with normal and permutation tests.

    Parameters
    ----------
    values : array (n,) or (n, p), Series or DataFrame
        Variables measured at the sites (columns are tested separately, all at once).
    weights : (n, n) sparse or dense matrix, NeighbourGraph (binary weights) or SpatialBasis
        Spatial weights with zero diagonal; need not be symmetric.
    n_permutations : int
        Random permutations of the sites for a permutation p-value (0 = none).
    seed : None, int or numpy Generator
        Randomness of the permutations; the same seed gives the same p-values.
    alternative : {"greater", "less", "two_sided"}
        "greater" tests positive autocorrelation; "two_sided" counts permuted values at least
        as far from E[I] as the observed one.
    chunk_size : int, optional
        Permutations per task handed to the engine (default 256); does not change results.
        Inside a task memory is bounded (pieces of about 4 MiB of permuted values).
    engine, scheduler, n_workers, progress
        Where the tasks run (see :func:`spatial_ev.inference.engines.run_tasks`); they do not
        change results.

    Returns
    -------
    MoranTest

    Notes
    -----
    The normal approximation is poor for small n or very uneven weights; permutation tests
    assume sites are exchangeable under the null (no trend, no other structure).

    Examples
    --------
    >>> w = np.eye(10, k=1) + np.eye(10, k=-1) + np.eye(10, k=9) + np.eye(10, k=-9)
    >>> round(float(morans_i(np.arange(1.0, 11.0), w).statistic.iloc[0]), 6)
    0.454545
    """
    inputs = moran_inputs(values, weights)
    options = RunOptions.checked(n_permutations, seed=seed, chunk_size=chunk_size,
                                 engine=engine, scheduler=scheduler, n_workers=n_workers,
                                 progress=progress)
    alternative = check_option("alternative", alternative, ALTERNATIVES)
    return _tests([inputs], options, alternative)[0]


@dataclass(frozen=True)
class MoranCorrelogram:
    """Moran's I by distance class.

    Attributes
    ----------
    classes : DataFrame, one row per class
        ``lower``, ``upper`` (map units; a pair belongs to a class when lower < d ≤ upper),
        ``mean_distance``, ``n_pairs``.
    table : DataFrame, one row per (class, variable)
        ``class``, ``variable``, ``moran_i``, ``expected``, ``z``, ``p`` (randomisation
        assumption, or permutation when asked), ``p_holm`` (Holm's correction over the classes
        of each variable, for reading the correlogram as a whole).
    """

    classes: pd.DataFrame
    table: pd.DataFrame

    def to_frame(self) -> pd.DataFrame:
        """The long table joined with the class bounds."""
        return self.table.join(self.classes, on="class")


def moran_correlogram(values: Any, coords: Any, *, n_classes: int = 10,
                      max_distance: float | None = None, n_permutations: int = 0,
                      seed: None | int | np.random.Generator = None,
                      alternative: str = "two_sided", distance: str = "auto",
                      chunk_size: int | None = None, engine: str = "local",
                      scheduler: Any = None, n_workers: int | None = None,
                      progress: Callable[[int, int], Any] | None = None) -> MoranCorrelogram:
    """Moran's I correlogram: binary weights for pairs in equal-width distance classes.

    Parameters
    ----------
    values : array (n,) or (n, p), Series or DataFrame
    coords : (n, 2) array, DataFrame[x, y] or Survey
    n_classes : int
        Number of equal-width classes from 0 to ``max_distance``.
    max_distance : float, optional
        Largest distance considered; default half the largest distance between sites
        [practice: distant classes hold few pairs and mostly edge sites].
    n_permutations, seed, alternative, chunk_size, engine, scheduler, n_workers
        As in :func:`morans_i`; every class draws its own permutations.
    distance : {"auto", "euclidean", "great_circle"}
        See :func:`spatial_ev.space.graphs.neighbour_graph`.
    progress : callable, optional
        ``progress(done, total)`` over the tasks of all classes together.

    Returns
    -------
    MoranCorrelogram
        Classes without any pair are reported with NaN statistics.

    Examples
    --------
    >>> xy = np.column_stack([np.arange(20.0), np.zeros(20)])
    >>> c = moran_correlogram(np.sin(np.arange(20) / 3), xy, n_classes=4)
    >>> bool(c.table["moran_i"].iloc[0] > 0)
    True
    """
    classes = distance_classes(coords, n_classes=n_classes, max_distance=max_distance,
                               distance=distance)
    z, names = check_moran_values(values)
    if z.shape[0] != classes.n_sites:
        raise InputError(f"`values` has {z.shape[0]} rows for {classes.n_sites} sites")
    options = RunOptions.checked(n_permutations, seed=seed, chunk_size=chunk_size,
                                 engine=engine, scheduler=scheduler, n_workers=n_workers,
                                 progress=progress)
    alternative = check_option("alternative", alternative, ALTERNATIVES)
    filled = [c for c, w in enumerate(classes.weights) if w is not None]
    tests = dict(zip(filled, _tests([MoranInputs(z, classes.weights[c], names) for c in filled],
                                    options, alternative)))
    rows = []
    for c in range(len(classes.weights)):
        if c not in tests:
            rows.append(pd.DataFrame({"class": c, "variable": names, "moran_i": np.nan,
                                      "expected": np.nan, "z": np.nan, "p": np.nan}))
            continue
        res = tests[c]
        p = res.p_permutation if res.p_permutation is not None else res.p_randomisation
        rows.append(pd.DataFrame({"class": c, "variable": names,
                                  "moran_i": res.statistic.to_numpy(), "expected": res.expected,
                                  "z": res.z_randomisation.to_numpy(), "p": p.to_numpy()}))
    table = pd.concat(rows, ignore_index=True)
    table["p_holm"] = np.nan
    for v in names:
        m = (table["variable"] == v) & table["p"].notna()
        table.loc[m, "p_holm"] = holm_adjust(table.loc[m, "p"].to_numpy())
    return MoranCorrelogram(classes.table, table)
