"""The whole analysis of a survey, from community table to mapped scale classes.

:func:`analyse` chains the published steps with defensible defaults and records every choice:

1. transform the community (Hellinger by default; Legendre & Gallagher 2001);
2. test a linear trend on the coordinates; when significant it is kept as a covariable so the
   spatial eigenvectors describe structure beyond the trend (the trend is reported apart);
3. forward-select environmental variables (global test first, double stopping criterion;
   Blanchet, Legendre & Borcard 2008);
4. compare spatial weighting schemes and forward-select spatial eigenvectors under the best one,
   each scheme's global test judged at a Šidák-corrected level (Bauman et al. 2018);
5. partition the variation into environment-only, shared, space-only and unexplained
   fractions (adjusted R²; Borcard et al. 1992, Peres-Neto et al. 2006), testing the testable
   fractions by partial RDA with reduced-model residual permutation;
6. group the selected spatial vectors into scale classes in map units, fit an RDA per class and
   keep the fitted site scores (and their values on a grid of unsampled points) for maps;
7. local contributions to beta diversity with their permutation test (Legendre & De Cáceres
   2013);
8. with ``environment_test="spectral"`` (default), the link between community and environment
   is also tested by Moran spectral randomisation of the environmental table (Wagner & Dray
   2015), which keeps each variable's spatial autocorrelation, and so is the environment-only
   fraction given the spatial group; free-permutation tests of the environment are liberal
   when both tables are autocorrelated.

Each stage is a named step of :mod:`spatial_ev.pipeline.steps` (the design simulator runs the
same steps); :func:`analyse` only orchestrates them, gives each its random stream and collects
their notes in order. Nothing here draws or writes files; :mod:`spatial_ev.report` renders an
:class:`Analysis` (``summary.json`` included, :mod:`spatial_ev.report.summary`).
"""

from __future__ import annotations

import warnings
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from spatial_ev._validation import check_int, check_option, check_real, check_rng
from spatial_ev.errors import InputError, SpatialEVWarning
from spatial_ev.inference.engines import ENGINES, default_workers
from spatial_ev.inference.lcbd import BetaDiversity, beta_diversity
from spatial_ev.inference.permutation import PermutationTest
from spatial_ev.inference.spectral import SpectralRandomisationTest
from spatial_ev.input.network import RiverNetwork
from spatial_ev.input.survey import Survey
from spatial_ev.pipeline.options import StepOptions
from spatial_ev.pipeline.scale_classes import ScaleClassFit
from spatial_ev.pipeline.steps import (
    TREND_OPTIONS,
    environment_step,
    partition_step,
    scale_class_step,
    space_group,
    space_step,
    spectral_environment_step,
    spectral_fraction_step,
    resolve_step_tests,
    resolve_trend,
    trend_step,
)
from spatial_ev.selection.forward import ForwardSelection
from spatial_ev.selection.partition import VariationPartition
from spatial_ev.selection.weighting import DEFAULT_SCHEMES, WeightingComparison, sidak_level
from spatial_ev.space.eigen import SpatialBasis
from spatial_ev.stats.canonical import RedundancyAnalysis, redundancy_analysis
from spatial_ev.stats.transform import (
    TRANSFORMATIONS,
    standardise_environment,
    transform,
)

__all__ = [
    "ENVIRONMENT_TESTS",
    "TREND_OPTIONS",
    "Analysis",
    "AnalysisSettings",
    "ScaleClassFit",
    "analyse",
    "SMALL_SURVEY_SITES",
    "small_survey_note",
]

ENVIRONMENT_TESTS = ("spectral", "permutation")

# below this many sites a comparison of weighting schemes rarely passes its corrected level
SMALL_SURVEY_SITES = 30


