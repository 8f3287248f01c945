"""The geometry core of the space floor: one coordinate check, distances and chords, Delaunay and
minimum-spanning-tree edges, distance-band pairs and symmetric sparse matrices.

Coordinates are planar map units, or longitude/latitude degrees handled on a sphere of radius
6,371,008.8 m (the IUGG mean Earth radius) through 3-D chords, so that one cKDTree serves both.
The Euclidean minimum spanning tree is a subgraph of the Delaunay triangulation, so its longest
edge (the distance-band threshold) is exact from Delaunay edges in O(n log n).
"""

from __future__ import annotations

import warnings
from typing import Any, NamedTuple

import numpy as np
import pandas as pd
from scipy import sparse
from scipy.sparse import csgraph
from scipy.spatial import Delaunay, cKDTree

from spatial_ev._validation import check_option
from spatial_ev.errors import GeographicCoordinatesWarning, InputError

__all__ = ["EARTH_RADIUS_M", "DISTANCES", "REL_TOL", "Layout", "check_coordinates",
           "plane_coordinates", "pair_lengths", "chord_to_distance", "distance_to_chord",
           "delaunay_edges", "symmetric_matrix", "mst_edges", "mst_threshold", "band_pairs",
           "layout_points"]


EARTH_RADIUS_M = 6_371_008.8


DISTANCES = ("auto", "euclidean", "great_circle")


REL_TOL = 1e-9  # relative tolerance for "on the circle / lune boundary" decisions


class Layout(NamedTuple):
    """Validated site positions (private helper shared with :mod:`spatial_ev.space.eigen`)."""

    xy: np.ndarray          # (n, 2) coordinates as given (map units, or lon/lat degrees)
    site_ids: pd.Index
    points: np.ndarray      # (n, d) embedding whose Euclidean distance is monotone in distance
    metric: str             # "euclidean" or "great_circle"
    geometry: Any           # GeoSeries of the sites (polygons) or None
    collinear: bool         # all sites on one straight line (a transect)

    @property
    def n(self) -> int:
        return self.xy.shape[0]


