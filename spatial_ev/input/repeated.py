"""Repeated surveys: the same sites surveyed at two or more times.

Layouts accepted:

* **long form** — one species table (and optionally one environment table) with a site-id
  column and a time column, one row per site and survey;
* **one table per survey** — a list of species tables (sites × species, one row per site), with
  the survey times given beside them (``times=[2023, 2024]``).

The site table is read and checked exactly as for a single survey
(:func:`spatial_ev.input.survey.read_survey`: ids, geometry, CRS and projection, shared
coordinates, at least 5 sites). Species values are checked by the same rules (numbers ≥ 0, no
empty cells; :func:`spatial_ev.input.tables.species_matrix`) and environment columns likewise.
Checks particular to repeated surveys, each an :class:`~spatial_ev.errors.InputError` naming the
file, column, line and site: a time column that cannot be found or holds values that are
neither numbers nor dates; fewer than 2 surveys; the same site twice in one survey; site ids
that are not in the site table; sites missing from some surveys (listed with the surveys they
miss; ``incomplete_sites="keep_complete"`` keeps only the sites present in every survey, with a
:class:`~spatial_ev.errors.DroppedSitesWarning`); a site with no species at all in a survey.

Times are numbers (years, days, ...) or dates (ISO ``2024-05-17`` or anything pandas reads
unambiguously); dates become days since the first survey. Spacing may be irregular.
"""

from __future__ import annotations

import os
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import geopandas as gpd
import numpy as np
import pandas as pd

from spatial_ev._validation import check_option
from spatial_ev.errors import (DroppedSitesWarning, DroppedSpeciesWarning,
                               DroppedVariablesWarning, InputError)
from spatial_ev.input import tables as T
from spatial_ev.input.io import file_format, parse_numeric, read_csv_table, read_vector
from spatial_ev.input.survey import Survey, read_survey

__all__ = ["RepeatedSurvey", "read_repeated_survey", "TIME_NAMES", "INCOMPLETE_SITES"]

TIME_NAMES = ("time", "year", "date", "survey", "season", "campaign", "visit")
INCOMPLETE_SITES = ("error", "keep_complete")
MIN_SITES = 5


