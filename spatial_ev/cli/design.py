"""``spatial-ev design``: evaluate candidate sampling layouts against a pilot run.

The pilot is a run folder written by ``spatial-ev run`` or ``spatial-ev demo``: its inputs are
checked against the SHA-256 in ``manifest.json`` and the analysis is re-run with the recorded
parameters and seed. Candidate layouts are given with ``--layout`` (repeatable), in the syntax
of :mod:`spatial_ev.design.layouts`::

    --layout "grid:spacing=30"                       square grid in the study area
    --layout "grid:spacing=30;angle=20;extent=x0,y0,x1,y1"
    --layout "transect:start=x,y;bearing=45;spacing=10;length=500"
    --layout "thin:every=2"        --layout "thin:fraction=0.5;seed=7"
    --layout "augment:add=40"      --layout "file:points.csv"
    (any spec may end with ";name=LABEL")

Output folder (whole or absent): design.json, coverage.csv, power.csv, fractions.csv,
layouts.csv, figures/, design_report.html, layouts.gpkg. On a terminal a progress bar follows
the simulations; ``--quiet`` or a non-terminal output prints only the final summary.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path
from typing import TYPE_CHECKING, Any

from spatial_ev.cli.common import ProgressLog
from spatial_ev.errors import InputError

if TYPE_CHECKING:  # the command's imports stay lazy; the type is for readers and checkers
    from spatial_ev.design.evaluate import DesignEvaluation

__all__ = ["configure", "execute"]

_LAYOUT_HELP = ("candidate layout, repeatable: 'grid:spacing=S[;angle=DEG][;extent=x0,y0,x1,y1]'"
                ", 'transect:start=X,Y;bearing=DEG;spacing=S;length=L' (bearing clockwise "
                "from north), 'thin:every=K' or 'thin:fraction=F[;seed=N]', 'augment:add=N' "
                "(fill the largest gaps), 'file:PATH' (CSV/GIS points); add ';name=LABEL' to "
                "name it. Distances in the pilot's map units.")


def configure(parser: argparse.ArgumentParser) -> None:
    """Add the ``design`` options.

    Examples
    --------
    >>> p = argparse.ArgumentParser(); configure(p)
    >>> a = p.parse_args(["--pilot", "run", "--layout", "thin:every=2", "--out", "d"])
    >>> a.layout, a.simulations
    (['thin:every=2'], 100)
    """
    parser.add_argument("--pilot", required=True, metavar="DIR",
                        help="run folder of the pilot analysis (spatial-ev run / demo)")
    parser.add_argument("--layout", required=True, action="append", metavar="SPEC",
                        help=_LAYOUT_HELP)
    parser.add_argument("--out", required=True, metavar="DIR", help="design folder to create")
    area = parser.add_argument_group("study area and environment")
    area.add_argument("--area", metavar="FILE", default=None,
                      help="study-area polygon(s) (GeoPackage / GeoJSON / Shapefile) that bound "
                           "grids and added sites (default: the pilot's convex hull)")
    area.add_argument("--area-layer", metavar="NAME", default=None,
                      help="layer of a multi-layer area file")
    area.add_argument("--environment-layer", metavar="FILE", default=None,
                      help="vector file with the pilot's environmental columns, read at new "
                           "sites from the nearest feature (default: interpolated from the "
                           "pilot sites by inverse distance)")
    sim = parser.add_argument_group("simulation")
    sim.add_argument("--simulations", type=int, default=100, metavar="N",
                     help="simulated surveys per layout (default 100: power ± 0.04)")
    sim.add_argument("--permutations", type=int, default=199, metavar="N",
                     help="permutations per test in each simulated analysis (default 199)")
    sim.add_argument("--target-power", type=float, default=0.8, metavar="P",
                     help="power the recommendations ask for (default 0.8)")
    sim.add_argument("--space-level", choices=("corrected", "nominal"), default="corrected",
                     help="level of the spatial global test: the pilot's Šidák-corrected level "
                          "(default) or the nominal alpha")
    sim.add_argument("--reference", choices=("pilot", "none"), default="pilot",
                     help="also evaluate the pilot layout as a reference (default) or not")
    sim.add_argument("--truth", choices=("unconditional", "conditional"),
                     default="unconditional",
                     help="simulated landscapes: new ones like the pilot's each time "
                          "(default), or with the pilot's patches fixed in place")
    sim.add_argument("--seed", type=int, default=None, metavar="N",
                     help="seed of the simulations (default: drawn and recorded)")
    ex = parser.add_argument_group("execution and output")
    ex.add_argument("--engine", default="local", choices=("local", "processes", "dask"),
                    help="where simulations run: local threads (default), local worker "
                         "processes or dask")
    ex.add_argument("--scheduler", default=None, metavar="ADDR",
                    help="dask.distributed scheduler address (default: a local cluster)")
    ex.add_argument("--workers", type=int, default=None, metavar="N",
                    help="local threads, worker processes or local-cluster workers "
                         "(default: one per core)")
    ex.add_argument("--overwrite", action="store_true",
                    help="replace the output folder if it exists")
    ex.add_argument("--quiet", action="store_true", help="print only the final summary")


class _Progress:
    """A rich status for the pilot rebuild and a progress bar for the simulations on a
    terminal; plain timestamped lines, throttled, when standard error is not a terminal."""

    def __init__(self, quiet: bool) -> None:
        self.live = not quiet and sys.stderr.isatty()
        self.log = ProgressLog() if not quiet and not self.live else None
        self.start = time.perf_counter()
        self.status = self.bar = self.task = None
        if self.live:
            from rich.console import Console

            self.console = Console(stderr=True)
            self.status = self.console.status("rebuilding the pilot analysis")
            self.status.start()

    def stage(self, message: str) -> None:
        if self.status is not None:
            self.status.update(f"[{time.perf_counter() - self.start:6.1f} s] pilot: {message}")
        elif self.log is not None:
            self.log(f"pilot: {message}")

    def step(self, done: int, total: int) -> None:
        if self.log is not None:
            self.log(f"simulations {done} of {total}")
        if not self.live:
            return
        if self.bar is None:
            from rich.progress import BarColumn, MofNCompleteColumn, Progress, TimeRemainingColumn

            if self.status is not None:
                self.status.stop()
                self.status = None
            self.bar = Progress("simulations", BarColumn(), MofNCompleteColumn(),
                                TimeRemainingColumn(), console=self.console)
            self.bar.start()
            self.task = self.bar.add_task("simulations", total=total)
        self.bar.update(self.task, completed=done)

    def stop(self) -> float:
        if self.status is not None:
            self.status.stop()
        if self.bar is not None:
            self.bar.stop()
        return time.perf_counter() - self.start


def _area(args: argparse.Namespace, crs: Any):
    if args.area is None:
        return None
    import shapely

    from spatial_ev.input.io import read_vector

    gdf = read_vector(args.area, role="area", layer=args.area_layer)
    if crs is not None and gdf.crs is not None:
        gdf = gdf.to_crs(crs)
    elif (crs is None) != (gdf.crs is None):
        raise InputError(f"area file {args.area!r} and the pilot disagree about coordinates: "
                         "one has a CRS, the other local planar coordinates")
    polys = [g for g in gdf.geometry if g is not None and g.geom_type in ("Polygon",
                                                                         "MultiPolygon")]
    if not polys:
        raise InputError(f"area file {args.area!r} holds no polygon; give the study area's "
                         "outline as polygon(s)")
    return shapely.union_all(polys)


def _environment_layer(args: argparse.Namespace, crs: Any):
    if args.environment_layer is None:
        return None
    from spatial_ev.input.io import read_vector

    gdf = read_vector(args.environment_layer, role="environment layer")
    if crs is not None and gdf.crs is not None:
        gdf = gdf.to_crs(crs)
    return gdf


def _summary_lines(ev: DesignEvaluation, out: str, elapsed: float) -> list[str]:
    lines = [f"design folder written: {out} ({elapsed:.1f} s; {ev.settings.n_simulations} "
             f"simulations per layout, {ev.settings.n_permutations} permutations per test, "
             f"seed {ev.settings.seed})"]
    cov = ev.coverage
    for name, row in cov.layouts.iterrows():
        status = cov.classes[cov.classes["layout"] == name]
        resolved = ", ".join(f"{r.scale_class} {r.status}" for r in status.itertuples())
        lines.append(f"  {name}: {row['n_sites']} sites, {row['n_vectors']} vectors, scales "
                     f"{row['finest_scale']:.4g}–{row['broadest_scale']:.4g}; {resolved}")
    table = ev.power.pivot(index="layout", columns="objective", values="power")
    table = table.reindex(index=list(cov.layouts.index),
                          columns=list(dict.fromkeys(ev.power["objective"])))
    lines.append("power (share of simulations detecting each objective):")
    lines += ["  " + line for line in table.round(2).to_string().splitlines()]
    lines += list(ev.recommendations)
    lines += [f"note: {n}" for n in ev.notes if n.startswith("The rebuilt pilot")]
    lines.append(f"report: {Path(out) / 'design_report.html'}")
    return lines


def execute(args: argparse.Namespace) -> int:
    """Rebuild the pilot, evaluate the layouts, write the design folder; return 0.

    Examples
    --------
    >>> from spatial_ev.cli.main import main
    >>> main(["design", "--pilot", "demo-run", "--layout", "thin:every=2",
    ...       "--out", "design"])  # doctest: +SKIP
    0
    """
    from spatial_ev.design.evaluate import evaluate_design
    from spatial_ev.design.layouts import parse_layout_spec
    from spatial_ev.pipeline.rerun import load_pilot
    from spatial_ev.report.design_report import write_design_folder

    for spec in args.layout:  # fail on syntax before the pilot is rebuilt
        parse_layout_spec(spec)
    if args.simulations < 1:
        raise InputError(f"--simulations must be at least 1; got {args.simulations}")
    if Path(args.out).exists() and not args.overwrite:
        raise InputError(f"output folder {args.out!r} already exists; choose another folder or "
                         "pass --overwrite")
    progress = _Progress(args.quiet)
    try:
        # loading the run folder is this command's explicit step: the library's design
        # evaluation takes the rebuilt Analysis, never a path
        pilot = load_pilot(args.pilot, progress=progress.stage)
        crs = pilot.survey.crs
        evaluation = evaluate_design(
            pilot, list(args.layout), n_simulations=args.simulations,
            n_permutations=args.permutations, target_power=args.target_power,
            space_level=args.space_level, environment_layer=_environment_layer(args, crs),
            area=_area(args, crs), reference=args.reference, truth=args.truth,
            seed=args.seed,
            engine=args.engine, scheduler=args.scheduler, n_workers=args.workers,
            progress=progress.step)
        write_design_folder(evaluation, args.out, pilot=pilot, overwrite=args.overwrite,
                            parameters={"command_line": sys.argv[1:] if sys.argv else [],
                                        "pilot_folder": str(Path(args.pilot).resolve())})
    finally:
        elapsed = progress.stop()
    for line in _summary_lines(evaluation, args.out, elapsed):
        print(line)
    return 0
