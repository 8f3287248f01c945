"""Simulation studies of the error rates and biases of spatial_ev's tests and fractions.

Run ``python validation/error_rates.py --replicates 2000`` to rerun every study and write
``validation/error_rates.md`` (one table: study, layout, n, replicates, rate, 99% interval,
expected). The test suite (``tests/test_error_rates.py``, ``tests/test_spectral_randomisation.py``)
runs the same functions with 500 replicates and asserts the rates.

What is simulated (all seeded; level α = 0.05):

* Layouts: ``grid`` = 6 × 6 regular grid, 100 m spacing (36 sites); ``irregular`` = 40 sites
  uniform on a 600 m × 600 m square (fixed seed). Spatial candidates are the distance-based MEM
  with positive Moran's I (14 on the grid, 13 on the irregular layout), built once per layout;
  each replicate only draws new responses.
* No structure (:func:`null_study`): community Y = 5 independent N(0, 1) columns, environment = 3
  independent N(0, 1) columns without effect. Per replicate, on the same data:
  (1) global test of all positive-I MEM; (2) forward selection with the global test first and
  the double stopping criterion (Blanchet, Legendre & Borcard 2008, Ecology 89:2623–2632) —
  the rate is that of selecting ≥ 1 vector; (3) the test of the environment-only fraction [a]:
  partial RDA of the environment given the vectors selected in (2) (reduced-model residual
  permutation); the selection used the same data, so this is the test as the analysis runs it,
  conditional on the selection (with nothing selected it is the test of the environment alone);
  (4) the same selection without the global test (``global_test="skip"``, no adjusted-R²
  ceiling), expected ≈ 1 − (1 − α)^m for m orthogonal null candidates; (5) the same without the
  global test but with the adjusted-R² ceiling (informative only).
* Power (:func:`power_study`): Y = a·f(x, y)·1ᵀ + E (5 species, E ~ N(0, 1)) on the 500 m × 500 m
  square sampled by a 6 × 6 (n = 36) or 10 × 10 (n = 100) grid; f standardised to variance 1
  over the sites; a = 0.5 (signal share of each species' variance 0.2). ``broad``: f =
  cos(πx/L) + cos(πy/L), L = 500 m (wavelength 1000 m); ``fine``: f = cos(2πx/λ) + cos(2πy/λ),
  λ = 200 m: 2 spacings on the 6 × 6 grid, where it alternates from row to row (negative
  Moran's I, outside the positive-I candidates: not detectable by design), 3.6 spacings on the
  10 × 10 grid. Rate = global test significant (≥ 1 vector selected reported apart); 99
  permutations. Structures are functions of the coordinates, not of the basis: a structure
  equal to one MEM would give the same power for every MEM, because the global test and the
  ranking are invariant to rotations within the basis.
* Bias of the adjusted fractions (:func:`bias_study`): random design as in Peres-Neto, Legendre,
  Dray & Borcard (2006, Ecology 87:2614–2625): environment X (2 variables) and spatial group W
  (3 variables) jointly normal with corr(X_j, W_j) = 0.6, Y = X B + W C + E (8 species, n = 40);
  population fractions [a], [b], [c], [d] from the population covariance. Rate column = mean
  adjusted fraction; interval = truth ± 3 Monte Carlo standard errors.
* Environment–community link with autocorrelated, independent community and environment
  (:func:`spectral_study`): community = Gaussian field with exponential covariance, range
  150 m; environment (2 variables) either a process whose covariance is a function of C·W·C
  for the distance-based W (``spectral``: Moran spectral randomisation is exact) or Gaussian
  fields with exponential covariance of range 50–400 m (``exponential``), Gaussian
  (exp(−(d/r)²)), spherical, or anisotropic exponential covariance (range r along x, r/4
  along y). Rates of the
  ordinary permutation test and of the Moran spectral randomisation test (Wagner & Dray 2015,
  Methods Ecol. Evol. 6:1169–1178) with two weightings W, on the same data: the truncated
  distance-based W of the MEM, and the dense distance-decay W = exp(−d/t) (t = truncation
  distance, 100 m on the grid, 149 m on the irregular layout) that ``analyse`` uses.
* Sequential step decisions (:func:`sequential_study`): the same data and seed analysed twice,
  forward selection with the full count of permutations per step and with sequential step
  decisions (``sequential_steps=True``: a step stops at its h-th exceedance, Besag & Clifford
  1991, or early as significant with risk ε = 0.001, Gandy 2009); global tests always draw
  the full count; 999 permutations. Settings: ``null`` (no structure, layouts above, global
  test + double stop), ``no_global`` (no structure, ``global_test="skip"``, no ceiling, one
  variable: every replicate runs a step test), ``broad`` (the power design above, grid 6 × 6
  and 10 × 10). Reported: rate of ≥ 1 selected vector under each rule, share of replicates
  whose selected sets differ, mean permutations per step test.
* Shared step permutations (:func:`sequential_study` with ``rule="shared"``): the same data
  analysed with per-step permutations (a new set for every step test) and with one set of
  permutations for all the steps of a selection, updated as vectors enter
  (``shared_steps=True``); 999 permutations. Settings ``null`` and ``broad`` as above, and
  ``no_global_steps`` (no structure, ``global_test="skip"``, no ceiling, up to 5 variables,
  so that later steps are tested on the shared permutations too). Reported: rate of ≥ 1
  selected vector under each rule, mean vectors selected, share of replicates whose
  selected sets differ.
* Environment-only fraction [a] with autocorrelated tables (:func:`fraction_spectral_study`):
  as above, the community also carries effects of the 3 broadest MEM, and the environment is
  tested given those 3 vectors.
"""