@dataclass(frozen=True)
class RepeatedSurvey:
    """A validated repeated survey.

    Attributes
    ----------
    base : Survey
        The sites (coordinates, CRS, geometry, attributes) as a single survey without species.
    species : DataFrame
        Rows indexed by (survey label, site id) — survey-major in time order, sites in the
        site table's order; one float64 column per species (≥ 0). Species never present in
        any survey are dropped.
    environment : DataFrame or None
        Same index; numeric columns and indicator columns ``variable[level]`` of categories.
    times : Series
        Survey label (str) → numeric time, in increasing order.
    time_unit : str
        ``"as given"`` for numeric times, ``"day"`` for dates (days since the first survey).
    sources : dict
        Role → file path(s) or description.
    dropped : dict
        ``"sites"`` (not present in every survey, dropped on request), ``"species"`` (never
        present), ``"variables"`` (constant).
    """

    base: Survey
    species: pd.DataFrame = field(repr=False)
    environment: pd.DataFrame | None = field(repr=False)
    times: pd.Series
    time_unit: str
    sources: dict
    dropped: dict

    @property
    def surveys(self) -> list[str]:
        """Survey labels in time order."""
        return [str(s) for s in self.times.index]

    @property
    def n_surveys(self) -> int:
        """Number of surveys."""
        return len(self.times)

    @property
    def n_sites(self) -> int:
        """Number of sites (present in every survey)."""
        return self.base.n_sites

    @property
    def n_species(self) -> int:
        """Number of species kept."""
        return self.species.shape[1]

    @property
    def coords(self) -> pd.DataFrame:
        """Site coordinates ``x``, ``y`` in map units."""
        return self.base.coords

    @property
    def site_ids(self) -> pd.Index:
        """Site ids in the site table's order."""
        return self.base.site_ids

    def survey_table(self, label: str) -> pd.DataFrame:
        """Species of one survey: sites × species (index = site ids).

        Examples
        --------
        >>> r = _example()
        >>> r.survey_table("2021").shape
        (6, 2)
        """
        if label not in self.times.index:
            raise InputError(f"no survey {label!r}; the surveys are {self.surveys}")
        return self.species.xs(label, level=0)

    def summary(self) -> dict[str, Any]:
        """JSON-friendly description.

        Examples
        --------
        >>> _example().summary()["surveys"]
        ['2021', '2022']
        """
        base = self.base.summary()
        return {"n_sites": self.n_sites, "n_species": self.n_species,
                "n_surveys": self.n_surveys, "surveys": self.surveys,
                "times": [float(v) for v in self.times.to_numpy()],
                "time_unit": self.time_unit,
                "environment_columns": [] if self.environment is None
                else [str(c) for c in self.environment.columns],
                "crs": base["crs"], "distance_unit": base["distance_unit"],
                "extent": base["extent"], "spacing": base["spacing"],
                "dropped": {k: list(vals) for k, vals in self.dropped.items()},
                "sources": dict(self.sources)}

    def describe(self) -> str:
        """Multi-line text description.

        Examples
        --------
        >>> print(_example().describe().splitlines()[0])
        repeated survey: 6 sites x 2 surveys (2021, 2022), 2 species
        """
        s = self.summary()
        lines = [f"repeated survey: {s['n_sites']} sites x {s['n_surveys']} surveys "
                 f"({', '.join(s['surveys'])}), {s['n_species']} species"]
        unit = "" if self.time_unit == "as given" else f" {self.time_unit}s"
        lines.append("times: " + ", ".join(f"{k} = {v:g}{unit}"
                                             for k, v in self.times.items()))
        for role, src in self.sources.items():
            lines.append(f"  {role} source: {src}")
        if s["environment_columns"]:
            lines.append(f"environment: {T.listed(s['environment_columns'], 8)}")
        lines.append(f"coordinates: working CRS {s['crs']}; distances in {s['distance_unit']}")
        for key, vals in self.dropped.items():
            if vals:
                lines.append(f"dropped {key}: {T.listed(vals)}")
        return "\n".join(lines)

    @classmethod
    def from_frames(cls, sites: pd.DataFrame, species: pd.DataFrame,
                    environment: pd.DataFrame | None = None, *, site_id: str | None = None,
                    time_column: str | None = None, x: str | None = None, y: str | None = None,
                    crs: Any = None, local_unit: str | None = None,
                    incomplete_sites: str = "error") -> RepeatedSurvey:
        """Build a repeated survey from in-memory tables (species/environment in long form).

        Parameters
        ----------
        sites : (Geo)DataFrame
            As for :meth:`spatial_ev.input.survey.Survey.from_frames`.
        species, environment : DataFrame
            Long form: a site-id column (``site_id``, else the first column) and a time column
            (``time_column``, else a recognised name: time, year, date, survey, ...).
        site_id, time_column, x, y, crs, local_unit, incomplete_sites
            As in :func:`read_repeated_survey`.

        Examples
        --------
        >>> _example().n_surveys
        2
        """
        incomplete_sites = check_option("incomplete_sites", incomplete_sites, INCOMPLETE_SITES)
        base = Survey.from_frames(sites, site_id=site_id, x=x, y=y, crs=crs,
                                  local_unit=local_unit)
        tables = {}
        for role, frame in (("species", species), ("environment", environment)):
            if frame is None:
                continue
            if not isinstance(frame, pd.DataFrame):
                raise InputError(f"`{role}` must be a DataFrame in long form; got "
                                 f"{type(frame).__name__}")
            frame = frame.reset_index() if frame.index.name is not None else frame
            tables[role] = _long_table(frame, role, f"in-memory {role} frame", site_id,
                                       time_column, from_file=False)
        return _assemble(base, tables, incomplete_sites, ".")


def _example() -> RepeatedSurvey:
    sites = pd.DataFrame({"x": [0.0, 10, 20, 0, 10, 20], "y": [0.0, 0, 0, 10, 10, 10]},
                         index=pd.Index(list("abcdef"), name="site"))
    species = pd.DataFrame({"site": list("abcdef") * 2, "year": [2021] * 6 + [2022] * 6,
                            "sp1": [1, 2, 3, 4, 5, 6] * 2, "sp2": [3, 0, 1, 1, 2, 5] * 2})
    return RepeatedSurvey.from_frames(sites, species, local_unit="metre")


