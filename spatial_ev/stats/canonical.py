"""Redundancy analysis (RDA): multivariate regression followed by a PCA of the fitted values.

Model (Legendre & Legendre 2012, Numerical Ecology, ch. 11 [memory]): the response table Y
(n sites x p species, usually transformed, see :mod:`spatial_ev.stats.transform`) and the explanatory
table X (n x m) are centred (the model always has an intercept). An orthonormal basis Q of the
centred X comes from a column-pivoted QR decomposition; the fitted values are ``Q Q^T Y`` and
their singular value decomposition gives the canonical axes. The residuals ``Y - Q Q^T Y`` give
the residual (unconstrained) axes. Without X the analysis is a principal component analysis.

Partial RDA (X given a conditioning table W): Y and X are both residualised on W (centred); the
canonical axes describe the variation of Y explained by X *after* W. Its R² is the fraction of
the *total* variation of Y explained by X after W, ``R²(X+W) - R²(W)``, and its adjusted R² is
``R²adj(X+W) - R²adj(W)`` (Peres-Neto, Legendre, Dray & Borcard 2006, Ecology 87:2614-2625),
the fraction [a] of a variation partitioning.

Rank. Columns are centred and scaled to unit length before the pivoted QR; a column whose
centred length is below ``1e-10`` of its raw length is constant and dropped; a pivot whose
``|R_kk|`` is below ``1e-10`` (relative to the unit length of the scaled columns, after removal
of W) is taken as a linear combination of earlier columns and dropped. The number of kept
columns is the model's rank, used as the number of predictors ``m`` of the adjusted R².

Variances are sums of squares divided by ``n - 1``: ``total_variance`` is the sum of the
column variances of Y, and canonical + residual eigenvalues + the conditional variance (the part
explained by W) add up to it.

Scalings (Gabriel 1971 biplot rule, Biometrika 58:453-467 [memory]; eigenvalue
``lambda_k = sigma_k² / (n - 1)``):

* scaling 1 (distance biplot): species scores = unit eigenvectors V; site scores = the sites'
  coordinates ``Y V``; in a PCA they keep the Euclidean distances among sites.
* scaling 2 (correlation biplot): species scores = ``V lambda^(1/2)``; site scores =
  scaling-1 scores ``x lambda^(-1/2)`` (variance 1 per axis).

In both scalings site scores x species scores^T rebuild the analysed matrix (the fitted values
for the canonical axes, the centred data in a PCA).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from spatial_ev._validation import check_option
from spatial_ev.errors import InputError
from spatial_ev.stats.linear import (RANK_TOLERANCE, TINY, ExplainedFraction, Table, model_fraction,
                                     prepare_model)

__all__ = ["redundancy_analysis", "RedundancyAnalysis"]

# ----------------------------------------------------------------------------------------------
# input checks shared with the permutation engine
# ----------------------------------------------------------------------------------------------

# ----------------------------------------------------------------------------------------------
# linear algebra
# ----------------------------------------------------------------------------------------------

# ----------------------------------------------------------------------------------------------
# result
# ----------------------------------------------------------------------------------------------

_AXES = ("auto", "canonical", "residual")
_KINDS = ("fitted", "weighted_sum")


@dataclass(frozen=True)
class RedundancyAnalysis:
    """Result of :func:`redundancy_analysis`.

    Attributes
    ----------
    r2, r2_adj : float
        Fraction of the total variation of Y explained by X (after the conditioning table for a
        partial RDA) and its Ezekiel-adjusted value (partial: Peres-Neto et al. 2006
        difference). 0 for a PCA.
    n_sites, n_species : int
    rank : int
        Number of independent explanatory columns (after the conditioning table): the ``m`` of
        the adjusted R² and the model degrees of freedom.
    conditioning_rank : int
        Number of independent columns of the conditioning table (0 without one).
    total_variance : float
        Sum of the column variances (ddof = 1) of the centred Y.
    conditional_variance : float
        Part of ``total_variance`` explained by the conditioning table (0 without one).
    canonical_eigenvalues : Series, shape (n_canonical,)
        Variances of the canonical axes ``canonical_1, ...``; they sum to ``r2 *
        total_variance``.
    residual_eigenvalues : Series, shape (n_residual,)
        Variances of the residual axes ``residual_1, ...`` (in a PCA: the principal
        components).

    Assumptions and limits: linear relations between Y and X; the R² and the scores describe
    the sites analysed; significance comes from :func:`spatial_ev.inference.permutation.permutation_test`.
    """

    r2: float
    r2_adj: float
    n_sites: int
    n_species: int
    rank: int
    conditioning_rank: int
    total_variance: float
    conditional_variance: float
    canonical_eigenvalues: pd.Series
    residual_eigenvalues: pd.Series
    _site_index: pd.Index = field(repr=False)
    _species_index: pd.Index = field(repr=False)
    _x_index: pd.Index = field(repr=False)
    _u: dict = field(repr=False)          # kind -> (n, k) left singular vectors
    _v: dict = field(repr=False)          # kind -> (p, k) right singular vectors
    _sigma: dict = field(repr=False)      # kind -> (k,) singular values
    _response: np.ndarray = field(repr=False)   # (n, p) Y after removing W
    _x_part: np.ndarray | None = field(repr=False)  # (n, m) centred X after removing W

    @property
    def n_predictors(self) -> int:
        """Alias of :attr:`rank` (number of independent explanatory columns)."""
        return self.rank

    def _axes(self, axes: str) -> str:
        axes = check_option("axes", axes, _AXES)
        if axes == "auto":
            return "canonical" if len(self.canonical_eigenvalues) else "residual"
        return axes

    def _lambda(self, axes: str) -> np.ndarray:
        return self._sigma[axes] ** 2 / (self.n_sites - 1)

    def _frame(self, values, index, axes):
        prefix = "canonical" if axes == "canonical" else "residual"
        return pd.DataFrame(values, index=index,
                            columns=[f"{prefix}_{k + 1}" for k in range(values.shape[1])])

    def site_scores(self, scaling: int = 2, *, kind: str = "fitted",
                    axes: str = "auto") -> pd.DataFrame:
        """Site scores, shape (n_sites, n_axes), indexed by site.

        Parameters
        ----------
        scaling : {1, 2}
            1: coordinates ``Y V`` (distance biplot); 2: scaled by ``lambda^(-1/2)``.
        kind : {"fitted", "weighted_sum"}
            Canonical axes only. ``"fitted"``: linear combinations of the explanatory variables
            (from the fitted values, ``Ŷ V``); ``"weighted_sum"``: weighted sums of the species
            data (``Y V``, Y after removal of the conditioning table). Residual axes have one
            kind (from the residuals).
        axes : {"auto", "canonical", "residual"}
            "auto": canonical axes when X was given, principal components otherwise.

        Examples
        --------
        >>> import numpy as np
        >>> rda = redundancy_analysis(np.random.default_rng(7).normal(size=(10, 3)))
        >>> rda.site_scores(1).shape
        (10, 3)
        """
        axes, scaling = self._axes(axes), _check_scaling(scaling)
        kind = check_option("kind", kind, _KINDS)
        if axes == "canonical" and kind == "weighted_sum":
            scores = self._response @ self._v[axes]
        else:
            scores = self._u[axes] * self._sigma[axes]
        if scaling == 2:
            scores = scores / np.sqrt(self._lambda(axes))
        return self._frame(scores, self._site_index, axes)

    def species_scores(self, scaling: int = 2, *, axes: str = "auto") -> pd.DataFrame:
        """Species scores, shape (n_species, n_axes): V (scaling 1) or ``V lambda^(1/2)`` (2).

        Examples
        --------
        >>> import numpy as np
        >>> rda = redundancy_analysis(np.random.default_rng(7).normal(size=(10, 3)))
        >>> rda.species_scores(2).shape
        (3, 3)
        """
        axes, scaling = self._axes(axes), _check_scaling(scaling)
        scores = self._v[axes]
        if scaling == 2:
            scores = scores * np.sqrt(self._lambda(axes))
        return self._frame(scores, self._species_index, axes)

    def biplot_scores(self, scaling: int = 2) -> pd.DataFrame:
        """Explanatory-variable scores, shape (n_variables, n_canonical).

        Scaling 2: correlation of each explanatory variable (centred, after removal of the
        conditioning table) with the fitted site scores of each canonical axis. Scaling 1: the
        same correlations times ``sqrt(lambda_k / total_variance)`` (Legendre & Legendre 2012
        [memory]). Constant or fully conditioned variables get NaN.

        Examples
        --------
        >>> import numpy as np
        >>> rng = np.random.default_rng(7)
        >>> redundancy_analysis(rng.normal(size=(12, 3)), rng.normal(size=(12, 2))
        ...                     ).biplot_scores().shape
        (2, 2)
        """
        scaling = _check_scaling(scaling)
        if self._x_part is None or not len(self.canonical_eigenvalues):
            raise InputError("biplot scores need explanatory variables: this analysis has no "
                             "canonical axes (it was run without `X`)")
        u = self._u["canonical"]
        norms = np.linalg.norm(self._x_part, axis=0)
        ref = np.where(norms > 0, norms, np.nan)
        corr = (self._x_part.T @ u) / ref[:, None]
        corr[~(norms > RANK_TOLERANCE * np.max(norms, initial=0.0)), :] = np.nan
        if scaling == 1:
            corr = corr * np.sqrt(self._lambda("canonical") / self.total_variance)
        return self._frame(corr, self._x_index, "canonical")

    def to_frame(self) -> pd.DataFrame:
        """Eigenvalue table: one row per axis with variance, proportion and cumulative proportion
        of the total variance (in a partial RDA the cumulative proportion starts from the part
        explained by the conditioning table).

        Examples
        --------
        >>> import numpy as np
        >>> redundancy_analysis(np.random.default_rng(7).normal(size=(10, 3))).to_frame().shape
        (3, 4)
        """
        eig = pd.concat([self.canonical_eigenvalues, self.residual_eigenvalues])
        prop = eig / self.total_variance
        return pd.DataFrame({
            "axis_type": ["canonical"] * len(self.canonical_eigenvalues)
            + ["residual"] * len(self.residual_eigenvalues),
            "variance": eig.to_numpy(),
            "proportion": prop.to_numpy(),
            "cumulative": (prop.cumsum() + self.conditional_variance / self.total_variance
                           ).to_numpy(),
        }, index=eig.index)

    def summary(self) -> str:
        """A short plain-text description of the analysis, with its assumptions.

        Examples
        --------
        >>> import numpy as np
        >>> "PCA" in redundancy_analysis(np.random.default_rng(7).normal(size=(10, 3))).summary()
        True
        """
        if not self.rank:
            head = (f"PCA of {self.n_sites} sites x {self.n_species} variables; total variance "
                    f"{self.total_variance:.6g}")
        else:
            part = (f" after {self.conditioning_rank} conditioning columns (explaining "
                    f"{self.conditional_variance / self.total_variance:.4f})"
                    if self.conditioning_rank else "")
            head = (f"RDA of {self.n_sites} sites x {self.n_species} species on {self.rank} "
                    f"independent explanatory columns{part}: R² = {self.r2:.4f}, adjusted R² = "
                    f"{self.r2_adj:.4f}; {len(self.canonical_eigenvalues)} canonical axes")
        return (head + ". Linear model with intercept; R² describes these sites only, the "
                "adjusted R² is the unbiased estimate; test significance by permutation.")


def _check_scaling(scaling) -> int:
    if isinstance(scaling, bool) or scaling not in (1, 2):
        raise InputError(f"parameter `scaling` must be 1 (distance biplot) or 2 (correlation "
                         f"biplot); got {scaling!r}")
    return int(scaling)


def _svd(a: np.ndarray, n_rows: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Thin SVD of ``a`` keeping only axes with a non-negligible singular value."""
    if a.size == 0:
        return np.zeros((n_rows, 0)), np.zeros(0), np.zeros((a.shape[1] if a.ndim == 2 else 0, 0))
    u, s, vt = np.linalg.svd(a, full_matrices=False)
    keep = s > max(a.shape) * np.finfo(float).eps * max(s[0], TINY) * 10
    u, s, v = u[:, keep], s[keep], vt[keep].T
    # sign rule: the species score of largest absolute value is positive on each axis
    sign = np.sign(v[np.abs(v).argmax(axis=0), np.arange(v.shape[1])])
    sign[sign == 0] = 1
    return u * sign, s, v * sign


