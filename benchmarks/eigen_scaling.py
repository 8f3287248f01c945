"""Scaling of distance-based spatial eigenvectors: 10k, 30k and 100k irregular sites, k = 200.

Each size runs in its own subprocess so that peak memory (``ru_maxrss``, which includes numpy
and ARPACK work arrays, unlike tracemalloc) is measured per size. Also compares the sparse
(Lanczos) path with the dense path at n = 4,000, and the dense path's two LAPACK drivers
(MRRR against divide and conquer) at n = 2,000.

Layout: an invented clustered design of constant sampling density (20 % of sites spread
uniformly, 80 % in Gaussian clusters of ~250 sites, sd 2.5 km, domain side 100 km·√(n/10⁴)),
so the distance band at the MST threshold holds ~120 neighbours per site at every n.

Run: ``python benchmarks/eigen_scaling.py`` (add ``--sizes 10000 30000`` to shorten;
``--sizes --dense-n 0`` runs the driver comparison alone).
Timings depend on other load on the machine; memory does not.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time

import numpy as np


def clustered_layout(n: int, seed: int = 20_240_607) -> np.ndarray:
    """Invented irregular layout: uniform background plus Gaussian clusters."""
    rng = np.random.default_rng(seed)
    side = 100_000.0 * np.sqrt(n / 10_000)
    n_clusters = max(n // 250, 4)
    parents = rng.uniform(0, side, size=(n_clusters, 2))
    xy = parents[rng.integers(n_clusters, size=n)] + rng.normal(scale=2_500.0, size=(n, 2))
    xy[: n // 5] = rng.uniform(0, side, size=(n // 5, 2))
    return xy


def run_one(n: int, solver: str, k: int) -> dict:
    """Build the basis once in this process; return timings and peak memory."""
    from spatial_ev.space.geometry import band_pairs, check_coordinates, mst_threshold
    from spatial_ev.space.eigen import distance_eigenvectors

    xy = clustered_layout(n)
    t0 = time.perf_counter()
    layout = check_coordinates(xy, distance="euclidean")
    t = mst_threshold(layout)
    i, _, _ = band_pairs(layout, t)
    t_graph = time.perf_counter() - t0
    t0 = time.perf_counter()
    c0 = _cpu_seconds()
    basis = distance_eigenvectors(xy, max_vectors=k, solver=solver, distance="euclidean")
    t_total = time.perf_counter() - t0
    cpu = _cpu_seconds() - c0
    return {"n": n, "solver": solver, "k": basis.n_vectors, "threshold": t,
            "neighbours_per_site": 2 * len(i) / n, "graph_seconds": t_graph,
            "basis_seconds": t_total, "basis_cpu_seconds": cpu,
            "load_average": os.getloadavg()[0],
            "peak_rss_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
            "eigenvalues": basis.eigenvalues[:5].tolist()}


def _cpu_seconds() -> float:
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime


def _subprocess(n: int, solver: str, k: int) -> dict:
    out = subprocess.run([sys.executable, __file__, "--one", str(n), "--solver", solver,
                          "--k", str(k)], capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def _blas_report() -> str:
    from threadpoolctl import threadpool_info
    import scipy.linalg  # noqa: F401  (load scipy's BLAS too)

    lines = [f"OPENBLAS_CORETYPE={os.environ.get('OPENBLAS_CORETYPE', '(unset)')}"]
    for info in threadpool_info():
        lines.append(f"  {info.get('internal_api')} {info.get('version')} "
                     f"kernel={info.get('architecture')} threads={info.get('num_threads')} "
                     f"({os.path.basename(info.get('filepath', ''))})")
    return "\n".join(lines)


def dense_drivers(n: int) -> list[str]:
    """Time LAPACK's two symmetric drivers on the dense path's matrices at ``n`` sites: MRRR
    (``evr``, for an index subset) and divide and conquer (``evd``, the whole spectrum),
    for a Gabriel graph and the distance band; the dense path picks ``evd`` when more than a
    quarter of the spectrum is wanted and the wanted eigenvalues are distinct. Returns
    printable lines."""
    import scipy.linalg

    from spatial_ev.space.eigen import distance_eigenvectors, graph_eigenvectors
    from spatial_ev.space.graphs import neighbour_graph

    xy = clustered_layout(n)
    lines = []
    for label, basis in (("gabriel/binary", graph_eigenvectors(neighbour_graph(xy, "gabriel"),
                                                               solver="dense")),
                         ("distance band", distance_eigenvectors(xy, solver="dense"))):
        w = basis.weights
        m = w.toarray()
        m -= m.mean(axis=0, keepdims=True)
        m -= m.mean(axis=1, keepdims=True)
        m -= (float(abs(w).sum(axis=1).max()) + 1.0) / n      # the constant parked at the low end
        times, values = {}, {}
        for count in (n // 10, n - 1):
            for driver in ("evr", "evd"):
                a = m.copy()
                start = time.perf_counter()
                if driver == "evr":
                    mu = scipy.linalg.eigh(a, subset_by_index=[n - count, n - 1],
                                           overwrite_a=True, check_finite=False,
                                           driver="evr")[0]
                else:
                    mu = scipy.linalg.eigh(a, overwrite_a=True, check_finite=False,
                                           driver="evd")[0][n - count:]
                times[count, driver], values[count, driver] = time.perf_counter() - start, mu
        agree = all(np.allclose(values[c, "evr"], values[c, "evd"], rtol=1e-10, atol=1e-10)
                    for c in (n // 10, n - 1))
        lines.append(f"n = {n}, {label}: top {n // 10} eigenpairs evr {times[n // 10, 'evr']:.2f} s, "
                     f"evd {times[n // 10, 'evd']:.2f} s; all {n - 1} evr "
                     f"{times[n - 1, 'evr']:.2f} s, evd {times[n - 1, 'evd']:.2f} s "
                     f"({times[n - 1, 'evr'] / times[n - 1, 'evd']:.1f}x); eigenvalues "
                     f"agree to 1e-10: {agree}")
    return lines


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="*", default=[10_000, 30_000, 100_000])
    parser.add_argument("--k", type=int, default=200)
    parser.add_argument("--dense-n", type=int, default=4_000)
    parser.add_argument("--drivers-n", type=int, default=2_000,
                        help="sites for the dense-driver comparison (0 skips it)")
    parser.add_argument("--one", type=int, default=None, help=argparse.SUPPRESS)
    parser.add_argument("--solver", default="sparse", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.one is not None:
        print(json.dumps(run_one(args.one, args.solver, args.k)))
        return
    print(_blas_report())
    if args.drivers_n:
        for line in dense_drivers(args.drivers_n):
            print(line, flush=True)
    print("wall = elapsed seconds; cpu = process CPU seconds (user + system), the fairer "
          "figure when the machine is shared; load = 1-min load average at the end")
    print(f"{'n':>8} {'solver':>7} {'k':>5} {'nbrs/site':>10} {'graph s':>8} {'wall s':>8} "
          f"{'cpu s':>8} {'load':>5} {'peak MiB':>9}")
    results = {}
    for n in args.sizes:
        r = _subprocess(n, "sparse", args.k)
        results[n] = r
        print(f"{n:>8} {'sparse':>7} {r['k']:>5} {r['neighbours_per_site']:>10.1f} "
              f"{r['graph_seconds']:>8.2f} {r['basis_seconds']:>8.2f} "
              f"{r['basis_cpu_seconds']:>8.2f} {r['load_average']:>5.1f} "
              f"{r['peak_rss_mib']:>9.0f}",
              flush=True)
    if 10_000 in results and 100_000 in results:
        wall = results[100_000]["basis_seconds"] / results[10_000]["basis_seconds"]
        cpu = results[100_000]["basis_cpu_seconds"] / results[10_000]["basis_cpu_seconds"]
        print(f"t(100k)/t(10k) = {wall:.1f} wall, {cpu:.1f} cpu (goal <= 15)")
    if args.dense_n:
        d = _subprocess(args.dense_n, "dense", args.k)
        s = _subprocess(args.dense_n, "sparse", args.k)
        agree = np.allclose(d["eigenvalues"], s["eigenvalues"], rtol=1e-8)
        print(f"n = {args.dense_n}, k = {args.k}: dense {d['basis_seconds']:.2f} s wall / "
              f"{d['basis_cpu_seconds']:.2f} s cpu ({d['peak_rss_mib']:.0f} MiB); sparse "
              f"{s['basis_seconds']:.2f} s wall / {s['basis_cpu_seconds']:.2f} s cpu "
              f"({s['peak_rss_mib']:.0f} MiB); speed-up "
              f"{d['basis_seconds'] / s['basis_seconds']:.1f}x wall, "
              f"{d['basis_cpu_seconds'] / s['basis_cpu_seconds']:.1f}x cpu; leading "
              f"eigenvalues agree to 1e-8: {agree}")


if __name__ == "__main__":
    main()
