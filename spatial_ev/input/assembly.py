"""Private: turn raw survey tables into validated, aligned survey fields.

Order of the checks (each raises :class:`~spatial_ev.errors.InputError` naming the file,
column, line or site, or warns with a named class): site ids → geometry (empty, mixed,
unsupported, invalid, 3-D) → working CRS (file vs given CRS, layers in different CRSs,
projection of degrees) → coordinates of a plausible size → alignment of the species and
environment tables → species values → environment columns → incomplete sites (error or
drop) → empty sites, with no species at all (error or drop) → shared coordinates (error or
merge) → at least 5 sites → species never present (dropped) → constant variables (dropped) and
indicator coding of categories.
"""

from __future__ import annotations

import warnings

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj
import shapely

from spatial_ev.input import tables as T
from spatial_ev.input.crs import (MAX_SCALE_ERROR, check_geographic_ranges, crs_label, distance_unit_of,
                  local_metric_crs, scale_range)
from spatial_ev.errors import (CRSError, DroppedSitesWarning, DroppedSpeciesWarning,
                     DroppedVariablesWarning, EmptySitesWarning, GeographicCoordinatesWarning, InputError,
                     MapDistortionWarning, MergedSitesWarning,
                     ThreeDimensionalCoordinatesWarning)

__all__ = ["assemble", "MIN_SITES"]

MIN_SITES = 5
MAX_COORDINATE = 1e12  # map units; far beyond any survey in any length unit, squares stay finite
MIN_EXTENT = 1e-100  # map units; squared distances stay normal floating-point numbers


def assemble(site_table: T.RawTable, tables: dict, opts: dict, sources: dict) -> dict:
    """Validate and align raw tables; return the fields of a :class:`~spatial_ev.input.survey.Survey`.

    Warnings are issued with ``stacklevel`` pointing at the caller of the public reader
    (``read_survey`` / ``Survey.from_frames`` → ``assemble`` → helper).
    """
    site_keys = T.check_ids(site_table)
    index = T.final_index(site_table.ids, site_table.id_name)
    geometry, gtype = _check_geometry(site_table, index)
    working, info = _working_crs(site_table, geometry, index, opts, tables)
    coords = _coordinates(working, gtype, index, site_table.source, info["unit"])

    species = env_cols = None
    if "species" in tables:
        t = tables["species"]
        order = T.align(t, site_keys, site_table.source)
        species = T.species_matrix(t, order, index, opts["decimal"])
    if "environment" in tables:
        t = tables["environment"]
        order = T.align(t, site_keys, site_table.source)
        env_cols = T.environment_columns(t, order, index, opts["decimal"])

    keep = np.ones(len(index), dtype=bool)
    dropped: dict[str, list] = {"species": [], "variables": [], "sites": [], "empty_sites": [],
                                "merged_sites": []}
    if env_cols is not None:
        keep = _incomplete_sites(env_cols, index, opts, dropped, tables["environment"].source)
    if species is not None:
        keep &= _empty_sites(species, keep, opts, dropped, tables["species"].source)
    attributes = site_table.data.set_axis(index, axis=0)
    sites = gpd.GeoDataFrame(attributes, geometry=working.set_axis(index), crs=info["crs"])
    if not keep.all():
        sites, coords = sites[keep], coords[keep]
        species = None if species is None else species[keep]
        env_cols = T.EnvironmentColumns(env_cols.numeric[keep], env_cols.categorical[keep],
                                        env_cols.order)
    sites, coords, species, env_cols = _shared_coordinates(sites, coords, species, env_cols,
                                                           opts, dropped)
    if len(coords) < MIN_SITES:
        raise InputError(f"the survey has {len(coords)} site(s) after the checks; at least "
                         f"{MIN_SITES} are needed for any spatial analysis (sites "
                         f"{site_table.source})")
    if species is not None:
        species = _check_species_totals(species, dropped, tables["species"].source)
    environment, categorical, reference = (None, {}, {})
    if env_cols is not None:
        environment, categorical, reference = _code_environment(
            env_cols, dropped, tables["environment"].source)
    return dict(sites=sites, coords=coords, species=species, environment=environment,
                crs=info["crs"], source_crs=info["source_crs"],
                distance_unit=info["unit"], projection_note=info["note"],
                geometry_type=gtype, sources=sources, dropped=dropped,
                categorical=categorical, reference_levels=reference)


