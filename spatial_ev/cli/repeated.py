"""``spatial-ev change``: analyse a repeated survey and write a run folder.

Reads a site table and either one long-form species table (site id, time, species...) or one
species table per survey with ``--times``; tests whether the spatial pattern of the community
changed between surveys (space–time interaction) and which sites changed exceptionally between
two surveys, with their losses and gains; writes the folder (summary.json, manifest.json,
report.html, figures/, tables/, change.gpkg) whole or not at all. ``--demo`` analyses the
shipped invented three-year mudflat resurvey. Bad input ends with one line and exit status 2.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from spatial_ev.errors import InputError
from spatial_ev.inference.engines import ENGINES
from spatial_ev.inference.site_change import PAIRINGS
from spatial_ev.input.repeated import INCOMPLETE_SITES, read_repeated_survey
from spatial_ev.pipeline.repeated import RESPONSE_TRANSFORMATIONS, analyse_repeated
from spatial_ev.report.change import write_change_folder
from spatial_ev.stats.temporal_beta import CHANGE_INDICES

__all__ = ["configure", "execute", "HELP"]

HELP = ("analyse repeated surveys: did the spatial pattern change, which sites changed and "
        "did they lose or gain species; writes a run folder")


def configure(parser: argparse.ArgumentParser) -> None:
    """Add the ``change`` options.

    Examples
    --------
    >>> p = argparse.ArgumentParser(); configure(p)
    >>> a = p.parse_args(["--sites", "s.gpkg", "--species", "a.csv", "b.csv", "--times",
    ...                   "2023", "2024", "--out", "run"])
    >>> a.species, a.times
    (['a.csv', 'b.csv'], ['2023', '2024'])
    """
    files = parser.add_argument_group("survey files")
    files.add_argument("--demo", action="store_true",
                       help="analyse the shipped invented resurvey (data_demo/resurvey) instead "
                            "of --sites/--species")
    files.add_argument("--sites", metavar="FILE", default=None,
                       help="site table, one row per site: CSV with coordinate columns, or a "
                            "GeoPackage / GeoJSON / Shapefile of points or polygons")
    files.add_argument("--species", metavar="FILE", nargs="+", default=None,
                       help="one long-form species table (site id, time, species...), or one "
                            "table per survey (site id, species...) followed by --times")
    files.add_argument("--times", metavar="T", nargs="+", default=None,
                       help="time of each per-survey species table, in the same order "
                            "(numbers such as 2024 or dates such as 2024-05-17)")
    files.add_argument("--time-column", metavar="COL", default=None,
                       help="time column of long-form tables (default: a column named time, "
                            "year, date, survey, season, campaign or visit)")
    files.add_argument("--environment", metavar="FILE", default=None,
                       help="long-form environment table (site id, time, variables) [optional; "
                            "validated and summarised]")
    files.add_argument("--layer", metavar="NAME", default=None,
                       help="layer of a multi-layer GIS site file")
    ids = parser.add_argument_group("site ids and coordinates")
    ids.add_argument("--site-id", metavar="COL", default=None,
                     help="column holding site ids in every table (default: the first column)")
    ids.add_argument("--x", metavar="COL", default=None, help="x column of a CSV site table")
    ids.add_argument("--y", metavar="COL", default=None, help="y column of a CSV site table")
    ids.add_argument("--crs", metavar="CRS", default=None,
                     help="CRS of CSV coordinates (EPSG code or WKT)")
    ids.add_argument("--local-unit", metavar="UNIT", default=None,
                     help="declare CSV coordinates local planar in this unit, e.g. 'metre'")
    fmt = parser.add_argument_group("CSV format and data cleaning")
    fmt.add_argument("--delimiter", metavar="C", default=None,
                     help="CSV field separator (default: detected per file)")
    fmt.add_argument("--decimal", metavar="C", default=".", choices=(".", ","),
                     help="decimal mark of numbers in the CSV files")
    fmt.add_argument("--encoding", metavar="NAME", default=None,
                     help="text encoding of CSV files that are not UTF-8")
    fmt.add_argument("--incomplete-sites", choices=INCOMPLETE_SITES, default="error",
                     help="sites missing from some surveys: stop with an error listing them "
                          "(default) or keep only the sites present in every survey")
    fmt.add_argument("--shared-coordinates", choices=("error", "merge"), default="error",
                     help="sites at identical coordinates: error (default) or merge")
    ana = parser.add_argument_group("analysis")
    ana.add_argument("--index", dest="change_index", choices=CHANGE_INDICES,
                     default="percentage_difference",
                     help="dissimilarity of each site between the two compared surveys "
                          "(default: percentage_difference, for abundances)")
    ana.add_argument("--compare", metavar="SURVEY", nargs=2, default=None,
                     help="the two surveys compared site by site (default: first and last)")
    ana.add_argument("--transformation", choices=RESPONSE_TRANSFORMATIONS, default="hellinger",
                     help="transformation of the species table for the space-time tests")
    ana.add_argument("--permutations", dest="n_permutations", type=int, default=999,
                     metavar="N", help="permutations of each space-time test (default 999)")
    ana.add_argument("--site-permutations", type=int, default=9999, metavar="N",
                     help="permutations of the per-site change tests (default 9999; flagging a "
                          "site among n needs at least n/alpha)")
    ana.add_argument("--pairing", choices=PAIRINGS, default="independent",
                     help="per-site test: species permuted independently in the two surveys "
                          "(default) or with the same permutation in both")
    ana.add_argument("--alpha", type=float, default=0.05, metavar="A",
                     help="level of every decision (default 0.05)")
    ana.add_argument("--seed", type=int, default=20240917, metavar="N",
                     help="seed of every permutation (default 20240917)")
    ana.add_argument("--engine", choices=ENGINES, default="local",
                     help="where permutations run (local threads or a dask cluster)")
    ana.add_argument("--scheduler", metavar="ADDR", default=None,
                     help="dask scheduler address (with --engine dask)")
    ana.add_argument("--workers", dest="n_workers", type=int, default=None, metavar="N",
                     help="threads (local) or workers (temporary dask cluster)")
    out = parser.add_argument_group("output")
    out.add_argument("--out", required=True, metavar="DIR", help="run folder to create")
    out.add_argument("--overwrite", action="store_true",
                     help="replace an existing run folder")


def _inputs(args: argparse.Namespace) -> dict:
    if args.demo:
        if args.sites or args.species or args.times or args.environment:
            raise InputError("--demo analyses the shipped resurvey; leave out --sites, "
                             "--species, --times and --environment")
        from spatial_ev.datasets.resurvey import write_resurvey

        return {"demo": write_resurvey}
    if not args.sites or not args.species:
        raise InputError("give --sites FILE and --species FILE (one long-form table, or one "
                         "table per survey with --times), or --demo")
    return {}


def execute(args: argparse.Namespace) -> int:
    """Read the repeated survey, run the analysis, write the run folder; return 0.

    Examples
    --------
    >>> from spatial_ev.cli.main import main
    >>> main(["change", "--demo", "--out", "change-run"])  # doctest: +SKIP
    0
    """
    import tempfile

    demo = _inputs(args)
    tab = {"tab": "\t", "\\t": "\t"}
    options = dict(site_id=args.site_id, x=args.x, y=args.y, crs=args.crs,
                   local_unit=args.local_unit,
                   delimiter=tab.get(args.delimiter, args.delimiter), decimal=args.decimal,
                   encoding=args.encoding, layer=args.layer,
                   incomplete_sites=args.incomplete_sites,
                   shared_coordinates=args.shared_coordinates)
    with tempfile.TemporaryDirectory() as scratch:
        if demo:
            paths = demo["demo"](Path(scratch))
            sites, species, times, environment = paths["sites"], paths["species"], None, None
        else:
            sites, environment = args.sites, args.environment
            species = args.species[0] if len(args.species) == 1 else list(args.species)
            times = args.times
            if len(args.species) == 1 and times is not None:
                raise InputError("--times goes with one species table per survey; a single "
                                 "long-form table holds its own time column (--time-column)")
        survey = read_repeated_survey(sites, species, environment, times=times,
                                      time_column=args.time_column, **options)
        analysis = analyse_repeated(
            survey, transformation=args.transformation, change_index=args.change_index,
            compare=args.compare, n_permutations=args.n_permutations,
            site_permutations=args.site_permutations, pairing=args.pairing,
            alpha=args.alpha, seed=args.seed, engine=args.engine, scheduler=args.scheduler,
            n_workers=args.n_workers)
        inputs = {"sites": sites, "species": species}
        if environment is not None:
            inputs["environment"] = environment
        command = {"command": "change", "argv": sys.argv[1:]}
        out = write_change_folder(analysis, args.out, overwrite=args.overwrite, inputs=inputs,
                                  parameters=command, illustrative=bool(demo))
    s = analysis.summary()
    st = s["space_time"]
    p_int = st["tests"].get("interaction", {}).get("p_value")
    print(f"{survey.n_sites} sites x {survey.n_surveys} surveys "
          f"({', '.join(survey.surveys)}), {survey.n_species} species")
    if p_int is not None:
        verdict = "changed" if st["interaction_significant"] else "no evidence of change"
        print(f"spatial pattern between surveys: {verdict} (space-time interaction p = "
              f"{p_int:.4g})")
    c = s["change"]
    print(f"sites with exceptional change {c['before']} -> {c['after']}: {c['n_exceptional']} "
          f"({c['exceptional_losing']} mostly losses, {c['exceptional_gaining']} mostly gains)")
    print(f"run folder written: {out}")
    return 0
