"""What the commands share: the survey options, and the command line's own words in messages.

:func:`add_survey_options` adds the same option names everywhere; :func:`survey_from_args`
turns the parsed options into a :class:`spatial_ev.input.survey.Survey` through
:func:`spatial_ev.input.survey.read_survey`, so every command validates input the same way.

The library's messages name its Python parameters (``n_permutations``, ``k``,
``method='k_nearest'``); a user of the command line typed options (``--permutations``,
``--neighbours``, ``--graph k_nearest``). :func:`option_names` maps one to the other for a
command (:data:`PARAMETER_OPTIONS` holds the names that differ, the parser gives the rest) and
:func:`in_option_words` rewrites a message with it; advice about a parameter the command line
does not offer is dropped.
"""

from __future__ import annotations

import argparse
import re
import sys
import time
from collections.abc import Callable, Mapping
from datetime import datetime, timezone
from typing import TYPE_CHECKING, TextIO

from spatial_ev._validation import check_option

if TYPE_CHECKING:  # pragma: no cover
    from spatial_ev.input.survey import Survey

__all__ = ["add_survey_options", "read_options", "survey_from_args", "PARAMETER_OPTIONS",
           "option_names", "in_option_words", "ProgressLog"]

_ANALYSIS_PARAMETERS = {"schemes": "--weighting", "spatial_weighting": "--weighting",
                        "n_permutations": "--permutations", "n_workers": "--workers"}

# command -> {library parameter: option}, for the parameters whose option has another name
# (a parameter called like its option, e.g. `alpha` / --alpha, is taken from the parser)
PARAMETER_OPTIONS: dict[str, dict[str, str]] = {
    "check": {},
    "run": dict(_ANALYSIS_PARAMETERS),
    "demo": dict(_ANALYSIS_PARAMETERS),
    "eigen": {"method": "--graph", "k": "--neighbours"},
    "design": {"n_simulations": "--simulations", "n_permutations": "--permutations",
               "n_workers": "--workers"},
}

# library advice with no command-line counterpart, said in the command line's terms
_PHRASES: tuple[tuple[re.Pattern, str], ...] = (
    (re.compile(r"pass `polygons=` \(a GeoSeries\) or a Survey of polygon sites"),
     "give --sites a GeoPackage, GeoJSON or Shapefile of site polygons"),
    (re.compile(r"\(e\.g\. GeoDataFrame\.to_crs\)"), "(e.g. in a GIS)"),
    (re.compile(r"\bleave it None\b"), "leave it out"),
    (re.compile(r"; got None\b"), ""),
)
_VALUE = r"(?:'[^']*'|[^\s,;()'`]+)"
_DROP_ADVICE = re.compile(r"[,;]? or (?:pass |use |set )?`?(\w+)=" + _VALUE + r"`?"
                          r"(?: \((?:[^()]|\([^()]*\))*\))?")
_WITH_VALUE = re.compile(r"(?<![\w\-`'])`?(\w+) ?= ?(" + _VALUE + r")`?")
_BARE = re.compile(r"(?:parameter )?`(\w+)=?`|(?<![\w\-`'])(\w+)=(?=[\s,;)]|$)"
                   r"|(?<![\w\-`'])(\w+_\w+)(?![\w`'])")
_SAID_TWICE = (
    # "--x and --y (command line: --x COL --y COL)" -> "--x COL --y COL"
    (re.compile(r"(--[\w-]+) and (--[\w-]+) \((?:command line: )?(\1 \S+ \2 \S+)\)"),
     r"\3"),
    # "--decimal ',' (command line: --decimal ,)" / "--site-id (--site-id)" -> once
    (re.compile(r"(--[\w-]+)( '?([^\s(']+)'?)? \((?:command line: )?\1(?: \3)?\)"), r"\1\2"),
    # "--encoding utf-16-le, --encoding utf-16-le" -> once
    (re.compile(r"(--[\w-]+ [^\s,;()]+), \1"), r"\1"),
    # "--crs (EPSG code or WKT, --crs)" -> "--crs (EPSG code or WKT)"
    (re.compile(r"(--[\w-]+) \(([^()]*?),? \1\)"), r"\1 (\2)"),
    # "--weighting entry 'gabriel'" -> "--weighting 'gabriel'"
    (re.compile(r"(--[\w-]+) entry '"), r"\1 '"),
    # "(got --x 'a', --y None)" -> "(got --x 'a', --y not given)"
    (re.compile(r"(--[\w-]+) None\b"), r"\1 not given"),
)

_SPECIES_MODES = ("optional", "required", "absent")


