"""Batched permutation tests for (partial) redundancy analysis.

Statistic: pseudo-F = (SS_model / df_model) / (SS_residual / df_residual), with df_model the
rank of X (after the conditioning table W) and df_residual = n - 1 - rank(W) - rank(X).

Permutation methods
    * ``"raw"`` (no conditioning table): the rows of the centred Y are permuted.
    * ``"reduced_residual"`` (with W): the residuals R of Y on W (the reduced model) are
      permuted (Freedman & Lane 1983, J. Bus. Econ. Stat. 1:292-298 [memory]). The variant
      that adds the reduced model's fitted values back before refitting gives the same pseudo-F
      here, because the numerator's basis is orthogonal to W and the residual sum of squares of
      the full model removes W again; we therefore compute it from the permuted residuals
      directly. This is the method of choice for partial tests (Anderson & Legendre 1999,
      J. Stat. Comput. Simul. 62:271-303).

p-value: ``(k + 1) / (N + 1)`` with k the number of permuted statistics >= the observed one
(Phipson & Smyth 2010, Stat. Appl. Genet. Mol. Biol. 9:39 [memory]); a permuted value counts as
"as large" when it is >= observed x (1 - 1e-10), so that rounding in the last digits (the
identity permutation, symmetric designs) never turns a tie into a miss.

Batched engine. For an orthonormal basis Q = [Q_W | Q_X] (n x k) and permuted residuals ΠR,
the sums of squares are ``||Q^T Π R||²`` split by block. Many permutations share one matrix
product: either the rows of R are gathered for a batch of permutations and multiplied by Q^T
(``(k x n) @ (n x batch*p)``), or -- when Q has fewer columns than R -- the rows of Q are
gathered with the inverse permutations (``Q[Π⁻¹]^T R``); the narrower side is gathered, in
cache-sized batches (about 8 MiB, ``_GATHER_BYTES``). Memory is O(batch * n * min(p, k)) per
task thread. With more species than sites R is first reduced to its n x rank(R)
singular-value form, which keeps every sum of squares. When X spans more dimensions than the
residual space (many spatial eigenvectors on few sites; up to 5,000 sites), a basis of the
residual space (orthogonal complement of [1, W, X]) replaces Q_X and SS_X = ||ΠR||² - SS_W -
SS_residual, which is cheaper. Tasks (``chunk_size`` permutations each) run on
:func:`spatial_ev.inference.engines.run_tasks`: locally one thread per core, each drawing its own
permutations and calling single-threaded BLAS.

Callers that grow a model themselves (forward selection) test on their own orthonormal bases
with :func:`orthonormal_permutation_test`, which factorises nothing and can stop once the
decision "p ≤ α?" is settled (:func:`spatial_ev.inference.null.sequential_decision`).

Reproducibility. Permutations are drawn in fixed blocks of 128 from
``SeedSequence(entropy, spawn_key=(block,))``, where ``entropy`` is drawn once from the seed.
The same seed therefore gives the same permutations -- and the same null distribution up to
floating-point rounding (~1e-15 relative) and the same p-value -- whatever ``chunk_size``,
thread count or engine.

Restricted permutations (``restriction``)
    * ``"free"``: all n! orders; assumes the sites are exchangeable under H0 (no spatial
      autocorrelation of the residuals, no strata).
    * ``"blocks"``: rows are permuted only within strata given by ``blocks`` (e.g. survey
      years, regions, nested plots); use when sites are exchangeable only within strata.
    * ``"cyclic"``: circular shifts of the row order (n distinct permutations); for a regular
      transect whose rows are in transect order, it keeps the autocorrelation of the series.
    * ``"toroidal"``: shifts of a complete regular grid (``grid_shape=(n_rows, n_cols)``, sites
      in row-major order) in both directions, wrapping around (n distinct permutations); keeps
      two-dimensional autocorrelation. Cyclic and toroidal shifts are exact only for designs
      where wrapping around is plausible; with n small, p-values cannot go below ~1/n.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, replace
from functools import partial
from typing import Any

import numpy as np
import pandas as pd
import scipy.linalg

from spatial_ev._validation import check_int, check_option, check_rng
from spatial_ev.stats.linear import (
    Table, LinearModel, adjusted_r2, check_explanatory, check_response, model_fraction,
    prepare_model)
from spatial_ev.inference.engines import run_tasks
from spatial_ev.errors import InputError
from spatial_ev.inference.null import (SeedBlocks, SequentialRule, check_run_options,
                                       permutation_p_value, sequential_decision)
from spatial_ev.stats.linear import reduce_response

__all__ = ["permutation_test", "PermutationTest", "axis_tests", "term_tests", "permutations",
           "orthonormal_permutation_test", "RESTRICTIONS", "SharedStepPermutations"]

RESTRICTIONS = ("free", "blocks", "cyclic", "toroidal")
_GATHER_BYTES = 8 * 2 ** 20
_COMPLEMENT_MAX_SITES = 5000
_MIN_PIECE = 32                # smallest task when a short run is split over the workers   # the complement is built from an n x n orthogonal matrix


# ----------------------------------------------------------------------------------------------
# permutation indices
# ----------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class _Scheme:
    """How permutations are drawn: restriction, number of sites and the seed's entropy."""

    restriction: str
    n: int
    entropy: int
    strata: np.ndarray | None = None     # (n,) integer codes for "blocks"
    grid_shape: tuple[int, int] | None = None

    def rows(self, start: int, stop: int) -> np.ndarray:
        """Permutations number ``start`` to ``stop - 1``, shape (stop - start, n), from the
        null service's seed blocks."""
        return SeedBlocks(self.entropy, partial(_DRAW[self.restriction], self)).rows(start, stop)


def _draw_free(scheme: _Scheme, rng: np.random.Generator, m: int) -> np.ndarray:
    return rng.permuted(np.broadcast_to(np.arange(scheme.n, dtype=np.intp), (m, scheme.n)),
                        axis=1)


