"""Scales of spatial structure: scalograms and scale classes in map units.

A spatial basis orders its vectors from broad to fine; each carries a characteristic scale in
map units (see :class:`spatial_ev.space.eigen.SpatialBasis`). This module groups vectors into scale
classes (broad / medium / fine by default) and measures how much of the community's variation
each vector carries (the scalogram; Legendre, Borcard & Roberts 2012, Ecology 93:1234–1240 and
Dray et al. 2012, Ecol. Monogr. 82:257–275 [memory]).

For an orthonormal, centred vector ``u_k`` and a centred response ``Y``, the share of variation
carried by the vector is ``R²_k = ‖Yᵀu_k‖² / tr(YᵀY)``; over the complete basis of ``n − 1``
vectors these shares sum to 1, and for a subset of orthogonal vectors they add up to the R² of
the regression on that subset.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
import scipy.spatial

from spatial_ev._validation import as_matrix, check_int
from spatial_ev.errors import InputError

__all__ = ["FINEST_QUANTILE", "ScaleClass", "classify_scales", "default_scale_breaks",
           "extent_wavelength", "resolvable_scales", "scalogram"]

#: share of a basis's vectors allowed below its reported finest resolvable scale
FINEST_QUANTILE = 0.05


@dataclass(frozen=True)
class ScaleClass:
    """A class of spatial scales and the selected vectors that fall in it.

    Attributes
    ----------
    name : str
        ``"broad"``, ``"medium"``, ``"fine"`` (or ``"class k"`` for other class counts).
    bounds : tuple of float
        ``(lower, upper)`` scale bounds of the class in map units; a vector belongs to the
        class when ``lower < scale <= upper`` (``upper`` may be ``inf``, ``lower`` 0).
    vectors : tuple of str
        Names of the selected vectors in the class, broad to fine.
    scale_range : tuple of float or None
        Smallest and largest scale among those vectors, or None when the class is empty.
    """

    name: str
    bounds: tuple[float, float]
    vectors: tuple[str, ...]
    scale_range: tuple[float, float] | None


def _check_scales(scales) -> pd.Series:
    if not isinstance(scales, pd.Series):
        raise InputError("`scales` must be a pandas Series of scales in map units indexed by "
                         f"vector name; got {type(scales).__name__}")
    values = scales.to_numpy(dtype=float)
    if values.size == 0 or not np.all(np.isfinite(values)) or np.any(values <= 0):
        raise InputError("`scales` must hold positive finite scales in map units (one per "
                         "vector); got empty, non-finite or non-positive values")
    return scales.astype(float)


def default_scale_breaks(scales: pd.Series, *, n_classes: int = 3) -> np.ndarray:
    """Class boundaries splitting a basis into classes with equal numbers of vectors.

    Boundaries are taken from the whole basis (not only the selected vectors) so that the
    classes describe what the sampling design can resolve; they are returned in map units,
    broadest first. Common practice is to split the ordered basis into equal-count groups
    [practice].

    Parameters
    ----------
    scales : pandas.Series
        Scale of every vector of the basis, map units.
    n_classes : int, keyword-only
        Number of classes (2–6).

    Returns
    -------
    numpy.ndarray, shape (n_classes − 1,)
        Decreasing boundaries in map units.

    Examples
    --------
    >>> import pandas as pd
    >>> default_scale_breaks(pd.Series([90., 60., 40., 30., 20., 10.])).tolist()
    [50.0, 25.0]
    """
    scales = _check_scales(scales)
    n_classes = check_int("n_classes", n_classes, low=2, high=6)
    ordered = np.sort(scales.to_numpy())[::-1]
    if ordered.size < n_classes:
        raise InputError(f"a basis of {ordered.size} vectors cannot be split into "
                         f"{n_classes} scale classes; ask for fewer classes")
    cuts = [int(round(ordered.size * k / n_classes)) for k in range(1, n_classes)]
    return np.array([(ordered[c - 1] + ordered[c]) / 2 for c in cuts])


def _class_names(n: int) -> list[str]:
    return {2: ["broad", "fine"], 3: ["broad", "medium", "fine"]}.get(
        n, [f"class {k + 1}" for k in range(n)])


def classify_scales(scales: pd.Series, selected: Sequence[str], *,
                    breaks: Sequence[float] | None = None) -> list[ScaleClass]:
    """Group selected vectors into scale classes bounded in map units.

    Parameters
    ----------
    scales : pandas.Series
        Scale (map units) of every vector of the basis, indexed by vector name.
    selected : sequence of str
        The vectors to classify (e.g. the forward-selected ones).
    breaks : sequence of float, keyword-only
        Class boundaries in map units, any order; default :func:`default_scale_breaks`
        (three classes of equal size over the whole basis).

    Returns
    -------
    list of ScaleClass
        Broadest class first; empty classes are kept (they say the class was not detected).

    Examples
    --------
    >>> import pandas as pd
    >>> s = pd.Series([90., 60., 40., 30., 20., 10.], index=list("abcdef"))
    >>> [c.vectors for c in classify_scales(s, ["a", "d", "f"])]
    [('a',), ('d',), ('f',)]
    """
    scales = _check_scales(scales)
    selected = list(selected)
    unknown = [v for v in selected if v not in scales.index]
    if unknown:
        raise InputError(f"selected vectors {unknown[:10]} are not in the basis")
    if breaks is None:
        edges = default_scale_breaks(scales)
    else:
        edges = np.sort(np.asarray(breaks, dtype=float))[::-1]
        if edges.size == 0 or not np.all(np.isfinite(edges)) or np.any(edges <= 0) \
                or np.unique(edges).size != edges.size:
            raise InputError("`breaks` must be distinct positive scales in map units; "
                             f"got {list(breaks)}")
    bounds = np.concatenate([[np.inf], edges, [0.0]])
    names = _class_names(edges.size + 1)
    order = scales.loc[selected].sort_values(ascending=False)
    classes = []
    for k, name in enumerate(names):
        upper, lower = bounds[k], bounds[k + 1]
        members = order[(order > lower) & (order <= upper)]
        rng = (float(members.min()), float(members.max())) if len(members) else None
        classes.append(ScaleClass(name=name, bounds=(float(lower), float(upper)),
                                  vectors=tuple(members.index), scale_range=rng))
    return classes


def scalogram(Y, vectors: pd.DataFrame, *, scales: pd.Series | None = None) -> pd.DataFrame:
    """Share of the response's variation carried by each spatial vector.

    Parameters
    ----------
    Y : array-like or DataFrame, shape (n_sites, n_species)
        Response (e.g. Hellinger-transformed community); centred here.
    vectors : DataFrame, shape (n_sites, k)
        Mutually orthogonal spatial vectors (a basis's ``.vectors``); centred and scaled to
        unit norm here.
    scales : pandas.Series, keyword-only
        Scale of each vector in map units, added as a column when given.

    Returns
    -------
    DataFrame
        Indexed by vector name: ``r2`` (share of total variation), ``cumulative_r2`` and,
        when given, ``scale``.

    Examples
    --------
    >>> import numpy as np, pandas as pd
    >>> u = pd.DataFrame({"v1": [1., -1, 0, 0], "v2": [0., 0, 1, -1]})
    >>> scalogram(np.array([[1.], [-1], [0], [0]]), u)["r2"].round(12).tolist()
    [1.0, 0.0]
    """
    y, _, _ = as_matrix("Y", Y, min_rows=3)
    if not isinstance(vectors, pd.DataFrame):
        raise InputError("`vectors` must be a DataFrame of spatial vectors (sites x vectors)")
    u, _, _ = as_matrix("vectors", vectors)
    if u.shape[0] != y.shape[0]:
        raise InputError(f"`vectors` has {u.shape[0]} rows but `Y` has {y.shape[0]} sites")
    y = y - y.mean(axis=0)
    u = u - u.mean(axis=0)
    norms = np.linalg.norm(u, axis=0)
    if np.any(norms < 1e-12):
        raise InputError("a spatial vector is constant; it carries no spatial structure")
    u = u / norms
    total = float(np.sum(y * y))
    if total <= 0:
        raise InputError("`Y` has no variation; a scalogram is undefined")
    r2 = np.sum((u.T @ y) ** 2, axis=1) / total
    frame = pd.DataFrame({"r2": r2, "cumulative_r2": np.cumsum(r2)}, index=vectors.columns)
    if scales is not None:
        frame["scale"] = pd.Series(scales, dtype=float).reindex(vectors.columns).to_numpy()
    return frame


def extent_wavelength(coords) -> float:
    """Broadest wavelength a layout's extent can resolve: twice its long side (map units).

    The long side is that of the smallest-area rectangle enclosing the layout (a transect's
    length; a square's side), so the value depends only on the convex hull: sites added
    inside the hull never change it, and it never shrinks when sites are added. A half-wave
    spanning the extent is the broadest structure a layout can tell apart from a constant
    (extent sets the broadest resolvable wavelength, ≈ 2 × extent; REFERENCES "Sampling
    design" [derived from the transect eigenfunctions]).

    Parameters
    ----------
    coords : array-like, shape (n, 2)
        Projected coordinates in map units.

    Returns
    -------
    float

    Examples
    --------
    >>> extent_wavelength([[0, 0], [10, 0], [10, 4], [0, 4]])
    20.0
    """
    xy, _, _ = as_matrix("coords", coords, min_rows=2)
    if xy.shape[1] != 2:
        raise InputError(f"`coords` must have two columns (x, y); got {xy.shape[1]}")
    xy = xy - xy.mean(axis=0)
    if not np.any(np.ptp(xy, axis=0) > 0):
        raise InputError("`coords` are all the same point; a layout needs an extent (give at "
                         "least two distinct sites)")
    try:
        hull = xy[scipy.spatial.ConvexHull(xy).vertices]
    except scipy.spatial.QhullError:  # collinear: the points themselves
        hull = xy
    edges = np.diff(np.vstack([hull, hull[:1]]), axis=0)
    angles = np.arctan2(edges[:, 1], edges[:, 0])
    angles = np.concatenate([angles, [0.0]])
    c, s = np.cos(angles), np.sin(angles)
    u = hull @ np.vstack([c, s])                    # (points, directions) along each edge
    v = hull @ np.vstack([-s, c])
    span_u, span_v = np.ptp(u, axis=0), np.ptp(v, axis=0)
    best = int(np.argmin(span_u * span_v + 1e-300 * (span_u + span_v)))
    if np.all(span_u * span_v <= 1e-12 * max(float(np.max(span_u)), 1e-300) ** 2):
        return float(2 * np.max(np.ptp(u, axis=0)))   # collinear: twice the length
    return float(2 * max(span_u[best], span_v[best]))


def resolvable_scales(scales: pd.Series, coords) -> tuple[float, float]:
    """The finest and broadest scale (map units) a layout's basis can resolve.

    The finest is the :data:`FINEST_QUANTILE` quantile of the basis's vector scales (a few
    vectors localised in the densest corner do not set it alone); the broadest is
    :func:`extent_wavelength`, set by the layout's extent rather than by its broadest
    vector (on mixed-density layouts the first vectors localise, while broad structure is
    still carried by combinations of them).

    Parameters
    ----------
    scales : pandas.Series
        Scale of every vector of the layout's basis, map units.
    coords : array-like, shape (n, 2)
        The layout's coordinates.

    Returns
    -------
    (float, float)
        ``(finest, broadest)``.

    Examples
    --------
    >>> import pandas as pd
    >>> resolvable_scales(pd.Series([40.0, 20.0, 10.0]), [[0, 0], [30, 0], [30, 10]])
    (10.0, 60.0)
    """
    scales = _check_scales(scales)
    finest = float(np.quantile(scales.to_numpy(), FINEST_QUANTILE, method="lower"))
    return finest, extent_wavelength(coords)
