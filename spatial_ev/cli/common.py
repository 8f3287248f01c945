"""Survey options shared by the commands that read survey files (``check``, ``run``, ``eigen``).

:func:`add_survey_options` adds the same option names everywhere; :func:`survey_from_args`
turns the parsed options into a :class:`spatial_ev.input.survey.Survey` through
:func:`spatial_ev.input.survey.read_survey`, so every command validates input the same way.
"""

from __future__ import annotations

import argparse
from typing import TYPE_CHECKING

from spatial_ev._validation import check_option

if TYPE_CHECKING:  # pragma: no cover
    from spatial_ev.input.survey import Survey

__all__ = ["add_survey_options", "read_options", "survey_from_args"]

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
    >>> read_options(args)["delimiter"] == "\t"
    True
    """
    tab = {"tab": "\t", "\\t": "\t"}
    return {"site_id": args.site_id, "x": args.x, "y": args.y, "crs": args.crs,
            "local_unit": args.local_unit,
            "delimiter": tab.get(args.delimiter, args.delimiter), "decimal": args.decimal,
            "encoding": args.encoding, "layer": args.layer,
            "incomplete_sites": args.incomplete_sites,
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