def _draw_blocks(scheme: _Scheme, rng: np.random.Generator, m: int) -> np.ndarray:
    keys = rng.random((m, scheme.n))
    codes = np.broadcast_to(scheme.strata, (m, scheme.n))
    shuffled = np.lexsort((keys, codes), axis=-1)         # random order within each stratum
    base = np.argsort(scheme.strata, kind="stable")       # the same slots, in site order
    out = np.empty((m, scheme.n), dtype=np.intp)
    out[:, base] = shuffled
    return out


def _draw_cyclic(scheme: _Scheme, rng: np.random.Generator, m: int) -> np.ndarray:
    shift = rng.integers(0, scheme.n, size=(m, 1))
    return (np.arange(scheme.n) + shift) % scheme.n


def _draw_toroidal(scheme: _Scheme, rng: np.random.Generator, m: int) -> np.ndarray:
    n_rows, n_cols = scheme.grid_shape
    shift_r = rng.integers(0, n_rows, size=(m, 1, 1))
    shift_c = rng.integers(0, n_cols, size=(m, 1, 1))
    r = (np.arange(n_rows)[None, :, None] + shift_r) % n_rows
    c = (np.arange(n_cols)[None, None, :] + shift_c) % n_cols
    return (r * n_cols + c).reshape(m, scheme.n)


_DRAW: dict[str, Callable[[_Scheme, np.random.Generator, int], np.ndarray]] = {
    "free": _draw_free, "blocks": _draw_blocks, "cyclic": _draw_cyclic,
    "toroidal": _draw_toroidal,
}


def _check_scheme(n, seed, restriction, blocks, grid_shape, rows) -> _Scheme:
    restriction = check_option("restriction", restriction, RESTRICTIONS)
    if restriction != "blocks" and blocks is not None:
        raise InputError(f"parameter `blocks` is used only with restriction='blocks'; got "
                         f"restriction={restriction!r}")
    if restriction != "toroidal" and grid_shape is not None:
        raise InputError(f"parameter `grid_shape` is used only with restriction='toroidal'; "
                         f"got restriction={restriction!r}")
    rng = check_rng(seed)
    entropy = int(rng.integers(0, 2 ** 63))
    strata = shape = None
    if restriction == "blocks":
        if blocks is None:
            raise InputError("restriction='blocks' needs `blocks`: one stratum label per site")
        if isinstance(blocks, pd.Series) and rows is not None and not blocks.index.equals(rows):
            raise InputError("`blocks` is a Series whose index differs from the sites of `Y`; "
                             "align it first, e.g. `blocks.loc[Y.index]`")
        labels = np.asarray(blocks)
        if labels.ndim != 1 or len(labels) != n:
            raise InputError(f"`blocks` must give one stratum label per site ({n}); got shape "
                             f"{labels.shape}")
        _, strata = np.unique(labels, return_inverse=True)
        if np.bincount(strata).max() < 2:
            raise InputError("`blocks` puts every site in its own stratum, so no permutation "
                             "is possible; use larger strata")
    if restriction == "toroidal":
        ok = (isinstance(grid_shape, (tuple, list)) and len(grid_shape) == 2
              and all(isinstance(v, (int, np.integer)) and v >= 1 for v in grid_shape))
        if not ok or int(grid_shape[0]) * int(grid_shape[1]) != n:
            raise InputError(f"restriction='toroidal' needs `grid_shape=(n_rows, n_cols)` with "
                             f"n_rows * n_cols = {n} sites in row-major order; got {grid_shape!r}")
        shape = (int(grid_shape[0]), int(grid_shape[1]))
    return _Scheme(restriction, n, entropy, strata, shape)


def permutations(n_sites: int, n_permutations: int, *,
                 seed: None | int | np.random.Generator = None, restriction: str = "free",
                 blocks: Any = None, grid_shape: tuple[int, int] | None = None) -> np.ndarray:
    """The permutations a test with these settings uses, shape (n_permutations, n_sites).

    Row i maps site positions to the position whose residual they receive.

    Examples
    --------
    >>> permutations(5, 2, seed=123456789).shape
    (2, 5)
    """
    n_sites = check_int("n_sites", n_sites, low=2)
    n_permutations = check_int("n_permutations", n_permutations, low=1)
    scheme = _check_scheme(n_sites, seed, restriction, blocks, grid_shape, None)
    return scheme.rows(0, n_permutations)


