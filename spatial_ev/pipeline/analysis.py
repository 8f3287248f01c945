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

Nothing here draws or writes files; :mod:`spatial_ev.report` renders an :class:`Analysis`.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import shapely

from spatial_ev import __version__
from spatial_ev._validation import check_int, check_option, check_real, check_rng
from spatial_ev.stats.beta import BetaDiversity, beta_diversity
from spatial_ev.stats.canonical import RedundancyAnalysis, redundancy_analysis
from spatial_ev.space.eigen import DENSE_LIMIT, SpatialBasis, distance_eigenvectors
from spatial_ev.errors import InputError, SpatialEVWarning
from spatial_ev.selection.partition import VariationPartition, partition_variation
from spatial_ev.inference.permutation import PermutationTest, permutation_test
from spatial_ev.space.scales import ScaleClass, classify_scales, default_scale_breaks, scalogram
from spatial_ev.selection.forward import ForwardSelection, forward_selection
from spatial_ev.selection.weighting import (DEFAULT_SCHEMES, WeightingComparison,
                                            compare_weighting_schemes)
from spatial_ev.inference.spectral import (MAX_SITES, CompleteBasis, SpectralRandomisationTest,
                                     complete_spatial_basis, distance_decay_weights,
                                     spectral_randomisation_test)
from spatial_ev.input.survey import Survey
from spatial_ev.stats.transform import TRANSFORMATIONS, standardise_environment, transform

__all__ = ["analyse", "Analysis", "ScaleClassFit", "TREND_OPTIONS", "ENVIRONMENT_TESTS"]

TREND_OPTIONS = ("test", "ignore")
_LARGE_SURVEY_VECTORS = 200  # broadest vectors kept per scheme above the dense-solver limit
ENVIRONMENT_TESTS = ("spectral", "permutation")
_GRID_CELLS = 3600  # target number of grid cells over the survey's bounding box


@dataclass(frozen=True)
class ScaleClassFit:
    """The community structure carried by one scale class of selected spatial vectors.

    Attributes
    ----------
    scale_class : ScaleClass
        Name, bounds (map units), selected vectors and their scale range.
    r2_adj : float or None
        Adjusted R² of the RDA of the (detrended) community on the class's vectors.
    p_value : float or None
        Permutation p of the class given the other selected spatial vectors (and the trend).
    site_scores : DataFrame or None
        Shape (n_sites, ≤ 2): fitted site scores on the class's first canonical axes
        (``axis_1``, ``axis_2``) in units of the transformed community (scaling 1: the fitted
        community projected on each axis).
    grid_scores : DataFrame or None
        The same scores predicted at the prediction grid points (columns ``x``, ``y``,
        ``axis_1``, ``axis_2``), from the basis extension of the class's vectors.
    axis_share : tuple of float
        Share of the class's explained variation carried by each mapped axis.
    """

    scale_class: ScaleClass
    r2_adj: float | None
    p_value: float | None
    site_scores: pd.DataFrame | None = field(repr=False)
    grid_scores: pd.DataFrame | None = field(repr=False)
    axis_share: tuple[float, ...] = ()