from __future__ import annotations

import argparse
import re
import functools
import sys
import time
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy import stats
from scipy.spatial.distance import cdist
from threadpoolctl import threadpool_limits

from spatial_ev.space.eigen import distance_eigenvectors
from spatial_ev.selection.partition import partition_variation
from spatial_ev.inference.permutation import permutation_test
from spatial_ev.selection.forward import forward_selection
from spatial_ev.inference.spectral import (complete_spatial_basis, distance_decay_weights,
                                               spectral_randomisation_test)

ALPHA = 0.05
N_SPECIES = 5


@dataclass(frozen=True)
class Row:
    """One line of the table."""

    study: str
    layout: str
    n: int
    replicates: int
    rate: float
    interval: tuple[float, float]
    expected: str


def binomial_interval(replicates: int, p: float = ALPHA) -> tuple[float, float]:
    """Central 99% interval of a binomial rejection rate (scipy.stats.binom.interval)."""
    lo, hi = stats.binom.interval(0.99, replicates, p)
    return float(lo / replicates), float(hi / replicates)


def layout(name: str) -> np.ndarray:
    """Site coordinates (metres) of a named layout: "grid" (36 sites) or "irregular" (40)."""
    if name == "grid":
        return square_grid(6, 100.0)
    if name == "irregular":
        return np.random.default_rng(60221407).uniform(0, 600, size=(40, 2))
    raise ValueError(f"unknown layout {name!r}")


def square_grid(side: int, spacing: float) -> np.ndarray:
    gx, gy = np.meshgrid(np.arange(side) * spacing, np.arange(side) * spacing)
    return np.column_stack([gx.ravel(), gy.ravel()])


def one_blas_thread(study):
    """Run a study with one BLAS thread: its problems are small (n ≤ 100), and on a busy
    2-core machine a second BLAS thread made each test about five times slower (measured)."""
    @functools.wraps(study)
    def run(*args, **kwargs):
        with threadpool_limits(limits=1, user_api="blas"):
            return study(*args, **kwargs)
    return run


# ------------------------------------------------------------------------------ no structure

@one_blas_thread
def null_study(layout_name: str, replicates: int, *, permutations: int = 199,
               seed: int = 20261202) -> dict[str, float | int]:
    """Rejection / selection rates under no structure (see the module notes, items 1-5)."""
    rng = np.random.default_rng(seed)
    xy = layout(layout_name)
    n = len(xy)
    vectors = distance_eigenvectors(xy).vectors           # built once: the layout is fixed
    hits = dict.fromkeys(["global", "selection", "environment_only", "no_global",
                          "no_global_ceiling"], 0)
    for _ in range(replicates):
        y = rng.normal(size=(n, N_SPECIES))
        env = rng.normal(size=(n, 3))
        sel = forward_selection(y, vectors, alpha=ALPHA, n_permutations=permutations,
                                seed=rng, engine="local")
        hits["global"] += sel.global_test.p_value <= ALPHA
        hits["selection"] += len(sel.selected) > 0
        cond = vectors[list(sel.selected)] if sel.selected else None
        hits["environment_only"] += permutation_test(
            y, env, conditioning=cond, n_permutations=permutations, seed=rng,
            engine="local").p_value <= ALPHA
        skip = forward_selection(y, vectors, alpha=ALPHA, n_permutations=permutations,
                                 seed=rng, global_test="skip", r2_adj_limit=np.inf,
                                 max_variables=1, engine="local")
        hits["no_global"] += len(skip.selected) > 0
        ceiling = forward_selection(y, vectors, alpha=ALPHA, n_permutations=permutations,
                                    seed=rng, global_test="skip", max_variables=1,
                                    engine="local")
        hits["no_global_ceiling"] += len(ceiling.selected) > 0
    out: dict[str, float | int] = {k: v / replicates for k, v in hits.items()}
    out["m"] = vectors.shape[1]
    out["n"] = n
    return out


