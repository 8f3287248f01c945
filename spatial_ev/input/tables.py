"""Private helpers of :mod:`spatial_ev.input.survey`: site ids, alignment and table validation.

Each helper takes a :class:`RawTable` (values as read, one row per record, with the site ids
kept apart) and either returns clean float64 data or raises
:class:`~spatial_ev.errors.InputError` naming the file, column, line and site.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from spatial_ev.errors import InputError
from spatial_ev.input.io import numeric_hint, parse_numeric

_INTEGRAL = re.compile(r"[+-]?\d+(?:\.0*)?")
_CANONICAL_INT = re.compile(r"[+-]?(?:0|[1-9]\d*)(?:\.0*)?")
MAX_LISTED = 10
# recognised coordinate column pairs (x, y), lower case
COORD_NAMES = [("x", "y"), ("easting", "northing"), ("east", "north"), ("utm_x", "utm_y"),
               ("utm_e", "utm_n"), ("x_coord", "y_coord"), ("xcoord", "ycoord"),
               ("lon", "lat"), ("long", "lat"), ("lng", "lat"), ("longitude", "latitude")]


@dataclass
class RawTable:
    """A table as read: ``ids`` (raw site ids), ``data`` (other columns, raw values)."""

    role: str
    source: str
    id_name: str
    ids: pd.Series
    data: pd.DataFrame
    from_file: bool = True
    crs: object = None
    extra: dict = field(default_factory=dict)

    def where(self, position: int) -> str:
        """Location of a record for messages: file line (CSV) or row number (frames)."""
        if self.from_file and self.extra.get("csv", False):
            lines = self.extra.get("lines")  # file lines of the records (empty rows skipped)
            return f"line {int(lines[position]) if lines is not None else position + 2}"
        return f"row {position + 1}"


def listed(items, limit: int = MAX_LISTED) -> str:
    """``'A', 'B', ... (and 3 more)`` for messages."""
    items = list(items)
    text = ", ".join(repr(_plain(i)) for i in items[:limit])
    return text + (f" (and {len(items) - limit} more)" if len(items) > limit else "")


def _plain(value):
    return value.item() if isinstance(value, np.generic) else value


def split_ids(frame: pd.DataFrame, *, role: str, source: str, site_id: str | None,
              use_index: bool = False) -> tuple[str, pd.Series, pd.DataFrame]:
    """Pick the site-id column (``site_id`` or the first column) and split it off."""
    if isinstance(frame.columns, pd.MultiIndex):
        raise InputError(f"{role} {source} has multi-level column names (e.g. "
                         f"{frame.columns[0]!r}); flatten them to one level, e.g. "
                         f"frame.columns = ['_'.join(map(str, c)) for c in frame.columns]")
    if site_id is not None:
        if site_id in frame.columns:
            return site_id, frame[site_id].reset_index(drop=True), frame.drop(columns=site_id)
        if use_index and frame.index.name == site_id:
            return site_id, pd.Series(frame.index, dtype=frame.index.dtype), \
                frame.reset_index(drop=True)
        raise InputError(f"{role} {source}: no site-id column {site_id!r}; its columns are "
                         f"{listed(frame.columns)}; pass the right site_id (--site-id)")
    if use_index:
        name = frame.index.name if frame.index.name is not None else "site"
        return str(name), pd.Series(frame.index, dtype=frame.index.dtype), \
            frame.reset_index(drop=True)
    if frame.shape[1] == 0:
        raise InputError(f"{role} {source} has no columns to take site ids from")
    first = frame.columns[0]
    return str(first), frame[first].reset_index(drop=True), frame.drop(columns=first)


def id_keys(ids: pd.Series) -> pd.Index:
    """Matching keys of site ids: text, with integral numbers written one way (1, 1.0, 01 → 1)."""
    text = ids.astype(object).where(ids.notna(), "").astype(str).str.strip()
    integral = text.str.fullmatch(_INTEGRAL.pattern)
    if integral.any():
        norm = (text[integral].str.replace(r"\.0*$", "", regex=True)
                .str.replace(r"^\+", "", regex=True)
                .str.replace(r"^(-?)0+(?=\d)", r"\1", regex=True)
                .str.replace(r"^-0$", "0", regex=True))
        text = text.where(~integral, norm)
    return pd.Index(text.to_numpy(dtype=object), dtype=object)


def final_index(ids: pd.Series, name: str) -> pd.Index:
    """The survey's index from the site table's ids: integers when that is lossless."""
    if pd.api.types.is_integer_dtype(ids.dtype):
        return pd.Index(ids.to_numpy(dtype=np.int64), name=name)
    if pd.api.types.is_float_dtype(ids.dtype):
        values = ids.to_numpy(dtype=float)
        if np.all(np.isfinite(values) & (values == np.round(values))):
            return pd.Index(values.astype(np.int64), name=name)
    text = ids.astype(object).astype(str).str.strip()
    if len(text) and text.str.fullmatch(_CANONICAL_INT.pattern).all():
        as_int = text.str.replace(r"\.0*$", "", regex=True)
        if (as_int.str.len() < 19).all():
            return pd.Index(as_int.astype(np.int64).to_numpy(), name=name)
    return pd.Index(text.tolist(), name=name)


def check_ids(table: RawTable) -> pd.Index:
    """Keys of a table's ids; raises on missing or duplicated ids."""
    keys = id_keys(table.ids)
    empty = np.flatnonzero(keys == "")
    if len(empty):
        raise InputError(f"{table.role} {table.source}: site-id column {table.id_name!r} is "
                         f"empty at {table.where(int(empty[0]))}"
                         f"{f' and {len(empty) - 1} other rows' if len(empty) > 1 else ''}; "
                         f"every row needs a site id")
    dup = keys.duplicated(keep=False)
    if dup.any():
        dup_keys = pd.unique(keys[dup])
        first = dup_keys[0]
        rows = [table.where(i) for i in np.flatnonzero(keys == first)]
        raise InputError(f"{table.role} {table.source}: duplicate site id(s) {listed(dup_keys)} "
                         f"in column {table.id_name!r} (e.g. {first!r} at {', '.join(rows)}); "
                         f"site ids must be unique (ids like 1 and 1.0 count as the same)")
    return keys


