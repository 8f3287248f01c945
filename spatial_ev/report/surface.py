"""How much of a predicted surface a map may show: fading with distance from the sites.

A surface predicted from spatial vectors has a value everywhere inside the survey's hull, but
between distant sites that value is an extrapolation of the vectors' shape, not something the
data constrain: a fine-scale class paints confident colour in a gap wider than its own
wavelength. :func:`surface_opacity` ties what is shown to the data: each site has a *reach*

    reach = max(2 × local spacing, wavelength / 4)

with *local spacing* the distance from the site to its own nearest neighbour (so a dense
cluster and a sparse transect each get their own reach) and *wavelength* the finest
equivalent wavelength of the class mapped (half of it is roughly the size of a patch; a
structure says little about points more than a quarter wavelength from any site). A point is
drawn fully within half the reach of some site, fades smoothly to transparent at the reach,
and is hidden when it lies beyond the reach of every site (in particular beyond the reach of
its nearest site). Taking the best of the nearby sites, not only the nearest, keeps the fade
free of steps where a sparse transect meets a dense grid.
:func:`smooth_surface` resamples a coarse grid onto a finer one by bilinear interpolation for
drawing only; the grid's own values are never changed.
"""

from __future__ import annotations

import numpy as np
from scipy.interpolate import RegularGridInterpolator
from scipy.ndimage import distance_transform_edt
from scipy.spatial import cKDTree

from spatial_ev.errors import InputError

__all__ = ["surface_reach", "surface_opacity", "smooth_surface"]


def _check_xy(name: str, xy: object) -> np.ndarray:
    arr = np.asarray(xy, dtype=np.float64)
    if arr.ndim != 2 or arr.shape[1] != 2 or len(arr) == 0:
        raise InputError(f"`{name}` must be an (n, 2) array of x, y map coordinates with n ≥ 1; "
                         f"got shape {arr.shape}")
    if not np.isfinite(arr).all():
        raise InputError(f"`{name}` has a missing or infinite coordinate; drop that row first")
    return arr


def surface_reach(sites_xy: np.ndarray, points_xy: np.ndarray, wavelength: float, *,
                  k: int = 1) -> tuple[np.ndarray, np.ndarray]:
    """Distance from each point to its ``k`` nearest sites, and how far those sites' data reach.

    Parameters
    ----------
    sites_xy : (n, 2) site coordinates in map units (n ≥ 1).
    points_xy : (m, 2) coordinates of the points to judge (e.g. grid cells).
    wavelength : finest equivalent wavelength of the structure mapped, map units (> 0).
    k : number of nearest sites (≥ 1; at most n are used).

    Returns
    -------
    (distance, reach) : two (m, min(k, n)) arrays, nearest site first; ``reach = max(2 ×
    local spacing, wavelength / 4)`` where a site's local spacing is its distance to its own
    nearest neighbour (0 for a single site).

    Examples
    --------
    >>> import numpy as np
    >>> d, r = surface_reach(np.array([[0.0, 0.0], [10.0, 0.0]]), np.array([[0.0, 3.0]]), 100.0)
    >>> float(d[0, 0]), float(r[0, 0])
    (3.0, 25.0)
    """
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 1:
        raise InputError(f"`k` must be an integer ≥ 1; got {k!r}")
    sites = _check_xy("sites_xy", sites_xy)
    points = _check_xy("points_xy", points_xy)
    if not np.isfinite(wavelength) or wavelength <= 0:
        raise InputError(f"`wavelength` must be a positive length in map units; got "
                         f"{wavelength!r}")
    tree = cKDTree(sites)
    if len(sites) > 1:
        spacing = tree.query(sites, k=2)[0][:, 1]
    else:
        spacing = np.zeros(1)
    k = min(int(k), len(sites))
    distance, nearest = tree.query(points, k=k)
    distance = np.asarray(distance, dtype=np.float64).reshape(len(points), k)
    nearest = np.asarray(nearest).reshape(len(points), k)
    reach = np.maximum(2.0 * spacing[nearest], wavelength / 4.0)
    return distance, reach


