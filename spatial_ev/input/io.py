"""Reading survey files: CSV tables and vector GIS layers (GeoPackage, GeoJSON, Shapefile).

Everything here returns raw tables; :mod:`spatial_ev.input.survey` decides what the values mean.
CSV cells are read as text (nothing is guessed by the parser) and converted by
:func:`parse_numeric`, so a decimal comma, a quoted number or a stray word is reported with its
file, column and line instead of silently turning a column into text. Every failure of the
underlying readers (pandas, pyogrio) is re-raised as :class:`~spatial_ev.errors.InputError`
naming the file.
"""

from __future__ import annotations

import codecs
import hashlib
import io as _stdio
import os
import re
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

from spatial_ev.errors import InputError

__all__ = ["file_format", "read_csv_table", "read_vector", "parse_numeric", "numeric_hint",
           "file_sha256", "CSV_SUFFIXES", "GIS_SUFFIXES"]


def file_sha256(path: str | os.PathLike) -> str:
    """SHA-256 of a file's bytes (hex), read in 1 MiB blocks; recorded for every input of a run.

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.NamedTemporaryFile(delete=False) as f:
    ...     _ = f.write(b"abc")
    >>> file_sha256(f.name)[:16]
    'ba7816bf8f01cfea'
    """
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()

CSV_SUFFIXES = {".csv": "CSV", ".txt": "CSV", ".tsv": "CSV (tab-separated)"}
GIS_SUFFIXES = {".gpkg": "GeoPackage", ".geojson": "GeoJSON", ".json": "GeoJSON",
                ".shp": "Shapefile"}
_MISSING = {"", "-", "na", "nan", "n/a", "null", "none", "#n/a"}
_NA_TOKENS = sorted({t for m in _MISSING for t in (m, m.upper(), m.capitalize())} | {"NaN"})
_DECIMAL_COMMA = re.compile(r"^[+-]?\d*,\d+(?:[eE][+-]?\d+)?$")
_THOUSANDS = re.compile(r"^[+-]?\d{1,3}(?:[,.' ]\d{3})+(?:[.,]\d+)?$")
_DMS = re.compile(r"\d\s*[°º]|\d\s*['′]\s*\d+(?:[.,]\d+)?\s*[\"″]")
_DECIMAL_POINT = re.compile(r"^[+-]?\d*\.\d+(?:[eE][+-]?\d+)?$")


def file_format(path: str | os.PathLike, *, role: str) -> str:
    """Check that a survey file exists and return its kind, ``"csv"`` or ``"gis"``.

    Parameters
    ----------
    path : path-like
        The file.
    role : str
        What the file is for ("sites", "species", "environment"), used in messages.

    Examples
    --------
    >>> file_format(__file__, role="sites")  # doctest: +IGNORE_EXCEPTION_DETAIL
    Traceback (most recent call last):
    InputError: sites file ... has an unknown format '.py'
    """
    p = Path(path)
    if not p.exists():
        raise InputError(f"{role} file {str(p)!r} does not exist; check the path")
    if p.is_dir():
        raise InputError(f"{role} file {str(p)!r} is a folder; give the file inside it")
    suffix = p.suffix.lower()
    if suffix in CSV_SUFFIXES:
        return "csv"
    if suffix in GIS_SUFFIXES:
        return "gis"
    known = ", ".join(sorted(set(CSV_SUFFIXES) | set(GIS_SUFFIXES)))
    shown = suffix or "(no extension)"
    hint = ""
    if suffix in {".xlsx", ".xls", ".xlsm", ".ods"}:
        hint = "; export the sheet as CSV (UTF-8) from the spreadsheet program"
    elif suffix == ".zip":
        hint = "; unpack the archive and give the .shp, .gpkg or .csv file inside"
    raise InputError(f"{role} file {str(p)!r} has an unknown format {shown!r}; supported: "
                     f"{known}{hint}")