def align(table: RawTable, site_keys: pd.Index, sites_source: str) -> np.ndarray:
    """Positions of the site table's ids in ``table``; raises on ids that match no site,
    duplicated ids, or ids missing on either side."""
    keys = id_keys(table.ids)
    if keys.isin(site_keys).any():
        keys = check_ids(table)
    order = keys.get_indexer(site_keys) if keys.is_unique else np.full(len(site_keys), -1)
    missing = site_keys[order < 0]
    extra = keys[~keys.isin(site_keys)]
    if len(missing) == 0 and len(extra) == 0:
        return order
    column_keys = id_keys(pd.Series(list(table.data.columns), dtype=object))
    if len(site_keys) and column_keys.isin(site_keys).sum() >= 0.8 * len(site_keys):
        raise InputError(f"{table.role} {table.source} appears transposed: its column names are "
                         f"site ids; put one row per site and one column per "
                         f"{'species' if table.role == 'species' else 'variable'}, with the "
                         f"site ids in the first column")
    if not keys.isin(site_keys).any():
        parts = [f"none of its ids (column {table.id_name!r}, e.g. {keys[0]!r}) matches a site "
                 f"id of the sites table {sites_source} (e.g. {site_keys[0]!r}); is "
                 f"{table.id_name!r} the site-id column? Put the ids in the first column or "
                 f"pass site_id= (--site-id)"]
    else:
        parts = []
        if len(missing):
            parts.append(f"{len(missing)} site(s) of the sites table {sites_source} are "
                         f"missing from it: {listed(missing)}")
        if len(extra):
            parts.append(f"{len(extra)} of its site id(s) are not in the sites table: "
                         f"{listed(extra)}")
        if len(missing) and pd.Index(missing.str.lower()).isin(extra.str.lower()).any():
            parts.append("some ids differ only in upper/lower case; ids are matched exactly")
    raise InputError(f"{table.role} {table.source}: {'; '.join(parts)}; every table needs "
                     f"exactly one row per site with the same ids (column {table.id_name!r})")