def small_survey_note(n_sites: int, n_schemes: int, alpha: float) -> str | None:
    """The note an analysis carries when a small survey compares several weighting schemes.

    Parameters
    ----------
    n_sites : int
        Sites analysed.
    n_schemes : int
        Weighting schemes compared (1 when a single scheme was given).
    alpha : float
        Significance level of the analysis.

    Returns
    -------
    str or None
        A plain-language note, or ``None`` from :data:`SMALL_SURVEY_SITES` sites on or for a
        single scheme.

    Examples
    --------
    >>> small_survey_note(12, 8, 0.05)[:46]
    'The survey has 12 sites, fewer than 30: compar'
    >>> small_survey_note(40, 8, 0.05) is None, small_survey_note(12, 1, 0.05) is None
    (True, True)
    """
    n_sites = check_int("n_sites", n_sites, low=0)
    n_schemes = check_int("n_schemes", n_schemes, low=1)
    alpha = check_real("alpha", alpha, low=0, high=1, low_inclusive=False)
    if n_sites >= SMALL_SURVEY_SITES or n_schemes == 1:
        return None
    level = sidak_level(alpha, n_schemes)
    return (f"The survey has {n_sites} sites, fewer than {SMALL_SURVEY_SITES}: comparing "
            f"{n_schemes} weighting schemes tests each at the corrected level {level:.4g} "
            f"instead of {alpha:g}, which so few sites rarely reach. A single scheme chosen "
            f"before the analysis (for example the distance-based basis) is tested at the full "
            f"level.")


