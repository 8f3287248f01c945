"""Choosing the spatial weighting scheme whose eigenvectors best describe the response.

Bauman, Drouet, Fortin & Dray (2018, Ecology 99:2159–2166): build spatial eigenvectors under
each of k candidate schemes (neighbour graph × edge weighting, or distance-based), test each
scheme's global model at the Šidák-corrected level α' = 1 − (1 − α)^(1/k), run forward selection
(:func:`spatial_ev.selection.forward.forward_selection`) under each significant scheme, and keep the one
whose selected vectors have the largest adjusted R². Without the correction, trying several
schemes inflates the type I error; the adjusted R² of the chosen scheme remains optimistic.
"""

from __future__ import annotations

import warnings
import zlib
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from spatial_ev._validation import as_matrix, check_int, check_option, check_real, check_rng
from spatial_ev.inference.engines import ENGINES, run_tasks
from spatial_ev.errors import DisconnectedGraphWarning, InputError
from spatial_ev.stats.linear import check_rows
from spatial_ev.inference.null import SequentialRule
from spatial_ev.inference.permutation import permutation_test
from spatial_ev.selection.forward import ForwardSelection, check_step_rule, run_selection

__all__ = ["compare_weighting_schemes", "WeightingComparison", "sidak_level", "DEFAULT_SCHEMES",
           "SchemeRun", "check_schemes"]


#: default candidate schemes (k = 8). Linear edge weights 1 − d/d_max give the longest edge
#: weight 0 (d_max = longest edge); that edge is a bridge of a distance-band graph at the
#: spanning threshold and of a tree, and often of the relative-neighbourhood graph, so the
#: weighted graph would split: those graphs are offered with binary weights only. Removing a
#: hull edge never splits a Delaunay triangulation; a Gabriel graph rarely splits (noted if so).
DEFAULT_SCHEMES = ("delaunay/binary", "delaunay/linear", "gabriel/binary", "gabriel/linear",
                   "relative_neighbourhood/binary", "minimum_spanning_tree/binary",
                   "distance_band/binary", "distance")


def sidak_level(alpha: float, n_tests: int) -> float:
    """Šidák-corrected level α' = 1 − (1 − α)^(1/k) for k independent tests.

    Parameters
    ----------
    alpha : float
        Family-wise level, 0 < alpha < 1.
    n_tests : int
        Number of tests k ≥ 1.

    Returns
    -------
    float

    Examples
    --------
    >>> round(sidak_level(0.05, 5), 6)
    0.010206
    """
    alpha = check_real("alpha", alpha, low=0, high=1, low_inclusive=False, high_inclusive=False)
    n_tests = check_int("n_tests", n_tests, low=1)
    return float(-np.expm1(np.log1p(-alpha) / n_tests))


@dataclass(frozen=True)
class WeightingComparison:
    """Result of :func:`compare_weighting_schemes`.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per scheme (index = scheme, e.g. ``"gabriel/linear"``): ``n_vectors``,
        ``global_pseudo_f``, ``global_p``, ``global_p_sidak`` (1 − (1 − p)^k),
        ``significant`` (global p ≤ α'), ``n_selected``, ``r2_adj`` (of the vectors selected;
        NaN when not significant), ``chosen`` (bool) and ``note`` (e.g. why a scheme could not
        be built).
    best : str or None
        The chosen scheme (largest adjusted R² of the selected vectors among significant
        schemes), None when no scheme is significant at the corrected level or no significant
        scheme kept a vector.
    selection : ForwardSelection or None
        Forward selection under the chosen scheme.
    basis : SpatialBasis or None
        Spatial eigenvectors of the chosen scheme.
    alpha : float
        Family-wise level.
    alpha_corrected : float
        Šidák-corrected level α' = 1 − (1 − α)^(1/k) used for each scheme's global test.
    n_schemes : int
        k, the number of schemes tried.
    """

    table: pd.DataFrame
    best: str | None
    selection: ForwardSelection | None = field(repr=False)
    basis: Any = field(repr=False)
    alpha: float
    alpha_corrected: float
    n_schemes: int

    def to_frame(self) -> pd.DataFrame:
        """Return a copy of the per-scheme table."""
        return self.table.copy()

    def summary(self) -> str:
        """Return a plain-text account of the comparison."""
        lines = [f"Comparison of {self.n_schemes} spatial weighting schemes; each global test "
                 f"judged at the Šidák-corrected level {self.alpha_corrected:.6f} "
                 f"(family-wise {self.alpha:g})"]
        for name, row in self.table.iterrows():
            mark = "*" if row["chosen"] else " "
            r2 = f"{row['r2_adj']:.4f}" if np.isfinite(row["r2_adj"]) else "   —  "
            lines.append(f" {mark}{name:<34s} {int(row['n_vectors']):>5d} vectors  "
                         f"p = {row['global_p']:.4f}  selected {int(row['n_selected']):>3d}  "
                         f"R²adj {r2}  {row['note']}")
        if self.best is None and self.table["significant"].any():
            lines.append("Some schemes have a significant global test but their forward "
                         "selection kept no vector (see the stopping rule of "
                         "forward_selection); no scheme was chosen.")
        elif self.best is None:
            lines.append("No scheme has a significant global test at the corrected level: no "
                         "spatial structure was detected with these schemes.")
        else:
            lines.append(f"Chosen: {self.best} ({', '.join(self.selection.selected)})")
        lines.append("The adjusted R² of the chosen scheme is optimistic (best of several); the "
                     "correction protects the global type I error, not the size of the effect.")
        return "\n".join(lines)