def _check_geometry(table: T.RawTable, index: pd.Index) -> tuple[gpd.GeoSeries, str]:
    geometry = gpd.GeoSeries(table.extra["geometry"]).reset_index(drop=True)
    missing = geometry.isna().to_numpy() | geometry.is_empty.to_numpy()
    if missing.any():
        raise InputError(f"sites {table.source}: {int(missing.sum())} site(s) have no geometry "
                         f"(null or empty): {T.listed(index[missing])}; give every site a "
                         f"location or remove it")
    geoms = geometry.to_numpy()
    single = (geometry.geom_type == "MultiPoint").to_numpy() & \
        (shapely.get_num_geometries(geoms) == 1)
    if single.any():  # one-part multipoints (common in Shapefiles) are points, losslessly
        geoms = geoms.copy()
        geoms[single] = shapely.get_geometry(geoms[single], 0)
        geometry = gpd.GeoSeries(geoms, crs=geometry.crs)
    kinds = geometry.geom_type.map({"Point": "point", "Polygon": "polygon",
                                    "MultiPolygon": "polygon"})
    unsupported = kinds.isna().to_numpy()
    if unsupported.any():
        types = sorted(set(geometry.geom_type[unsupported]))
        raise InputError(f"sites {table.source}: geometry type(s) {types} are not supported "
                         f"(e.g. site {index[unsupported][0]!r}); sites must be points or "
                         f"polygons")
    present = sorted(set(kinds))
    if len(present) > 1:
        first_poly = index[(kinds == "polygon").to_numpy()][0]
        raise InputError(f"sites {table.source} mixes points and polygons (e.g. polygon site "
                         f"{first_poly!r}); use one geometry type, e.g. polygon centroids as "
                         f"points")
    invalid = ~shapely.is_valid(geometry.to_numpy())
    if invalid.any():
        i = int(np.flatnonzero(invalid)[0])
        reason = shapely.is_valid_reason(geometry.to_numpy()[i])
        raise InputError(f"sites {table.source}: {int(invalid.sum())} invalid polygon(s), e.g. "
                         f"site {index[i]!r} ({reason}): {T.listed(index[invalid])}; repair "
                         f"them (e.g. 'fix geometries' in a GIS, or shapely.make_valid)")
    if geometry.has_z.any():
        warnings.warn(f"sites {table.source}: geometries have z coordinates "
                      f"({int(geometry.has_z.sum())} site(s)); only x and y are used",
                      ThreeDimensionalCoordinatesWarning, stacklevel=4)
        geometry = gpd.GeoSeries(shapely.force_2d(geometry.to_numpy()), crs=geometry.crs)
    return geometry, present[0]


