"""Candidate sampling layouts for a redesign: grids, transects, thinned and augmented pilots.

Every builder returns a :class:`CandidateLayout` (site coordinates in the pilot's working CRS,
map units, plus its cost: number of sites and, for transects, line length). The command line
describes layouts with a compact text syntax parsed by :func:`parse_layout_spec`::

    KIND:key=value;key=value

    grid:spacing=30                      square grid, 30 map units apart, inside the study area
    grid:spacing=30;angle=20             ... rotated 20° anticlockwise from the x axis
    grid:spacing=30;extent=x0,y0,x1,y1   ... limited to a rectangle (then clipped to the area)
    transect:start=x,y;bearing=45;spacing=10;length=500
                                         points every 10 units along a line of length 500
                                         starting at (x, y), bearing in degrees clockwise from
                                         north (grid north of the working CRS)
    thin:every=2                         every 2nd pilot site (pilot site order)
    thin:fraction=0.5;seed=7             a random half of the pilot sites
    augment:add=40                       the pilot plus 40 sites placed in the largest gaps
    file:points.csv                      a user file of candidate points (CSV or GIS file,
                                         read like a survey's site table)

Any spec may add ``name=LABEL`` to name the layout in tables and maps. Values are numbers;
``start``/``extent`` take comma-separated numbers.

The study area (a polygon in the working CRS) bounds grids and augmentation; without one, the
pilot's convex hull is used, so that simulated layouts stay where the pilot says something
about the community (outside it, any prediction is an extrapolation).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import shapely
from scipy.spatial import cKDTree

from spatial_ev._validation import check_int, check_real, check_rng
from spatial_ev.errors import DesignError, GeographicCoordinatesWarning, InputError

__all__ = ["CandidateLayout", "LayoutSpec", "parse_layout_spec", "build_layout", "grid_layout",
           "transect_layout", "thinned_layout", "augmented_layout", "file_layout",
           "LAYOUT_KINDS"]

LAYOUT_KINDS = ("grid", "transect", "thin", "augment", "file")
_KEYS = {"grid": {"spacing", "angle", "extent", "name"},
         "transect": {"start", "bearing", "spacing", "length", "name"},
         "thin": {"every", "fraction", "seed", "name"},
         "augment": {"add", "name"},
         "file": {"name"}}
_CANDIDATES = 20_000  # lattice points offered to the gap-filling insertion


@dataclass(frozen=True)
class CandidateLayout:
    """A candidate sampling layout.

    Attributes
    ----------
    name : str
        Label used in tables, figures and map layers (the spec text unless ``name=`` given).
    kind : str
        One of :data:`LAYOUT_KINDS`.
    coords : DataFrame, shape (n_sites, 2)
        Columns ``x``, ``y`` in the working CRS (map units); index = site ids (pilot ids for
        thinned/augmented pilots, ``L0001``… for new sites).
    line_length : float or None
        Length of transect line walked between the first and last site (map units); None for
        other kinds.
    parameters : dict
        The builder's parameters.
    note : str
        How the layout was built (e.g. how many grid nodes fell outside the area).
    """

    name: str
    kind: str
    coords: pd.DataFrame = field(repr=False)
    line_length: float | None
    parameters: dict
    note: str = ""

    @property
    def n_sites(self) -> int:
        """Number of sites (the main cost)."""
        return len(self.coords)

    def to_frame(self) -> pd.DataFrame:
        """Copy of the coordinates table."""
        return self.coords.copy()


@dataclass(frozen=True)
class LayoutSpec:
    """A parsed layout spec: ``kind``, ``values`` (key → float, tuple or str), ``text``."""

    kind: str
    values: dict
    text: str


def _new_ids(n: int) -> pd.Index:
    return pd.Index([f"L{i + 1:04d}" for i in range(n)], name="site")


def _frame(xy: np.ndarray, ids: pd.Index | None = None) -> pd.DataFrame:
    xy = np.asarray(xy, dtype=float).reshape(-1, 2)
    return pd.DataFrame(xy, columns=["x", "y"], index=_new_ids(len(xy)) if ids is None else ids)


def _check_area(area: Any) -> Any:
    if area is None:
        return None
    if not isinstance(area, shapely.Geometry) or area.geom_type not in ("Polygon",
                                                                         "MultiPolygon"):
        raise InputError(f"`area` must be a shapely Polygon or MultiPolygon in the working "
                         f"CRS; got {type(area).__name__}")
    if area.is_empty or area.area <= 0:
        raise InputError("`area` is an empty polygon; give the study area's outline")
    return area


def _region(pilot_xy: np.ndarray | None, area: Any) -> Any:
    area = _check_area(area)
    if area is not None:
        return area
    if pilot_xy is None:
        raise InputError("a study area is needed: give `area` (polygon) or the pilot coordinates")
    hull = shapely.convex_hull(shapely.multipoints(pilot_xy))
    if hull.area <= 0:
        raise DesignError("the pilot sites lie on a line, so their convex hull has no area; "
                          "give a study-area polygon to place a grid or added sites")
    return hull


# ------------------------------------------------------------------------------- builders

def grid_layout(*, spacing: float, pilot_coords: Any = None, area: Any = None,
                angle: float = 0.0, extent: tuple[float, float, float, float] | None = None,
                name: str | None = None) -> CandidateLayout:
    """A square grid of sites, optionally rotated, clipped to the study area.

    Parameters
    ----------
    spacing : float, keyword-only
        Distance between neighbouring grid nodes (map units).
    pilot_coords : (n, 2) array or DataFrame[x, y], optional
        The pilot sites; their convex hull is the area when ``area`` is None.
    area : shapely Polygon, optional
        Study area in the working CRS; nodes outside it are dropped.
    angle : float
        Rotation of the grid rows, degrees anticlockwise from the x axis.
    extent : (xmin, ymin, xmax, ymax), optional
        Further limit the grid to this rectangle.
    name : str, optional

    Returns
    -------
    CandidateLayout

    Examples
    --------
    >>> box = shapely.box(0, 0, 100, 100)
    >>> grid_layout(spacing=25, area=box).n_sites
    25
    """
    spacing = check_real("spacing", spacing, low=0, low_inclusive=False)
    angle = check_real("angle", angle)
    region = _region(None if pilot_coords is None else _xy(pilot_coords), area)
    if extent is not None:
        ext = [check_real("extent", v) for v in extent]
        if len(ext) != 4 or ext[2] <= ext[0] or ext[3] <= ext[1]:
            raise InputError(f"`extent` must be (xmin, ymin, xmax, ymax) with xmax > xmin and "
                             f"ymax > ymin; got {tuple(extent)}")
        region = region.intersection(shapely.box(*ext))
        if region.area <= 0:
            raise DesignError(f"`extent` {tuple(ext)} does not overlap the study area")
    cx, cy = region.centroid.x, region.centroid.y
    xmin, ymin, xmax, ymax = region.bounds
    radius = math.hypot(xmax - xmin, ymax - ymin) / 2 + spacing
    k = int(math.ceil(radius / spacing))
    if (2 * k + 1) ** 2 > 4_000_000:
        raise DesignError(f"grid spacing {spacing:g} gives over a million nodes over this area; "
                          "use a larger spacing")
    # anchor the lattice at the region's lower-left corner so the grid starts at the boundary
    steps = np.arange(-k, k + 1) * spacing
    u, v = np.meshgrid(steps, steps)
    theta = math.radians(angle)
    ox, oy = xmin - cx, ymin - cy
    ou = ox * math.cos(theta) + oy * math.sin(theta)
    ov = -ox * math.sin(theta) + oy * math.cos(theta)
    u, v = u.ravel() + (ou % spacing), v.ravel() + (ov % spacing)
    x = cx + u * math.cos(theta) - v * math.sin(theta)
    y = cy + u * math.sin(theta) + v * math.cos(theta)
    tol = 1e-9 * spacing
    inside = shapely.contains_xy(region.buffer(tol), x, y)
    order = np.lexsort((x[inside], y[inside]))
    xy = np.column_stack([x[inside], y[inside]])[order]
    params = {"spacing": spacing, "angle": angle,
              "extent": None if extent is None else list(map(float, extent))}
    return CandidateLayout(name or f"grid:spacing={spacing:g}" + (f";angle={angle:g}" if angle
                                                                  else ""),
                           "grid", _frame(xy), None, params,
                           f"{len(xy)} grid nodes inside the study area")


def transect_layout(*, start: tuple[float, float], bearing: float, spacing: float,
                    length: float, name: str | None = None) -> CandidateLayout:
    """Sites every ``spacing`` map units along a straight line.

    Parameters
    ----------
    start : (x, y), keyword-only
        First site, working CRS.
    bearing : float
        Direction in degrees clockwise from grid north (0 = +y, 90 = +x).
    spacing : float
        Distance between consecutive sites.
    length : float
        Length of the line; sites at 0, spacing, 2·spacing, … ≤ length.
    name : str, optional

    Returns
    -------
    CandidateLayout
        ``line_length`` = distance from the first to the last site.

    Examples
    --------
    >>> t = transect_layout(start=(0, 0), bearing=90, spacing=10, length=100)
    >>> t.n_sites, t.line_length, float(t.coords["x"].iloc[-1])
    (11, 100.0, 100.0)
    """
    if not hasattr(start, "__len__") or len(start) != 2:
        raise InputError(f"`start` must be a point (x, y); got {start!r}")
    x0, y0 = (check_real("start", v) for v in start)
    bearing = check_real("bearing", bearing)
    spacing = check_real("spacing", spacing, low=0, low_inclusive=False)
    length = check_real("length", length, low=0, low_inclusive=False)
    count = int(math.floor(length / spacing * (1 + 1e-12))) + 1
    if count > 1_000_000:
        raise DesignError(f"transect of length {length:g} at spacing {spacing:g} has over a "
                          "million sites; use a larger spacing")
    d = np.arange(count) * spacing
    b = math.radians(bearing)
    xy = np.column_stack([x0 + d * math.sin(b), y0 + d * math.cos(b)])
    params = {"start": [x0, y0], "bearing": bearing, "spacing": spacing, "length": length}
    return CandidateLayout(name or f"transect:bearing={bearing:g};spacing={spacing:g};"
                           f"length={length:g}", "transect", _frame(xy), float(d[-1]), params,
                           f"{count} sites along {d[-1]:g} map units")


def thinned_layout(pilot_coords: Any, *, every: int | None = None,
                   fraction: float | None = None, seed: Any = None,
                   name: str | None = None) -> CandidateLayout:
    """A subset of the pilot sites: every k-th site, or a random fraction.

    Parameters
    ----------
    pilot_coords : DataFrame[x, y] (index = site ids) or (n, 2) array
    every : int, keyword-only
        Keep sites 0, k, 2k, … in the pilot's site order.
    fraction : float
        Keep a random ``round(fraction · n)`` sites (without replacement), drawn with ``seed``.
    seed : int or Generator, optional
    name : str, optional

    Examples
    --------
    >>> xy = pd.DataFrame({"x": np.arange(10.0), "y": 0.0})
    >>> thinned_layout(xy, every=3).coords.index.tolist()
    [0, 3, 6, 9]
    """
    frame = _coords_frame(pilot_coords)
    if (every is None) == (fraction is None):
        raise InputError("give exactly one of `every` (keep every k-th site) or `fraction` "
                         f"(random share); got every={every!r}, fraction={fraction!r}")
    if every is not None:
        every = check_int("every", every, low=1)
        keep = np.arange(0, len(frame), every)
        params, label = {"every": every}, f"thin:every={every}"
    else:
        fraction = check_real("fraction", fraction, low=0, high=1, low_inclusive=False)
        rng = check_rng(seed)
        m = max(1, int(round(fraction * len(frame))))
        keep = np.sort(rng.choice(len(frame), size=m, replace=False))
        params, label = {"fraction": fraction}, f"thin:fraction={fraction:g}"
        if isinstance(seed, (int, np.integer)):
            params["seed"] = int(seed)
    return CandidateLayout(name or label, "thin", frame.iloc[keep].copy(), None, params,
                           f"{len(keep)} of {len(frame)} pilot sites kept")


def augmented_layout(pilot_coords: Any, *, add: int, area: Any = None,
                     name: str | None = None) -> CandidateLayout:
    """The pilot plus ``add`` sites placed one by one in the largest remaining gap.

    Greedy farthest-point insertion: among a fine lattice of candidate points inside the study
    area (about 20,000; the pilot's convex hull when no area is given), repeatedly add the one
    farthest from every site so far. Each new site halves the widest gap in the coverage, so the
    finest well-resolved scale shrinks where the pilot was sparse. The loop runs once per
    added site; each step is one vectorised distance update.

    Examples
    --------
    >>> xy = pd.DataFrame({"x": [0.0, 100, 0, 100], "y": [0.0, 0, 100, 100]})
    >>> a = augmented_layout(xy, add=1)
    >>> a.coords.iloc[-1].round(0).tolist()
    [50.0, 50.0]
    """
    frame = _coords_frame(pilot_coords)
    add = check_int("add", add, low=1)
    region = _region(frame.to_numpy(), area)
    xmin, ymin, xmax, ymax = region.bounds
    step = math.sqrt(region.area / _CANDIDATES)
    gx = np.arange(xmin + step / 2, xmax, step)
    gy = np.arange(ymin + step / 2, ymax, step)
    X, Y = np.meshgrid(gx, gy)
    cand = np.column_stack([X.ravel(), Y.ravel()])
    cand = cand[shapely.contains_xy(region, cand[:, 0], cand[:, 1])]
    if len(cand) < add:
        raise DesignError(f"the study area offers {len(cand)} candidate points for {add} added "
                          "sites; add fewer sites")
    gap, _ = cKDTree(frame.to_numpy()).query(cand)
    chosen = np.empty(add, dtype=np.intp)
    for i in range(add):
        j = int(np.argmax(gap))
        chosen[i] = j
        gap = np.minimum(gap, np.hypot(cand[:, 0] - cand[j, 0], cand[:, 1] - cand[j, 1]))
    new = _frame(cand[chosen], pd.Index([f"A{i + 1:04d}" for i in range(add)],
                                        name=frame.index.name))
    coords = pd.concat([frame, new])
    return CandidateLayout(name or f"augment:add={add}", "augment", coords, None,
                           {"add": add}, f"{len(frame)} pilot sites + {add} added in the "
                           f"largest gaps (largest remaining gap {gap.max():.4g} map units)")


def file_layout(path: str, *, crs: Any = None, distance_unit: str | None = None,
                name: str | None = None, **read_options: Any) -> CandidateLayout:
    """Candidate points from a CSV or GIS file, read like a survey's site table.

    A GIS file with its own CRS is transformed to ``crs`` (the pilot's working CRS); CSV
    coordinates are taken to be in ``crs`` already, or, for a pilot in local planar
    coordinates (``crs=None``), in ``distance_unit``. A GIS file must declare its CRS. Extra keyword
    arguments go to :func:`spatial_ev.input.survey.read_survey` (e.g. ``x=``, ``y=``, ``site_id=``).

    Examples
    --------
    >>> file_layout("candidates.csv", crs=pilot.survey.crs)  # doctest: +SKIP
    """
    from spatial_ev.input.survey import read_survey

    from spatial_ev.input.io import file_format

    csv = file_format(path, role="candidate points") == "csv"
    if csv and "crs" not in read_options and "local_unit" not in read_options:
        if crs is not None:
            read_options["crs"] = crs
        elif distance_unit is not None:
            read_options["local_unit"] = distance_unit
    with warnings.catch_warnings():
        if crs is not None:  # reprojected to the pilot CRS below; the local projection is moot
            warnings.simplefilter("ignore", GeographicCoordinatesWarning)
        survey = read_survey(path, **read_options)
    sites = survey.sites
    if crs is not None and survey.crs is not None and not survey.crs.equals(crs):
        sites = sites.to_crs(crs)
        xy = np.column_stack([sites.geometry.representative_point().x,
                              sites.geometry.representative_point().y])
    elif (crs is None) != (survey.crs is None):
        raise DesignError(f"candidate file {path!r} and the pilot disagree about coordinates: "
                          f"one has a CRS ({crs or survey.crs}), the other local planar "
                          "coordinates; give both in the same system")
    else:
        xy = survey.coords.to_numpy()
    coords = pd.DataFrame(xy, columns=["x", "y"], index=survey.site_ids)
    return CandidateLayout(name or f"file:{path}", "file", coords, None, {"path": str(path)},
                           f"{len(coords)} points read from {path}")


# ------------------------------------------------------------------------------- spec syntax

def _xy(coords: Any) -> np.ndarray:
    return _coords_frame(coords).to_numpy()


def _coords_frame(coords: Any) -> pd.DataFrame:
    if hasattr(coords, "coords") and isinstance(getattr(coords, "coords"), pd.DataFrame):
        coords = coords.coords
    if isinstance(coords, pd.DataFrame):
        if {"x", "y"} - set(coords.columns):
            raise InputError(f"pilot coordinates need columns 'x' and 'y'; got "
                             f"{list(coords.columns)}")
        return coords[["x", "y"]].astype(float)
    arr = np.asarray(coords, dtype=float)
    if arr.ndim != 2 or arr.shape[1] != 2 or not np.isfinite(arr).all():
        raise InputError(f"pilot coordinates must be a finite (n, 2) array; got shape "
                         f"{arr.shape}")
    return pd.DataFrame(arr, columns=["x", "y"])


def parse_layout_spec(text: str) -> LayoutSpec:
    """Parse ``KIND:key=value;key=value`` (see the module docstring) into a :class:`LayoutSpec`.

    Examples
    --------
    >>> parse_layout_spec("transect:start=0,0;bearing=45;spacing=10;length=500").values
    {'start': (0.0, 0.0), 'bearing': 45.0, 'spacing': 10.0, 'length': 500.0}
    >>> parse_layout_spec("file:points.csv").values
    {'path': 'points.csv'}
    """
    if not isinstance(text, str) or ":" not in text:
        raise InputError(f"layout spec {text!r} must look like KIND:key=value;... with KIND one "
                         f"of {', '.join(LAYOUT_KINDS)} (e.g. 'grid:spacing=30', "
                         f"'thin:every=2', 'file:points.csv')")
    kind, _, rest = text.partition(":")
    kind = kind.strip().lower()
    if kind not in LAYOUT_KINDS:
        raise InputError(f"layout spec {text!r}: unknown kind {kind!r}; use one of "
                         f"{', '.join(LAYOUT_KINDS)}")
    if kind == "file":
        path, _, label = rest.partition(";name=")
        if not path.strip():
            raise InputError(f"layout spec {text!r}: give the file, e.g. 'file:points.csv'")
        values: dict[str, Any] = {"path": path.strip()}
        if label:
            values["name"] = label.strip()
        return LayoutSpec(kind, values, text)
    values = {}
    for part in filter(None, (p.strip() for p in rest.split(";"))):
        key, eq, value = part.partition("=")
        key = key.strip().lower()
        if not eq or key not in _KEYS[kind]:
            raise InputError(f"layout spec {text!r}: {part!r} is not key=value with a key of "
                             f"{kind!r} ({', '.join(sorted(_KEYS[kind]))})")
        if key == "name":
            values[key] = value.strip()
            continue
        try:
            numbers = tuple(float(v) for v in value.split(","))
        except ValueError:
            raise InputError(f"layout spec {text!r}: {key}={value!r} is not a number (use '.' "
                             f"as decimal mark; points as x,y)") from None
        want = {"start": 2, "extent": 4}.get(key, 1)
        if len(numbers) != want:
            raise InputError(f"layout spec {text!r}: {key} takes {want} comma-separated "
                             f"number(s); got {value!r}")
        values[key] = numbers if want > 1 else numbers[0]
    required = {"grid": {"spacing"}, "transect": {"start", "bearing", "spacing", "length"},
                "augment": {"add"}, "thin": set()}[kind]
    missing = sorted(required - set(values))
    if missing:
        raise InputError(f"layout spec {text!r} lacks {', '.join(missing)}; e.g. "
                         + {"grid": "'grid:spacing=30'",
                            "transect": "'transect:start=x,y;bearing=45;spacing=10;length=500'",
                            "augment": "'augment:add=40'"}[kind])
    for key in ("every", "add", "seed"):
        if key in values:
            if values[key] != int(values[key]):
                raise InputError(f"layout spec {text!r}: {key} must be a whole number; got "
                                 f"{values[key]:g}")
            values[key] = int(values[key])
    return LayoutSpec(kind, values, text)


def build_layout(spec: str | LayoutSpec, pilot_coords: Any, *, area: Any = None,
                 crs: Any = None, distance_unit: str | None = None, seed: Any = None,
                 **read_options: Any) -> CandidateLayout:
    """Build the layout a spec describes, around the pilot sites.

    Parameters
    ----------
    spec : str or LayoutSpec
        See the module docstring.
    pilot_coords : DataFrame[x, y] (pilot site ids as index) or (n, 2) array
    area : shapely Polygon, optional
        Study area (default: the pilot's convex hull) for grids and augmentation.
    crs, distance_unit : optional
        The pilot's working CRS and map unit (for ``file:`` layouts).
    seed : int or Generator, optional
        For ``thin:fraction=`` without its own ``seed=``.

    Examples
    --------
    >>> xy = pd.DataFrame({"x": np.arange(10.0), "y": 0.0})
    >>> build_layout("thin:every=2", xy).n_sites
    5
    """
    spec = parse_layout_spec(spec) if isinstance(spec, str) else spec
    if not isinstance(spec, LayoutSpec):
        raise InputError(f"`spec` must be a layout spec string; got {type(spec).__name__}")
    v = dict(spec.values)
    name = v.pop("name", None) or spec.text
    if spec.kind == "grid":
        return grid_layout(spacing=v["spacing"], pilot_coords=pilot_coords, area=area,
                           angle=v.get("angle", 0.0), extent=v.get("extent"), name=name)
    if spec.kind == "transect":
        return transect_layout(start=v["start"], bearing=v["bearing"], spacing=v["spacing"],
                               length=v["length"], name=name)
    if spec.kind == "thin":
        return thinned_layout(pilot_coords, every=v.get("every"), fraction=v.get("fraction"),
                              seed=v.get("seed", seed), name=name)
    if spec.kind == "augment":
        return augmented_layout(pilot_coords, add=v["add"], area=area, name=name)
    return file_layout(v["path"], crs=crs, distance_unit=distance_unit, name=name,
                       **read_options)