def compare_weighting_schemes(
    Y: Any,
    coords: Any,
    *,
    schemes: Any = None,
    alpha: float = 0.05,
    n_permutations: int = 999,
    seed: None | int | np.random.Generator = None,
    conditioning: Any = None,
    keep: str = "positive",
    ceiling: str = "strict",
    max_vectors: int | None = None,
    engine: str = "local",
    scheduler: Any = None,
    n_workers: int | None = None,
    progress: Callable[[str], None] | None = None,
    sequential_steps: bool = False,
    decision_risk: float = 1e-3,
    shared_steps: bool = False,
) -> WeightingComparison:
    """Choose the spatial weighting scheme whose selected eigenvectors explain most variation.

    For each scheme, spatial eigenvectors are built and their global model tested; a scheme
    counts only if its p ≤ α' = 1 − (1 − α)^(1/k) for the k schemes tried (Bauman, Drouet,
    Fortin & Dray 2018, Ecology 99:2159–2166). Forward selection (double stopping, stepwise
    level α) runs under each significant scheme; the one with the largest adjusted R² of its
    selected vectors is chosen.

    Parameters
    ----------
    Y : array-like or DataFrame, shape (n_sites, n_responses)
        Response, rows in the order of ``coords``. Remove a linear trend first (or pass it as
        ``conditioning``) when there is one.
    coords : (n, 2) array, DataFrame[x, y] or Survey
        Site coordinates in map units.
    schemes : sequence of str, or mapping of name to str or SpatialBasis, optional
        ``"<graph>/<weighting>"`` (graph: a :func:`neighbour_graph` method; weighting: binary,
        linear, concave_down, concave_up — the concave ones as ``"gabriel/concave_down:0.5"``
        with the exponent) or ``"distance"`` (distance-based eigenvectors). A mapping names
        each scheme and may give a prebuilt basis (e.g. a k-nearest-neighbour graph's, whose
        ``keep`` is then the caller's choice). Default :data:`DEFAULT_SCHEMES` (8 schemes).
    alpha : float, default 0.05
        Family-wise level.
    n_permutations : int, default 999
        Permutations per test; must allow p-values ≤ α'.
    seed : None, int or numpy.random.Generator
        Each scheme gets its own stream derived from it and from the scheme's name, so a
        scheme's p-values do not depend on which other schemes are compared.
    conditioning : array-like or DataFrame, optional
        Variables removed first (all tests partial).
    keep : {"positive", "negative", "all"}
        Which eigenvectors are candidates (by the sign of their Moran's I).
    ceiling : {"strict", "keep_last"}
        Adjusted-R² stopping rule of the forward selections (see :func:`forward_selection`).
    max_vectors : int, optional
        Keep at most this many of the broadest eigenvectors per scheme (required above
        :data:`spatial_ev.space.eigen.DENSE_LIMIT` sites, where the Lanczos path computes only them).
    engine : {"local", "processes", "dask"}
        ``"local"``: the schemes one after the other, each test's permutation batches on this
        process's threads. ``"processes"`` / ``"dask"``: each scheme is one task (its
        eigenvectors, global test and selection) on local worker processes or a dask cluster
        (:func:`spatial_ev.inference.engines.run_tasks`), the survey shipped once per worker.
        The same seed gives the same comparison on every engine and worker count.
    scheduler : str or distributed.Client, optional
        With ``engine="dask"``: the scheduler address or Client.
    n_workers : int, optional
        Worker processes (``"processes"``) or temporary dask workers (default: one per core);
        ignored by ``"local"``.
    progress : callable, optional
        Called with a short message: each scheme's stages (``"local"``), or how many schemes
        are done (worker engines).
    sequential_steps : bool, default False
        Step tests of the forward selections stop drawing once "p ≤ α?" is settled, as in
        :func:`~spatial_ev.selection.forward.forward_selection`; the global tests of the
        schemes always draw the full count.
    decision_risk : float, default 0.001
        The bound ε of the sequential rule.
    shared_steps : bool, default False
        Each scheme's forward selection tests every step on one shared set of permutations,
        as in :func:`~spatial_ev.selection.forward.forward_selection`.

    Returns
    -------
    WeightingComparison

    Examples
    --------
    >>> rng = np.random.default_rng(20240611)
    >>> xy = rng.uniform(0, 100, size=(40, 2))
    >>> Y = np.sin(xy[:, :1] / 15) + 0.3 * rng.normal(size=(40, 1))
    >>> out = compare_weighting_schemes(Y, xy, schemes=["gabriel/binary", "distance"],
    ...                                 n_permutations=199, seed=1)  # doctest: +SKIP
    >>> out.best  # doctest: +SKIP
    'gabriel/binary'
    """
    Yarr, y_rows, _ = as_matrix("Y", Y, min_rows=3)
    parsed = check_schemes(schemes)
    alpha = check_real("alpha", alpha, low=0, high=1, low_inclusive=False, high_inclusive=False)
    n_permutations = check_int("n_permutations", n_permutations, low=1)
    check_option("keep", keep, ["positive", "negative", "all"])
    if max_vectors is not None:
        max_vectors = check_int("max_vectors", max_vectors, low=1)
    check_option("ceiling", ceiling, ["strict", "keep_last"])
    check_option("engine", engine, ENGINES)
    if engine != "dask" and scheduler is not None:
        raise InputError(f"parameter `scheduler` is only used with engine='dask'; got "
                         f"{scheduler!r} with engine={engine!r}")
    if n_workers is not None:
        n_workers = check_int("n_workers", n_workers, low=1)
    check_step_rule(sequential_steps, shared_steps)
    decision = SequentialRule.checked(alpha, risk=decision_risk) if sequential_steps else None
    k = len(parsed)
    level = sidak_level(alpha, k)
    if 1.0 / (n_permutations + 1) > level:
        need = int(np.ceil(1.0 / level)) - 1
        raise InputError(f"n_permutations = {n_permutations} cannot reach the corrected level "
                         f"{level:.6f} for {k} schemes (smallest p is 1/(N + 1)); use at least "
                         f"{need} permutations, or fewer schemes")
    cond = None
    if conditioning is not None:
        cond, rows, _ = as_matrix("conditioning", conditioning)
        check_rows("conditioning", cond, rows, Yarr.shape[0], y_rows)
    Yc = Yarr - Yarr.mean(axis=0)
    root = check_rng(seed).spawn(1)[0].bit_generator.seed_seq

    parallel = engine != "local"
    # on worker engines each scheme is one task (its permutation tests run inside it); locally
    # the schemes run one after the other and their permutation batches use the threads
    run = SchemeRun(Yc=Yc, coords=coords, conditioning=cond, y_rows=y_rows, k=k, level=level,
                    alpha=alpha, n_permutations=n_permutations, root=root, keep=keep,
                    ceiling=ceiling, max_vectors=max_vectors, decision=decision,
                    shared=bool(shared_steps),
                    engine="local" if parallel else engine,
                    scheduler=None if parallel else scheduler,
                    progress=None if parallel else progress)

    def done(count: int, total: int) -> None:
        if progress is not None:
            progress(f"weighting schemes: {count} of {total} compared")

    outcomes = run_tasks(run, parsed, engine=engine, scheduler=scheduler,
                         n_workers=n_workers if parallel else 1,
                         progress=done if parallel else None)
    rows_out, best, best_sel, best_basis = [], None, None, None
    for (name, *_), (row, sel, basis, caught) in zip(parsed, outcomes):
        for message, category, filename, lineno in caught:   # in scheme order on any engine
            warnings.warn_explicit(message, category, filename, lineno,
                                   registry=_REISSUED)
        rows_out.append(row)
        if sel is not None and sel.selected and (best_sel is None or sel.r2_adj > best_sel.r2_adj):
            best, best_sel, best_basis = name, sel, basis
    table = pd.DataFrame(rows_out).set_index("scheme")
    if best is not None:
        table.loc[best, "chosen"] = True
    return WeightingComparison(table=table, best=best, selection=best_sel, basis=best_basis,
                               alpha=alpha, alpha_corrected=level, n_schemes=k)