def read_csv_table(path: str | os.PathLike, *, role: str, delimiter: str | None = None,
                   decimal: str = ".", id_column: str | None = None,
                   encoding: str | None = None) -> pd.DataFrame:
    """Read a CSV file with a checked header; numbers parsed by pandas' C parser.

    The header must name every column once. An empty first header cell (a table exported with
    row names) is named ``"site"``. The id column (``id_column``, else the first) is kept as
    text; a column holding only numbers (with the given decimal mark) becomes float/int;
    any other column stays text, with missing cells (empty, ``NA``, ``NaN``, ...) as NaN, so
    that :func:`parse_numeric` can report the offending cells. Rows keep their order; rows
    with every cell empty and unnamed columns with every cell empty (spreadsheet exports) are
    dropped, and ``DataFrame.attrs["lines"]`` holds the file line of each remaining row.
    Without ``delimiter`` each file's delimiter is taken from its header line: ``,`` (tab for
    ``.tsv``) unless the header holds none of it but ``;``, tab or ``|``. A ``decimal=","``
    does not apply to a comma-delimited file (its numbers cannot hold unquoted commas).
    Text is UTF-8 (with or without a byte-order mark) or UTF-16 with a mark; ``encoding``
    names the codec of a file that is neither (e.g. ``"cp1252"`` for older spreadsheet
    exports, ``"utf-16-le"`` without a mark), so UTF-8 files beside it are still read as such.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> f = pathlib.Path(tempfile.mkdtemp()) / "t.csv"
    >>> _ = f.write_text("site;depth\\nA;1,5\\n")
    >>> read_csv_table(f, role="environment", delimiter=";", decimal=",")["depth"].tolist()
    [1.5]
    """
    p = Path(path)
    given = delimiter
    _check_delimiter(delimiter, decimal, p)
    try:
        raw = p.read_bytes()
    except OSError as exc:
        raise InputError(f"{role} file {str(p)!r} cannot be read ({exc.strerror})") from None
    text = _decode(raw, p, role, encoding)
    if not text.strip():
        raise InputError(f"{role} file {str(p)!r} is empty; it needs a header row and one row "
                         f"per site")
    physical = text.splitlines(keepends=True)
    skipped = next(i for i, line in enumerate(physical) if line.strip())  # blank lines on top
    text = "".join(physical[skipped:])
    first_line = text.splitlines()[0]
    delimiter = given if given is not None else _sniff_delimiter(first_line, p)
    if decimal == delimiter:  # a detected ',' delimiter: unquoted decimal commas are impossible
        decimal = "."
    header = [str(h).strip() for h in _parse(text, p, role, delimiter, header=None, nrows=1,
                                             dtype=str, keep_default_na=False).iloc[0]]
    if len(header) == 1:
        others = [d for d in (",", ";", "\t", "|") if d != delimiter and d in first_line]
        if others:
            shown = "tab" if others[0] == "\t" else others[0]
            raise InputError(f"{role} file {str(p)!r} has a single column with delimiter "
                             f"{delimiter!r}, but its header contains {others[0]!r}; pass "
                             f"delimiter={others[0]!r} (command line: --delimiter '{shown}'), or "
                             f"leave the delimiter out to detect it in each file's header")
    # an unnamed first column holds row names (R) or an index (pandas): the site ids, unless
    # the id column is named elsewhere in the header, when it must be a mere row counter
    counter_column = header[0] == "" and (id_column or "site") in header[1:]
    if header[0] == "" and not counter_column:
        header[0] = "site"
    names = [f"c{i}" for i in range(len(header))]
    key = id_column if id_column in header else ("site" if counter_column else None)
    id_at = header.index(key) if key is not None else 0
    body = _parse(text, p, role, delimiter, header=0, names=names, index_col=False,
                  dtype={names[id_at]: str}, keep_default_na=False, na_values=_NA_TOKENS,
                  decimal=decimal, skip_blank_lines=False)
    # spreadsheet exports add empty rows and unnamed empty columns: dropping them is lossless
    lines = np.arange(len(body)) + 2 + skipped  # file line of each record
    filled = body.notna().any(axis=1).to_numpy()
    body, lines = body[filled], lines[filled]
    if counter_column:
        _check_row_counter(body[names[0]], p, role, id_column or "site")
        header[0] = ""  # dropped below with the other unnamed columns
    blank_unnamed = [n for i, (n, h) in enumerate(zip(names, header))
                     if h == "" and (body[n].isna().all() or (counter_column and i == 0))]
    if blank_unnamed:
        keep = [i for i, n in enumerate(names) if n not in blank_unnamed]
        body = body.drop(columns=blank_unnamed)
        header, names = [header[i] for i in keep], [names[i] for i in keep]
    unnamed = [i + 1 for i, h in enumerate(header) if h == ""]
    if unnamed:
        raise InputError(f"{role} file {str(p)!r}: column(s) {unnamed} have no name in the "
                         f"header; name every column")
    counts = pd.Series(header).value_counts()
    dupes = sorted(counts.index[counts > 1])
    if dupes:
        raise InputError(f"{role} file {str(p)!r}: column name(s) {dupes} appear more than "
                         f"once in the header; give every column a distinct name")
    if body.empty:
        raise InputError(f"{role} file {str(p)!r} has a header but no data rows")
    body = body.reset_index(drop=True)
    body.columns = pd.Index(header, dtype=object)
    body.attrs["lines"] = lines
    return body