def _working_crs(site_table, geometry, index, opts, tables) -> tuple[gpd.GeoSeries, dict]:
    file_crs = None if site_table.extra.get("declared") else site_table.crs
    given = opts["crs"]
    src = site_table.source
    if file_crs is not None and given is not None and not _same_crs(file_crs, given):
        raise CRSError(f"sites {src} is in {crs_label(file_crs)} but crs={crs_label(given)} "
                       f"was given; the file's own CRS is used: drop the crs option, or "
                       f"reproject the file first")
    if file_crs is not None and opts["local_unit"] is not None:
        raise CRSError(f"sites {src} has a CRS ({crs_label(file_crs)}); local_unit applies "
                       f"only to coordinates without one: drop it")
    crs = file_crs or given
    for role, t in tables.items():
        if t.crs is not None and crs is not None and not _same_crs(t.crs, crs):
            raise CRSError(f"layers in different CRSs: sites in {crs_label(crs)}, {role} "
                           f"{t.source} in {crs_label(t.crs)}; reproject one of them so both "
                           f"use the same CRS (e.g. GeoDataFrame.to_crs)")
    if crs is None:
        if opts["local_unit"] is None:
            raise CRSError(f"sites {src} declares no CRS; pass crs= (EPSG code or WKT, --crs) "
                           f"or local_unit= for local planar coordinates (--local-unit metre)")
        unit = opts["local_unit"]
        return geometry.set_crs(None, allow_override=True), {
            "crs": None, "source_crs": None, "unit": unit,
            "note": f"local planar coordinates used as given (unit: {unit}); no CRS"}
    geometry = geometry.set_crs(crs, allow_override=True)
    if crs.is_geographic:
        pts = geometry.representative_point()
        check_geographic_ranges(pts.x.to_numpy(), pts.y.to_numpy(), source=f"sites {src}",
                                site_ids=index)
        local, note = local_metric_crs(pts.x.to_numpy(), pts.y.to_numpy(), crs)
        warnings.warn(f"sites {src}: {note}", GeographicCoordinatesWarning, stacklevel=4)
        try:
            projected = geometry.to_crs(local)
        except Exception as exc:  # pyproj transformation failures
            raise CRSError(f"sites {src}: coordinates cannot be projected from "
                           f"{crs_label(crs)} ({exc})") from None
        return projected, {"crs": local, "source_crs": crs_label(crs), "unit": "metre",
                           "note": note}
    unit = distance_unit_of(crs)
    note = (f"projected CRS {crs_label(crs)} used as the working CRS; distances in its map "
            f"unit ({unit})")
    pts = geometry.representative_point()
    _check_not_degrees(pts.x.to_numpy(), pts.y.to_numpy(), crs, unit, src, index,
                       declared=bool(site_table.extra.get("declared")))
    low, high, utm = scale_range(crs, pts.x.to_numpy(), pts.y.to_numpy())
    if max(high - 1.0, 1.0 - low) > MAX_SCALE_ERROR:  # NaN (unknown) compares False
        shown = f"{low:.3g}" if round(low, 2) == round(high, 2) else f"{low:.3g} to {high:.3g}"
        fix = f" (e.g. {utm})" if utm else ""
        distortion = (f"map distances in {crs_label(crs)} are {shown} times the ground "
                      f"distances at the sites, so scales, spacings and distances are in map "
                      f"units of this CRS rather than ground distances; reproject the sites to "
                      f"a CRS made for the region{fix} to get ground distances")
        warnings.warn(f"sites {src}: {distortion}", MapDistortionWarning, stacklevel=4)
        note = f"{note}; {distortion}"
    return geometry, {"crs": crs, "source_crs": crs_label(crs), "unit": unit, "note": note}


def _check_not_degrees(x, y, crs, unit, src, index, *, declared: bool) -> None:
    """Degrees labelled with a projected CRS put every site within about 200 map units of the
    CRS's false origin (far outside any projected CRS's area of use): refuse them."""
    if not ((np.abs(x) <= 180).all() and (np.abs(y) <= 90).all()):
        return
    fix = ("pass crs='EPSG:4326' (--crs EPSG:4326) for WGS 84 degrees" if declared else
           "the file's CRS is wrong: assign the geographic CRS (e.g. EPSG:4326) to the layer "
           "in a GIS (define it, do not reproject)")
    raise CRSError(f"sites {src}: every coordinate lies within ±180 / ±90 (e.g. site "
                   f"{index[0]!r} at {x[0]:g}, {y[0]:g}), which in the projected CRS "
                   f"{crs_label(crs)} puts all sites within about 200 {unit} of its false "
                   f"origin; these look like longitude/latitude degrees: {fix}")


def _same_crs(a, b) -> bool:
    return pyproj.CRS(a).equals(pyproj.CRS(b), ignore_axis_order=True)


