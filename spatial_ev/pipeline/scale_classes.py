"""Scale classes of selected spatial vectors: their partial tests and their fits.

:func:`scale_class_p_values` is the test both the analysis and the design simulator run: each
class's vectors given the other selected vectors and the trend. :func:`fit_scale_classes`
adds, for the analysis, the RDA of the (detrended) community on each class's vectors, with
fitted site scores and their values on a prediction grid (:func:`prediction_grid`) for maps.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import shapely

from spatial_ev._validation import check_rng
from spatial_ev.errors import InputError
from spatial_ev.inference.permutation import permutation_test
from spatial_ev.input.survey import Survey
from spatial_ev.pipeline.options import DEFAULT_OPTIONS, StepOptions
from spatial_ev.space.eigen import SpatialBasis
from spatial_ev.space.scales import ScaleClass
from spatial_ev.stats.canonical import redundancy_analysis

__all__ = [
    "GRID_CELLS",
    "ScaleClassFit",
    "fit_scale_classes",
    "prediction_grid",
    "residualise",
    "scale_class_p_values",
]

GRID_CELLS = 3600  # target number of grid cells over the survey's bounding box


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


def scale_class_p_values(Y: pd.DataFrame | np.ndarray, vectors: pd.DataFrame,
                       members: Mapping[str, Sequence[str]], *,
                       conditioning: pd.DataFrame | None = None,
                       seed: int | np.random.Generator | None = None,
                       options: StepOptions = DEFAULT_OPTIONS) -> dict[str, float | None]:
    """Partial permutation test of each scale class's vectors.

    Class c is tested given the selected vectors of every other class and ``conditioning``
    (the kept trend); with a single class and no trend the test is marginal. Each class gets
    its own random stream, spawned in class order from ``seed`` (also for classes without
    vectors, so a class's p does not depend on whether another class is empty).

    Parameters
    ----------
    Y : DataFrame or ndarray, shape (n_sites, n_responses)
        The (transformed) community.
    vectors : DataFrame, shape (n_sites, k)
        Spatial vectors, columns named.
    members : mapping of class name to vector names
        Every class in order; a class without vectors gets p None.
    conditioning : DataFrame, optional
        Covariables of every test (same row index as ``vectors``).
    seed : int or numpy.random.Generator, optional
    options : StepOptions

    Returns
    -------
    dict
        Class name → p-value (None for a class without vectors).

    Examples
    --------
    >>> p = scale_class_p_values(Y, basis.vectors, {"broad": ["sv001"], "fine": []},
    ...                        seed=1)  # doctest: +SKIP
    >>> p["fine"] is None  # doctest: +SKIP
    True
    """
    if not isinstance(vectors, pd.DataFrame):
        raise InputError(f"`vectors` must be a DataFrame of named spatial vectors; got "
                         f"{type(vectors).__name__}")
    missing = sorted({v for names in members.values() for v in names} - set(vectors.columns))
    if missing:
        raise InputError(f"`members` names vector(s) {missing} that are not columns of "
                         f"`vectors`; give the selected vectors' names")
    rng = check_rng(seed)
    selected = [v for names in members.values() for v in names]
    out: dict[str, float | None] = {}
    for (name, own), stream in zip(members.items(), rng.spawn(len(members))):
        if not own:
            out[name] = None
            continue
        own = list(own)
        others = [v for v in selected if v not in own]
        parts = [df for df in (conditioning, vectors[others] if others else None)
                 if df is not None]
        cond = pd.concat(parts, axis=1) if parts else None
        out[name] = float(permutation_test(Y, vectors[own], conditioning=cond, seed=stream,
                                           **options.tests()).p_value)
    return out


def residualise(Y: pd.DataFrame, covariables: pd.DataFrame | None) -> pd.DataFrame:
    """Y minus its least-squares fit on the covariables (with intercept); centred Y if none.

    Examples
    --------
    >>> Y = pd.DataFrame({"a": [1.0, 2.0, 4.0]})
    >>> residualise(Y, None)["a"].tolist()
    [-1.3333333333333335, -0.3333333333333335, 1.6666666666666665]
    """
    if not isinstance(Y, pd.DataFrame):
        raise InputError(f"`Y` must be a DataFrame (sites × responses); got {type(Y).__name__}")
    y = Y.to_numpy(dtype=float)
    y = y - y.mean(axis=0)
    if covariables is not None:
        c = covariables.to_numpy(dtype=float)
        c = c - c.mean(axis=0)
        q, _ = np.linalg.qr(c)
        y = y - q @ (q.T @ y)
    return pd.DataFrame(y, index=Y.index, columns=Y.columns)


def prediction_grid(survey: Survey) -> pd.DataFrame:
    """Regular grid points inside the survey's hull (union of polygons' hull for polygon sites).

    About :data:`GRID_CELLS` cells over the bounding box; an empty frame for a transect.

    Examples
    --------
    >>> grid = prediction_grid(survey)  # doctest: +SKIP
    >>> list(grid.columns)  # doctest: +SKIP
    ['x', 'y']
    """
    if not isinstance(survey, Survey):
        raise InputError(f"`survey` must be a Survey; got {type(survey).__name__}")
    geoms = survey.sites.geometry.to_numpy()
    hull = shapely.convex_hull(shapely.union_all(geoms)) if survey.geometry_type == "polygon" \
        else shapely.convex_hull(shapely.multipoints(survey.coords.to_numpy()))
    xmin, ymin, xmax, ymax = hull.bounds
    width, height = xmax - xmin, ymax - ymin
    if width <= 0 or height <= 0:  # a transect: no area to fill
        return pd.DataFrame(columns=["x", "y"], dtype=float)
    step = math.sqrt(width * height / GRID_CELLS)
    gx = np.arange(xmin + step / 2, xmax, step)
    gy = np.arange(ymin + step / 2, ymax, step)
    X, Yg = np.meshgrid(gx, gy)
    inside = shapely.contains_xy(hull, X.ravel(), Yg.ravel())
    grid = pd.DataFrame({"x": X.ravel()[inside], "y": Yg.ravel()[inside]})
    grid.index = pd.RangeIndex(len(grid), name="cell")
    grid.attrs["step"] = step
    return grid


def fit_scale_classes(Yd: pd.DataFrame, basis: SpatialBasis, classes: Sequence[ScaleClass], *,
                      trend: pd.DataFrame | None, grid: pd.DataFrame,
                      seed: int | np.random.Generator | None = None,
                      options: StepOptions = DEFAULT_OPTIONS) -> tuple[ScaleClassFit, ...]:
    """RDA of the detrended community on each class's vectors, with site and grid scores.

    Parameters
    ----------
    Yd : DataFrame, shape (n_sites, n_species)
        The transformed community, detrended (:func:`residualise`).
    basis : SpatialBasis
        The basis the classes' vectors come from (extended to the grid).
    classes : sequence of ScaleClass
    trend : DataFrame, optional
        The kept trend (conditioning of the class tests).
    grid : DataFrame
        Prediction points (``x``, ``y``; points along a river network also ``edge`` and
        ``offset``, kept in the grid scores); may be empty.
    seed : int or numpy.random.Generator, optional
        Streams of the class tests (:func:`scale_class_p_values`).
    options : StepOptions

    Returns
    -------
    tuple of ScaleClassFit
        One per class, in order.

    Examples
    --------
    >>> fits = fit_scale_classes(Yd, basis, classes, trend=None,
    ...                          grid=prediction_grid(survey), seed=1)  # doctest: +SKIP
    """
    if not isinstance(basis, SpatialBasis):
        raise InputError(f"`basis` must be a SpatialBasis; got {type(basis).__name__}")
    selected = [v for c in classes for v in c.vectors]
    p_values = scale_class_p_values(Yd, basis.vectors, {c.name: c.vectors for c in classes},
                                  conditioning=trend, seed=seed, options=options)
    # points along a river network carry their edge and offset: the basis uses them as given
    where = grid if {"edge", "offset"} <= set(grid.columns) else grid[["x", "y"]].to_numpy()
    grid_vectors = basis.extend(where) if len(grid) and selected else None
    fits = []
    for klass in classes:
        if not klass.vectors:
            fits.append(ScaleClassFit(klass, None, None, None, None))
            continue
        names = list(klass.vectors)
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
            place = [c for c in ("x", "y", "edge", "offset") if c in grid.columns]
            grid_scores = pd.concat([grid[place].reset_index(drop=True),
                                     pd.DataFrame(values, columns=cols)], axis=1)
            grid_scores.index = grid.index
        eig = rda.canonical_eigenvalues.to_numpy()
        share = tuple(float(e / eig.sum()) for e in eig[:n_axes]) if eig.sum() > 0 else ()
        fits.append(ScaleClassFit(klass, float(rda.r2_adj), p_values[klass.name],
                                  site_scores, grid_scores, share))
    return tuple(fits)
