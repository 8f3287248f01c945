"""Benchmark: a block eigensolver (LOBPCG) against the package's Lanczos path, same operator.

The package computes the broadest distance-based vectors above the dense limit with implicitly
restarted Lanczos (ARPACK) on the doubly centred truncated-distance matrix. This script asks
whether a block method warm-started from a coarse solution is faster at equal accuracy:
LOBPCG (scipy.sparse.linalg.lobpcg; Knyazev 2001, SIAM J. Sci. Comput. 23:517–541) on the same
operator, started from low-frequency plane waves over the survey's bounding box (the shapes the
broadest vectors take), with a block of k + extra columns and no preconditioner.

Run: ``python benchmarks/eigen_block_solver.py [--sizes 10000 30000] [--k 200] [--extra 40]``.
Layouts are the invented clustered layouts of ``eigen_scaling.py`` (same generator and seed).
Printed per size: both wall times, their ratio, LOBPCG's iteration count and the largest
relative difference of the k eigenvalues (goal: 1e-8); then each method's growth in time from
the first to the last size. Timings depend on other load on the machine.
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np
from scipy import sparse
from scipy.sparse.linalg import LinearOperator, lobpcg
from threadpoolctl import threadpool_info

import eigen_scaling  # the layout generator of the eigenvector benchmark (same folder)


def truncated_matrix(xy: np.ndarray) -> sparse.csr_matrix:
    """The truncated-distance weights 1 − (d / 4t)² within the spanning-tree threshold t."""
    from spatial_ev.space.geometry import band_pairs, check_coordinates, mst_threshold

    layout = check_coordinates(xy, distance="euclidean")
    t = mst_threshold(layout)
    i, j, d = band_pairs(layout, t)
    n = len(xy)
    w = sparse.coo_matrix((1.0 - (np.asarray(d, float) / (4 * t)) ** 2, (i, j)),
                          shape=(n, n)).tocsr()
    return (w + w.T).tocsr()


def centred(w: sparse.csr_matrix) -> LinearOperator:
    """x ↦ C W C x, C the centring matrix, for vectors and blocks."""
    def apply(x):
        x = np.asarray(x, dtype=float)
        y = w @ (x - x.mean(axis=0))
        return y - y.mean(axis=0)
    n = w.shape[0]
    return LinearOperator((n, n), matvec=apply, matmat=apply, dtype=float)


def plane_waves(xy: np.ndarray, count: int) -> np.ndarray:
    """``count`` orthonormal centred products of cosines, lowest total frequency first."""
    z = (xy - xy.min(axis=0)) / np.ptp(xy, axis=0)
    cols, f = [], 0
    while len(cols) < count:
        f += 1
        cols += [np.cos(np.pi * a * z[:, 0]) * np.cos(np.pi * (f - a) * z[:, 1])
                 for a in range(f + 1)]
    x = np.column_stack(cols[:count])
    return np.linalg.qr(x - x.mean(axis=0))[0]


def run(n: int, k: int, extra: int) -> dict:
    from spatial_ev.space.eigen import distance_eigenvectors

    xy = eigen_scaling.clustered_layout(n)
    t0 = time.perf_counter()
    basis = distance_eigenvectors(xy, max_vectors=k, solver="sparse", distance="euclidean")
    t_lanczos = time.perf_counter() - t0      # includes the graph and the vectors' scales
    w = truncated_matrix(xy)
    t0 = time.perf_counter()
    mu, _, history = lobpcg(centred(w), plane_waves(xy, k + extra), largest=True,
                            tol=1e-6 * float(basis.eigenvalues[0]), maxiter=400,
                            retLambdaHistory=True)
    t_block = time.perf_counter() - t0
    mu = np.sort(mu)[::-1][:basis.n_vectors]
    ref = np.asarray(basis.eigenvalues, dtype=float)
    return {"n": n, "lanczos_s": t_lanczos, "block_s": t_block, "iterations": len(history),
            "max_rel_diff": float(np.max(np.abs(mu - ref) / np.abs(ref)))}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[10_000, 30_000])
    parser.add_argument("--k", type=int, default=200)
    parser.add_argument("--extra", type=int, default=40)
    args = parser.parse_args()
    print(f"cores={os.cpu_count()}; OPENBLAS_CORETYPE="
          f"{os.environ.get('OPENBLAS_CORETYPE', '(unset)')}")
    for info in threadpool_info():
        if info["user_api"] == "blas":
            print(f"  BLAS {info['internal_api']} {info['version']} kernel "
                  f"{info.get('architecture')} threads {info['num_threads']}")
    rows = []
    for n in args.sizes:
        r = run(n, args.k, args.extra)
        rows.append(r)
        print(f"{n:>7,d} sites  Lanczos (package, whole basis) {r['lanczos_s']:7.1f} s  "
              f"LOBPCG {r['block_s']:7.1f} s ({r['iterations']} iterations)  "
              f"LOBPCG / Lanczos {r['block_s'] / r['lanczos_s']:.1f}  "
              f"max relative eigenvalue difference {r['max_rel_diff']:.1e}  "
              f"load {os.getloadavg()[0]:.1f}")
    if len(rows) > 1:
        a, b = rows[0], rows[-1]
        print(f"growth {a['n']:,d} -> {b['n']:,d} sites: Lanczos "
              f"{b['lanczos_s'] / a['lanczos_s']:.1f}x, LOBPCG {b['block_s'] / a['block_s']:.1f}x")


if __name__ == "__main__":
    main()