@dataclass(frozen=True)
class Analysis:
    """Everything :func:`analyse` computed, with the choices that produced it.

    Attributes
    ----------
    survey : Survey
        The validated input.
    settings : dict
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
    scale_fits : list of ScaleClassFit
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
    """

    survey: Survey
    settings: dict
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
    scale_fits: list = field(repr=False)
    scalogram: pd.DataFrame = field(repr=False)
    beta: BetaDiversity = field(repr=False)
    ordination: RedundancyAnalysis = field(repr=False)
    notes: tuple = ()
    warnings: tuple = ()
    environment_spectral: SpectralRandomisationTest | None = field(default=None, repr=False)
    environment_only_spectral: SpectralRandomisationTest | None = field(default=None,
                                                                       repr=False)

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

    def summary_dict(self, *, digits: int = 10) -> dict[str, Any]:
        """The machine-readable summary (the ``summary.json`` contract), floats rounded.

        Floats carry ``digits`` significant digits: results agree across BLAS thread counts
        only to about 1e-15 relative, so more digits would make identical runs differ.
        """
        r = _rounder(digits)
        survey = self.survey
        env_test = None
        if self.environment_selection is not None \
                and self.environment_selection.global_test is not None:
            g = self.environment_selection.global_test
            env_test = {"r2_adj": r(g.r2_adj), "p": r(g.p_value)}
        space_test = _space_global(self)
        spectral, only = self.environment_spectral, self.environment_only_spectral
        return {
            "n_sites": int(survey.n_sites),
            "n_species": int(survey.n_species),
            "transformation": self.settings["transformation"],
            "crs": self.settings["crs"],
            "distance_unit": survey.distance_unit,
            "spatial_basis": {"method": self.settings["chosen_scheme"],
                              "threshold": r(self.basis.threshold),
                              "n_vectors": int(self.basis.n_vectors)},
            "global_tests": {
                "environment": env_test,
                "space": {"r2_adj": r(space_test[0]), "p": r(space_test[1])},
                "trend": None if self.trend is None else
                {"r2_adj": r(self.trend.r2_adj), "p": r(self.trend.p_value),
                 "kept": self.trend_kept},
            },
            "selected": {
                "environment": list(self.selected_environment),
                "space": [{"name": row.vector, "moran_i": r(row.moran_i), "scale": r(row.scale),
                           "p": r(row.p), "scale_class": row.scale_class}
                          for row in self.space_table().itertuples()],
            },
            "fractions": None if self.fractions is None else
            {k: r(v) for k, v in self.fractions.items()},
            "fraction_tests": None if self.fraction_tests is None else
            {k: {"p": r(v)} for k, v in self.fraction_tests.items()},
            "environment_spectral_test": None if spectral is None else
            {"r2_adj": r(spectral.r2_adj), "p": r(spectral.p_value),
             "n_randomisations": int(spectral.n_randomisations),
             "weighting": "distance_decay",
             "environment_only": None if only is None else
             {"r2_adj": r(only.r2_adj), "p": r(only.p_value)}},
            "scales": [{"class": fit.scale_class.name, "vectors": list(fit.scale_class.vectors),
                        "r2_adj": r(fit.r2_adj), "p": r(fit.p_value),
                        "scale_range": None if fit.scale_class.scale_range is None
                        else [r(v) for v in fit.scale_class.scale_range],
                        "bounds": [r(b) if math.isfinite(b) else None
                                   for b in fit.scale_class.bounds]}
                       for fit in self.scale_fits],
            "weighting_schemes": {"compared": list(self.weighting.table.index),
                                  "alpha_corrected": r(self.weighting.alpha_corrected),
                                  "chosen": self.weighting.best},
            "lcbd": {"beta_total": r(self.beta.total),
                     "n_significant_holm": int((self.beta.p_holm <= self.settings["alpha"]).sum())
                     if self.beta.p_holm is not None else None},
            "resolvable_scales": {"finest": r(float(self.basis.scale.min())),
                                  "broadest": r(float(self.basis.scale.max()))},
            "permutations": int(self.settings["n_permutations"]),
            "seed": int(self.settings["seed"]),
            "alpha": r(self.settings["alpha"]),
            "notes": list(self.notes),
            "warnings": list(self.warnings),
            "version": __version__,
        }


def _rounder(digits: int) -> Callable[[Any], Any]:
    def r(value):
        if value is None:
            return None
        value = float(value)
        if not math.isfinite(value):
            return None
        return float(f"{value:.{digits}g}")
    return r


def _space_global(result: Analysis) -> tuple[float | None, float | None]:
    table = result.weighting.table
    if result.weighting.best is not None:
        row = table.loc[result.weighting.best]
        return float(result.space_selection.global_test.r2_adj), float(row["global_p"])
    if result.space_selection is None and len(table):
        best_p = table["global_p"].min()
        return None, float(best_p) if np.isfinite(best_p) else None
    return None, None


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
    check_option("engine", engine, ["local", "dask"])
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


