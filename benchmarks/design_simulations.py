"""Benchmark: design simulations per second on each engine, and where the time goes.

Run:  python benchmarks/design_simulations.py [--simulations N] [--permutations N]

Pilot: the demo survey analysed with distance-based vectors (99 permutations, seed 20240917).
Layouts: the pilot layout and every 2nd site (220 and 110 sites). The same simulations
(same seed) run on

* local, 1 thread (tasks one after the other, BLAS as configured),
* local, 2 threads (``run_tasks`` thread pool; BLAS limited to one thread per task),
* 1 and 2 local worker processes (``engine="processes"``, one BLAS thread each; the pool is
  started once before timing, as it is kept for the session),
* a 2-worker dask LocalCluster of single-thread worker processes (what ``engine="dask"``
  starts without a scheduler), and the same cluster with its workers as threads of this
  process (``processes=False``),

and the power and fraction tables are checked to be identical on every engine. Each configuration runs ``--repeats`` times
and the fastest run is reported (the machine may be shared; the load average is printed).
Time outside numerical work is measured on the serial run by timing, outermost call only, the numerical kernels: the batched permutation
products (``permutation._Kernel.__call__``: gathers + GEMM + sums of squares), the QR bases
of the models (``canonical._column_basis``) and any LAPACK call through ``numpy.linalg`` /
``scipy.linalg`` (qr, lstsq, svd, eigh). Everything else — input checks, pandas frames, seed
streams, Python control flow of selection and partition, small numpy operations outside those
kernels — counts as "outside", so that share is an upper bound.
"""

from __future__ import annotations

import argparse
import functools
import os
import threading
import time

import numpy as np
import scipy.linalg
from threadpoolctl import threadpool_info

import spatial_ev.inference.permutation as permutation
import spatial_ev.selection.forward as forward
import spatial_ev.stats.linear as linear
from spatial_ev.pipeline.analysis import analyse
from spatial_ev.datasets.mudflat import generate_demo_survey
from spatial_ev.design.evaluate import evaluate_design
from spatial_ev.input.survey import Survey


class KernelClock:
    """Accumulates wall time of wrapped functions, counting only the outermost call."""

    def __init__(self) -> None:
        self.total = 0.0
        self.local = threading.local()

    def wrap(self, func):
        @functools.wraps(func)
        def timed(*args, **kwargs):
            if getattr(self.local, "inside", False):
                return func(*args, **kwargs)
            self.local.inside = True
            start = time.perf_counter()
            try:
                return func(*args, **kwargs)
            finally:
                self.total += time.perf_counter() - start
                self.local.inside = False
        return timed


def instrument(clock: KernelClock) -> list:
    patched = []

    def patch(owner, name):
        original = getattr(owner, name, None)
        if original is None:   # moved elsewhere: not timed (the share stays an upper bound)
            return
        setattr(owner, name, clock.wrap(original))
        patched.append((owner, name, original))

    patch(permutation._Kernel, "__call__")
    # the rank-revealing basis, where the model core and forward selection look it up
    patch(linear, "column_basis")
    patch(forward, "column_basis")
    for name in ("qr", "lstsq", "svd", "eigh"):
        patch(np.linalg, name)
    for name in ("qr", "svd", "eigh"):
        patch(scipy.linalg, name)
    return patched


def restore(patched: list) -> None:
    for owner, name, original in reversed(patched):
        setattr(owner, name, original)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--simulations", type=int, default=24)
    parser.add_argument("--permutations", type=int, default=199)
    parser.add_argument("--repeats", type=int, default=2)
    args = parser.parse_args()
    print(f"load average (1, 5, 15 min): {os.getloadavg()}")

    print(f"OPENBLAS_CORETYPE={os.environ.get('OPENBLAS_CORETYPE')}; cores={os.cpu_count()}")
    for info in threadpool_info():
        print(f"  {info.get('internal_api')} {info.get('version')} kernel "
              f"{info.get('architecture')} threads {info.get('num_threads')} "
              f"({os.path.basename(info.get('filepath', ''))})")

    demo = generate_demo_survey()
    survey = Survey.from_frames(demo.sites, demo.species, demo.environment)
    start = time.perf_counter()
    pilot = analyse(survey, spatial_weighting="single", schemes="distance", n_permutations=99,
                    seed=20240917)
    print(f"pilot analysis: {time.perf_counter() - start:.1f} s, "
          f"{len(pilot.selected_space)} vectors selected")
    layouts = ["thin:every=2"]
    n_tasks = 2 * args.simulations
    common = dict(n_simulations=args.simulations, n_permutations=args.permutations,
                  seed=20261202)

    clock = KernelClock()
    patched = instrument(clock)
    start = time.perf_counter()
    serial = evaluate_design(pilot, layouts, n_workers=1, **common)
    elapsed = time.perf_counter() - start
    restore(patched)
    print(f"\nlocal, 1 thread : {elapsed:7.2f} s  {n_tasks / elapsed:6.2f} simulations/s "
          f"(instrumented)")
    print(f"  numerical kernels {clock.total:.2f} s = {clock.total / elapsed:.0%} of the time; "
          f"outside numerical work ≤ {1 - clock.total / elapsed:.0%}")

    def best(run):
        times = []
        for _ in range(args.repeats):
            start = time.perf_counter()
            out = run()
            times.append(time.perf_counter() - start)
        return out, min(times)

    _, plain = best(lambda: evaluate_design(pilot, layouts, n_workers=1, **common))
    print(f"local, 1 thread : {plain:7.2f} s  {n_tasks / plain:6.2f} simulations/s")
    runs = {"local, 2 threads": None}
    runs["local, 2 threads"], t = best(lambda: evaluate_design(pilot, layouts, n_workers=2,
                                                               **common))
    print(f"local, 2 threads: {t:7.2f} s  {n_tasks / t:6.2f} simulations/s")

    from spatial_ev.inference.engines import run_tasks

    run_tasks(abs, [1, 2], engine="processes", n_workers=2)  # the session's pool, started once
    rates = {}
    for workers in (1, 2):
        out, t = best(lambda: evaluate_design(pilot, layouts, engine="processes",
                                              n_workers=workers, **common))
        runs[f"{workers} worker process(es)"], rates[workers] = out, n_tasks / t
        print(f"processes, {workers} worker{'s' if workers > 1 else ' '}: {t:7.2f} s  "
              f"{n_tasks / t:6.2f} simulations/s")
    print(f"  speed-up from 1 to 2 worker processes: {rates[2] / rates[1]:.2f}x (goal >= 1.7)")

    import distributed

    for processes in (True, False):
        with distributed.LocalCluster(processes=processes, n_workers=2, threads_per_worker=1,
                                      dashboard_address=":0") as cluster, \
                distributed.Client(cluster) as client:
            client.run(lambda: None)  # workers up before timing
            out, t = best(lambda: evaluate_design(pilot, layouts, engine="dask",
                                                  scheduler=client, **common))
        kind = "processes" if processes else "threads"
        runs[f"dask ({kind})"] = out
        print(f"dask 2 workers ({kind:9s}): {t:7.2f} s  {n_tasks / t:6.2f} simulations/s")
    same = {name: out.power.equals(serial.power) and out.fractions.equals(serial.fractions)
            for name, out in runs.items()}
    print("power and fraction tables identical to the serial run: "
          + ", ".join(f"{name}: {ok}" for name, ok in same.items()))


if __name__ == "__main__":
    main()