def _coordinates(geometry: gpd.GeoSeries, gtype: str, index: pd.Index, source: str,
                 unit: str) -> pd.DataFrame:
    pts = geometry if gtype == "point" else geometry.representative_point()
    xy = shapely.get_coordinates(pts.to_numpy()).astype(np.float64)
    # squared distances must stay finite and above the smallest normal float
    big = np.abs(xy).max(axis=1)
    if not np.isfinite(xy).all() or big.max() > MAX_COORDINATE:
        i = int(np.argmax(np.where(np.isfinite(big), big, np.inf)))
        raise InputError(f"sites {source}: site {index[i]!r} has coordinates "
                         f"({xy[i, 0]:g}, {xy[i, 1]:g}) (working CRS, {unit}); coordinates beyond ±{MAX_COORDINATE:g} map "
                         f"units are not a survey on the ground: check the coordinate columns, "
                         f"the CRS and the unit")
    span = float(np.ptp(xy, axis=0).max())
    if span < MIN_EXTENT:
        raise InputError(f"sites {source}: all sites lie within {span!r} {unit} of each other; "
                         f"distances this small cannot be computed reliably: check the "
                         f"coordinate columns and the unit (e.g. local_unit)")
    return pd.DataFrame(xy, index=index, columns=["x", "y"])


def _incomplete_sites(env: T.EnvironmentColumns, index, opts, dropped, source) -> np.ndarray:
    missing = env.numeric.isna().to_numpy()
    cat_missing = env.categorical.isna().to_numpy()
    cols = list(env.numeric.columns) + list(env.categorical.columns)
    miss = np.concatenate([missing, cat_missing], axis=1) if cols else missing
    bad_rows = miss.any(axis=1)
    if not bad_rows.any():
        return np.ones(len(index), dtype=bool)
    ids = index[bad_rows]
    bad_cols = [c for c, m in zip(cols, miss.any(axis=0)) if m]
    if opts["incomplete_sites"] == "error":
        raise InputError(f"environment {source}: {len(ids)} site(s) have missing values "
                         f"(columns {T.listed(bad_cols)}): {T.listed(ids)}; fill them in, or "
                         f"drop these sites with incomplete_sites='drop' "
                         f"(--incomplete-sites drop)")
    dropped["sites"] = [T._plain(i) for i in ids]
    warnings.warn(f"environment {source}: dropped {len(ids)} site(s) with missing values "
                  f"(columns {T.listed(bad_cols)}) from every table: {T.listed(ids)}",
                  DroppedSitesWarning, stacklevel=4)
    return ~bad_rows


def _shared_coordinates(sites, coords, species, env, opts, dropped):
    xy = coords.to_numpy()
    _, first, inverse, counts = np.unique(xy, axis=0, return_index=True, return_inverse=True,
                                          return_counts=True)
    inverse = inverse.ravel()
    if (counts == 1).all():
        return sites, coords, species, env
    shared = counts[inverse] > 1
    groups = [list(coords.index[inverse == g]) for g in np.flatnonzero(counts > 1)[:10]]
    if opts["shared_coordinates"] == "error":
        shown = "; ".join(" = ".join(map(repr, g)) for g in groups)
        raise InputError(f"{int(shared.sum())} sites share coordinates with another site "
                         f"({shown}); give distinct locations, or merge them with "
                         f"shared_coordinates='merge' (--shared-coordinates merge)")
    # keep the first site of each group, in site order; group label = position of that site
    label = first[inverse]
    if env is not None and not env.categorical.empty:
        disagree = env.categorical.groupby(label, sort=False).nunique(dropna=False) > 1
        if disagree.to_numpy().any():
            g = disagree.index[disagree.any(axis=1)][0]
            raise InputError(f"sites {T.listed(coords.index[label == g])} share coordinates "
                             f"but have different categories; they cannot be merged")
    keep = np.sort(first)
    merged = [[T._plain(i) for i in coords.index[label == g]] for g in keep
              if (label == g).sum() > 1]
    dropped["merged_sites"] = merged

    def average(frame):
        return None if frame is None else frame.groupby(label, sort=False).mean() \
            .loc[keep].set_axis(frame.index[keep])
    species = average(species)
    if env is not None:
        env = T.EnvironmentColumns(average(env.numeric), env.categorical.iloc[keep], env.order)
    warnings.warn(f"merged {len(merged)} group(s) of sites sharing coordinates into their "
                  f"first site (species and numeric variables averaged): "
                  f"{T.listed([' + '.join(map(str, g)) for g in merged])}",
                  MergedSitesWarning, stacklevel=4)
    return sites.iloc[keep], coords.iloc[keep], species, env