def no_global_expected(m: int) -> float:
    """1 − (1 − α)^m: P(≥ 1 of m independent null tests at α) (Blanchet et al. 2008) [derived]."""
    return 1.0 - (1.0 - ALPHA) ** m


# ------------------------------------------------------------------------------ power

POWER_EXTENT = 500.0
POWER_EFFECT = 0.5


def structure(kind: str, xy: np.ndarray) -> np.ndarray:
    """The simulated spatial structure, standardised to mean 0 and variance 1 over the sites."""
    x, y = xy[:, 0], xy[:, 1]
    if kind == "broad":
        f = np.cos(np.pi * x / POWER_EXTENT) + np.cos(np.pi * y / POWER_EXTENT)
    elif kind == "fine":
        f = np.cos(2 * np.pi * x / 200.0) + np.cos(2 * np.pi * y / 200.0)
    else:
        raise ValueError(f"unknown structure {kind!r}")
    return (f - f.mean()) / f.std()


@one_blas_thread
def power_study(kind: str, side: int, replicates: int, *, permutations: int = 99,
                seed: int = 20261203) -> dict[str, float | int]:
    """Rate of a significant global test (and of ≥ 1 selected vector) for a known structure."""
    rng = np.random.default_rng(seed)
    xy = square_grid(side, POWER_EXTENT / (side - 1))
    vectors = distance_eigenvectors(xy).vectors
    signal = POWER_EFFECT * structure(kind, xy)[:, None]
    detected = selected = 0
    for _ in range(replicates):
        y = signal + rng.normal(size=(len(xy), N_SPECIES))
        sel = forward_selection(y, vectors, alpha=ALPHA, n_permutations=permutations,
                                seed=rng, engine="local")
        detected += sel.global_test.p_value <= ALPHA
        selected += len(sel.selected) > 0
    return {"power": detected / replicates, "selected": selected / replicates,
            "n": len(xy), "m": vectors.shape[1]}


# ------------------------------------------------------------------------------ sequential steps

SEQUENTIAL_SETTINGS = ("null", "no_global", "no_global_steps", "broad")
STEP_RULES = ("sequential", "shared")


@one_blas_thread
def sequential_study(setting: str, where: str, replicates: int, *, permutations: int = 999,
                     seed: int = 20261205, rule: str = "sequential") -> dict[str, float | int]:
    """Forward selection with the full count of per-step permutations ("fixed") and with the
    step-test ``rule`` ("sequential" decisions or "shared" permutations) on the same data and
    seed (module notes). ``where``: a layout name ("grid", "irregular") for "null",
    "no_global" and "no_global_steps", a grid side ("6", "10") for "broad"."""
    if setting not in SEQUENTIAL_SETTINGS:
        raise ValueError(f"unknown setting {setting!r}")
    if rule not in STEP_RULES:
        raise ValueError(f"unknown rule {rule!r}")
    rng = np.random.default_rng(seed)
    xy = layout(where) if setting != "broad" else square_grid(int(where),
                                                              POWER_EXTENT / (int(where) - 1))
    n = len(xy)
    vectors = distance_eigenvectors(xy).vectors
    signal = POWER_EFFECT * structure("broad", xy)[:, None] if setting == "broad" else 0.0
    options = {"no_global": {"global_test": "skip", "r2_adj_limit": np.inf, "max_variables": 1},
               "no_global_steps": {"global_test": "skip", "r2_adj_limit": np.inf,
                                   "max_variables": 5}}.get(setting, {})
    rules = ("fixed", rule)
    hits, size, steps, drawn = ({r: 0 for r in rules} for _ in range(4))
    differ, gaps = 0, []
    for _ in range(replicates):
        y = signal + rng.normal(size=(n, N_SPECIES))
        stream = int(rng.integers(2 ** 63))
        result = {}
        for r in rules:
            sel = forward_selection(y, vectors, alpha=ALPHA, n_permutations=permutations,
                                    seed=stream, engine="local",
                                    sequential_steps=r == "sequential",
                                    shared_steps=r == "shared", **options)
            result[r] = sel.selected
            hits[r] += len(sel.selected) > 0
            size[r] += len(sel.selected)
            tested = int(np.isfinite(sel.steps["p_value"].to_numpy(float)).sum())
            steps[r] += tested
            drawn[r] += sel.step_permutations if r == "sequential" else tested * permutations
        differ += result["fixed"] != result[rule]
        gaps.append(len(result[rule]) - len(result["fixed"]))
    out: dict[str, float | int] = {
        "n": n, "m": vectors.shape[1], "differ": differ / replicates,
        # Monte Carlo standard error of the mean paired difference in vectors selected
        "size_gap_se": float(np.std(gaps, ddof=1) / np.sqrt(replicates)) if replicates > 1
        else float("nan")}
    for r in rules:
        out[f"selected_{r}"] = hits[r] / replicates
        out[f"size_{r}"] = size[r] / replicates
        out[f"permutations_{r}"] = drawn[r] / max(steps[r], 1)
        out[f"steps_{r}"] = steps[r]
    return out