# ----------------------------------------------------------------------------- reading

def _find_time_column(data: pd.DataFrame, time_column: str | None, role: str,
                      source: str) -> str:
    if time_column is not None:
        if time_column not in data.columns:
            raise InputError(f"{role} {source}: no time column {time_column!r}; its columns are "
                             f"{T.listed(data.columns)}; pass the right time_column "
                             f"(--time-column)")
        return time_column
    lower = {str(c).strip().lower(): c for c in data.columns}
    for name in TIME_NAMES:
        if name in lower:
            return lower[name]
    raise InputError(f"{role} {source}: no time column found among {T.listed(data.columns)} "
                     f"(recognised names: {', '.join(TIME_NAMES)}); pass time_column= "
                     f"(--time-column COL), or give one table per survey with their times")


def _parse_times(raw: pd.Series, where, ids: pd.Series, role: str, source: str, column: str
                 ) -> tuple[np.ndarray, np.ndarray, str]:
    """(labels, numeric times, unit) of raw time cells; errors name the line and site."""
    numbers, missing, bad = parse_numeric(raw)
    text = raw.astype(object).where(raw.notna(), "").astype(str).str.strip()
    if missing.any():
        i = int(np.flatnonzero(missing)[0])
        raise InputError(f"{role} {source}: time column {column!r} is empty at {where(i)} "
                         f"(site {ids.iloc[i]!r}); every row needs its survey time")
    if not bad.any():
        if not np.isfinite(numbers).all():
            i = int(np.flatnonzero(~np.isfinite(numbers))[0])
            raise InputError(f"{role} {source}: time column {column!r} holds {text.iloc[i]!r} at "
                             f"{where(i)} (site {ids.iloc[i]!r}); times must be finite")
        distinct, inverse = np.unique(numbers, return_inverse=True)
        labels = np.array([f"{v:g}" for v in distinct], dtype=object)[inverse]  # per survey
        return labels, numbers, "as given"
    dates = pd.to_datetime(text, errors="coerce", format="mixed")
    failed = dates.isna().to_numpy()
    if failed.any():
        i = int(np.flatnonzero(failed)[0])
        raise InputError(f"{role} {source}: time column {column!r} holds {text.iloc[i]!r} at "
                         f"{where(i)} (site {ids.iloc[i]!r}), which is neither a number nor a "
                         f"date ({int(failed.sum())} such cell(s)); write times as numbers "
                         f"(e.g. 2024) or dates (e.g. 2024-05-17)")
    first = dates.min()
    days = ((dates - first) / pd.Timedelta(days=1)).to_numpy(dtype=np.float64)
    labels = dates.dt.strftime("%Y-%m-%d").to_numpy(dtype=object)
    if (dates.dt.normalize() != dates).any():
        labels = dates.dt.strftime("%Y-%m-%dT%H:%M").to_numpy(dtype=object)
    return labels, days, "day"


@dataclass
class _LongTable:
    role: str
    source: str
    raw: T.RawTable          # ids + data (time column removed), one row per site and survey
    labels: np.ndarray       # survey label of each row
    times: np.ndarray        # numeric time of each row
    unit: str
    sources: list


def _long_table(frame: pd.DataFrame, role: str, source: str, site_id, time_column,
                *, from_file: bool, lines=None) -> _LongTable:
    id_name, ids, data = T.split_ids(frame, role=role, source=source, site_id=site_id)
    raw = T.RawTable(role, source, id_name, ids, data, from_file=from_file,
                     extra={"csv": lines is not None, "lines": lines})
    column = _find_time_column(data, time_column, role, source)
    labels, times, unit = _parse_times(data[column].reset_index(drop=True), raw.where, ids,
                                       role, source, str(column))
    raw.data = data.drop(columns=column).reset_index(drop=True)
    return _LongTable(role, source, raw, labels, times, unit, [source])


