"""The repeated-survey analysis: did the spatial pattern change, and which sites changed?

:func:`analyse_repeated` runs, on a :class:`~spatial_ev.input.repeated.RepeatedSurvey`:

1. the space–time tests (:func:`spatial_ev.inference.space_time.space_time_tests`) on the
   transformed species table (Hellinger by default) — space, time and their interaction, with
   follow-up tests within each survey and within each site when the interaction is significant;
2. the per-site change between two surveys (default: the first and the last), its losses and
   gains and the per-site permutation tests with Holm's correction, and the paired test of
   losses against gains (:func:`spatial_ev.inference.site_change.site_change_test`) on the raw
   counts (the dissimilarity indices use raw abundances; Hellinger/chord are computed inside).

Randomness comes from one generator made from ``seed``, passed to the steps in a fixed order.
The result is frozen and never prints; :mod:`spatial_ev.report.change` draws and writes it.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from spatial_ev._validation import check_int, check_option, check_real, check_rng
from spatial_ev.errors import InputError
from spatial_ev.inference.site_change import PAIRINGS, SiteChange, site_change_test
from spatial_ev.inference.space_time import SpaceTimeTests, space_time_tests
from spatial_ev.input.repeated import RepeatedSurvey
from spatial_ev.stats.temporal_beta import CHANGE_INDICES
from spatial_ev.stats.transform import transform

__all__ = ["analyse_repeated", "RepeatedAnalysis", "RESPONSE_TRANSFORMATIONS"]

RESPONSE_TRANSFORMATIONS = ("hellinger", "chord", "none")


@dataclass(frozen=True)
class RepeatedAnalysis:
    """Result of :func:`analyse_repeated`.

    Attributes
    ----------
    survey : RepeatedSurvey
        The analysed survey.
    transformation : str
        Transformation of the species table for the space–time tests.
    space_time : SpaceTimeTests
    change : SiteChange
        Per-site change between ``change.before`` and ``change.after``.
    parameters : dict
        Every option of the run (JSON-friendly), including the seed.
    notes : tuple of str
        Plain sentences: what was found and what limits the reading.
    """

    survey: RepeatedSurvey = field(repr=False)
    transformation: str
    space_time: SpaceTimeTests
    change: SiteChange
    parameters: dict
    notes: tuple

    def to_frame(self) -> pd.DataFrame:
        """Per-site table: coordinates, change between the two surveys, temporal test.

        Examples
        --------
        >>> a = _example_analysis()
        >>> {"x", "y", "dissimilarity", "losses", "gains"} <= set(a.to_frame().columns)
        True
        """
        out = self.survey.coords.join(self.change.table)
        if self.space_time.within_sites is not None:
            w = self.space_time.within_sites.add_prefix("temporal_")
            out = out.join(w.set_axis(out.index))
        return out

    def summary(self) -> dict[str, Any]:
        """The JSON-friendly summary written as ``summary.json`` of a change run folder.

        Examples
        --------
        >>> sorted(_example_analysis().summary())[:4]
        ['change', 'crs', 'distance_unit', 'n_sites']
        """
        s = self.survey.summary()
        return {
            "n_sites": s["n_sites"], "n_species": s["n_species"],
            "n_surveys": s["n_surveys"], "surveys": s["surveys"], "times": s["times"],
            "time_unit": s["time_unit"], "crs": s["crs"], "distance_unit": s["distance_unit"],
            "transformation": self.transformation,
            "space_time": self.space_time.summary(),
            "change": self.change.summary(),
            "notes": list(self.notes),
            "parameters": dict(self.parameters),
        }


def _example_analysis() -> RepeatedAnalysis:
    rng = np.random.default_rng(4)
    ids = pd.Index([f"p{i}" for i in range(10)], name="site")
    sites = pd.DataFrame({"x": rng.uniform(0, 100, 10), "y": rng.uniform(0, 100, 10)},
                         index=ids)
    long = pd.DataFrame(rng.poisson(5.0, (30, 4)) + 1, columns=list("ABCD"))
    long.insert(0, "year", np.repeat([2020, 2021, 2022], 10))
    long.insert(0, "site", np.tile(ids, 3))
    survey = RepeatedSurvey.from_frames(sites, long, local_unit="metre")
    return analyse_repeated(survey, n_permutations=19, site_permutations=19, seed=4)


def _check_compare(compare: Any, surveys: list[str]) -> tuple[str, str]:
    if compare is None:
        return surveys[0], surveys[-1]
    if isinstance(compare, (str, bytes)) or not isinstance(compare, Sequence) \
            or len(compare) != 2:
        raise InputError(f"`compare` must name two surveys (before, after); got {compare!r}; "
                         f"the surveys are {surveys}")
    a, b = (str(c) for c in compare)
    for label in (a, b):
        if label not in surveys:
            raise InputError(f"`compare`: no survey {label!r}; the surveys are {surveys}")
    if a == b:
        raise InputError(f"`compare` names survey {a!r} twice; give two different surveys")
    return a, b


def analyse_repeated(survey: RepeatedSurvey, *, transformation: str = "hellinger",
                     change_index: str = "percentage_difference",
                     compare: Sequence[str] | None = None, n_permutations: int = 999,
                     site_permutations: int = 9999, pairing: str = "independent",
                     alpha: float = 0.05, max_space_vectors: int | None = None,
                     seed: None | int | np.random.Generator = None, engine: str = "local",
                     scheduler: Any = None, n_workers: int | None = None,
                     progress: Callable[[int, int], Any] | None = None) -> RepeatedAnalysis:
    """Run the repeated-survey analysis (space–time tests and per-site change).

    Parameters
    ----------
    survey : RepeatedSurvey
        From :func:`~spatial_ev.input.repeated.read_repeated_survey` or
        :meth:`~spatial_ev.input.repeated.RepeatedSurvey.from_frames`.
    transformation : {"hellinger", "chord", "none"}
        Of the species table for the space–time tests.
    change_index : {"percentage_difference", "ruzicka", "sorensen", "jaccard", "hellinger", "chord"}
        Dissimilarity of each site between the two compared surveys.
    compare : (str, str), optional
        Labels of the two surveys compared site by site; default the first and the last.
    n_permutations : int
        Permutations of each space–time test.
    site_permutations : int
        Permutations of the per-site change tests (and the loss/gain balance test). Holm's
        correction over n sites needs p ≤ alpha/n, hence N ≥ n/alpha − 1 (default 9999).
    pairing : {"independent", "kept"}
        See :mod:`spatial_ev.inference.site_change`.
    alpha : float
        Level of every decision (interaction, follow-ups, exceptional sites).
    max_space_vectors : int, optional
        Cap on the spatial eigenvectors of the interaction term.
    seed : None, int or numpy Generator
    engine, scheduler, n_workers, progress
        As in :func:`spatial_ev.inference.permutation.permutation_test`.

    Returns
    -------
    RepeatedAnalysis

    Examples
    --------
    >>> a = _example_analysis()
    >>> a.change.before, a.change.after
    ('2020', '2022')
    """
    if not isinstance(survey, RepeatedSurvey):
        raise InputError(f"`survey` must be a RepeatedSurvey (read_repeated_survey); got "
                         f"{type(survey).__name__}")
    transformation = check_option("transformation", transformation, RESPONSE_TRANSFORMATIONS)
    change_index = check_option("change_index", change_index, CHANGE_INDICES)
    pairing = check_option("pairing", pairing, PAIRINGS)
    alpha = check_real("alpha", alpha, low=0, high=1, low_inclusive=False)
    n_permutations = check_int("n_permutations", n_permutations, low=0)
    site_permutations = check_int("site_permutations", site_permutations, low=0)
    before, after = _check_compare(compare, survey.surveys)
    seed_value = seed if isinstance(seed, (int, np.integer)) or seed is None else "generator"
    rng = check_rng(seed)
    y = survey.species
    response = y if transformation == "none" else transform(y.to_numpy(), transformation)
    response = pd.DataFrame(np.asarray(response, dtype=np.float64), index=y.index,
                            columns=y.columns)
    engine_options = dict(engine=engine, scheduler=scheduler, n_workers=n_workers,
                          progress=progress)
    tests = space_time_tests(response, coords=survey.coords, times=survey.times,
                             max_space_vectors=max_space_vectors, alpha=alpha,
                             n_permutations=n_permutations, seed=rng, **engine_options)
    change = site_change_test(survey.survey_table(before), survey.survey_table(after),
                              index=change_index, n_permutations=site_permutations, seed=rng,
                              pairing=pairing, alpha=alpha, labels=(before, after),
                              **engine_options)
    notes = list(tests.notes) + _change_notes(change, survey.n_sites, site_permutations, alpha)
    parameters = {"transformation": transformation, "change_index": change_index,
                  "compare": [before, after], "n_permutations": n_permutations,
                  "site_permutations": site_permutations, "pairing": pairing, "alpha": alpha,
                  "max_space_vectors": max_space_vectors, "seed": seed_value,
                  "engine": engine}
    return RepeatedAnalysis(survey=survey, transformation=transformation, space_time=tests,
                            change=change, parameters=parameters, notes=tuple(notes))


def _change_notes(change: SiteChange, n_sites: int, n_permutations: int,
                  alpha: float) -> list[str]:
    notes = []
    s = change.summary()
    if n_permutations and n_sites / (n_permutations + 1.0) > alpha:
        notes.append(f"With {n_permutations} permutations the smallest site p-value is "
                     f"{1 / (n_permutations + 1):.2g}; after Holm's correction over {n_sites} "
                     f"sites no site can reach {alpha}. Use at least "
                     f"{int(np.ceil(n_sites / alpha)) - 1} permutations to flag sites.")
    if s["n_exceptional"]:
        notes.append(f"{s['n_exceptional']} site(s) changed exceptionally between survey "
                     f"{change.before} and {change.after} (Holm-adjusted p <= {alpha}): "
                     f"{s['exceptional_losing']} mostly by losses, {s['exceptional_gaining']} "
                     f"mostly by gains.")
    else:
        notes.append(f"No site changed exceptionally between survey {change.before} and "
                     f"{change.after} after Holm's correction.")
    b = change.balance
    if b is not None:
        p = b.p_permutation if np.isfinite(b.p_permutation) else b.p_parametric
        verdict = ("differ significantly" if p <= alpha else "do not differ significantly")
        notes.append(f"Over all sites, losses (mean {b.mean_losses:.3f}) and gains (mean "
                     f"{b.mean_gains:.3f}) {verdict} (paired t = {b.t_statistic:.3g}, "
                     f"p = {p:.3g}).")
    else:
        notes.append(f"The {change.index} distance has no loss/gain decomposition; only the "
                     f"per-site dissimilarities and tests are reported.")
    return notes