def _rule_runs(rule: str, no_global: str, replicates: int, *, seed: int, progress):
    """Run :func:`sequential_study` for ``rule`` in the six settings of its table (type I on
    both layouts, ``no_global`` on both layouts, power on both grids); yield ``(setting,
    result, layout label, study label, 99% interval)`` per setting."""
    interval = binomial_interval(replicates)
    labels = {"null": "type I: forward selection, global test + double stop (≥ 1 selected)",
              "no_global": "selection without global test, one variable (≥ 1 selected)",
              "no_global_steps": "selection without global test, up to 5 variables "
                                 "(≥ 1 selected)",
              "broad": f"power: broad structure, a = {POWER_EFFECT} (≥ 1 selected)"}
    cases = [("null", "grid"), ("null", "irregular"), (no_global, "grid"),
             (no_global, "irregular"), ("broad", "6"), ("broad", "10")]
    for setting, where in cases:
        progress(f"{rule} step tests: {setting}, {where}")
        r = sequential_study(setting, where, replicates, seed=seed, rule=rule)
        name = where if setting != "broad" else f"grid {where}×{where}"
        band = interval if setting == "null" else observed_interval(
            r["selected_fixed"], replicates)
        yield setting, r, name, labels[setting], band


def sequential_rows(replicates: int, *, seed: int, progress=lambda m: None) -> list[Row]:
    """Rows of the sequential-decision study (fixed count vs sequential, same data)."""
    rows = []
    for setting, r, name, what, band in _rule_runs("sequential", "no_global", replicates,
                                                   seed=seed + 5, progress=progress):
        expected = {"null": "≤ 0.05",
                    "no_global": f"≈ 1 − (1 − α)^{int(r['m'])} = "
                                 f"{no_global_expected(int(r['m'])):.3f}",
                    "broad": "same as fixed"}[setting]
        note = (f"selections differ in {r['differ']:.4f} of replicates; permutations per "
                f"step test {r['permutations_fixed']:.0f} → {r['permutations_sequential']:.0f}"
                f" ({int(r['steps_sequential'])} step tests); mean vectors selected "
                f"{r['size_fixed']:.3f} → {r['size_sequential']:.3f}")
        rows += [Row(f"{what}, full count", name, int(r["n"]), replicates, r["selected_fixed"],
                     band, expected),
                 Row(f"{what}, sequential steps ({note})", name, int(r["n"]), replicates,
                     r["selected_sequential"], band, expected)]
    return rows


def shared_rows(replicates: int, *, seed: int, progress=lambda m: None) -> list[Row]:
    """Rows of the shared-permutation study (per-step vs shared permutations, same data)."""
    rows = []
    for setting, r, name, what, band in _rule_runs("shared", "no_global_steps", replicates,
                                                   seed=seed + 7, progress=progress):
        expected = "≤ 0.05" if setting == "null" else "same as per-step"
        rows += [Row(f"{what}, per-step permutations (mean vectors selected "
                     f"{r['size_fixed']:.3f}; {int(r['steps_fixed'])} step tests)", name,
                     int(r["n"]), replicates, r["selected_fixed"], band, expected),
                 Row(f"{what}, shared permutations (mean vectors selected "
                     f"{r['size_shared']:.3f}, paired difference "
                     f"{r['size_shared'] - r['size_fixed']:+.3f} ± {r['size_gap_se']:.3f} SE; "
                     f"selections differ in {r['differ']:.4f} of replicates)", name,
                     int(r["n"]), replicates, r["selected_shared"], band, expected)]
    return rows


def observed_interval(rate: float, replicates: int) -> tuple[float, float]:
    """Binomial 99% interval of a rate around an observed ``rate`` (as proportions)."""
    lo, hi = stats.binom.interval(0.99, replicates, rate)
    return float(lo / replicates), float(hi / replicates)


# ------------------------------------------------------------------------------ bias

BIAS_N, BIAS_SPECIES, BIAS_RHO = 40, 8, 0.6
_B = np.array([[0.5, -0.3, 0.2, 0.0, 0.4, -0.2, 0.3, 0.1],
               [0.1, 0.4, -0.3, 0.5, 0.0, 0.2, -0.1, 0.3]])
_C = np.array([[0.4, 0.2, 0.0, -0.3, 0.3, 0.1, -0.2, 0.4],
               [-0.2, 0.3, 0.4, 0.1, -0.3, 0.2, 0.3, 0.0],
               [0.3, -0.1, 0.2, 0.3, 0.1, -0.4, 0.0, 0.2]])


