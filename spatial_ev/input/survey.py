"""The survey: sites with metric coordinates, species and environment, aligned by site id.

:func:`read_survey` reads files, :meth:`Survey.from_frames` takes in-memory tables; both run
the same checks and return a frozen :class:`Survey`. Every check raises
:class:`~spatial_ev.errors.InputError` (or :class:`~spatial_ev.errors.CRSError`) naming the
file, column, line or site at fault, or issues a named warning saying what was changed.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from typing import Any

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj
import shapely

from spatial_ev.input import tables as T
from spatial_ev.input.assembly import assemble
from spatial_ev._validation import check_option, significant
from spatial_ev.input.crs import crs_label, looks_geographic_name, normalise_local_unit, parse_crs
from spatial_ev.errors import CRSError, InputError
from spatial_ev.input.io import file_format, numeric_hint, parse_numeric, read_csv_table, read_vector

__all__ = ["Survey", "read_survey"]

_COORD_NAMES = T.COORD_NAMES


@dataclass(frozen=True)
class Survey:
    """A validated survey in a planar working CRS.

    Attributes
    ----------
    sites : geopandas.GeoDataFrame
        One row per site (index = site ids, named after the id column); geometry (points or
        polygons) in the working CRS, plus the site table's other attributes.
    coords : pandas.DataFrame
        (n_sites, 2) float64 columns ``x``, ``y`` in map units; polygons → representative point.
    species : pandas.DataFrame or None
        (n_sites, n_species) float64 ≥ 0, same index; species that never occur are dropped.
    environment : pandas.DataFrame or None
        (n_sites, n_columns) float64; categorical variables as indicator columns named
        ``variable[level]`` with the first level (sorted) as reference; constants dropped.
    crs : pyproj.CRS or None
        Working CRS; ``None`` for local planar coordinates.
    source_crs : str or None
        CRS of the input coordinates as given (label), ``None`` for local coordinates.
    distance_unit : str
        Map unit of ``coords`` and of every distance derived from them ("metre", ...).
    projection_note : str
        How the working CRS was chosen (reported to users).
    geometry_type : str
        ``"point"`` or ``"polygon"``.
    sources : dict
        Role ("sites", "species", "environment") → file path or description of the frame.
    dropped : dict
        What the checks removed: ``"species"``, ``"variables"``, ``"sites"`` (incomplete
        environment), ``"empty_sites"`` (no species at all, dropped on request) and
        ``"merged_sites"`` (lists of ids merged into the first).
    categorical : dict
        Categorical variable → its indicator columns in ``environment``.
    reference_levels : dict
        Categorical variable → the level without an indicator column.

    Notes
    -----
    Site coordinates are treated as exact; planar distances in the working CRS are assumed to
    represent ground distances (see :mod:`spatial_ev.input.crs`).
    """

    sites: gpd.GeoDataFrame
    coords: pd.DataFrame
    species: pd.DataFrame | None
    environment: pd.DataFrame | None
    crs: pyproj.CRS | None
    source_crs: str | None
    distance_unit: str
    projection_note: str
    geometry_type: str
    sources: dict[str, str]
    dropped: dict[str, list]
    categorical: dict[str, list[str]]
    reference_levels: dict[str, str] = field(default_factory=dict)

    @property
    def n_sites(self) -> int:
        """Number of sites."""
        return len(self.coords)

    @property
    def site_ids(self) -> pd.Index:
        """Site ids, in the site table's order."""
        return self.coords.index

    @property
    def n_species(self) -> int:
        """Number of species kept (0 without a species table)."""
        return 0 if self.species is None else self.species.shape[1]

    @property
    def presence_absence(self) -> bool:
        """Whether every species value is 0 or 1 (a presence–absence table); ``False``
        without a species table.

        Examples
        --------
        >>> s = Survey.from_frames(pd.DataFrame({"x": [0., 1, 3, 6, 10], "y": 0.0},
        ...     index=pd.Index(list("abcde"), name="site")), local_unit="metre")
        >>> s.presence_absence
        False
        """
        if self.species is None:
            return False
        values = self.species.to_numpy()
        return bool(((values == 0) | (values == 1)).all())

    def nearest_neighbour_distances(self) -> pd.Series:
        """Distance from each site to its nearest other site, in map units (scipy cKDTree).

        Examples
        --------
        >>> s = Survey.from_frames(pd.DataFrame({"x": [0., 1, 3, 6, 10], "y": 0.0},
        ...     index=pd.Index(list("abcde"), name="site")), local_unit="metre")
        >>> s.nearest_neighbour_distances().tolist()
        [1.0, 1.0, 2.0, 3.0, 4.0]
        """
        from scipy.spatial import cKDTree

        xy = self.coords.to_numpy()
        dist, _ = cKDTree(xy).query(xy, k=2)
        return pd.Series(dist[:, 1], index=self.site_ids, name=f"nearest ({self.distance_unit})")

    def summary(self) -> dict[str, Any]:
        """Plain description of the survey (JSON-friendly).

        Examples
        --------
        >>> s = Survey.from_frames(pd.DataFrame({"x": [0., 1, 3, 6, 10], "y": 0.0},
        ...     index=pd.Index(list("abcde"), name="site")), local_unit="metre")
        >>> s.summary()["spacing"]["median"]
        2.0
        """
        xy = self.coords.to_numpy()
        nn = self.nearest_neighbour_distances().to_numpy()
        return {
            "n_sites": self.n_sites,
            "n_species": self.n_species,
            "environment_columns": [] if self.environment is None
            else [str(c) for c in self.environment.columns],
            "categorical": {k: list(v) for k, v in self.categorical.items()},
            "reference_levels": dict(self.reference_levels),
            "geometry_type": self.geometry_type,
            "crs": crs_label(self.crs),
            "source_crs": self.source_crs,
            "distance_unit": self.distance_unit,
            "projection_note": self.projection_note,
            "extent": {"xmin": float(xy[:, 0].min()), "xmax": float(xy[:, 0].max()),
                       "ymin": float(xy[:, 1].min()), "ymax": float(xy[:, 1].max()),
                       "width": float(np.ptp(xy[:, 0])), "height": float(np.ptp(xy[:, 1]))},
            "spacing": {"min": float(nn.min()), "median": float(np.median(nn)),
                        "max": float(nn.max())},
            "dropped": {k: [T._plain(v) if not isinstance(v, list) else v for v in vals]
                        for k, vals in self.dropped.items()},
            "sources": dict(self.sources),
        }

    def describe(self) -> str:
        """Multi-line text description (what ``spatial-ev check`` prints).

        Examples
        --------
        >>> s = Survey.from_frames(pd.DataFrame({"x": [0., 1, 3, 6, 10], "y": 0.0},
        ...     index=pd.Index(list("abcde"), name="site")), local_unit="metre")
        >>> print(s.describe().splitlines()[0])
        sites: 5 (point), ids from column 'site'
        """
        s = self.summary()
        u = self.distance_unit
        e, sp = s["extent"], s["spacing"]
        lines = [f"sites: {s['n_sites']} ({s['geometry_type']}), ids from column "
                 f"{self.site_ids.name!r}"]
        for role, src in self.sources.items():
            lines.append(f"  {role} source: {src}")
        attributes = [str(c) for c in self.sites.columns if c != self.sites.geometry.name]
        if attributes:
            lines.append(f"  other site attributes (not analysed): {T.listed(attributes, 8)}")
        if self.species is None:
            lines.append("species: none given")
        else:
            names = [str(c) for c in self.species.columns]
            lines.append(f"species: {len(names)} ({T.listed(names, 8)})")
        if self.environment is None:
            lines.append("environment: none given")
        else:
            indicator = {c for cols in self.categorical.values() for c in cols}
            numeric = [c for c in self.environment.columns if c not in indicator]
            n_columns = len(numeric) + len(self.categorical)
            coded = self.environment.shape[1]
            lines.append(f"environment: {n_columns} column(s)" + (
                f" ({coded} after coding categorical levels)" if coded != n_columns else ""))
            if numeric:
                lines.append(f"  numeric: {', '.join(map(str, numeric))}")
            for var, cols in self.categorical.items():
                lines.append(f"  categorical {var!r}: indicators {', '.join(cols)} "
                             f"(reference level {self.reference_levels.get(var)!r})")
        lines.append(f"coordinates: input CRS {s['source_crs'] or 'none (local planar)'}; "
                     f"working CRS {s['crs']}; distances in {u}")
        lines.append(f"  {self.projection_note}")
        lines.append(f"extent: x {e['xmin']:.8g} to {e['xmax']:.8g}, y {e['ymin']:.8g} to "
                     f"{e['ymax']:.8g} ({significant(e['width'])} x "
                     f"{significant(e['height'])} {u})")
        lines.append(f"nearest-neighbour spacing ({u}): min {significant(sp['min'])}, median "
                     f"{significant(sp['median'])}, max {significant(sp['max'])}")
        reasons = {"species": "never present (all zero)",
                   "variables": "constant across sites",
                   "sites": "incomplete environment (dropped on request)",
                   "empty_sites": "no species at all (dropped on request)",
                   "merged_sites": "shared coordinates (merged on request; first id kept)"}
        if any(self.dropped.values()):
            lines.append("dropped:")
            for key, vals in self.dropped.items():
                if vals:
                    lines.append(f"  {key} ({reasons.get(key, key)}): {T.listed(vals)}")
        else:
            lines.append("dropped: nothing")
        return "\n".join(lines)

    @classmethod
    def from_frames(cls, sites: pd.DataFrame, species: pd.DataFrame | None = None,
                    environment: pd.DataFrame | None = None, *, site_id: str | None = None,
                    x: str | None = None, y: str | None = None, crs: Any = None,
                    local_unit: str | None = None, incomplete_sites: str = "error",
                    shared_coordinates: str = "error", empty_sites: str = "error") -> Survey:
        """Build a survey from in-memory tables, with the same checks as :func:`read_survey`.

        Parameters
        ----------
        sites : geopandas.GeoDataFrame or pandas.DataFrame
            A GeoDataFrame (points or polygons; its CRS is used) or a DataFrame with coordinate
            columns (``x``/``y`` or named by ``x=``, ``y=``).
        species, environment : pandas.DataFrame, optional
            Tables indexed by site id, or holding a ``site_id`` column.
        site_id : str, optional
            Column holding the site ids; default: the index of each frame.
        x, y, crs, local_unit, incomplete_sites, shared_coordinates, empty_sites
            As in :func:`read_survey`.

        Examples
        --------
        >>> sites = pd.DataFrame({"x": [0., 10, 20, 0, 10, 20], "y": [0., 0, 0, 10, 10, 10]},
        ...                      index=pd.Index([f"s{i}" for i in range(6)], name="core"))
        >>> Survey.from_frames(sites, local_unit="m").distance_unit
        'metre'
        """
        opts = _check_options(crs, local_unit, ".", incomplete_sites, shared_coordinates,
                              empty_sites)
        if not isinstance(sites, pd.DataFrame):
            raise InputError(f"`sites` must be a (Geo)DataFrame; got {type(sites).__name__}")
        tables = {}
        for role, frame in (("species", species), ("environment", environment)):
            if frame is None:
                continue
            if not isinstance(frame, pd.DataFrame):
                raise InputError(f"`{role}` must be a DataFrame; got {type(frame).__name__}")
            use_index = site_id is None or site_id not in frame.columns
            frame_crs = getattr(frame, "crs", None) if isinstance(frame, gpd.GeoDataFrame) else None
            if isinstance(frame, gpd.GeoDataFrame):
                frame = pd.DataFrame(frame.drop(columns=frame.geometry.name))
            id_name, ids, data = T.split_ids(frame, role=role, source="frame", site_id=site_id,
                                             use_index=use_index)
            tables[role] = T.RawTable(role, "frame", id_name, ids, data, from_file=False,
                                      crs=frame_crs)
        use_index = site_id is None or site_id not in sites.columns
        if isinstance(sites, gpd.GeoDataFrame):
            geometry = sites.geometry.reset_index(drop=True)
            attributes = pd.DataFrame(sites.drop(columns=sites.geometry.name))
            id_name, ids, attributes = T.split_ids(attributes, role="sites", source="frame",
                                                   site_id=site_id, use_index=use_index)
            site_table = T.RawTable("sites", "frame", id_name, ids, attributes, from_file=False,
                                    crs=sites.crs, extra={"geometry": geometry})
        else:
            id_name, ids, attributes = T.split_ids(sites, role="sites", source="frame",
                                                   site_id=site_id, use_index=use_index)
            site_table = T.RawTable("sites", "frame", id_name, ids, attributes, from_file=False)
            _points_from_columns(site_table, x, y, opts)
        sources = {"sites": "in-memory sites frame"}
        sources.update({role: f"in-memory {role} frame" for role in tables})
        return cls(**assemble(site_table, tables, opts, sources))