@dataclass(frozen=True)
class AnalysisSettings:
    """Every parameter and choice of an analysis, as typed values.

    Attributes
    ----------
    transformation : str
    trend : {"test", "ignore"}
        The trend rule that ran (``"auto"`` resolved; see
        :func:`~spatial_ev.pipeline.steps.resolve_trend`).
    spatial_weighting : {"compare", "single"}
    schemes : tuple of str
        The weighting schemes compared (or the one used).
    chosen_scheme : str
        The scheme whose vectors were selected, ``"none"`` when no scheme was significant.
    alpha : float
    n_permutations : int
    seed : int
    scale_breaks : tuple of float
        Boundaries of the scale classes (map units).
    engine : str
    crs : str
    environment_test : {"spectral", "permutation"}
    max_vectors : int or None
        Cap on vectors per scheme (set automatically above the dense-solver limit).
    directional : dict or None
        Directional schemes' settings when a river network or a bearing was given:
        ``network`` (its source or None), ``bearing``, ``orientations``, ``edge_weightings``,
        ``weight_by``.
    step_tests : {"full", "sequential", "shared"}
        How forward-selection step tests drew permutations (see :func:`analyse`).

    Examples
    --------
    >>> s = AnalysisSettings("hellinger", "test", "single", ("distance",), "distance", 0.05,
    ...                      199, 1, (100.0,), "local", "EPSG:32633", "spectral", None)
    >>> s.alpha, s["alpha"], s.to_dict()["schemes"]
    (0.05, 0.05, ['distance'])
    """

    transformation: str
    trend: str
    spatial_weighting: str
    schemes: tuple[str, ...]
    chosen_scheme: str
    alpha: float
    n_permutations: int
    seed: int
    scale_breaks: tuple[float, ...]
    engine: str
    crs: str
    environment_test: str
    max_vectors: int | None
    directional: dict | None = None
    step_tests: str = "full"

    def __getitem__(self, name: str) -> Any:
        """Read-only lookup by name (``settings["alpha"]``), as for the recorded parameters."""
        if not isinstance(name, str) or name not in self.__dataclass_fields__:
            raise KeyError(name)
        return getattr(self, name)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready record (lists for the sequences), as the manifest stores it."""
        out = asdict(self)
        out["schemes"] = list(self.schemes)
        out["scale_breaks"] = list(self.scale_breaks)
        return out


@dataclass(frozen=True)
class Analysis:
    """Everything :func:`analyse` computed, with the choices that produced it.

    Attributes
    ----------
    survey : Survey
        The validated input.
    settings : AnalysisSettings
        Every parameter and choice (transformation, trend rule, schemes, α, permutations, seed,
        scale breaks, engine).
    response : DataFrame, shape (n_sites, n_species)
        The transformed community.
    environment : DataFrame or None
        The standardised environmental table (indicator columns kept 0/1).
    trend : PermutationTest or None
        Test of the linear trend on the coordinates (None when ``trend="ignore"``).
    trend_kept : bool
        Whether the trend was significant and kept as a covariable / part of the spatial group.
    environment_selection : ForwardSelection or None
    weighting : WeightingComparison
        The comparison of spatial weighting schemes (one row when one scheme was named).
    basis : SpatialBasis
        The chosen scheme's basis; when no scheme was significant, the distance-based basis
        (used for scale reference and the scalogram only).
    space_selection : ForwardSelection or None
        Selection under the chosen scheme (None when no scheme was significant).
    partition : VariationPartition or None
        Two-group partition (environment, space) when both groups have variables.
    fractions : dict or None
        ``environment_only``, ``shared``, ``space_only``, ``unexplained`` (a group without any
        selected variable contributes zero fractions by construction); None without an
        environmental table.
    fraction_tests : dict or None
        p-values of the testable fractions (``environment_only``, ``space_only``).
    scale_fits : tuple of ScaleClassFit
    scalogram : DataFrame
        Per basis vector: ``r2`` share, ``scale``, ``moran_i``, ``selected``.
    beta : BetaDiversity
        LCBD / SCBD with the LCBD test.
    ordination : RedundancyAnalysis
        RDA of the community on the selected environmental variables (PCA when none).
    notes : tuple of str
        Plain-language notes on choices made along the way (e.g. why a fraction is zero).
    warnings : tuple of str
        Warnings raised during the analysis (class name and message).
    environment_spectral : SpectralRandomisationTest or None
        Moran spectral randomisation test of the community on all environmental variables
        (distance-decay weighting exp(−d/t), t the truncation distance), or None (no
        environment, ``environment_test="permutation"``, or more than
        :data:`~spatial_ev.inference.spectral.MAX_SITES` sites).
    environment_only_spectral : SpectralRandomisationTest or None
        The same randomisation for the environment-only fraction [a]: the selected
        environmental variables given the spatial group (None without a two-group partition).
    network : RiverNetwork or None
        The river network given to the analysis (drawn under the maps).
    """

    survey: Survey
    settings: AnalysisSettings
    response: pd.DataFrame = field(repr=False)
    environment: pd.DataFrame | None = field(repr=False)
    trend: PermutationTest | None
    trend_kept: bool
    environment_selection: ForwardSelection | None
    weighting: WeightingComparison
    basis: SpatialBasis = field(repr=False)
    space_selection: ForwardSelection | None
    partition: VariationPartition | None
    fractions: dict | None
    fraction_tests: dict | None
    scale_fits: tuple[ScaleClassFit, ...] = field(repr=False)
    scalogram: pd.DataFrame = field(repr=False)
    beta: BetaDiversity = field(repr=False)
    ordination: RedundancyAnalysis = field(repr=False)
    notes: tuple[str, ...] = ()
    warnings: tuple[str, ...] = ()
    environment_spectral: SpectralRandomisationTest | None = field(default=None, repr=False)
    environment_only_spectral: SpectralRandomisationTest | None = field(default=None,
                                                                       repr=False)
    network: RiverNetwork | None = field(default=None, repr=False)

    @property
    def selected_environment(self) -> tuple[str, ...]:
        """Selected environmental variables, in order of entry."""
        return () if self.environment_selection is None else self.environment_selection.selected

    @property
    def selected_space(self) -> tuple[str, ...]:
        """Selected spatial vectors, in order of entry."""
        return () if self.space_selection is None else self.space_selection.selected

    def space_table(self) -> pd.DataFrame:
        """Selected spatial vectors: Moran's I, scale (map units), p at entry, scale class."""
        rows = []
        steps = {} if self.space_selection is None else \
            self.space_selection.steps.set_index("variable")["p_value"].to_dict()
        klass = {v: fit.scale_class.name for fit in self.scale_fits
                 for v in fit.scale_class.vectors}
        for name in self.selected_space:
            rows.append({"vector": name, "moran_i": float(self.basis.moran_i[name]),
                         "scale": float(self.basis.scale[name]), "p": float(steps[name]),
                         "scale_class": klass.get(name, "")})
        return pd.DataFrame(rows, columns=["vector", "moran_i", "scale", "p", "scale_class"])

    def environment_table(self) -> pd.DataFrame:
        """Selected environmental variables: adjusted R² after entry and p at entry."""
        if self.environment_selection is None:
            return pd.DataFrame(columns=["variable", "r2_adj_cum", "p"])
        steps = self.environment_selection.steps
        added = steps[steps["added"].to_numpy(dtype=bool)]
        return pd.DataFrame({"variable": added["variable"].astype(str).to_numpy(),
                             "r2_adj_cum": added["r2_adj"].to_numpy(dtype=float),
                             "p": added["p_value"].to_numpy(dtype=float)})


