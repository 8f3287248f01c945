"""Space–time interaction in repeated surveys without replication.

Design: s sites each surveyed at t times, one observation per site and survey (n = s·t rows,
no replicate). A classical two-way ANOVA cannot test the interaction — it uses up every residual
degree of freedom. Following Legendre, De Cáceres & Borcard (2010, Ecology 91:262–272):

* main effects are coded by orthogonal Helmert contrasts: s − 1 columns for space (site) and
  t − 1 for time (survey) (:func:`helmert_contrasts`);
* the interaction is coded parsimoniously by the products of spatial eigenvectors (distance-based
  MEM of the site coordinates with positive Moran's I, :func:`spatial_ev.space.eigen.
  distance_eigenvectors`) and temporal eigenvectors (distance-based eigenvectors of the survey
  times with a positive principal-coordinate eigenvalue — irregular spacing allowed,
  :func:`temporal_eigenvectors`), which leaves residual degrees of freedom for the test.

Every test is a pseudo-F of a (partial) RDA through the package's permutation test
(:func:`spatial_ev.inference.permutation.permutation_test`, p-values and seed blocks from the
null-distribution service). Permutation scheme of each test (the exchangeable units under its
null hypothesis; Legendre et al. 2010 [memory], Anderson & ter Braak 2003, J. Stat. Comput.
Simul. 73:85–113 [paper]):

* interaction — residuals of the main-effects model (space and time contrasts as covariables)
  are permuted freely over all s·t observations (Freedman & Lane 1983): under H0 of no
  interaction those residuals are exchangeable;
* space — residuals of the model holding the time contrasts (and the interaction term, when
  coded) are permuted among sites within each survey (restricted permutations, strata =
  surveys);
* time — residuals of the model holding the space contrasts (and the interaction) are permuted
  among surveys within each site (strata = sites).

When the interaction is significant (p ≤ alpha), the main effects describe an average over a
changing pattern, and two families of separate tests say where the structure lies:

* spatial structure within each survey: RDA of that survey's s sites on the spatial
  eigenvectors, free permutation of sites; Holm correction over the surveys;
* temporal structure within each site: RDA of that site's t surveys on the temporal
  eigenvectors, free permutation of the surveys; Holm correction over the sites. These tests
  are computed for all sites at once (one batched product per chunk of permutations); with t
  surveys there are only t! distinct orders, so no p-value can fall below about 1/t!.

With no interaction term (``interaction=False``) the main-effect pseudo-F statistics equal the
F statistics of a two-way ANOVA without replication (univariate response) and the F built from
sums of squares summed over species (multivariate response) [derived].
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from functools import partial
from typing import Any

import numpy as np
import pandas as pd

from spatial_ev._validation import check_int, check_option, check_real, check_rng
from spatial_ev.errors import InputError
from spatial_ev.inference.multiple import holm_adjust
from spatial_ev.inference.null import TIE_TOLERANCE, check_run_options, seed_blocks
from spatial_ev.inference.permutation import permutation_test
from spatial_ev.space.eigen import distance_eigenvectors

__all__ = ["helmert_contrasts", "temporal_eigenvectors", "space_time_tests", "SpaceTimeTests",
           "FOLLOW_UP"]

FOLLOW_UP = ("when_interaction", "always", "never")
_BATCH_BYTES = 32 * 2 ** 20


def helmert_contrasts(n_levels: int) -> np.ndarray:
    """Helmert contrasts of a factor: (n_levels, n_levels − 1), orthogonal columns summing to 0.

    Column j contrasts level j + 1 with the mean of the levels before it: −1 for levels
    1..j, j for level j + 1, 0 after.

    Parameters
    ----------
    n_levels : int
        Number of levels (≥ 2).

    Examples
    --------
    >>> helmert_contrasts(3).tolist()
    [[-1.0, -1.0], [1.0, -1.0], [0.0, 2.0]]
    """
    n_levels = check_int("n_levels", n_levels, low=2)
    level = np.arange(n_levels)[:, None]
    column = np.arange(1, n_levels)[None, :]
    return np.where(level < column, -1.0, np.where(level == column, column * 1.0, 0.0))


def temporal_eigenvectors(times: Any) -> pd.DataFrame:
    """Distance-based eigenvectors of survey times with a positive principal-coordinate
    eigenvalue (PCNM view; Borcard & Legendre 2002, Ecol. Model. 153:51–68).

    The distances between times are truncated at the largest gap between consecutive surveys
    (the minimum-spanning-tree threshold of a line), so irregular spacing is allowed. Three
    equally spaced surveys give one vector, the linear contrast (1, 0, −1)/√2; two give one.

    Parameters
    ----------
    times : 1-D array or Series
        Numeric survey times (distinct), e.g. years or days.

    Returns
    -------
    DataFrame
        (n_times, k) columns ``tv1`` … ``tvk``, index = the Series' index (or 0..n-1).

    Examples
    --------
    >>> temporal_eigenvectors(np.array([0.0, 1.0, 2.0])).round(4)["tv1"].tolist()
    [0.7071, 0.0, -0.7071]
    """
    index = times.index if isinstance(times, pd.Series) else None
    try:
        values = np.asarray(times, dtype=np.float64)
    except (TypeError, ValueError):
        raise InputError("`times` must be numbers (e.g. years or days since the first "
                         "survey)") from None
    if values.ndim != 1 or values.size < 2:
        raise InputError(f"`times` must be one-dimensional with at least 2 surveys; got shape "
                         f"{values.shape}")
    if not np.isfinite(values).all() or np.unique(values).size != values.size:
        raise InputError(f"`times` must be finite and distinct; got {values.tolist()}")
    basis = distance_eigenvectors(np.column_stack([values, np.zeros_like(values)]), keep="all",
                                  solver="dense", distance="euclidean")
    lam = basis.pcoa_eigenvalues
    keep = lam > 1e-9 * lam.max()
    vectors = basis.vectors.to_numpy()[:, keep]
    return pd.DataFrame(vectors, index=index if index is not None else pd.RangeIndex(values.size),
                        columns=[f"tv{k + 1}" for k in range(vectors.shape[1])])


@dataclass(frozen=True)
class SpaceTimeTests:
    """Result of :func:`space_time_tests`.

    Attributes
    ----------
    table : DataFrame
        Rows ``space``, ``time`` and (when coded) ``interaction``: ``r2``, ``r2_adj``,
        ``df_model``, ``df_residual``, ``pseudo_f``, ``p_value``, ``n_permutations``,
        ``permuted`` (what was permuted) and ``within`` (strata).
    n_sites, n_surveys : int
    space_vectors : list of str
        Spatial eigenvectors used in the interaction term.
    n_time_vectors : int
        Temporal eigenvectors used in the interaction term.
    alpha : float
    interaction_significant : bool or None
        None when the interaction was not coded.
    within_surveys : DataFrame or None
        Spatial structure within each survey (index = survey labels): ``r2_adj``,
        ``pseudo_f``, ``p_value``, ``p_adjusted`` (Holm), ``significant``.
    within_sites : DataFrame or None
        Temporal structure within each site (index = site ids): ``r2``, ``pseudo_f``,
        ``p_value``, ``p_adjusted`` (Holm), ``significant``.
    notes : tuple of str
        What was done and why (plain sentences).
    """

    table: pd.DataFrame = field(repr=False)
    n_sites: int
    n_surveys: int
    space_vectors: list
    n_time_vectors: int
    alpha: float
    interaction_significant: bool | None
    within_surveys: pd.DataFrame | None = field(repr=False)
    within_sites: pd.DataFrame | None = field(repr=False)
    notes: tuple

    def to_frame(self) -> pd.DataFrame:
        """The table of the space, time and interaction tests (a copy).

        Examples
        --------
        >>> r = _example_result()
        >>> r.to_frame().index.tolist()
        ['space', 'time', 'interaction']
        """
        return self.table.copy()

    def summary(self) -> dict[str, Any]:
        """JSON-friendly summary of every test.

        Examples
        --------
        >>> sorted(_example_result().summary())[:3]
        ['alpha', 'interaction_significant', 'n_sites']
        """
        tests = {name: {k: _plain(v) for k, v in row.items()}
                 for name, row in self.table.to_dict(orient="index").items()}
        out: dict[str, Any] = {
            "alpha": self.alpha, "interaction_significant": self.interaction_significant,
            "n_sites": self.n_sites, "n_surveys": self.n_surveys,
            "n_space_vectors": len(self.space_vectors), "n_time_vectors": self.n_time_vectors,
            "tests": tests, "within_surveys": None, "within_sites": None,
            "notes": list(self.notes)}
        if self.within_surveys is not None:
            w = self.within_surveys
            out["within_surveys"] = [
                {"survey": str(k), **{c: _plain(v) for c, v in row.items()}}
                for k, row in w.to_dict(orient="index").items()]
        if self.within_sites is not None:
            w = self.within_sites
            out["within_sites"] = {
                "n_tested": int(w["p_value"].notna().sum()),
                "n_significant": int(w["significant"].sum()),
                "significant_sites": [_plain(s) for s in w.index[w["significant"].to_numpy()]]}
        return out


def _plain(value: Any) -> Any:
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not np.isfinite(value):
        return None
    return value


def _example_result() -> SpaceTimeTests:
    rng = np.random.default_rng(11)
    sites = pd.Index([f"s{i}" for i in range(12)], name="site")
    coords = pd.DataFrame({"x": np.arange(12.0), "y": 0.0}, index=sites)
    rows = pd.MultiIndex.from_product([["a", "b", "c"], sites], names=["survey", "site"])
    y = pd.DataFrame(rng.normal(size=(36, 3)), index=rows)
    return space_time_tests(y, coords=coords, times=pd.Series([0.0, 1, 2], index=["a", "b", "c"]),
                            n_permutations=19, seed=1)


# ----------------------------------------------------------------------------- validation

def _check_design(Y: Any, coords: Any, times: Any):
    if not isinstance(Y, pd.DataFrame) or not isinstance(Y.index, pd.MultiIndex) \
            or Y.index.nlevels != 2:
        raise InputError("`Y` must be a DataFrame indexed by (survey, site) pairs: a 2-level "
                         "MultiIndex, one row per site and survey")
    if not isinstance(coords, pd.DataFrame) or {"x", "y"} - set(coords.columns):
        raise InputError("`coords` must be a DataFrame with columns 'x' and 'y', indexed by "
                         "site id")
    if isinstance(times, Mapping):
        times = pd.Series(times)
    if not isinstance(times, pd.Series):
        raise InputError("`times` must be a Series (or dict) mapping survey label -> numeric "
                         "time")
    try:
        tvals = times.astype(np.float64)
    except (TypeError, ValueError):
        raise InputError("`times` must map survey labels to numbers (years, days, ...)") \
            from None
    if tvals.size < 2:
        raise InputError(f"space-time tests need at least 2 surveys; got {tvals.size}")
    order = np.argsort(tvals.to_numpy(), kind="stable")
    tvals = tvals.iloc[order]
    surveys, sites = tvals.index, coords.index
    if Y.index.has_duplicates:
        dup = Y.index[Y.index.duplicated()][0]
        raise InputError(f"`Y` has more than one row for survey {dup[0]!r}, site {dup[1]!r}; "
                         f"give one row per site and survey")
    full = pd.MultiIndex.from_product([surveys, sites], names=Y.index.names)
    missing = full.difference(Y.index)
    if len(missing) or len(Y) != len(full):
        what = (f"missing rows such as survey {missing[0][0]!r}, site {missing[0][1]!r}"
                if len(missing) else "rows for surveys or sites not in `times`/`coords`")
        raise InputError(f"`Y` must hold every (survey, site) pair of `times` x `coords` "
                         f"({len(full)} rows); it has {len(Y)} rows with {what}")
    y = Y.loc[full]
    try:
        values = y.to_numpy(dtype=np.float64)
    except (TypeError, ValueError):
        raise InputError("`Y` must hold numbers") from None
    if not np.isfinite(values).all():
        raise InputError("`Y` has missing or infinite values; remove or fill them")
    return y, values, coords, tvals


def _interaction_columns(space: np.ndarray, time: np.ndarray, s: int, t: int) -> np.ndarray:
    """(s·t, n_space·n_time): products of the eigenvectors on survey-major rows."""
    prod = time[:, None, :, None] * space[None, :, None, :]     # (t, s, kt, ks)
    return prod.reshape(s * t, time.shape[1] * space.shape[1])


# ------------------------------------------------------------------------------- within site

def _draw_orders(n: int, rng: np.random.Generator, m: int) -> np.ndarray:
    return rng.permuted(np.broadcast_to(np.arange(n, dtype=np.intp), (m, n)), axis=1)


def _within_site_tests(y3: np.ndarray, time_vectors: np.ndarray, n_permutations: int,
                       rng: np.random.Generator, sites: pd.Index) -> pd.DataFrame:
    """RDA of each site's surveys on the temporal eigenvectors, all sites batched."""
    s, t, p = y3.shape
    yc = y3 - y3.mean(axis=1, keepdims=True)
    xc = time_vectors - time_vectors.mean(axis=0)
    q, _ = np.linalg.qr(xc)
    k = q.shape[1]
    df_res = t - 1 - k
    ss_tot = np.einsum("stp,stp->s", yc, yc)
    fit = np.einsum("tk,stp->skp", q, yc)
    ss_fit = np.einsum("skp,skp->s", fit, fit)
    with np.errstate(invalid="ignore", divide="ignore"):
        f_obs = (ss_fit / k) / (np.maximum(ss_tot - ss_fit, 0.0) / df_res)
        r2 = ss_fit / ss_tot
    testable = ss_tot > 0
    counts = np.zeros(s, dtype=np.int64)
    blocks = seed_blocks(rng, partial(_draw_orders, t))
    step = max(1, _BATCH_BYTES // (8 * s * k * p + 1))
    limit = f_obs * (1.0 - TIE_TOLERANCE)
    for a in range(0, n_permutations, step):     # batches of permutations
        perms = blocks.rows(a, min(a + step, n_permutations))          # (m, t)
        qp = q[perms]                                                  # rows of Q permuted
        proj = np.einsum("mtk,stp->mskp", qp, yc)
        ss = np.einsum("mskp,mskp->ms", proj, proj)
        with np.errstate(invalid="ignore", divide="ignore"):
            f_perm = (ss / k) / (np.maximum(ss_tot - ss, 0.0) / df_res)
        counts += (f_perm >= limit).sum(axis=0)
    p_values = np.where(testable, (counts + 1.0) / (n_permutations + 1.0), np.nan)
    if n_permutations == 0:
        p_values = np.full(s, np.nan)
    return pd.DataFrame({"r2": np.where(testable, r2, np.nan),
                         "pseudo_f": np.where(testable, f_obs, np.nan),
                         "p_value": p_values}, index=sites)


# --------------------------------------------------------------------------------- the test

def space_time_tests(Y: pd.DataFrame, *, coords: pd.DataFrame, times: Any,
                     interaction: bool = True, max_space_vectors: int | None = None,
                     alpha: float = 0.05, follow_up: str = "when_interaction",
                     n_permutations: int = 999, seed: None | int | np.random.Generator = None,
                     chunk_size: int | None = None, engine: str = "local",
                     scheduler: Any = None, n_workers: int | None = None,
                     progress: Callable[[int, int], Any] | None = None) -> SpaceTimeTests:
    """Tests of space, time and their interaction in an unreplicated repeated survey.

    Parameters
    ----------
    Y : DataFrame, shape (n_surveys * n_sites, n_species)
        Response (usually transformed, e.g. Hellinger) indexed by a 2-level MultiIndex
        (survey label, site id), one row per survey and site.
    coords : DataFrame
        Columns ``x``, ``y`` (map units) indexed by site id.
    times : Series or dict
        Survey label → numeric time (years, days...); irregular spacing allowed.
    interaction : bool
        Code the interaction by eigenvector products (default); False fits the additive model
        only (main effects tested against the interaction + error residual, as in a two-way
        ANOVA without replication).
    max_space_vectors : int, optional
        Use at most this many spatial eigenvectors (the broadest) in the interaction; by
        default all with positive Moran's I, reduced if needed to leave residual degrees of
        freedom (said in the notes).
    alpha : float
        Level for the interaction decision and the follow-up tests.
    follow_up : {"when_interaction", "always", "never"}
        When to run the within-survey and within-site tests.
    n_permutations, seed, chunk_size, engine, scheduler, n_workers, progress
        As in :func:`spatial_ev.inference.permutation.permutation_test`.

    Returns
    -------
    SpaceTimeTests

    Examples
    --------
    >>> r = _example_result()
    >>> r.table.loc["space", "within"]
    'survey'
    """
    interaction = bool(interaction)
    alpha = check_real("alpha", alpha, low=0, high=1, low_inclusive=False)
    follow_up = check_option("follow_up", follow_up, FOLLOW_UP)
    if max_space_vectors is not None:
        max_space_vectors = check_int("max_space_vectors", max_space_vectors, low=1)
    n_permutations, chunk_size, engine = check_run_options(n_permutations, chunk_size, engine,
                                                           progress)
    y, values, coords, tvals = _check_design(Y, coords, times)
    rng = check_rng(seed)
    surveys, sites = tvals.index, coords.index
    t, s = len(surveys), len(sites)
    if s < 5:
        raise InputError(f"space-time tests need at least 5 sites; got {s}")
    survey_of = np.repeat(np.arange(t), s)
    site_of = np.tile(np.arange(s), t)
    space_f = helmert_contrasts(s)[site_of]
    time_f = helmert_contrasts(t)[survey_of]
    notes: list[str] = []
    basis = distance_eigenvectors(coords[["x", "y"]], distance="euclidean")
    space_vec = basis.vectors.to_numpy()
    space_names = list(basis.vectors.columns)
    time_vec = temporal_eigenvectors(tvals).to_numpy()
    options = dict(n_permutations=n_permutations, chunk_size=chunk_size, engine=engine,
                   scheduler=scheduler, n_workers=n_workers, progress=progress)
    x_int = None
    if interaction:
        room = (s - 1) * (t - 1) - 1            # keep at least one residual degree of freedom
        limit = room // time_vec.shape[1]
        if max_space_vectors is not None:
            limit = min(limit, max_space_vectors)
        if limit < 1:
            raise InputError(f"{s} sites x {t} surveys leave no degree of freedom for an "
                             f"interaction term; use interaction=False")
        if space_vec.shape[1] > limit:
            notes.append(f"The interaction used the {limit} broadest of the "
                         f"{space_vec.shape[1]} spatial eigenvectors with positive Moran's I, "
                         f"to leave residual degrees of freedom.")
            space_vec, space_names = space_vec[:, :limit], space_names[:limit]
        x_int = _interaction_columns(space_vec, time_vec, s, t)
        notes.append(f"Interaction coded by {x_int.shape[1]} products of {len(space_names)} "
                     f"spatial and {time_vec.shape[1]} temporal eigenvector(s) instead of "
                     f"{(s - 1) * (t - 1)} interaction contrasts.")
    def with_int(a: np.ndarray) -> np.ndarray:
        return np.column_stack([a, x_int]) if interaction else a

    records = {}
    tests = [("space", space_f, with_int(time_f), "survey", survey_of),
             ("time", time_f, with_int(space_f), "site", site_of)]
    if interaction:
        tests.append(("interaction", x_int, np.column_stack([space_f, time_f]), "", None))
    for name, x, w, within, strata in tests:     # three tests, not a hot path
        kw = dict(options)
        if strata is not None:
            kw.update(restriction="blocks", blocks=strata)
        res = permutation_test(values, x, conditioning=w, seed=rng, **kw)
        records[name] = {"r2": res.r2, "r2_adj": res.r2_adj, "df_model": res.df_model,
                         "df_residual": res.df_residual, "pseudo_f": res.statistic,
                         "p_value": res.p_value, "n_permutations": n_permutations,
                         "permuted": "residuals of the other terms",
                         "within": within or "none (all observations)"}
    table = pd.DataFrame.from_dict(records, orient="index")
    significant = None
    if interaction:
        p_int = table.loc["interaction", "p_value"]
        significant = bool(np.isfinite(p_int) and p_int <= alpha)
    run_follow = follow_up == "always" or (follow_up == "when_interaction" and bool(significant))
    within_surveys = within_sites = None
    if interaction and significant:
        notes.append(f"The space-time interaction is significant (p = {p_int:.4g} <= {alpha}): "
                     f"the spatial pattern of the community changed between surveys. The main "
                     f"effects average over a changing pattern; read the tests within each "
                     f"survey and within each site.")
    elif interaction:
        notes.append(f"No significant space-time interaction (p = {p_int:.4g} > {alpha}): the "
                     f"spatial pattern is stable across surveys as far as this test can tell; "
                     f"the space and time main effects are interpretable on their own.")
    if run_follow:
        tests_s = []
        full_basis = basis.vectors.to_numpy()
        for label in surveys:                   # one test per survey (few), not a hot path
            block = y.xs(label, level=0).loc[sites]
            res = permutation_test(block.to_numpy(), full_basis, seed=rng, **options)
            tests_s.append({"r2_adj": res.r2_adj, "pseudo_f": res.statistic,
                            "p_value": res.p_value})
        within_surveys = pd.DataFrame(tests_s, index=pd.Index(surveys, name="survey"))
        within_surveys["p_adjusted"] = holm_adjust(within_surveys["p_value"].to_numpy())
        within_surveys["significant"] = within_surveys["p_adjusted"].fillna(1.0) <= alpha
        notes.append(f"Spatial structure tested separately in each of the {t} surveys "
                     f"({full_basis.shape[1]} spatial eigenvectors, free permutation of sites); "
                     f"Holm correction over the surveys.")
        if t - 1 - time_vec.shape[1] >= 1:
            y3 = values.reshape(t, s, -1).transpose(1, 0, 2)
            within_sites = _within_site_tests(y3, time_vec, n_permutations, rng,
                                              pd.Index(sites, name=sites.name or "site"))
            within_sites["p_adjusted"] = holm_adjust(within_sites["p_value"].to_numpy())
            within_sites["significant"] = within_sites["p_adjusted"].fillna(1.0) <= alpha
            floor = 1.0 / float(np.prod(np.arange(1, t + 1)))
            notes.append(f"Temporal structure tested separately at each of the {s} sites "
                         f"({time_vec.shape[1]} temporal eigenvector(s), free permutation of "
                         f"the {t} surveys); Holm correction over the sites. With {t} surveys "
                         f"there are only {int(round(1 / floor))} distinct orders, so no site "
                         f"p-value can fall much below {floor:.3g}.")
        else:
            notes.append(f"Temporal structure within sites was not tested: {t} surveys leave "
                         f"no residual degree of freedom after {time_vec.shape[1]} temporal "
                         f"eigenvector(s).")
    return SpaceTimeTests(table=table, n_sites=s, n_surveys=t, space_vectors=space_names,
                          n_time_vectors=int(time_vec.shape[1]), alpha=alpha,
                          interaction_significant=significant, within_surveys=within_surveys,
                          within_sites=within_sites, notes=tuple(notes))
