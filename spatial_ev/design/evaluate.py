"""Sampling redesign: which scales a candidate layout resolves, and its simulated power.

Two questions for next season's layout and budget, answered from a pilot :class:`Analysis`
(from :func:`spatial_ev.analyse`; a run folder is first rebuilt by the caller with
:func:`spatial_ev.pipeline.rerun.load_pilot` — nothing here reads files or re-runs an
analysis behind the caller's back):

1. **Spectral coverage** (:func:`spectral_coverage`). Each layout gets its own spatial basis
   under the *pilot's chosen weighting scheme* (distance-based MEM when the pilot chose none,
   or when that graph cannot be built on the layout, e.g. Delaunay on a straight transect —
   the table says which). Its resolvable range: the finest scale is the 5 % quantile of its
   vector scales, the broadest twice the long side of its extent
   (:func:`~spatial_ev.space.scales.resolvable_scales`). For each pilot scale class a field
   with the class's wavelengths is sampled at the layout (:func:`band_shares`): the share of
   its variation on the layout's vectors whose scale lies in the class's band is *carried*,
   the share on its other vectors *aliased*. A class is **resolved** when its own band holds
   the largest share of what the basis captures, **partly** when it holds at least a quarter
   but another band holds more, **not resolved** otherwise or without a vector in the band.
   Extent sets the broadest wavelength (≈ 2 × extent) and spacing the finest (≈ 2–4 sampling
   intervals, Nyquist-type reasoning [practice]).

2. **Simulated power** (:func:`evaluate_design`). The pilot's fitted model becomes a generator
   of continuous landscapes in map units (:mod:`spatial_ev.design.simulate`): the kept trend;
   the selected environmental variables (at new sites: interpolated from the pilot sites by
   inverse-distance weighting, 8 nearest, power 2, plus a simulated local part with the
   pilot's leave-one-out interpolation error; or read from a vector layer); per scale class,
   stationary Gaussian random fields with wavelengths in the class's band, the class's
   species loadings and its variance among the pilot sites (shrunk by the class's
   adjusted/raw R²); residual structure on the unselected vectors beyond chance as one more
   field; and spatially independent residual rows of the pilot (inflated by
   √((n − 1)/(n − 1 − m)) for the m fitted terms). Unconditional simulation (default) draws a
   new landscape each time; conditional simulation keeps the pilot's patches in place.
   Replicate r draws the same landscape at every layout (common random numbers; site-keyed
   noise is the same at a site shared by two layouts), so layouts are compared paired. Each
   simulated table is analysed by the pipeline's own named steps
   (:mod:`spatial_ev.pipeline.steps`): trend test, forward selection of environmental
   variables (global test, double stopping), selection of the layout's spatial vectors under
   one scheme (global test at the pilot's Šidák-corrected level by default, because next
   season's analysis will again compare schemes; then double stopping), variation partition
   with tests of the unique fractions, and detection of each scale class. Why each selection
   stopped is recorded (:attr:`DesignEvaluation.stops`); when the ceiling of the double
   stopping rule ends more than half of a layout's spatial selections a warning gives the
   share and the pilot layout's re-detection rates. Simulations are on the transformed scale
   (no counts are drawn).

Permutations. Every test uses ``n_permutations`` (default 199). A rejection rate at α = 0.05
needs p-values accurate near 0.05: with N = 199 the Monte Carlo standard error of a p-value of
0.05 is √(0.05 · 0.95 / 199) ≈ 0.015, so a test with true p near 0.05 is occasionally
misjudged, which blurs power by at most a few points — less than the simulation error of the
power itself (√(0.8 · 0.2 / 100) = 0.04 with 100 simulations). The spatial global test is
judged at the much smaller corrected level α' (0.0051 for ten schemes); with 199 permutations
it would reject only when no permuted statistic reaches the observed one, so a test with true
p = 0.001 would fail 18 % of the time (1 − 0.999^199) and power would be underestimated. That
test therefore uses max(N, ⌈4/α'⌉ − 1) permutations (783 for α' = 0.0051: up to three
exceedances still reject, and a true p of 0.001 rejects 96 % of the time).

Detection of a scale class at a layout: the layout's selected vectors whose own scale lies in
the class's band are tested jointly, given the other selected vectors and the trend; the
class is detected when that p, Holm-adjusted across the classes, is ≤ α. A layout is
recommended for a class only if it resolves it; a layout that reaches the target power for a
class it does not resolve is reported as aliasing (broader or finer vectors picking up the
structure), never recommended for it.

Assumptions, stated in every result: the pilot model is right (linear effects of the selected
variables; each class's structure a stationary field with the class's wavelengths);
stationarity over the layouts' area; residuals independent beyond the simulated fields. Power
refers to this model's effect sizes.

Seeds: one seed → ``SeedSequence(seed).spawn(n_simulations)``, one sequence per replicate,
shared by every layout; results are identical on any engine and number of workers.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from spatial_ev._validation import check_int, check_option, check_real
from spatial_ev.design.layouts import CandidateLayout, build_layout
from spatial_ev.design.simulate import (
    FRACTIONS,
    SimulationSettings,
    Simulator,
    environment_at,
    holm,
    layout_model,
    pilot_model,
)
from spatial_ev.errors import DesignError, InputError, SpatialEVWarning
from spatial_ev.pipeline.analysis import Analysis

__all__ = [
    "SPACE_LEVELS",
    "DesignEvaluation",
    "DesignSettings",
    "SpectralCoverage",
    "environment_at",
    "evaluate_design",
    "layout_basis",
    "spectral_coverage",
]

SPACE_LEVELS = ("corrected", "nominal")
_MIN_SITES = 10  # the simulated analysis, like analyse(), needs at least 10 sites
_FRACTIONS = FRACTIONS


# ------------------------------------------------------------------------------ coverage

@dataclass(frozen=True)
class SpectralCoverage:
    """Which scales each layout represents.

    Attributes
    ----------
    layouts : DataFrame
        One row per layout (index ``layout``): ``kind``, ``n_sites``, ``line_length``,
        ``scheme`` (the basis built), ``n_vectors``, ``broadest_scale`` (twice the layout's
        long side, :func:`~spatial_ev.space.scales.extent_wavelength`), ``finest_scale`` (the
        5 % quantile of the basis's vector scales), map units, ``note``.
    classes : DataFrame
        One row per (layout, pilot scale class): ``layout``, ``scale_class``, ``lower``,
        ``upper`` (map units), ``pilot_significant`` (bool: the pilot's class test, Holm-
        adjusted across its classes as simulated detections are, at most α),
        ``pilot_vectors`` (selected in
        the pilot), ``layout_vectors`` (layout basis vectors inside the bounds), ``carried``
        and ``aliased`` (expected share of a field in the class's band on the layout's
        in-band and other vectors, :func:`band_shares`), ``status`` (``"resolved"``: the
        class's own band holds the largest share of what the basis captures and at least a
        quarter of it; ``"partly"``: at least a quarter, but another band holds more; ``"not
        resolved"``: less, or no vector in the band — the structure is aliased onto other
        scales).
    bases : dict
        Layout name → its :class:`~spatial_ev.space.eigen.SpatialBasis`.
    """

    layouts: pd.DataFrame
    classes: pd.DataFrame
    bases: dict = field(repr=False)

    def to_frame(self) -> pd.DataFrame:
        """The per-class table."""
        return self.classes.copy()


def layout_basis(coords: Any, scheme: str) -> tuple[Any, str, str]:
    """Spatial basis of a layout under a weighting scheme (distance-based as fallback).

    Returns ``(basis, scheme_used, note)``. Raises :class:`DesignError` when the layout has too
    few sites for any positively autocorrelated vector.

    Examples
    --------
    >>> xy = np.column_stack([np.arange(20.0), np.zeros(20)])
    >>> basis, used, _ = layout_basis(xy, "distance")
    >>> used, basis.n_vectors
    ('distance', 9)
    """
    from spatial_ev.selection.weighting import check_schemes
    from spatial_ev.space.eigen import distance_eigenvectors, graph_eigenvectors
    from spatial_ev.space.graphs import neighbour_graph

    xy = np.asarray(coords, dtype=float)
    if len(xy) < 4:
        raise DesignError(f"a layout of {len(xy)} sites has no spatial eigenvector with positive "
                          "Moran's I (at least 4 sites are needed, 10 for the simulated "
                          "analysis); use a denser or larger layout")
    note = ""
    parsed = check_schemes([scheme if scheme != "none" else "distance"])[0]
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", SpatialEVWarning)
        try:
            if parsed[1] is None:
                basis, used = distance_eigenvectors(xy), "distance"
            else:
                graph = neighbour_graph(xy, method=parsed[1])
                basis = graph_eigenvectors(graph, weighting=parsed[2], exponent=parsed[3])
                used = scheme
        except InputError as exc:
            note = f"{scheme} could not be built here ({exc}); distance-based vectors used"
            basis, used = distance_eigenvectors(xy), "distance"
    if caught:
        note = (note + "; " if note else "") + "; ".join(str(w.message) for w in caught)
    if basis.n_vectors == 0:
        raise DesignError(f"a layout of {len(xy)} sites gives no spatial eigenvector with "
                          "positive Moran's I; use more sites")
    return basis, used, note


def _pilot_classes(pilot: Analysis) -> pd.DataFrame:
    """The pilot's scale classes; a class counts as found by the pilot by the rule the
    simulations judge detection with: its test's p-value, Holm-adjusted across the classes
    (:func:`~spatial_ev.design.simulate.holm`), at most α."""
    alpha = pilot.settings.alpha
    adjusted = holm({fit.scale_class.name: fit.p_value for fit in pilot.scale_fits})
    rows = []
    for fit in pilot.scale_fits:
        c = fit.scale_class
        p_holm = adjusted[c.name]
        rows.append({"scale_class": c.name, "lower": c.bounds[0], "upper": c.bounds[1],
                     "finest_selected": None if c.scale_range is None else c.scale_range[0],
                     "pilot_vectors": len(c.vectors), "r2_adj": fit.r2_adj, "p": fit.p_value,
                     "p_holm": p_holm,
                     "pilot_significant": bool(p_holm is not None and p_holm <= alpha)})
    return pd.DataFrame(rows)


#: least share of the class structure a layout's basis captures that must lie on its in-band
#: vectors for the class to count as (partly) resolved; the rest is aliased onto other scales
PARTLY_SHARE = 0.25
_COVERAGE_FEATURES = 512


def _status(count: int, name: str, shares: dict) -> str:
    """Resolved: the class's own band holds the largest share of what the basis captures of
    its structure and at least PARTLY_SHARE of it; partly: at least PARTLY_SHARE but another
    band holds more; not resolved: less, or no vector in the band (aliased)."""
    captured = sum(shares.values())
    in_band = shares[name] / captured if captured > 0 else 0.0
    if count == 0 or not in_band >= PARTLY_SHARE:
        return "not resolved"
    return "resolved" if shares[name] >= max(shares.values()) else "partly"


def band_shares(basis: Any, coords: Any, spectrum: tuple, vector_bands: dict, *,
                seed: int = 0) -> dict:
    """Expected share of a band-limited field carried by a basis's vectors of each scale band.

    A stationary field with the wavelength ``spectrum`` (``(wavelengths, weights)``; for
    coverage, log-uniform over a class's band, :func:`~spatial_ev.design.simulate.
    band_spectrum`) is sampled at the layout's sites; the share of its variation among the sites
    that lies on the basis's vectors whose scale falls in each of ``vector_bands`` (name →
    (lower, upper], map units) is estimated from 512 random waves, a fixed sample so tables
    repeat. What no vector carries (structure finer than the layout's positive-I vectors)
    is in none of the shares.

    Examples
    --------
    >>> basis, _, _ = layout_basis(xy, "distance")  # doctest: +SKIP
    >>> band_shares(basis, xy, band_spectrum((40.0, 80.0)),
    ...             {"fine": (0, 80.0), "broad": (80.0, np.inf)})
    ... # doctest: +SKIP
    {'fine': 0.61, 'broad': 0.12}
    """
    from spatial_ev.design.simulate import spectrum_wavelengths

    xy = np.asarray(coords, dtype=float)
    xy = xy - xy.mean(axis=0)
    rng = np.random.default_rng(seed)
    lam = spectrum_wavelengths(spectrum, rng.random(_COVERAGE_FEATURES),
                               rng.random(_COVERAGE_FEATURES))
    theta = rng.uniform(0, 2 * np.pi, _COVERAGE_FEATURES)
    phase = rng.uniform(0, 2 * np.pi, _COVERAGE_FEATURES)
    waves = np.cos(xy @ (2 * np.pi / lam * np.vstack([np.cos(theta), np.sin(theta)])) + phase)
    waves -= waves.mean(axis=0)
    total = float(np.sum(waves ** 2))
    u = basis.vectors.to_numpy()
    s = basis.scale.to_numpy()
    share = np.sum((u.T @ waves) ** 2, axis=1) / total
    return {name: float(share[(s > lo) & (s <= hi)].sum())
            for name, (lo, hi) in vector_bands.items()}


def spectral_coverage(pilot: Analysis, layouts: Sequence[CandidateLayout | str], *,
                      area: Any = None, seed: int | None = None) -> SpectralCoverage:
    """Scales each candidate layout represents, against the pilot's scale classes.

    Parameters
    ----------
    pilot : Analysis
        From :func:`spatial_ev.analyse`, or rebuilt from a run folder by
        :func:`spatial_ev.pipeline.rerun.load_pilot` (the caller's explicit step).
    layouts : sequence of CandidateLayout or layout spec strings
        See :mod:`spatial_ev.design.layouts` for the spec syntax.
    area : shapely Polygon, optional
        Study area for grids and augmentation (default: the pilot's convex hull).
    seed : int, optional
        For random thinning specs without their own seed.

    Returns
    -------
    SpectralCoverage

    Examples
    --------
    >>> cov = spectral_coverage(pilot, ["grid:spacing=40", "thin:every=2"])  # doctest: +SKIP
    >>> cov.classes["status"].unique()  # doctest: +SKIP
    """
    pilot, built = _check_pilot_layouts(pilot, layouts, area, seed)
    return _coverage(pilot, built)


def _coverage(pilot: Analysis, built: list[CandidateLayout]) -> SpectralCoverage:
    from spatial_ev.design.simulate import band_spectrum, class_band
    from spatial_ev.space.scales import resolvable_scales

    classes = _pilot_classes(pilot)
    bands = {r.scale_class: (r.lower, r.upper) for r in classes.itertuples()}
    # geometry only: a field spread evenly (log scale) over each class's band
    spectra = {r.scale_class: band_spectrum(class_band(pilot, r.scale_class))
               for r in classes.itertuples()}
    scheme = pilot.settings.chosen_scheme
    rows, crow, bases = [], [], {}
    for lay in built:
        xy = lay.coords.to_numpy()
        basis, used, note = layout_basis(xy, scheme)
        bases[lay.name] = basis
        scale = basis.scale.to_numpy()
        finest, broadest = resolvable_scales(basis.scale, xy)
        rows.append({"layout": lay.name, "kind": lay.kind, "n_sites": lay.n_sites,
                     "line_length": lay.line_length, "scheme": used,
                     "n_vectors": basis.n_vectors, "broadest_scale": broadest,
                     "finest_scale": finest,
                     "note": "; ".join(t for t in (lay.note, note) if t)})
        for c in classes.itertuples():
            count = int(np.count_nonzero((scale > c.lower) & (scale <= c.upper)))
            shares = band_shares(basis, xy, spectra[c.scale_class], bands)
            carried = shares[c.scale_class]
            aliased = sum(shares.values()) - carried
            crow.append({"layout": lay.name, "scale_class": c.scale_class, "lower": c.lower,
                         "upper": c.upper, "pilot_significant": c.pilot_significant,
                         "pilot_vectors": c.pilot_vectors, "layout_vectors": count,
                         "carried": carried, "aliased": aliased,
                         "status": _status(count, c.scale_class, shares)})
    return SpectralCoverage(pd.DataFrame(rows).set_index("layout"), pd.DataFrame(crow), bases)


def _check_pilot_layouts(pilot, layouts, area, seed) -> tuple[Analysis, list[CandidateLayout]]:
    if isinstance(pilot, str) or hasattr(pilot, "__fspath__"):
        raise InputError(f"`pilot` must be an Analysis; got the path {str(pilot)!r}. Rebuild a "
                         "run folder's analysis first with "
                         "spatial_ev.pipeline.rerun.load_pilot(folder) and pass the result")
    if not isinstance(pilot, Analysis):
        raise InputError(f"`pilot` must be an Analysis (from analyse() or load_pilot()); got "
                         f"{type(pilot).__name__}")
    if isinstance(layouts, (str, CandidateLayout)) or not hasattr(layouts, "__iter__"):
        layouts = [layouts]
    built = []
    for item in layouts:
        if isinstance(item, str):
            item = build_layout(item, pilot.survey.coords, area=area, crs=pilot.survey.crs,
                                distance_unit=pilot.survey.distance_unit, seed=seed)
        elif not isinstance(item, CandidateLayout):
            raise InputError(f"`layouts` entries must be CandidateLayout objects or spec "
                             f"strings such as 'grid:spacing=30'; got {type(item).__name__}")
        built.append(item)
    if not built:
        raise InputError("`layouts` is empty; give at least one candidate layout")
    names = [b.name for b in built]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise InputError(f"layout names must be unique; {dup} appear twice (add name=... to "
                         "the spec)")
    return pilot, built


# ------------------------------------------------------------------------------ result

@dataclass(frozen=True)
class DesignSettings:
    """Every parameter and choice of a design evaluation, as typed values.

    Attributes
    ----------
    seed : int
    n_simulations : int
    n_permutations : int
        Permutations per test of each simulated analysis.
    global_space_permutations : int
        Permutations of the spatial global test (enough to reach its level).
    alpha : float
    space_level : {"corrected", "nominal"}
    space_test_level : float
        The level that rule gives.
    target_power : float
    scheme : str
        The pilot's chosen weighting scheme.
    scale_breaks : tuple of float
    environment_source : str
        How the environment at new sites was obtained.
    residual_model : str
    pilot_seed : int
    engine : str
    layout_diagnostics : dict
        Layout name → diagnostics (variables constant there, share of sites with a
        simulated local environment).
    truth : {"unconditional", "conditional"}
        How the simulated landscapes relate to the pilot.

    Examples
    --------
    >>> ev.settings.n_simulations, ev.settings["seed"]  # doctest: +SKIP
    (100, 1)
    """

    seed: int
    n_simulations: int
    n_permutations: int
    global_space_permutations: int
    alpha: float
    space_level: str
    space_test_level: float
    target_power: float
    scheme: str
    scale_breaks: tuple[float, ...]
    environment_source: str
    residual_model: str
    pilot_seed: int
    engine: str
    layout_diagnostics: dict = field(repr=False)
    truth: str = "unconditional"

    def __getitem__(self, name: str) -> Any:
        """Read-only lookup by name (``settings["seed"]``), as in ``design.json``."""
        if not isinstance(name, str) or name not in self.__dataclass_fields__:
            raise KeyError(name)
        return getattr(self, name)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready record (the ``settings`` of ``design.json``)."""
        out = {f: getattr(self, f) for f in self.__dataclass_fields__}
        out["scale_breaks"] = list(self.scale_breaks)
        return out


@dataclass(frozen=True)
class DesignEvaluation:
    """Coverage and simulated power of candidate layouts, with recommendations.

    Attributes
    ----------
    layouts : tuple of CandidateLayout
    coverage : SpectralCoverage
    power : DataFrame
        One row per (layout, objective): ``layout``, ``objective`` (``"environment"`` or
        ``"scale:<class>"``), ``pilot_significant``, ``power`` (share of simulations that
        detected it), ``mc_se`` (its Monte Carlo standard error), ``ci_low``, ``ci_high``
        (Wilson 95 % interval), ``n_sites``, ``line_length``.
    fractions : DataFrame
        One row per (layout, fraction): ``pilot`` (the pilot's estimate), ``truth`` (mean over
        simulations of the partition with the generating predictors at the layout's sites),
        ``mean_estimate``, ``bias`` (mean of estimate − truth, per simulation), ``sd``.
    simulations : DataFrame
        One row per simulation: layout, replicate, detections, estimates, truths.
    recommendations : tuple of str
        One sentence per objective.
    settings : DesignSettings
        Every parameter and choice (seed, permutations, simulations, levels, environment
        source, residual model, scheme).
    notes : tuple of str
        Assumptions and per-layout remarks.
    stops : DataFrame
        Per layout and selection (``space``, ``environment``): the share of simulations whose
        selection stopped for each reason (``no global significance``, ``p > alpha``,
        ``ceiling``, ``exhausted``).
    """

    layouts: tuple[CandidateLayout, ...]
    coverage: SpectralCoverage
    power: pd.DataFrame
    fractions: pd.DataFrame
    simulations: pd.DataFrame = field(repr=False)
    recommendations: tuple[str, ...]
    settings: DesignSettings
    notes: tuple[str, ...]
    stops: pd.DataFrame = field(default_factory=pd.DataFrame, repr=False)

    def to_frame(self) -> pd.DataFrame:
        """The power table."""
        return self.power.copy()

    def summary(self) -> str:
        """Plain-text account: coverage, power, recommendations and assumptions."""
        lines = [f"{len(self.layouts)} candidate layout(s), {self.settings.n_simulations} "
                 f"simulations each, {self.settings.n_permutations} permutations per test, "
                 f"seed {self.settings.seed}"]
        cov = self.coverage.layouts
        for name, row in cov.iterrows():
            lines.append(f"  {name}: {row['n_sites']} sites, {row['n_vectors']} vectors "
                         f"({row['scheme']}), scales {row['finest_scale']:.4g}–"
                         f"{row['broadest_scale']:.4g}")
        for r in self.power.itertuples():
            lines.append(f"  power {r.layout} / {r.objective}: {r.power:.2f} ± {r.mc_se:.2f}")
        lines += list(self.recommendations)
        lines += list(self.notes)
        return "\n".join(lines)

    def to_dict(self) -> dict:
        """JSON-ready record (``design.json``)."""
        def clean(frame: pd.DataFrame) -> list[dict]:
            out = []
            plain = isinstance(frame.index, pd.RangeIndex)  # row numbers are not data
            for rec in frame.reset_index(drop=plain).to_dict(orient="records"):
                out.append({str(k): (None if isinstance(v, float) and not math.isfinite(v)
                                     else (round(v, 10) if isinstance(v, float) else
                                           (v.item() if hasattr(v, "item") else v)))
                            for k, v in rec.items()})
            return out
        return {"settings": self.settings.to_dict(),
                "layouts": clean(self.coverage.layouts),
                "coverage": clean(self.coverage.classes),
                "power": clean(self.power), "fractions": clean(self.fractions),
                "selection_stops": clean(self.stops),
                "recommendations": list(self.recommendations), "notes": list(self.notes)}


TRUTHS = ("unconditional", "conditional")


def _check_evaluate(n_simulations, n_permutations, alpha_target, space_level, seed, engine):
    n_simulations = check_int("n_simulations", n_simulations, low=1)
    n_permutations = check_int("n_permutations", n_permutations, low=19)
    target = check_real("target_power", alpha_target, low=0, high=1, low_inclusive=False)
    space_level = check_option("space_level", space_level, SPACE_LEVELS)
    check_option("engine", engine, ["local", "processes", "dask"])
    if seed is None:
        seed = int(np.random.SeedSequence().entropy % (2 ** 32))
    elif not isinstance(seed, (int, np.integer)) or isinstance(seed, bool) or seed < 0:
        raise InputError(f"parameter `seed` must be a non-negative integer (recorded so the "
                         f"design can be repeated); got {seed!r}")
    return n_simulations, n_permutations, target, space_level, int(seed)


def evaluate_design(pilot: Analysis, layouts: Sequence[CandidateLayout | str], *,
                    n_simulations: int = 100, n_permutations: int = 199,
                    target_power: float = 0.8, space_level: str = "corrected",
                    environment_layer: Any = None, area: Any = None,
                    reference: str = "pilot", truth: str = "unconditional",
                    seed: int | None = None,
                    engine: str = "local", scheduler: Any = None, n_workers: int | None = None,
                    progress: Callable[[int, int], Any] | None = None) -> DesignEvaluation:
    """Spectral coverage and simulated power of candidate sampling layouts.

    Parameters
    ----------
    pilot : Analysis
        The pilot analysis, from :func:`spatial_ev.analyse` or rebuilt from a run folder by
        :func:`spatial_ev.pipeline.rerun.load_pilot` (the caller's explicit step).
    layouts : sequence of CandidateLayout or spec strings
        See :mod:`spatial_ev.design.layouts` (e.g. ``"grid:spacing=30"``, ``"thin:every=2"``).
    n_simulations : int, keyword-only
        Simulated surveys per layout (power's Monte Carlo SE ≤ 0.5/√n_simulations).
    n_permutations : int
        Permutations per test in each simulated analysis (199 is enough; module docstring).
    target_power : float
        Power the recommendations ask for (default 0.8).
    space_level : {"corrected", "nominal"}
        Level of the spatial global test: the pilot's Šidák-corrected level (default; what a
        full analysis comparing schemes applies) or the nominal α.
    environment_layer : GeoDataFrame, optional
        Environmental values for new sites (default: interpolation from the pilot sites).
    area : shapely Polygon, optional
        Study area for grids and augmentation (default: the pilot's convex hull).
    reference : {"pilot", "none"}
        ``"pilot"``: also evaluate the pilot layout as sampled (named ``"pilot"``), the
        baseline the candidates are compared with; ``"none"``: only the candidates.
    truth : {"unconditional", "conditional"}
        ``"unconditional"`` (default): every simulation draws a new landscape like the
        pilot's ("a structure like this next season"); ``"conditional"``: the class
        structures are fixed at the pilot sites ("the same patches, in place").
    seed : int, optional
        One seed for every simulation (drawn and recorded when omitted); replicate r uses
        the same landscape at every layout.
    engine, scheduler, n_workers :
        Where simulations run (:func:`spatial_ev.inference.engines.run_tasks`): local threads or dask.
    progress : callable, optional
        ``progress(done, total)`` after each simulation.

    Returns
    -------
    DesignEvaluation

    Examples
    --------
    >>> result = evaluate_design(pilot, ["grid:spacing=60", "thin:every=2"],
    ...                          n_simulations=50, seed=1)  # doctest: +SKIP
    >>> print(result.recommendations[0])  # doctest: +SKIP
    """
    from spatial_ev.inference.engines import run_tasks

    n_simulations, n_permutations, target, space_level, seed = _check_evaluate(
        n_simulations, n_permutations, target_power, space_level, seed, engine)
    reference = check_option("reference", reference, ["pilot", "none"])
    truth = check_option("truth", truth, TRUTHS)
    pilot, built = _check_pilot_layouts(pilot, layouts, area, seed)
    if reference == "pilot" and "pilot" not in [b.name for b in built]:
        built = [CandidateLayout("pilot", "pilot", pilot.survey.coords[["x", "y"]].copy(), None,
                                 {}, f"the pilot's {pilot.survey.n_sites} sites as sampled")] \
            + built
    small = [f"{b.name!r} ({b.n_sites} sites)" for b in built if b.n_sites < _MIN_SITES]
    if small:
        raise DesignError(f"layout(s) {', '.join(small)} have fewer than {_MIN_SITES} sites: "
                          "too few for spatial eigenvectors, selection and permutation tests; "
                          "use denser or larger layouts")
    alpha = float(pilot.settings.alpha)
    level = float(pilot.weighting.alpha_corrected) if space_level == "corrected" else alpha
    coverage = _coverage(pilot, built)
    model = pilot_model(pilot)
    models, infos = [], {}
    for lay in built:
        lm, infos[lay.name] = layout_model(pilot, model, lay, coverage.bases[lay.name],
                                            environment_layer,
                                            conditional=truth == "conditional")
        models.append(lm)
    classes = _pilot_classes(pilot)
    global_permutations = max(n_permutations, math.ceil(4 / level) - 1)
    settings = SimulationSettings(alpha, level, n_permutations, global_permutations,
                                  pilot.settings.trend, tuple(pilot.settings.scale_breaks),
                                  tuple(classes["scale_class"]), model,
                                  step_tests=pilot.settings.step_tests)
    # common random numbers: replicate r draws the same landscape at every layout
    replicates = np.random.SeedSequence(seed).spawn(n_simulations)
    tasks = [(i, rep) for i in range(len(built)) for rep in replicates]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SpatialEVWarning)
        results = run_tasks(Simulator(models, settings), tasks, engine=engine,
                            scheduler=scheduler, n_workers=n_workers, progress=progress)
    sims = _simulation_frame(built, results, n_simulations)
    power, fractions = _power_tables(pilot, built, sims, classes, coverage)
    stops = _stop_table(sims)
    env_source = next((i["environment_source"] for i in infos.values()
                       if "environment_source" in i), "no environmental table")
    settings_out = DesignSettings(
        seed=seed, n_simulations=n_simulations, n_permutations=n_permutations,
        global_space_permutations=global_permutations, alpha=alpha, space_level=space_level,
        space_test_level=level, target_power=target, scheme=pilot.settings.chosen_scheme,
        scale_breaks=tuple(pilot.settings.scale_breaks), environment_source=env_source,
        residual_model=_residual_text(model), truth=truth,
        pilot_seed=pilot.settings.seed, engine=engine,
        layout_diagnostics={k: {kk: vv for kk, vv in v.items() if kk != "environment_source"}
                            for k, v in infos.items()})
    ceiling_notes = _ceiling_notes(power, stops)
    for text in ceiling_notes:
        warnings.warn(text, SpatialEVWarning, stacklevel=2)
    return DesignEvaluation(tuple(built), coverage, power, fractions, sims,
                            tuple(_recommend(power, coverage, target, classes, built)),
                            settings_out,
                            tuple([n for n in pilot.notes if n.startswith("The rebuilt pilot")]
                                  + ceiling_notes + _notes(infos, truth)), stops)


def _simulation_frame(built, results, n_sim) -> pd.DataFrame:
    rows = []
    for k, res in enumerate(results):
        lay = built[k // n_sim]
        row = {"layout": lay.name, "replicate": k % n_sim, **res["detected"],
               "n_environment": res["n_environment"], "n_space": res["n_space"],
               "space_stop": res["space_stop"], "environment_stop": res["environment_stop"]}
        row.update({f"estimate_{f}": v for f, v in zip(_FRACTIONS, res["estimate"])})
        row.update({f"truth_{f}": v for f, v in zip(_FRACTIONS, res["truth"])})
        row.update({f"carried_{c}": v for c, v in res["carried"].items()})
        row.update({f"aliased_{c}": v for c, v in res["aliased"].items()})
        rows.append(row)
    return pd.DataFrame(rows)


STOP_REASONS = ("no global significance", "p > alpha", "ceiling", "exhausted")


def _stop_table(sims: pd.DataFrame) -> pd.DataFrame:
    rows = []
    for name, part in sims.groupby("layout", sort=False):
        for what in ("space", "environment"):
            counts = part[f"{what}_stop"].value_counts()
            rows.append({"layout": name, "selection": what,
                         **{r: float(counts.get(r, 0)) / len(part) for r in STOP_REASONS}})
    return pd.DataFrame(rows)


def _ceiling_notes(power: pd.DataFrame, stops: pd.DataFrame) -> list[str]:
    """A warning per layout where the ceiling ended most spatial selections."""
    out = []
    pilot = power[(power["layout"] == "pilot") & power["pilot_significant"]]
    rates = ", ".join(f"{r.objective}: {r.power:.2f}" for r in pilot.itertuples())
    for r in stops[stops["selection"] == "space"].itertuples():
        share = getattr(r, "ceiling")
        if share > 0.5:
            out.append(f"{r.layout}: the adjusted-R² ceiling stopped the spatial selection in "
                       f"{share:.0%} of the simulations, so power there may be understated"
                       + (f"; the pilot layout re-detects what the pilot found at rates "
                          f"{rates}" if rates else "") + ".")
    return out


def _power_tables(pilot: Analysis, built, sims, classes,
                  coverage: SpectralCoverage) -> tuple[pd.DataFrame, pd.DataFrame]:
    objectives = ["environment"] + [f"scale:{c}" for c in classes["scale_class"]]
    sig = {f"scale:{r.scale_class}": r.pilot_significant for r in classes.itertuples()}
    env_p = (pilot.fraction_tests or {}).get("environment_only")
    sig["environment"] = bool(pilot.selected_environment) and env_p is not None \
        and env_p <= pilot.settings.alpha
    status = coverage.classes.set_index(["layout", "scale_class"])["status"]
    prow, frow = [], []
    pilot_fr = pilot.fractions or {}
    for lay in built:
        part = sims[sims["layout"] == lay.name]
        m = len(part)
        for obj in objectives:
            p = float(part[obj].mean()) if obj in part else 0.0
            low, high = _wilson(p, m)
            klass = obj[6:] if obj.startswith("scale:") else None
            carried = (float(part[f"carried_{klass}"].mean())
                       if klass and f"carried_{klass}" in part else np.nan)
            prow.append({"layout": lay.name, "objective": obj, "pilot_significant": sig[obj],
                         "power": p, "mc_se": math.sqrt(p * (1 - p) / m), "ci_low": low,
                         "ci_high": high, "resolution": (status[(lay.name, klass)] if klass
                                                         else "n/a"),
                         "carried": carried,
                         "n_sites": lay.n_sites, "line_length": lay.line_length})
        for f in _FRACTIONS:
            est, tru = part[f"estimate_{f}"], part[f"truth_{f}"]
            frow.append({"layout": lay.name, "fraction": f, "pilot": pilot_fr.get(f, np.nan),
                         "truth": float(tru.mean()), "mean_estimate": float(est.mean()),
                         "bias": float((est - tru).mean()), "sd": float(est.std(ddof=1))
                         if m > 1 else np.nan})
    return pd.DataFrame(prow), pd.DataFrame(frow)


def _residual_text(model) -> str:
    text = (f"pilot residual rows (inflated by {model.inflate:.4f}) drawn per site from its "
            "position; spatially independent")
    if any(c.name == "unselected" for c in model.components):
        text += ("; residual structure on the unselected vectors beyond chance simulated as a "
                 "field over the pilot's wavelengths")
    return text


def _wilson(p: float, m: int, z: float = 1.959964) -> tuple[float, float]:
    """Wilson score 95 % interval of a proportion p from m simulations (Wilson 1927, J. Am.
    Stat. Assoc. 22:209–212); unlike ±2 SE it stays informative at p = 0 or 1."""
    centre = (p + z * z / (2 * m)) / (1 + z * z / m)
    half = z * math.sqrt(p * (1 - p) / m + z * z / (4 * m * m)) / (1 + z * z / m)
    return max(0.0, min(p, centre - half)), min(1.0, max(p, centre + half))


def _line_text(length) -> str:
    """", L map units of line" for a transect, "" otherwise (None or NaN from mixed tables)."""
    if length is None or not isinstance(length, (int, float)) or not math.isfinite(length) \
            or length <= 0:
        return ""
    return f", {length:.4g} map units of line"


def _recommend(power, coverage, target, classes, built) -> list[str]:
    cost = {b.name: (b.n_sites, _finite(b.line_length)) for b in built}
    bounds = {f"scale:{r.scale_class}": (r.lower, r.upper) for r in classes.itertuples()}
    finest = {f"scale:{r.scale_class}": r.finest_selected for r in classes.itertuples()}
    out = []
    for obj, part in power.groupby("objective", sort=False):
        if not part["pilot_significant"].iloc[0]:
            continue
        if obj == "environment":
            label = "the environmental fraction"
            usable = part
        else:
            lo, hi = bounds[obj]
            label = (f"the {obj[6:]} scale class ({lo:.4g}–"
                     f"{'∞' if not math.isfinite(hi) else f'{hi:.4g}'} map units)")
            usable = part[part["resolution"] == "resolved"]
            aliased = part[(part["resolution"] != "resolved") & (part["power"] >= target)]
            for r in aliased.itertuples():
                out.append(f"{r.layout!r} reaches power {r.power:.2f} for {label} but does not "
                           f"resolve it ({r.resolution}: its vectors in that band carry "
                           f"{r.carried:.0%} of such structure); detections come from "
                           f"vectors of other scales picking up aliased structure, so it is "
                           f"not recommended for this class.")
        ok = usable[usable["power"] >= target]
        if len(ok):
            best = min(ok.itertuples(), key=lambda r: cost[r.layout])
            out.append(f"To detect {label} with power ≥ {target:g} you need {best.layout!r} "
                       f"({best.n_sites} sites{_line_text(best.line_length)}; estimated power "
                       f"{best.power:.2f}, 95 % interval {best.ci_low:.2f}–{best.ci_high:.2f}),"
                       f" the cheapest candidate that resolves it and reaches it.")
        else:
            pool = usable if len(usable) else part
            top = pool.loc[pool["power"].idxmax()]
            hint = "more sites over the same extent, or stronger replication"
            wave = finest.get(obj)
            if obj != "environment" and wave is not None and math.isfinite(wave):
                hint = (f"sites at most {wave / 4:.4g}–{wave / 2:.4g} map units apart where "
                        f"this class matters (its pilot structure reaches wavelengths of "
                        f"{wave:.4g}; the finest resolvable wavelength is ≈ 2–4 sampling "
                        f"intervals), or more sites over the same extent")
            which = "resolving candidates" if len(usable) else "candidates (none resolves it)"
            out.append(f"To detect {label} with power ≥ {target:g}: none of the {which} "
                       f"(best {top['layout']!r}, power {top['power']:.2f}); consider {hint}.")
    if not out:
        out.append("The pilot detected no environmental fraction or scale class, so there is "
                   "no effect whose detection a new layout could secure.")
    return out


def _finite(value) -> float:
    return float(value) if isinstance(value, (int, float)) and math.isfinite(value) else 0.0


def _notes(infos, truth: str = "unconditional") -> list[str]:
    notes = ["Simulations assume the pilot model is right (linear effects of the selected "
             "variables, each scale class's structure a stationary field with the class's "
             "wavelengths, species loadings and variance), stationarity over the layouts' "
             "area, and spatially independent residuals beyond the simulated fields; power "
             "is for this model's effect sizes and would be lower for weaker effects.",
             "A predicted power is conditional on this pilot: its structures, its noise and "
             "its chance selections. In the package's validation study (validation/"
             "design_power.md) predictions were right on average over independent pilots, "
             "but single pilots of a landscape that changes between surveys differed "
             "widely for sparse layouts, erring on the low side; a class the pilot did not "
             "detect gets no prediction and no recommendation.",
             ("Unconditional simulation: each simulated survey samples a new landscape with "
              "the pilot's structure (a structure like this next season), the same landscape "
              "at every layout." if truth == "unconditional" else
              "Conditional simulation: the class structures are fixed at the pilot sites (the "
              "same patches, in place) and simulated between them."),
             "Environment at new sites is the interpolated pilot environment plus a simulated "
             "local part with the pilot's interpolation error (from a layer: the layer's "
             "values, without error)."]
    for name, info in infos.items():
        if info.get("constant_environment"):
            notes.append(f"{name}: variable(s) {info['constant_environment']} take a single "
                         "value at this layout and cannot be selected there.")
    return notes
