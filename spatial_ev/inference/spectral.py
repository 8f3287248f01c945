"""Moran spectral randomisation: a test of the environment–community link that keeps
the spatial autocorrelation of the environment.

Why. When both the community and the environment are spatially autocorrelated, an ordinary
permutation test of the RDA of the community on the environment is liberal: free permutations
of the sites destroy the autocorrelation of the environmental table, so the null distribution
is too narrow and independent but autocorrelated tables look related (Legendre et al. 2002,
Ecography 25:601–615 [memory]; shown by this package's simulations in
``validation/error_rates.md``).

Method (Wagner & Dray 2015, Methods Ecol. Evol. 6:1169–1178). Let U (n × (n − 1)) hold the
complete set of spatial eigenvectors (MEM) of C·W·C for a spatial weighting matrix W (C the
centring matrix): both signs of Moran's I, every vector orthogonal to the constant. A centred
variable x is x = U a with a = Uᵀx. A randomised copy is

    x* = x̄ + U (s ∘ Uᵀ(x − x̄)),  s a vector of random signs ±1,

which keeps x's spectrum a_k² on every eigenvector, hence Moran's I of x under W exactly
(I = (n/S₀)·Σ μ_k a_k² / Σ a_k²) [paper]. The same signs are used for every column of an
environmental table, so the correlations among the variables are kept exactly as well
(x*ᵀy* = aᵀ diag(s)² b = aᵀb) [derived].

Statistic: the pseudo-F of the RDA of Y on the environmental table, as in
:func:`spatial_ev.inference.permutation.permutation_test`; p = (k + 1)/(N + 1) over N randomised
environments, with the same tie tolerance. Because U is complete and orthonormal, the
randomised table's Gram matrix does not change, so with A = Uᵀ Q_X (orthonormal basis of the
centred environment) and B = Uᵀ Y, the model sum of squares of sign vector s is
‖Aᵀ diag(s) B‖², and a whole batch of sign vectors needs one matrix product: the environment
is never rebuilt, refitted or decomposed per randomisation [derived].

Partial test (``conditioning``: covariables W_c, e.g. the selected spatial vectors; the
environment-only fraction [a]). Y is replaced by its residuals on W_c and each randomised
environment is refitted given W_c: with G = Uᵀ Q_X, B = Uᵀ(Y after W_c), Ω = Uᵀ Q_Wc,
C = Gᵀ diag(s) B and K = Ωᵀ diag(s) G, the model sum of squares is tr(Cᵀ(I − KᵀK)⁻¹C) — one
more column block in the same matrix product and one small r × r solve per randomisation
[derived]. W_c is not randomised; the test keeps its validity condition (the randomised
environment has the observed one's distribution), whatever the covariables.

Assumptions and limits
    * The weighting matrix W describes the autocorrelation of the environment: the test is exact
      when the environment's MEM coefficients a_k are independent of their signs (e.g. a
      Gaussian process whose covariance is a function of C·W·C); for other autocorrelated
      processes it is approximate. A W that misses the structure (e.g. a graph far finer than
      the autocorrelation range) gives back part of the liberal bias of free permutations.
    * Only the Moran spectrum (the power on each eigenvector) is kept; higher-order structure —
      non-Gaussian marginal distributions, patchiness, anisotropy not described by W, the
      values' histogram — is not preserved by the randomised copies.
    * The community is not randomised; no assumption is made about its autocorrelation.
    * The complete basis costs a dense eigendecomposition, O(n³) time and O(n²) memory; it is
      refused above :data:`MAX_SITES` sites.

Choice of W. The sparse weightings that serve well as spatial predictors (neighbour graphs,
the truncated distance-based weighting) describe a long-range autocorrelated environment only
roughly on irregular layouts. In this package's simulations (``validation/error_rates.md``:
environments with exponential covariance, range 0.3–4 times the truncation distance t, 2000
replicates) the test with the distance-based W rejected up to 15 % of true null hypotheses at
α = 0.05, against 4.5–6.0 % with the dense distance-decay weighting w_ij = exp(−d_ij/t) of
:func:`distance_decay_weights` (free permutations: 12–75 %); the decay weighting also kept the
level for Gaussian, spherical and anisotropic environmental autocorrelation (free
permutations: up to 86 %).
:func:`spatial_ev.pipeline.analysis.analyse` therefore uses the distance-decay weighting.

Reproducibility. Sign vectors are drawn in fixed blocks of 128 from
``SeedSequence(entropy, spawn_key=(block,))`` with ``entropy`` drawn once from the seed, as in
:mod:`spatial_ev.inference.permutation`: the same seed gives the same p-value whatever ``chunk_size``,
thread count or engine.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy import sparse

from spatial_ev._validation import as_matrix, check_int, check_rng
from spatial_ev.stats.linear import (
    check_explanatory, check_response, column_basis, explained_fraction)
from spatial_ev.inference.engines import run_tasks
from spatial_ev.errors import InputError
from spatial_ev.inference.null import SeedBlocks, check_run_options, permutation_p_value
from spatial_ev.stats.linear import reduce_response

__all__ = ["spectral_randomisation_test", "SpectralRandomisationTest", "spectral_randomisations",
           "complete_spatial_basis", "CompleteBasis", "distance_decay_weights", "MAX_SITES"]

#: largest number of sites for which the complete basis (a dense eigendecomposition) is built
MAX_SITES = 3000
_PRODUCT_ELEMENTS = 2 ** 22   # largest (n − 1) × rank(X) × rank(Y) product table kept whole
_BATCH_BYTES = 8 * 2 ** 20    # bound of the per-batch arrays of the fallback path


# ----------------------------------------------------------------------------- complete basis

@dataclass(frozen=True)
class CompleteBasis:
    """All n − 1 spatial eigenvectors of C·W·C for one weighting matrix.

    Attributes
    ----------
    vectors : ndarray, shape (n_sites, n_sites - 1)
        Orthonormal, orthogonal to the constant, by decreasing eigenvalue (positive then
        negative Moran's I).
    eigenvalues : ndarray, shape (n_sites - 1,)
        μ_k; Moran's I of vector k is ``n / S0 * μ_k``.
    weights : scipy.sparse.csr_matrix, shape (n_sites, n_sites)
        The symmetric weighting matrix W (an asymmetric W is replaced by (W + Wᵀ)/2, which has
        the same Moran's I for every variable).
    site_ids : pandas.Index or None
        Site ids when the spatial input carried them.
    """

    vectors: np.ndarray = field(repr=False)
    eigenvalues: np.ndarray = field(repr=False)
    weights: sparse.csr_matrix = field(repr=False)
    site_ids: pd.Index | None = field(repr=False)

    @property
    def n_sites(self) -> int:
        """Number of sites n."""
        return self.vectors.shape[0]


def _check_spatial(spatial: Any) -> tuple[sparse.csr_matrix, pd.Index | None]:
    """Weighting matrix (symmetric, zero diagonal, non-negative) and site ids of ``spatial``."""
    site_ids = None
    if isinstance(spatial, CompleteBasis):
        return spatial.weights, spatial.site_ids
    if hasattr(spatial, "vectors") and hasattr(spatial, "weights") \
            and isinstance(getattr(spatial, "vectors"), pd.DataFrame):        # SpatialBasis
        site_ids, w = spatial.vectors.index, spatial.weights
    elif hasattr(spatial, "weights") and callable(spatial.weights) \
            and hasattr(spatial, "site_ids"):                                # NeighbourGraph
        site_ids, w = spatial.site_ids, spatial.weights("binary")
    else:
        w = spatial
    if sparse.issparse(w):
        w = sparse.csr_matrix(w, dtype=np.float64)
    else:
        try:
            arr = np.asarray(w, dtype=np.float64)
        except (TypeError, ValueError):
            raise InputError("`spatial` must be a SpatialBasis, a NeighbourGraph or a square "
                             f"spatial weighting matrix; got {type(spatial).__name__}") from None
        if arr.ndim != 2:
            raise InputError("`spatial` must be a SpatialBasis, a NeighbourGraph or a square "
                             f"spatial weighting matrix; got an array of shape {arr.shape}")
        w = sparse.csr_matrix(arr)
    n = w.shape[0]
    if w.shape[0] != w.shape[1] or n < 4:
        raise InputError(f"`spatial` weighting matrix must be square with at least 4 sites; "
                         f"got shape {w.shape}")
    if n > MAX_SITES:
        raise InputError(f"`spatial` has {n} sites; the complete basis needs a dense "
                         f"eigendecomposition (O(n³)), refused above {MAX_SITES} sites; test a "
                         f"subsample of sites or use a restricted permutation test")
    if not np.isfinite(w.data).all() or (w.data < 0).any():
        raise InputError("`spatial` weighting matrix must be finite and non-negative")
    if np.any(w.diagonal() != 0):
        raise InputError(f"`spatial` weighting matrix must have a zero diagonal (no "
                         f"self-neighbours); got {int((w.diagonal() != 0).sum())} non-zero "
                         f"diagonal entries")
    if w.sum() <= 0:
        raise InputError("`spatial` weighting matrix has no positive weight: no site has a "
                         "neighbour, so there is no autocorrelation to keep")
    return sparse.csr_matrix((w + w.T) * 0.5), site_ids


def complete_spatial_basis(spatial: Any) -> CompleteBasis:
    """All n − 1 eigenvectors of C·W·C (both signs of Moran's I) for a weighting matrix.

    Parameters
    ----------
    spatial : SpatialBasis, NeighbourGraph or (n, n) matrix
        A :class:`~spatial_ev.space.eigen.SpatialBasis` (its ``weights``; the basis itself may hold
        only the positive vectors), a :class:`~spatial_ev.space.graphs.NeighbourGraph`
        (binary weights) or a square non-negative weighting matrix with zero diagonal.

    Returns
    -------
    CompleteBasis

    Examples
    --------
    >>> import numpy as np
    >>> from spatial_ev.space.eigen import distance_eigenvectors
    >>> xy = np.column_stack([np.arange(10.0) * 100, np.zeros(10)])
    >>> complete_spatial_basis(distance_eigenvectors(xy)).vectors.shape
    (10, 9)
    """
    from spatial_ev.space.eigen import finish_vectors, solve_dense

    w, site_ids = _check_spatial(spatial)
    mu, u = solve_dense(w, None, "LA")
    mu, u = finish_vectors(mu, u, "all")
    return CompleteBasis(vectors=np.ascontiguousarray(u), eigenvalues=mu, weights=w,
                         site_ids=site_ids)


def distance_decay_weights(coords: Any, *, decay_distance: float | None = None,
                           distance: str = "auto") -> np.ndarray:
    """Dense distance-decay weights w_ij = exp(−d_ij / h) (zero diagonal) for spectral
    randomisation.

    Parameters
    ----------
    coords : (n, 2) array, DataFrame[x, y] or Survey
        Site positions in map units.
    decay_distance : float, optional
        h in map units; default the longest edge of the minimum spanning tree (the truncation
        distance of the distance-based MEM), which worked for environmental autocorrelation
        ranges from 0.3 to 3 times it in this package's simulations.
    distance : {"auto", "euclidean", "great_circle"}
        See :func:`spatial_ev.space.graphs.neighbour_graph`.

    Returns
    -------
    ndarray, shape (n_sites, n_sites)
        Every pair of sites is linked (O(n²) memory); use with
        :func:`complete_spatial_basis` or :func:`spectral_randomisation_test`.

    Examples
    --------
    >>> w = distance_decay_weights([[0, 0], [100, 0], [200, 0], [300, 0]])
    >>> round(float(w[0, 1]), 6), round(float(w[0, 2]), 6), float(w[0, 0])
    (0.367879, 0.135335, 0.0)
    """
    from scipy.spatial.distance import pdist, squareform

    from spatial_ev._validation import check_real
    from spatial_ev.space.geometry import check_coordinates, chord_to_distance, mst_threshold

    layout = check_coordinates(coords, distance=distance)
    if layout.n > MAX_SITES:
        raise InputError(f"`coords` has {layout.n} sites; dense weights are built up to "
                         f"{MAX_SITES} sites (O(n²) memory, O(n³) eigendecomposition)")
    if decay_distance is None:
        decay_distance = mst_threshold(layout)
    else:
        decay_distance = check_real("decay_distance", decay_distance, low=0,
                                    low_inclusive=False)
    d = squareform(chord_to_distance(pdist(layout.points), layout.metric))
    w = np.exp(-d / decay_distance)
    np.fill_diagonal(w, 0.0)
    return w


def _basis_for(spatial: Any, n: int, rows: pd.Index | None, name: str) -> CompleteBasis:
    basis = spatial if isinstance(spatial, CompleteBasis) else complete_spatial_basis(spatial)
    if basis.n_sites != n:
        raise InputError(f"`spatial` describes {basis.n_sites} sites but `{name}` has {n} rows; "
                         f"build the weighting matrix for the same sites")
    ids = basis.site_ids
    if rows is not None and ids is not None and _labelled(rows) and _labelled(ids) \
            and not ids.equals(rows):
        bad = next(i for i, (a, b) in enumerate(zip(ids, rows)) if a != b)
        raise InputError(f"`spatial` and `{name}` list different sites or a different order: "
                         f"row {bad} is site {ids[bad]!r} in `spatial` but {rows[bad]!r} in "
                         f"`{name}`; align them first, e.g. `{name}.loc[basis.vectors.index]`")
    return basis


def _labelled(index: pd.Index) -> bool:
    return not (isinstance(index, pd.RangeIndex) and index.start == 0 and index.step == 1
                and index.name is None)


# ----------------------------------------------------------------------------- random signs

@dataclass(frozen=True)
class _Signs:
    """Random sign vectors drawn in fixed blocks, so chunking never changes them."""

    n_vectors: int
    entropy: int

    def draw(self, rng: np.random.Generator, m: int) -> np.ndarray:
        bits = rng.integers(0, 2, size=(m, self.n_vectors), dtype=np.int8)
        return (2.0 * bits - 1.0)

    def rows(self, start: int, stop: int) -> np.ndarray:
        """Sign vectors number ``start`` to ``stop - 1``, shape (stop - start, n_vectors), from
        the null service's seed blocks."""
        return SeedBlocks(self.entropy, self.draw).rows(start, stop)


def _signs(n_vectors: int, seed) -> _Signs:
    return _Signs(n_vectors, int(check_rng(seed).integers(0, 2 ** 63)))


def spectral_randomisations(values: Any, spatial: Any, *, n_randomisations: int = 99,
                            seed: None | int | np.random.Generator = None) -> np.ndarray:
    """Randomised copies of a table that keep each column's Moran's I and the correlations.

    x* = x̄ + U(s ∘ Uᵀ(x − x̄)) with U the complete spatial basis of ``spatial`` and s random
    signs shared by every column (Wagner & Dray 2015, Methods Ecol. Evol. 6:1169–1178). Keeps
    the mean, the variance, Moran's I under W of every column and every correlation between
    columns exactly; higher-order structure (distribution shape, patches) is not kept.

    Parameters
    ----------
    values : array (n,) or (n, p), Series or DataFrame
        Variables measured at the sites.
    spatial : SpatialBasis, NeighbourGraph, CompleteBasis or (n, n) weighting matrix
        See :func:`complete_spatial_basis`.
    n_randomisations : int, keyword-only
        Number of copies N.
    seed : None, int or numpy Generator
        The same seed gives the same copies (and, with the same seed and spatial input, the
        same sign vectors as :func:`spectral_randomisation_test`).

    Returns
    -------
    ndarray, shape (n_randomisations, n_sites, n_variables)

    Examples
    --------
    >>> import numpy as np
    >>> from spatial_ev.space.eigen import distance_eigenvectors
    >>> xy = np.column_stack([np.arange(12.0) * 100, np.zeros(12)])
    >>> x = np.sin(np.arange(12.0) / 2)
    >>> copies = spectral_randomisations(x, distance_eigenvectors(xy), n_randomisations=3,
    ...                                  seed=20261202)
    >>> copies.shape
    (3, 12, 1)
    """
    x, rows, _ = as_matrix("values", values)
    n_randomisations = check_int("n_randomisations", n_randomisations, low=1)
    basis = _basis_for(spatial, x.shape[0], rows, "values")
    mean = x.mean(axis=0)
    coef = basis.vectors.T @ (x - mean)                                    # (n − 1, p)
    signs = _signs(basis.vectors.shape[1], seed).rows(0, n_randomisations)  # (N, n − 1)
    # one product for all copies: U @ (s ∘ a) for every s, stacked along the columns
    flipped = signs.T[:, :, None] * coef[:, None, :]                       # (n − 1, N, p)
    out = basis.vectors @ flipped.reshape(coef.shape[0], -1)
    return out.reshape(x.shape[0], n_randomisations, x.shape[1]).transpose(1, 0, 2) + mean


# ----------------------------------------------------------------------------- the test kernel

@dataclass(frozen=True)
class _Kernel:
    """Model sums of squares of every sign vector in a range; picklable for dask.

    For signs s: C = Gᵀ diag(s) B (cross products of the randomised environment with the
    response) and, with a conditioning table, K = Ωᵀ diag(s) G (its overlap with the
    conditioning basis); SS = tr(Cᵀ (I − KᵀK)⁻¹ C) [derived].
    """

    env_coef: np.ndarray     # G (n − 1, r): Uᵀ Q_X, orthonormal columns
    resp_coef: np.ndarray    # B (n − 1, p'): Uᵀ Y (centred, after W, possibly SVD-reduced)
    cond_coef: np.ndarray    # Ω (n − 1, q): Uᵀ Q_W (q = 0 without conditioning)
    products: np.ndarray | None   # (n − 1, r·p' + q·r): G_k ⊗ B_k and Ω_k ⊗ G_k
    ss_total: float
    df_model: int
    df_residual: int
    signs: _Signs

    def __call__(self, task: tuple[int, int]) -> np.ndarray:
        start, stop = task
        s = self.signs.rows(start, stop)
        k, r = self.env_coef.shape
        step = len(s) if self.products is not None else \
            max(1, _BATCH_BYTES // (8 * k * (r + self.cond_coef.shape[1])))
        ss = np.concatenate([self.sums_of_squares(s[i:i + step])
                             for i in range(0, len(s), step)])
        return _pseudo_f(ss, self.ss_total, self.df_model, self.df_residual)

    def sums_of_squares(self, s: np.ndarray) -> np.ndarray:
        """Model sum of squares of each sign vector (rows of ``s``)."""
        m, (k, r), p, q = len(s), self.env_coef.shape, self.resp_coef.shape[1], \
            self.cond_coef.shape[1]
        if self.products is not None:
            both = s @ self.products                                   # one product
            c, kk = both[:, :r * p].reshape(m, r, p), both[:, r * p:].reshape(m, q, r)
        else:
            flipped = s[:, :, None] * self.env_coef[None]              # (m, n − 1, r)
            c = np.matmul(flipped.transpose(0, 2, 1), self.resp_coef)  # (m, r, p')
            kk = np.matmul(self.cond_coef.T, flipped)                  # (m, q, r)
        if q == 0:
            return np.einsum("mrp,mrp->m", c, c)
        gram = np.eye(r) - np.matmul(kk.transpose(0, 2, 1), kk)        # (m, r, r)
        solved = np.matmul(np.linalg.pinv(gram, rcond=1e-10, hermitian=True), c)
        return np.einsum("mrp,mrp->m", c, solved)


def _pseudo_f(ss_model, ss_total, df_model, df_residual):
    resid = np.maximum(ss_total - ss_model, 0.0) / df_residual
    return ss_model / df_model / resid


# ----------------------------------------------------------------------------- result and test

@dataclass(frozen=True)
class SpectralRandomisationTest:
    """Result of :func:`spectral_randomisation_test`.

    Attributes
    ----------
    statistic : float
        Observed pseudo-F of the RDA of Y on the environmental table.
    p_value : float
        ``(k + 1) / (N + 1)`` over the N randomised environments (NaN when N = 0).
    null_distribution : ndarray, shape (n_randomisations,)
        Pseudo-F of every randomised environment, in draw order.
    n_randomisations : int
    r2, r2_adj : float
        R² and adjusted R² of the environment: fraction [a + b] of a variation partition, or
        [a] (given the conditioning table; Peres-Neto et al. 2006 difference).
    df_model, df_residual : int
        Rank of the environmental table (after the conditioning table) and
        ``n - 1 - rank(W) - rank``.
    n_vectors : int
        Size of the complete spatial basis (n − 1).
    environment_moran_i : pandas.Series
        Moran's I under W of each environmental column (kept by every randomisation).
    conditioning_rank : int
        Rank of the conditioning table (0: the marginal test of fraction [a + b]).

    The p-value is valid when W describes the environment's autocorrelation (see the module
    notes); it tests the link between community and environment, not a causal effect.
    """

    statistic: float
    p_value: float
    null_distribution: np.ndarray = field(repr=False)
    n_randomisations: int
    r2: float
    r2_adj: float
    df_model: int
    df_residual: int
    n_vectors: int
    environment_moran_i: pd.Series = field(repr=False)
    conditioning_rank: int = 0

    def to_frame(self) -> pd.DataFrame:
        """One-row table of the test.

        Examples
        --------
        >>> import numpy as np
        >>> from spatial_ev.space.eigen import distance_eigenvectors
        >>> rng = np.random.default_rng(20261202)
        >>> xy = rng.uniform(0, 1000, size=(25, 2))
        >>> t = spectral_randomisation_test(rng.normal(size=(25, 3)), rng.normal(size=(25, 2)),
        ...                                 distance_eigenvectors(xy), n_randomisations=99,
        ...                                 seed=1)
        >>> list(t.to_frame().columns)[:3]
        ['r2', 'r2_adj', 'df_model']
        """
        return pd.DataFrame([{
            "r2": self.r2, "r2_adj": self.r2_adj, "df_model": self.df_model,
            "df_residual": self.df_residual, "pseudo_f": self.statistic, "p_value": self.p_value,
            "n_randomisations": self.n_randomisations, "method": "moran_spectral",
            "conditioning_rank": self.conditioning_rank}])

    def summary(self) -> str:
        """Plain-text summary with the test's assumptions.

        Examples
        --------
        >>> import numpy as np
        >>> from spatial_ev.space.eigen import distance_eigenvectors
        >>> rng = np.random.default_rng(20261202)
        >>> xy = rng.uniform(0, 1000, size=(25, 2))
        >>> t = spectral_randomisation_test(rng.normal(size=(25, 3)), rng.normal(size=(25, 2)),
        ...                                 distance_eigenvectors(xy), n_randomisations=99,
        ...                                 seed=1)
        >>> "Moran spectral" in t.summary()
        True
        """
        given = (f" given {self.conditioning_rank} conditioning variable(s)"
                 if self.conditioning_rank else "")
        return (f"pseudo-F{given} = {self.statistic:.4g} (df {self.df_model}, "
                f"{self.df_residual}), p = {self.p_value:.4g} from {self.n_randomisations} "
                f"Moran spectral "
                f"randomisations of the environment ({self.n_vectors} spatial eigenvectors, "
                f"random signs shared by all variables); R² = {self.r2:.4f}, adjusted R² = "
                f"{self.r2_adj:.4f}. Keeps each variable's Moran's I and the correlations among "
                "variables; valid when the spatial weighting matrix describes the "
                "environment's autocorrelation; higher-order spatial structure is not kept.")


def _check_test_data(Y, environment, conditioning):
    y, rows, _ = check_response(Y)
    x, x_cols = check_explanatory("environment", environment, y.shape[0], rows)
    n = y.shape[0]
    qw = np.zeros((n, 0))
    if conditioning is not None:
        qw, _ = column_basis(check_explanatory("conditioning", conditioning, n, rows)[0])
    qx, _ = column_basis(x)
    rank = column_basis(x, qw)[0].shape[1]
    if rank == 0:
        what = "constant or explained by `conditioning`" if qw.shape[1] else "constant"
        raise InputError(f"`environment` has no usable variation: every column is {what}; "
                         "pass variables that vary among sites")
    if n - qw.shape[1] - rank - 1 <= 0:
        raise InputError(f"`environment` has {rank} independent columns (and `conditioning` "
                         f"{qw.shape[1]}) for {n} sites, which leaves no residual degrees of "
                         f"freedom; use fewer variables")
    return y - y.mean(axis=0), x, x_cols, qx, qw, rank, rows


def spectral_randomisation_test(
    Y: Any,
    environment: Any,
    spatial: Any,
    *,
    conditioning: Any = None,
    n_randomisations: int = 999,
    seed: None | int | np.random.Generator = None,
    chunk_size: int | None = None,
    engine: str = "local",
    scheduler: Any = None,
    n_workers: int | None = None,
    progress: Callable[[int, int], Any] | None = None,
) -> SpectralRandomisationTest:
    """Test the community–environment link against spatially autocorrelated environments.

    The pseudo-F of the RDA of Y on the environmental table is compared with its values for
    environments randomised by Moran spectral randomisation (Wagner & Dray 2015, Methods
    Ecol. Evol. 6:1169–1178): random signs on the environment's coefficients over the complete
    spatial basis of W, the same signs for every variable. Each randomised environment has the
    same Moran's I per variable and the same correlations among variables as the observed one,
    so the null distribution includes the chance agreement between two autocorrelated tables
    that makes free permutation tests liberal.

    Parameters
    ----------
    Y : DataFrame or array, shape (n_sites, n_species)
        Response (usually transformed community). Not modified.
    environment : DataFrame or array, shape (n_sites, n_variables)
        Environmental table (standardise variables measured in different units first).
    spatial : SpatialBasis, NeighbourGraph, CompleteBasis or (n, n) weighting matrix
        The spatial weighting W whose eigenvectors carry the randomisation (a SpatialBasis
        contributes its ``weights``; its vectors may be the positive ones only). Pass a
        :class:`CompleteBasis` from :func:`complete_spatial_basis` to reuse the
        eigendecomposition across tests.
    conditioning : DataFrame or array, shape (n_sites, n_covariables), optional
        Covariables W (e.g. selected spatial vectors): the statistic is then the partial
        pseudo-F of the environment given W (fraction [a] of a variation partition) and
        each randomised environment is refitted given W. W itself is not randomised.
    n_randomisations : int, keyword-only
        Number of randomised environments N (0: statistic only, p = NaN).
    seed : None, int or numpy Generator
        One draw from it fixes every sign vector.
    chunk_size : int, optional
        Randomisations per task handed to the engine (default 256); does not change results.
    engine, scheduler, n_workers, progress
        Where the batches run (see :func:`spatial_ev.inference.engines.run_tasks`).

    Returns
    -------
    SpectralRandomisationTest

    Notes
    -----
    Assumes that W describes the environment's autocorrelation (the environment's MEM
    coefficients are symmetric and independent of their signs); only the Moran spectrum is
    kept, not higher-order structure. Cost: one dense eigendecomposition (O(n³), refused
    above :data:`MAX_SITES` sites) and one matrix product of size N × (n − 1) × rank(X)·rank(Y)
    for all randomisations; memory O(n·rank(X)·rank(Y)).

    Examples
    --------
    >>> import numpy as np
    >>> from spatial_ev.space.eigen import distance_eigenvectors
    >>> rng = np.random.default_rng(20261202)
    >>> xy = rng.uniform(0, 1000, size=(30, 2))
    >>> env = rng.normal(size=(30, 2))
    >>> Y = env @ rng.normal(size=(2, 4)) + 0.5 * rng.normal(size=(30, 4))
    >>> test = spectral_randomisation_test(Y, env, distance_eigenvectors(xy),
    ...                                    n_randomisations=199, seed=7)
    >>> test.p_value
    0.005
    """
    n_randomisations, chunk_size, engine = check_run_options(
        n_randomisations, chunk_size, engine, progress, count_name="n_randomisations")
    yc, x, x_cols, qx, qw, rank, rows = _check_test_data(Y, environment, conditioning)
    n = yc.shape[0]
    basis = _basis_for(spatial, n, rows, "Y")
    u = basis.vectors
    response = reduce_response(yc - qw @ (qw.T @ yc))              # Y after W
    ss_total = float(np.einsum("ij,ij->", response, response))
    env_coef = np.ascontiguousarray(u.T @ qx)              # (n − 1, r)
    resp_coef = np.ascontiguousarray(u.T @ response)       # (n − 1, p')
    cond_coef = np.ascontiguousarray(u.T @ qw)             # (n − 1, q)
    k, r = env_coef.shape
    df_residual = n - 1 - qw.shape[1] - rank
    products = None
    if k * r * (resp_coef.shape[1] + cond_coef.shape[1]) <= _PRODUCT_ELEMENTS:
        products = np.hstack([(env_coef[:, :, None] * resp_coef[:, None, :]).reshape(k, -1),
                              (cond_coef[:, :, None] * env_coef[:, None, :]).reshape(k, -1)])
    kernel = _Kernel(env_coef, resp_coef, cond_coef, products, ss_total, rank, df_residual,
                     _signs(u.shape[1], seed))
    ss_model = float(kernel.sums_of_squares(np.ones((1, k)))[0])
    observed = float(_pseudo_f(ss_model, ss_total, rank, df_residual))
    ranges = [(a, min(a + chunk_size, n_randomisations))
              for a in range(0, n_randomisations, chunk_size)]
    parts = run_tasks(kernel, ranges, engine=engine, scheduler=scheduler, n_workers=n_workers,
                      progress=progress)
    null = np.concatenate(parts) if parts else np.zeros(0)
    fraction = explained_fraction(yc, x, conditioning=qw if qw.shape[1] else None)
    xc = x - x.mean(axis=0)
    spread = np.einsum("ij,ij->j", xc, xc)
    moran = np.full(x.shape[1], np.nan)
    ok = spread > 0
    s0 = float(basis.weights.sum())
    moran[ok] = n / s0 * np.einsum("ij,ij->j", xc[:, ok], basis.weights @ xc[:, ok]) / spread[ok]
    return SpectralRandomisationTest(
        statistic=observed, p_value=permutation_p_value(observed, null), null_distribution=null,
        n_randomisations=n_randomisations, r2=fraction.r2, r2_adj=fraction.r2_adj,
        df_model=rank, df_residual=df_residual, n_vectors=int(u.shape[1]),
        environment_moran_i=pd.Series(moran, index=pd.Index(x_cols), name="moran_i"),
        conditioning_rank=int(qw.shape[1]))