def check_coordinates(coords: Any, *, distance: str = "auto", name: str = "coords") -> Layout:
    """Validate coordinates (array, DataFrame[x, y] or Survey) and return a :class:`Layout`."""
    distance = check_option("distance", distance, DISTANCES)
    geometry = None
    crs = None
    is_survey = hasattr(coords, "coords") and not isinstance(coords, (np.ndarray, pd.DataFrame))
    if is_survey:
        crs = getattr(coords, "crs", None)
        if getattr(coords, "geometry_type", "point") == "polygon":
            geometry = coords.sites.geometry
        coords = coords.coords
    if isinstance(coords, pd.DataFrame):
        lower = {str(c).lower() for c in coords.columns}
        if {"x", "y"} - set(coords.columns):
            raise InputError(f"`{name}` DataFrame must have columns 'x' and 'y'; got "
                             f"{list(coords.columns)!r}; rename the coordinate columns")
        if lower & {"lon", "lat", "longitude", "latitude"} and distance != "great_circle":
            raise InputError(f"`{name}` has longitude/latitude columns; project the survey "
                             "(read_survey with a CRS) or pass distance='great_circle'")
        ids = coords.index
        values = coords[["x", "y"]]
    else:
        values = coords
        ids = None
    try:
        xy = np.array(values, dtype=np.float64, copy=True)
    except (TypeError, ValueError) as exc:
        raise InputError(f"`{name}` must be numeric coordinates; could not convert ({exc})") \
            from None
    if xy.ndim != 2 or xy.shape[1] != 2:
        raise InputError(f"`{name}` must have shape (n_sites, 2); got {xy.shape}")
    n = xy.shape[0]
    ids = pd.RangeIndex(n, name="site") if ids is None else ids
    if n < 2:
        raise InputError(f"`{name}` needs at least 2 sites; got {n}")
    bad = ~np.isfinite(xy).all(axis=1)
    if bad.any():
        raise InputError(f"`{name}` has a missing or infinite coordinate at site "
                         f"{ids[np.flatnonzero(bad)[0]]!r}; remove or fix it")
    order = np.lexsort((xy[:, 1], xy[:, 0]))
    same = (np.diff(xy[order], axis=0) == 0).all(axis=1)
    if same.any():
        a, b = order[np.flatnonzero(same)[0]], order[np.flatnonzero(same)[0] + 1]
        raise InputError(f"`{name}`: sites {ids[a]!r} and {ids[b]!r} share coordinates "
                         f"{tuple(xy[a])}; neighbour graphs need distinct sites; merge them "
                         "(e.g. read_survey(shared_coordinates='merge')) or correct one")
    if crs is not None and getattr(crs, "is_geographic", False):
        raise InputError(f"`{name}` is a survey in a geographic CRS ({crs}); distances need a "
                         "projected working CRS; re-read it with a projected CRS")
    degrees_like = bool((np.abs(xy[:, 0]) <= 180).all() and (np.abs(xy[:, 1]) <= 90).all())
    if distance == "auto":
        distance = "euclidean"
        if not is_survey and degrees_like and not np.all(xy == np.round(xy)):
            warnings.warn(f"`{name}`: all coordinates fall within longitude/latitude ranges; "
                          "they are treated as planar map units. If they are degrees, pass "
                          "distance='great_circle' or project them; pass "
                          "distance='euclidean' to silence this", GeographicCoordinatesWarning,
                          stacklevel=3)
    if distance == "great_circle":
        if not degrees_like:
            raise InputError(f"`{name}`: distance='great_circle' needs longitude/latitude in "
                             f"degrees (|x| <= 180, |y| <= 90); got x range "
                             f"[{xy[:, 0].min():g}, {xy[:, 0].max():g}], y range "
                             f"[{xy[:, 1].min():g}, {xy[:, 1].max():g}]")
        lon, lat = np.radians(xy[:, 0]), np.radians(xy[:, 1])
        points = EARTH_RADIUS_M * np.column_stack(
            [np.cos(lat) * np.cos(lon), np.cos(lat) * np.sin(lon), np.sin(lat)])
    else:
        points = xy
    plane = plane_coordinates(points) if distance == "great_circle" else xy
    centred = plane - plane.mean(axis=0)
    sv = np.linalg.svd(centred, compute_uv=False)
    collinear = bool(n == 2 or sv[1] <= 1e-10 * sv[0])
    return Layout(xy, ids, points, distance, geometry, collinear)


def plane_coordinates(points: np.ndarray) -> np.ndarray:
    """Stereographic projection of sphere points from the antipode of their mean direction.

    Circles on the sphere map to circles in the plane, so the planar Delaunay triangulation of
    the projected points is the spherical Delaunay triangulation.
    """
    unit = points / np.linalg.norm(points, axis=1, keepdims=True)
    c = unit.mean(axis=0)
    if np.linalg.norm(c) < 0.5:
        raise InputError("distance='great_circle': the sites spread over more than a "
                         "hemisphere; split the survey into regional projected parts")
    c /= np.linalg.norm(c)
    e1 = np.cross(c, [0.0, 0.0, 1.0] if abs(c[2]) < 0.9 else [1.0, 0.0, 0.0])
    e1 /= np.linalg.norm(e1)
    e2 = np.cross(c, e1)
    h = unit @ c
    return np.column_stack([unit @ e1, unit @ e2]) / (1.0 + h)[:, None]


def pair_lengths(layout: Layout, i: np.ndarray, j: np.ndarray) -> np.ndarray:
    """Distances between sites i and j in map units (same arithmetic everywhere)."""
    chord = np.sqrt(((layout.points[i] - layout.points[j]) ** 2).sum(axis=1))
    return chord_to_distance(chord, layout.metric)