def read_survey(sites: str | os.PathLike, species: str | os.PathLike | None = None,
                environment: str | os.PathLike | None = None, *, site_id: str | None = None,
                x: str | None = None, y: str | None = None, crs: Any = None,
                local_unit: str | None = None, delimiter: str | None = None,
                decimal: str = ".", encoding: str | None = None,
                layer: str | int | None = None,
                incomplete_sites: str = "error", shared_coordinates: str = "error",
                empty_sites: str = "error") -> Survey:
    """Read, align and validate survey files.

    Parameters
    ----------
    sites : path
        CSV with a site-id column and coordinate columns, or a GeoPackage / GeoJSON /
        Shapefile of points or polygons (polygon sites keep their geometry; their coordinates
        are the representative point, which lies inside the polygon).
    species : path, optional
        CSV (or GIS attribute table), sites × species: counts, cover or presence–absence.
    environment : path, optional
        CSV (or GIS attribute table), sites × variables. Numeric columns stay numeric; text
        columns are categories, coded as indicator columns ``name[level]`` with the first
        level (sorted) as the reference. Classes coded as numbers (1, 2, 3) are read as
        numbers: write them as text labels to have them treated as categories.
    site_id : str, optional
        Site-id column, the same name in every table; default: each table's first column.
    x, y : str, optional
        Coordinate columns of a CSV site table; default: recognised names (x/y,
        easting/northing, lon/lat, ...).
    crs : int or str, optional
        CRS of CSV coordinates (EPSG code or WKT), or of a GIS file that declares none. A
        GIS file's own CRS is always used; a different ``crs`` is an error.
    local_unit : str, optional
        Declare CSV coordinates local planar (no CRS) in this unit ("metre", "foot", ...).
    delimiter : str, optional
        CSV field separator of every CSV file; default: detected per file from its header
        line (``","``, tab for ``.tsv``, unless the header holds only ``";"``, tab or ``"|"``).
    decimal : {".", ","}
        Decimal mark of numbers in the CSV files (a comma-delimited file always uses ``"."``).
    encoding : str, optional
        Text encoding of CSV files that are not UTF-8 (e.g. ``"cp1252"``); UTF-8 files (with
        or without a byte-order mark) and UTF-16 files with a mark are recognised whatever
        this option says.
    layer : str or int, optional
        Layer of a multi-layer GIS site file.
    incomplete_sites : {"error", "drop"}
        Missing environmental values: raise (default), or drop those sites from every table
        with a :class:`~spatial_ev.errors.DroppedSitesWarning` listing them.
    shared_coordinates : {"error", "merge"}
        Sites at identical coordinates: raise (default), or merge each group into its first
        site (species values and numeric variables averaged — for Hellinger or chord profiles
        averaging and summing are equivalent; categories must agree) with a
        :class:`~spatial_ev.errors.MergedSitesWarning`.
    empty_sites : {"error", "drop"}
        Sites whose species are all zero (nothing found): raise (default), or drop those
        sites from every table with an :class:`~spatial_ev.errors.EmptySitesWarning` listing
        them (recorded in ``Survey.dropped["empty_sites"]``).

    Returns
    -------
    Survey

    Notes
    -----
    Geographic coordinates are projected to an azimuthal equidistant projection centred on the
    survey (:func:`spatial_ev.input.crs.local_metric_crs`) with a
    :class:`~spatial_ev.errors.GeographicCoordinatesWarning`. Species never present are
    dropped (:class:`~spatial_ev.errors.DroppedSpeciesWarning`); constant environmental columns
    are dropped (:class:`~spatial_ev.errors.DroppedVariablesWarning`). Sites whose species
    are all zero are an error unless ``empty_sites='drop'``: the Hellinger and chord
    transformations divide by the site total. At least 5 sites are required.

    Examples
    --------
    >>> s = read_survey("data_demo/sites.gpkg", "data_demo/species.csv",
    ...                 "data_demo/environment.csv")  # doctest: +SKIP
    >>> s.distance_unit  # doctest: +SKIP
    'metre'
    """
    opts = _check_options(crs, local_unit, decimal, incomplete_sites, shared_coordinates,
                          empty_sites)
    opts["delimiter"] = delimiter
    opts["encoding"] = encoding
    for role, path in (("sites", sites), ("species", species), ("environment", environment)):
        if path is not None:
            file_format(path, role=role)  # every file exists and has a known format
    site_table = _read_site_table(sites, site_id, x, y, layer, opts)
    tables, sources = {}, {"sites": str(sites)}
    for role, path in (("species", species), ("environment", environment)):
        if path is None:
            continue
        tables[role] = _read_table(path, role, site_id, opts)
        sources[role] = str(path)
    return Survey(**assemble(site_table, tables, opts, sources))