def _check_species_totals(species: pd.DataFrame, dropped, source) -> pd.DataFrame:
    totals = species.sum(axis=0)
    absent = totals.index[totals.to_numpy() == 0]
    if len(absent):
        dropped["species"] = [T._plain(c) for c in absent]
        warnings.warn(f"species {source}: dropped {len(absent)} species never present at "
                      f"any site: {T.listed(absent)}", DroppedSpeciesWarning, stacklevel=4)
        species = species.drop(columns=absent)
    if species.shape[1] == 0:
        raise InputError(f"species {source}: no species is present at any site")
    return species


def _empty_sites(species: pd.DataFrame, keep: np.ndarray, opts, dropped, source) -> np.ndarray:
    """Sites (among those kept so far) whose species are all zero: an error, or dropped from
    every table on request (``empty_sites='drop'``) with an :class:`EmptySitesWarning`."""
    empty = keep & (species.sum(axis=1).to_numpy() == 0)
    if not empty.any():
        return np.ones(len(keep), dtype=bool)
    ids = species.index[empty]
    if opts.get("empty_sites", "error") == "error":
        raise InputError(f"species {source}: {len(ids)} site(s) have no species at all "
                         f"(all zero): {T.listed(ids)}; the Hellinger and chord "
                         f"transformations divide by each site's total, so remove these sites, "
                         f"or drop them with empty_sites='drop' (--empty-sites drop)")
    dropped["empty_sites"] = [T._plain(i) for i in ids]
    warnings.warn(f"species {source}: dropped {len(ids)} site(s) with no species at all (all "
                  f"zero) from every table: {T.listed(ids)}", EmptySitesWarning, stacklevel=4)
    return ~empty


def _code_environment(env: T.EnvironmentColumns, dropped, source):
    columns, categorical, reference, constant = {}, {}, {}, []
    for col in env.order:
        if col in env.numeric.columns:
            values = env.numeric[col].to_numpy()
            if np.ptp(values) == 0:
                constant.append(col)
            else:
                columns[str(col)] = values
            continue
        labels = env.categorical[col]
        levels = sorted(pd.unique(labels.to_numpy()))
        if len(levels) == 1:
            constant.append(col)
            continue
        if len(levels) == len(labels) and len(labels) > MIN_SITES:
            raise InputError(f"environment {source}: text column {col!r} has a different value "
                             f"at every site, so it cannot be a category (it would explain "
                             f"everything); remove it or group its values")
        reference[str(col)] = levels[0]
        names = [f"{col}[{level}]" for level in levels[1:]]
        categorical[str(col)] = names
        for level, name in zip(levels[1:], names):
            columns[name] = (labels.to_numpy() == level).astype(np.float64)
    if constant:
        dropped["variables"] = [str(c) for c in constant]
        warnings.warn(f"environment {source}: dropped {len(constant)} constant column(s): "
                      f"{T.listed(constant)}", DroppedVariablesWarning, stacklevel=4)
    if not columns:
        raise InputError(f"environment {source}: no variable varies across the sites")
    index = env.numeric.index
    environment = pd.DataFrame(columns, index=index, dtype=np.float64)
    environment.columns.name = "variable"
    return environment, categorical, reference