def _bias_covariance() -> np.ndarray:
    """Covariance of [X1, X2, W1, W2, W3]: unit variances, corr(X_j, W_j) = ρ."""
    s = np.eye(5)
    s[0, 2] = s[2, 0] = s[1, 3] = s[3, 1] = BIAS_RHO
    return s


def true_fractions() -> dict[str, float]:
    """Population fractions [a], [b], [c], [d] of the bias design [derived from the
    population covariance; the fraction algebra is Borcard, Legendre & Drapeau 1992]."""
    s = _bias_covariance()
    gamma = np.vstack([_B, _C])
    total = float(np.trace(gamma.T @ s @ gamma)) + BIAS_SPECIES      # noise variance 1

    def r2(cols):
        sg = s[np.ix_(cols, cols)]
        cross = s[np.ix_(cols, range(5))] @ gamma
        return float(np.trace(cross.T @ np.linalg.solve(sg, cross))) / total

    x, w, xw = r2([0, 1]), r2([2, 3, 4]), r2(list(range(5)))
    return {"environment_only": xw - w, "shared": x + w - xw, "space_only": xw - x,
            "unexplained": 1 - xw}


@one_blas_thread
def bias_study(replicates: int, *, seed: int = 20261204) -> dict[str, tuple[float, float]]:
    """Mean and Monte Carlo standard error of each adjusted fraction over random designs."""
    rng = np.random.default_rng(seed)
    root = np.linalg.cholesky(_bias_covariance())
    gamma = np.vstack([_B, _C])
    keys = {"environment_only": "environment_only", "shared": "environment_and_space",
            "space_only": "space_only", "unexplained": "unexplained"}
    values = {k: np.empty(replicates) for k in keys}
    for i in range(replicates):
        v = rng.normal(size=(BIAS_N, 5)) @ root.T
        y = v @ gamma + rng.normal(size=(BIAS_N, BIAS_SPECIES))
        part = partition_variation(y, {"environment": v[:, :2], "space": v[:, 2:]},
                                   n_permutations=0)
        for k, row in keys.items():
            values[k][i] = part.fractions.loc[row, "r2_adj"]
    return {k: (float(v.mean()), float(v.std(ddof=1) / np.sqrt(replicates)))
            for k, v in values.items()}


# ------------------------------------------------------------------------------ spectral test

def _spherical(xy, d, r):
    h = np.minimum(d / r, 1.0)
    return 1.0 - 1.5 * h + 0.5 * h ** 3


def _anisotropic(xy, d, r):
    dx = xy[:, None, 0] - xy[None, :, 0]
    dy = xy[:, None, 1] - xy[None, :, 1]
    return np.exp(-np.sqrt((dx / r) ** 2 + (dy / (r / 4)) ** 2))


#: correlation functions of the simulated environments (range r in metres)
_COVARIANCES = {
    "exponential": lambda xy, d, r: np.exp(-d / r),
    "gaussian": lambda xy, d, r: np.exp(-(d / r) ** 2),
    "spherical": _spherical,
    "anisotropic": _anisotropic,          # exponential, range r along x and r/4 along y
}


@one_blas_thread
def spectral_study(environment: str, layout_name: str, replicates: int, *,
                   randomisations: int = 99, seed: int = 20261205,
                   environment_range: float = 100.0) -> dict[str, float]:
    """Rates of the ordinary permutation test and of the Moran spectral randomisation test
    when community and environment are autocorrelated and independent."""
    rng = np.random.default_rng(seed)
    xy = layout(layout_name)
    n = len(xy)
    basis = complete_spatial_basis(distance_eigenvectors(xy))
    decay = complete_spatial_basis(distance_decay_weights(xy))
    d = cdist(xy, xy)
    community_root = np.linalg.cholesky(np.exp(-d / 150.0) + 1e-10 * np.eye(n))
    if environment == "spectral":
        # covariance U diag(exp(4·I_k)) Uᵀ: a function of CWC, strongly autocorrelated
        moran = n / basis.weights.sum() * basis.eigenvalues
        env_root = basis.vectors * np.exp(2.0 * moran)
    elif environment in _COVARIANCES:
        values, vectors = np.linalg.eigh(_COVARIANCES[environment](xy, d, environment_range))
        env_root = vectors * np.sqrt(np.clip(values, 0.0, None))
    else:
        raise ValueError(f"unknown environment {environment!r}")
    hits = {"ordinary": 0, "spectral_distance": 0, "spectral_decay": 0}
    for _ in range(replicates):
        y = community_root @ rng.normal(size=(n, N_SPECIES))
        env = env_root @ rng.normal(size=(env_root.shape[1], 2))
        hits["ordinary"] += permutation_test(y, env, n_permutations=randomisations, seed=rng,
                                             n_workers=1).p_value <= ALPHA
        for key, w in (("spectral_distance", basis), ("spectral_decay", decay)):
            hits[key] += spectral_randomisation_test(
                y, env, w, n_randomisations=randomisations, seed=rng,
                n_workers=1).p_value <= ALPHA
    return {**{k: v / replicates for k, v in hits.items()}, "n": n}