@dataclass(frozen=True)
class SchemeRun:
    """One weighting scheme's eigenvectors, global test and forward selection: the task that
    :func:`compare_weighting_schemes` sends to :func:`~spatial_ev.inference.engines.run_tasks`
    once per scheme (picklable; the survey travels once per worker with it).

    Called with a parsed scheme ``(name, graph method, weighting, exponent, prebuilt basis)``
    (:func:`check_schemes`), it returns ``(row, selection, basis, warnings)``: the scheme's row
    of the comparison table, its :class:`ForwardSelection` (None when not run), its basis (None
    unless the selection kept a vector, the only case where it can be chosen) and the warnings
    raised while it ran as ``(message, category, filename, lineno)``, re-issued by the caller
    in scheme order. The scheme's random stream is derived from ``root`` and its name, so the
    outcome does not depend on where or in which order the schemes run.

    Examples
    --------
    >>> rng = np.random.default_rng(4)
    >>> xy = rng.uniform(0, 100, size=(30, 2))
    >>> Y = np.sin(xy[:, :1] / 20) + 0.2 * rng.normal(size=(30, 1))
    >>> run = SchemeRun(Yc=Y - Y.mean(0), coords=xy, conditioning=None, y_rows=None, k=1,
    ...                 level=0.05, alpha=0.05, n_permutations=99,
    ...                 root=np.random.SeedSequence(1))
    >>> row, selection, basis, caught = run(check_schemes(["distance"])[0])
    >>> row["scheme"], row["significant"]
    ('distance', True)
    """

    Yc: np.ndarray = field(repr=False)
    coords: Any = field(repr=False)
    conditioning: np.ndarray | None = field(repr=False)
    y_rows: Any = field(repr=False)
    k: int
    level: float
    alpha: float
    n_permutations: int
    root: np.random.SeedSequence
    keep: str = "positive"
    ceiling: str = "strict"
    max_vectors: int | None = None
    decision: SequentialRule | None = None
    shared: bool = False
    engine: str = "local"
    scheduler: Any = field(default=None, repr=False)
    progress: Callable[[str], None] | None = field(default=None, repr=False)

    def __call__(self, scheme: tuple) -> tuple[dict, ForwardSelection | None, Any, list]:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            row, sel, basis = self._run(*scheme)
        kept = [(w.message, w.category, w.filename, w.lineno) for w in caught]
        return row, sel, (basis if sel is not None and sel.selected else None), kept

    def _run(self, name, graph_method, weighting, exponent, prebuilt):
        from spatial_ev.space.eigen import distance_eigenvectors, graph_eigenvectors
        from spatial_ev.space.graphs import neighbour_graph

        Yc, cond, k, level, progress = self.Yc, self.conditioning, self.k, self.level, \
            self.progress
        rng = _scheme_stream(self.root, name)
        row = {"scheme": name, "n_vectors": 0, "global_pseudo_f": np.nan, "global_p": np.nan,
               "global_p_sidak": np.nan, "significant": False, "n_selected": 0,
               "r2_adj": np.nan, "chosen": False, "note": ""}
        if progress is not None:
            progress(f"scheme {name}: building eigenvectors")
        try:
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always", DisconnectedGraphWarning)
                if prebuilt is not None:
                    basis = prebuilt
                elif graph_method is None:
                    basis = distance_eigenvectors(self.coords, keep=self.keep,
                                                  max_vectors=self.max_vectors)
                else:
                    graph = neighbour_graph(self.coords, method=graph_method)
                    basis = graph_eigenvectors(graph, weighting=weighting, exponent=exponent,
                                               keep=self.keep, max_vectors=self.max_vectors)
        except InputError as exc:  # recorded in the table, the scheme still counts in k
            row["note"] = f"not built: {exc}"
            return row, None, None
        for w in caught:  # pass every warning on; a split weighted graph also goes in the note
            if issubclass(w.category, DisconnectedGraphWarning):
                row["note"] = ("weighted graph disconnected: some vectors contrast its "
                               "components")
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
        vectors = basis.vectors
        if vectors.shape[0] != Yc.shape[0]:
            raise InputError(f"`coords` has {vectors.shape[0]} sites but `Y` has "
                             f"{Yc.shape[0]} rows; give one row of `Y` per site")
        check_rows("coords", vectors.to_numpy(), vectors.index, Yc.shape[0], self.y_rows)
        row["n_vectors"] = vectors.shape[1]
        n_model = vectors.shape[1] + (cond.shape[1] if cond is not None else 0)
        if vectors.shape[1] == 0 or Yc.shape[0] - n_model - 1 <= 0:
            row["note"] = ("no eigenvector of this sign" if vectors.shape[1] == 0 else
                           "too many vectors for a global test")
            return row, None, basis
        gtest = permutation_test(Yc, vectors.to_numpy(), conditioning=cond,
                                 n_permutations=self.n_permutations, seed=rng.spawn(1)[0],
                                 engine=self.engine, scheduler=self.scheduler)
        row["global_pseudo_f"], row["global_p"] = float(gtest.statistic), float(gtest.p_value)
        row["global_p_sidak"] = float(-np.expm1(k * np.log1p(-min(gtest.p_value, 1.0 - 1e-16))))
        row["significant"] = bool(gtest.p_value <= level)
        if not row["significant"]:
            return row, None, basis
        if progress is not None:
            progress(f"scheme {name}: forward selection among {vectors.shape[1]} vectors")
        sel = run_selection(Yc, vectors.to_numpy(), tuple(map(str, vectors.columns)), cond,
                            alpha_global=level, alpha=self.alpha,
                            n_permutations=self.n_permutations, rng=rng,
                            global_test="required", r2_adj_limit=None, max_variables=None,
                            ceiling=self.ceiling, engine=self.engine, scheduler=self.scheduler,
                            progress=progress, global_result=gtest, decision=self.decision,
                            shared=self.shared)
        row["n_selected"], row["r2_adj"] = len(sel.selected), sel.r2_adj
        return row, sel, basis