def _read_long(path, role: str, site_id, time_column, opts: dict) -> _LongTable:
    kind = file_format(path, role=role)
    source = f"file {str(path)!r}"
    if kind == "csv":
        frame = read_csv_table(path, role=role, delimiter=opts["delimiter"],
                               decimal=opts["decimal"], id_column=site_id,
                               encoding=opts["encoding"])
        lines = frame.attrs.get("lines")
        if lines is None:
            lines = np.arange(len(frame)) + 2
        return _long_table(frame, role, source, site_id, time_column, from_file=True,
                           lines=np.asarray(lines))
    frame = read_vector(path, role=role)
    if isinstance(frame, gpd.GeoDataFrame):
        frame = pd.DataFrame(frame.drop(columns=frame.geometry.name))
    return _long_table(frame, role, source, site_id, time_column, from_file=True)


def _read_per_survey(paths: Sequence, times: Sequence, site_id, opts: dict) -> _LongTable:
    """One species table per survey, stacked into a long table."""
    if isinstance(times, (str, bytes)) or not isinstance(times, Sequence) or \
            len(times) != len(paths):
        raise InputError(f"give one time per species table: {len(paths)} table(s) and times "
                         f"{times!r} (command line: --times T1 T2 ... in the order of the "
                         f"--species files)")
    raw_times = pd.Series([str(t) for t in times], dtype=object)
    labels, numbers, unit = _parse_times(raw_times, lambda i: f"position {i + 1}",
                                         pd.Series([str(p) for p in paths]), "times",
                                         "(given with the species tables)", "times")
    frames, columns = [], None
    id_name = None
    for path, label in zip(paths, labels):
        kind = file_format(path, role="species")
        source = f"file {str(path)!r} (survey {label})"
        if kind == "csv":
            frame = read_csv_table(path, role="species", delimiter=opts["delimiter"],
                                   decimal=opts["decimal"], id_column=site_id,
                                   encoding=opts["encoding"])
            lines = np.asarray(frame.attrs.get("lines", np.arange(len(frame)) + 2))
        else:
            frame = read_vector(path, role="species")
            if isinstance(frame, gpd.GeoDataFrame):
                frame = pd.DataFrame(frame.drop(columns=frame.geometry.name))
            lines = None
        name, ids, data = T.split_ids(frame, role="species", source=source, site_id=site_id)
        raw = T.RawTable("species", source, name, ids, data,
                         extra={"csv": lines is not None, "lines": lines})
        T.check_ids(raw)
        # values checked file by file, so that a bad cell is reported with its file and line
        labels_here = pd.Index(ids.astype(str).to_numpy(dtype=object) + f" in survey {label}",
                               dtype=object)
        data = T.species_matrix(raw, np.arange(len(ids)), labels_here, opts["decimal"])
        data = data.reset_index(drop=True).rename_axis(columns=None)
        if columns is None:
            columns, id_name, first = list(data.columns), name, source
        elif list(data.columns) != columns:
            only_here = [c for c in data.columns if c not in columns]
            only_first = [c for c in columns if c not in data.columns]
            if only_here or only_first:
                raise InputError(
                    f"species {source} and {first} list different species: only in this table "
                    f"{T.listed(only_here) or 'none'}, only in the first "
                    f"{T.listed(only_first) or 'none'}; every survey table needs the same "
                    f"species columns (add absent species as columns of zeros)")
            data = data[columns]
        ids, data = ids.copy(), data.copy()
        ids.attrs, data.attrs = {}, {}      # per-file line numbers do not survive stacking
        frames.append((ids, data, label, lines))
    ids = pd.concat([f[0] for f in frames], ignore_index=True)
    data = pd.concat([f[1] for f in frames], ignore_index=True)
    row_labels = np.concatenate([np.full(len(f[0]), f[2], dtype=object) for f in frames])
    row_times = np.concatenate([np.full(len(f[0]), numbers[k]) for k, f in enumerate(frames)])
    source = "files " + ", ".join(repr(str(p)) for p in paths)
    raw = T.RawTable("species", source, id_name, ids, data, from_file=False)
    return _LongTable("species", source, raw, row_labels, row_times, unit,
                      [str(p) for p in paths])


# ---------------------------------------------------------------------------- assembly

def _row_place(table: _LongTable, r: int) -> str:
    return table.raw.where(r) if table.raw.extra.get("csv") else f"row {r + 1}"