def _sniff_delimiter(first_line: str, path: Path) -> str:
    """The default delimiter (tab for ``.tsv``, else ``,``) unless the header line holds none of
    it and holds ``;``, tab or ``|`` instead (the most frequent of them)."""
    default = "\t" if path.suffix.lower() == ".tsv" else ","
    if default in first_line:
        return default
    counts = {d: first_line.count(d) for d in (",", ";", "\t", "|") if d != default}
    best = max(counts, key=counts.get)
    return best if counts[best] > 0 else default


def _check_row_counter(values: pd.Series, path: Path, role: str, id_name: str) -> None:
    """An unnamed first column beside a named id column must be a row counter (0.. or 1..)."""
    text = values.astype(str).str.strip().tolist()
    n = len(text)
    if text in ([str(i) for i in range(n)], [str(i) for i in range(1, n + 1)]):
        return
    shown = ", ".join(repr(t) for t in text[:3])
    raise InputError(f"{role} file {str(path)!r}: the first column has no name and holds "
                     f"{shown}, ... while the site ids are in column {id_name!r}; name the "
                     f"first column in the header, or remove it")


def _parse(text: str, path: Path, role: str, delimiter: str, **kwargs) -> pd.DataFrame:
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error", pd.errors.ParserWarning)
            return pd.read_csv(_stdio.StringIO(text), sep=delimiter, engine="c", **kwargs)
    except pd.errors.ParserWarning:  # more fields in the rows than in the header
        raise InputError(f"{role} file {str(path)!r}: the rows have more fields than the header "
                         f"line with delimiter {delimiter!r}; remove any title or comment "
                         f"lines above the header, and name every column") from None
    except (pd.errors.ParserError, pd.errors.EmptyDataError, ValueError) as exc:
        msg = " ".join(str(exc).split())
        raise InputError(f"{role} file {str(path)!r} cannot be read as CSV with delimiter "
                         f"{delimiter!r}: {msg}; check the delimiter and that every row has "
                         f"as many fields as the header") from None