def _check_analysis(survey, transformation, spatial_weighting, schemes, alpha, n_permutations,
                    seed, scale_breaks, trend, engine, environment_test):
    if not isinstance(survey, Survey):
        raise InputError(f"`survey` must be a Survey (from read_survey or Survey.from_frames); "
                         f"got {type(survey).__name__}")
    if survey.species is None or survey.n_species == 0:
        raise InputError("the survey has no species table; the analysis needs one "
                         "(give the species file)")
    if survey.n_sites < 10:
        raise InputError(f"the survey has {survey.n_sites} sites; spatial eigenvectors, "
                         f"selection and permutation tests need at least 10")
    check_option("transformation", transformation, TRANSFORMATIONS)
    check_option("spatial_weighting", spatial_weighting, ["compare", "single"])
    alpha = check_real("alpha", alpha, low=0, high=0.5, low_inclusive=False)
    n_permutations = check_int("n_permutations", n_permutations, low=19)
    check_option("trend", trend, TREND_OPTIONS)
    check_option("engine", engine, ENGINES)
    check_option("environment_test", environment_test, ENVIRONMENT_TESTS)
    if schemes is None:
        schemes = list(DEFAULT_SCHEMES) if spatial_weighting == "compare" else ["distance"]
    elif isinstance(schemes, str):
        schemes = [schemes]
    schemes = list(schemes)
    if spatial_weighting == "single" and len(schemes) != 1:
        raise InputError(f"spatial_weighting='single' takes exactly one scheme; got {schemes}")
    if seed is None:
        seed = int(np.random.SeedSequence().entropy % (2 ** 32))
    elif not isinstance(seed, (int, np.integer)) or isinstance(seed, bool) or seed < 0:
        raise InputError(f"parameter `seed` must be a non-negative integer (it is recorded so "
                         f"the run can be repeated); got {seed!r}")
    if scale_breaks is not None:
        scale_breaks = [check_real("scale_breaks", b, low=0, low_inclusive=False)
                        for b in scale_breaks]
    return alpha, n_permutations, int(seed), schemes, scale_breaks


def _check_directional(network, bearing, orientations, edge_weightings, weight_by
                       ) -> dict | None:
    if network is not None and not isinstance(network, RiverNetwork):
        raise InputError(f"`network` must be a RiverNetwork (from read_river_network) or None; "
                         f"got {type(network).__name__}")
    if bearing is not None:
        bearing = check_real("bearing", bearing)
    if network is None and bearing is None:
        return None
    if isinstance(orientations, str) or isinstance(edge_weightings, str):
        raise InputError("`orientations` and `edge_weightings` must be sequences of names, "
                         "e.g. ('with_flow',) and ('binary', 'linear')")
    return {"network": None if network is None else network.source, "bearing": bearing,
            "orientations": list(orientations), "edge_weightings": list(edge_weightings),
            "weight_by": weight_by}