def _check_layout(table: _LongTable, site_keys: pd.Index, site_source: str
                  ) -> tuple[np.ndarray, pd.Index]:
    """Site positions of the rows; raises on unknown sites and duplicated site–time rows."""
    keys = T.id_keys(table.raw.ids)
    empty = np.flatnonzero(keys == "")
    if len(empty):
        raise InputError(f"{table.role} {table.source}: site-id column {table.raw.id_name!r} is "
                         f"empty at {_row_place(table, int(empty[0]))}; every row needs a site id")
    position = site_keys.get_indexer(keys)
    unknown = np.flatnonzero(position < 0)
    if len(unknown):
        names = pd.unique(keys[unknown])
        raise InputError(f"{table.role} {table.source}: {len(names)} site id(s) are not in the "
                         f"sites table {site_source}: {T.listed(names)} (first at "
                         f"{_row_place(table, int(unknown[0]))}); every row must name a site of "
                         f"the site table")
    pair = pd.MultiIndex.from_arrays([table.labels, keys])
    dup = pair.duplicated(keep=False)
    if dup.any():
        rows = np.flatnonzero(dup)
        first = pair[rows[0]]
        places = [_row_place(table, int(r)) for r in rows if pair[r] == first]
        raise InputError(f"{table.role} {table.source}: site {first[1]!r} appears more than once "
                         f"in survey {first[0]} ({', '.join(places)}); "
                         f"{int(dup.sum())} duplicated site-time row(s) in all; give one row per "
                         f"site and survey")
    return position, pair


def _survey_order(tables: dict) -> tuple[pd.Series, str]:
    sp = tables["species"]
    frame = pd.DataFrame({"label": sp.labels, "time": sp.times}).drop_duplicates("label")
    if frame["time"].duplicated().any():
        raise InputError(f"species {sp.source}: two survey labels share one time; write each "
                         f"survey's time one way")
    frame = frame.sort_values("time", kind="stable")
    times = pd.Series(frame["time"].to_numpy(dtype=np.float64),
                      index=pd.Index(frame["label"].astype(str).tolist(), name="survey"),
                      name="time")
    if len(times) < 2:
        raise InputError(f"species {sp.source}: only one survey ({times.index[0]}); a repeated "
                         f"survey needs at least 2 surveys")
    return times, sp.unit


def _presence(tables: dict, times: pd.Series, base: Survey, incomplete: str,
              positions: dict) -> np.ndarray:
    """Boolean mask of the base sites kept (present in every survey of every table)."""
    s = base.n_sites
    keep = np.ones(s, dtype=bool)
    problems = []
    for role, table in tables.items():
        present = np.zeros((len(times), s), dtype=bool)
        survey_pos = times.index.get_indexer(table.labels.astype(str))
        if (survey_pos < 0).any():
            i = int(np.flatnonzero(survey_pos < 0)[0])
            raise InputError(f"{role} {table.source}: survey {table.labels[i]} "
                             f"({_row_place(table, i)}) is not a survey of the species table "
                             f"(surveys: {', '.join(times.index)})")
        present[survey_pos, positions[role]] = True
        missing = ~present
        if missing.any():
            keep &= ~missing.any(axis=0)
            for j in np.flatnonzero(missing.any(axis=0))[:T.MAX_LISTED]:
                where = [times.index[k] for k in np.flatnonzero(missing[:, j])]
                problems.append(f"{base.site_ids[j]!r} (missing from {role} survey(s) "
                                f"{', '.join(where)})")
            n_missing = int(missing.any(axis=0).sum())
            if incomplete == "error":
                more = f" and {n_missing - T.MAX_LISTED} more" if n_missing > T.MAX_LISTED else ""
                raise InputError(f"{role} {table.source}: {n_missing} site(s) of the site table "
                                 f"are not in every survey: {'; '.join(problems)}{more}; add "
                                 f"their rows, or keep only the sites present in every survey "
                                 f"(incomplete_sites='keep_complete')")
    return keep