# ----------------------------------------------------------------------------------- checks

def _check_options(crs, local_unit, decimal, incomplete_sites, shared_coordinates,
                   empty_sites="error") -> dict:
    check_option("incomplete_sites", incomplete_sites, ("error", "drop"))
    check_option("empty_sites", empty_sites, ("error", "drop"))
    check_option("shared_coordinates", shared_coordinates, ("error", "merge"))
    check_option("decimal", decimal, (".", ","))
    if crs is not None and local_unit is not None:
        raise CRSError(f"give either `crs` ({crs!r}) or `local_unit` ({local_unit!r}), not "
                       f"both: `local_unit` declares coordinates without a CRS")
    return {"crs": None if crs is None else parse_crs(crs),
            "local_unit": None if local_unit is None else normalise_local_unit(local_unit),
            "decimal": decimal, "incomplete_sites": incomplete_sites,
            "shared_coordinates": shared_coordinates, "empty_sites": empty_sites,
            "delimiter": None, "encoding": None}


def _read_frame(path, role: str, opts: dict, layer=None, site_id=None):
    kind = file_format(path, role=role)
    if kind == "csv":
        return read_csv_table(path, role=role, delimiter=opts["delimiter"],
                              decimal=opts["decimal"], id_column=site_id,
                              encoding=opts["encoding"]), None, True
    gdf = read_vector(path, role=role, layer=layer)  # a DataFrame for attribute-only tables
    return gdf, getattr(gdf, "crs", None) if isinstance(gdf, gpd.GeoDataFrame) else None, False


