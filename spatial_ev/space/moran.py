"""Moran's I for many variables at once, its moments, and the weights of distance classes.

I = (n/S₀)·zᵀWz/zᵀz with z centred (Moran 1950, Biometrika 37:17–23). Moments under the
normality and randomisation assumptions follow Cliff & Ord (1981, Spatial Processes)
[memory]. This module holds the statistic only; its tests (normal approximation and
permutations, correlograms) are in :mod:`spatial_ev.inference.autocorrelation`, which evaluates
:meth:`MoranInputs.permuted_statistic` on blocks of permutations: all variables share one
sparse product per block, nothing loops over permutations or sites in Python.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from scipy import sparse
from scipy.spatial import ConvexHull

from spatial_ev._validation import as_matrix, check_int, check_real
from spatial_ev.errors import InputError
from spatial_ev.space.geometry import (band_pairs, check_coordinates, chord_to_distance,
                                       symmetric_matrix)

__all__ = ["check_weights", "check_moran_values", "MoranInputs", "moran_inputs", "MoranMoments",
           "moran_statistic", "DistanceClasses", "distance_classes"]


def check_weights(weights: Any, n: int) -> sparse.csr_matrix:
    """Spatial weights for Moran's I as a float CSR matrix, checked.

    Parameters
    ----------
    weights : (n, n) sparse or dense matrix, NeighbourGraph (binary weights) or SpatialBasis
        Finite, non-negative, zero diagonal, at least one positive weight; need not be
        symmetric.
    n : int
        Number of sites.

    Returns
    -------
    scipy.sparse.csr_matrix

    Examples
    --------
    >>> check_weights(np.eye(4, k=1) + np.eye(4, k=-1), 4).nnz
    6
    """
    if hasattr(weights, "weights") and callable(weights.weights):       # NeighbourGraph
        weights = weights.weights("binary")
    elif hasattr(weights, "weights") and hasattr(weights, "vectors"):   # SpatialBasis
        weights = weights.weights
    if sparse.issparse(weights):
        w = sparse.csr_matrix(weights, dtype=np.float64)
    else:
        try:
            w = sparse.csr_matrix(np.asarray(weights, dtype=np.float64))
        except (TypeError, ValueError) as exc:
            raise InputError(f"`weights` must be a numeric (n, n) matrix ({exc})") from None
    if w.shape != (n, n):
        raise InputError(f"`weights` must be {n} x {n} (one row per site); got {w.shape}")
    if not np.isfinite(w.data).all() or (w.data < 0).any():
        raise InputError("`weights` must be finite and non-negative")
    if np.any(w.diagonal() != 0):
        raise InputError("`weights` must have a zero diagonal (no self-neighbours); got "
                         f"{int((w.diagonal() != 0).sum())} non-zero diagonal entries")
    if w.sum() <= 0:
        raise InputError("`weights` has no positive weight (S0 = 0): no site has a neighbour")
    return w


@dataclass(frozen=True)
class MoranMoments:
    """Moments of Moran's I under no autocorrelation (Cliff & Ord 1981 [memory]).

    Attributes
    ----------
    expected : float
        E[I] = −1/(n − 1).
    variance_normal : float
        Var[I] under normality (the same for every variable).
    variance_randomisation : ndarray, shape (p,)
        Var[I] under randomisation (depends on each variable's kurtosis b₂); the exact variance
        over all n! relabellings of the sites.
    """

    expected: float
    variance_normal: float
    variance_randomisation: np.ndarray


@dataclass(frozen=True)
class MoranInputs:
    """Checked variables and weights of a Moran's I computation (:func:`moran_inputs`).

    Attributes
    ----------
    centred : ndarray, shape (n, p)
        The variables, centred column by column.
    weights : scipy.sparse.csr_matrix, shape (n, n)
    names : pandas.Index, shape (p,)
        Variable names.
    """

    centred: np.ndarray
    weights: sparse.csr_matrix
    names: pd.Index

    def statistic(self) -> np.ndarray:
        """Moran's I of every variable, shape (p,)."""
        z, w = self.centred, self.weights
        return z.shape[0] / float(w.sum()) * (z * (w @ z)).sum(axis=0) / (z * z).sum(axis=0)

    def permuted_statistic(self, orders: np.ndarray) -> np.ndarray:
        """Moran's I of every variable with the sites reordered, shape (m, p).

        ``orders`` (m, n): row k gives, for each site position, the site whose values it
        receives. One gather and one sparse product serve all m orders and p variables
        (memory O(n·m·p)). A reordering keeps each column's mean and zᵀz, so only zᵀWz is
        recomputed.
        """
        z, w = self.centred, self.weights
        n, p = z.shape
        factor = n / float(w.sum()) / (z * z).sum(axis=0)
        zp = z[orders.T].reshape(n, -1)                                 # (n, m·p)
        return (zp * (w @ zp)).sum(axis=0).reshape(len(orders), p) * factor

    def moments(self) -> MoranMoments:
        """E[I], Var[I] under normality and under randomisation."""
        w, z = self.weights, self.centred
        n = w.shape[0]
        s0 = float(w.sum())
        sym = w + w.T
        s1 = 0.5 * float(sym.multiply(sym).sum())
        s2 = float(((np.asarray(w.sum(axis=1)).ravel() + np.asarray(w.sum(axis=0)).ravel())
                    ** 2).sum())
        e = -1.0 / (n - 1)
        var_n = (n * n * s1 - n * s2 + 3 * s0 * s0) / (s0 * s0 * (n * n - 1)) - e * e
        m2 = (z * z).sum(axis=0)
        b2 = n * (z ** 4).sum(axis=0) / m2 ** 2
        var_r = (n * ((n * n - 3 * n + 3) * s1 - n * s2 + 3 * s0 * s0)
                 - b2 * ((n * n - n) * s1 - 2 * n * s2 + 6 * s0 * s0)) \
            / ((n - 1) * (n - 2) * (n - 3) * s0 * s0) - e * e
        return MoranMoments(e, float(var_n), var_r)


def check_moran_values(values: Any) -> tuple[np.ndarray, pd.Index]:
    """Check variables for Moran's I and centre them.

    Parameters
    ----------
    values : array (n,) or (n, p), Series or DataFrame
        Variables measured at the sites; no missing values, no constant column, n ≥ 4.

    Returns
    -------
    (centred, names)
        ``centred`` (n, p) float array; ``names`` the column names (or 0..p-1).

    Examples
    --------
    >>> z, names = check_moran_values(np.arange(1.0, 6.0))
    >>> z.ravel().tolist(), list(names)
    ([-2.0, -1.0, 0.0, 1.0, 2.0], [0])
    """
    z, _, cols = as_matrix("values", values)
    names = cols if cols is not None else pd.RangeIndex(z.shape[1], name="variable")
    z = z - z.mean(axis=0)
    flat = (z * z).sum(axis=0) <= 1e-24 * max(1.0, float(np.abs(z).max(initial=0)))
    if flat.any():
        raise InputError(f"`values` column {names[np.flatnonzero(flat)[0]]!r} is constant; "
                         "Moran's I is undefined; remove it")
    if z.shape[0] < 4:
        raise InputError(f"Moran's I tests need at least 4 sites; got {z.shape[0]}")
    return z, names


def moran_inputs(values: Any, weights: Any) -> MoranInputs:
    """Check variables (:func:`check_moran_values`) and weights (:func:`check_weights`).

    Parameters
    ----------
    values : array (n,) or (n, p), Series or DataFrame
    weights : (n, n) sparse or dense matrix, NeighbourGraph or SpatialBasis

    Returns
    -------
    MoranInputs

    Examples
    --------
    >>> w = np.eye(10, k=1) + np.eye(10, k=-1) + np.eye(10, k=9) + np.eye(10, k=-9)
    >>> moran_inputs(np.arange(1.0, 11.0), w).centred.shape
    (10, 1)
    """
    z, names = check_moran_values(values)
    return MoranInputs(z, check_weights(weights, z.shape[0]), names)


def moran_statistic(values: Any, weights: Any) -> pd.Series:
    """Moran's I of one or many variables (the statistic alone; tests in
    :func:`spatial_ev.inference.autocorrelation.morans_i`).

    Parameters
    ----------
    values : array (n,) or (n, p), Series or DataFrame
    weights : (n, n) sparse or dense matrix, NeighbourGraph (binary weights) or SpatialBasis

    Returns
    -------
    pandas.Series
        Moran's I per variable.

    Examples
    --------
    >>> w = np.eye(10, k=1) + np.eye(10, k=-1) + np.eye(10, k=9) + np.eye(10, k=-9)
    >>> round(float(moran_statistic(np.arange(1.0, 11.0), w).iloc[0]), 6)
    0.454545
    """
    inputs = moran_inputs(values, weights)
    return pd.Series(inputs.statistic(), index=inputs.names, name="moran_i")


@dataclass(frozen=True)
class DistanceClasses:
    """Equal-width distance classes and their binary weights (:func:`distance_classes`).

    Attributes
    ----------
    table : DataFrame, one row per class (index ``class``)
        ``lower``, ``upper`` (map units; a pair belongs to a class when lower < d ≤ upper),
        ``mean_distance``, ``n_pairs``.
    weights : tuple of scipy.sparse.csr_matrix or None
        Binary weights of each class's pairs; None for a class without any pair.
    n_sites : int
    """

    table: pd.DataFrame
    weights: tuple
    n_sites: int


def distance_classes(coords: Any, *, n_classes: int = 10, max_distance: float | None = None,
                     distance: str = "auto") -> DistanceClasses:
    """Pairs of sites grouped in equal-width distance classes from 0 to ``max_distance``.

    Parameters
    ----------
    coords : (n, 2) array, DataFrame[x, y] or Survey
    n_classes : int
        Number of classes (1 to 100).
    max_distance : float, optional
        Largest distance considered; default half the largest distance between sites
        [practice: distant classes hold few pairs and mostly edge sites].
    distance : {"auto", "euclidean", "great_circle"}
        See :func:`spatial_ev.space.graphs.neighbour_graph`.

    Returns
    -------
    DistanceClasses

    Examples
    --------
    >>> xy = np.column_stack([np.arange(5.0), np.zeros(5)])
    >>> distance_classes(xy, n_classes=2, max_distance=2.0).table["n_pairs"].tolist()
    [4, 3]
    """
    layout = check_coordinates(coords, distance=distance)
    n_classes = check_int("n_classes", n_classes, low=1, high=100)
    if max_distance is None:
        pts = layout.points
        hull = pts if layout.collinear or len(pts) < 4 else pts[ConvexHull(pts).vertices]
        far = np.sqrt(((hull[:, None, :] - hull[None, :, :]) ** 2).sum(-1)).max()
        max_distance = 0.5 * float(chord_to_distance(np.array([far]), layout.metric)[0])
    else:
        max_distance = check_real("max_distance", max_distance, low=0, low_inclusive=False)
    i, j, d = band_pairs(layout, max_distance)
    edges = np.linspace(0.0, max_distance, n_classes + 1)
    label = np.clip(np.searchsorted(edges, d, side="left") - 1, 0, n_classes - 1)
    rows, weights = [], []
    for c in range(n_classes):      # a handful of classes
        sel = label == c
        dc = d[sel]
        rows.append({"lower": edges[c], "upper": edges[c + 1],
                     "mean_distance": float(dc.mean()) if len(dc) else np.nan,
                     "n_pairs": int(sel.sum())})
        weights.append(symmetric_matrix(layout.n, i[sel], j[sel], np.ones(int(sel.sum())))
                       if sel.any() else None)
    table = pd.DataFrame(rows)
    table.index.name = "class"
    return DistanceClasses(table, tuple(weights), layout.n)