def _assemble(base: Survey, tables: dict, incomplete: str, decimal: str) -> RepeatedSurvey:
    site_keys = T.id_keys(pd.Series(base.site_ids, dtype=object))
    positions, pairs = {}, {}
    for role, table in tables.items():
        positions[role], pairs[role] = _check_layout(table, site_keys, base.sources["sites"])
    times, unit = _survey_order(tables)
    keep = _presence(tables, times, base, incomplete, positions)
    dropped: dict[str, list] = {"sites": [], "species": [], "variables": []}
    if not keep.all():
        gone = [T._plain(v) for v in base.site_ids[~keep]]
        dropped["sites"] = gone
        if keep.sum() < MIN_SITES:
            raise InputError(f"only {int(keep.sum())} site(s) are present in every survey; at "
                             f"least {MIN_SITES} are needed")
        warnings.warn(f"kept the {int(keep.sum())} sites present in every survey; dropped "
                      f"{len(gone)}: {T.listed(gone)}", DroppedSitesWarning, stacklevel=3)
        base = replace(base, sites=base.sites[keep], coords=base.coords[keep])
    sites = base.site_ids
    kept_keys = site_keys[keep]
    target = pd.MultiIndex.from_product([times.index, kept_keys])
    index = pd.MultiIndex.from_product([times.index, sites], names=["survey", sites.name])
    sp = tables["species"]
    order = pairs["species"].get_indexer(target)
    site_text = sites.astype(str).to_numpy(dtype=object)
    labels = pd.Index(np.tile(site_text, len(times)) + " in survey "
                      + np.repeat(times.index.to_numpy(dtype=object), len(sites)), dtype=object)
    species = T.species_matrix(sp.raw, order, labels, decimal).set_axis(index, axis=0)
    species.columns.name = "species"
    totals = species.sum(axis=0)
    absent = totals.index[totals.to_numpy() == 0]
    if len(absent):
        dropped["species"] = [str(c) for c in absent]
        warnings.warn(f"species {sp.source}: dropped {len(absent)} species never present in any "
                      f"survey: {T.listed(absent)}", DroppedSpeciesWarning, stacklevel=3)
        species = species.drop(columns=absent)
    if species.shape[1] == 0:
        raise InputError(f"species {sp.source}: no species is present in any survey")
    empty = np.flatnonzero(species.sum(axis=1).to_numpy() == 0)
    if len(empty):
        names = [f"{index[i][1]!r} in survey {index[i][0]}" for i in empty]
        raise InputError(f"species {sp.source}: {len(empty)} site-survey(s) have no species at "
                         f"all (all zero): {', '.join(names[:T.MAX_LISTED])}; the Hellinger and "
                         f"chord transformations divide by each row's total; delete these "
                         f"rows and keep only the complete sites "
                         f"(incomplete_sites='keep_complete')")
    environment = None
    if "environment" in tables:
        env = tables["environment"]
        order = pairs["environment"].get_indexer(target)
        environment = _environment(env, order, labels, index, decimal, dropped)
    sources = {"sites": base.sources["sites"], "species": ", ".join(sp.sources)}
    if "environment" in tables:
        sources["environment"] = ", ".join(tables["environment"].sources)
    return RepeatedSurvey(base=base, species=species, environment=environment, times=times,
                          time_unit=unit, sources=sources, dropped=dropped)


def _environment(env: _LongTable, order, labels, index, decimal, dropped) -> pd.DataFrame:
    cols = T.environment_columns(env.raw, order, labels, decimal)
    missing_num = cols.numeric.isna().to_numpy()
    missing_cat = cols.categorical.isna().to_numpy()
    for mask, frame in ((missing_num, cols.numeric), (missing_cat, cols.categorical)):
        if mask.any():
            i, j = np.argwhere(mask)[0]
            raise InputError(f"environment {env.source}: column {frame.columns[j]!r} is empty "
                             f"for site {labels[i]} ({_row_place(env, int(order[i]))}; "
                             f"{int(mask.sum())} empty cell(s)); fill every value")
    out: dict[str, np.ndarray] = {}
    constant = []
    for col in cols.order:
        if col in cols.numeric.columns:
            values = cols.numeric[col].to_numpy()
            if np.ptp(values) == 0:
                constant.append(str(col))
            else:
                out[str(col)] = values
            continue
        values = cols.categorical[col].to_numpy()
        levels = sorted(pd.unique(values))
        if len(levels) == 1:
            constant.append(str(col))
        for level in levels[1:]:
            out[f"{col}[{level}]"] = (values == level).astype(np.float64)
    if constant:
        dropped["variables"] = constant
        warnings.warn(f"environment {env.source}: dropped {len(constant)} constant column(s): "
                      f"{T.listed(constant)}", DroppedVariablesWarning, stacklevel=4)
    if not out:
        raise InputError(f"environment {env.source}: no variable varies across sites and surveys")
    frame = pd.DataFrame(out, index=index, dtype=np.float64)
    frame.columns.name = "variable"
    return frame