def _read_table(path, role: str, site_id, opts: dict) -> T.RawTable:
    frame, crs, is_csv = _read_frame(path, role, opts, site_id=site_id)
    if isinstance(frame, gpd.GeoDataFrame):
        frame = pd.DataFrame(frame.drop(columns=frame.geometry.name))
    source = f"file {str(path)!r}"
    id_name, ids, data = T.split_ids(frame, role=role, source=source, site_id=site_id)
    return T.RawTable(role, source, id_name, ids, data, crs=crs,
                      extra={"csv": is_csv, "lines": frame.attrs.get("lines")})


def _read_site_table(path, site_id, x, y, layer, opts: dict) -> T.RawTable:
    frame, crs, is_csv = _read_frame(path, "sites", opts, layer, site_id)
    source = f"file {str(path)!r}"
    if is_csv:
        if layer is not None:
            raise InputError(f"`layer` ({layer!r}) applies to GIS files; sites {source} is CSV")
        id_name, ids, data = T.split_ids(frame, role="sites", source=source, site_id=site_id)
        table = T.RawTable("sites", source, id_name, ids, data,
                           extra={"csv": True, "lines": frame.attrs.get("lines")})
        _points_from_columns(table, x, y, opts)
        return table
    if not isinstance(frame, gpd.GeoDataFrame):
        raise InputError(f"sites {source}: the layer has no geometry (an attribute table); "
                         f"give a layer of points or polygons, or a CSV with coordinate columns")
    if x is not None or y is not None:
        raise InputError(f"`x`/`y` columns apply to CSV site tables; sites {source} is a GIS "
                         f"file whose geometry gives the coordinates")
    attributes = pd.DataFrame(frame.drop(columns=frame.geometry.name))
    if site_id is None and attributes.shape[1] == 0:
        raise InputError(f"sites {source} has no attribute columns to take site ids from; "
                         f"add a site-id field to the layer")
    id_name, ids, attributes = T.split_ids(attributes, role="sites", source=source,
                                           site_id=site_id)
    return T.RawTable("sites", source, id_name, ids, attributes, crs=crs,
                      extra={"geometry": frame.geometry.reset_index(drop=True)})