@one_blas_thread
def fraction_spectral_study(layout_name: str, replicates: int, *, randomisations: int = 99,
                            seed: int = 20261206, environment_range: float = 200.0
                            ) -> dict[str, float]:
    """Rates of the tests of the environment-only fraction [a] given spatial vectors.

    Community = effects of the 3 broadest distance-based MEM (coefficients N(0, 1) per species
    and replicate) + an exponential field (range 150 m); environment = 2 independent
    exponential fields (range ``environment_range``), no effect. Tests of the environment given
    the 3 MEM: reduced-model residual permutation, and partial Moran spectral randomisation
    with the distance-decay W."""
    rng = np.random.default_rng(seed)
    xy = layout(layout_name)
    n = len(xy)
    mem = distance_eigenvectors(xy).vectors.to_numpy()[:, :3]
    decay = complete_spatial_basis(distance_decay_weights(xy))
    d = cdist(xy, xy)
    community_root = np.linalg.cholesky(np.exp(-d / 150.0) + 1e-10 * np.eye(n))
    env_root = np.linalg.cholesky(np.exp(-d / environment_range) + 1e-10 * np.eye(n))
    hits = {"ordinary": 0, "spectral_decay": 0}
    for _ in range(replicates):
        y = community_root @ rng.normal(size=(n, N_SPECIES)) \
            + np.sqrt(n) * mem @ rng.normal(size=(3, N_SPECIES))
        env = env_root @ rng.normal(size=(n, 2))
        hits["ordinary"] += permutation_test(y, env, conditioning=mem,
                                             n_permutations=randomisations, seed=rng,
                                             n_workers=1).p_value <= ALPHA
        hits["spectral_decay"] += spectral_randomisation_test(
            y, env, decay, conditioning=mem, n_randomisations=randomisations, seed=rng,
            n_workers=1).p_value <= ALPHA
    return {**{k: v / replicates for k, v in hits.items()}, "n": n}


# ------------------------------------------------------------------------------ the table

def run_all(replicates: int, *, permutations: int = 199, seed: int = 20261202,
            progress=None) -> list[Row]:
    """Every study with ``replicates`` replicates each; returns the table rows."""
    say = progress or (lambda message: None)
    rows: list[Row] = []
    interval = binomial_interval(replicates)
    level = f"{ALPHA:g} (binomial 99%)"
    for name in ("grid", "irregular"):
        say(f"no structure, {name}")
        r = null_study(name, replicates, permutations=permutations, seed=seed)
        n, m = int(r["n"]), int(r["m"])
        rows += [
            Row(f"type I: global test of {m} positive-I MEM", name, n, replicates,
                r["global"], interval, level),
            Row("type I: forward selection, global test + double stop (≥ 1 selected)", name, n,
                replicates, r["selection"], interval, f"≤ {ALPHA:g}"),
            Row("type I: environment-only fraction [a] given selected MEM", name, n,
                replicates, r["environment_only"], interval, level),
            Row(f"selection without global test, no R²adj ceiling (≥ 1 of {m})", name, n,
                replicates, r["no_global"], interval,
                f"≈ 1 − (1 − α)^{m} = {no_global_expected(m):.3f}"),
            Row("selection without global test, with R²adj ceiling (≥ 1)", name, n, replicates,
                r["no_global_ceiling"], interval, "> 0.05 (informative)"),
        ]
    for kind in ("broad", "fine"):
        for side in (6, 10):
            say(f"power, {kind}, {side}x{side}")
            r = power_study(kind, side, replicates, permutations=min(permutations, 99),
                            seed=seed + 1)
            lo, hi = stats.binom.interval(0.99, replicates, r["power"])
            rows.append(Row(f"power: {kind} structure, a = {POWER_EFFECT} (global test; "
                            f"≥ 1 selected {r['selected']:.3f})", f"grid {side}×{side}",
                            int(r["n"]), replicates, r["power"],
                            (lo / replicates, hi / replicates), "rises with n"))
    say("bias of adjusted fractions")
    truth = true_fractions()
    for key, (mean, se) in bias_study(replicates, seed=seed + 2).items():
        rows.append(Row(f"bias: mean adjusted fraction {key}", "random design", BIAS_N,
                        replicates, mean, (truth[key] - 3 * se, truth[key] + 3 * se),
                        f"{truth[key]:.4f} (population)"))
    cases = [("spectral", "grid", 100.0)] + [("exponential", name, r) for name in
                                             ("grid", "irregular") for r in (50.0, 100.0, 400.0)]
    cases += [("gaussian", "grid", 400.0), ("gaussian", "irregular", 200.0),
              ("spherical", "irregular", 300.0), ("anisotropic", "irregular", 200.0)]
    for environment, name, rng_range in cases:
        say(f"autocorrelated environment: {environment}, {name}, {rng_range}")
        r = spectral_study(environment, name, replicates, seed=seed + 3,
                           environment_range=rng_range)
        what = ("env. covariance a function of CWC (distance-based W)"
                if environment == "spectral" else f"env. {environment}, range {rng_range:g} m")
        exact = environment == "spectral"
        rows += [
            Row(f"env–community link, free permutations ({what})", name, int(r["n"]),
                replicates, r["ordinary"], interval, "inflated"),
            Row(f"env–community link, spectral randomisation, distance-based W ({what})",
                name, int(r["n"]), replicates, r["spectral_distance"], interval,
                level if exact else "≈ 0.05 (approximate)"),
            Row(f"env–community link, spectral randomisation, distance-decay W ({what})",
                name, int(r["n"]), replicates, r["spectral_decay"], interval,
                "≈ 0.05 (approximate)")]
    for name in ("grid", "irregular"):
        say(f"environment-only fraction with autocorrelated tables, {name}")
        r = fraction_spectral_study(name, replicates, seed=seed + 4)
        what = "given 3 broad MEM; env. exponential, range 200 m"
        rows += [
            Row(f"env.-only fraction [a], residual permutation ({what})", name, int(r["n"]),
                replicates, r["ordinary"], interval, "inflated"),
            Row(f"env.-only fraction [a], partial spectral randomisation, distance-decay W "
                f"({what})", name, int(r["n"]), replicates, r["spectral_decay"], interval,
                "≈ 0.05 (approximate)")]
    return rows


