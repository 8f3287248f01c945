"""``spatial-ev run`` and ``spatial-ev demo``: the whole analysis, written as a run folder.

``run`` reads the user's survey files (the same options as ``check``), or an ``analysis.toml``
holding the same keys; ``demo`` generates the shipped demo survey files and analyses them.
Both copy the analysed files into the run folder's ``inputs/`` (recorded with their SHA-256
in ``manifest.json``), so the folder can be moved before ``design`` reads it. On a terminal
both show the stage, the latest test and the elapsed time; when standard error is not a
terminal (a batch log) they write a timestamped progress line at most every 10 s; with
``--quiet`` they print only the final lines.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

from spatial_ev.cli.common import (ProgressLog, add_survey_options, read_options,
                                   survey_from_args)
from spatial_ev.cli.network import (
    add_network_options,
    check_network_options,
    directional_arguments,
    directional_scheme_count,
    network_from_args,
)
from spatial_ev.errors import InputError

__all__ = ["configure_run", "execute_run", "configure_demo", "execute_demo", "load_config",
           "check_analysis_options", "check_survey_for_run", "ANALYSIS_MIN_SITES",
           "small_survey_hint", "presence_absence_hint"]

# the fewest sites the analysis takes (spatial_ev.pipeline.analysis.analyse refuses fewer;
# tests/test_cli_check.py keeps the two equal), so that `check` can say so before `run`
ANALYSIS_MIN_SITES = 10

_SCHEMES_HELP = ("spatial weighting: 'compare' (default: every standard scheme, judged at a "
                 "Šidák-corrected level) or one scheme, 'distance' or '<graph>/<weighting>' "
                 "such as 'gabriel/linear'; with --network also 'river_aem/<weighting>', "
                 "'river_aem_against/<weighting>' or 'river_distance', with --bearing "
                 "'bearing_<DEG>/<weighting>'")


def _analysis_options(parser: argparse.ArgumentParser) -> None:
    group = parser.add_argument_group("analysis")
    group.add_argument("--transformation", default="hellinger",
                       choices=("hellinger", "chord", "chi_square", "log_chord",
                                "presence_absence", "none"),
                       help="community transformation (default: hellinger)")
    group.add_argument("--weighting", default="compare", metavar="SCHEME", help=_SCHEMES_HELP)
    group.add_argument("--step-tests", default="auto",
                       choices=("auto", "full", "sequential", "shared"),
                       help="forward-selection step tests draw every permutation (full), "
                            "stop once p <= alpha is settled with resampling risk <= 0.001 "
                            "(sequential), or share one set of permutations across the steps "
                            "of a selection, updated as the model grows (shared; much faster "
                            "on large surveys); auto (default): full up to 1,000 sites, "
                            "shared above")
    group.add_argument("--trend", default="auto", choices=("auto", "test", "ignore"),
                       help="test a linear trend on the coordinates and keep it as a "
                            "covariable when significant (test), or ignore trends; auto "
                            "(default) tests it, except along a river network")
    group.add_argument("--alpha", type=float, default=0.05,
                       help="significance level of every test (default 0.05)")
    group.add_argument("--permutations", type=int, default=999, metavar="N",
                       help="permutations per test (default 999)")
    group.add_argument("--seed", type=int, default=None, metavar="N",
                       help="random seed (default: drawn and recorded in manifest.json)")
    group.add_argument("--environment-test", default="spectral",
                       choices=("spectral", "permutation"),
                       help="test of the environment: 'spectral' (default) adds a Moran "
                            "spectral randomisation test that allows for spatially "
                            "autocorrelated environment; 'permutation' uses free permutations "
                            "only")
    group.add_argument("--max-vectors", type=int, default=None, metavar="K",
                       help="keep only the K broadest spatial eigenvectors per scheme "
                            "(default: all positive-I vectors; 200 above 3000 sites)")
    group.add_argument("--scale-breaks", type=float, nargs="+", default=None, metavar="D",
                       help="boundaries of the scale classes in map units (default: three "
                            "equal-size classes: broad, medium, fine)")
    ex = parser.add_argument_group("execution and output")
    ex.add_argument("--engine", default="local", choices=("local", "processes", "dask"),
                    help="where the work runs: local threads (default), local worker "
                         "processes (the weighting schemes compared in parallel) or dask")
    ex.add_argument("--workers", type=int, default=None, metavar="N",
                    help="threads or worker processes (default: one per core)")
    ex.add_argument("--scheduler", default=None, metavar="ADDR",
                    help="dask.distributed scheduler address (with --engine dask; default: a "
                         "local cluster)")
    ex.add_argument("--overwrite", action="store_true",
                    help="replace the output folder if it exists")
    ex.add_argument("--quiet", action="store_true", help="print only the final lines")


def configure_run(parser: argparse.ArgumentParser) -> None:
    """Options of ``spatial-ev run``.

    Examples
    --------
    >>> p = argparse.ArgumentParser(); configure_run(p)
    >>> p.parse_args(["--sites", "s.gpkg", "--species", "y.csv", "--out", "r"]).permutations
    999
    """
    add_survey_options(parser, species="optional", environment=True)
    for action in parser._actions:  # may come from --config instead
        if action.dest == "sites":
            action.required = False
    parser.add_argument("--config", metavar="FILE", default=None,
                        help="analysis.toml with the same keys as these options (command-line "
                             "options override it; paths are relative to the file)")
    parser.add_argument("--out", metavar="DIR", default=None,
                        help="run folder to create (required, here or in the config file)")
    _analysis_options(parser)
    add_network_options(parser)
    parser.set_defaults(_run_parser=parser)  # load_config needs the option table


def configure_demo(parser: argparse.ArgumentParser) -> None:
    """Options of ``spatial-ev demo``.

    Examples
    --------
    >>> p = argparse.ArgumentParser(); configure_demo(p)
    >>> p.parse_args([]).out
    'spatial-ev-demo'
    """
    parser.add_argument("--out", metavar="DIR", default="spatial-ev-demo",
                        help="run folder to create (default: spatial-ev-demo)")
    _analysis_options(parser)


def load_config(path: str, parser: argparse.ArgumentParser,
                args: argparse.Namespace) -> argparse.Namespace:
    """Fill options not given on the command line from an ``analysis.toml`` file.

    Keys are the long option names with ``-`` or ``_``; relative paths are taken from the
    file's folder. Unknown keys are an error naming the key.

    Examples
    --------
    >>> load_config("analysis.toml", parser, args)  # doctest: +SKIP
    """
    try:
        import tomllib
    except ModuleNotFoundError:  # pragma: no cover - Python 3.10
        import tomli as tomllib
    file = Path(path)
    if not file.is_file():
        raise InputError(f"config file {path!r} does not exist")
    try:
        data = tomllib.loads(file.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise InputError(f"config file {path!r} is not valid TOML: {exc}") from None
    known = {a.dest: a for a in parser._actions
             if a.dest not in ("help", "config", "debug") and not a.dest.startswith("_")}
    for key, value in data.items():
        dest = key.replace("-", "_")
        if dest not in known:
            raise InputError(f"config file {path!r}: unknown key {key!r}; allowed keys are "
                             f"{', '.join(sorted(k.replace('_', '-') for k in known))}")
        if getattr(args, dest) != parser.get_default(dest):
            continue  # given on the command line: it wins
        if dest in ("sites", "species", "environment", "out", "network") \
                and isinstance(value, str):
            value = str((file.parent / value)) if not Path(value).is_absolute() else value
        action = known[dest]
        if action.type is not None and not isinstance(value, list):
            try:
                value = action.type(value)
            except (TypeError, ValueError):
                raise InputError(f"config file {path!r}: key {key!r} must be "
                                 f"{action.type.__name__}; got {value!r}") from None
        if action.choices is not None and value not in action.choices:
            raise InputError(f"config file {path!r}: key {key!r} must be one of "
                             f"{', '.join(map(str, action.choices))}; got {value!r}")
        setattr(args, dest, value)
    return args


class _Progress:
    """Stage messages with elapsed time: a live status on a terminal (rich), plain
    timestamped lines, throttled, when standard error is not a terminal (a batch log);
    nothing with ``--quiet``."""

    def __init__(self, quiet: bool) -> None:
        self.live = not quiet and sys.stderr.isatty()
        self.log = ProgressLog() if not quiet and not self.live else None
        self.start = time.perf_counter()
        self.status = None
        if self.live:
            from rich.console import Console

            self.console = Console(stderr=True)
            self.status = self.console.status("starting")
            self.status.start()

    def __call__(self, message: str) -> None:
        if self.status is not None:
            self.status.update(f"[{time.perf_counter() - self.start:6.1f} s] {message}")
        elif self.log is not None:
            self.log(message)

    def stop(self) -> float:
        if self.status is not None:
            self.status.stop()
        return time.perf_counter() - self.start


def check_analysis_options(args: argparse.Namespace) -> None:
    """Refuse option values the analysis would refuse, before any file is read or any test
    run (the analysis finds some of them only after its first steps).

    Raises :class:`spatial_ev.errors.InputError` naming the option.

    Examples
    --------
    >>> p = argparse.ArgumentParser(); configure_demo(p)
    >>> check_analysis_options(p.parse_args(["--permutations", "999"]))
    >>> check_analysis_options(p.parse_args(["--permutations", "5"]))
    Traceback (most recent call last):
    ...
    spatial_ev.errors.InputError: --permutations must be at least 19; got 5
    """
    import math

    from spatial_ev._validation import check_int, check_real
    from spatial_ev.selection.weighting import DEFAULT_SCHEMES, check_schemes, sidak_level

    if args.permutations < 19:
        raise InputError(f"--permutations must be at least 19; got {args.permutations}")
    alpha = check_real("alpha", args.alpha, low=0, high=0.5, low_inclusive=False)
    if args.seed is not None:
        check_int("seed", args.seed, low=0)
    if args.max_vectors is not None:
        check_int("max_vectors", args.max_vectors, low=1)
    if args.scale_breaks is not None:
        breaks = [check_real("scale_breaks", b, low=0, low_inclusive=False)
                  for b in args.scale_breaks]
        if len(set(breaks)) != len(breaks):
            raise InputError(f"--scale-breaks lists a boundary twice; give each once; got "
                             f"{' '.join(f'{b:g}' for b in breaks)}")
    if hasattr(args, "network"):
        check_network_options(args)
    directional = args.weighting.startswith(("river_", "bearing_"))
    if directional and getattr(args, "network", None) is None \
            and getattr(args, "bearing", None) is None:
        raise InputError(f"--weighting {args.weighting} is a directional scheme: add "
                         f"--network FILE (river_...) or --bearing DEG (bearing_...)")
    if args.weighting == "compare":
        n_schemes = len(DEFAULT_SCHEMES) + directional_scheme_count(args)
    else:
        if not directional:
            check_schemes([args.weighting])
        n_schemes = 1
    level = sidak_level(alpha, n_schemes)
    if 1.0 / (args.permutations + 1) > level:
        need = math.ceil(1.0 / level) - 1
        raise InputError(f"--permutations {args.permutations} cannot reach the corrected level "
                         f"{level:.6f} for {n_schemes} scheme(s) compared at --alpha {alpha:g} "
                         f"(the smallest p is 1/(N + 1)); use at least --permutations {need}"
                         + (", or one scheme with --weighting" if n_schemes > 1 else ""))
    if args.workers is not None and args.workers < 1:
        raise InputError(f"--workers must be at least 1; got {args.workers}")
    if args.scheduler is not None and args.engine != "dask":
        raise InputError("--scheduler applies to --engine dask; add --engine dask or drop "
                         "--scheduler")


def _check_out_folder(args: argparse.Namespace) -> None:
    if Path(args.out).exists() and not args.overwrite:  # before reading and analysing
        raise InputError(f"output folder {args.out!r} already exists; choose another folder or "
                         f"pass --overwrite")


def _check_breaks_within_basis(breaks, result) -> None:
    """A scale-class boundary outside the scales of the chosen basis leaves a class with no
    vector; only the analysis knows those scales, so this is said after it, before writing."""
    if not breaks:
        return
    scales = result.basis.scale
    low, high = float(scales.min()), float(scales.max())
    outside = [b for b in breaks if not low < b < high]
    if outside:
        unit = getattr(result.survey, "distance_unit", None) or "map units"
        raise InputError(f"--scale-breaks {' '.join(f'{b:g}' for b in outside)} lie(s) outside "
                         f"the scales of the spatial basis ({low:.4g} to {high:.4g} {unit}); "
                         f"give boundaries between them, or leave --scale-breaks out for three "
                         f"classes of equal size")


def check_survey_for_run(survey) -> None:
    """Refuse a survey the analysis cannot take (fewer than :data:`ANALYSIS_MIN_SITES` sites);
    ``check`` applies it too, so that it never passes what ``run`` refuses.

    Examples
    --------
    >>> check_survey_for_run(survey)  # doctest: +SKIP
    """
    if survey.n_sites < ANALYSIS_MIN_SITES:
        raise InputError(f"the survey has {survey.n_sites} sites; `run` needs at least "
                         f"{ANALYSIS_MIN_SITES} (spatial eigenvectors, selection and "
                         f"permutation tests)")


def small_survey_hint(n_sites: int, weighting: str = "compare") -> str | None:
    """The command line's suggestion for a survey too small to compare weighting schemes.

    Returns ``None`` from :data:`spatial_ev.pipeline.analysis.SMALL_SURVEY_SITES` sites on, or
    when one scheme is already chosen with ``--weighting``.

    Examples
    --------
    >>> small_survey_hint(12).startswith("note: 12 sites, fewer than 30")
    True
    >>> small_survey_hint(12, "distance") is None, small_survey_hint(64) is None
    (True, True)
    """
    from spatial_ev.pipeline.analysis import SMALL_SURVEY_SITES

    if n_sites >= SMALL_SURVEY_SITES or weighting != "compare":
        return None
    return (f"note: {n_sites} sites, fewer than {SMALL_SURVEY_SITES}: comparing every weighting "
            f"scheme tests each at a corrected level that so few sites rarely reach; choose "
            f"one scheme before the analysis, e.g. --weighting distance (or "
            f"--weighting gabriel/binary)")


def presence_absence_hint(survey, transformation: str | None = None) -> str | None:
    """A note for a species table holding only 0 and 1, on the transformation that suits it.

    ``transformation`` is the one chosen for ``run``; ``None`` (``check``) describes the
    choices. Returns ``None`` when some value is neither 0 nor 1.

    Examples
    --------
    >>> presence_absence_hint(survey, "hellinger")  # doctest: +SKIP
    'note: every species value is 0 or 1 (presence–absence): ...'
    """
    if not survey.presence_absence:
        return None
    start = "note: every species value is 0 or 1 (presence–absence): "
    same = ("on 0/1 rows the Hellinger and log-chord profiles equal the chord profiles, "
            "1/√(species at the site) for each species present, so sites are compared by "
            "which species they share, not by how many they hold")
    if transformation in ("hellinger", "log_chord"):
        return f"{start}{same}; --transformation chord says the same thing plainly"
    if transformation == "chord":
        return None  # already the transformation that suits it
    if transformation in ("none", "presence_absence"):
        return (f"{start}--transformation {transformation} analyses the 0/1 values as they "
                f"are, so species-rich sites weigh more and shared absences count as "
                f"likeness; --transformation chord compares sites by the species they share")
    if transformation == "chi_square":
        return (f"{start}chi-square profiles give the rarest species the largest weights; "
                f"--transformation chord compares sites by the species they share")
    return (f"{start}{same}; for `run`, --transformation chord (the same as the default "
            f"hellinger here) suits it, and none keeps species richness in the comparison")


def _analyse_and_write(survey, args: argparse.Namespace, out: str, *, inputs=None,
                       before_commit=None, title=None, reading=None) -> Any:
    from spatial_ev.pipeline.analysis import analyse
    from spatial_ev.report.run_folder import write_run_folder

    check_survey_for_run(survey)
    network = network_from_args(args, survey)
    if network is not None and inputs is None:      # hashed into the manifest
        inputs = {**survey.sources, "network": args.network}
    weighting = "compare" if args.weighting == "compare" else "single"
    schemes = None if weighting == "compare" else [args.weighting]
    progress = _Progress(args.quiet)
    try:
        result = analyse(survey, transformation=args.transformation,
                         spatial_weighting=weighting, schemes=schemes, alpha=args.alpha,
                         n_permutations=args.permutations, seed=args.seed,
                         scale_breaks=args.scale_breaks, trend=args.trend, engine=args.engine,
                         scheduler=args.scheduler, progress=progress,
                         environment_test=args.environment_test, max_vectors=args.max_vectors,
                         n_workers=args.workers, step_tests=args.step_tests,
                         **directional_arguments(args, network))
        _check_breaks_within_basis(args.scale_breaks, result)
        progress("writing the run folder")
        params = {"command_line": sys.argv[1:] if sys.argv else [],
                  "read_options": reading or {}}
        if network is not None:
            params["network_options"] = {
                "file": args.network, "layer": args.network_layer, "crs": args.network_crs,
                "flow": args.flow, "outlet": args.outlet, "snap_tolerance": args.snap_tolerance,
                "join_tolerance": args.join_tolerance,
                "separate_catchments": args.separate_catchments}
        write_run_folder(result, out, overwrite=args.overwrite, inputs=inputs,
                         parameters=params, title=title, before_commit=before_commit)
    finally:
        elapsed = progress.stop()
    return result, elapsed


def _final_lines(result, out: str, elapsed: float) -> list[str]:
    lines = [f"run folder written: {out} ({elapsed:.1f} s)"]
    if result.fractions is not None:
        f = result.fractions
        lines.append("fractions (adjusted R²): environment only {environment_only:.3f}, "
                     "shared {shared:.3f}, space only {space_only:.3f}, unexplained "
                     "{unexplained:.3f}".format(**f))
    lines.append(f"spatial vectors selected: {len(result.selected_space)} "
                 f"({result.settings['chosen_scheme']}); report: {Path(out) / 'report.html'}")
    hints = (small_survey_hint(result.survey.n_sites, result.settings["spatial_weighting"]),
             presence_absence_hint(result.survey, result.settings["transformation"]))
    lines.extend(hint for hint in hints if hint is not None)
    return lines


def execute_run(args: argparse.Namespace) -> int:
    """Run the analysis on the user's files and write the run folder.

    Examples
    --------
    >>> from spatial_ev.cli.main import main
    >>> main(["run", "--sites", "s.gpkg", "--species", "y.csv", "--out", "r"])  # doctest: +SKIP
    0
    """
    if args.config is not None:
        args = load_config(args.config, args._run_parser, args)
    if args.sites is None:
        raise InputError("no site file: give --sites FILE (or `sites` in the config file)")
    if getattr(args, "species", None) is None:
        raise InputError("`run` needs a species table: give --species FILE")
    if args.out is None:
        raise InputError("no output folder: give --out DIR (or `out` in the config file)")
    check_analysis_options(args)
    _check_out_folder(args)
    survey = survey_from_args(args)
    result, elapsed = _analyse_and_write(survey, args, args.out, reading=read_options(args))
    for line in _final_lines(result, args.out, elapsed):
        print(line)
    return 0


def execute_demo(args: argparse.Namespace) -> int:
    """Generate the demo survey files, analyse them and write the run folder.

    Examples
    --------
    >>> from spatial_ev.cli.main import main
    >>> main(["demo", "--out", "demo-run"])  # doctest: +SKIP
    0
    """
    import json

    from spatial_ev.datasets.mudflat import write_demo_survey
    from spatial_ev.input.survey import read_survey

    check_analysis_options(args)
    _check_out_folder(args)
    with tempfile.TemporaryDirectory(prefix="spatial-ev-demo-") as tmp:
        paths = write_demo_survey(tmp)
        survey = read_survey(paths["sites"], paths["species"], paths["environment"])

        inputs = {k: v for k, v in paths.items()}  # copied into inputs/ with the truth
        if args.seed is None:
            args.seed = 20240917
        result, elapsed = _analyse_and_write(
            survey, args, args.out, inputs=inputs,
            title="Demo: benthic cores on an invented estuarine mudflat")
        truth = json.loads(Path(paths["truth"]).read_text())["expected_fractions"]
    for line in _final_lines(result, args.out, elapsed):
        print(line)
    if result.fractions is not None:
        print("true fractions of the generating model: " + ", ".join(
            f"{k.replace('_', ' ')} {v:.3f}" for k, v in truth.items()))
    return 0