def _points_from_columns(table: T.RawTable, x, y, opts: dict) -> None:
    """Find coordinate columns, parse them, store point geometry in ``table.extra``."""
    cols = list(table.data.columns)
    if (x is None) != (y is None):
        raise InputError(f"give both `x` and `y` coordinate columns (got x={x!r}, y={y!r})")
    if x is None:
        lower = {str(c).strip().lower(): c for c in cols}
        pair = next(((lower[a], lower[b]) for a, b in _COORD_NAMES
                     if a in lower and b in lower), None)
        if pair is None:
            hint = ""
            if str(table.id_name).strip().lower() in {n for p in _COORD_NAMES for n in p}:
                hint = (f"; the first column {table.id_name!r} looks like a coordinate: the "
                        f"site table needs a site-id column (or pass site_id=)")
            raise InputError(f"sites {table.source}: no coordinate columns found among "
                             f"{T.listed(cols)}; pass x= and y= (command line: --x COL --y COL)"
                             f"{hint}")
        x, y = pair
    for name in (x, y):
        if name not in cols:
            extra = " (it is the site-id column)" if name == table.id_name else ""
            raise InputError(f"sites {table.source}: no coordinate column {name!r}{extra}; its "
                             f"columns are {T.listed(cols)}")
    values = []
    for name in (x, y):
        numbers, missing, bad = parse_numeric(table.data[name], decimal=opts["decimal"])
        mask = missing | bad | ~np.isfinite(numbers)
        if mask.any():
            i = int(np.flatnonzero(mask)[0])
            column = table.data[name]
            raw = column.astype(object).where(column.notna(), "").astype(str).to_numpy()
            hint = numeric_hint(raw[mask & ~missing].tolist(), opts["decimal"])
            site = table.ids.iloc[i]
            site = "no site id" if pd.isna(site) or not str(site).strip() else f"site {site!r}"
            what = "is empty" if missing[i] else f"holds {raw[i]!r}, not a finite number"
            raise InputError(f"sites {table.source}: coordinate column {name!r} "
                             f"{table.where(i)} ({site}) {what}{hint}; every site needs both "
                             f"coordinates ({int(mask.sum())} such cell(s) in the column)")
        values.append(numbers)
    _check_not_swapped(table, x, y, values, opts)
    geo_named = looks_geographic_name(x, "x") or looks_geographic_name(y, "y")
    in_degrees = bool((np.abs(values[0]) <= 180).all() and (np.abs(values[1]) <= 90).all())
    crs = opts["crs"]
    if crs is None and opts["local_unit"] is None:
        if geo_named or in_degrees:
            raise CRSError(f"sites {table.source}: coordinate columns {x!r}/{y!r} look like "
                           f"longitude/latitude but no CRS was given; pass crs='EPSG:4326' "
                           f"(--crs EPSG:4326) for WGS 84 degrees, or the CRS they are in")
        raise CRSError(f"sites {table.source}: CSV coordinates need a reference system; pass "
                       f"crs= (EPSG code or WKT, --crs) or declare local planar coordinates "
                       f"with local_unit='metre' (--local-unit metre)")
    if crs is not None and crs.is_projected and geo_named and in_degrees:
        raise CRSError(f"sites {table.source}: columns {x!r}/{y!r} hold degrees but the "
                       f"given CRS {crs_label(crs)} is projected; pass the geographic CRS "
                       f"(e.g. crs='EPSG:4326')")
    table.data = table.data.drop(columns=[x, y])
    table.crs = crs
    table.extra["geometry"] = gpd.GeoSeries(shapely.points(values[0], values[1]), crs=crs)
    table.extra["declared"] = True


