"""``spatial-ev check``: validate survey files and describe what ``run`` would analyse.

Reads the files with the same options as ``run`` and applies the rules ``run`` applies to
them (e.g. the minimum number of sites), reads and checks a river network given with
``--network`` (describing it: edges, flow direction, snap distances), prints a description (sites, species,
variables with their indicator columns, CRS and projection, extent, nearest-neighbour
spacing, what was dropped and why) and writes nothing. Warnings (dropped species, projected
degrees, ...) go to standard error; bad input ends with one line and exit status 2.
"""

from __future__ import annotations

import argparse
import sys

from spatial_ev.cli.common import add_survey_options, survey_from_args
from spatial_ev.cli.network import (
    add_network_options,
    check_network_options,
    directional_scheme_count,
    network_from_args,
)
from spatial_ev.cli.run import check_survey_for_run, presence_absence_hint, small_survey_hint

__all__ = ["configure", "execute"]


def configure(parser: argparse.ArgumentParser) -> None:
    """Add the ``check`` options (the shared survey options).

    Examples
    --------
    >>> p = argparse.ArgumentParser(); configure(p)
    >>> p.parse_args(["--sites", "s.gpkg"]).species is None
    True
    """
    add_survey_options(parser, species="optional", environment=True)
    add_network_options(parser)


def execute(args: argparse.Namespace) -> int:
    """Read and validate the survey, print its description; return 0.

    Examples
    --------
    >>> from spatial_ev.cli.main import main
    >>> main(["check", "--sites", "data_demo/sites.gpkg"])  # doctest: +SKIP
    0
    """
    check_network_options(args)
    survey = survey_from_args(args)
    check_survey_for_run(survey)  # every rule `run` applies to the files
    network = network_from_args(args, survey)
    print(survey.describe(), file=sys.stdout)
    if network is not None:
        print(network.describe(), file=sys.stdout)
    if network is not None or args.bearing is not None:
        print(f"directional schemes: `run` would add {directional_scheme_count(args)} to the "
              f"comparison of weighting schemes (each counts in the Šidák-corrected level)",
              file=sys.stdout)
    if survey.species is None:
        print("note: without --species only the spatial layout can be checked; "
              "`run` needs a species table", file=sys.stdout)
    if survey.environment is None:
        print("note: without --environment `run` analyses spatial structure only",
              file=sys.stdout)
    for hint in (small_survey_hint(survey.n_sites), presence_absence_hint(survey)):
        if hint is not None:
            print(hint, file=sys.stdout)
    print("check passed; nothing was written", file=sys.stdout)
    return 0
