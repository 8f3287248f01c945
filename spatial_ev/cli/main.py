"""The ``spatial-ev`` command: parse arguments, call the library, report errors.

Each sub-command lives in its own module of ``spatial_ev/cli/`` exposing a function that adds
its options and one that executes it (``execute(args) -> int``). This module holds only
the parser, the dispatch table and the error boundary: any :class:`SpatialEVError` becomes one
line on standard error and exit status 2, as does an operating-system error (a path that
cannot be read or written); any other exception is a defect and ends with one line asking for
a report and exit status 1. ``--debug`` shows the traceback instead. Messages and warnings name
the options the user typed, not the library's parameters
(:func:`spatial_ev.cli.common.in_option_words`). Warnings are held back while a command runs
(a live progress display stays intact) and shown when it ends, one line each and each once,
before the error line of a failing command.
"""

from __future__ import annotations

import argparse
import re
import sys
import warnings
from collections.abc import Callable, Sequence
from typing import NamedTuple

from spatial_ev import __version__
from spatial_ev.cli import check, design, eigen, repeated, run
from spatial_ev.cli.common import in_option_words, option_names
from spatial_ev.errors import SpatialEVError, SpatialEVWarning


class Command(NamedTuple):
    """One sub-command: adds its options, executes it (returns the exit status), one-line help."""

    configure: Callable[[argparse.ArgumentParser], None]
    execute: Callable[[argparse.Namespace], int]
    help: str


# command name -> Command: a static table, so that each command's code is one go-to-definition
# away
COMMANDS: dict[str, Command] = {
    "check": Command(check.configure, check.execute,
                     "validate survey files and describe what `run` would do; writes nothing"),
    "eigen": Command(eigen.configure, eigen.execute,
                     "build a spatial basis for a site file and write it (CSV + GeoPackage)"),
    "run": Command(run.configure_run, run.execute_run,
                   "run the whole analysis on survey files and write a run folder"),
    "demo": Command(run.configure_demo, run.execute_demo,
                    "run the whole analysis on the shipped demo survey"),
    "design": Command(design.configure, design.execute,
                      "evaluate candidate sampling layouts against a pilot analysis"),
    "change": Command(repeated.configure, repeated.execute, repeated.HELP),
}


def build_parser() -> argparse.ArgumentParser:
    """Build the full argument parser (also used to generate the CLI reference).

    Examples
    --------
    >>> build_parser().prog
    'spatial-ev'
    """
    parser = argparse.ArgumentParser(
        prog="spatial-ev",
        description="Spatial-structure analysis of georeferenced ecological surveys.")
    parser.add_argument("--version", action="version", version=f"spatial-ev {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for name, (configure, execute, help_text) in COMMANDS.items():
        p = sub.add_parser(name, help=help_text, description=help_text)
        p.add_argument("--debug", action="store_true",
                       help="show the full traceback on errors")
        configure(p)
        p.set_defaults(_execute=execute, _option_names=option_names(p, name))
    return parser


# warnings of the libraries below spatial_ev, said once in the command line's terms
_LIBRARY_WARNINGS: tuple[tuple[re.Pattern, str], ...] = (
    (re.compile(r"^'crs' was not provided"),
     "map layers are written without a coordinate reference system (local planar "
     "coordinates, --local-unit); a GIS will treat their coordinates as unreferenced"),
)


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of ``spatial-ev``; returns the exit status.

    Examples
    --------
    >>> main(["--version"])  # doctest: +SKIP
    """
    parser = build_parser()
    args = parser.parse_args(argv)
    debug = getattr(args, "debug", False)
    words = args._option_names
    caught: list[tuple[type, str]] = []  # warnings are shown after the command, see below

    def keep(message, category, filename, lineno, file=None, line=None) -> None:
        text = _one_line(str(message))
        for pattern, said in _LIBRARY_WARNINGS:
            if pattern.search(text):
                text = said
        entry = (category, in_option_words(text, words))
        if entry not in caught:
            caught.append(entry)

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("always", SpatialEVWarning)
            warnings.showwarning = keep
            status = int(args._execute(args) or 0)
        _show_warnings(caught)
        return status
    except SpatialEVError as exc:
        _show_warnings(caught)
        if debug:
            raise
        message = in_option_words(_one_line(str(exc)), words)
        print(f"spatial-ev {args.command}: error: {message}{_after(caught)}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:  # pragma: no cover - interactive
        print("spatial-ev: interrupted; nothing was written", file=sys.stderr)
        return 130
    except OSError as exc:  # e.g. an output folder inside a file, a full disk, no permission
        _show_warnings(caught)
        if debug:
            raise
        where = f" {exc.filename!r}" if exc.filename else ""
        print(f"spatial-ev {args.command}: error: cannot access{where}: "
              f"{_one_line(exc.strerror or str(exc))}; check the path and its permissions",
              file=sys.stderr)
        return 2
    except Exception as exc:  # a defect of spatial-ev, not of the user's input
        _show_warnings(caught)
        if debug:
            raise
        print(f"spatial-ev {args.command}: internal error ({type(exc).__name__}: "
              f"{_one_line(str(exc))}); this is a defect in spatial-ev, not in your data: "
              f"please report it with the output of the same command run with --debug",
              file=sys.stderr)
        return 1


def _one_line(text: str) -> str:
    return " ".join(text.split())


def _show_warnings(caught: list[tuple[type, str]]) -> None:
    """Warnings of a finished command, one line each (each once). They are held back while it
    runs so that a live progress display is not broken."""
    for category, message in caught:
        print(f"warning ({category.__name__}): {message}", file=sys.stderr)


def _after(caught: list[tuple[type, str]]) -> str:
    if not caught:
        return ""
    names = ", ".join(sorted({c.__name__ for c, _ in caught}))
    return f" (after {len(caught)} warning(s) above: {names})"


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
