"""Benchmark: the whole analysis (``analyse``) on synthetic irregular surveys of growing size.

Run:  python benchmarks/analysis_scaling.py [--sizes 500 2000 10000] [--permutations 999]
                                            [--modes threads processes1 processes2]
                                            [--step-tests full|sequential|shared]

Surveys (our own generator, fixed seeds): an irregular clustered layout of constant sampling
density (20 % of the sites spread uniformly, 80 % in Gaussian clusters of ~250 sites, domain
side 100 km·√(n/10⁴)); two smooth spatial fields (sums of 12 random plane waves, wavelengths
around 1/2 and 1/8 of the side); four environmental variables (two driven by the fields, one
smooth but unrelated to the community, one pure noise); 30 species with Poisson counts whose
log-means mix the two fields and the first two variables. Each size is analysed with the
default settings: the 8 default weighting schemes compared, ``--permutations`` per test.

Each (size, mode) runs in its own subprocess, so that peak memory (``ru_maxrss`` of the
analysing process; with worker processes also the largest worker's peak, VmHWM) is per run.
Modes:

* ``threads``: ``engine="local"`` (one thread per core for permutation batches). This run is
  instrumented: the wall time is split into eigen-decomposition (spatial bases), neighbour
  graphs, forward selection (its own work, without the permutation tests it calls), and
  permutation tests (every null distribution drawn through the engine), by timers wrapped
  around those library functions from outside (innermost category wins, so nothing counts
  twice); the rest is "other" (transformations, partition algebra, RDA, scale classes).
* ``processes1`` / ``processes2``: ``engine="processes"`` with 1 or 2 worker processes (one
  BLAS thread each; the weighting schemes run in parallel, one task each). Their throughput
  ratio is the parallel speed-up (goal ≥ 1.7 on 2 cores). CPU time includes the workers'.

Every mode's ``summary.json`` record is compared with the first mode's (same seed: must be
identical). The machine may be shared with other work: the load average is printed with each
run; timings depend on it, memory does not.
"""

from __future__ import annotations

import argparse
import functools
import json
import os
import resource
import subprocess
import sys
import threading
import time

import numpy as np
import pandas as pd

import eigen_scaling  # the layout generator shared with the eigenvector benchmark (same folder)

SEED_LAYOUT = 20_261_202
SEED_COMMUNITY = 42_424_242
SEED_ANALYSIS = 20_240_917
MODES = ("threads", "processes1", "processes2")


# ----------------------------------------------------------------------------------------------
# synthetic survey
# ----------------------------------------------------------------------------------------------

def clustered_layout(n: int, seed: int = SEED_LAYOUT) -> np.ndarray:
    """Irregular layout of constant density: the eigen benchmark's generator, this seed."""
    return eigen_scaling.clustered_layout(n, seed=seed)


def smooth_field(xy: np.ndarray, wavelength: float, rng: np.random.Generator,
                 n_waves: int = 12) -> np.ndarray:
    """Standardised sum of plane waves with wavelengths within ±30 % of ``wavelength``."""
    angles = rng.uniform(0, np.pi, n_waves)
    k = 2 * np.pi / (wavelength * rng.uniform(0.7, 1.3, n_waves))
    directions = np.column_stack([np.cos(angles), np.sin(angles)]) * k[:, None]
    field = np.cos(xy @ directions.T + rng.uniform(0, 2 * np.pi, n_waves)).sum(axis=1)
    return (field - field.mean()) / field.std()


def synthetic_survey(n: int, n_species: int = 30):
    """The benchmark survey at ``n`` sites (a Survey; deterministic for each n)."""
    from spatial_ev.input.survey import Survey

    xy = clustered_layout(n)
    side = 100_000.0 * np.sqrt(n / 10_000)
    rng = np.random.default_rng(SEED_COMMUNITY)
    broad, medium = smooth_field(xy, side / 2, rng), smooth_field(xy, side / 8, rng)
    env = np.column_stack([
        0.7 * broad + 0.7 * rng.normal(size=n),         # tracks the broad field
        0.6 * medium + 0.8 * rng.normal(size=n),        # tracks the medium field
        smooth_field(xy, side / 3, rng),                # smooth, unrelated to the community
        rng.normal(size=n)])                            # noise
    drivers = np.column_stack([broad, medium, env[:, 0], env[:, 1]])
    loadings = rng.normal(0, 0.6, size=(4, n_species))
    counts = rng.poisson(np.exp(0.8 + drivers @ loadings))
    counts[:, 0] += 1                                   # no empty site
    ids = pd.Index([f"s{i:06d}" for i in range(n)], name="site")
    sites = pd.DataFrame({"x": xy[:, 0], "y": xy[:, 1]}, index=ids)
    species = pd.DataFrame(counts, index=ids, columns=[f"sp{j:02d}" for j in range(n_species)])
    environment = pd.DataFrame(env.round(6), index=ids,
                               columns=["moisture", "nutrients", "slope", "noise"])
    return Survey.from_frames(sites, species, environment, x="x", y="y", crs="EPSG:3035")