def analyse(survey: Survey, *, transformation: str = "hellinger",
            spatial_weighting: str = "compare", schemes: Sequence[str] | str | None = None,
            alpha: float = 0.05, n_permutations: int = 999, seed: int | None = None,
            scale_breaks: Sequence[float] | None = None, trend: str = "test",
            engine: str = "local", scheduler: Any = None,
            progress: Callable[[str], None] | None = None,
            environment_test: str = "spectral", max_vectors: int | None = None) -> Analysis:
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
    trend : {"test", "ignore"}
        ``"test"``: test a linear trend on the coordinates and keep it as a covariable when
        significant; ``"ignore"``: do not model a trend.
    engine, scheduler : str, optional
        Where permutation batches run (``"local"`` or ``"dask"`` with a scheduler address).
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
    if max_vectors is not None:
        max_vectors = check_int("max_vectors", max_vectors, low=1)
    say = progress or (lambda message: None)
    # the seventh stream is new; the first six are unchanged by spawning one more
    streams = dict(zip(["trend", "environment", "space", "partition", "classes", "lcbd",
                        "spectral"], check_rng(seed).spawn(7)))
    run = {"n_permutations": n_permutations, "engine": engine, "scheduler": scheduler}
    notes: list[str] = []
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", SpatialEVWarning)

        say(f"transforming the community ({transformation})")
        Y = transform(survey.species, transformation)
        env = None if survey.environment is None or survey.environment.shape[1] == 0 \
            else standardise_environment(survey.environment)

        xy = survey.coords - survey.coords.mean()
        trend_test, trend_kept = None, False
        if trend == "test":
            say("testing a linear trend on the coordinates")
            trend_test = permutation_test(Y, xy, seed=streams["trend"], **run)
            trend_kept = bool(trend_test.p_value <= alpha)
            if trend_kept:
                notes.append(f"A linear trend on the coordinates is significant (adjusted R² "
                             f"{trend_test.r2_adj:.3f}, p = {trend_test.p_value:.4g}); it is "
                             f"kept as a covariable so the spatial vectors describe structure "
                             f"beyond the trend, and it counts in the spatial fraction.")
        trend_vars = xy.rename(columns={"x": "trend_x", "y": "trend_y"}) if trend_kept else None

        env_sel = None
        if env is not None:
            say(f"forward selection among {env.shape[1]} environmental variables")
            env_sel = forward_selection(Y, env, alpha=alpha, seed=streams["environment"],
                                        progress=say, **run)
        spectral = full_basis = None
        spectral_streams = streams["spectral"].spawn(2)
        if env is not None and environment_test == "spectral":
            spectral, full_basis = _spectral_test(Y, env, env_sel, survey, spectral_streams[0],
                                                  run, alpha, notes, say)

        say(f"comparing {len(schemes)} spatial weighting scheme(s)")
        if max_vectors is None and survey.n_sites > DENSE_LIMIT:
            max_vectors = _LARGE_SURVEY_VECTORS
            notes.append(f"With {survey.n_sites} sites only the {max_vectors} broadest spatial "
                         f"eigenvectors of each scheme were computed (Lanczos); finer scales "
                         f"were not examined. Raise `max_vectors` to look at finer scales.")
        weighting = compare_weighting_schemes(Y, survey, schemes=schemes, alpha=alpha,
                                              seed=streams["space"], conditioning=trend_vars,
                                              max_vectors=max_vectors, progress=say, **run)
        basis, space_sel = weighting.basis, weighting.selection
        if basis is None:
            notes.append("No spatial weighting scheme had a significant global test at the "
                         "corrected level: no spatial structure beyond the trend was "
                         "detected. Scales below refer to the distance-based basis.")
            basis = distance_eigenvectors(survey, max_vectors=max_vectors)
        chosen = weighting.best or "none"

        space_vars = _space_group(basis, space_sel, trend_vars)
        env_vars = _environment_group(env, env_sel, alpha, notes)
        partition, fractions, fraction_tests = _partition(
            Y, env, env_vars, env_sel, space_vars, weighting, streams["partition"], run, notes,
            say)
        only_spectral = None
        if full_basis is not None and partition is not None:
            only_spectral = _spectral_fraction_test(Y, env_vars, space_vars, full_basis,
                                                    fraction_tests, spectral_streams[1], run,
                                                    alpha, notes, say)

        say("fitting the scale classes")
        breaks = scale_breaks if scale_breaks is not None else \
            list(default_scale_breaks(basis.scale))
        detrended = _residualise(Y, trend_vars)
        classes = classify_scales(basis.scale, list(space_sel.selected) if space_sel else [],
                                  breaks=breaks)
        grid = _prediction_grid(survey)
        scale_fits = _fit_classes(detrended, basis, classes, trend_vars, grid,
                                  streams["classes"], run)
        scal = scalogram(detrended, basis.vectors, scales=basis.scale)
        scal["moran_i"] = basis.moran_i.reindex(scal.index).to_numpy()
        scal["selected"] = scal.index.isin(space_sel.selected if space_sel else [])

        say("local contributions to beta diversity")
        beta = beta_diversity(Y, n_permutations=n_permutations, seed=streams["lcbd"])
        ordination = redundancy_analysis(Y, env_vars) if env_vars is not None \
            else redundancy_analysis(Y)

    settings = {
        "transformation": transformation, "trend": trend, "spatial_weighting": spatial_weighting,
        "schemes": list(schemes), "chosen_scheme": chosen, "alpha": alpha,
        "n_permutations": n_permutations, "seed": seed, "scale_breaks": [float(b) for b in breaks],
        "engine": engine, "crs": survey.summary()["crs"], "environment_test": environment_test,
        "max_vectors": max_vectors,
    }
    return Analysis(
        survey=survey, settings=settings, response=Y, environment=env, trend=trend_test,
        trend_kept=trend_kept, environment_selection=env_sel, weighting=weighting, basis=basis,
        space_selection=space_sel, partition=partition, fractions=fractions,
        fraction_tests=fraction_tests, scale_fits=scale_fits, scalogram=scal, beta=beta,
        ordination=ordination, notes=tuple(notes),
        warnings=tuple(f"{w.category.__name__}: {w.message}" for w in caught
                       if issubclass(w.category, SpatialEVWarning)),
        environment_spectral=spectral, environment_only_spectral=only_spectral)