def redundancy_analysis(Y: Table, X: Table | None = None, *,
                        conditioning: Table | None = None) -> RedundancyAnalysis:
    """Redundancy analysis of Y on X (optionally given a conditioning table); PCA without X.

    Parameters
    ----------
    Y : DataFrame or array, shape (n_sites, n_species)
        Response table, usually transformed (:func:`spatial_ev.stats.transform.transform`).
    X : DataFrame or array, shape (n_sites, n_variables), optional
        Explanatory variables; rank-deficient tables are handled (redundant columns do not
        count in the rank). Standardise variables in different units first
        (:func:`spatial_ev.stats.transform.standardise_environment`): it changes biplot scores,
        not R².
    conditioning : DataFrame or array, shape (n_sites, n_covariables), optional
        Covariables whose effect is removed first (partial RDA).

    Returns
    -------
    RedundancyAnalysis

    Raises
    ------
    InputError
        Mismatched rows or site labels, missing values, no variation, or no residual degrees of
        freedom left.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(20240611)
    >>> x = rng.normal(size=(40, 3))
    >>> y = x @ rng.normal(size=(3, 6)) + rng.normal(size=(40, 6))
    >>> rda = redundancy_analysis(y, x)
    >>> rda.rank, len(rda.canonical_eigenvalues)
    (3, 3)
    >>> bool(abs(rda.canonical_eigenvalues.sum() - rda.r2 * rda.total_variance) < 1e-9)
    True
    """
    model = prepare_model(Y, X, conditioning)
    n, p = model.y.shape
    frac = model_fraction(model) if model.qx.shape[1] else ExplainedFraction(0.0, 0.0, 0)
    yr = model.y - model.qw @ (model.qw.T @ model.y) if model.qw.shape[1] else model.y
    c = model.qx.T @ yr
    u_c, s_c, v_c = _svd(c, n)
    u_c = model.qx @ u_c if c.size else np.zeros((n, 0))
    fitted = (u_c * s_c) @ v_c.T
    u_r, s_r, v_r = _svd(yr - fitted, n)
    ss_total = float(np.einsum("ij,ij->", model.y, model.y))
    ss_cond = ss_total - float(np.einsum("ij,ij->", yr, yr))
    df = n - 1
    x_part = None
    if model.x is not None:
        x_part = model.x - model.x.mean(axis=0)
        if model.qw.shape[1]:
            x_part = x_part - model.qw @ (model.qw.T @ x_part)
    return RedundancyAnalysis(
        r2=frac.r2, r2_adj=frac.r2_adj, n_sites=n, n_species=p, rank=frac.rank,
        conditioning_rank=model.qw.shape[1], total_variance=ss_total / df,
        conditional_variance=ss_cond / df,
        canonical_eigenvalues=pd.Series(s_c ** 2 / df, index=[f"canonical_{k + 1}"
                                                              for k in range(s_c.size)],
                                        name="variance", dtype=float),
        residual_eigenvalues=pd.Series(s_r ** 2 / df, index=[f"residual_{k + 1}"
                                                             for k in range(s_r.size)],
                                       name="variance", dtype=float),
        _site_index=model.rows if model.rows is not None else pd.RangeIndex(n),
        _species_index=model.cols if model.cols is not None else pd.RangeIndex(p),
        _x_index=model.x_cols,
        _u={"canonical": u_c, "residual": u_r}, _v={"canonical": v_c, "residual": v_r},
        _sigma={"canonical": s_c, "residual": s_r}, _response=yr, _x_part=x_part)