def add_survey_options(parser: argparse.ArgumentParser, *, species: str = "optional",
                       environment: bool = True) -> argparse.ArgumentParser:
    """Add the survey-file options to a sub-command's parser.

    Parameters
    ----------
    parser : argparse.ArgumentParser
        The sub-command's parser.
    species : {"optional", "required", "absent"}
        Whether ``--species`` is offered, and whether it must be given.
    environment : bool
        Whether ``--environment`` is offered.

    Returns
    -------
    argparse.ArgumentParser
        The same parser (for chaining).

    Examples
    --------
    >>> p = add_survey_options(argparse.ArgumentParser(), species="required")
    >>> p.parse_args(["--sites", "s.csv", "--species", "y.csv"]).species
    'y.csv'
    """
    species = check_option("species", species, _SPECIES_MODES)
    group = parser.add_argument_group("survey files")
    group.add_argument("--sites", required=True, metavar="FILE",
                       help="site table: CSV with coordinate columns, or a GeoPackage / GeoJSON / "
                            "Shapefile of points or polygons")
    if species != "absent":
        group.add_argument("--species", required=species == "required", metavar="FILE",
                           default=None,
                           help="species table (CSV, sites x species: counts, cover or 0/1)"
                                + ("" if species == "required" else " [optional]"))
    if environment:
        group.add_argument("--environment", metavar="FILE", default=None,
                           help="environment table (CSV, sites x variables; text columns are "
                                "treated as categories) [optional]")
    group.add_argument("--layer", metavar="NAME", default=None,
                       help="layer of a multi-layer GIS site file (default: the only layer)")
    ids = parser.add_argument_group("site ids and coordinates")
    ids.add_argument("--site-id", metavar="COL", default=None,
                     help="column holding site ids in every table (default: the first column)")
    ids.add_argument("--x", metavar="COL", default=None,
                     help="x / easting / longitude column of a CSV site table")
    ids.add_argument("--y", metavar="COL", default=None,
                     help="y / northing / latitude column of a CSV site table")
    ids.add_argument("--crs", metavar="CRS", default=None,
                     help="coordinate reference system of CSV coordinates, or of a GIS file "
                          "that declares none (EPSG code such as 'EPSG:32632' or '4326', or "
                          "WKT); a GIS file's own CRS is always used")
    ids.add_argument("--local-unit", metavar="UNIT", default=None,
                     help="declare CSV coordinates local planar (no CRS) in this unit, "
                          "e.g. 'metre', 'kilometre', 'foot'")
    fmt = parser.add_argument_group("CSV format and data cleaning")
    fmt.add_argument("--delimiter", metavar="C", default=None,
                     help="CSV field separator of every CSV file, e.g. ';' or 'tab' "
                          "(default: detected in each file's header line)")
    fmt.add_argument("--decimal", metavar="C", default=".", choices=(".", ","),
                     help="decimal mark of numbers in the CSV files, '.' (default) or ','")
    fmt.add_argument("--encoding", metavar="NAME", default=None,
                     help="text encoding of CSV files that are not UTF-8, e.g. cp1252 "
                          "(UTF-8 files and UTF-16 files with a byte-order mark are recognised)")
    fmt.add_argument("--incomplete-sites", choices=("error", "drop"), default="error",
                     help="sites with missing environmental values: stop with an error "
                          "(default) or drop them with a warning listing them")
    if species != "absent":
        fmt.add_argument("--empty-sites", choices=("error", "drop"), default="error",
                         help="sites where no species was found (an all-zero species row): "
                              "stop with an error (default) or drop them from every table "
                              "with a warning listing them")
    fmt.add_argument("--shared-coordinates", choices=("error", "merge"), default="error",
                     help="sites at identical coordinates: stop with an error (default) or merge "
                          "each group into its first site (species and numeric variables "
                          "averaged; categories must agree) with a warning")
    return parser


def read_options(args: argparse.Namespace) -> dict:
    """The survey-reading options of parsed :func:`add_survey_options` arguments, as keyword
    arguments of :func:`spatial_ev.input.survey.read_survey` (recorded in run manifests so a run can
    be rebuilt from its files).

    Examples
    --------
    >>> args = add_survey_options(argparse.ArgumentParser()).parse_args(
    ...     ["--sites", "s.csv", "--delimiter", "tab"])
    >>> read_options(args)["delimiter"] == chr(9)
    True
    """
    tab = {"tab": "\t", "\\t": "\t"}
    return {"site_id": args.site_id, "x": args.x, "y": args.y, "crs": args.crs,
            "local_unit": args.local_unit,
            "delimiter": tab.get(args.delimiter, args.delimiter), "decimal": args.decimal,
            "encoding": args.encoding, "layer": args.layer,
            "incomplete_sites": args.incomplete_sites,
            "empty_sites": getattr(args, "empty_sites", "error"),
            "shared_coordinates": args.shared_coordinates}


def survey_from_args(args: argparse.Namespace) -> Survey:
    """Read and validate the survey named by parsed :func:`add_survey_options` options.

    Raises :class:`spatial_ev.errors.InputError` (or :class:`~spatial_ev.errors.CRSError`) on
    bad input; warnings are issued with the named classes of :mod:`spatial_ev.errors`.

    Examples
    --------
    >>> args = add_survey_options(argparse.ArgumentParser()).parse_args(
    ...     ["--sites", "data_demo/sites.gpkg"])
    >>> survey_from_args(args).n_sites  # doctest: +SKIP
    220
    """
    from spatial_ev.input.survey import read_survey

    return read_survey(args.sites, getattr(args, "species", None),
                       getattr(args, "environment", None), **read_options(args))