_REISSUED: dict = {}
"""Warning registry of the re-issued scheme warnings (the "default" filter action shows each
message once per place, as it would have without the detour through a task)."""


def _scheme_stream(root: np.random.SeedSequence, name: str) -> np.random.Generator:
    """Random stream of one scheme, keyed by its name: the same seed gives a scheme the same
    permutations whatever other schemes are compared alongside it."""
    key = zlib.crc32(name.encode("utf-8"))
    return np.random.default_rng(np.random.SeedSequence(
        entropy=root.entropy, spawn_key=tuple(root.spawn_key) + (key,)))


def check_schemes(schemes) -> list[tuple]:
    """Parse schemes into (name, graph method, weighting, exponent, prebuilt basis or None)."""
    if schemes is None:
        schemes = DEFAULT_SCHEMES
    if isinstance(schemes, Mapping):
        items = list(schemes.items())
    elif isinstance(schemes, str) or not hasattr(schemes, "__iter__"):
        raise InputError(f"`schemes` must be a list of scheme strings such as "
                         f"['gabriel/binary', 'distance'] or a mapping of names to spatial "
                         f"bases; got {schemes!r}")
    else:
        items = [(s, s) for s in schemes]
    if not items:
        raise InputError("`schemes` is empty; give at least one scheme, e.g. ['distance']")
    out = []
    for name, spec in items:
        if not isinstance(name, str) or not name:
            raise InputError(f"`schemes` names must be non-empty strings; got {name!r}")
        if isinstance(getattr(spec, "vectors", None), pd.DataFrame):
            out.append((name, None, None, None, spec))
        elif isinstance(spec, str):
            out.append((name, *_parse_scheme(spec), None))
        else:
            raise InputError(f"`schemes` entry {name!r} must be a scheme string or a spatial "
                             f"basis (with a `vectors` table); got {type(spec).__name__}")
    names = [o[0] for o in out]
    if len(set(names)) != len(names):
        raise InputError(f"`schemes` lists a scheme twice; each counts in the Šidák correction, "
                         f"so give each once; got {names}")
    return out


def _parse_scheme(s: str) -> tuple[str | None, str | None, float | None]:
    """'distance' → (None, None, None); 'gabriel/concave_down:0.5' → ('gabriel', ..., 0.5)."""
    from spatial_ev.space.graphs import METHODS, WEIGHTINGS

    if s == "distance":
        return None, None, None
    graph, sep, weighting = s.partition("/")
    weighting, _, exp_text = weighting.partition(":")
    exponent = None
    if exp_text:
        try:
            exponent = float(exp_text)
        except ValueError:
            raise InputError(f"`schemes` entry {s!r}: exponent {exp_text!r} is not a "
                             f"number; write e.g. 'gabriel/concave_down:0.5'") from None
    if not sep or not graph or not weighting:
        raise InputError(f"`schemes` entry {s!r} is not 'distance' or '<graph>/<weighting>' "
                         f"(e.g. 'gabriel/linear')")
    if graph not in METHODS or weighting not in WEIGHTINGS:
        raise InputError(f"`schemes` entry {s!r}: graph must be one of {', '.join(METHODS)} "
                         f"and weighting one of {', '.join(WEIGHTINGS)}")
    return graph, weighting, exponent