def to_markdown(rows: list[Row], *, seconds: float, command: str) -> str:
    lines = ["# Error rates of spatial_ev's tests (simulation studies)", "",
             f"Generated by `{command}` in {seconds:.0f} s; level α = {ALPHA:g}. The designs are "
             "described in the module docstring of `validation/error_rates.py`. Rate = "
             "proportion of replicates rejecting (or selecting; for bias rows, the mean "
             "adjusted fraction). 99% interval = binomial interval around the expected rate "
             "(type I rows), around the observed rate (power rows), or the population value "
             "± 3 Monte Carlo SE (bias rows).", "",
             *rule_table(rows)]
    lines += ["", "Reading the table:", "",
              "* Forward selection without the global test selects something most of the time "
              "under no structure; the global test brings it back under α (Blanchet, Legendre & "
              "Borcard 2008).",
              "* The environment-only test is run after selecting spatial vectors on the same "
              "data, as the analysis does; its rate is that conditional procedure's.",
              "* When community and environment are both autocorrelated, free permutations are "
              "far too liberal. Moran spectral randomisation is exact when the spatial "
              "weighting describes the environment's autocorrelation and approximate "
              "otherwise: with the sparse distance-based weighting and environments "
              "autocorrelated over long ranges on irregular layouts it stays liberal; the "
              "dense distance-decay weighting (used by `analyse`) stays near α in these designs, "
              "including environments whose autocorrelation is not exponential (Gaussian, "
              "spherical, anisotropic). The community was an exponential field; other "
              "layouts, sizes and strongly non-Gaussian environments were not simulated.",
              "* The same holds for the environment-only fraction [a]: tested given the "
              "spatial vectors by permutation of residuals it is liberal when the residuals "
              "and the environment are autocorrelated; the partial spectral randomisation "
              "stays near α.", ""]
    return "\n".join(lines)


SEQUENTIAL_MARK = "## Sequential step decisions"
SHARED_MARK = "## Shared step permutations"


def rule_table(rows: list[Row]) -> list[str]:
    """Markdown lines of a step-rule table: header and one line per row."""
    return (["| study | layout | n | replicates | rate | 99% interval | expected |",
             "|---|---|---:|---:|---:|---|---|"]
            + [f"| {r.study} | {r.layout} | {r.n} | {r.replicates} | {r.rate:.4f} | "
               f"[{r.interval[0]:.4f}, {r.interval[1]:.4f}] | {r.expected} |" for r in rows])