def _spectral_test(Y, env, env_sel, survey, rng, run, alpha, notes, say):
    """Moran spectral randomisation test of Y on all environmental variables, with notes."""
    if survey.n_sites > MAX_SITES:
        notes.append(f"The spectral randomisation test of the environment was skipped: it needs "
                     f"a dense eigendecomposition, done up to {MAX_SITES} sites "
                     f"({survey.n_sites} here). The free-permutation test of the environment "
                     f"is liberal if the environment is spatially autocorrelated.")
        return None, None
    say("testing the environment by Moran spectral randomisation")
    full = complete_spatial_basis(distance_decay_weights(survey))
    test = spectral_randomisation_test(Y, env, full, n_randomisations=run["n_permutations"],
                                       seed=rng, engine=run["engine"],
                                       scheduler=run["scheduler"])
    free = env_sel.global_test.p_value if env_sel is not None and env_sel.global_test else None
    notes.append(f"The community–environment link was also tested by Moran spectral "
                 f"randomisation of the environmental table (Wagner & Dray 2015; distance-decay "
                 f"weighting, {test.n_randomisations} randomisations), which keeps each "
                 f"variable's spatial autocorrelation: p = {test.p_value:.4g}"
                 + (f" (free permutations: p = {free:.4g})." if free is not None else ".")
                 + " It is exact only when the weighting describes the environment's "
                 "autocorrelation; in spatial_ev's simulation studies (exponential, Gaussian, "
                 "spherical and anisotropic environmental autocorrelation, 36–40 sites) it "
                 "stayed near the 5 % level where free permutations rejected 12–86 % of true "
                 "null hypotheses.")
    if free is not None and free <= alpha < test.p_value:
        notes.append("Only the free-permutation test of the environment is significant: the "
                     "environmental selection and fractions may reflect a chance match between "
                     "two spatially autocorrelated tables rather than a real link; confirm with "
                     "independent data before acting on them.")
    return test, full