def _check_not_swapped(table: T.RawTable, x, y, values, opts: dict) -> None:
    """Refuse longitude/latitude columns given the wrong way round (x must be the longitude):
    columns named the other way round, or degrees that fit only when swapped."""
    crs = opts["crs"]
    if opts["local_unit"] is not None or (crs is not None and not crs.is_geographic):
        return
    fix = (f"x must be the longitude and y the latitude: swap them (x={y!r}, y={x!r}), or "
           f"rename the columns if their names are wrong")
    if looks_geographic_name(x, "y") and looks_geographic_name(y, "x"):
        raise CRSError(f"sites {table.source}: the coordinate columns look swapped: the x "
                       f"column {x!r} is named like a latitude and the y column {y!r} like a "
                       f"longitude; {fix}")
    lon, lat = np.abs(values[0]), np.abs(values[1])
    if crs is not None and (lat > 90).any() and (lat <= 180).all() and (lon <= 90).all():
        i = int(np.flatnonzero(lat > 90)[0])
        raise CRSError(f"sites {table.source}: the coordinate columns look swapped: the "
                       f"latitude (y) column {y!r} holds {values[1][i]:g} at site "
                       f"{table.ids.iloc[i]!r} ({table.where(i)}), beyond ±90 degrees, while "
                       f"every value of the longitude (x) column {x!r} lies within ±90; {fix}")