def sequential_markdown(rows: list[Row], *, seconds: float, command: str) -> str:
    """The section of the sequential-decision study (replaced on each rerun)."""
    lines = [SEQUENTIAL_MARK, "",
             f"Generated by `{command}` in {seconds:.0f} s; level α = {ALPHA:g}, 999 "
             "permutations per test, decision risk ε = 0.001. Each replicate is analysed twice "
             "with the same data and seed: every step test drawing the full count, and step "
             "tests stopping once \"p ≤ α?\" is settled (non-significant steps at their h-th "
             "exceedance, Besag & Clifford 1991, Biometrika 78:301–304; clearly significant "
             "steps at an early look with risk ≤ ε, Gandy 2009, JASA 104:1504–1511). Global "
             "tests always draw the full count. 99% interval: binomial around α (type I rows) "
             "or around the full-count rate (other rows).", "",
             *rule_table(rows)]
    lines += ["", "A non-significant step stops at its h-th exceedance and always takes the "
              "decision the full count would take; only an early significant stop can differ, "
              "with probability at most ε when the step's p over all permutations is ≥ α.", ""]
    return "\n".join(lines)


def shared_markdown(rows: list[Row], *, seconds: float, command: str) -> str:
    """The section of the shared-permutation study (replaced on each rerun)."""
    lines = [SHARED_MARK, "",
             f"Generated by `{command}` in {seconds:.0f} s; level α = {ALPHA:g}, 999 "
             "permutations per test. Each replicate is analysed twice with the same data: "
             "every step test on its own permutations, and every step of the selection on one "
             "shared set of permutations, updated as vectors enter. Each shared step is the "
             "same reduced-model residual permutation test (Freedman & Lane 1983, J. Bus. "
             "Econ. Stat. 1:292–298) on other random permutations, so a step near α can go "
             "either way. The first step draws the same permutations under both rules (the "
             "shared set comes from the first step's stream), so the rate of ≥ 1 selected "
             "vector is the same by construction; later steps differ, and the mean numbers of "
             "vectors selected (their paired difference ± its Monte Carlo standard error) "
             "compare them. 99% interval: binomial around α (type I rows) or around the "
             "per-step rate (other rows).", "",
             *rule_table(rows)]
    lines.append("")
    return "\n".join(lines)


def replace_section(text: str, mark: str, section: str) -> str:
    """``text`` with its ``## `` section headed ``mark`` replaced by ``section`` (appended
    when absent); other sections keep their place."""
    parts = re.split(r"(?m)^(?=## )", text)
    kept = [part for part in parts if not part.startswith(mark)]
    body = [part.rstrip("\n") + "\n" for part in kept if part.strip()]
    position = next((i for i, part in enumerate(parts) if part.startswith(mark)), len(parts))
    before = sum(1 for part in parts[:position] if part.strip() and not part.startswith(mark))
    body.insert(before, section.rstrip("\n") + "\n")
    return "\n".join(body)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--replicates", type=int, default=2000)
    parser.add_argument("--permutations", type=int, default=199)
    parser.add_argument("--seed", type=int, default=20261202)
    parser.add_argument("--out", type=Path,
                        default=Path(__file__).resolve().parent / "error_rates.md")
    parser.add_argument("--sequential-only", action="store_true",
                        help="rerun only the sequential-decision study and replace its "
                             "section of --out (999 permutations per test)")
    parser.add_argument("--shared-only", action="store_true",
                        help="rerun only the shared-permutation study and replace its "
                             "section of --out (999 permutations per test)")
    args = parser.parse_args(argv)
    start = time.perf_counter()
    for flag, mark, make_rows, write in (
            ("sequential", SEQUENTIAL_MARK, sequential_rows, sequential_markdown),
            ("shared", SHARED_MARK, shared_rows, shared_markdown)):
        if not getattr(args, f"{flag}_only"):
            continue
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            rows = make_rows(args.replicates, seed=args.seed,
                             progress=lambda m: print(m, file=sys.stderr, flush=True))
        seconds = time.perf_counter() - start
        command = (f"python validation/error_rates.py --{flag}-only --replicates "
                   f"{args.replicates} --seed {args.seed}")
        old = args.out.read_text(encoding="utf-8") if args.out.exists() else ""
        args.out.write_text(replace_section(old, mark, write(rows, seconds=seconds,
                                                              command=command)),
                            encoding="utf-8")
        print(f"wrote {args.out} ({seconds:.0f} s)", file=sys.stderr)
        return 0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rows = run_all(args.replicates, permutations=args.permutations, seed=args.seed,
                       progress=lambda m: print(m, file=sys.stderr, flush=True))
    seconds = time.perf_counter() - start
    command = (f"python validation/error_rates.py --replicates {args.replicates} "
               f"--permutations {args.permutations} --seed {args.seed}")
    old = args.out.read_text(encoding="utf-8") if args.out.exists() else ""
    kept = [part for part in re.split(r"(?m)^(?=## )", old) if part.startswith("## ")]
    args.out.write_text("\n".join([to_markdown(rows, seconds=seconds, command=command)
                                   .rstrip("\n") + "\n"] + [part.rstrip("\n") + "\n"
                                                              for part in kept]),
                        encoding="utf-8")
    print(f"wrote {args.out} ({seconds:.0f} s)", file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
