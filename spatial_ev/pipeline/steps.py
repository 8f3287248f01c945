"""The named steps of the analysis: trend, environment, space, partition, scale classes.

:func:`~spatial_ev.pipeline.analysis.analyse` chains these steps on a survey, and the design
simulator (:mod:`spatial_ev.design.simulate`) chains the same steps on each simulated survey,
so there is one pipeline. Every step takes the community and what the earlier steps produced,
and returns a small frozen result whose ``notes`` (plain-language remarks on choices made) are
data: the caller collects them in order; nothing is appended to a shared list.

Steps
-----
- :func:`trend_step` — test a linear trend on the coordinates; keep it as covariables when
  significant.
- :func:`environment_step` — forward selection of environmental variables (global test,
  double stopping; Blanchet, Legendre & Borcard 2008).
- :func:`spectral_environment_step`, :func:`spectral_fraction_step` — Moran spectral
  randomisation of the environment and of the environment-only fraction (Wagner & Dray 2015).
- :func:`space_step` — compare weighting schemes at a Šidák-corrected level and select
  spatial vectors under the best (Bauman et al. 2018), or, given one basis, its global test at
  a given level and forward selection.
- :func:`partition_step` — the two-group partition (Borcard et al. 1992, Peres-Neto et al.
  2006) with the tests of the testable fractions.
- :func:`scale_class_step` — scale classes of the selected vectors, their tests, fits and
  scalogram (:mod:`spatial_ev.pipeline.scale_classes`); a river-network basis is predicted
  at points along the network (:func:`network_prediction_points`).

Directional schemes (river networks, a current's bearing) join the comparison through
:func:`directional_candidates`.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import math

import numpy as np
import pandas as pd
import scipy.spatial

from spatial_ev._validation import check_int, check_option, check_real, check_rng
from spatial_ev.errors import InputError
from spatial_ev.inference.permutation import PermutationTest, permutation_test
from spatial_ev.inference.spectral import (
    MAX_SITES,
    CompleteBasis,
    SpectralRandomisationTest,
    complete_spatial_basis,
    distance_decay_weights,
    spectral_randomisation_test,
)
from spatial_ev.input.network import RiverNetwork
from spatial_ev.input.survey import Survey
from spatial_ev.pipeline.options import DEFAULT_OPTIONS, STEP_TESTS, StepOptions
from spatial_ev.pipeline.scale_classes import (
    ScaleClassFit,
    fit_scale_classes,
    prediction_grid,
    residualise,
)
from spatial_ev.selection.forward import ForwardSelection, forward_selection
from spatial_ev.selection.partition import VariationPartition, partition_variation
from spatial_ev.selection.weighting import (
    WeightingComparison,
    compare_weighting_schemes,
)
from spatial_ev.space.directional import (
    EDGE_WEIGHTINGS,
    ORIENTATIONS,
    WEIGHT_BY,
    NetworkBasis,
    bearing_schemes,
    points_along_network,
    river_schemes,
)
from spatial_ev.space.eigen import DENSE_LIMIT, SpatialBasis, distance_eigenvectors
from spatial_ev.space.graphs import neighbour_graph
from spatial_ev.space.scales import (
    classify_scales,
    default_scale_breaks,
    extent_wavelength,
    scalogram,
)
from spatial_ev.stats.canonical import redundancy_analysis

__all__ = [
    "CANDIDATE_CELLS",
    "CandidateCount",
    "DIRECTIONAL_PREFIXES",
    "NETWORK_POINTS",
    "directional_candidates",
    "network_prediction_points",
    "FINEST_SPACINGS",
    "LARGE_SURVEY_VECTORS",
    "large_survey_candidates",
    "TREND_OPTIONS",
    "EnvironmentStep",
    "PartitionStep",
    "ScaleStep",
    "SpaceStep",
    "SpectralStep",
    "TrendStep",
    "environment_step",
    "partition_step",
    "scale_class_step",
    "space_group",
    "space_step",
    "spectral_environment_step",
    "spectral_fraction_step",
    "resolve_step_tests",
    "resolve_trend",
    "trend_step",
]

#: trend rules of the analysis; ``"auto"`` resolves to ``"test"``, or to ``"ignore"`` on a
#: river network (see :func:`resolve_trend`)
TREND_OPTIONS = ("auto", "test", "ignore")
LARGE_SURVEY_VECTORS = 200  # fewest broad vectors offered per scheme above the dense limit
#: values (sites × vectors) of one scheme's candidate table above the dense limit (16 MB):
#: 666 vectors at 3,001 sites, 400 at 5,000, the floor of 200 from 10,000 sites on
CANDIDATE_CELLS = 2_000_000
#: finest resolvable wavelength in median nearest-neighbour spacings (≈ 2–4 sampling
#: intervals; REFERENCES "Sampling design" [derived from the transect eigenfunctions])
FINEST_SPACINGS = 3.0
#: scale-class predictions of a river-network basis: points spaced total length / this number
#: along the channels (instead of the open grid of straight-line bases)
NETWORK_POINTS = 2000
#: name prefixes of directional schemes (river-network and bearing bases)
DIRECTIONAL_PREFIXES = ("river_", "bearing_")


def _level(alpha: float) -> float:
    return check_real("alpha", alpha, low=0, high=1, low_inclusive=False, high_inclusive=False)


# ------------------------------------------------------------------------------ trend

#: step-test rules of the analysis; ``"auto"`` resolves to ``"full"`` or ``"shared"`` by the
#: number of sites (see :func:`resolve_step_tests`)
STEP_TEST_OPTIONS = ("auto",) + STEP_TESTS
#: above this many sites ``step_tests="auto"`` shares one set of permutations among the steps
#: of a selection: per-step permutations then take most of an analysis (benchmarks/
#: analysis_scaling.py, 2,000 sites, 2 processes, 999 permutations: 51 s shared against
#: 270 s per step), while below it the whole analysis takes seconds (500 sites: 13 s)
SHARED_STEPS_ABOVE = 1000


def resolve_step_tests(mode: str, n_sites: int) -> tuple[str, str | None]:
    """The step-test rule that runs, and a note when ``"auto"`` chose shared permutations.

    ``"auto"`` draws new permutations for every forward-selection step test (``"full"``) up
    to :data:`SHARED_STEPS_ABOVE` sites, and above it tests every step of a selection on one
    shared set of permutations, updated as vectors enter (``"shared"``;
    :class:`~spatial_ev.inference.permutation.SharedStepPermutations`). Each shared step is
    the same permutation test on other random permutations; in simulations the numbers of
    vectors selected agree with per-step permutations (``validation/error_rates.md``).
    Other rules are kept as given.

    Parameters
    ----------
    mode : {"auto", "full", "sequential", "shared"}
    n_sites : int

    Returns
    -------
    mode : {"full", "sequential", "shared"}
    note : str or None

    Examples
    --------
    >>> resolve_step_tests("auto", 300)
    ('full', None)
    >>> resolve_step_tests("auto", 5000)[0]
    'shared'
    """
    check_option("step_tests", mode, STEP_TEST_OPTIONS)
    n_sites = check_int("n_sites", n_sites, low=1)
    if mode != "auto":
        return mode, None
    if n_sites <= SHARED_STEPS_ABOVE:
        return "full", None
    return "shared", (f"Every forward-selection step was tested on one set of permutations "
                      f"shared by the steps of its selection and updated as vectors entered "
                      f"(step-test rule 'auto' above {SHARED_STEPS_ABOVE:,} sites; with "
                      f"{n_sites:,} sites, new permutations for every step would take most "
                      f"of the analysis). Each step is the same permutation test; give the "
                      f"step-test rule 'full' to draw new permutations for every step.")


def resolve_trend(mode: str, *, on_network: bool) -> tuple[str, str | None]:
    """The trend rule that runs, and a note when ``"auto"`` chose to leave the trend out.

    ``"auto"`` tests a linear trend on the coordinates, except on a river network: there a
    plane through the site coordinates puts tributaries that lie side by side on one
    gradient, and the upstream–downstream structure it would take out first is what the
    directional (AEM) and along-network vectors are built to describe. ``"test"`` and
    ``"ignore"`` are kept as given.

    Parameters
    ----------
    mode : {"auto", "test", "ignore"}
    on_network : bool
        Whether the analysis has a river network.

    Returns
    -------
    mode : {"test", "ignore"}
    note : str or None

    Examples
    --------
    >>> resolve_trend("auto", on_network=False)
    ('test', None)
    >>> resolve_trend("auto", on_network=True)[0]
    'ignore'
    """
    check_option("trend", mode, TREND_OPTIONS)
    if not isinstance(on_network, (bool, np.bool_)):
        raise InputError(f"`on_network` must be True or False; got {on_network!r}")
    if mode != "auto":
        return mode, None
    if not on_network:
        return "test", None
    return "ignore", ("No linear trend on the site coordinates was tested (trend rule "
                      "'auto' on a river network): a plane through the coordinates would put "
                      "tributaries that lie side by side on one gradient, and the "
                      "upstream–downstream structure it would remove first is what the "
                      "directional and along-network vectors describe. Give the trend rule "
                      "'test' to test and keep a planar trend anyway.")


@dataclass(frozen=True)
class TrendStep:
    """A linear trend on the coordinates, tested and kept when significant.

    Attributes
    ----------
    test : PermutationTest or None
        Test of the community on the coordinates (None when the trend is not modelled).
    kept : bool
        Whether the trend is significant and kept as covariables.
    covariables : DataFrame or None
        The centred coordinates (``trend_x``, ``trend_y``) when kept.
    notes : tuple of str
    """

    test: PermutationTest | None
    kept: bool
    covariables: pd.DataFrame | None = field(repr=False)
    notes: tuple[str, ...] = ()


def trend_step(Y: pd.DataFrame | np.ndarray, coords: pd.DataFrame, *, mode: str = "test",
               alpha: float = 0.05, seed: int | np.random.Generator | None = None,
               options: StepOptions = DEFAULT_OPTIONS) -> TrendStep:
    """Test a linear trend on the coordinates; keep it as covariables when p ≤ α.

    Parameters
    ----------
    Y : DataFrame or ndarray, shape (n_sites, n_responses)
        The transformed community.
    coords : DataFrame with columns ``x``, ``y``
        Site coordinates in map units (rows in the order of ``Y``).
    mode : {"test", "ignore"}
        ``"ignore"``: the trend is not modelled (no test, nothing kept).
    alpha : float
    seed : int or numpy.random.Generator, optional
    options : StepOptions

    Returns
    -------
    TrendStep

    Examples
    --------
    >>> step = trend_step(Y, survey.coords, seed=1)  # doctest: +SKIP
    >>> step.kept  # doctest: +SKIP
    True
    """
    check_option("mode", mode, ("test", "ignore"))
    alpha = _level(alpha)
    if not isinstance(coords, pd.DataFrame) or list(coords.columns) != ["x", "y"]:
        raise InputError("`coords` must be a DataFrame with columns ['x', 'y'] (map units); "
                         f"got {type(coords).__name__}"
                         + (f" with columns {list(coords.columns)}"
                            if isinstance(coords, pd.DataFrame) else ""))
    if mode == "ignore":
        return TrendStep(None, False, None)
    options.say("testing a linear trend on the coordinates")
    xy = coords - coords.mean()
    test = permutation_test(Y, xy, seed=seed, **options.tests())
    kept = bool(test.p_value <= alpha)
    if not kept:
        return TrendStep(test, False, None)
    note = (f"A linear trend on the coordinates is significant (adjusted R² "
            f"{test.r2_adj:.3f}, p = {test.p_value:.4g}); it is kept as a covariable so the "
            f"spatial vectors describe structure beyond the trend, and it counts in the "
            f"spatial fraction.")
    return TrendStep(test, True, xy.rename(columns={"x": "trend_x", "y": "trend_y"}), (note,))


# ------------------------------------------------------------------------------ environment

@dataclass(frozen=True)
class EnvironmentStep:
    """Forward selection of environmental variables (None without an environmental table).

    Attributes
    ----------
    selection : ForwardSelection or None
    notes : tuple of str
    """

    selection: ForwardSelection | None
    notes: tuple[str, ...] = ()


def environment_step(Y: pd.DataFrame | np.ndarray, environment: pd.DataFrame | None, *,
                     alpha: float = 0.05, seed: int | np.random.Generator | None = None,
                     options: StepOptions = DEFAULT_OPTIONS) -> EnvironmentStep:
    """Forward-select environmental variables (global test first, double stopping).

    Parameters
    ----------
    Y : DataFrame or ndarray, shape (n_sites, n_responses)
    environment : DataFrame or None
        Candidate variables (standardised); None skips the step.
    alpha : float
    seed : int or numpy.random.Generator, optional
    options : StepOptions

    Returns
    -------
    EnvironmentStep

    Examples
    --------
    >>> step = environment_step(Y, env, seed=1)  # doctest: +SKIP
    >>> step.selection.selected  # doctest: +SKIP
    ('elevation_m', 'salinity_psu')
    """
    alpha = _level(alpha)
    if environment is None:
        return EnvironmentStep(None)
    if not isinstance(environment, pd.DataFrame):
        raise InputError(f"`environment` must be a DataFrame of named variables or None; got "
                         f"{type(environment).__name__}")
    options.say(f"forward selection among {environment.shape[1]} environmental variables")
    return EnvironmentStep(forward_selection(Y, environment, alpha=alpha, seed=seed,
                                             progress=options.progress,
                                             **options.selection_tests()))


# ------------------------------------------------------------------------------ spectral tests

@dataclass(frozen=True)
class SpectralStep:
    """A Moran spectral randomisation test with its notes.

    Attributes
    ----------
    test : SpectralRandomisationTest or None
        None when skipped (too many sites).
    full_basis : CompleteBasis or None
        The complete basis the randomisation used (reused by the fraction test).
    notes : tuple of str
    """

    test: SpectralRandomisationTest | None
    full_basis: CompleteBasis | None = field(repr=False)
    notes: tuple[str, ...] = ()


def spectral_environment_step(Y: pd.DataFrame | np.ndarray, environment: pd.DataFrame,
                              selection: ForwardSelection | None, survey: Survey, *,
                              alpha: float = 0.05,
                              seed: int | np.random.Generator | None = None,
                              options: StepOptions = DEFAULT_OPTIONS) -> SpectralStep:
    """Moran spectral randomisation test of the community on all environmental variables.

    Distance-decay weighting exp(−d/t) (t the truncation distance); skipped above
    :data:`~spatial_ev.inference.spectral.MAX_SITES` sites. The notes compare it with the
    free-permutation global test of ``selection``.

    Parameters
    ----------
    Y : DataFrame or ndarray, shape (n_sites, n_responses)
    environment : DataFrame
    selection : ForwardSelection or None
        The environmental selection (its global test is quoted in the note).
    survey : Survey
    alpha : float
    seed : int or numpy.random.Generator, optional
    options : StepOptions
        ``n_permutations`` randomisations.

    Returns
    -------
    SpectralStep

    Examples
    --------
    >>> step = spectral_environment_step(Y, env, None, survey, seed=1)  # doctest: +SKIP
    """
    alpha = _level(alpha)
    if not isinstance(survey, Survey):
        raise InputError(f"`survey` must be a Survey; got {type(survey).__name__}")
    if survey.n_sites > MAX_SITES:
        skipped = (f"The spectral randomisation test of the environment was skipped: it needs "
                   f"a dense eigendecomposition, done up to {MAX_SITES} sites "
                   f"({survey.n_sites} here). The free-permutation test of the environment is "
                   f"liberal if the environment is spatially autocorrelated.")
        return SpectralStep(None, None, (skipped,))
    options.say("testing the environment by Moran spectral randomisation")
    full = complete_spatial_basis(distance_decay_weights(survey))
    test = spectral_randomisation_test(Y, environment, full,
                                       n_randomisations=options.n_permutations, seed=seed,
                                       engine=options.engine, scheduler=options.scheduler)
    free = selection.global_test.p_value \
        if selection is not None and selection.global_test else None
    notes = [f"The community–environment link was also tested by Moran spectral "
             f"randomisation of the environmental table (Wagner & Dray 2015; distance-decay "
             f"weighting, {test.n_randomisations} randomisations), which keeps each "
             f"variable's spatial autocorrelation: p = {test.p_value:.4g}"
             + (f" (free permutations: p = {free:.4g})." if free is not None else ".")
             + " It is exact only when the weighting describes the environment's "
             "autocorrelation; in spatial_ev's simulation studies (exponential, Gaussian, "
             "spherical and anisotropic environmental autocorrelation, 36–40 sites) it "
             "stayed near the 5 % level where free permutations rejected 12–86 % of true "
             "null hypotheses."]
    if free is not None and free <= alpha < test.p_value:
        notes.append("Only the free-permutation test of the environment is significant: the "
                     "environmental selection and fractions may reflect a chance match between "
                     "two spatially autocorrelated tables rather than a real link; confirm with "
                     "independent data before acting on them.")
    return SpectralStep(test, full, tuple(notes))


def spectral_fraction_step(Y: pd.DataFrame | np.ndarray, environment_group: pd.DataFrame,
                           space_group: pd.DataFrame, full_basis: CompleteBasis,
                           permutation_p: float, *, alpha: float = 0.05,
                           seed: int | np.random.Generator | None = None,
                           options: StepOptions = DEFAULT_OPTIONS) -> SpectralStep:
    """Spectral randomisation test of the environment-only fraction [a].

    The environmental group is randomised given the spatial group; the note compares the
    result with ``permutation_p``, the fraction's test by permutation of residuals.

    Parameters
    ----------
    Y : DataFrame or ndarray, shape (n_sites, n_responses)
    environment_group, space_group : DataFrame
        The two groups of the partition.
    full_basis : CompleteBasis
        From :func:`spectral_environment_step`.
    permutation_p : float
        p of the fraction by permutation of residuals.
    alpha : float
    seed : int or numpy.random.Generator, optional
    options : StepOptions

    Returns
    -------
    SpectralStep

    Examples
    --------
    >>> step = spectral_fraction_step(Y, env_group, space_group, full, 0.001,
    ...                               seed=1)  # doctest: +SKIP
    """
    alpha = _level(alpha)
    if not isinstance(full_basis, CompleteBasis):
        raise InputError(f"`full_basis` must be the CompleteBasis of the environment's "
                         f"spectral test; got {type(full_basis).__name__}")
    options.say("testing the environment-only fraction by Moran spectral randomisation")
    test = spectral_randomisation_test(Y, environment_group, full_basis,
                                       conditioning=space_group,
                                       n_randomisations=options.n_permutations, seed=seed,
                                       engine=options.engine, scheduler=options.scheduler)
    notes = [(f"The environment-only fraction was also tested by spectral randomisation of "
              f"the selected environmental variables given the spatial group: p = "
              f"{test.p_value:.4g} (permutation of residuals: p = {permutation_p:.4g}).")]
    if permutation_p <= alpha < test.p_value:
        notes.append("The environment-only fraction is significant by permutation of "
                     "residuals but not by spectral randomisation: part of it may be a chance "
                     "match between spatially autocorrelated residuals and environment.")
    return SpectralStep(test, None, tuple(notes))


# ------------------------------------------------------------------------------ space

@dataclass(frozen=True)
class SpaceStep:
    """Spatial vectors selected under the chosen weighting scheme.

    Attributes
    ----------
    basis : SpatialBasis
        The chosen scheme's basis; when no scheme was significant, the distance-based basis
        (scale reference and scalogram only); the given basis on the one-basis path.
    selection : ForwardSelection or None
        None when no global test was significant.
    weighting : WeightingComparison or None
        The scheme comparison (None on the one-basis path).
    chosen : str
        The chosen scheme's name, ``"none"`` when no scheme was significant, ``"given"`` on
        the one-basis path.
    global_p : float or None
        p of the chosen scheme's global test (the smallest when none was chosen).
    max_vectors : int or None
        The cap on vectors per scheme that was applied.
    notes : tuple of str
    candidates : CandidateCount or None
        How the number of candidate vectors was set above the dense-solver limit (None when
        every vector was a candidate or ``max_vectors`` was given).
    """

    basis: SpatialBasis = field(repr=False)
    selection: ForwardSelection | None
    weighting: WeightingComparison | None
    chosen: str
    global_p: float | None
    max_vectors: int | None = None
    notes: tuple[str, ...] = ()
    candidates: CandidateCount | None = None


def space_step(Y: pd.DataFrame | np.ndarray, survey: Survey | None = None, *,
               schemes: Sequence[str] | None = None, basis: SpatialBasis | None = None,
               level: float | None = None, global_permutations: int | None = None,
               alpha: float = 0.05, conditioning: pd.DataFrame | None = None,
               max_vectors: int | None = None, seed: int | np.random.Generator | None = None,
               options: StepOptions = DEFAULT_OPTIONS, network: RiverNetwork | None = None,
               bearing: float | None = None, orientations: Sequence[str] = ("with_flow",),
               edge_weightings: Sequence[str] = ("binary", "linear"),
               weight_by: str = "edge_length", add_directional: bool = True) -> SpaceStep:
    """Select spatial eigenvectors: compare schemes, or judge one given basis.

    With ``schemes`` (and ``survey``): every scheme's basis is built and its global test judged
    at the Šidák-corrected level; forward selection runs under each significant scheme and the
    best adjusted R² is chosen (:func:`~spatial_ev.selection.weighting.
    compare_weighting_schemes`). Above :data:`~spatial_ev.space.eigen.DENSE_LIMIT` sites only
    the broadest vectors are computed (Lanczos), as many as :func:`large_survey_candidates`
    sets from the layout (down to its finest resolvable scale, within a stated budget) unless
    ``max_vectors`` says otherwise; a note says how many and why.

    With ``basis``: its global test (``global_permutations`` permutations) is judged at
    ``level``; when significant, forward selection (level α, double stopping) runs without a
    second global test. The design simulator uses this path with each layout's basis at the
    pilot's corrected level, standing for next season's comparison of schemes.

    With a river ``network`` or a ``bearing``, the directional bases of
    :func:`directional_candidates` join the straight-line ``schemes`` (each counts in the
    Šidák correction); with ``add_directional=False`` only the schemes named in ``schemes``
    are built (a directional name such as ``"river_aem/binary"`` then names that one basis).

    Parameters
    ----------
    Y : DataFrame or ndarray, shape (n_sites, n_responses)
    survey : Survey, optional
        Needed with ``schemes``.
    schemes : sequence of str, optional
    basis : SpatialBasis, optional
        Exactly one of ``schemes`` and ``basis``.
    level : float, optional
        Level of the given basis's global test (default α).
    global_permutations : int, optional
        Permutations of that test (default ``options.n_permutations``).
    alpha : float
    conditioning : DataFrame, optional
        The kept trend.
    max_vectors : int, optional
    seed : int or numpy.random.Generator, optional
    options : StepOptions
    network : RiverNetwork, optional
        The survey's river network (its sites in the survey's order).
    bearing : float, optional
        Direction of a current or wind, degrees clockwise from grid north.
    orientations, edge_weightings, weight_by
        The directional schemes built (see :func:`directional_candidates`).
    add_directional : bool
        Add every directional scheme to ``schemes`` (True, a comparison) or build only those
        ``schemes`` names.

    Returns
    -------
    SpaceStep

    Examples
    --------
    >>> step = space_step(Y, survey, schemes=["distance", "gabriel/binary"],
    ...                   seed=1)  # doctest: +SKIP
    >>> step.chosen  # doctest: +SKIP
    'gabriel/binary'
    """
    alpha = _level(alpha)
    if (schemes is None) == (basis is None):
        raise InputError("give exactly one of `schemes` (compare weighting schemes on the "
                         "survey) and `basis` (judge one basis); got "
                         + ("both" if basis is not None else "neither"))
    if basis is not None:
        return _one_basis(Y, basis, level=alpha if level is None else _level(level),
                          global_permutations=global_permutations, alpha=alpha,
                          conditioning=conditioning, seed=seed, options=options)
    if not isinstance(survey, Survey):
        raise InputError(f"`survey` must be a Survey when schemes are compared; got "
                         f"{type(survey).__name__}")
    notes = []
    options.say(f"comparing {len(schemes)} spatial weighting scheme(s)")
    candidates = None
    if max_vectors is None and survey.n_sites > DENSE_LIMIT:
        candidates = large_survey_candidates(survey.coords)
        max_vectors = candidates.n_vectors
        notes.append(candidates.reason)
    if network is not None or bearing is not None:
        schemes, said = _with_directional(survey, list(schemes), network=network,
                                          bearing=bearing, orientations=orientations,
                                          edge_weightings=edge_weightings,
                                          weight_by=weight_by, add=add_directional,
                                          max_vectors=max_vectors)
        notes.extend(said)
    else:
        _refuse_directional_names(schemes)
    weighting = compare_weighting_schemes(Y, survey, schemes=schemes, alpha=alpha, seed=seed,
                                          conditioning=conditioning, max_vectors=max_vectors,
                                          progress=options.progress, n_workers=options.n_workers,
                                          **options.selection_tests())
    chosen_basis = weighting.basis
    if chosen_basis is None:
        notes.append("No spatial weighting scheme had a significant global test at the "
                     "corrected level: no spatial structure beyond the trend was "
                     "detected. Scales below refer to the distance-based basis.")
        chosen_basis = distance_eigenvectors(survey, max_vectors=max_vectors)
    table = weighting.table
    global_p = None
    if weighting.best is not None:
        global_p = float(table.loc[weighting.best, "global_p"])
    elif len(table) and np.isfinite(table["global_p"]).any():
        global_p = float(table["global_p"].min())
    return SpaceStep(chosen_basis, weighting.selection, weighting, weighting.best or "none",
                     global_p, max_vectors, tuple(notes), candidates)


def _is_directional(name: str) -> bool:
    return isinstance(name, str) and name.startswith(DIRECTIONAL_PREFIXES)


def _refuse_directional_names(schemes) -> None:
    names = [n for n in (schemes or ()) if _is_directional(n)]
    if names:
        raise InputError(f"scheme {names[0]!r} is a directional scheme: it needs a river "
                         f"network (`network`) or a current's direction (`bearing`); give one, "
                         f"or name a straight-line scheme such as 'distance'")


def directional_candidates(survey: Survey, *, network: RiverNetwork | None = None,
                           bearing: float | None = None,
                           orientations: Sequence[str] = ("with_flow",),
                           edge_weightings: Sequence[str] = ("binary", "linear"),
                           weight_by: str = "edge_length", max_vectors: int | None = None,
                           names: Sequence[str] | None = None) -> dict[str, SpatialBasis]:
    """The directional spatial bases of a survey, named as weighting schemes.

    With a river ``network``: the AEM of the network for each orientation and edge weighting
    (``"river_aem/<weighting>"``, ``"river_aem_against/<weighting>"``) and the distance-based
    eigenvectors of along-network distances (``"river_distance"``), as
    :func:`~spatial_ev.space.directional.river_schemes` builds them. With a ``bearing``: the
    AEM of the survey's Delaunay graph oriented along it (``"bearing_<deg>/<weighting>"``,
    :func:`~spatial_ev.space.directional.bearing_schemes`).

    Parameters
    ----------
    survey : Survey
    network : RiverNetwork, optional
        Built for this survey (same sites in the same order).
    bearing : float, optional
        Degrees clockwise from grid north.
    orientations : sequence of {"with_flow", "against_flow"}
    edge_weightings : sequence of str
        ``"binary"``, ``"linear"``, ``"concave_down:<α>"``, ``"concave_up:<β>"``.
    weight_by : {"edge_length", "network_distance"}
        What the river AEM's non-binary weightings are a function of.
    max_vectors : int, optional
        Keep at most this many broad vectors per basis.
    names : sequence of str, optional
        Build only these schemes (each must be one the other arguments offer).

    Returns
    -------
    dict of str to SpatialBasis

    Examples
    --------
    >>> net = read_river_network("data_demo/river/network.gpkg", survey,
    ...                          snap_tolerance=30)  # doctest: +SKIP
    >>> sorted(directional_candidates(survey, network=net))  # doctest: +SKIP
    ['river_aem/binary', 'river_aem/linear', 'river_distance']
    """
    if not isinstance(survey, Survey):
        raise InputError(f"`survey` must be a Survey; got {type(survey).__name__}")
    if network is None and bearing is None:
        raise InputError("give a river `network` or a `bearing` (degrees) for directional "
                         "schemes; got neither")
    if isinstance(orientations, str) or isinstance(edge_weightings, str):
        raise InputError("`orientations` and `edge_weightings` must be sequences of names, "
                         "e.g. ('with_flow',) and ('binary', 'linear')")
    for o in orientations:
        check_option("orientations", o, ORIENTATIONS)
    for w in edge_weightings:
        check_option("edge_weightings", str(w).partition(":")[0], EDGE_WEIGHTINGS)
    check_option("weight_by", weight_by, WEIGHT_BY)
    wanted = None if names is None else set(names)
    out: dict[str, SpatialBasis] = {}
    if network is not None:
        if not isinstance(network, RiverNetwork):
            raise InputError(f"`network` must be a RiverNetwork (read_river_network); got "
                             f"{type(network).__name__}")
        ids = survey.coords.index
        if len(network.site_ids) != len(ids) or not network.site_ids.equals(ids):
            raise InputError("`network` was built for other sites than the survey's (ids or "
                             "order differ); read it with this survey: "
                             "read_river_network(path, survey, ...)")
        aem = {f"{'river_aem' if o == 'with_flow' else 'river_aem_against'}/{w}": (o, w)
               for o in orientations for w in edge_weightings}
        keep = aem if wanted is None else {k: v for k, v in aem.items() if k in wanted}
        for name, (o, w) in keep.items():      # a handful of schemes
            out.update(river_schemes(network, orientations=(o,), weightings=(w,),
                                     weight_by=weight_by, network_distance=False,
                                     max_vectors=max_vectors))
        if wanted is None or "river_distance" in wanted:
            out.update(river_schemes(network, orientations=(), weightings=(),
                                     network_distance=True, max_vectors=max_vectors))
    if bearing is not None:
        graph = neighbour_graph(survey, "delaunay")
        built = bearing_schemes(graph, bearing=bearing, orientations=tuple(orientations),
                                weightings=tuple(edge_weightings), max_vectors=max_vectors,
                                distance_unit=survey.distance_unit)
        out.update(built if wanted is None else
                   {k: v for k, v in built.items() if k in wanted})
    if wanted is not None:
        offered = _offered_names(network, bearing, orientations, edge_weightings)
        missing = [n for n in names if n not in out]
        if missing:
            raise InputError(f"scheme {missing[0]!r} is not one of the directional schemes "
                             f"these options offer ({', '.join(offered)}); check the name, "
                             f"the orientations and the edge weightings")
    return out


def _offered_names(network, bearing, orientations, weightings) -> list[str]:
    out = []
    if network is not None:
        out += [f"{'river_aem' if o == 'with_flow' else 'river_aem_against'}/{w}"
                for o in orientations for w in weightings] + ["river_distance"]
    if bearing is not None:
        label = f"bearing_{float(bearing) % 360:g}"
        out += [f"{label if o == 'with_flow' else label + '_against'}/{w}"
                for o in orientations for w in weightings]
    return out


def _with_directional(survey, schemes, *, network, bearing, orientations, edge_weightings,
                      weight_by, add, max_vectors) -> tuple[dict, tuple[str, ...]]:
    """The schemes mapping with the directional bases, and the notes saying so."""
    named = [n for n in schemes if _is_directional(n)]
    if add:
        bases = directional_candidates(survey, network=network, bearing=bearing,
                                       orientations=orientations,
                                       edge_weightings=edge_weightings, weight_by=weight_by,
                                       max_vectors=max_vectors)
        straight = [n for n in schemes if not _is_directional(n)]
        mapping = {**bases, **{n: n for n in straight}}
    else:
        bases = directional_candidates(survey, network=network, bearing=bearing,
                                       orientations=orientations,
                                       edge_weightings=edge_weightings, weight_by=weight_by,
                                       max_vectors=max_vectors, names=named) if named else {}
        mapping = {n: bases.get(n, n) for n in schemes}
    notes = []
    if bases:
        straight = [n for n in mapping if n not in bases]
        what = (f"The directional scheme {', '.join(bases)} was named alone (no comparison)"
                if len(mapping) == 1 else
                f"Directional schemes compared: {', '.join(bases)}"
                + (f", beside the straight-line schemes {', '.join(straight)}" if straight
                   else "")
                + f"; each counts in the Šidák-corrected level ({len(mapping)} schemes)")
        notes.append(
            what + ". AEM "
            f"(asymmetric eigenvector maps; Blanchet, Legendre & Borcard 2008, Ecological "
            f"Modelling 215:325–336) describe a process travelling one way "
            + ("along the river network with the flow" if network is not None else
               f"along the bearing {float(bearing) % 360:g}°")
            + ("; against-flow AEM the opposite way" if "against_flow" in orientations
               else "") + ".")
    if network is not None and any(n.startswith("river_") for n in bases):
        s = network.summary()
        notes.append(
            f"River network from {network.source}: {s['n_edges']} edges, total length "
            f"{s['total_length']:.6g} {network.distance_unit}, flow direction "
            + ("from the digitised lines" if network.direction == "digitised"
               else "towards the declared outlet(s)")
            + f", sites snapped within {network.snap_tolerance:g} {network.distance_unit} "
            f"(largest {s['snap_distance']['max']:.4g}, site "
            f"{s['snap_distance']['farthest_site']}). Scales of the river-network bases are "
            f"lengths along the network (equivalent wavelengths measured along the "
            f"channels), not straight-line distances.")
    return mapping, tuple(notes)


def network_prediction_points(basis: SpatialBasis, survey: Survey) -> tuple[pd.DataFrame,
                                                                              str | None]:
    """Where a basis's scale classes are predicted, and a note when it is not the open grid.

    A river-network basis: :data:`NETWORK_POINTS` points spaced evenly along the network
    (:func:`~spatial_ev.space.directional.points_along_network`, columns ``x``, ``y``,
    ``edge``, ``offset``); a bearing basis: no points (its vectors are defined at the sites
    only); any other basis: the open grid of
    :func:`~spatial_ev.pipeline.scale_classes.prediction_grid`.

    Examples
    --------
    >>> points, note = network_prediction_points(step.basis, survey)  # doctest: +SKIP
    """
    if not isinstance(basis, NetworkBasis):
        return prediction_grid(survey), None
    net = None if basis.directional is None else basis.directional.network
    if net is None:
        empty = pd.DataFrame(columns=["x", "y"], dtype=float)
        return empty, ("The chosen basis is oriented along a bearing: its vectors are defined "
                       "at the sampled sites only, so the scale classes are mapped at the "
                       "sites without predictions between them.")
    spacing = net.total_length / NETWORK_POINTS
    points = points_along_network(net, spacing=spacing)
    return points, (f"Scale classes are predicted at {len(points)} points spaced about "
                    f"{spacing:.4g} {net.distance_unit} along the river network (not on an "
                    f"open grid: the structure is defined along the channels only).")


@dataclass(frozen=True)
class CandidateCount:
    """How many spatial vectors per scheme are candidates on a large survey, and why.

    Attributes
    ----------
    n_vectors : int
        Candidates per scheme: ``min(design_vectors, budget_vectors)``.
    design_vectors : int
        Vectors down to the finest scale the layout resolves (Weyl's law for its convex
        hull: π·area/s² in two dimensions, 2·length/s on a line), at most ``n_sites // 2``
        (about the number of positively autocorrelated vectors).
    budget_vectors : int
        The computing budget: :data:`CANDIDATE_CELLS` table values per scheme, never fewer
        than :data:`LARGE_SURVEY_VECTORS`.
    finest_scale : float
        Finest resolvable wavelength s = :data:`FINEST_SPACINGS` × ``spacing`` (map units).
    spacing : float
        Median distance from a site to its nearest neighbour (map units).
    reason : str
        Plain-language note of the above.
    """

    n_vectors: int
    design_vectors: int
    budget_vectors: int
    finest_scale: float
    spacing: float
    reason: str


def large_survey_candidates(coords: pd.DataFrame) -> CandidateCount:
    """Number of candidate spatial vectors per scheme for a survey above the dense limit.

    The design sets the target: every vector down to the finest wavelength the layout
    resolves, ≈ :data:`FINEST_SPACINGS` sampling intervals (the median nearest-neighbour
    distance), counted by Weyl's law for the convex hull. A budget of
    :data:`CANDIDATE_CELLS` values per scheme's candidate table (sites × vectors; Lanczos
    time and memory grow with it) caps it, never below :data:`LARGE_SURVEY_VECTORS`.

    Parameters
    ----------
    coords : DataFrame with columns ``x``, ``y``
        Site coordinates in map units (at least 3 distinct sites).

    Returns
    -------
    CandidateCount

    Examples
    --------
    >>> gx, gy = np.meshgrid(np.arange(100.0), np.arange(100.0))
    >>> count = large_survey_candidates(pd.DataFrame({"x": gx.ravel(), "y": gy.ravel()}))
    >>> count.spacing, count.design_vectors, count.budget_vectors, count.n_vectors
    (1.0, 3422, 200, 200)
    """
    if not isinstance(coords, pd.DataFrame) or list(coords.columns) != ["x", "y"]:
        raise InputError("`coords` must be a DataFrame with columns ['x', 'y'] (map units); "
                         f"got {type(coords).__name__}")
    xy = coords.to_numpy(dtype=float)
    n = xy.shape[0]
    if n < 3 or not np.isfinite(xy).all():
        raise InputError(f"`coords` must hold at least 3 sites with finite coordinates; got "
                         f"{n} rows" + ("" if np.isfinite(xy).all() else " with NaN/inf"))
    distance = scipy.spatial.cKDTree(xy).query(xy, k=2)[0][:, 1]
    spacing = float(np.median(distance[distance > 0])) if (distance > 0).any() else 0.0
    if spacing <= 0:
        raise InputError("`coords` are all the same point; a layout needs distinct sites")
    finest = FINEST_SPACINGS * spacing
    try:
        area = float(scipy.spatial.ConvexHull(xy - xy.mean(axis=0)).volume)
    except scipy.spatial.QhullError:
        area = 0.0
    if area > 0:
        weyl, how = math.pi * area / finest ** 2, "π × hull area / s²"
    else:
        weyl, how = extent_wavelength(xy) / finest, "2 × transect length / s"
    design = max(1, min(int(math.ceil(weyl)), n // 2))
    budget = max(LARGE_SURVEY_VECTORS, CANDIDATE_CELLS // n)
    k = min(design, budget)
    why = ("all of them" if design <= budget else
           f"the broadest {k}: a budget of {CANDIDATE_CELLS / 1e6:g} million table values "
           f"(sites × vectors) per scheme, at least {LARGE_SURVEY_VECTORS}, keeps the "
           f"eigen-decompositions and tests affordable")
    reason = (f"With {n} sites the spatial vectors were computed by Lanczos. The layout "
              f"resolves structures down to about {finest:.4g} map units ({FINEST_SPACINGS:g} "
              f"× the median nearest-neighbour spacing, {spacing:.4g}), about {design} vectors "
              f"({how}); {k} per scheme were candidates, {why}. Finer scales were "
              f"{'not ' if design > budget else ''}examined"
              + ("; raise `max_vectors` to look at them." if design > budget else "."))
    return CandidateCount(k, design, budget, finest, spacing, reason)


def _one_basis(Y, basis, *, level, global_permutations, alpha, conditioning, seed, options):
    if not isinstance(basis, SpatialBasis):
        raise InputError(f"`basis` must be a SpatialBasis; got {type(basis).__name__}")
    rng = check_rng(seed)
    vectors = basis.vectors
    n_model = vectors.shape[1] + (0 if conditioning is None else conditioning.shape[1])
    selection, global_p = None, None
    if vectors.shape[1] and vectors.shape[0] - n_model - 1 > 0:
        test = permutation_test(Y, vectors, conditioning=conditioning, seed=rng,
                                **{**options.tests(), "n_permutations": global_permutations
                                   or options.n_permutations})
        global_p = float(test.p_value)
        if global_p <= level:
            selection = forward_selection(Y, vectors, conditioning=conditioning, alpha=alpha,
                                          seed=rng, global_test="skip",
                                          progress=options.progress,
                                          **options.selection_tests())
    return SpaceStep(basis, selection, None, "given", global_p)


def space_group(basis: SpatialBasis, selection: ForwardSelection | None,
                trend: pd.DataFrame | None) -> pd.DataFrame | None:
    """The spatial group of the partition: the kept trend and the selected vectors.

    Examples
    --------
    >>> space_group(step.basis, step.selection, None)  # doctest: +SKIP
    """
    parts = []
    if trend is not None:
        parts.append(trend)
    if selection is not None and selection.selected:
        parts.append(basis.vectors[list(selection.selected)])
    return pd.concat(parts, axis=1) if parts else None


# ------------------------------------------------------------------------------ partition

@dataclass(frozen=True)
class PartitionStep:
    """The two-group partition of the community's variation.

    Attributes
    ----------
    partition : VariationPartition or None
        When both groups have variables.
    fractions : dict or None
        ``environment_only``, ``shared``, ``space_only``, ``unexplained`` (a group without
        variables contributes zero by construction); None without an environmental table.
    fraction_tests : dict or None
        p-values of ``environment_only`` and ``space_only``.
    environment_group : DataFrame or None
        The environmental group that entered the partition.
    notes : tuple of str
    """

    partition: VariationPartition | None
    fractions: dict | None
    fraction_tests: dict | None
    environment_group: pd.DataFrame | None = field(repr=False)
    notes: tuple[str, ...] = ()


def _environment_group(environment, selection, alpha) -> tuple[pd.DataFrame | None, tuple]:
    """The selected variables; or, when the global test was significant but the adjusted-R²
    ceiling stopped selection before the first entry, the whole table (its adjusted R² is an
    unbiased estimate, Peres-Neto et al. 2006)."""
    if environment is None or selection is None:
        return None, ()
    if selection.selected:
        return environment[list(selection.selected)], ()
    test = selection.global_test
    if test is not None and test.p_value <= alpha:
        stopped = ("The environmental global test was significant, but the adjusted-R² ceiling "
                   "of the double stopping rule stopped selection before the first variable (a "
                   "strong variable among weak ones lifts the model above the global adjusted "
                   "R²). The whole environmental table is used for the partition; its adjusted "
                   "R² is unbiased.")
        return environment, (stopped,)
    return None, ()


def partition_step(Y: pd.DataFrame | np.ndarray, environment: pd.DataFrame | None,
                   selection: ForwardSelection | None, space: pd.DataFrame | None, *,
                   space_p: float | None = None, alpha: float = 0.05,
                   seed: int | np.random.Generator | None = None,
                   options: StepOptions = DEFAULT_OPTIONS) -> PartitionStep:
    """Partition the variation between the environmental and the spatial group.

    The environmental group is the selected variables (or the whole table when the ceiling of
    the double stopping rule stopped selection before a significant global model's first
    variable); the spatial group is the kept trend plus the selected vectors
    (:func:`space_group`). With both groups, the fractions come from
    :func:`~spatial_ev.selection.partition.partition_variation` with the unique fractions
    tested; with one group empty, its fractions are zero by construction and the other group's
    adjusted R² is its own fraction, tested by its global test (``space_p`` for the space).

    Parameters
    ----------
    Y : DataFrame or ndarray, shape (n_sites, n_responses)
    environment : DataFrame or None
        The candidate environmental table (None: no partition).
    selection : ForwardSelection or None
        The environmental selection.
    space : DataFrame or None
        The spatial group.
    space_p : float, optional
        The spatial global test's p (quoted when there is no two-group partition).
    alpha : float
    seed : int or numpy.random.Generator, optional
    options : StepOptions

    Returns
    -------
    PartitionStep

    Examples
    --------
    >>> step = partition_step(Y, env, env_step.selection, group, seed=1)  # doctest: +SKIP
    >>> sorted(step.fractions)  # doctest: +SKIP
    ['environment_only', 'shared', 'space_only', 'unexplained']
    """
    alpha = _level(alpha)
    env_group, notes = _environment_group(environment, selection, alpha)
    if environment is None:
        spatial_only = ("No environmental table was given: the analysis is spatial only and no "
                        "variation partition is computed.")
        return PartitionStep(None, None, None, None, (*notes, spatial_only))
    if env_group is not None and space is not None:
        options.say("partitioning the variation (environment, space)")
        part = partition_variation(Y, {"environment": env_group, "space": space}, seed=seed,
                                   **options.tests())
        fr = part.fractions
        fractions = {"environment_only": float(fr.loc["environment_only", "r2_adj"]),
                     "shared": float(fr.loc["environment_and_space", "r2_adj"]),
                     "space_only": float(fr.loc["space_only", "r2_adj"]),
                     "unexplained": float(fr.loc["unexplained", "r2_adj"])}
        tests = {"environment_only": float(fr.loc["environment_only", "p_value"]),
                 "space_only": float(fr.loc["space_only", "p_value"])}
        return PartitionStep(part, fractions, tests, env_group, notes)
    env_r2 = float(selection.r2_adj) if env_group is not None else 0.0
    space_r2 = 0.0 if space is None else float(redundancy_analysis(Y, space).r2_adj)
    missing = [name for name, v in (("environment", env_group), ("space", space)) if v is None]
    zero = (f"Nothing was selected for {' and '.join(missing)}: "
            f"{'its' if len(missing) == 1 else 'their'} fractions are zero by construction "
            f"and the remaining group's adjusted R² is reported as its own fraction.")
    notes = (*notes, zero)
    env_p = selection.global_test.p_value \
        if selection is not None and selection.global_test else None
    fractions = {"environment_only": env_r2, "shared": 0.0, "space_only": space_r2,
                 "unexplained": 1.0 - env_r2 - space_r2}
    return PartitionStep(None, fractions, {"environment_only": env_p, "space_only": space_p},
                         env_group, notes)


# ------------------------------------------------------------------------------ scale classes

@dataclass(frozen=True)
class ScaleStep:
    """Scale classes of the selected vectors, fitted and tested.

    Attributes
    ----------
    fits : tuple of ScaleClassFit
    breaks : tuple of float
        Class boundaries (map units).
    scalogram : DataFrame
        Per basis vector: ``r2`` share, ``scale``, ``moran_i``, ``selected``.
    notes : tuple of str
    """

    fits: tuple[ScaleClassFit, ...] = field(repr=False)
    breaks: tuple[float, ...]
    scalogram: pd.DataFrame = field(repr=False)
    notes: tuple[str, ...] = ()


def scale_class_step(Y: pd.DataFrame, basis: SpatialBasis, selection: ForwardSelection | None,
                     survey: Survey, *, trend: pd.DataFrame | None = None,
                     breaks: Sequence[float] | None = None,
                     seed: int | np.random.Generator | None = None,
                     options: StepOptions = DEFAULT_OPTIONS) -> ScaleStep:
    """Group the selected vectors into scale classes; test, fit and map each class.

    Parameters
    ----------
    Y : DataFrame, shape (n_sites, n_species)
        The transformed community (detrended here on ``trend``).
    basis : SpatialBasis
    selection : ForwardSelection or None
        The spatial selection.
    survey : Survey
        For the prediction grid.
    trend : DataFrame, optional
        The kept trend.
    breaks : sequence of float, optional
        Class boundaries in map units (default: three equal-size classes of the basis).
    seed : int or numpy.random.Generator, optional
    options : StepOptions

    Returns
    -------
    ScaleStep

    Examples
    --------
    >>> step = scale_class_step(Y, space.basis, space.selection, survey,
    ...                         seed=1)  # doctest: +SKIP
    >>> [f.scale_class.name for f in step.fits]  # doctest: +SKIP
    ['broad', 'medium', 'fine']
    """
    options.say("fitting the scale classes")
    breaks = list(breaks) if breaks is not None else list(default_scale_breaks(basis.scale))
    selected = list(selection.selected) if selection else []
    detrended = residualise(Y, trend)
    classes = classify_scales(basis.scale, selected, breaks=breaks)
    grid, note = network_prediction_points(basis, survey)
    fits = fit_scale_classes(detrended, basis, classes, trend=trend,
                             grid=grid, seed=seed, options=options)
    scal = scalogram(detrended, basis.vectors, scales=basis.scale)
    scal["moran_i"] = basis.moran_i.reindex(scal.index).to_numpy()
    scal["selected"] = scal.index.isin(selected)
    notes = (note,) if note is not None and selected else ()
    return ScaleStep(fits, tuple(float(b) for b in breaks), scal, notes)