def option_names(parser: argparse.ArgumentParser, command: str) -> dict[str, str]:
    """Library parameter name -> option of ``command`` (whose parser is ``parser``).

    Every option of the parser answers to its own name with ``_`` for ``-`` (``local_unit`` ->
    ``--local-unit``); :data:`PARAMETER_OPTIONS` adds the parameters named otherwise.

    Examples
    --------
    >>> p = argparse.ArgumentParser(); _ = p.add_argument("--neighbours", type=int)
    >>> option_names(p, "eigen")["k"], option_names(p, "eigen")["neighbours"]
    ('--neighbours', '--neighbours')
    """
    names = {}
    for action in parser._actions:
        longs = [o for o in action.option_strings if o.startswith("--")]
        if longs and not action.dest.startswith("_"):
            names[action.dest] = longs[0]
            names[longs[0][2:].replace("-", "_")] = longs[0]
    names.pop("help", None)
    names.update(PARAMETER_OPTIONS.get(command, {}))
    return names


def in_option_words(message: str, options: Mapping[str, str]) -> str:
    """``message`` with the library's parameter names replaced by the options a user typed.

    ``options`` comes from :func:`option_names`. Forms rewritten: ``parameter `name```,
    ```name```, ``name=``, a bare ``name_with_underscore``, and ``name='value'`` /
    ``name = value`` (to ``--option value``);
    advice about a parameter without an option (``or pass name='value'``) is dropped, and an
    option the library already spelled out beside its parameter is said once.

    Examples
    --------
    >>> in_option_words("method='k_nearest' needs `k` (e.g. 4); got None",
    ...                 {"method": "--graph", "k": "--neighbours"})
    '--graph k_nearest needs --neighbours (e.g. 4)'
    >>> in_option_words("n_permutations = 99 is too few", {"n_permutations": "--permutations"})
    '--permutations 99 is too few'
    >>> in_option_words("increase `threshold`, or pass disconnected='allow'",
    ...                 {"threshold": "--threshold"})
    'increase --threshold'
    """
    text = message
    for pattern, replacement in _PHRASES:
        text = pattern.sub(replacement, text)
    text = _DROP_ADVICE.sub(lambda m: m.group(0) if m.group(1) in options else "", text)

    def with_value(m: re.Match) -> str:
        name, value = m.group(1), m.group(2)
        if name not in options:
            return m.group(0)
        bare_value = value.strip(chr(39))
        if not any(c.isalnum() for c in bare_value):  # punctuation stays quoted: --decimal ','
            bare_value = value
        return f"{options[name]} {bare_value}"

    def bare(m: re.Match) -> str:
        name = m.group(1) or m.group(2) or m.group(3)
        return options.get(name, m.group(0))

    text = _WITH_VALUE.sub(with_value, text)
    text = _BARE.sub(bare, text)
    for pattern, replacement in _SAID_TWICE:
        text = pattern.sub(replacement, text)
    return text


class ProgressLog:
    """Progress as plain timestamped lines, for standard error that is not a terminal (a
    batch log), where a live display cannot redraw itself.

    A line is written for the first message and then at most once every ``interval``
    seconds (the latest message at that moment); :meth:`finish` always writes its line.

    Parameters
    ----------
    stream : file, optional
        Where the lines go (default: standard error at the time of each line).
    interval : float
        Fewest seconds between two progress lines.
    clock : callable
        Seconds, monotonic (:func:`time.monotonic`; replaceable in tests).

    Examples
    --------
    >>> import io
    >>> t = iter([0.0, 1.0, 5.0, 12.0, 13.0]); out = io.StringIO()
    >>> log = ProgressLog(out, interval=10.0, clock=lambda: next(t))
    >>> log("reading"); log("testing 1"); log("testing 2"); log.finish("done")
    >>> [line.split("] ", 1)[1] for line in out.getvalue().splitlines()]
    ['reading', 'testing 2', 'done']
    """

    def __init__(self, stream: TextIO | None = None, *, interval: float = 10.0,
                 clock: Callable[[], float] = time.monotonic) -> None:
        if not interval >= 0:
            from spatial_ev.errors import InputError

            raise InputError(f"`interval` must be a number of seconds >= 0; got {interval!r}")
        self.stream = stream
        self.interval = float(interval)
        self.clock = clock
        self.start = clock()
        self.last: float | None = None

    def _write(self, now: float, message: str) -> None:
        stamp = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC")
        print(f"[{stamp}, {now - self.start:7.1f} s] {message}",
              file=self.stream or sys.stderr, flush=True)
        self.last = now

    def __call__(self, message: str) -> None:
        now = self.clock()
        if self.last is None or now - self.last >= self.interval:
            self._write(now, message)

    def finish(self, message: str) -> None:
        """Write ``message`` whatever the time since the last line."""
        self._write(self.clock(), message)