# ----------------------------------------------------------------------------------------------
# timers around library functions (outside the library)
# ----------------------------------------------------------------------------------------------

class StageClock:
    """Exclusive wall time per category: time inside a wrapped call minus the time of the
    wrapped calls nested in it (so that tests inside a selection count as tests)."""

    def __init__(self) -> None:
        self.totals: dict[str, float] = {}
        self.local = threading.local()

    def wrap(self, category: str, func, skip=None):
        @functools.wraps(func)
        def timed(*args, **kwargs):
            if threading.current_thread() is not threading.main_thread() or \
                    (skip is not None and skip(*args, **kwargs)):
                return func(*args, **kwargs)
            stack = self.local.__dict__.setdefault("stack", [])
            stack.append(0.0)                  # time of nested timed calls
            start = time.perf_counter()
            try:
                return func(*args, **kwargs)
            finally:
                elapsed = time.perf_counter() - start
                nested = stack.pop()
                self.totals[category] = self.totals.get(category, 0.0) + elapsed - nested
                if stack:
                    stack[-1] += elapsed
        return timed


def instrument(clock: StageClock) -> None:
    """Wrap the functions of each category wherever the package looks them up."""
    import importlib

    import spatial_ev  # noqa: F401
    from spatial_ev.selection.weighting import SchemeRun

    targets = {
        "eigen-decomposition": [("spatial_ev.space.eigen", "distance_eigenvectors"),
                                ("spatial_ev.space.eigen", "graph_eigenvectors")],
        "neighbour graphs": [("spatial_ev.space.graphs", "neighbour_graph")],
        "selection": [("spatial_ev.selection.forward", "run_selection")],
        "permutation tests": [("spatial_ev.inference.engines", "run_tasks")],
    }
    for module in ("spatial_ev.pipeline.analysis", "spatial_ev.pipeline.steps",
                   "spatial_ev.selection.weighting", "spatial_ev.inference.spectral",
                   "spatial_ev.inference.permutation", "spatial_ev.inference.null",
                   "spatial_ev.inference.lcbd", "spatial_ev.selection.partition"):
        importlib.import_module(module)

    def scheme_task(function, *args, **kwargs):   # the scheme tasks are not tests
        return isinstance(function, SchemeRun)

    for category, names in targets.items():
        for module_name, name in names:
            original = getattr(importlib.import_module(module_name), name, None)
            if original is None:
                continue
            wrapped = clock.wrap(category, original,
                                 scheme_task if name == "run_tasks" else None)
            for module in list(sys.modules.values()):
                if getattr(module, "__name__", "").startswith("spatial_ev") and \
                        getattr(module, name, None) is original:
                    setattr(module, name, wrapped)


# ----------------------------------------------------------------------------------------------
# one run (in its own process)
# ----------------------------------------------------------------------------------------------

def _blas() -> list[dict]:
    from threadpoolctl import threadpool_info
    import scipy.linalg  # noqa: F401  (load scipy's BLAS too)

    return [{"api": i.get("internal_api"), "version": i.get("version"),
             "kernel": i.get("architecture"), "threads": i.get("num_threads"),
             "library": os.path.basename(i.get("filepath", ""))} for i in threadpool_info()]


def _workers_usage() -> tuple[float, float]:
    """CPU seconds and largest peak RSS (MiB) of this process's descendants (the worker
    processes, possibly under a fork server), read before they are stopped."""
    try:
        import psutil
    except ImportError:
        return float("nan"), float("nan")
    cpu, peak = 0.0, 0.0
    for child in psutil.Process().children(recursive=True):
        try:
            times = child.cpu_times()
            cpu += times.user + times.system
            with open(f"/proc/{child.pid}/status") as handle:
                for line in handle:
                    if line.startswith("VmHWM:"):
                        peak = max(peak, int(line.split()[1]) / 1024)
        except (psutil.Error, OSError):
            continue
    return cpu, peak


def run_one(n: int, mode: str, n_permutations: int, step_tests: str = "auto") -> dict:
    from spatial_ev.inference.engines import close_pools, run_tasks
    from spatial_ev.pipeline.analysis import analyse
    from spatial_ev.report.summary import summary_record

    survey = synthetic_survey(n)
    options = dict(n_permutations=n_permutations, seed=SEED_ANALYSIS, step_tests=step_tests)
    clock = None
    if mode == "threads":
        clock = StageClock()
        instrument(clock)
    else:
        options.update(engine="processes", n_workers=int(mode[-1]))
        run_tasks(abs, [1], engine="processes", n_workers=int(mode[-1]))  # pool up first
    stages: list[tuple[float, str]] = []
    r0 = resource.getrusage(resource.RUSAGE_SELF)
    start = time.perf_counter()
    result = analyse(survey, progress=lambda m: stages.append((time.perf_counter(), m)),
                     **options)
    wall = time.perf_counter() - start
    r1 = resource.getrusage(resource.RUSAGE_SELF)
    worker_cpu, worker_peak = _workers_usage() if mode != "threads" else (0.0, 0.0)
    close_pools()
    record = summary_record(result)
    out = {"n": n, "mode": mode, "permutations": n_permutations, "wall_s": wall,
           "cpu_s": (r1.ru_utime - r0.ru_utime) + (r1.ru_stime - r0.ru_stime) + worker_cpu,
           "peak_rss_mib": r1.ru_maxrss / 1024, "worker_peak_rss_mib": worker_peak,
           "load_average": os.getloadavg()[0], "blas": _blas(),
           "chosen": result.settings["chosen_scheme"], "rule": result.settings["step_tests"],
           "n_selected": len(record["selected"]["space"]),
           "n_vectors": record["spatial_basis"]["n_vectors"],
           "summary": json.dumps(record, sort_keys=True)}
    if clock is not None:
        out["stages"] = dict(clock.totals)
    out["comparison_s"] = _comparison_seconds(stages, start + wall)
    return out


