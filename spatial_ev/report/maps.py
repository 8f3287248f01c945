"""Map figures: a value at each site (points or polygons), optionally over a gridded surface
or over a river network with values predicted along its channels.

Maps are drawn in the working (projected) coordinate system with equal aspect, axis labels
in map units, a scale bar with a round length ("2 km"), a grid-north arrow and a colour bar.
Fitted scores (which are centred) use a diverging colour scale centred on zero; LCBD and other
non-negative quantities use a sequential one. Functions take plain data and compute nothing
statistical; they return :class:`matplotlib.figure.Figure` objects (no pyplot state).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely
from matplotlib.cm import ScalarMappable
from matplotlib.colors import Normalize
from matplotlib.figure import Figure
from matplotlib.patches import Rectangle
from matplotlib.patheffects import withStroke
from matplotlib.ticker import FuncFormatter

from spatial_ev._validation import check_option
from spatial_ev.errors import CRSError, InputError
from spatial_ev.input.crs import is_local_metric_crs
from spatial_ev.report import _style as st
from spatial_ev.report.figures import unit_symbol
from spatial_ev.report.surface import smooth_surface, surface_opacity, surface_reach

__all__ = ["site_map_figure", "nice_scale_bar"]

_PALETTES = ("diverging", "sequential")


def nice_scale_bar(width: float, *, unit: str = "m", fraction: float = 0.2) -> tuple[float,
                                                                                      str]:
    """Choose a round scale-bar length near ``fraction`` × map width and its label.

    The length is the largest of 1, 2 or 5 × 10^k map units not exceeding ``fraction`` ×
    ``width``. Metres of 1000 or more are labelled in kilometres.

    Parameters
    ----------
    width : width of the mapped area in map units (> 0).
    unit : unit symbol (``"m"``, ``"km"``, ``"ft"``, ``"map units"`` ...).
    fraction : target share of the width.

    Returns
    -------
    (length in map units, label)

    Examples
    --------
    >>> nice_scale_bar(12_000.0, unit="m")
    (2000.0, '2 km')
    >>> nice_scale_bar(430.0, unit="m")
    (50.0, '50 m')
    """
    if not np.isfinite(width) or width <= 0:
        raise InputError(f"`width` must be a positive finite length in map units; got {width!r}")
    if not 0 < fraction <= 1:
        raise InputError(f"`fraction` must be in (0, 1]; got {fraction!r}")
    target = width * fraction
    exponent = np.floor(np.log10(target))
    candidates = [m * 10.0 ** e for e in (exponent - 1, exponent) for m in (1.0, 2.0, 5.0)]
    length = float(max(c for c in candidates if c <= target * (1 + 1e-12)))
    if unit == "m" and length >= 1000:
        label = f"{length / 1000:g} km"
    else:
        label = f"{length:g} {unit}"
    return length, label


def _check_sites(sites: Any, column: str) -> tuple[gpd.GeoDataFrame, np.ndarray]:
    if not isinstance(sites, gpd.GeoDataFrame):
        raise InputError(f"`sites` must be a GeoDataFrame of points or polygons; got "
                         f"{type(sites).__name__}")
    if len(sites) == 0:
        raise InputError("`sites` has no rows; nothing to map")
    if not isinstance(column, str) or column not in sites.columns:
        raise InputError(f"`column` must name a column of `sites`; got {column!r}, columns are "
                         f"{[c for c in sites.columns if c != sites.geometry.name]}")
    if sites.crs is not None and sites.crs.is_geographic:
        raise CRSError(f"`sites` are in a geographic CRS ({sites.crs.name}); the scale bar and "
                       "north arrow need a projected CRS in metres: reproject with "
                       "sites.to_crs(<projected EPSG>) first")
    kinds = set(sites.geometry.geom_type.dropna())
    if not kinds <= {"Point", "Polygon", "MultiPolygon"} or not kinds:
        raise InputError(f"`sites` geometries must be points or polygons; got {sorted(kinds)}")
    try:
        values = np.asarray(sites[column], dtype=np.float64)
    except (TypeError, ValueError):
        raise InputError(f"`sites[{column!r}]` must be numeric") from None
    if not np.isfinite(values).all():
        bad = sites.index[~np.isfinite(values)][0]
        raise InputError(f"`sites[{column!r}]` has a missing value at site {bad!r}; drop or "
                         "fill it before mapping")
    return sites, values


def _check_surface(surface: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    if surface is None:
        return None
    if not isinstance(surface, Mapping) or not {"x", "y", "values"} <= set(surface):
        raise InputError("`surface` must be a mapping with keys 'x' (cell centres, ascending), "
                         "'y' (ascending) and 'values' (len(y) × len(x), NaN outside the hull)")
    x = np.asarray(surface["x"], dtype=np.float64)
    y = np.asarray(surface["y"], dtype=np.float64)
    z = np.asarray(surface["values"], dtype=np.float64)
    if x.ndim != 1 or y.ndim != 1 or len(x) < 2 or len(y) < 2:
        raise InputError(f"`surface['x']` and `surface['y']` must be 1-D with ≥ 2 cell centres; "
                         f"got shapes {x.shape} and {y.shape}")
    if np.any(np.diff(x) <= 0) or np.any(np.diff(y) <= 0):
        raise InputError("`surface['x']` and `surface['y']` must be strictly increasing")
    if z.shape != (len(y), len(x)):
        raise InputError(f"`surface['values']` must have shape (len(y), len(x)) = "
                         f"{(len(y), len(x))}; got {z.shape}")
    if not np.isfinite(z).any():
        raise InputError("`surface['values']` has no finite value")
    return x, y, z


def _check_network(network: Any) -> gpd.GeoDataFrame | None:
    if network is None:
        return None
    if not isinstance(network, gpd.GeoDataFrame) or len(network) == 0:
        raise InputError(f"`network` must be a non-empty GeoDataFrame of lines (a river "
                         f"network's edges); got {type(network).__name__}")
    kinds = set(network.geometry.geom_type.dropna())
    if not kinds <= {"LineString", "MultiLineString"}:
        raise InputError(f"`network` geometries must be lines; got {sorted(kinds)}")
    return network


def _check_along(along: Any, column: str | None
                 ) -> tuple[np.ndarray, np.ndarray] | tuple[None, None]:
    if along is None:
        return None, None
    if not isinstance(along, gpd.GeoDataFrame) or len(along) == 0:
        raise InputError(f"`along` must be a non-empty GeoDataFrame of points; got "
                         f"{type(along).__name__}")
    if not isinstance(column, str) or column not in along.columns:
        raise InputError(f"`along_column` must name a numeric column of `along`; got "
                         f"{column!r}")
    values = np.asarray(along[column], dtype=np.float64)
    if not np.isfinite(values).all():
        raise InputError(f"`along[{column!r}]` has missing values; predictions along the "
                         f"network must be finite")
    xy = np.column_stack([along.geometry.x.to_numpy(), along.geometry.y.to_numpy()])
    return xy, values


def _clip_to_hull(grid: tuple[np.ndarray, np.ndarray, np.ndarray], sites: gpd.GeoDataFrame
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    x, y, z = grid
    hull = sites.geometry.union_all().convex_hull
    mx, my = np.meshgrid(x, y)
    inside = shapely.intersects_xy(hull, mx, my)
    if not inside.any():
        raise InputError("`surface` has no cell inside the convex hull of the sites; check that "
                         "it uses the same coordinates as `sites`")
    return x, y, np.where(inside, z, np.nan)


def _surface_image(grid: tuple[np.ndarray, np.ndarray, np.ndarray], sites: gpd.GeoDataFrame,
                   *, clip: str, wavelength: float | None, cmap: Any, norm: Normalize
                   ) -> tuple[np.ndarray, tuple[float, float, float, float]]:
    """RGBA image of the surface on a finer grid, with its opacity, and its extent.

    Drawing only: the values are resampled bilinearly; opacity 0 outside the hull (buffered by
    one cell so sites on its edge stay on colour), outside the given cells, and — with a
    ``wavelength`` — beyond each point's reach from the sites (:mod:`.surface`).
    """
    x, y, z = grid
    factor = int(np.clip(np.ceil(320 / max(len(x), len(y))), 1, 8))
    fx, fy, fz = smooth_surface(x, y, z, factor=factor)
    FX, FY = np.meshgrid(fx, fy)
    step = max((x[-1] - x[0]) / (len(x) - 1), (y[-1] - y[0]) / (len(y) - 1))
    # a fine point is shown only if its nearest given cell has a value
    ix = np.clip(np.searchsorted(x, fx - (x[1] - x[0]) / 2), 0, len(x) - 1)
    iy = np.clip(np.searchsorted(y, fy - (y[1] - y[0]) / 2), 0, len(y) - 1)
    opacity = np.isfinite(z[np.ix_(iy, ix)]).astype(float)
    if clip == "hull":
        hull = sites.geometry.union_all().convex_hull.buffer(step)
        opacity = opacity * shapely.intersects_xy(hull, FX, FY)
    if wavelength is not None:
        centres = sites.geometry.representative_point()
        site_xy = np.column_stack([centres.x.to_numpy(), centres.y.to_numpy()])
        dist, reach = surface_reach(site_xy, np.column_stack([FX.ravel(), FY.ravel()]),
                                    wavelength, k=8)
        opacity = opacity * surface_opacity(dist, reach).reshape(FX.shape)
    rgba = cmap(norm(fz))
    rgba[..., 3] = 0.85 * opacity
    dx, dy = fx[1] - fx[0], fy[1] - fy[0]
    return rgba, (fx[0] - dx / 2, fx[-1] + dx / 2, fy[0] - dy / 2, fy[-1] + dy / 2)


def _check_highlight(sites: gpd.GeoDataFrame, highlight: Any) -> np.ndarray | None:
    if highlight is None:
        return None
    if not isinstance(highlight, str) or highlight not in sites.columns:
        raise InputError(f"`highlight` must name a boolean column of `sites`; got {highlight!r}")
    col = sites[highlight]
    if not pd.api.types.is_bool_dtype(col):
        raise InputError(f"`sites[{highlight!r}]` must be boolean (True = highlight); got dtype "
                         f"{col.dtype}")
    return col.to_numpy(dtype=bool)


def _draw_scale_bar(ax: Any, xlim: tuple[float, float], ylim: tuple[float, float],
                    unit: str) -> None:
    width, height = xlim[1] - xlim[0], ylim[1] - ylim[0]
    length, label = nice_scale_bar(width, unit=unit)
    x0, y0, h = xlim[0] + 0.04 * width, ylim[0] + 0.045 * height, 0.012 * height
    halo = [withStroke(linewidth=3, foreground="white")]
    for k, colour in enumerate((st.INK, "white", st.INK, "white")):
        ax.add_patch(Rectangle((x0 + k * length / 4, y0), length / 4, h, facecolor=colour,
                               edgecolor=st.INK, linewidth=0.7, zorder=10, gid="scale-bar"))
    ax.text(x0 + length / 2, y0 + 1.9 * h, label, ha="center", va="bottom", fontsize=8,
            zorder=10, gid="scale-bar-label", path_effects=halo)


def _draw_north_arrow(ax: Any) -> None:
    halo = [withStroke(linewidth=3, foreground="white")]
    ax.annotate("", xy=(0.955, 0.93), xytext=(0.955, 0.82), xycoords="axes fraction",
                arrowprops=dict(arrowstyle="-|>,head_width=0.35,head_length=0.7",
                                color=st.INK, lw=1.6), zorder=10, gid="north-arrow")
    ax.text(0.955, 0.935, "N", transform=ax.transAxes, ha="center", va="bottom",
            fontsize=9, fontweight="bold", zorder=10, path_effects=halo)


@st.styled
def site_map_figure(sites: gpd.GeoDataFrame, *, column: str, palette: str = "diverging",
                    surface: Mapping[str, Any] | None = None, unit: str = "m",
                    title: str | None = None, value_label: str | None = None,
                    north_arrow: str = "grid", highlight: str | None = None,
                    highlight_label: str = "highlighted", clip: str = "hull",
                    network: gpd.GeoDataFrame | None = None,
                    along: gpd.GeoDataFrame | None = None,
                    along_column: str | None = None, wavelength: float | None = None,
                    class_colour: str | None = None, weak_highlight: str | None = None,
                    weak_label: str = "weak") -> Figure:
    """Map one value per site, optionally over a gridded prediction surface.

    Points are drawn as dots, polygons filled; both take the value's colour. With
    ``palette="diverging"`` the colour scale is symmetric about zero (for fitted scores and
    other centred quantities: colour shows sign and size); with ``"sequential"`` it runs from
    the smallest to the largest value (for LCBD and other non-negative quantities). A surface
    (values on a regular grid, NaN outside the survey hull) is drawn underneath with the same
    colour scale; it is an interpolation between sites and says nothing beyond the hull.

    The north arrow assumes a projected CRS whose y axis points north ("grid north"). Grid
    north differs from true north by the meridian convergence, which grows away from the
    projection's central meridian (a few degrees at the edge of a UTM zone); for local planar
    coordinates of arbitrary orientation pass ``north_arrow="none"``. Geographic (degree)
    coordinates are refused: scale bars are meaningless there.

    Parameters
    ----------
    sites : GeoDataFrame of points or polygons in a projected CRS (or without CRS: local
        planar coordinates).
    column : name of the numeric column to map.
    palette : ``"diverging"`` or ``"sequential"``.
    surface : mapping with ``"x"`` (cell-centre x, ascending, length nx), ``"y"`` (ascending,
        ny) and ``"values"`` (ny × nx), or None.
    unit : distance unit symbol for axis labels and the scale bar (see ``unit_symbol``).
    title : figure title (default: the column name).
    value_label : colour-bar label (default: the column name).
    north_arrow : ``"grid"`` (draw a grid-north arrow) or ``"none"``.
    highlight : name of a boolean column; its True sites get a heavy dark ring (e.g. sites
        whose LCBD is significant) and a legend entry ``highlight_label`` (listed also when
        no site is marked, so the legend can say "0 sites").
    highlight_label : legend text for highlighted sites.
    clip : ``"hull"`` hides surface cells outside the convex hull of the sites (an
        interpolation says nothing beyond the surveyed area); ``"none"`` draws the surface as
        given (NaN cells are always hidden).
    wavelength : finest equivalent wavelength (map units) of the structure the surface shows;
        the surface then fades out with distance from the sites and is transparent where no
        site has it within its reach, ``max(2 × local spacing, wavelength / 4)``: opaque
        within half of it, transparent beyond it (:mod:`spatial_ev.report.surface`). None:
        no fading.
    class_colour : colour of the scale class mapped (drawn as the map's frame), or None.
    weak_highlight : name of a boolean column; its True sites get a thin open ring and the
        legend entry ``weak_label`` (e.g. sites significant before a multiple-test
        correction but not after it); drawn apart from ``highlight``.
    weak_label : legend text for ``weak_highlight`` sites.
    network : GeoDataFrame of lines (a river network's edges), drawn in grey under
        everything else, or None.
    along : GeoDataFrame of points along ``network`` carrying a value (predictions along the
        channels), drawn as a coloured band over the lines with the sites' colour scale;
        needs ``along_column``. Used instead of a ``surface`` for network bases.
    along_column : name of the numeric column of ``along``.

    Returns
    -------
    Figure with the map axes first and the colour bar second; the surface is an image with
    ``gid="surface"`` (RGBA, its alpha channel the opacity); the scale bar patches carry
    ``gid="scale-bar"`` and its label ``gid="scale-bar-label"``; the network lines
    ``gid="network"`` and the values along it ``gid="along-network"``.

    Examples
    --------
    >>> import geopandas as gpd, numpy as np
    >>> pts = gpd.GeoDataFrame({"score": [-1.0, 0.5, 2.0]},
    ...                        geometry=gpd.points_from_xy([0, 4000, 9000], [0, 3000, 500]),
    ...                        crs=32633)
    >>> fig = site_map_figure(pts, column="score")
    >>> [t.get_text() for t in fig.axes[0].texts if t.get_gid() == "scale-bar-label"]
    ['2 km']
    """
    sites, values = _check_sites(sites, column)
    grid = _check_surface(surface)
    lines = _check_network(network)
    along_xy, along_values = _check_along(along, along_column)
    if grid is not None and along_xy is not None:
        raise InputError("give `surface` (an open grid) or `along` (values along a network), "
                         "not both")
    marked = _check_highlight(sites, highlight)
    weak = _check_highlight(sites, weak_highlight)
    if wavelength is not None and (not np.isfinite(wavelength) or wavelength <= 0):
        raise InputError(f"`wavelength` must be a positive length in map units or None; got "
                         f"{wavelength!r}")
    check_option("palette", palette, _PALETTES)
    check_option("north_arrow", north_arrow, ("grid", "none"))
    check_option("clip", clip, ("hull", "none"))
    given = grid
    if grid is not None and clip == "hull":
        grid = _clip_to_hull(grid, sites)
    unit = unit_symbol(unit) if unit not in ("m", "km", "ft", "map units") else unit

    all_values = values if grid is None else np.concatenate([values,
                                                             grid[2][np.isfinite(grid[2])]])
    if along_values is not None:
        all_values = np.concatenate([all_values, along_values])
    if palette == "diverging":
        vmax = float(np.max(np.abs(all_values))) or 1.0
        norm, cmap = Normalize(-vmax, vmax), st.DIVERGING
    else:
        lo, hi = float(all_values.min()), float(all_values.max())
        norm, cmap = Normalize(lo, hi if hi > lo else lo + 1.0), st.SEQUENTIAL

    fig = Figure(figsize=(6.8, 5.6), layout="constrained")
    ax = fig.add_subplot()
    xmin, ymin, xmax, ymax = sites.total_bounds
    if lines is not None:
        lx0, ly0, lx1, ly1 = lines.total_bounds
        xmin, ymin, xmax, ymax = min(xmin, lx0), min(ymin, ly0), max(xmax, lx1), max(ymax, ly1)
        from matplotlib.collections import LineCollection

        parts = [np.asarray(g.coords)[:, :2] for g in lines.geometry.explode(index_parts=False)
                 if g is not None and not g.is_empty]
        wide = 5.5 if along_xy is not None else 2.2
        ax.add_collection(LineCollection(parts, colors=st.UNEXPLAINED, linewidths=wide,
                                         capstyle="round", joinstyle="round", zorder=1,
                                         gid="network"))
        ax.add_collection(LineCollection(parts, colors=st.MUTED, linewidths=0.7, zorder=1.1,
                                         gid="network"))
        if {"upstream_node", "downstream_node"} <= set(lines.columns):
            # outlets: downstream ends that no edge leaves
            ends = ~lines["downstream_node"].isin(lines["upstream_node"]).to_numpy()
            tips = np.array([np.asarray(g.coords)[-1, :2] for g in lines.geometry[ends]])
            if len(tips):
                ax.scatter(tips[:, 0], tips[:, 1], marker="v", s=70, facecolor=st.INK,
                           edgecolor="white", linewidth=0.8, zorder=5, gid="outlet",
                           label="outlet (flow ends)")
                ax.legend(loc="upper left", fontsize=7.5, framealpha=0.85, frameon=True)
    if along_xy is not None:
        order = np.argsort(np.abs(along_values), kind="stable")  # strongest values on top
        ax.scatter(along_xy[order, 0], along_xy[order, 1], c=along_values[order], cmap=cmap,
                   norm=norm, s=16.0, marker="o", linewidth=0, zorder=2, gid="along-network",
                   rasterized=True)
    if grid is not None:
        gx, gy, gz = grid
        rgba, extent = _surface_image(given, sites, clip=clip,  # type: ignore[arg-type]
                                      wavelength=wavelength, cmap=cmap, norm=norm)
        ax.imshow(rgba, extent=extent, origin="lower", interpolation="bilinear", zorder=1,
                  gid="surface", rasterized=True, aspect="equal")
        xmin, xmax = min(xmin, gx[0]), max(xmax, gx[-1])
        ymin, ymax = min(ymin, gy[0]), max(ymax, gy[-1])
    if set(sites.geometry.geom_type) == {"Point"}:
        # many sites: smaller dots without outlines (outlines would hide the colours), and
        # rasterised in vector output so an SVG of 100,000 sites stays light
        size = float(np.clip(4000.0 / len(sites), 2.0, 60.0 if along_xy is None else 26.0))
        ax.scatter(sites.geometry.x, sites.geometry.y, c=values, cmap=cmap, norm=norm, s=size,
                   edgecolor=st.INK, linewidth=0.35 if len(sites) <= 2000 else 0.0, zorder=3,
                   gid="sites", rasterized=len(sites) > 5000)
    else:
        frame = gpd.GeoDataFrame({"_value": values}, geometry=sites.geometry.to_numpy(),
                                 crs=sites.crs)
        frame.plot(ax=ax, column="_value", cmap=cmap, norm=norm, edgecolor="white",
                   linewidth=0.3, zorder=3)
    if marked is not None:  # drawn (and listed in the legend) even when no site is marked
        centres = sites.geometry[marked].representative_point()
        ax.scatter(centres.x, centres.y, s=90, facecolor="none", edgecolor=st.INK,
                   linewidth=1.6, zorder=4, gid="highlight", label=highlight_label)
    if weak is not None and weak.any():
        centres = sites.geometry[weak].representative_point()
        ax.scatter(centres.x, centres.y, s=70, facecolor="none", edgecolor=st.INK,
                   linewidth=0.7, linestyle=(0, (2, 1.5)), zorder=4, gid="weak-highlight",
                   label=weak_label)
    if marked is not None or (weak is not None and weak.any()):
        ax.legend(loc="upper left", fontsize=7.5, framealpha=0.85, frameon=True)
    width, height = max(xmax - xmin, 1e-9), max(ymax - ymin, 1e-9)
    side = max(width, height)
    pad = 0.06 * side
    xlim = (xmin - pad, xmax + pad)
    bottom = ymin - 2.2 * pad  # room for the scale bar
    # room for the north arrow above the data: the arrow spans the top ~18 % of the axes
    top = ymax + (max(1.6 * pad, 0.25 * (ymax - bottom)) if north_arrow == "grid"
                  else 1.6 * pad)
    ylim = (bottom, top)
    ax.set_xlim(*xlim)
    ax.set_ylim(*ylim)
    ax.set_aspect("equal")
    _draw_scale_bar(ax, xlim, ylim, unit)
    if north_arrow == "grid":
        _draw_north_arrow(ax)
    if is_local_metric_crs(sites.crs):  # degrees projected around the survey centre
        ax.set_xlabel(f"east of survey centre ({unit}, local azimuthal equidistant)")
        ax.set_ylabel(f"north of survey centre ({unit}, local azimuthal equidistant)")
    else:
        label = "x" if sites.crs is None else "easting"
        ax.set_xlabel(f"{label} ({unit})")
        ax.set_ylabel(f"{'y' if sites.crs is None else 'northing'} ({unit})")
    thousands = FuncFormatter(lambda v, _: f"{v:,.0f}" if abs(v) >= 100 else f"{v:g}")
    ax.xaxis.set_major_formatter(thousands)
    ax.yaxis.set_major_formatter(thousands)
    ax.tick_params(axis="x", labelrotation=0)
    for side_name in ("top", "right"):
        ax.spines[side_name].set_visible(True)
    if class_colour is not None:
        for spine in ax.spines.values():
            spine.set_edgecolor(class_colour)
            spine.set_linewidth(2.2)
    fig.colorbar(ScalarMappable(norm=norm, cmap=cmap), ax=ax, shrink=0.75, pad=0.02,
                 label=value_label or column)
    ax.set_title(title or column)
    return fig