def analyse(survey: Survey, *, transformation: str = "hellinger",
            spatial_weighting: str = "compare", schemes: Sequence[str] | str | None = None,
            alpha: float = 0.05, n_permutations: int = 999, seed: int | None = None,
            scale_breaks: Sequence[float] | None = None, trend: str = "auto",
            engine: str = "local", scheduler: Any = None,
            progress: Callable[[str], None] | None = None,
            environment_test: str = "spectral", max_vectors: int | None = None,
            n_workers: int | None = None, network: RiverNetwork | None = None,
            bearing: float | None = None, orientations: Sequence[str] = ("with_flow",),
            edge_weightings: Sequence[str] = ("binary", "linear"),
            weight_by: str = "edge_length", step_tests: str = "auto") -> Analysis:
    """Run the whole spatial-structure analysis of a survey.

    Parameters
    ----------
    survey : Survey
        From :func:`spatial_ev.read_survey` (needs a species table; the environment is
        optional — without it the analysis is spatial only).
    transformation : str, keyword-only
        Community transformation (default ``"hellinger"``); see :func:`spatial_ev.transform`.
    spatial_weighting : {"compare", "single"}
        ``"compare"``: try every scheme in ``schemes`` (default: Delaunay, Gabriel, relative
        neighbourhood, minimum spanning tree and distance-band graphs × binary/linear weights,
        plus distance-based eigenvectors) at a Šidák-corrected level; ``"single"``: use the
        one scheme given in ``schemes`` (default ``"distance"``).
    schemes : sequence of str or str, optional
        Scheme names, ``"distance"`` or ``"<graph>/<weighting>"``.
    alpha : float
        Level of every test (family-wise for the scheme comparison).
    n_permutations : int
        Permutations per test (≥ 19; 999 is the usual choice for reporting).
    seed : int, optional
        One seed for every random step; drawn and recorded when omitted.
    scale_breaks : sequence of float, optional
        Boundaries of the scale classes in map units (default: three equal-size classes of the
        basis, broad / medium / fine).
    trend : {"auto", "test", "ignore"}
        ``"test"``: test a linear trend on the coordinates and keep it as a covariable when
        significant; ``"ignore"``: do not model a trend; ``"auto"`` (default): ``"test"``,
        except with a river ``network``, where a planar trend is not modelled (recorded in the
        notes; see :func:`~spatial_ev.pipeline.steps.resolve_trend`).
    engine, scheduler : str, optional
        Where the work runs: ``"local"`` (threads of this process), ``"processes"`` (local
        worker processes, one BLAS thread each; the weighting schemes are compared in
        parallel, one task each) or ``"dask"`` (likewise on a dask.distributed cluster, with a
        scheduler address or Client, or a temporary local cluster). The result does not
        depend on the engine or the number of workers. A script using ``"processes"`` must
        run under ``if __name__ == "__main__":`` (the workers import the main module).
    progress : callable, optional
        Called with a short message at each stage and test.
    environment_test : {"spectral", "permutation"}
        ``"spectral"`` (default): besides the free-permutation global test of the environment
        (which drives the selection), test the community on all environmental variables by
        Moran spectral randomisation (:func:`spatial_ev.inference.spectral.
        spectral_randomisation_test`, distance-decay weighting exp(−d/t) with t the truncation
        distance of the distance-based MEM, ``n_permutations`` randomisations), which keeps
        the environment's spatial autocorrelation, and the environment-only fraction [a]
        likewise (given the spatial group); a note warns when only the free-permutation test
        is significant. Skipped above
        :data:`~spatial_ev.inference.spectral.MAX_SITES` sites. ``"permutation"``: the
        free-permutation test only.
    max_vectors : int, optional
        Keep only the broadest spatial eigenvectors of each scheme. Default: all positive-I
        vectors up to :data:`~spatial_ev.space.eigen.DENSE_LIMIT` sites, the 200 broadest above it
        (recorded in the notes).
    n_workers : int, optional
        Threads or worker processes of every parallel part (default: one per core).
    network : RiverNetwork, optional
        The survey's river network (:func:`spatial_ev.input.network.read_river_network` with
        this survey). Its directional bases join the comparison (``"river_aem/<weighting>"``
        for each edge weighting, ``"river_aem_against/<weighting>"`` with
        ``orientations`` including ``"against_flow"``, and ``"river_distance"``, the
        distance-based eigenvectors of along-network distances), each counting in the Šidák
        correction; with ``spatial_weighting="single"`` one of these names may be the scheme.
        Scales are then lengths along the network, and a network basis's scale classes are
        predicted at points along the channels instead of an open grid.
    bearing : float, optional
        Direction of a current or wind (degrees clockwise from grid north): AEM of the
        survey's Delaunay graph oriented along it (``"bearing_<deg>/<weighting>"``) join the
        comparison; their maps show the sites only.
    orientations : sequence of {"with_flow", "against_flow"}
        Orientations of the directional AEM (default with the flow only).
    edge_weightings : sequence of str
        Edge weightings of the directional AEM (``"binary"``, ``"linear"``,
        ``"concave_down:<α>"``, ``"concave_up:<β>"``; default binary and linear).
    weight_by : {"edge_length", "network_distance"}
        What a river AEM's non-binary edge weighting is a function of.
    step_tests : {"auto", "full", "sequential", "shared"}
        ``"auto"`` (default): ``"full"`` up to 1,000 sites, ``"shared"`` above
        (:func:`~spatial_ev.pipeline.steps.resolve_step_tests`; the settings record the
        rule that ran and a note says so). ``"full"``: every forward-selection step test
        draws ``n_permutations``.
        ``"sequential"``: a step test stops drawing once "p ≤ α?" is settled with resampling
        risk ≤ 0.001 (Besag & Clifford 1991, Biometrika 78:301–304, for non-significant
        steps; Gandy 2009, JASA 104:1504–1511, either way); each step's p-value then rests on
        the permutations it drew (column ``permutations`` of the step tables). Global, fraction
        and class tests always draw the full count. The decisions are the same on every
        engine and worker count. ``"shared"``: every step of a selection is tested on one set
        of ``n_permutations`` permutations, updated as the model grows instead of recomputed
        (:class:`~spatial_ev.inference.permutation.SharedStepPermutations`); each step is
        the same test, with other random permutations than ``"full"``, at a fraction of the
        cost on large surveys.

    Returns
    -------
    Analysis

    Examples
    --------
    >>> from spatial_ev import read_survey
    >>> survey = read_survey("data_demo/sites.gpkg", "data_demo/species.csv",
    ...                      "data_demo/environment.csv")  # doctest: +SKIP
    >>> result = analyse(survey, n_permutations=199, seed=1)  # doctest: +SKIP
    >>> sorted(result.fractions)  # doctest: +SKIP
    ['environment_only', 'shared', 'space_only', 'unexplained']
    """
    alpha, n_permutations, seed, schemes, scale_breaks = _check_analysis(
        survey, transformation, spatial_weighting, schemes, alpha, n_permutations, seed,
        scale_breaks, trend, engine, environment_test)
    directional = _check_directional(network, bearing, orientations, edge_weightings,
                                     weight_by)
    trend, trend_note = resolve_trend(trend, on_network=network is not None)
    step_tests, step_note = resolve_step_tests(step_tests, survey.n_sites)
    if max_vectors is not None:
        max_vectors = check_int("max_vectors", max_vectors, low=1)
    if n_workers is not None:
        n_workers = check_int("n_workers", n_workers, low=1)
    options = StepOptions(n_permutations=n_permutations, engine=engine, scheduler=scheduler,
                          n_workers=n_workers, progress=progress, step_tests=step_tests)
    # the seventh stream is new; the first six are unchanged by spawning one more
    streams = dict(zip(["trend", "environment", "space", "partition", "classes", "lcbd",
                        "spectral"], check_rng(seed).spawn(7)))
    spectral_streams = streams["spectral"].spawn(2)
    # every test's batches use n_workers, also those whose functions take no worker count
    with default_workers(n_workers), warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", SpatialEVWarning)

        options.say(f"transforming the community ({transformation})")
        Y = transform(survey.species, transformation)
        env = None if survey.environment is None or survey.environment.shape[1] == 0 \
            else standardise_environment(survey.environment)

        trend_ = trend_step(Y, survey.coords, mode=trend, alpha=alpha, seed=streams["trend"],
                            options=options)
        environment = environment_step(Y, env, alpha=alpha, seed=streams["environment"],
                                       options=options)
        spectral = None
        if env is not None and environment_test == "spectral":
            spectral = spectral_environment_step(Y, env, environment.selection, survey,
                                                 alpha=alpha, seed=spectral_streams[0],
                                                 options=options)
        space = space_step(Y, survey, schemes=schemes, alpha=alpha,
                           conditioning=trend_.covariables, max_vectors=max_vectors,
                           seed=streams["space"], options=options, network=network,
                           bearing=bearing, orientations=orientations,
                           edge_weightings=edge_weightings, weight_by=weight_by,
                           add_directional=spatial_weighting == "compare")
        spatial = space_group(space.basis, space.selection, trend_.covariables)
        partition = partition_step(Y, env, environment.selection, spatial,
                                   space_p=space.global_p, alpha=alpha,
                                   seed=streams["partition"], options=options)
        only_spectral = None
        if spectral is not None and spectral.full_basis is not None \
                and partition.partition is not None:
            only_spectral = spectral_fraction_step(
                Y, partition.environment_group, spatial, spectral.full_basis,
                partition.fraction_tests["environment_only"], alpha=alpha,
                seed=spectral_streams[1], options=options)
        scales = scale_class_step(Y, space.basis, space.selection, survey,
                                  trend=trend_.covariables, breaks=scale_breaks,
                                  seed=streams["classes"], options=options)

        options.say("local contributions to beta diversity")
        beta = beta_diversity(Y, n_permutations=n_permutations, seed=streams["lcbd"])
        group = partition.environment_group
        ordination = redundancy_analysis(Y, group) if group is not None \
            else redundancy_analysis(Y)

    steps = (trend_, environment, spectral, space, partition, only_spectral, scales)
    small = small_survey_note(survey.n_sites, getattr(space.weighting, "n_schemes", 1), alpha)
    settings = AnalysisSettings(
        transformation=transformation, trend=trend, spatial_weighting=spatial_weighting,
        schemes=tuple(schemes), chosen_scheme=space.chosen, alpha=alpha,
        n_permutations=n_permutations, seed=seed, scale_breaks=scales.breaks, engine=engine,
        crs=survey.summary()["crs"], environment_test=environment_test,
        max_vectors=space.max_vectors, directional=directional, step_tests=step_tests)
    return Analysis(
        survey=survey, settings=settings, response=Y, environment=env, trend=trend_.test,
        trend_kept=trend_.kept, environment_selection=environment.selection,
        weighting=space.weighting, basis=space.basis, space_selection=space.selection,
        partition=partition.partition, fractions=partition.fractions,
        fraction_tests=partition.fraction_tests, scale_fits=scales.fits,
        scalogram=scales.scalogram, beta=beta, ordination=ordination,
        notes=tuple(note for note in (small, trend_note, step_note) if note is not None)
        + tuple(note for step in steps if step is not None for note in step.notes),
        warnings=tuple(f"{w.category.__name__}: {w.message}" for w in caught
                       if issubclass(w.category, SpatialEVWarning)),
        environment_spectral=None if spectral is None else spectral.test,
        environment_only_spectral=None if only_spectral is None else only_spectral.test,
        network=network)