def surface_opacity(distance: np.ndarray, reach: np.ndarray) -> np.ndarray:
    """Opacity of surface points from their distances to sites and those sites' reaches.

    Per site: 1 up to half the reach, a smooth ramp (cubic smoothstep) down to 0 at the reach,
    0 beyond. For 2-D input (points × nearby sites, as :func:`surface_reach` returns) the best
    site counts: the row maximum.

    Examples
    --------
    >>> import numpy as np
    >>> surface_opacity(np.array([0.0, 5.0, 7.5, 10.0, 12.0]), np.full(5, 10.0)).tolist()
    [1.0, 1.0, 0.5, 0.0, 0.0]
    """
    d = np.asarray(distance, dtype=np.float64)
    r = np.asarray(reach, dtype=np.float64)
    if d.shape != r.shape:
        raise InputError(f"`distance` and `reach` must have the same shape; got {d.shape} and "
                         f"{r.shape}")
    if np.any(r <= 0) or not np.isfinite(r).all():
        raise InputError("`reach` must be positive and finite everywhere")
    t = np.clip((r - d) / (0.5 * r), 0.0, 1.0)  # 0 at the reach, 1 at half the reach
    opacity = t * t * (3.0 - 2.0 * t)
    return opacity.max(axis=1) if opacity.ndim == 2 else opacity


def smooth_surface(x: np.ndarray, y: np.ndarray, values: np.ndarray, *, factor: int = 4
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Resample a gridded surface ``factor`` times finer by bilinear interpolation (for drawing).

    Missing cells (NaN) take the value of the nearest valid cell before interpolating, so the
    fine grid has no holes along the edge; the caller masks what must not be shown. The fine
    grid covers the coarse cells' outer edges.

    Parameters
    ----------
    x, y : ascending cell centres (lengths nx, ny ≥ 2).
    values : (ny, nx) values, NaN where missing (at least one finite).
    factor : refinement per axis (≥ 1).

    Returns
    -------
    (fine_x, fine_y, fine_values)

    Examples
    --------
    >>> import numpy as np
    >>> fx, fy, fz = smooth_surface(np.array([0.0, 1.0]), np.array([0.0, 1.0]),
    ...                             np.array([[0.0, 1.0], [0.0, 1.0]]), factor=2)
    >>> fz.shape, float(fz.min()), float(fz.max())
    ((4, 4), 0.0, 1.0)
    """
    if isinstance(factor, bool) or not isinstance(factor, (int, np.integer)) or factor < 1:
        raise InputError(f"`factor` must be an integer ≥ 1; got {factor!r}")
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    z = np.asarray(values, dtype=np.float64)
    if z.shape != (len(y), len(x)) or len(x) < 2 or len(y) < 2:
        raise InputError(f"`values` must have shape (len(y), len(x)) with both ≥ 2; got "
                         f"{z.shape} for {len(y)} × {len(x)}")
    missing = ~np.isfinite(z)
    if missing.all():
        raise InputError("`values` has no finite cell")
    if missing.any():
        idx = distance_transform_edt(missing, return_distances=False, return_indices=True)
        z = z[tuple(idx)]
    dx, dy = (x[-1] - x[0]) / (len(x) - 1), (y[-1] - y[0]) / (len(y) - 1)
    fx = np.linspace(x[0] - dx / 2, x[-1] + dx / 2, len(x) * factor)
    fy = np.linspace(y[0] - dy / 2, y[-1] + dy / 2, len(y) * factor)
    inter = RegularGridInterpolator((y, x), z, method="linear", bounds_error=False,
                                    fill_value=None)
    FX, FY = np.meshgrid(fx, fy)
    fz = inter(np.column_stack([FY.ravel(), FX.ravel()])).reshape(FY.shape)
    # outside the outermost centres the linear extrapolation is clipped to the data's range
    return fx, fy, np.clip(fz, np.nanmin(z), np.nanmax(z))
