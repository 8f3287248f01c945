"""Spatial eigenvectors (MEM) from a sparse similarity: distance-based and graph-based.

Both families are eigenvectors of C·W·C (C = I − 11ᵀ/n) for a sparse symmetric W:

* distance-based MEM / PCNM (Borcard & Legendre 2002, Ecol. Model. 153:51–68; Dray, Legendre &
  Peres-Neto 2006, Ecol. Model. 196:483–493): w_ij = 1 − (d_ij/4t)² for 0 < d_ij ≤ t. The
  principal coordinates of the distance matrix truncated at t (distances > t set to 4t) have
  the same eigenvectors, with PCoA eigenvalues λ = 8t²(μ + 1) [derived];
* graph-based MEM (Dray et al. 2006): W = connectivity ∘ edge weights of a
  :class:`~spatial_ev.space.graphs.NeighbourGraph`.

Moran's I of eigenvector k is I_k = (n/S₀)·μ_k (S₀ = 1ᵀW1). Below ~3000 sites a dense symmetric
eigensolver is used; above, Lanczos (ARPACK, :func:`scipy.sparse.linalg.eigsh`) on an operator
that centres implicitly, asking only for the broadest vectors — the n × n matrix is never
formed and memory stays O(n·(neighbours + vectors)).

Lanczos details: ncv = 2k + 1 Lanczos vectors, full machine-precision tolerance, a fixed
starting vector (results repeat), BLAS limited to one thread inside ARPACK (its
reorthogonalisation is memory-bound level-2 BLAS; one thread is as fast on an idle machine and
much faster on a shared one). Most of the time is ARPACK's reorthogonalisation, linear in n per
Lanczos step; the number of steps grows when the broadest eigenvalues crowd together (larger
areas at the same sampling density). See ``benchmarks/eigen_scaling.py``.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import pandas as pd
import scipy.linalg
from scipy import sparse, special
from scipy.sparse import csgraph
from scipy.sparse.linalg import LinearOperator, eigsh
from scipy.spatial import ConvexHull, cKDTree
from threadpoolctl import threadpool_limits

from spatial_ev._validation import check_int, check_option, check_real, significant
from spatial_ev.space.geometry import (Layout, band_pairs, check_coordinates, chord_to_distance,
                                       distance_to_chord, layout_points, mst_threshold,
                                       plane_coordinates, symmetric_matrix)
from spatial_ev.space.graphs import (NeighbourGraph, check_weighting, edge_weight_values,
                                     insertion_neighbours)
from spatial_ev.errors import DisconnectedGraphWarning, InputError

__all__ = ["SpatialBasis", "distance_eigenvectors", "graph_eigenvectors", "DENSE_LIMIT"]

DENSE_LIMIT = 3000
_SIGNS = ("positive", "negative", "all")
_SOLVERS = ("auto", "dense", "sparse")


@dataclass(frozen=True)
class SpatialBasis:
    """A set of spatial eigenvectors (MEM) with their eigenvalues, Moran's I and scales.

    Attributes
    ----------
    vectors : DataFrame, shape (n_sites, k)
        Columns ``sv001``, ``sv002``, … by decreasing eigenvalue (= decreasing Moran's I);
        unit norm, mutually orthogonal, orthogonal to the constant. Sign rule: the first
        entry (site order) among those of largest absolute value (within 1e-8) is positive.
    eigenvalues : ndarray, shape (k,)
        μ_k, eigenvalues of C·W·C (both families). Moran's I = (n/S₀)·μ_k.
    moran_i : Series, shape (k,)
        Moran's I of each vector under ``weights``.
    scale : Series, shape (k,)
        Equivalent wavelength in map units: the 2π/κ that solves
        Σ w_ij (u_i − u_j)² = Σ w_ij (u_i² + u_j²) g(κ d_ij) over the neighbour pairs, g the
        monotone envelope of 1 − J0 in two dimensions (1 − cos on a line). Each pair counts
        with the vector's own amplitude at its ends, so on mixed-density layouts the lags
        where the vector lives set its scale; on equal-length edges this is the plane wave
        (sine on a transect) whose neighbour-lag autocorrelation equals ρ = uᵀWu/uᵀDu
        (D = weighted degrees). On a regular transect vector k has scale ≈ 2n/k spacings;
        half of it is the size of a patch. Vectors finer than the neighbour lags can resolve
        get the finest wavelength those lags resolve.
    method : str
        ``"distance_based"`` or the neighbour-graph method.
    threshold : float or None
        Truncation distance t (distance-based) or distance band threshold.
    weights : scipy.sparse.csr_matrix, shape (n_sites, n_sites)
        The similarity W whose Moran's I the vectors maximise.
    pcoa_eigenvalues : ndarray or None
        λ_k = 8t²(μ_k + 1), principal-coordinate eigenvalues of the truncated distance matrix
        (distance-based family only).
    solver : str
        ``"dense"`` or ``"sparse"`` (Lanczos), the path that ran.
    weighting, exponent : str, float or None
        Edge weighting of a graph-based basis.
    """

    vectors: pd.DataFrame
    eigenvalues: np.ndarray
    moran_i: pd.Series
    scale: pd.Series
    method: str
    threshold: float | None
    weights: sparse.csr_matrix
    pcoa_eigenvalues: np.ndarray | None = None
    solver: str = "dense"
    weighting: str = "binary"
    exponent: float | None = None
    coords: np.ndarray | None = field(default=None, repr=False)
    metric: str = "euclidean"
    graph: NeighbourGraph | None = field(default=None, repr=False)
    self_weight: float = 1.0
    max_distance: float | None = None

    @property
    def n_vectors(self) -> int:
        """Number of vectors k."""
        return self.vectors.shape[1]

    def to_frame(self) -> pd.DataFrame:
        """One row per vector: eigenvalue, Moran's I, scale (and PCoA eigenvalue)."""
        out = pd.DataFrame({"eigenvalue": self.eigenvalues, "moran_i": self.moran_i.to_numpy(),
                            "scale": self.scale.to_numpy()}, index=self.vectors.columns)
        if self.pcoa_eigenvalues is not None:
            out["pcoa_eigenvalue"] = self.pcoa_eigenvalues
        out.index.name = "vector"
        return out

    def summary(self) -> str:
        """Short text description (assumptions included)."""
        i = self.moran_i.to_numpy()
        s = self.scale.to_numpy()
        text = (f"{self.n_vectors} spatial eigenvectors ({self.method}"
                + (f", threshold {significant(self.threshold, 4)}" if self.threshold else "")
                + f", {self.solver} solver) for {self.vectors.shape[0]} sites")
        if self.n_vectors:
            text += (f"; Moran's I from {i.max():.4f} to {i.min():.4f}; scales from "
                     f"{significant(s.max())} to {significant(s.min())} map units "
                     f"(equivalent wavelength)")
        return text + ". Scales assume roughly isotropic, stationary patterns."

    def extend(self, new_coords: Any) -> pd.DataFrame:
        """Values of the vectors at new points (Nyström / add-a-point extension).

        With kernel K = W + cI (c = 1, the self-similarity, for the distance-based family and
        the binary/linear/concave-down weightings; the largest weight for concave-up), a new
        point with similarities k_p to the sites gets u_k(p) = (k_p − K1/n)ᵀu_k / (μ_k + c)
        (Gower 1968 add-a-point; Bengio et al. 2004 Nyström form). At an original site this
        reproduces the vector exactly. Distance-based: k_p = 1 − (d/4t)² for d ≤ t.
        Graph-based: the point gets the edges it would have if inserted in the graph (see
        :func:`spatial_ev.space.graphs.insertion_neighbours`), weighted alike. Vectors with
        μ_k + c near 0 (strongly negative Moran's I; exactly −1 is common for binary graphs
        on regular layouts) cannot be extended: NaN at new points, the site's own value at a
        point on a site.

        Examples
        --------
        >>> b = distance_eigenvectors([[0, 0], [1, 0], [2, 0], [3, 0], [4, 0]])
        >>> bool(np.allclose(b.extend([[1, 0]]).to_numpy(), b.vectors.iloc[[1]].to_numpy()))
        True
        """
        new_xy, new_ids = _check_new_coords(new_coords)
        n = self.vectors.shape[0]
        u = self.vectors.to_numpy()
        c = self.self_weight
        if self.method == "distance_based":
            kp = _distance_kernel_rows(self, new_xy)
            coincident = _coincident_sites(self, new_xy)
        else:
            p, s, d, coincident = insertion_neighbours(self.graph, new_xy)
            w = edge_weight_values(d, self.weighting, self.exponent, self.max_distance or 1.0) \
                if len(d) else d
            base = sparse.csr_matrix((w, (p, s)), shape=(len(new_xy), n))
            hit = np.flatnonzero(coincident >= 0)
            rows = sparse.csr_matrix(self.weights[coincident[hit]])
            sel = sparse.csr_matrix((np.ones(len(hit)), (hit, np.arange(len(hit)))),
                                    shape=(len(new_xy), len(hit)))
            self_part = sparse.csr_matrix((np.full(len(hit), c), (hit, coincident[hit])),
                                          shape=(len(new_xy), n))
            kp = base + sel @ rows + self_part
        row_mean = (np.asarray(self.weights.sum(axis=1)).ravel() + c) / n
        denom = self.eigenvalues + c
        singular = np.abs(denom) <= 1e-8 * max(c, 1e-300)
        values = (kp @ u - row_mean @ u) / np.where(singular, np.nan, denom)
        # μ_k + c = 0 (e.g. μ_k = −1 for a binary graph) leaves the Nyström form 0/0; at a
        # point on a site the vector's value there is known: the site's own
        hit = np.flatnonzero(coincident >= 0)
        if singular.any() and hit.size:
            values[np.ix_(hit, np.flatnonzero(singular))] = \
                u[np.ix_(coincident[hit], np.flatnonzero(singular))]
        return pd.DataFrame(values, index=new_ids, columns=self.vectors.columns)


def _check_new_coords(new_coords: Any) -> tuple[np.ndarray, pd.Index]:
    if hasattr(new_coords, "coords") and not isinstance(new_coords, (np.ndarray, pd.DataFrame)):
        new_coords = new_coords.coords
    if isinstance(new_coords, pd.DataFrame):
        if {"x", "y"} - set(new_coords.columns):
            raise InputError("`new_coords` DataFrame must have columns 'x' and 'y'; got "
                             f"{list(new_coords.columns)!r}")
        return new_coords[["x", "y"]].to_numpy(dtype=np.float64, copy=True), new_coords.index
    try:
        xy = np.array(new_coords, dtype=np.float64, copy=True)
    except (TypeError, ValueError) as exc:
        raise InputError(f"`new_coords` must be numeric coordinates ({exc})") from None
    if xy.ndim != 2 or xy.shape[1] != 2 or not np.isfinite(xy).all():
        raise InputError(f"`new_coords` must be a finite (m, 2) array; got shape {xy.shape}")
    return xy, pd.RangeIndex(len(xy), name="point")


def _coincident_sites(basis: SpatialBasis, new_xy: np.ndarray) -> np.ndarray:
    """Site each point coincides with (within 1e-9 of the layout's extent, the rule of
    :func:`spatial_ev.space.graphs.insertion_neighbours`), −1 where none."""
    layout = check_coordinates(basis.coords, distance=basis.metric)
    new = layout_points(layout, new_xy)
    extent = max(np.ptp(layout.points, axis=0).max(), 1e-300)
    nearest_d, nearest = cKDTree(layout.points).query(new, k=1)
    return np.where(nearest_d <= 1e-9 * extent, nearest, -1)


def _distance_kernel_rows(basis: SpatialBasis, new_xy: np.ndarray) -> sparse.csr_matrix:
    layout = check_coordinates(basis.coords, distance=basis.metric)
    t = basis.threshold
    new = layout_points(layout, new_xy)
    chord = distance_to_chord(t, basis.metric) * (1 + 1e-9)
    hits = cKDTree(new).sparse_distance_matrix(cKDTree(layout.points), chord,
                                               output_type="ndarray")
    p, s = hits["i"].astype(np.int64), hits["j"].astype(np.int64)
    d = chord_to_distance(np.sqrt(((new[p] - layout.points[s]) ** 2).sum(1)), basis.metric)
    keep = d <= t
    p, s, d = p[keep], s[keep], d[keep]
    return sparse.csr_matrix((1.0 - (d / (4 * t)) ** 2, (p, s)), shape=(len(new), layout.n))


# ---------------------------------------------------------------- eigen-solvers

def _centred_operator(w: sparse.csr_matrix) -> LinearOperator:
    """x ↦ C W C x computed as W(x − x̄) − mean(W(x − x̄)), for vectors and blocks."""
    def matmat(x):
        x = np.asarray(x, dtype=np.float64)
        y = w @ (x - x.mean(axis=0))
        return y - y.mean(axis=0)
    n = w.shape[0]
    return LinearOperator((n, n), matvec=matmat, matmat=matmat, rmatvec=matmat,
                          dtype=np.float64)


def solve_dense(w: sparse.csr_matrix, k: int | None, which: str) -> tuple[np.ndarray, np.ndarray]:
    """All (or the k extreme) eigenpairs of CWC orthogonal to 1, by a dense solver.

    The constant vector (eigenvalue 0 of CWC) is parked beyond the unwanted end of the
    spectrum by adding ∓s·11ᵀ/n (s > spectral radius), so the index subset excludes it exactly.
    """
    n = w.shape[0]
    m = w.toarray()
    m -= m.mean(axis=0, keepdims=True)
    m -= m.mean(axis=1, keepdims=True)
    shift = float(abs(w).sum(axis=1).max()) + 1.0
    m += (shift if which == "SA" else -shift) / n
    count = n - 1 if k is None else min(k, n - 1)
    first, last = (n - count, n - 1) if which == "LA" else (0, count - 1)
    if count > n // 4:
        # divide and conquer: 5-7x faster than MRRR for the whole spectrum of these
        # matrices (2,000 sites: 0.65-0.68 s against 3.5-5.0 s; benchmarks/eigen_scaling.py)
        mu, u = scipy.linalg.eigh(m.copy(), check_finite=False, driver="evd")
        kept = mu[first:last + 1]
        if not _has_ties(kept, which):
            return kept, u[:, first:last + 1]
        # repeated eigenvalues (regular grids): any basis of their eigenspace is an answer;
        # MRRR's is kept there, so that results on regular layouts stay as published
    return scipy.linalg.eigh(m, subset_by_index=[first, last], overwrite_a=True,
                             check_finite=False, driver="evr")


def _has_ties(mu: np.ndarray, which: str) -> bool:
    """Whether sorted eigenvalues ``mu`` repeat a value on the wanted side (positive for
    ``"LA"``, negative for ``"SA"``; gap ≤ 1e-8 of the largest magnitude)."""
    scale = max(float(np.abs(mu).max(initial=0.0)), 1e-300)
    side = mu[mu > 1e-9 * scale] if which == "LA" else mu[mu < -1e-9 * scale]
    return bool(side.size > 1 and (np.diff(side) <= 1e-8 * scale).any())


def _solve_sparse(w: sparse.csr_matrix, k: int, which: str) -> tuple[np.ndarray, np.ndarray]:
    """k extreme eigenpairs of CWC by implicitly restarted Lanczos (ARPACK)."""
    n = w.shape[0]
    k = min(k, n - 2)
    v0 = np.random.default_rng(20240607).standard_normal(n)
    v0 -= v0.mean()
    ncv = min(n - 1, max(2 * k + 1, k + 64))
    # ARPACK's reorthogonalisation is memory-bound level-2 BLAS: one thread is as fast on an
    # idle machine, much faster on a loaded one, and makes results repeat bitwise.
    with threadpool_limits(limits=1, user_api="blas"):
        mu, u = eigsh(_centred_operator(w), k=k, which=which, v0=v0, ncv=ncv, tol=0.0,
                      maxiter=max(1000, 20 * n // ncv))
    order = np.argsort(-mu if which == "LA" else mu, kind="stable")
    return mu[order], u[:, order]


def finish_vectors(mu: np.ndarray, u: np.ndarray, keep: str) -> tuple[np.ndarray, np.ndarray]:
    """Keep the vectors of the wanted Moran's I sign (``keep``), order by decreasing μ,
    centre, normalise, fix signs."""
    tol = 1e-9 * max(float(np.abs(mu).max(initial=0.0)), 1e-300)
    kept = {"positive": mu > tol, "negative": mu < -tol, "all": np.ones(len(mu), bool)}[keep]
    mu, u = mu[kept], u[:, kept]
    order = np.argsort(-mu, kind="stable")
    mu, u = mu[order], u[:, order]
    u = u - u.mean(axis=0)
    u /= np.linalg.norm(u, axis=0)
    a = np.abs(u)
    first = np.argmax(a >= a.max(axis=0) * (1 - 1e-8), axis=0)
    u *= np.where(u[first, np.arange(u.shape[1])] < 0, -1.0, 1.0)
    return mu, u


# ---------------------------------------------------------------- scale

def _scales(u: np.ndarray, mu: np.ndarray, w: sparse.csr_matrix, lengths: sparse.spmatrix,
            weights: sparse.spmatrix, one_dimensional: bool) -> np.ndarray:
    """Equivalent wavelength (map units) of each column of u; see SpatialBasis.scale.

    Local-amplitude form: the wavelength 2π/κ solves
    Σ w_ij (u_i − u_j)² = Σ w_ij (u_i² + u_j²) g(κ d_ij) over the edges, with g the monotone
    envelope of 1 − J0 (1 − cos on a line): 1 − J0(min(x, j1)) with j1 = 3.8317 the first
    zero of J1 (π on a line). Each edge counts with the vector's own amplitude at its ends, so
    densely and sparsely sampled parts of a layout each speak for the lags they hold; the left
    side is 2(uᵀDu − uᵀWu), and g is non-decreasing, so the solution is unique up to the
    envelope's plateau (the finest resolvable wavelength). On equal-length edges the amplitude
    weights cancel and the estimate is that of a plane wave whose neighbour-lag
    autocorrelation equals ρ = uᵀWu/uᵀDu.
    """
    if u.shape[1] == 0:
        return np.zeros(0)
    n = u.shape[0]
    lengths, weights = sparse.coo_matrix(lengths), sparse.csr_matrix(weights)
    wv = np.asarray(weights[lengths.row, lengths.col]).ravel()
    pos = wv > 0
    rows, d_e, w_e = lengths.row[pos], lengths.data[pos].astype(float), wv[pos]
    lo, hi = float(d_e.min()), float(d_e.max())
    if hi - lo <= 1e-12 * hi:                  # all edges equally long (regular lattices)
        bins = np.zeros(d_e.size, dtype=np.int64)
        d = np.array([float(np.average(d_e, weights=w_e))])
    else:
        edges = np.linspace(lo, hi, 257)
        bins = np.clip(np.searchsorted(edges, d_e, side="right") - 1, 0, 255)
        hist_w = np.bincount(bins, weights=w_e, minlength=256)
        hist_d = np.bincount(bins, weights=w_e * d_e, minlength=256)
        used = hist_w > 0
        remap = np.cumsum(used) - 1
        bins, d = remap[bins], hist_d[used] / hist_w[used]
    # per site and lag bin: weight of the site's edges in that bin (n × bins, sparse)
    site_bin = sparse.csr_matrix((w_e, (rows, bins)), shape=(n, d.size))
    amp = np.asarray(site_bin.T @ (u * u))                   # (bins, k): Σ_i D_ib u_ik²
    total = amp.sum(axis=0)
    deg_u2 = np.asarray(w.sum(axis=1)).ravel() @ (u * u)
    uwu = np.einsum("ik,ik->k", u, np.asarray(w @ u))
    target = np.clip(1.0 - uwu / deg_u2, 1e-300, None)       # 1 − ρ
    share = amp / np.where(total > 0, total, 1.0)
    d_mean = float(np.average(d, weights=share.mean(axis=1) + 1e-300))
    kappa = np.geomspace(1e-3, 40.0, 4000) / d_mean
    x = kappa[:, None] * d[None, :]
    gap = (_one_minus_cos_envelope(x) if one_dimensional else _one_minus_j0_envelope(x)) @ share
    gap = np.maximum.accumulate(gap, axis=0)                 # exact monotone (rounding)
    cols = np.arange(u.shape[1])
    above = gap >= target[None, :]
    first = np.where(above.any(axis=0), above.argmax(axis=0), len(kappa) - 1)
    # reaching the plateau: the finest wavelength those lags resolve (first plateau point)
    top = gap[-1]
    plateau = target >= top * (1 - 1e-12)
    first_top = (gap >= top[None, :] * (1 - 1e-12)).argmax(axis=0)
    first = np.where(plateau, first_top, first)
    lo_i = np.maximum(first - 1, 0)
    g0, g1 = gap[lo_i, cols], gap[first, cols]
    k0, k1 = np.log(kappa[lo_i]), np.log(kappa[first])
    frac = np.where(g1 > g0, (np.minimum(target, g1) - g0) / np.where(g1 > g0, g1 - g0, 1.0), 1.0)
    k_est = np.exp(k0 + np.clip(frac, 0.0, 1.0) * (k1 - k0))
    c = 0.5 if one_dimensional else 0.25
    small = target < gap[0]
    k_est[small] = np.sqrt(target[small] / (c * (share[:, small].T @ d ** 2)))
    return 2 * np.pi / k_est


#: first zero of J1: 1 − J0 rises to its largest value there and only oscillates below it after
_J1_FIRST_ZERO = float(special.jn_zeros(1, 1)[0])


def _one_minus_j0_envelope(x: np.ndarray) -> np.ndarray:
    """Monotone envelope of 1 − J0(x): 1 − J0(min(x, j₁,₁)), j₁,₁ = 3.8317 (first zero of J1).

    Examples
    --------
    >>> round(float(_one_minus_j0_envelope(np.array([10.0]))[0]), 4)
    1.4028
    """
    x = np.minimum(np.asarray(x, dtype=float), _J1_FIRST_ZERO)
    series = x ** 2 / 4 - x ** 4 / 64 + x ** 6 / 2304
    return np.where(x < 1e-2, series, 1.0 - special.j0(x))


def _one_minus_cos_envelope(x: np.ndarray) -> np.ndarray:
    """Monotone envelope of 1 − cos(x): 2 sin²(min(x, π)/2).

    Examples
    --------
    >>> float(_one_minus_cos_envelope(np.array([7.0]))[0])
    2.0
    """
    return 2 * np.sin(np.minimum(np.asarray(x, dtype=float), np.pi) / 2) ** 2


def _count_for_scale(layout: Layout, finest_scale: float) -> int:
    """Rough number of vectors broader than finest_scale (Weyl's law for the domain)."""
    if layout.collinear:
        extent = float(np.sqrt((np.ptp(layout.points, axis=0) ** 2).sum()))
        return int(math.ceil(2 * extent / finest_scale))
    pts = layout.points
    if layout.metric == "great_circle":
        pts = plane_coordinates(pts) * 2 * 6_371_008.8
    area = ConvexHull(pts).volume
    return int(math.ceil(math.pi * area / finest_scale ** 2))


# ---------------------------------------------------------------- public functions

def _check_basis_options(n: int, max_vectors, finest_scale, keep, solver):
    keep = check_option("keep", keep, _SIGNS)
    solver = check_option("solver", solver, _SOLVERS)
    if max_vectors is not None:
        max_vectors = check_int("max_vectors", max_vectors, low=1)
    if finest_scale is not None:
        finest_scale = check_real("finest_scale", finest_scale, low=0, low_inclusive=False)
    if solver == "auto":
        solver = "dense" if n <= DENSE_LIMIT else "sparse"
    if solver == "sparse":
        if max_vectors is None and finest_scale is None:
            raise InputError(f"{n} sites: the Lanczos solver computes only the broadest vectors;"
                             " give `max_vectors` (e.g. 200) or `finest_scale` (map units), or "
                             "solver='dense' (needs O(n²) memory)")
        if keep == "all":
            raise InputError("keep='all' needs every eigenvector: use solver='dense', or ask "
                             "for keep='positive' or 'negative' with the sparse solver")
        if n < 4:
            raise InputError(f"solver='sparse' needs at least 4 sites; got {n}")
    return max_vectors, finest_scale, keep, solver


def _basis(w: sparse.csr_matrix, layout: Layout, lengths: sparse.spmatrix,
           raw_weights: sparse.spmatrix,
           *, max_vectors, finest_scale, keep, solver, **fields) -> SpatialBasis:
    n = layout.n
    if w.nnz == 0:
        raise InputError("the similarity matrix has no edges: no spatial structure can be "
                         "described; use a larger threshold or another graph")
    which = "SA" if keep == "negative" else "LA"
    k = max_vectors
    if finest_scale is not None:
        k_scale = min(n - 1, int(1.25 * _count_for_scale(layout, finest_scale)) + 10)
        k = k_scale if k is None else min(k, k_scale)
    while True:
        if solver == "dense":
            mu, u = solve_dense(w, None if keep == "all" else k, which)
        else:
            mu, u = _solve_sparse(w, k, which)
        mu, u = finish_vectors(mu, u, keep)
        scale = _scales(u, mu, w, lengths, raw_weights, layout.collinear)
        if finest_scale is None:
            break
        enough = (scale.size == 0 or scale.min() < finest_scale or len(mu) < (k or n) * 0.8
                  or (k or n) >= n - 2 or (max_vectors is not None and k >= max_vectors))
        if enough:
            fine_enough = scale >= finest_scale
            mu, u, scale = mu[fine_enough], u[:, fine_enough], scale[fine_enough]
            if max_vectors is not None:
                mu, u, scale = mu[:max_vectors], u[:, :max_vectors], scale[:max_vectors]
            break
        k = min(n - 1, 2 * k)
    if max_vectors is not None:
        mu, u, scale = mu[:max_vectors], u[:, :max_vectors], scale[:max_vectors]
    names = [f"sv{i + 1:03d}" for i in range(len(mu))]
    s0 = float(w.sum())
    vectors = pd.DataFrame(u, index=layout.site_ids, columns=names)
    return SpatialBasis(vectors=vectors, eigenvalues=mu,
                        moran_i=pd.Series(n / s0 * mu, index=names, name="moran_i"),
                        scale=pd.Series(scale, index=names, name="scale"),
                        weights=w, solver=solver, coords=layout.xy, metric=layout.metric,
                        **fields)


def distance_eigenvectors(coords: Any, *, threshold: float | None = None,
                          max_vectors: int | None = None, finest_scale: float | None = None,
                          keep: str = "positive", solver: str = "auto",
                          distance: str = "auto") -> SpatialBasis:
    """Distance-based MEM (PCNM): eigenvectors of the truncated distance matrix.

    Parameters
    ----------
    coords : (n, 2) array, DataFrame[x, y] or Survey
        Site positions in map units (a Survey's projected coordinates).
    threshold : float, optional
        Truncation distance t (map units); default the longest edge of the minimum spanning
        tree (exact, from Delaunay edges), the smallest t keeping all sites connected.
    max_vectors : int, optional
        Keep at most this many vectors (the broadest). Required with ``finest_scale`` unset
        on the sparse path.
    finest_scale : float, optional
        Keep only vectors whose ``scale`` (equivalent wavelength, map units) is at least this.
    keep : {"positive", "negative", "all"}
        Keep vectors with positive Moran's I (default; the MEM view), negative, or all n − 1.
        Note PCNM's "positive PCoA eigenvalue" set (λ > 0, i.e. μ > −1) also holds some
        negatively autocorrelated vectors; use ``pcoa_eigenvalues`` to recover it.
    solver : {"auto", "dense", "sparse"}
        Dense eigensolver (≤ 3000 sites under "auto") or Lanczos on an implicitly centred
        sparse operator (memory O(n·(neighbours + vectors))).
    distance : {"auto", "euclidean", "great_circle"}
        See :func:`spatial_ev.space.graphs.neighbour_graph`.

    Returns
    -------
    SpatialBasis
        ``eigenvalues`` holds μ (eigenvalues of C·W·C); ``pcoa_eigenvalues`` holds
        λ = 8t²(μ + 1) [derived from Borcard & Legendre 2002 and Dray et al. 2006].

    Notes
    -----
    Assumes an isotropic, stationary process at the scales represented; irregular sampling
    distorts the broadest and finest vectors, and the vectors describe the sampled layout,
    not the landscape between sites.

    Examples
    --------
    >>> b = distance_eigenvectors(np.column_stack([np.arange(10.0), np.zeros(10)]))
    >>> b.n_vectors, round(float(b.moran_i.iloc[0]), 5)
    (4, 0.93473)
    """
    layout = check_coordinates(coords, distance=distance)
    max_vectors, finest_scale, keep, solver = _check_basis_options(
        layout.n, max_vectors, finest_scale, keep, solver)
    if threshold is None:
        threshold = mst_threshold(layout)
    else:
        threshold = check_real("threshold", threshold, low=0, low_inclusive=False)
    i, j, d = band_pairs(layout, threshold)
    w = symmetric_matrix(layout.n, i, j, 1.0 - (d / (4.0 * threshold)) ** 2)
    basis = _basis(w, layout, symmetric_matrix(layout.n, i, j, d), w,
                   max_vectors=max_vectors, finest_scale=finest_scale, keep=keep,
                   solver=solver, method="distance_based", threshold=threshold)
    # a frozen result: the PCoA eigenvalues go into a new instance, never set afterwards
    return replace(basis, pcoa_eigenvalues=8.0 * threshold ** 2 * (basis.eigenvalues + 1.0))


def _check_zero_weights(graph: NeighbourGraph, w: sparse.csr_matrix, weighting: str) -> None:
    """Edges as long as d_max get weight 0 under linear / concave-down weightings: say so."""
    dropped = (graph.lengths.nnz - w.nnz) // 2
    if dropped == 0:
        return
    fix = ("pass `max_distance` larger than the longest edge "
           f"({graph.longest_edge:.6g}) so that every edge keeps a positive weight")
    if w.nnz == 0:
        raise InputError(f"weighting={weighting!r} gives every edge weight 0 (all edges are as "
                         f"long as d_max, e.g. a regular layout); {fix}, or use 'binary'")
    n_comp = csgraph.connected_components(w, directed=False)[0]
    if n_comp > graph.n_components:
        warnings.warn(f"weighting={weighting!r} gives weight 0 to {dropped} edge(s) as long as "
                      f"d_max, which splits the weighted graph into {n_comp} components; {fix}",
                      DisconnectedGraphWarning, stacklevel=3)


def graph_eigenvectors(graph: NeighbourGraph, *, weighting: str = "binary",
                       exponent: float | None = None, max_distance: float | None = None,
                       max_vectors: int | None = None, finest_scale: float | None = None,
                       keep: str = "positive", solver: str = "auto") -> SpatialBasis:
    """Graph-based MEM: eigenvectors of C·W·C for W = connectivity ∘ edge weights.

    Parameters
    ----------
    graph : NeighbourGraph
        From :func:`spatial_ev.space.graphs.neighbour_graph`.
    weighting, exponent, max_distance
        Edge weighting (see :meth:`NeighbourGraph.weights`).
    max_vectors, finest_scale, keep, solver
        As in :func:`distance_eigenvectors`.

    Returns
    -------
    SpatialBasis
        n − 1 orthonormal vectors orthogonal to 1 in all; Moran's I_k = (n/S₀)μ_k (Dray,
        Legendre & Peres-Neto 2006). ``pcoa_eigenvalues`` is None.

    Examples
    --------
    >>> from spatial_ev.space.graphs import neighbour_graph
    >>> g = neighbour_graph(np.column_stack([np.arange(10.0), np.zeros(10)]), "delaunay")
    >>> round(float(graph_eigenvectors(g).moran_i.iloc[0]), 6)
    0.934726
    """
    if not isinstance(graph, NeighbourGraph):
        raise InputError("`graph` must be a NeighbourGraph (from neighbour_graph); got "
                         f"{type(graph).__name__}")
    weighting, exponent, _ = check_weighting(graph, weighting, exponent, max_distance)
    max_vectors, finest_scale, keep, solver = _check_basis_options(
        graph.n_sites, max_vectors, finest_scale, keep, solver)
    full = graph.weights(weighting, exponent=exponent, max_distance=max_distance)
    w = full.copy()
    w.eliminate_zeros()
    _check_zero_weights(graph, w, weighting)
    layout = check_coordinates(graph.coords, distance=graph.metric if graph.metric ==
                           "great_circle" else "euclidean")
    layout = layout._replace(site_ids=graph.site_ids)
    self_weight = 1.0 if weighting != "concave_up" else float(w.data.max())
    basis = _basis(w, layout, graph.lengths, full, max_vectors=max_vectors,
                   finest_scale=finest_scale, keep=keep, solver=solver, method=graph.method,
                   threshold=graph.threshold, weighting=weighting, exponent=exponent,
                   graph=graph, self_weight=self_weight,
                   max_distance=graph.longest_edge if max_distance is None else max_distance)
    return basis