def _spectral_fraction_test(Y, env_vars, space_vars, full: CompleteBasis, fraction_tests, rng,
                            run, alpha, notes, say) -> SpectralRandomisationTest:
    """Spectral randomisation test of the environment-only fraction [a], with a note."""
    say("testing the environment-only fraction by Moran spectral randomisation")
    test = spectral_randomisation_test(Y, env_vars, full, conditioning=space_vars,
                                       n_randomisations=run["n_permutations"], seed=rng,
                                       engine=run["engine"], scheduler=run["scheduler"])
    free = fraction_tests["environment_only"]
    notes.append(f"The environment-only fraction was also tested by spectral randomisation of "
                 f"the selected environmental variables given the spatial group: p = "
                 f"{test.p_value:.4g} (permutation of residuals: p = {free:.4g}).")
    if free <= alpha < test.p_value:
        notes.append("The environment-only fraction is significant by permutation of "
                     "residuals but not by spectral randomisation: part of it may be a chance "
                     "match between spatially autocorrelated residuals and environment.")
    return test


def _environment_group(env: pd.DataFrame | None, selection: ForwardSelection | None,
                       alpha: float, notes: list[str]) -> pd.DataFrame | None:
    """The environmental group of the partition: the selected variables; or, when the global
    test was significant but the adjusted-R² ceiling stopped selection before the first entry,
    the whole table (its adjusted R² is an unbiased estimate, Peres-Neto et al. 2006)."""
    if env is None or selection is None:
        return None
    if selection.selected:
        return env[list(selection.selected)]
    test = selection.global_test
    if test is not None and test.p_value <= alpha:
        notes.append("The environmental global test was significant, but the adjusted-R² "
                     "ceiling of the double stopping rule stopped selection before the first "
                     "variable (a strong variable among weak ones lifts the model above the "
                     "global adjusted R²). The whole environmental table is used for the "
                     "partition; its adjusted R² is unbiased.")
        return env
    return None


def _space_group(basis: SpatialBasis, selection: ForwardSelection | None,
                 trend_vars: pd.DataFrame | None) -> pd.DataFrame | None:
    parts = []
    if trend_vars is not None:
        parts.append(trend_vars)
    if selection is not None and selection.selected:
        parts.append(basis.vectors[list(selection.selected)])
    return pd.concat(parts, axis=1) if parts else None


def _partition(Y, env, env_vars, env_sel, space_vars, weighting, rng, run, notes, say):
    """Two-group partition; a group with nothing selected contributes zero by construction."""
    if env is None:
        notes.append("No environmental table was given: the analysis is spatial only and "
                     "no variation partition is computed.")
        return None, None, None
    if env_vars is not None and space_vars is not None:
        say("partitioning the variation (environment, space)")
        part = partition_variation(Y, {"environment": env_vars, "space": space_vars},
                                   seed=rng, **run)
        fr = part.fractions
        fractions = {"environment_only": float(fr.loc["environment_only", "r2_adj"]),
                     "shared": float(fr.loc["environment_and_space", "r2_adj"]),
                     "space_only": float(fr.loc["space_only", "r2_adj"]),
                     "unexplained": float(fr.loc["unexplained", "r2_adj"])}
        tests = {"environment_only": float(fr.loc["environment_only", "p_value"]),
                 "space_only": float(fr.loc["space_only", "p_value"])}
        return part, fractions, tests
    env_r2 = float(env_sel.r2_adj) if env_vars is not None else 0.0
    space_r2 = 0.0
    if space_vars is not None:
        space_r2 = float(redundancy_analysis(Y, space_vars).r2_adj)
    missing = [name for name, v in (("environment", env_vars), ("space", space_vars)) if v is None]
    notes.append(f"Nothing was selected for {' and '.join(missing)}: "
                 f"{'its' if len(missing) == 1 else 'their'} fractions are zero by construction "
                 f"and the remaining group's adjusted R² is reported as its own fraction.")
    env_p = env_sel.global_test.p_value if env_sel is not None and env_sel.global_test else None
    space_p = None
    if weighting.best is not None:
        space_p = float(weighting.table.loc[weighting.best, "global_p"])
    elif len(weighting.table) and np.isfinite(weighting.table["global_p"]).any():
        space_p = float(weighting.table["global_p"].min())
    fractions = {"environment_only": env_r2, "shared": 0.0, "space_only": space_r2,
                 "unexplained": 1.0 - env_r2 - space_r2}
    return None, fractions, {"environment_only": env_p, "space_only": space_p}