def chord_to_distance(chord: np.ndarray, metric: str) -> np.ndarray:
    if metric == "great_circle":
        return 2.0 * EARTH_RADIUS_M * np.arcsin(np.minimum(chord / (2 * EARTH_RADIUS_M), 1.0))
    return chord


def distance_to_chord(d: float, metric: str) -> float:
    if metric == "great_circle":
        return float(2.0 * EARTH_RADIUS_M * np.sin(min(d / (2 * EARTH_RADIUS_M), np.pi / 2)))
    return float(d)


def delaunay_edges(layout: Layout) -> tuple[np.ndarray, np.ndarray]:
    """Unique Delaunay edges (i < j); consecutive sites along the line for a transect."""
    if layout.collinear:
        axis = layout.xy - layout.xy.mean(axis=0)
        direction = np.linalg.svd(axis, full_matrices=False)[2][0]
        order = np.argsort(axis @ direction, kind="stable")
        i, j = order[:-1], order[1:]
    else:
        plane = plane_coordinates(layout.points) if layout.metric == "great_circle" \
            else layout.xy
        simplices = Delaunay(plane).simplices
        e = np.concatenate([simplices[:, [0, 1]], simplices[:, [1, 2]], simplices[:, [0, 2]]])
        e.sort(axis=1)
        e = np.unique(e, axis=0)
        i, j = e[:, 0], e[:, 1]
    lo, hi = np.minimum(i, j), np.maximum(i, j)
    return lo, hi


def symmetric_matrix(n: int, i: np.ndarray, j: np.ndarray, d: np.ndarray) -> sparse.csr_matrix:
    rows = np.concatenate([i, j])
    cols = np.concatenate([j, i])
    m = sparse.coo_matrix((np.concatenate([d, d]), (rows, cols)), shape=(n, n)).tocsr()
    m.sum_duplicates()
    return m


def mst_edges(layout: Layout) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    i, j = delaunay_edges(layout)
    d = pair_lengths(layout, i, j)
    tree = csgraph.minimum_spanning_tree(
        sparse.coo_matrix((d, (i, j)), shape=(layout.n, layout.n)).tocsr()).tocoo()
    a, b = np.minimum(tree.row, tree.col), np.maximum(tree.row, tree.col)
    return a, b, pair_lengths(layout, a, b)


def mst_threshold(coords: Any, *, distance: str = "auto") -> float:
    """Longest edge of the Euclidean minimum spanning tree: the smallest connecting distance.

    Computed exactly from the Delaunay edges (the MST is a subgraph of the Delaunay
    triangulation) with :func:`scipy.sparse.csgraph.minimum_spanning_tree`, in O(n log n).

    Examples
    --------
    >>> mst_threshold([[0, 0], [1, 0], [3, 0]])
    2.0
    """
    layout = coords if isinstance(coords, Layout) else check_coordinates(coords, distance=distance)
    return float(mst_edges(layout)[2].max())


def band_pairs(layout: Layout, threshold: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """All pairs with 0 < d ≤ threshold (cKDTree.query_pairs, vectorised)."""
    chord = distance_to_chord(threshold, layout.metric) * (1 + REL_TOL)
    pairs = cKDTree(layout.points).query_pairs(chord, output_type="ndarray")
    i, j = pairs[:, 0].astype(np.int64), pairs[:, 1].astype(np.int64)
    d = pair_lengths(layout, i, j)
    keep = d <= threshold
    return i[keep], j[keep], d[keep]


def layout_points(layout: Layout, new_xy: np.ndarray) -> np.ndarray:
    if layout.metric == "great_circle":
        lon, lat = np.radians(new_xy[:, 0]), np.radians(new_xy[:, 1])
        return EARTH_RADIUS_M * np.column_stack(
            [np.cos(lat) * np.cos(lon), np.cos(lat) * np.sin(lon), np.sin(lat)])
    return new_xy