def read_vector(path: str | os.PathLike, *, role: str, layer: str | int | None = None):
    """Read one layer of a vector GIS file (GeoPackage, GeoJSON, Shapefile) with pyogrio.

    A file with several layers needs ``layer``. Returns a GeoDataFrame with the file's CRS
    (``None`` when the file declares none).

    Examples
    --------
    >>> read_vector("missing.gpkg", role="sites")  # doctest: +IGNORE_EXCEPTION_DETAIL
    Traceback (most recent call last):
    InputError: sites file 'missing.gpkg' cannot be read ...
    """
    import pyogrio

    p = Path(path)
    errors = (pyogrio.errors.DataSourceError, pyogrio.errors.DataLayerError,
              pyogrio.errors.FieldError, pyogrio.errors.GeometryError,
              pyogrio.errors.FeatureError, pyogrio.errors.CRSError, OSError, ValueError,
              RuntimeError, TypeError)
    try:
        layers = pyogrio.list_layers(p)
    except errors as exc:
        raise InputError(f"{role} file {str(p)!r} cannot be read as a GIS file "
                         f"({_one_line(exc)}); check that it is a valid "
                         f"{GIS_SUFFIXES.get(p.suffix.lower(), 'vector')} file") from None
    names = [str(n) for n in layers[:, 0]] if len(layers) else []
    if not names:
        raise InputError(f"{role} file {str(p)!r} contains no layers")
    if layer is None and len(names) > 1:
        raise InputError(f"{role} file {str(p)!r} has {len(names)} layers ({', '.join(names)}); "
                         f"choose one with layer= (command line: --layer NAME)")
    if layer is not None and not isinstance(layer, int) and str(layer) not in names:
        raise InputError(f"{role} file {str(p)!r} has no layer {layer!r}; its layers are "
                         f"{', '.join(names)}")
    try:
        gdf = pyogrio.read_dataframe(p, layer=layer)
    except errors as exc:
        raise InputError(f"{role} file {str(p)!r} cannot be read ({_one_line(exc)})") from None
    if len(gdf) == 0:
        raise InputError(f"{role} file {str(p)!r} has no features (empty layer)")
    return gdf


def parse_numeric(values: pd.Series, *, decimal: str = ".") -> tuple[np.ndarray, np.ndarray,
                                                                       np.ndarray]:
    """Convert text (or already numeric) cells to float64.

    Returns ``(numbers, missing, bad)``: ``numbers`` has NaN where a cell is missing (empty,
    ``NA``, ``NaN``, ``null`` ...) or not a number; ``missing`` and ``bad`` are boolean masks.
    ``inf``/``-inf`` are parsed (and rejected by the caller with a precise message).

    Examples
    --------
    >>> nums, missing, bad = parse_numeric(pd.Series(["1,5", "", "x"]), decimal=",")
    >>> nums[0], missing.tolist(), bad.tolist()
    (np.float64(1.5), [False, True, False], [False, False, True])
    """
    if pd.api.types.is_complex_dtype(values.dtype):  # not a real number: report as text
        values = values.astype(object).where(values.notna(), None)
    elif pd.api.types.is_bool_dtype(values.dtype) or pd.api.types.is_numeric_dtype(values.dtype):
        numbers = values.to_numpy(dtype=np.float64, na_value=np.nan)  # nullable types too
        missing = np.isnan(numbers)
        return numbers, missing, np.zeros(len(values), dtype=bool)
    cells = values.to_numpy(dtype=object, na_value="")
    text = cells.astype(str)  # numpy strings: the operations below run in C loops
    if decimal == ",":
        has_point = np.char.find(text, ".") >= 0
        text = np.char.replace(text, ",", ".")
    else:
        has_point = np.zeros(len(text), dtype=bool)
    try:  # fast path: every cell is a number (or "nan")
        numbers = text.astype(np.float64)
    except ValueError:
        pass
    else:
        missing = np.isnan(numbers) & ~has_point
        numbers[has_point] = np.nan
        return numbers, missing, has_point
    text = np.char.strip(text)
    missing = np.isin(np.char.lower(text), list(_MISSING))
    candidates = text.astype(object)
    candidates[missing | has_point] = None
    numbers = pd.to_numeric(pd.Series(candidates, dtype=object), errors="coerce").to_numpy(
        dtype=np.float64, na_value=np.nan)
    bad = np.isnan(numbers) & ~missing
    return numbers, missing, bad