def _residualise(Y: pd.DataFrame, covariables: pd.DataFrame | None) -> pd.DataFrame:
    """Y minus its least-squares fit on the covariables (with intercept); centred Y if none."""
    y = Y.to_numpy(dtype=float)
    y = y - y.mean(axis=0)
    if covariables is not None:
        c = covariables.to_numpy(dtype=float)
        c = c - c.mean(axis=0)
        q, _ = np.linalg.qr(c)
        y = y - q @ (q.T @ y)
    return pd.DataFrame(y, index=Y.index, columns=Y.columns)


def _prediction_grid(survey: Survey) -> pd.DataFrame:
    """Regular grid points inside the survey's hull (union of polygons' hull for polygon sites)."""
    geoms = survey.sites.geometry.to_numpy()
    hull = shapely.convex_hull(shapely.union_all(geoms)) if survey.geometry_type == "polygon" \
        else shapely.convex_hull(shapely.multipoints(survey.coords.to_numpy()))
    xmin, ymin, xmax, ymax = hull.bounds
    width, height = xmax - xmin, ymax - ymin
    if width <= 0 or height <= 0:  # a transect: no area to fill
        return pd.DataFrame(columns=["x", "y"], dtype=float)
    step = math.sqrt(width * height / _GRID_CELLS)
    gx = np.arange(xmin + step / 2, xmax, step)
    gy = np.arange(ymin + step / 2, ymax, step)
    X, Yg = np.meshgrid(gx, gy)
    inside = shapely.contains_xy(hull, X.ravel(), Yg.ravel())
    grid = pd.DataFrame({"x": X.ravel()[inside], "y": Yg.ravel()[inside]})
    grid.index = pd.RangeIndex(len(grid), name="cell")
    grid.attrs["step"] = step
    return grid


def _fit_classes(Yd: pd.DataFrame, basis: SpatialBasis, classes: list[ScaleClass],
                 trend_vars: pd.DataFrame | None, grid: pd.DataFrame, rng, run) -> list:
    """RDA of the detrended community on each class's vectors, with site and grid scores."""
    selected = [v for c in classes for v in c.vectors]
    streams = rng.spawn(len(classes))
    grid_vectors = basis.extend(grid[["x", "y"]].to_numpy()) if len(grid) and selected else None
    fits = []
    for klass, stream in zip(classes, streams):
        if not klass.vectors:
            fits.append(ScaleClassFit(klass, None, None, None, None))
            continue
        names = list(klass.vectors)
        others = [v for v in selected if v not in names]
        cond = pd.concat([df for df in (trend_vars, basis.vectors[others] if others else None)
                          if df is not None], axis=1) if (trend_vars is not None or others) \
            else None
        # given the other classes and the trend; marginal when it is the only class (cond None)
        p = float(permutation_test(Yd, basis.vectors[names], conditioning=cond, seed=stream,
                                   **run).p_value)
        rda = redundancy_analysis(Yd, basis.vectors[names])
        u = basis.vectors[names].to_numpy()
        u = u - u.mean(axis=0)
        coef, *_ = np.linalg.lstsq(u, Yd.to_numpy(), rcond=None)
        axes_v = rda.species_scores(1).to_numpy()[:, :2]  # V: species loadings of the axes
        n_axes = axes_v.shape[1]
        site = (u @ coef) @ axes_v
        flip = np.sign(site[np.argmax(np.abs(site), axis=0), np.arange(n_axes)])
        flip[flip == 0] = 1.0
        site = site * flip
        cols = [f"axis_{k + 1}" for k in range(n_axes)]
        site_scores = pd.DataFrame(site, index=Yd.index, columns=cols)
        grid_scores = None
        if grid_vectors is not None:
            gv = grid_vectors[names].to_numpy() - basis.vectors[names].to_numpy().mean(axis=0)
            values = (gv @ coef) @ axes_v * flip
            grid_scores = pd.concat([grid[["x", "y"]].reset_index(drop=True),
                                     pd.DataFrame(values, columns=cols)], axis=1)
            grid_scores.index = grid.index
        eig = rda.canonical_eigenvalues.to_numpy()
        share = tuple(float(e / eig.sum()) for e in eig[:n_axes]) if eig.sum() > 0 else ()
        fits.append(ScaleClassFit(klass, float(rda.r2_adj), p, site_scores, grid_scores,
                                  share))
    return fits