def species_matrix(table: RawTable, order: np.ndarray, index: pd.Index,
                   decimal: str) -> pd.DataFrame:
    """Validated species values (float64 ≥ 0, finite, no missing cells), in site order.

    ``order`` holds the table's row of each site (from :func:`align`); ``index`` the site ids.
    All cells are parsed at once; the first offending cell (by column, then row) is reported.
    """
    data = table.data.iloc[order].reset_index(drop=True)
    n, k = data.shape
    if k == 0:
        raise InputError(f"species {table.source} has no species columns besides the site ids")
    lower = {str(c).strip().lower(): c for c in data.columns}
    pair = next(((lower[a], lower[b]) for a, b in COORD_NAMES if a in lower and b in lower), None)
    if pair is not None:
        raise InputError(f"species {table.source} has coordinate columns {pair[0]!r}/{pair[1]!r}; "
                         f"is it the site table? The species table holds site ids and one "
                         f"column per species (command line: --sites for the site table, "
                         f"--species for the species table)")
    if all(pd.api.types.is_numeric_dtype(t) and not pd.api.types.is_complex_dtype(t)
           for t in data.dtypes):  # nullable integer / float types: missing cells become NaN
        cells = pd.Series(data.to_numpy(dtype=np.float64, na_value=np.nan).ravel(order="F"))
    else:
        cells = pd.Series(data.to_numpy(dtype=object).ravel(order="F"), dtype=object)
    numbers, missing, bad = (a.reshape(k, n).T for a in parse_numeric(cells, decimal=decimal))
    rule = "species values must be counts, cover or 0/1"
    if bad.any():
        i, j = _first_cell(bad)
        col = data.columns[j]
        raw = data[col].astype(str).to_numpy()[bad[:, j]].tolist()
        raise InputError(f"species {table.source}: column {col!r} {table.where(int(order[i]))} "
                         f"(site {index[i]!r}) holds {raw[0]!r}, which is not a number "
                         f"({int(bad.sum())} such cell(s) in the table)"
                         f"{numeric_hint(raw, decimal)}; {rule}")
    with np.errstate(invalid="ignore"):
        checks = ((missing, "is empty or missing", "write 0 where the species was absent"),
                  (np.isinf(numbers), "is infinite", rule),
                  (numbers < 0, "is negative", rule))
    for mask, what, fix in checks:
        if mask.any():
            i, j = _first_cell(mask)
            raise InputError(f"species {table.source}: column {data.columns[j]!r} "
                             f"{table.where(int(order[i]))} (site {index[i]!r}) {what} "
                             f"({float(numbers[i, j])!r}; {int(mask.sum())} such cell(s) in the "
                             f"table); {fix}")
    return pd.DataFrame(numbers, index=index, columns=pd.Index(list(data.columns),
                                                               name="species"))


def _first_cell(mask: np.ndarray) -> tuple[int, int]:
    """Row and column of the first True cell, scanning column by column."""
    j = int(np.flatnonzero(mask.any(axis=0))[0])
    return int(np.flatnonzero(mask[:, j])[0]), j


@dataclass
class EnvironmentColumns:
    """Environment split into numeric values and categorical labels (missing = NaN / None)."""

    numeric: pd.DataFrame
    categorical: pd.DataFrame
    order: list


def environment_columns(table: RawTable, order: np.ndarray, index: pd.Index,
                        decimal: str) -> EnvironmentColumns:
    """Classify environment columns as numeric or categorical; reject malformed numbers."""
    data = table.data.iloc[order].reset_index(drop=True)
    if data.shape[1] == 0:
        raise InputError(f"environment {table.source} has no variables besides the site ids")
    numeric, categorical = {}, {}
    for col in data.columns:
        numbers, missing, bad = parse_numeric(data[col], decimal=decimal)
        if missing.all():
            raise InputError(f"environment {table.source}: column {col!r} has no values; "
                             f"remove it")
        if not bad.any():
            inf = np.isinf(numbers)
            if inf.any():
                i = int(np.flatnonzero(inf)[0])
                raise InputError(f"environment {table.source}: column {col!r} "
                                 f"{table.where(int(order[i]))} (site {index[i]!r}) is infinite; "
                                 f"environmental values must be finite")
            numeric[col] = numbers
            continue
        raw = data[col].astype(str).to_numpy()
        hint = numeric_hint(raw[bad].tolist(), decimal)
        parsed = int((~bad & ~missing).sum())
        if hint or parsed >= 0.5 * int((~missing).sum()):
            i = int(np.flatnonzero(bad)[0])
            raise InputError(f"environment {table.source}: column {col!r} looks numeric but "
                             f"{table.where(int(order[i]))} (site {index[i]!r}) holds {raw[i]!r} "
                             f"({int(bad.sum())} such cell(s)){hint or ''}; fix the value, or "
                             f"write the column as text labels if it is a category")
        labels = pd.Series(raw, dtype=object).str.strip()
        categorical[col] = labels.where(~missing, None).to_numpy(dtype=object)
    return EnvironmentColumns(
        numeric=pd.DataFrame(numeric, index=index),
        categorical=pd.DataFrame(categorical, index=index, dtype=object),
        order=list(data.columns))