def numeric_hint(bad_values: list[str], decimal: str) -> str:
    """A suggestion for non-numeric cells: decimal comma/point options, or quoting.

    Examples
    --------
    >>> numeric_hint(["1,5"], ".").split(":")[0]
    '; the file seems to use a decimal comma'
    """
    bad_values = [str(v) for v in bad_values]
    if decimal == "." and any(_DECIMAL_COMMA.match(v) for v in bad_values):
        return ("; the file seems to use a decimal comma: pass decimal=',' "
                "(command line: --decimal ,), or remove thousands separators")
    if any(_DMS.search(v) for v in bad_values):
        return ("; the value looks like degrees, minutes and seconds: convert the coordinates "
                "to decimal degrees (59°54'30\"N = 59.908333)")
    if any(_THOUSANDS.match(v.strip()) for v in bad_values):
        return ("; the value seems to contain thousands separators: remove them (spreadsheets: "
                "format the cells as plain numbers before exporting)")
    if decimal == "," and any(_DECIMAL_POINT.match(v) for v in bad_values):
        return ("; decimal=',' was given but the value uses a decimal point: check the "
                "decimal option")
    return ""


def _check_delimiter(delimiter: str | None, decimal: str, path: Path) -> str | None:
    if decimal not in (".", ","):
        raise InputError(f"`decimal` must be '.' or ','; got {decimal!r}")
    if delimiter is None:
        return None  # detected per file from its header line
    if not isinstance(delimiter, str) or len(delimiter) != 1 or delimiter in "\"'\n\r":
        raise InputError(f"`delimiter` must be one character such as ',', ';' or a tab; got "
                         f"{delimiter!r}")
    if delimiter == decimal:
        raise InputError(f"`delimiter` and `decimal` are both {decimal!r}; a CSV with decimal "
                         f"commas needs another delimiter, usually ';'")
    return delimiter


def _decode(raw: bytes, path: Path, role: str, encoding: str | None = None) -> str:
    """Text of a CSV file: UTF-16 with a byte-order mark, else UTF-8 (with or without a mark),
    else -- only then -- the ``encoding`` the user named. Files of one survey often come from
    different programs, so one option must not force a UTF-8 file into another codec; a
    Latin-1 or cp1252 file with accents is practically never valid UTF-8."""
    if encoding is not None:
        try:
            codecs.lookup(encoding)
        except LookupError:
            raise InputError(f"`encoding` {encoding!r} is not a known text encoding; use e.g. "
                             f"'utf-8', 'cp1252' or 'latin-1'") from None
    if raw.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
        return raw.decode("utf-16")
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        if encoding is None:
            line = raw[:exc.start].count(b"\n") + 1
            raise InputError(f"{role} file {str(path)!r} is not UTF-8 text (byte "
                             f"{raw[exc.start]:#04x} on line {line}); save it as UTF-8 "
                             f"(spreadsheets: 'CSV UTF-8') or name its encoding, e.g. "
                             f"encoding='cp1252' (--encoding cp1252)") from None
    else:
        if encoding is None or "\x00" not in text:
            return _no_nul(text, path, role, "UTF-8")
    try:
        return _no_nul(raw.decode(encoding), path, role, encoding)
    except UnicodeDecodeError as exc:
        line = raw[:exc.start].count(b"\n") + 1
        raise InputError(f"{role} file {str(path)!r} is neither UTF-8 nor valid {encoding} text "
                         f"(byte {raw[exc.start]:#04x} on line {line}); check the encoding "
                         f"option") from None


def _no_nul(text: str, path: Path, role: str, codec: str) -> str:
    if "\x00" in text:
        line = text[:text.index("\x00")].count("\n") + 1
        raise InputError(f"{role} file {str(path)!r} holds NUL characters (line {line}) as read "
                         f"with {codec!r}: it is probably UTF-16 without a byte-order mark "
                         f"(pass encoding='utf-16-le', --encoding utf-16-le), or not a text "
                         f"file; save it as CSV UTF-8")
    return text


def _one_line(exc: BaseException) -> str:
    return " ".join(str(exc).split()) or type(exc).__name__