_AFTER_COMPARISON = ("partitioning", "testing the environment-only", "fitting the scale",
                     "local contributions")


def _comparison_seconds(stages: list[tuple[float, str]], end: float) -> float:
    """Wall time of the weighting-scheme comparison, from the progress messages: from
    "comparing ... scheme(s)" to the first message of a later step."""
    begin = next((t for t, m in stages if m.startswith("comparing")), None)
    if begin is None:
        return float("nan")
    return next((t for t, m in stages if t > begin and m.startswith(_AFTER_COMPARISON)),
                end) - begin


def _subprocess(n: int, mode: str, n_permutations: int, step_tests: str) -> dict:
    done = subprocess.run([sys.executable, __file__, "--one", str(n), "--mode", mode,
                           "--permutations", str(n_permutations), "--step-tests", step_tests],
                          capture_output=True, text=True)
    if done.returncode != 0:
        raise RuntimeError(f"{n} sites, {mode}: {done.stderr[-3000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[500, 2_000, 10_000],
                        help="numbers of sites (default 500 2000 10000; 100000 is accepted)")
    parser.add_argument("--permutations", type=int, default=999)
    parser.add_argument("--modes", nargs="+", default=list(MODES), choices=MODES)
    parser.add_argument("--step-tests", default="auto",
                        choices=("auto", "full", "sequential", "shared"),
                        help="forward-selection step tests: every permutation (full), "
                             "stopping once p <= alpha is settled (sequential), one set "
                             "of permutations shared by the steps (shared), or the "
                             "analysis default (auto: full up to 1,000 sites, shared above)")
    parser.add_argument("--one", type=int, default=None, help=argparse.SUPPRESS)
    parser.add_argument("--mode", default="threads", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.one is not None:
        print(json.dumps(run_one(args.one, args.mode, args.permutations, args.step_tests)))
        return

    print(f"cores={os.cpu_count()}; OPENBLAS_CORETYPE="
          f"{os.environ.get('OPENBLAS_CORETYPE', '(unset)')}")
    for info in _blas():
        print(f"  BLAS {info['api']} {info['version']} kernel {info['kernel']} "
              f"threads {info['threads']} ({info['library']})")
    print(f"{args.permutations} permutations per test ({args.step_tests} step tests); "
          f"8 weighting schemes compared\n")
    for n in args.sizes:
        runs = {}
        for mode in args.modes:
            r = runs[mode] = _subprocess(n, mode, args.permutations, args.step_tests)
            peak = r["peak_rss_mib"] if mode == "threads" else \
                f"{r['peak_rss_mib']:.0f} MiB (+ workers {r['worker_peak_rss_mib']:.0f} MiB each)"
            peak = f"{peak:.0f} MiB" if mode == "threads" else peak
            print(f"{n:>7,d} sites  {mode:<10s}  wall {r['wall_s']:8.1f} s  "
                  f"CPU {r['cpu_s']:8.1f} s  peak {peak}  load {r['load_average']:.1f}  "
                  f"chosen {r['chosen']} ({r['n_selected']} of {r['n_vectors']} vectors)")
            print(f"{'':>16s}step tests {r['rule']}; weighting-scheme comparison "
                  f"{r['comparison_s']:.1f} s "
                  f"({r['comparison_s'] / r['wall_s']:.0%} of the wall time)")
            if "stages" in r:
                shares = r["stages"]
                named = sum(shares.values())
                parts = [f"{k} {v / r['wall_s']:.0%}" for k, v in shares.items()]
                parts.append(f"other {1 - named / r['wall_s']:.0%}")
                print(f"{'':>16s}time: " + ", ".join(parts))
        if "processes1" in runs and "processes2" in runs:
            speed = runs["processes1"]["wall_s"] / runs["processes2"]["wall_s"]
            print(f"{'':>16s}throughput 2 vs 1 worker processes: {speed:.2f}x (goal >= 1.7)")
        first = next(iter(runs.values()))["summary"]
        same = all(r["summary"] == first for r in runs.values())
        print(f"{'':>16s}summary.json records identical across modes: {same}\n")


if __name__ == "__main__":
    main()