def read_repeated_survey(sites: str | os.PathLike,
                         species: str | os.PathLike | Sequence[str | os.PathLike],
                         environment: str | os.PathLike | None = None, *,
                         times: Sequence[Any] | None = None, time_column: str | None = None,
                         site_id: str | None = None, x: str | None = None, y: str | None = None,
                         crs: Any = None, local_unit: str | None = None,
                         delimiter: str | None = None, decimal: str = ".",
                         encoding: str | None = None, layer: str | int | None = None,
                         incomplete_sites: str = "error",
                         shared_coordinates: str = "error") -> RepeatedSurvey:
    """Read and validate a repeated survey.

    Parameters
    ----------
    sites : path
        Site table (one row per site), read as by :func:`~spatial_ev.input.survey.read_survey`.
    species : path or list of paths
        One long-form table (site id, time, species...) or one table per survey (site id,
        species...) with ``times``.
    environment : path, optional
        Long-form environment table (site id, time, variables...); numeric columns stay
        numeric, text columns become indicator columns (first level, sorted, as reference).
    times : list, optional
        The time of each species table when ``species`` is a list (numbers or dates).
    time_column : str, optional
        Time column of the long-form tables; default a recognised name (time, year, date,
        survey, season, campaign, visit).
    site_id, x, y, crs, local_unit, delimiter, decimal, encoding, layer, shared_coordinates
        As in :func:`~spatial_ev.input.survey.read_survey`.
    incomplete_sites : {"error", "keep_complete"}
        Sites missing from some surveys: raise with their list (default), or keep only the
        sites present in every survey (:class:`~spatial_ev.errors.DroppedSitesWarning`).

    Returns
    -------
    RepeatedSurvey

    Examples
    --------
    >>> r = read_repeated_survey("data_demo/resurvey/sites.gpkg",
    ...                          "data_demo/resurvey/species.csv")  # doctest: +SKIP
    >>> r.surveys  # doctest: +SKIP
    ['2022', '2023', '2024']
    """
    incomplete_sites = check_option("incomplete_sites", incomplete_sites, INCOMPLETE_SITES)
    opts = {"delimiter": delimiter, "decimal": decimal, "encoding": encoding}
    per_survey = not isinstance(species, (str, os.PathLike))
    if per_survey:
        paths = list(species)
        if len(paths) < 2:
            raise InputError(f"a list of species tables needs at least 2 (one per survey); got "
                             f"{len(paths)}; for one long-form table pass its path alone")
        if time_column is not None:
            raise InputError("`time_column` applies to a long-form species table; with one "
                             "table per survey give `times`")
    elif times is not None:
        raise InputError("`times` applies to a list of species tables (one per survey); a "
                         "long-form table holds its own time column (time_column=)")
    for role, path in [("sites", sites), ("environment", environment)] + \
            [("species", p) for p in (paths if per_survey else [species])]:
        if path is not None:
            file_format(path, role=role)
    base = read_survey(sites, site_id=site_id, x=x, y=y, crs=crs, local_unit=local_unit,
                       delimiter=delimiter, decimal=decimal, encoding=encoding, layer=layer,
                       shared_coordinates=shared_coordinates)
    tables = {"species": _read_per_survey(paths, times, site_id, opts) if per_survey
              else _read_long(species, "species", site_id, time_column, opts)}
    if environment is not None:
        tables["environment"] = _read_long(environment, "environment", site_id, time_column,
                                           opts)
    return _assemble(base, tables, incomplete_sites, decimal)