# ----------------------------------------------------------------------------------------------
# the batched kernel
# ----------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class _Kernel:
    """Statistic of every permutation in a range; picklable so that dask can ship it."""

    basis: np.ndarray        # (n, q + r'): [Q_W | Q_X], or [Q_W | complement] (see below)
    response: np.ndarray     # (n, p'): residuals of Y on W (possibly SVD-reduced)
    q: int
    ss_total: float          # ||response||²
    df_model: int
    df_residual: int
    statistic: str           # "f" (pseudo-F) or "first_axis" (largest eigenvalue, axis tests)
    scheme: _Scheme
    complement: bool = False  # second block spans the residual space instead of X

    def __call__(self, task: tuple[int, int]) -> np.ndarray:
        start, stop = task
        perms = self.scheme.rows(start, stop)
        k, p = self.basis.shape[1], self.response.shape[1]
        width = min(k, p)
        step = max(1, _GATHER_BYTES // (8 * self.scheme.n * width))
        return np.concatenate([self._batch(perms[i:i + step], gather_basis=k < p)
                               for i in range(0, len(perms), step)])

    def _batch(self, perms: np.ndarray, *, gather_basis: bool) -> np.ndarray:
        m, n = perms.shape
        k, p = self.basis.shape[1], self.response.shape[1]
        if gather_basis:
            # (Π R)^T Q = R^T Q[Π⁻¹]: gather the narrower basis with inverse permutations
            inverse = np.empty_like(perms)
            np.put_along_axis(inverse, perms, np.arange(n)[None, :], axis=1)
            g = self.basis.take(inverse.T, axis=0).reshape(n, m * k)   # (n, m*k)
            prod = (g.T @ self.response).reshape(m, k, p)                # (m, k, p)
            ss = np.einsum("mkp,mkp->mk", prod, prod)
        else:
            g = self.response.take(perms.T, axis=0).reshape(n, m * p)  # (n, m*p)
            prod = (self.basis.T @ g).reshape(k, m, p)                   # (k, m, p)
            ss = np.einsum("kmp,kmp->km", prod, prod).T
        ss_w = ss[:, :self.q].sum(axis=1)
        ss_2 = ss[:, self.q:].sum(axis=1)
        if self.complement:  # permuted residuals are centred: total = W part + X part + rest
            ss_x = np.maximum(self.ss_total - ss_w - ss_2, 0.0)
            return ss_x / self.df_model / (ss_2 / self.df_residual)
        resid = np.maximum(self.ss_total - ss_w - ss_2, 0.0) / self.df_residual
        if self.statistic == "f":
            return ss_2 / self.df_model / resid
        block = prod[:, self.q:, :] if gather_basis else prod[self.q:].transpose(1, 0, 2)
        gram = block @ block.transpose(0, 2, 1) if k - self.q <= p \
            else block.transpose(0, 2, 1) @ block
        return np.linalg.eigvalsh(gram)[:, -1] / resid


# ----------------------------------------------------------------------------------------------
# result and the public tests
# ----------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class PermutationTest:
    """Result of :func:`permutation_test`.

    Attributes
    ----------
    statistic : float
        Observed pseudo-F.
    p_value : float
        ``(k + 1) / (N + 1)``; NaN when ``n_permutations`` is 0.
    null_distribution : ndarray, shape (n_permutations,)
        Pseudo-F of every permutation, in permutation order.
    n_permutations : int
    method : str
        ``"raw"`` (rows of Y permuted) or ``"reduced_residual"`` (residuals of Y on the
        conditioning table permuted, Freedman & Lane 1983).
    restriction : str
        ``"free"``, ``"blocks"``, ``"cyclic"`` or ``"toroidal"``.
    r2, r2_adj : float
        R² and adjusted R² of X (given the conditioning table: fraction [a], Peres-Neto et al.
        2006).
    df_model, df_residual : int
        Rank of X after W, and ``n - 1 - rank(W) - rank(X)``.
    stop : str
        ``"full"`` (all ``n_permutations`` drawn), or, for a sequential decision
        (:func:`orthonormal_permutation_test` with ``decision``), ``"not_significant"`` /
        ``"significant"`` when it stopped early; ``n_permutations`` is then the number the
        p-value rests on (:class:`~spatial_ev.inference.null.SequentialOutcome`).

    The test assumes that sites (or the residuals of the reduced model) are exchangeable under
    the null hypothesis within the chosen restriction; spatially autocorrelated residuals make a
    free permutation test liberal.
    """

    statistic: float
    p_value: float
    null_distribution: np.ndarray = field(repr=False)
    n_permutations: int
    method: str
    restriction: str
    r2: float
    r2_adj: float
    df_model: int
    df_residual: int
    stop: str = "full"

    def to_frame(self) -> pd.DataFrame:
        """One-row table of the test.

        Examples
        --------
        >>> import numpy as np
        >>> rng = np.random.default_rng(5)
        >>> t = permutation_test(rng.normal(size=(20, 3)), rng.normal(size=(20, 2)),
        ...                      n_permutations=99, seed=5)
        >>> list(t.to_frame().columns)[:3]
        ['r2', 'r2_adj', 'df_model']
        """
        return pd.DataFrame([{
            "r2": self.r2, "r2_adj": self.r2_adj, "df_model": self.df_model,
            "df_residual": self.df_residual, "pseudo_f": self.statistic, "p_value": self.p_value,
            "n_permutations": self.n_permutations, "method": self.method,
            "restriction": self.restriction}])

    def summary(self) -> str:
        """Plain-text summary with the test's assumption.

        Examples
        --------
        >>> import numpy as np
        >>> rng = np.random.default_rng(5)
        >>> "pseudo-F" in permutation_test(rng.normal(size=(20, 3)), rng.normal(size=(20, 2)),
        ...                                n_permutations=99, seed=5).summary()
        True
        """
        how = ("rows of Y permuted" if self.method == "raw"
               else "residuals of the conditioning model permuted (Freedman & Lane)")
        return (f"pseudo-F = {self.statistic:.4g} (df {self.df_model}, {self.df_residual}), "
                f"p = {self.p_value:.4g} from {self.n_permutations} permutations ({how}, "
                f"{self.restriction}); R² = {self.r2:.4f}, adjusted R² = {self.r2_adj:.4f}. "
                "Valid if sites are exchangeable under the null hypothesis within the "
                "restriction; spatial autocorrelation in the residuals makes free permutations "
                "liberal.")


def _null(kernels: list[_Kernel], n_permutations: int, chunk_size: int, engine: str,
          scheduler, n_workers, progress, start: int = 0) -> list[np.ndarray]:
    """Null distributions of several kernels (permutations ``start`` to ``n_permutations - 1``),
    all tasks sent to the engine at once.

    A run with fewer tasks than workers (e.g. 199 permutations in chunks of 256, or one
    round of a sequential decision) is split into smaller tasks, at least ``_MIN_PIECE``
    permutations each, so that every worker has one; the split never changes the values."""
    workers = n_workers or os.cpu_count() or 1
    tasks_per_kernel = -(-(n_permutations - start) // chunk_size) if n_permutations > start \
        else 0
    if 0 < len(kernels) * tasks_per_kernel < workers:
        per_task = -(-(n_permutations - start) * len(kernels) // workers)
        chunk_size = min(chunk_size, max(_MIN_PIECE, -(-per_task // len(kernels))))
    ranges = [(a, min(a + chunk_size, n_permutations))
              for a in range(start, n_permutations, chunk_size)]
    tasks = [(i, r) for i in range(len(kernels)) for r in ranges]
    out = run_tasks(_MultiKernel(tuple(kernels)), tasks, engine=engine, scheduler=scheduler,
                    n_workers=n_workers, progress=progress)
    per = len(ranges)
    return [np.concatenate(out[i * per:(i + 1) * per]) if per else np.zeros(0)
            for i in range(len(kernels))]


@dataclass(frozen=True)
class _MultiKernel:
    kernels: tuple

    def __call__(self, task):
        which, rows = task
        return self.kernels[which](rows)


def _test(model: LinearModel, scheme: _Scheme, statistic: str = "f"):
    """Observed statistic and kernel for the X part of ``model`` given its W part."""
    qw, qx = model.qw, model.qx
    n, q, r = model.n, qw.shape[1], qx.shape[1]
    resid = model.y - qw @ (qw.T @ model.y) if q else model.y
    response = reduce_response(resid)
    ss_total = float(np.einsum("ij,ij->", response, response))
    df_res = n - 1 - q - r
    prod = qx.T @ response
    ss_x = float(np.einsum("ij,ij->", prod, prod))
    denominator = max(ss_total - ss_x, 0.0) / df_res
    if statistic == "f":
        observed = ss_x / r / denominator
    else:
        observed = float(np.linalg.svd(prod, compute_uv=False)[0] ** 2) / denominator
    second, complement = qx, False
    if statistic == "f" and df_res < r and n <= _COMPLEMENT_MAX_SITES:
        # fewer residual than model dimensions: the orthogonal complement of [1, W, X] is the
        # narrower basis, and SS_X = SS_total - SS_W - SS_residual
        spanned = np.column_stack([np.full(n, n ** -0.5), qw, qx])
        full = scipy.linalg.qr(spanned, mode="full", check_finite=False)[0]
        second, complement = full[:, spanned.shape[1]:], True
    kernel = _Kernel(np.ascontiguousarray(np.hstack([qw, second])), response, q, ss_total, r,
                     df_res, statistic, scheme, complement)
    return observed, kernel


def permutation_test(Y: Table, X: Table, *, conditioning: Table | None = None,
                     n_permutations: int = 999,
                     seed: None | int | np.random.Generator = None, chunk_size: int | None = None,
                     engine: str = "local", scheduler: Any = None, restriction: str = "free",
                     blocks: Any = None, grid_shape: tuple[int, int] | None = None,
                     progress: Callable[[int, int], Any] | None = None,
                     n_workers: int | None = None) -> PermutationTest:
    """Permutation test of the (partial) RDA of Y on X, with a batched engine.

    Parameters
    ----------
    Y : DataFrame or array, shape (n_sites, n_species)
        Response table (usually transformed).
    X : DataFrame or array, shape (n_sites, n_variables)
        Explanatory table to test.
    conditioning : DataFrame or array, shape (n_sites, n_covariables), optional
        Covariables W: tests X given W by reduced-model residual permutation.
    n_permutations : int
        Number of permutations N (0 gives the statistic only, p = NaN).
    seed : None, int or numpy Generator
        One draw from it fixes every permutation (see the module notes on reproducibility).
    chunk_size : int, optional
        Permutations per task handed to the engine (default 256); does not change results.
        Memory stays O(batch * n * min(p, rank)) per thread, with gathers of about 8 MiB
        (cache-sized batches) inside a task.
    engine : {"local", "dask"}
        See :func:`spatial_ev.inference.engines.run_tasks`; ``scheduler`` is its address or Client.
    restriction : {"free", "blocks", "cyclic", "toroidal"}
        Permutation scheme (module notes); ``blocks`` gives strata labels for "blocks",
        ``grid_shape=(n_rows, n_cols)`` the complete regular grid for "toroidal".
    progress : callable, optional
        ``progress(done, total)`` after each finished task.
    n_workers : int, optional
        Threads (local) or workers (temporary dask LocalCluster); see
        :func:`~spatial_ev.inference.engines.run_tasks`. Does not change results.

    Returns
    -------
    PermutationTest

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(918273645)
    >>> x = rng.normal(size=(30, 2))
    >>> y = x @ rng.normal(size=(2, 5)) + rng.normal(size=(30, 5))
    >>> test = permutation_test(y, x, n_permutations=199, seed=42)
    >>> test.p_value
    0.005
    """
    n_permutations, chunk_size, engine = check_run_options(n_permutations, chunk_size, engine, progress)
    model = prepare_model(Y, X, conditioning, require_x=True)
    scheme = _check_scheme(model.n, seed, restriction, blocks, grid_shape, model.rows)
    observed, kernel = _test(model, scheme)
    null = _null([kernel], n_permutations, chunk_size, engine, scheduler, n_workers, progress)[0]
    fraction = model_fraction(model)
    return PermutationTest(
        statistic=float(observed), p_value=permutation_p_value(observed, null), null_distribution=null,
        n_permutations=n_permutations,
        method="reduced_residual" if model.qw.shape[1] else "raw",
        restriction=scheme.restriction, r2=fraction.r2, r2_adj=fraction.r2_adj,
        df_model=fraction.rank,
        df_residual=kernel.df_residual)


def orthonormal_permutation_test(y: np.ndarray, within: np.ndarray, tested: np.ndarray, *,
                                 n_permutations: int = 999,
                                 seed: None | int | np.random.Generator = None,
                                 chunk_size: int | None = None, engine: str = "local",
                                 scheduler: Any = None,
                                 progress: Callable[[int, int], Any] | None = None,
                                 n_workers: int | None = None,
                                 decision: SequentialRule | None = None) -> PermutationTest:
    """Permutation test of ``tested`` given ``within`` from orthonormal bases built by the caller.

    The entry for callers that keep the bases of a growing model themselves (forward
    selection adds one column per step): nothing is factorised here, so a step costs
    O(n·k·p) for the residuals and the permutations instead of a QR of the whole model. The
    statistic, permutations (for a seed) and p-value are those of :func:`permutation_test`
    with the same spans (free permutations; reduced-model residual permutation when
    ``within`` has columns), up to rounding in the last digits.

    Parameters
    ----------
    y : ndarray, shape (n_sites, n_responses)
        Column-centred response.
    within : ndarray, shape (n_sites, q)
        Orthonormal columns orthogonal to the constant (the conditioning basis; q may be 0).
    tested : ndarray, shape (n_sites, r)
        Orthonormal columns orthogonal to the constant and to ``within``, r ≥ 1.
    n_permutations, seed, chunk_size, engine, scheduler, progress, n_workers
        As in :func:`permutation_test`.
    decision : SequentialRule, optional
        Stop drawing once "p ≤ α?" is settled (:func:`~spatial_ev.inference.null.
        sequential_decision`): the result's ``stop`` says how it ended and
        ``n_permutations`` how many permutations the p-value rests on. Only for tests whose
        one use is that decision (selection steps); needs ``n_permutations`` ≥ 1.

    Returns
    -------
    PermutationTest

    Notes
    -----
    Only shapes, finiteness and unit column norms are checked (O(n·k)); orthogonality is the
    caller's promise, since checking it would cost the factorisation this entry avoids.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(918273645)
    >>> x = rng.normal(size=(30, 2))
    >>> y = x @ rng.normal(size=(2, 5)) + rng.normal(size=(30, 5))
    >>> q = np.linalg.qr(x - x.mean(axis=0))[0]
    >>> orthonormal_permutation_test(y - y.mean(axis=0), q[:, :0], q, n_permutations=199,
    ...                              seed=42).p_value
    0.005
    """
    n_permutations, chunk_size, engine = check_run_options(n_permutations, chunk_size, engine,
                                                           progress)
    y, within, tested = (_check_orthonormal_piece(name, a) for name, a in
                         (("y", y), ("within", within), ("tested", tested)))
    n = y.shape[0]
    for name, a in (("within", within), ("tested", tested)):
        if a.shape[0] != n:
            raise InputError(f"`{name}` has {a.shape[0]} rows but `y` has {n}; every table "
                             f"must have one row per site")
        norms = np.sqrt(np.einsum("ij,ij->j", a, a))
        if norms.size and np.abs(norms - 1.0).max() > 1e-8:
            raise InputError(f"`{name}` must have orthonormal columns; column "
                             f"{int(np.argmax(np.abs(norms - 1.0)))} has norm "
                             f"{norms[np.argmax(np.abs(norms - 1.0))]:.6g}; pass an "
                             f"orthonormal basis (e.g. from numpy.linalg.qr)")
    if tested.shape[1] == 0:
        raise InputError("`tested` has no columns; pass at least one basis vector to test")
    if n - within.shape[1] - tested.shape[1] - 1 <= 0:
        raise InputError(f"the model has {within.shape[1] + tested.shape[1]} independent "
                         f"predictors for {n} sites, which leaves no residual degrees of "
                         f"freedom; test fewer columns")
    if decision is not None:
        if not isinstance(decision, SequentialRule):
            raise InputError(f"parameter `decision` must be a SequentialRule or None; got "
                             f"{type(decision).__name__}")
        if n_permutations == 0:
            raise InputError("a sequential `decision` needs n_permutations >= 1; got 0")
    model = LinearModel(y, None, None, within, tested, None, pd.Index([]),
                        np.arange(tested.shape[1]), pd.Index([]))
    scheme = _check_scheme(n, seed, "free", None, None, None)
    observed, kernel = _test(model, scheme)
    stop = "full"
    if decision is None:
        null = _null([kernel], n_permutations, chunk_size, engine, scheduler, n_workers,
                     progress)[0]
        p_value, used = permutation_p_value(observed, null), n_permutations
    else:
        outcome = sequential_decision(
            lambda a, b: _null([kernel], b, chunk_size, engine, scheduler, n_workers,
                               progress, start=a)[0], observed, n_permutations, decision)
        null, p_value, used, stop = outcome.null, outcome.p_value, outcome.n_used, outcome.stop
    fraction = model_fraction(model)
    return PermutationTest(
        statistic=float(observed), p_value=float(p_value), null_distribution=null,
        n_permutations=used, method="reduced_residual" if within.shape[1] else "raw",
        restriction="free", r2=fraction.r2, r2_adj=fraction.r2_adj, df_model=fraction.rank,
        df_residual=kernel.df_residual, stop=stop)


class SharedStepPermutations:
    """Step tests of one forward selection on one shared set of permutations, updated as the
    model grows instead of recomputed.

    Each step tests a new orthonormal column x given the model's orthonormal basis Q by the
    reduced-model residual permutation test of :func:`orthonormal_permutation_test`
    (Freedman & Lane 1983): pseudo-F of x on the permuted residuals R of the response on Q.
    Its permutation statistic needs ‖Q'ΠR‖² for every permutation Π, which costs n·k·p per
    permutation when computed afresh (k columns in Q, p responses). Here the N permutations are
    drawn once for the whole selection, and when a column q enters the model
    (R ← R − q c', c = R'q) that quantity is updated per permutation from Q'Πq and Q'ΠRc
    (n·k each) and q'ΠR (n·p): about n·(2k + p) instead of n·k·p.

    Every step is still an exact permutation test of its own null hypothesis with N random
    permutations; the steps of one selection share them, so their p-values are dependent (as
    they are anyway, being computed on one data set), and they differ from those of
    :func:`orthonormal_permutation_test` with per-step seeds.

    Parameters
    ----------
    y : ndarray, shape (n, p)
        Centred response.
    within : ndarray, shape (n, k)
        Orthonormal, centred basis of the model before the first step (k may be 0).
    n_permutations : int
        N, the permutations every step is tested with (≥ 1).
    seed : int or numpy.random.Generator, optional
        Fixes the permutations (:func:`permutations`, free restriction).

    Examples
    --------
    >>> rng = np.random.default_rng(7)
    >>> x = rng.normal(size=(40, 1)); x -= x.mean(0); x /= np.linalg.norm(x)
    >>> y = 30 * x @ rng.normal(size=(1, 4)) + rng.normal(size=(40, 4)); y -= y.mean(0)
    >>> steps = SharedStepPermutations(y, np.zeros((40, 0)), 199, seed=1)
    >>> steps.test(x[:, 0]).p_value
    0.005
    >>> steps.add(x[:, 0]); steps.n_columns
    1
    """

    _ROWS_BYTES = 8 * 2 ** 20   # gathered rows per batch (about 8 MiB)
    #: both index tables are kept as native (intp) indices while they take at most this many
    #: bytes together; above it (e.g. 100,000 sites × 999 permutations) as 32-bit indices,
    #: converted one batch at a time. numpy converts 32-bit indices before every gather, which
    #: makes a gather about three times slower (measured by benchmarks/permutation_engine.py).
    _NATIVE_INDEX_BYTES = 2 * 2 ** 30

    def __init__(self, y: np.ndarray, within: np.ndarray, n_permutations: int,
                 seed: None | int | np.random.Generator = None) -> None:
        y, within = (_check_orthonormal_piece(name, a) for name, a in
                     (("y", y), ("within", within)))
        n = y.shape[0]
        if within.shape[0] != n:
            raise InputError(f"`within` has {within.shape[0]} rows but `y` has {n}; every "
                             f"table must have one row per site")
        self.n_permutations = check_int("n_permutations", n_permutations, low=1)
        # rows contiguous: each gather reads one permutation's indices in a run
        perms = np.ascontiguousarray(permutations(n, self.n_permutations, seed=seed),
                                     dtype=np.intp)
        inverse = np.empty_like(perms)
        np.put_along_axis(inverse, perms, np.arange(n, dtype=np.intp)[None, :], axis=1)
        if 2 * perms.nbytes > self._NATIVE_INDEX_BYTES:
            compact = np.int32 if n < 2 ** 31 else np.int64
            perms, inverse = perms.astype(compact), inverse.astype(compact)
        self._perms, self._inverse = perms, inverse
        k = within.shape[1]
        self._store = np.empty((n, max(2 * k, 16)))     # the model's basis; doubles when full
        self._store[:, :k] = within
        self._k = k
        q = self._store[:, :k]
        self._r = y - q @ (q.T @ y) if k else y.copy()
        self._y_ss = float(np.einsum("ij,ij->", y, y))
        self._ss = float(np.einsum("ij,ij->", self._r, self._r))
        self._a = np.zeros(self.n_permutations)
        self._tested: tuple[np.ndarray, np.ndarray] | None = None   # (column, its x'ΠR)
        self._work: np.ndarray | None = None                          # gather buffer
        if k:
            for rows, part in self._batches(width=y.shape[1]):
                g = self._r.take(part.T, axis=0)                       # (n, m, p)
                prod = np.einsum("nk,nmp->mkp", q, g, optimize=True)
                self._a[rows] = np.einsum("mkp,mkp->m", prod, prod)

    @property
    def n_columns(self) -> int:
        """Columns in the model so far (the starting basis and those added)."""
        return self._k

    def _batches(self, inverse: bool = False, width: int = 1):
        """Permutation rows (as native indices) in batches whose gathered values (``width``
        per site and permutation) take about 8 MiB."""
        n = self._r.shape[0]
        step = max(1, self._ROWS_BYTES // (8 * n * max(width, 1)))
        source = self._inverse if inverse else self._perms
        for start in range(0, self.n_permutations, step):
            rows = slice(start, min(start + step, self.n_permutations))
            yield rows, source[rows].astype(np.intp, copy=False)

    def _column(self, column: Any) -> np.ndarray:
        x = np.ascontiguousarray(column, dtype=float).reshape(-1)   # gathers need it dense
        if x.shape[0] != self._r.shape[0] or not np.isfinite(x).all():
            raise InputError(f"`column` must be {self._r.shape[0]} finite values (one per "
                             f"site)")
        if abs(float(x @ x) - 1.0) > 1e-8:
            raise InputError(f"`column` must have unit norm (orthonormalised against the "
                             f"model); its norm is {float(np.sqrt(x @ x)):.6g}")
        return x

    def _gather(self, values: np.ndarray, part: np.ndarray, into: int = 0) -> np.ndarray:
        """``values`` (n,) permuted by each row of ``part``, written into rows ``into``…
        of a work buffer kept between calls (a fresh 8 MiB array per gather costs more in
        page faults than the gather itself)."""
        m, n = part.shape
        if self._work is None or self._work.shape[0] < into + m:
            self._work = np.empty((max(2 * m, into + m), n))
        out = self._work[into:into + m]
        np.take(values, part, out=out, mode="wrap")    # indices are valid: no checking copy
        return out

    def _projections(self, x: np.ndarray) -> np.ndarray:
        """x'ΠR for every permutation Π, shape (N, p); kept for the column last tested,
        which is the one a selection adds next."""
        if self._tested is not None and np.array_equal(self._tested[0], x):
            return self._tested[1]
        out = np.empty((self.n_permutations, self._r.shape[1]))
        for rows, part in self._batches(inverse=True):
            np.matmul(self._gather(x, part), self._r, out=out[rows])    # (Π'x)'R = x'ΠR
        self._tested = (x.copy(), out)
        return out

    def test(self, column: Any) -> PermutationTest:
        """Test ``column`` (unit norm, orthogonal to the model) given the model.

        Returns
        -------
        PermutationTest
            With ``method="reduced_residual"`` (``"raw"`` before any column), the null
            distribution over the N shared permutations.
        """
        x = self._column(column)
        n, k = self._r.shape[0], self._k
        df_res = n - 1 - k - 1
        if df_res <= 0:
            raise InputError(f"the model has {k + 1} predictors for {n} sites, which leaves "
                             f"no residual degrees of freedom; test fewer columns")
        xr = x @ self._r
        b_obs = float(xr @ xr)
        proj = self._projections(x)
        b = np.einsum("mp,mp->m", proj, proj)
        observed = b_obs / (max(self._ss - b_obs, 0.0) / df_res)
        with np.errstate(divide="ignore", invalid="ignore"):
            null = b / (np.maximum(self._ss - self._a - b, 0.0) / df_res)
        null = np.where(np.isfinite(null), null, np.inf)
        r2_w = 1.0 - self._ss / self._y_ss
        r2_xw = r2_w + b_obs / self._y_ss
        adj = adjusted_r2(r2_xw, n, k + 1) - (adjusted_r2(r2_w, n, k) if k else 0.0)
        return PermutationTest(
            statistic=float(observed), p_value=float(permutation_p_value(observed, null)),
            null_distribution=null, n_permutations=self.n_permutations,
            method="reduced_residual" if k else "raw", restriction="free",
            r2=float(b_obs / self._y_ss), r2_adj=float(adj), df_model=1, df_residual=df_res)

    def add(self, column: Any) -> None:
        """Enter ``column`` (unit norm, orthogonal to the model) into the model."""
        q = self._column(column)
        c = self._r.T @ q                                                  # (p,)
        r = self._r @ c                                                    # (n,)
        cc = float(c @ c)
        proj = self._projections(q)                                        # q'ΠR, (N, p)
        k = self._k
        basis = self._store[:, :k]
        for rows, part in self._batches():
            m = part.shape[0]
            qp = self._gather(q, part)                                     # Πq, (m, n)
            w = proj[rows] - (qp @ q)[:, None] * c[None, :]                # q'ΠR_new
            update = np.einsum("mp,mp->m", w, w)
            if k:
                self._gather(r, part, into=m)                              # [Πq; Πr]
                both = self._work[:2 * m] @ basis                          # Q'Πq, Q'Πr
                u, v = both[:m], both[m:]
                update += cc * np.einsum("mk,mk->m", u, u) - 2.0 * np.einsum("mk,mk->m", u, v)
            self._a[rows] += update
        self._r = self._r - np.outer(q, c)
        self._ss = max(self._ss - cc, 0.0)
        self._tested = None
        if k == self._store.shape[1]:
            grown = np.empty((self._store.shape[0], 2 * k))
            grown[:, :k] = basis
            self._store = grown
        self._store[:, k] = q
        self._k = k + 1


def _check_orthonormal_piece(name: str, a: Any) -> np.ndarray:
    if not isinstance(a, np.ndarray) or a.ndim != 2:
        raise InputError(f"`{name}` must be a 2-d numpy array (sites x columns); got "
                         f"{type(a).__name__}" + (f" with {a.ndim} dimension(s)"
                                                  if isinstance(a, np.ndarray) else ""))
    a = np.asarray(a, dtype=float)
    if not np.isfinite(a).all():
        raise InputError(f"`{name}` contains NaN or infinite values; pass finite numbers")
    return a


_AXIS_METHODS = ("forward", "marginal")


def axis_tests(Y: Table, X: Table, *, conditioning: Table | None = None,
               method: str = "forward", max_axes: int | None = None,
               n_permutations: int = 999, seed: None | int | np.random.Generator = None,
               chunk_size: int | None = None, engine: str = "local", scheduler: Any = None,
               restriction: str = "free", blocks: Any = None,
               grid_shape: tuple[int, int] | None = None,
               progress: Callable[[int, int], Any] | None = None,
               n_workers: int | None = None) -> pd.DataFrame:
    """Permutation test of each canonical axis of a (partial) RDA, one axis at a time.

    Axes are tested one by one, never all at once (testing every axis against the permuted
    first eigenvalues is invalid: Legendre, Oksanen & ter Braak 2011, Methods Ecol. Evol.
    2:269-277). For axis j the statistic is ``sigma_j² / (RSS / df_residual)`` (sigma_j² the
    axis' sum of squares, RSS the full model's residual sum of squares) and it is compared to
    the largest eigenvalue statistic of the permuted data:

    * ``"forward"``: the fitted site scores of axes 1..j-1 (and the conditioning table) are
      covariables; residuals of Y on them are permuted (Freedman & Lane). Read the results in
      order and stop at the first axis that is not significant.
    * ``"marginal"``: the fitted site scores of every *other* canonical axis are covariables.

    Parameters are those of :func:`permutation_test`; ``max_axes`` limits the number of axes
    tested (default: all canonical axes). Every axis uses the same permutations.

    Returns
    -------
    DataFrame
        Index ``canonical_1, ...``; columns ``variance`` (eigenvalue), ``proportion`` (of the
        total variance of Y), ``pseudo_f``, ``p_value``, ``n_permutations``, ``method``.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(5647382910)
    >>> x = rng.normal(size=(40, 3))
    >>> y = x[:, :1] @ rng.normal(size=(1, 6)) * 2 + rng.normal(size=(40, 6))
    >>> float(axis_tests(y, x, n_permutations=199, seed=3)["p_value"].iloc[0])
    0.005
    """
    n_permutations, chunk_size, engine = check_run_options(n_permutations, chunk_size, engine, progress)
    method = check_option("method", method, _AXIS_METHODS)
    model = prepare_model(Y, X, conditioning, require_x=True)
    scheme = _check_scheme(model.n, seed, restriction, blocks, grid_shape, model.rows)
    qw, qx = model.qw, model.qx
    resid = model.y - qw @ (qw.T @ model.y) if qw.shape[1] else model.y
    u, s, _ = np.linalg.svd(qx.T @ resid, full_matrices=True)
    s = np.concatenate([s, np.zeros(u.shape[0] - s.size)])
    n_canonical = int(np.count_nonzero(s > s[0] * max(resid.shape) * np.finfo(float).eps * 10))
    n_axes = n_canonical
    if max_axes is not None:
        n_axes = min(n_axes, check_int("max_axes", max_axes, low=1))
    directions = qx @ u                                   # (n, r): canonical directions first
    observed, kernels = [], []
    for j in range(n_axes):
        if method == "forward":
            cond, test = np.arange(j), np.arange(j, qx.shape[1])
        else:
            cond = np.delete(np.arange(n_canonical), j)
            test = np.concatenate([[j], np.arange(n_canonical, qx.shape[1])]).astype(int)
        sub = replace(model, qw=np.hstack([qw, directions[:, cond]]), qx=directions[:, test])
        stat, kernel = _test(sub, scheme, "first_axis")
        observed.append(stat)
        kernels.append(kernel)
    nulls = _null(kernels, n_permutations, chunk_size, engine, scheduler, n_workers, progress)
    total = float(np.einsum("ij,ij->", model.y, model.y))
    return pd.DataFrame({
        "variance": s[:n_axes] ** 2 / (model.n - 1),
        "proportion": s[:n_axes] ** 2 / total,
        "pseudo_f": observed,
        "p_value": [permutation_p_value(o, nl) for o, nl in zip(observed, nulls)],
        "n_permutations": n_permutations,
        "method": method,
    }, index=pd.Index([f"canonical_{j + 1}" for j in range(n_axes)], name="axis"))


def _check_terms(Y, terms, conditioning):
    y, rows, _ = check_response(Y)
    if not isinstance(terms, Mapping) or not terms:
        raise InputError("parameter `terms` must be a non-empty mapping {name: table}, e.g. "
                         "{'environment': env, 'space': vectors}; got "
                         f"{type(terms).__name__}")
    tables = {str(name): check_explanatory(f"terms[{name!r}]", table, y.shape[0], rows)[0]
              for name, table in terms.items()}
    w = None
    if conditioning is not None:
        w = check_explanatory("conditioning", conditioning, y.shape[0], rows)[0]
    models = {}
    for name, table in tables.items():
        others = [t for other, t in tables.items() if other != name] + ([w] if w is not None
                                                                         else [])
        try:
            models[name] = prepare_model(Y, table, np.hstack(others) if others else None,
                                    require_x=True)
        except InputError as exc:
            raise InputError(f"term {name!r} cannot be tested given the other terms: {exc}") \
                from None
    return models


def term_tests(Y: Table, terms: Mapping[str, Table], *, conditioning: Table | None = None,
               n_permutations: int = 999,
               seed: None | int | np.random.Generator = None, chunk_size: int | None = None,
               engine: str = "local", scheduler: Any = None, restriction: str = "free",
               blocks: Any = None, grid_shape: tuple[int, int] | None = None,
               progress: Callable[[int, int], Any] | None = None,
               n_workers: int | None = None) -> pd.DataFrame:
    """Test each term given all the other terms (and ``conditioning``).

    Each term's unique contribution is tested by reduced-model residual permutation
    (Freedman & Lane 1983): the residuals of Y on the other terms are permuted. Every term uses
    the same permutations. The unique fractions do not add up to the joint R² when terms are
    correlated (the shared part is not testable).

    Parameters
    ----------
    Y : DataFrame or array, shape (n_sites, n_species)
    terms : mapping of str to DataFrame or array, each (n_sites, n_variables_t)
    conditioning, n_permutations, seed, chunk_size, engine, scheduler, restriction, blocks, \
grid_shape, progress, n_workers
        As in :func:`permutation_test`.

    Returns
    -------
    DataFrame
        Index = term names; columns ``df`` (rank added by the term), ``r2`` and ``r2_adj``
        (unique fraction, Peres-Neto et al. 2006), ``pseudo_f``, ``p_value``,
        ``n_permutations``, ``method``.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(1029384756)
    >>> a, b = rng.normal(size=(30, 2)), rng.normal(size=(30, 2))
    >>> y = a @ rng.normal(size=(2, 4)) + rng.normal(size=(30, 4))
    >>> float(term_tests(y, {"a": a, "b": b}, n_permutations=199, seed=9)["p_value"]["a"])
    0.005
    """
    n_permutations, chunk_size, engine = check_run_options(n_permutations, chunk_size, engine, progress)
    models = _check_terms(Y, terms, conditioning)
    first = next(iter(models.values()))
    scheme = _check_scheme(first.n, seed, restriction, blocks, grid_shape, first.rows)
    tests = [_test(model, scheme) for model in models.values()]
    nulls = _null([k for _, k in tests], n_permutations, chunk_size, engine, scheduler,
                  n_workers, progress)
    fractions = [model_fraction(model) for model in models.values()]
    return pd.DataFrame({
        "df": [f.rank for f in fractions],
        "r2": [f.r2 for f in fractions],
        "r2_adj": [f.r2_adj for f in fractions],
        "pseudo_f": [o for o, _ in tests],
        "p_value": [permutation_p_value(o, nl) for (o, _), nl in zip(tests, nulls)],
        "n_permutations": n_permutations,
        "method": ["reduced_residual" if m.qw.shape[1] else "raw" for m in models.values()],
    }, index=pd.Index(list(models), name="term"))
