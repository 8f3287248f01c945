"""The pilot's fitted model as a generator of continuous landscapes, and one simulated survey.

Used by :func:`spatial_ev.design.evaluate.evaluate_design` (see its module docstring). The
pilot is fitted jointly: transformed community ~ kept trend + selected environmental variables +
selected spatial vectors (least squares, centred). The truth of a simulated survey is defined
in map units, not on the pilot's sites, so that any layout can be sampled from it:

- each scale class with selected vectors becomes stationary Gaussian random fields
  (:func:`draw_fields`, random Fourier features) with the wavelengths its selected vectors
  carry (:func:`class_spectrum`), the class's species loadings and its variance among the
  pilot sites (shrunk for the chance fit of its vectors); residual structure on the unselected vectors beyond chance is one more
  field; what is left is spatially independent (pilot residual rows, chosen per site);
- the environment at a site is the interpolated pilot environment plus a simulated local part
  with the pilot's interpolation error (none on a pilot site);
- the random numbers depend only on the replicate (fields) and on a site's position (local
  environment, residual rows): every layout sees the same landscape, and two layouts sharing
  a site see the same values there.

Unconditional simulation (default) draws a new landscape like the pilot's each time;
conditional simulation (``conditional=True`` in :func:`layout_model`) fixes the class
structures at the pilot sites (simple kriging of each field on the pilot's fitted structure)
— the same patches, in place.

A simulated survey is analysed by the pipeline's own named steps
(:mod:`spatial_ev.pipeline.steps`: trend, environment, space, partition, scale-class tests);
the design's own parts are the space step on the layout's one basis at the pilot's corrected
level, and detection of a class by the layout's selected vectors whose own scale lies in the
class's band (:func:`band_members`), tested jointly given the others and Holm-adjusted
across classes (:func:`holm`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import scipy.linalg
from scipy import special
from scipy.spatial import cKDTree

from spatial_ev.design.layouts import CandidateLayout
from spatial_ev.errors import DesignError, InputError
from spatial_ev.pipeline.analysis import Analysis
from spatial_ev.pipeline.options import StepOptions
from spatial_ev.pipeline.scale_classes import scale_class_p_values
from spatial_ev.pipeline.steps import (
    environment_step,
    partition_step,
    space_group,
    space_step,
    trend_step,
)
from spatial_ev.selection.partition import partition_variation
from spatial_ev.space.eigen import SpatialBasis
from spatial_ev.space.scales import extent_wavelength
from spatial_ev.stats.linear import explained_fraction

__all__ = [
    "FRACTIONS",
    "FieldComponent",
    "PilotModel",
    "SimulationSettings",
    "Simulator",
    "analyse_survey",
    "band_members",
    "band_spectrum",
    "band_wavelengths",
    "class_band",
    "class_spectrum",
    "draw_fields",
    "draw_truth",
    "environment_at",
    "field_covariance",
    "holm",
    "layout_model",
    "pilot_model",
    "site_uniforms",
    "spectrum_wavelengths",
    "stop_category",
    "vector_spectrum",
]

FRACTIONS = ("environment_only", "shared", "space_only", "unexplained")

_IDW_NEIGHBOURS, _IDW_POWER = 8, 2.0


# ------------------------------------------------------------------------------ environment

def environment_at(pilot: Analysis, new_coords: Any, *,
                   layer: Any = None) -> tuple[pd.DataFrame, str]:
    """The pilot's (standardised) environmental variables at new points.

    With ``layer`` (a GeoDataFrame in the working CRS holding the pilot's raw environmental
    columns, or a categorical variable's original text column), each point takes the value of
    its nearest feature (the containing polygon for polygon layers), standardised with the
    pilot's means and standard deviations. Without it, numeric variables are interpolated from
    the pilot sites by inverse-distance weighting (8 nearest sites, power 2; a point on a
    pilot site takes its value) and category indicators from the nearest site.

    Returns ``(table, method_text)``.

    Examples
    --------
    >>> env, how = environment_at(pilot, [[10.0, 20.0]])  # doctest: +SKIP
    """
    if not isinstance(pilot, Analysis):
        raise InputError(f"`pilot` must be an Analysis (from analyse() or load_pilot()); got "
                         f"{type(pilot).__name__}")
    env = pilot.environment
    if env is None:
        raise InputError("the pilot analysis has no environmental table; there is no "
                         "environment to carry to new sites")
    new_xy = np.asarray(new_coords, dtype=float).reshape(-1, 2)
    indicators = {c for cols in pilot.survey.categorical.values() for c in cols}
    if layer is not None:
        return _environment_from_layer(pilot, new_xy, layer, indicators)
    pilot_xy = pilot.survey.coords.to_numpy()
    k = min(_IDW_NEIGHBOURS, len(pilot_xy))
    d, idx = cKDTree(pilot_xy).query(new_xy, k=k)
    d, idx = d.reshape(len(new_xy), k), idx.reshape(len(new_xy), k)
    values = env.to_numpy()
    scale = max(float(np.ptp(pilot_xy, axis=0).max()), 1e-300)
    exact = d[:, 0] <= 1e-9 * scale
    w = 1.0 / np.maximum(d, 1e-12 * scale) ** _IDW_POWER
    w[exact] = 0.0
    w[exact, 0] = 1.0
    w /= w.sum(axis=1, keepdims=True)
    out = np.einsum("mk,mkc->mc", w, values[idx])
    nearest = values[idx[:, 0]]
    is_ind = np.array([c in indicators for c in env.columns])
    out[:, is_ind] = nearest[:, is_ind]
    return (pd.DataFrame(out, columns=env.columns),
            f"interpolated from the pilot sites (inverse distance, {k} nearest, power "
            f"{_IDW_POWER:g}; categories from the nearest site)")


def _environment_from_layer(pilot: Analysis, new_xy, layer, indicators):
    import geopandas as gpd

    if not isinstance(layer, gpd.GeoDataFrame):
        raise InputError(f"`layer` must be a GeoDataFrame; got {type(layer).__name__}")
    raw = pilot.survey.environment
    points = gpd.GeoDataFrame(geometry=gpd.points_from_xy(new_xy[:, 0], new_xy[:, 1]),
                              crs=layer.crs)
    joined = gpd.sjoin_nearest(points, layer, how="left")
    joined = joined[~joined.index.duplicated(keep="first")]
    cols, missing = {}, []
    levels = {c: (var, c[len(var) + 1:-1]) for var, cs in pilot.survey.categorical.items()
              for c in cs}
    for c in pilot.environment.columns:
        if c in joined.columns:
            v = pd.to_numeric(joined[c], errors="coerce").to_numpy(dtype=float)
        elif c in levels and levels[c][0] in joined.columns:
            var, level = levels[c]
            v = (joined[var].astype(str).to_numpy() == level).astype(float)
        else:
            missing.append(c)
            continue
        if not np.isfinite(v).all():
            raise InputError(f"environment layer column {c!r} has missing or non-numeric "
                             "values at some layout sites; fill them")
        if c not in indicators:
            col = raw[c].to_numpy(dtype=float)
            v = (v - col.mean()) / col.std(ddof=1)
        cols[c] = v
    if missing:
        raise InputError(f"environment layer lacks the pilot variable(s) {missing}; it has "
                         f"{[c for c in layer.columns if c != 'geometry']}")
    return pd.DataFrame(cols), "from the environment layer (nearest feature)"


# ------------------------------------------------------------------------------ random fields

_FEATURES = 256          # random Fourier features per simulated field
_QUADRATURE = 48         # wavelengths averaged in a field's covariance function
_NUGGET = 1e-3           # relative nugget of the conditioning (kriging) system
_CALIBRATION_SITES = 1500


def band_wavelengths(band: tuple[float, float], u: np.ndarray) -> np.ndarray:
    """Wavelengths log-uniform in ``band`` at the quantiles ``u`` (0–1).

    Examples
    --------
    >>> band_wavelengths((10.0, 1000.0), np.array([0.0, 0.5, 1.0])).round(6).tolist()
    [10.0, 100.0, 1000.0]
    """
    lo, hi = band
    return np.exp(np.log(lo) + u * (np.log(hi) - np.log(lo)))


def band_spectrum(band: tuple[float, float]) -> tuple[np.ndarray, np.ndarray]:
    """A log-uniform spectrum over ``band``: (wavelengths, weights), midpoints on log λ.

    Examples
    --------
    >>> lam, w = band_spectrum((10.0, 20.0))
    >>> bool(lam.min() > 10 and lam.max() < 20), round(float(w.sum()), 12)
    (True, 1.0)
    """
    lam = band_wavelengths(band, (np.arange(_QUADRATURE) + 0.5) / _QUADRATURE)
    return lam, np.full(_QUADRATURE, 1.0 / _QUADRATURE)


_SPECTRUM_POINTS, _SPECTRUM_DIRECTIONS = 64, 24


def vector_spectrum(coords: np.ndarray, vectors: np.ndarray, energy: np.ndarray,
                    band: tuple[float, float]) -> tuple[np.ndarray, np.ndarray]:
    """Spectrum of a combination of spatial vectors: where plane waves project onto them.

    For wavelengths λ on a log grid over ``band`` and 24 directions, the periodogram of
    vector k is E_k(λ) = Σ_θ (u_kᵀ cos(κ_θ·x))² + (u_kᵀ sin(κ_θ·x))² (κ = 2π/λ); each vector's
    periodogram is normalised to sum 1 and weighted by ``energy`` (its share of the
    structure). A field drawn from this spectrum has the wavelengths the vectors actually
    carry on their layout, whatever their nominal scale.

    Returns ``(wavelengths, weights)``, weights summing to 1.

    Examples
    --------
    >>> xy = np.column_stack([np.arange(40.0), np.zeros(40)])
    >>> u = np.cos(2 * np.pi * xy[:, :1] / 10.0); u -= u.mean(0); u /= np.linalg.norm(u)
    >>> lam, w = vector_spectrum(xy, u, np.array([1.0]), (4.0, 80.0))
    >>> round(float(lam[w.argmax()]), 0)
    10.0
    """
    xy = np.asarray(coords, dtype=float)
    xy = xy - xy.mean(axis=0)
    lam = band_wavelengths(band, (np.arange(_SPECTRUM_POINTS) + 0.5) / _SPECTRUM_POINTS)
    theta = np.arange(_SPECTRUM_DIRECTIONS) * np.pi / _SPECTRUM_DIRECTIONS
    power = np.zeros((lam.size, vectors.shape[1]))
    for i, lm in enumerate(lam):
        arg = xy @ (2 * np.pi / lm * np.vstack([np.cos(theta), np.sin(theta)]))
        power[i] = (np.sum((vectors.T @ np.cos(arg)) ** 2, axis=1)
                    + np.sum((vectors.T @ np.sin(arg)) ** 2, axis=1))
    power /= np.maximum(power.sum(axis=0, keepdims=True), 1e-300)
    weights = power @ (np.asarray(energy, dtype=float) / max(float(np.sum(energy)), 1e-300))
    return lam, weights / weights.sum()


def spectrum_wavelengths(spectrum: tuple[np.ndarray, np.ndarray],
                         u: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Wavelengths drawn from a spectrum: point by ``u`` (inverse CDF), jittered within its
    log-grid cell by ``v`` (both uniform 0–1).

    Examples
    --------
    >>> spec = (np.array([10.0, 100.0]), np.array([0.5, 0.5]))
    >>> spectrum_wavelengths(spec, np.array([0.2, 0.9]), np.array([0.5, 0.5])).tolist()
    [10.0, 100.0]
    """
    lam, w = spectrum
    j = np.minimum(np.searchsorted(np.cumsum(w), u, side="right"), len(lam) - 1)
    step = float(np.log(lam[1] / lam[0])) if len(lam) > 1 else 0.0
    return lam[j] * np.exp((v - 0.5) * step)


def field_covariance(h: np.ndarray, spectrum: tuple[np.ndarray, np.ndarray]) -> np.ndarray:
    """Correlation at distance h of an isotropic field with the given wavelength spectrum.

    A plane wave cos(κ·x + φ) with random direction has correlation J0(κh) (average of
    cos(κ h cos θ) over θ: Watson 1944, A Treatise on the Theory of Bessel Functions, §2.2
    [memory]); the field's correlation is the weighted average of J0(2πh/λ) over its
    spectrum (:func:`band_spectrum`, :func:`vector_spectrum`).

    Examples
    --------
    >>> float(field_covariance(np.array([0.0]), band_spectrum((10.0, 20.0)))[0])
    1.0
    """
    lam, w = spectrum
    h = np.asarray(h, dtype=float)
    return special.j0(2 * np.pi * h[..., None] / lam) @ w


@dataclass(frozen=True)
class FieldComponent:
    """One family of simulated continuous fields: a scale class or the unselected structure.

    Attributes
    ----------
    name : str
        The scale class (``"broad"`` …) or ``"unselected"``.
    spectrum : tuple of ndarray
        ``(wavelengths, weights)`` of the field (map units), from the pilot vectors it
        stands for (:func:`vector_spectrum`).
    loadings : ndarray, shape (r, p)
        Species loadings of the r independent latent fields (standard deviation within the
        pilot's extent times the direction in species space).
    calibration : float
        Factor giving a latent field unit expected variance among the pilot sites.
    pilot_scores : ndarray, shape (n_pilot, r)
        The latent fields' values at the pilot sites that the pilot's fit implies (used by
        conditional simulation).
    """

    name: str
    spectrum: tuple = field(repr=False)
    loadings: np.ndarray = field(repr=False)
    calibration: float
    pilot_scores: np.ndarray = field(repr=False)


def _unit_field_variance(xy: np.ndarray, spectrum: tuple) -> float:
    """Expected sample variance among sites of a unit-variance field (1 − mean correlation)."""
    if len(xy) > _CALIBRATION_SITES:
        xy = xy[np.linspace(0, len(xy) - 1, _CALIBRATION_SITES).astype(int)]
    d = np.sqrt(((xy[:, None, :] - xy[None, :, :]) ** 2).sum(-1))
    n = len(xy)
    return float(max(1.0 - field_covariance(d, spectrum).sum() / n ** 2, 1e-6) * n / (n - 1))


def _components(structure: np.ndarray, rescale: float) -> tuple[np.ndarray, np.ndarray]:
    """Latent scores (unit variance at the pilot) and loadings of a centred n × p structure."""
    n = structure.shape[0]
    a, s, vt = np.linalg.svd(structure, full_matrices=False)
    keep = s > max(s[0], 1e-300) * 1e-8 if s.size else np.zeros(0, bool)
    a, s, vt = a[:, keep], s[keep], vt[keep]
    scores = a * math.sqrt(n - 1)
    loadings = (s / math.sqrt(n - 1))[:, None] * vt * math.sqrt(rescale)
    return scores, loadings


def draw_fields(components: tuple[FieldComponent, ...], rng: np.random.Generator,
                xy: np.ndarray) -> list[np.ndarray]:
    """Each component's latent fields at ``xy`` (n × r per component), one realisation.

    Random Fourier features (Rahimi & Recht 2007, NIPS 20 [memory]): a field is
    √(2/M) Σ cos(κ_m·x + φ_m) over M waves with wavelengths drawn from its spectrum,
    uniform directions and phases; the random numbers depend only on ``rng``, so every
    layout evaluated with the same generator sees the same landscape.

    Examples
    --------
    >>> fields = draw_fields(model.components, np.random.default_rng(1), xy)  # doctest: +SKIP
    """
    out = []
    for comp in components:
        r = comp.loadings.shape[0]
        lam = spectrum_wavelengths(comp.spectrum, rng.random((r, _FEATURES)),
                                   rng.random((r, _FEATURES)))
        theta = rng.uniform(0, 2 * np.pi, (r, _FEATURES))
        phase = rng.uniform(0, 2 * np.pi, (r, _FEATURES))
        kx, ky = 2 * np.pi / lam * np.cos(theta), 2 * np.pi / lam * np.sin(theta)
        arg = xy[:, 0, None, None] * kx + xy[:, 1, None, None] * ky + phase   # (n, r, M)
        values = np.cos(arg).sum(axis=2) * math.sqrt(2.0 / _FEATURES) * comp.calibration
        out.append(values)
    return out


def _kriging_weights(comp: FieldComponent, pilot_xy: np.ndarray, xy: np.ndarray) -> np.ndarray:
    """Simple-kriging weights (layout × pilot) of a component's latent field."""
    d_pp = np.sqrt(((pilot_xy[:, None] - pilot_xy[None]) ** 2).sum(-1))
    d_xp = np.sqrt(((xy[:, None] - pilot_xy[None]) ** 2).sum(-1))
    k_pp = field_covariance(d_pp, comp.spectrum)
    k_pp[np.diag_indices_from(k_pp)] += _NUGGET
    return scipy.linalg.solve(k_pp, field_covariance(d_xp, comp.spectrum).T,
                              assume_a="pos").T


# ------------------------------------------------------------------------------ site-keyed noise

_MASK = np.uint64(0xFFFFFFFFFFFFFFFF)


def _mix(z: np.ndarray) -> np.ndarray:
    """splitmix64 finaliser (Steele, Lea & Flood 2014, OOPSLA [memory]), uint64 in and out."""
    with np.errstate(over="ignore"):
        z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
        z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
        return z ^ (z >> np.uint64(31))


def site_uniforms(xy: np.ndarray, key: int, columns: int, resolution: float) -> np.ndarray:
    """Uniform numbers (n × columns) that depend only on a site's position and ``key``.

    Two layouts sharing a site get the same numbers there, so a superset of a layout sees the
    same independent noise at the shared sites (common random numbers, site by site).
    Positions are rounded to ``resolution`` map units.

    Examples
    --------
    >>> u = site_uniforms(np.array([[0.0, 0.0], [5.0, 1.0]]), 7, 3, 1e-6)
    >>> u.shape, bool(((u > 0) & (u < 1)).all())
    ((2, 3), True)
    """
    q = np.round(np.asarray(xy, dtype=float) / resolution).astype(np.int64).view(np.uint64)
    with np.errstate(over="ignore"):
        h = _mix(np.uint64(key) ^ _mix(q[:, 0] + np.uint64(0x9E3779B97F4A7C15)))
        h = _mix(h ^ _mix(q[:, 1] + np.uint64(0x632BE59BD9B4E019)))
        cols = _mix(h[:, None] + np.arange(1, columns + 1, dtype=np.uint64)[None, :]
                    * np.uint64(0x9E3779B97F4A7C15))
    return ((cols >> np.uint64(11)).astype(np.float64) + 0.5) / 2.0 ** 53


def _site_normals(xy, key, columns, resolution) -> np.ndarray:
    u = site_uniforms(xy, key, 2 * columns, resolution)
    return np.sqrt(-2 * np.log(u[:, :columns])) * np.cos(2 * np.pi * u[:, columns:])


# ------------------------------------------------------------------------------ pilot model

@dataclass(frozen=True)
class PilotModel:
    """The pilot's joint least-squares fit, turned into a generator of continuous landscapes.

    Attributes
    ----------
    mean : ndarray, shape (p,)
        Mean of the transformed community.
    centre : ndarray, shape (2,)
        Mean pilot coordinates (origin of the trend and of the fields).
    coef : dict
        Block name (``trend``, ``environment``, ``space``) → coefficients (terms × p).
    x_mean : dict
        Block name → mean of its predictors at the pilot sites.
    environment : tuple of str
        The selected environmental variables.
    space : tuple of str
        The selected spatial vectors.
    components : tuple of FieldComponent
        One per pilot scale class with selected vectors, and ``"unselected"`` for spatial
        structure in the residuals beyond what chance puts on the unselected vectors.
    residuals : ndarray, shape (n_pilot, p)
        Spatially independent residual rows (inflated by √((n − 1)/(n − 1 − m)), shrunk by
        the share moved to the unselected-structure field).
    inflate : float
        That inflation factor.
    environment_sd : dict
        Variable → standard deviation of its local part (the pilot's leave-one-out
        interpolation error, standardised units; 0 for category indicators).
    spacing : float
        Median nearest-neighbour distance of the pilot sites (map units).
    resolution : float
        Rounding of positions for site-keyed noise (map units).
    """

    mean: np.ndarray
    centre: np.ndarray
    coef: dict = field(repr=False)
    x_mean: dict = field(repr=False)
    environment: tuple[str, ...]
    space: tuple[str, ...]
    residuals: np.ndarray = field(repr=False)
    inflate: float
    components: tuple[FieldComponent, ...] = ()
    environment_sd: dict = field(default_factory=dict)
    spacing: float = 1.0
    resolution: float = 1e-6


def _pilot_range(pilot: Analysis) -> tuple[float, float]:
    """Wavelengths a pilot can speak for: half its finest vector scale to its extent's."""
    return (0.5 * float(pilot.basis.scale.min()),
            extent_wavelength(pilot.survey.coords.to_numpy()))


def class_band(pilot: Analysis, name: str) -> tuple[float, float]:
    """Wavelength band (map units) of a pilot scale class, its open ends closed by the pilot.

    The class bounds, with the broad class's open upper end set to the broadest wavelength the
    pilot's extent resolves (twice its long side, :func:`~spatial_ev.space.scales.
    extent_wavelength`) and the fine class's zero lower end to the pilot basis's finest
    vector scale.

    Examples
    --------
    >>> class_band(pilot, "fine")  # doctest: +SKIP
    (83.4, 120.0)
    """
    fit = _class_fit(pilot, name)
    s = pilot.basis.scale.to_numpy()
    lo, hi = fit.scale_class.bounds
    lo = lo if lo > 0 else float(s.min())
    hi = hi if math.isfinite(hi) else extent_wavelength(pilot.survey.coords.to_numpy())
    if hi <= lo * 1.0001:
        hi = lo * 1.05
    return float(lo), float(hi)


def _class_fit(pilot: Analysis, name: str):
    fit = next((f for f in pilot.scale_fits if f.scale_class.name == name), None)
    if fit is None:
        raise InputError(f"the pilot has no scale class {name!r}; it has "
                         f"{[f.scale_class.name for f in pilot.scale_fits]}")
    return fit


def class_spectrum(pilot: Analysis, name: str,
                   coefficients: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Wavelength spectrum of a pilot scale class: that of its selected vectors.

    Each selected vector of the class counts with its share of the class's fitted structure
    (the squared norm of its species coefficients; equal shares without ``coefficients``);
    a class without selected vectors gets its band, log-uniform (:func:`class_band`).

    Examples
    --------
    >>> lam, w = class_spectrum(pilot, "fine")  # doctest: +SKIP
    """
    fit = _class_fit(pilot, name)
    names = list(fit.scale_class.vectors)
    if not names:
        return band_spectrum(class_band(pilot, name))
    u = pilot.basis.vectors[names].to_numpy()
    energy = (np.ones(len(names)) if coefficients is None
              else np.sum(np.asarray(coefficients, dtype=float) ** 2, axis=1))
    xy = pilot.survey.coords.to_numpy()
    return vector_spectrum(xy - xy.mean(axis=0), u, energy, _pilot_range(pilot))


def _loo_idw_sd(xy: np.ndarray, values: np.ndarray) -> np.ndarray:
    """Per column: root mean square of leave-one-out inverse-distance interpolation errors."""
    k = min(_IDW_NEIGHBOURS, len(xy) - 1)
    d, idx = cKDTree(xy).query(xy, k=k + 1)
    d, idx = d[:, 1:], idx[:, 1:]
    w = 1.0 / np.maximum(d, 1e-12 * max(float(np.ptp(xy)), 1e-300)) ** _IDW_POWER
    w /= w.sum(axis=1, keepdims=True)
    pred = np.einsum("nk,nkc->nc", w, values[idx])
    return np.sqrt(np.mean((values - pred) ** 2, axis=0))


def pilot_model(pilot: Analysis) -> PilotModel:
    """Joint least-squares fit of the transformed community, and the fields it implies.

    The community is fitted on the kept trend + selected environment + selected vectors.
    Each scale class's fitted structure (its vectors × their coefficients) becomes a family of
    continuous fields in the class's wavelength band with the same species loadings (its
    singular directions) and the same variance, shrunk by the class's adjusted/raw R² ratio
    (a correction for the chance fit of its vectors). Residual spatial structure on the
    unselected vectors beyond chance (k/(n − 1 − m) of the residual variation for k vectors)
    becomes one more field over all the pilot's wavelengths; what remains is independent.

    Examples
    --------
    >>> model = pilot_model(pilot)  # doctest: +SKIP
    >>> model.residuals.shape == pilot.response.shape  # doctest: +SKIP
    True
    """
    if not isinstance(pilot, Analysis):
        raise InputError(f"`pilot` must be an Analysis (from analyse() or load_pilot()); got "
                         f"{type(pilot).__name__}")
    Y = pilot.response.to_numpy(dtype=float)
    mean = Y.mean(axis=0)
    xy = pilot.survey.coords.to_numpy()
    centre = xy.mean(axis=0)
    blocks, names = [], []
    if pilot.trend_kept:
        blocks.append(xy - centre)
        names.append("trend")
    env_sel = tuple(pilot.selected_environment)
    if env_sel:
        blocks.append(pilot.environment[list(env_sel)].to_numpy())
        names.append("environment")
    space_sel = tuple(pilot.selected_space)
    if space_sel:
        blocks.append(pilot.basis.vectors[list(space_sel)].to_numpy())
        names.append("space")
    if not blocks:
        raise DesignError("the pilot analysis selected no environmental variable, no spatial "
                          "vector and no trend: there is no effect to simulate power for")
    X = np.hstack(blocks)
    Xc = X - X.mean(axis=0)
    coef, *_ = np.linalg.lstsq(Xc, Y - mean, rcond=None)
    resid = (Y - mean) - Xc @ coef
    m = np.linalg.matrix_rank(Xc)
    n = len(Y)
    if n - 1 - m <= 0:
        raise DesignError("the pilot model has as many terms as sites; residual variation "
                          "cannot be estimated")
    inflate = math.sqrt((n - 1) / (n - 1 - m))
    cuts = np.cumsum([b.shape[1] for b in blocks])[:-1]
    coefs = dict(zip(names, np.split(coef, cuts)))
    rel = xy - centre
    components = []
    if space_sel:
        vec = pilot.basis.vectors[list(space_sel)].to_numpy()
        detrended = Y - mean
        for fit in pilot.scale_fits:
            idx = [space_sel.index(v) for v in fit.scale_class.vectors]
            if not idx:
                continue
            part = vec[:, idx] @ coefs["space"][idx]
            part = part - part.mean(axis=0)
            q = vec[:, idx] - vec[:, idx].mean(axis=0)
            raw = float(np.sum((q @ np.linalg.pinv(q) @ detrended) ** 2)
                        / np.sum(detrended ** 2))
            shrink = min(1.0, max(fit.r2_adj or 0.0, 0.0) / raw) if raw > 0 else 0.0
            spectrum = class_spectrum(pilot, fit.scale_class.name, coefs["space"][idx])
            scores, loadings = _components(part, shrink)
            if loadings.shape[0] and shrink > 0:
                components.append(FieldComponent(
                    fit.scale_class.name, spectrum, loadings,
                    1.0 / math.sqrt(_unit_field_variance(rel, spectrum)), scores))
    others = [c for c in pilot.basis.vectors.columns if c not in space_sel]
    resid_total = float(np.sum(resid ** 2))
    moved = 0.0
    if others and resid_total > 0:
        u = pilot.basis.vectors[others].to_numpy()
        u = u - u.mean(axis=0)
        on_unselected = u @ np.linalg.lstsq(u, resid, rcond=None)[0]
        chance = len(others) / (n - 1 - m) * resid_total
        moved = max(0.0, float(np.sum(on_unselected ** 2)) - chance)
        if moved > 0:
            energy = np.sum((u.T @ resid) ** 2, axis=1)
            spectrum = vector_spectrum(rel, u / np.linalg.norm(u, axis=0), energy,
                                       _pilot_range(pilot))
            scores, loadings = _components(on_unselected, moved / np.sum(on_unselected ** 2))
            components.append(FieldComponent(
                "unselected", spectrum, loadings[:3],
                1.0 / math.sqrt(_unit_field_variance(rel, spectrum)), scores[:, :3]))
    keep = math.sqrt(max(0.0, 1.0 - moved / resid_total)) if resid_total > 0 else 1.0
    env_sd = {}
    if pilot.environment is not None and pilot.environment.shape[1]:
        indicators = {c for cols in pilot.survey.categorical.values() for c in cols}
        sd = _loo_idw_sd(xy, pilot.environment.to_numpy(dtype=float))
        env_sd = {c: (0.0 if c in indicators else float(v))
                  for c, v in zip(pilot.environment.columns, sd)}
    nn = cKDTree(xy).query(xy, k=2)[0][:, 1]
    extent = max(float(np.ptp(xy, axis=0).max()), 1e-300)
    return PilotModel(mean=mean, centre=centre, coef=coefs,
                      x_mean=dict(zip(names, np.split(X.mean(axis=0), cuts))),
                      environment=env_sel, space=space_sel,
                      residuals=resid * inflate * keep, inflate=inflate,
                      components=tuple(components), environment_sd=env_sd,
                      spacing=float(np.median(nn)), resolution=extent * 1e-9)


@dataclass(frozen=True)
class _LayoutModel:
    """Arrays one layout's simulations need (picklable, shipped once per worker)."""

    name: str
    coords: pd.DataFrame          # (n, 2) x, y, indexed like the basis vectors
    basis: SpatialBasis           # the layout's own spatial basis
    fixed: np.ndarray             # (n, p): mean + trend (+ environment from a layer)
    env_mean: pd.DataFrame | None  # (n, e) interpolated environment (standardised)
    env_local_sd: np.ndarray | None  # (n, e) sd of the simulated local part
    env_columns: tuple            # environmental columns analysed at this layout
    env_coef: np.ndarray | None   # (selected env, p)
    env_x_mean: np.ndarray | None
    env_selected: tuple
    trend_true: np.ndarray | None  # (n, 2) trend predictors
    rel_xy: np.ndarray            # coordinates relative to the pilot centre
    kriging: tuple = ()           # per component: (layout × pilot) kriging weights
    pilot_rel_xy: np.ndarray | None = None  # pilot sites relative to the centre (conditional)
    class_bands: dict = field(default_factory=dict)  # class -> (lower, upper) of the pilot


def layout_model(pilot: Analysis, model: PilotModel, lay: CandidateLayout, basis: SpatialBasis,
                 layer: Any, *, conditional: bool = False) -> tuple[_LayoutModel, dict]:
    """What one layout's simulations need: its fixed signal, environment and fields' setup.

    Returns the layout's model and diagnostics (environment source, variables constant at the
    layout, the share of sites with a simulated local environment).

    Examples
    --------
    >>> lm, info = layout_model(pilot, pilot_model(pilot), layout, basis, None)  # doctest: +SKIP
    """
    xy = lay.coords[["x", "y"]].to_numpy()
    index = basis.vectors.index
    fixed = np.broadcast_to(model.mean, (len(xy), len(model.mean))).copy()
    info: dict[str, Any] = {}
    trend_true = None
    if "trend" in model.coef:
        fixed += (xy - model.centre - model.x_mean["trend"]) @ model.coef["trend"]
        trend_true = xy - model.centre
    env_mean = env_sd = None
    env_cols: tuple = ()
    if pilot.environment is not None and pilot.environment.shape[1]:
        full, info["environment_source"] = environment_at(pilot, xy, layer=layer)
        full.index = index
        env_mean = full
        if layer is None:
            d1 = cKDTree(pilot.survey.coords.to_numpy()).query(xy)[0]
            reach = np.minimum(1.0, d1 / max(model.spacing, 1e-300))
            sd = np.array([model.environment_sd.get(c, 0.0) for c in full.columns])
            env_sd = reach[:, None] * sd[None, :]
            info["environment_local_share"] = float(np.mean(reach > 0))
            info["environment_source"] += ("; plus a simulated local part with the pilot's "
                                           "leave-one-out interpolation error, growing to its "
                                           "full size one pilot spacing from the pilot sites")
        varying = full.columns[(full.to_numpy().std(axis=0) > 1e-12)
                               | ((env_sd if env_sd is not None else 0 * full.to_numpy())
                                  .max(axis=0) > 0)]
        if len(varying) < full.shape[1]:
            info["constant_environment"] = [c for c in full.columns if c not in varying]
        env_cols = tuple(varying)
    rel = xy - model.centre
    kriging, pilot_rel = (), None
    if conditional:
        pilot_rel = pilot.survey.coords.to_numpy() - model.centre
        kriging = tuple(_kriging_weights(c, pilot_rel, rel) for c in model.components)
    bands = {f.scale_class.name: tuple(f.scale_class.bounds) for f in pilot.scale_fits}
    return _LayoutModel(lay.name, pd.DataFrame(xy, index=index, columns=["x", "y"]), basis,
                        fixed, env_mean, env_sd, env_cols,
                        model.coef.get("environment"), model.x_mean.get("environment"),
                        model.environment, trend_true, rel, kriging, pilot_rel, bands), info


def draw_truth(lay: _LayoutModel, model: PilotModel, rng: np.random.Generator) -> dict:
    """One simulated landscape at a layout's sites: community, environment, structures.

    Examples
    --------
    >>> truth = draw_truth(lm, model, np.random.default_rng(1))  # doctest: +SKIP
    """
    keys = rng.integers(0, 2 ** 63, size=2)
    n = len(lay.rel_xy)
    if lay.kriging:
        both = draw_fields(model.components, rng, np.vstack([lay.rel_xy, lay.pilot_rel_xy]))
        fields = []
        for comp, values, weights in zip(model.components, both, lay.kriging):
            at_layout, at_pilot = values[:n], values[n:]
            target = comp.pilot_scores + at_pilot.mean(axis=0)
            fields.append(at_layout + weights @ (target - at_pilot))
    else:
        fields = draw_fields(model.components, rng, lay.rel_xy)
    Y = lay.fixed.copy()
    env = None
    if lay.env_mean is not None:
        values = lay.env_mean.to_numpy().copy()
        if lay.env_local_sd is not None:
            values += lay.env_local_sd * _site_normals(lay.coords.to_numpy(), int(keys[0]),
                                                       values.shape[1], model.resolution)
        env = pd.DataFrame(values, index=lay.coords.index, columns=lay.env_mean.columns)
    env_true = None
    if lay.env_selected:
        env_true = env[list(lay.env_selected)].to_numpy()
        Y += (env_true - lay.env_x_mean) @ lay.env_coef
    structures = {}
    latent = []
    for comp, values in zip(model.components, fields):
        part = values @ comp.loadings
        structures[comp.name] = part - part.mean(axis=0)
        Y += part
        latent.append(values)
    rows = site_uniforms(lay.coords.to_numpy(), int(keys[1]), 1, model.resolution)[:, 0]
    Y += model.residuals[np.minimum((rows * len(model.residuals)).astype(int),
                                    len(model.residuals) - 1)]
    space_parts = ([lay.trend_true] if lay.trend_true is not None else []) + latent
    return {"Y": Y, "environment": env, "env_true": env_true,
            "space_true": np.hstack(space_parts) if space_parts else None,
            "structures": structures}


# ------------------------------------------------------------------------------ simulation

@dataclass(frozen=True)
class SimulationSettings:
    """What every simulated analysis shares.

    Attributes
    ----------
    alpha : float
        Level of every test.
    space_level : float
        Level of the spatial global test (the pilot's corrected level by default).
    n_permutations : int
    global_permutations : int
        Permutations of the spatial global test (enough to reach ``space_level``).
    trend : {"test", "ignore"}
        The pilot's trend rule.
    breaks : tuple of float
        The pilot's scale-class boundaries.
    class_names : tuple of str
        The pilot's scale classes, in order.
    model : PilotModel
        The generator of the simulated landscapes.
    step_tests : {"full", "sequential", "shared"}
        The pilot's rule for forward-selection step tests, applied to every simulated
        analysis (:attr:`~spatial_ev.pipeline.options.StepOptions.step_tests`).
    """

    alpha: float
    space_level: float
    n_permutations: int
    global_permutations: int
    trend: str
    breaks: tuple
    class_names: tuple
    model: PilotModel = field(repr=False)
    step_tests: str = "full"


class Simulator:
    """One simulated survey and its analysis; task = (layout position, SeedSequence).

    The task's sequence is the replicate's: every layout gets the same one, so layouts are
    compared on the same landscapes (common random numbers).

    Examples
    --------
    >>> result = Simulator(models, settings)((0, np.random.SeedSequence(1)))  # doctest: +SKIP
    """

    def __init__(self, models: list[_LayoutModel], settings: SimulationSettings) -> None:
        self.models = models
        self.settings = settings

    def __call__(self, task: tuple[int, np.random.SeedSequence]) -> dict:
        from spatial_ev.inference.engines import one_blas_thread

        position, seq = task
        # matrices of a few hundred rows: BLAS threads only add contention (measured: a
        # serial run with two BLAS threads was 13x slower than two single-threaded tasks)
        with one_blas_thread():
            return _simulate(self.models[position], self.settings, seq)


def stop_category(selection: Any) -> str:
    """Why a selection ended, as one of four categories.

    ``"no global significance"`` (the global test failed or could not run), ``"p > alpha"``
    (the best remaining candidate was not significant), ``"ceiling"`` (the adjusted-R²
    ceiling of the double stopping rule), ``"exhausted"`` (candidates, degrees of freedom or
    a cap ran out).

    Examples
    --------
    >>> stop_category(None)
    'no global significance'
    """
    if selection is None:
        return "no global significance"
    reason = str(selection.stop_reason)
    if "not significant" in reason:
        return "p > alpha"
    if "adjusted R²" in reason:
        return "ceiling"
    return "exhausted"


def holm(p_values: dict) -> dict:
    """Holm's step-down adjustment of a dict of p-values (None stays None).

    Holm 1979, Scand. J. Stat. 6:65–70: the i-th smallest of k p-values is multiplied by
    k − i + 1, made monotone, capped at 1.

    Examples
    --------
    >>> holm({"a": 0.01, "b": 0.04, "c": None})
    {'a': 0.02, 'b': 0.04, 'c': None}
    """
    names = [k for k, v in p_values.items() if v is not None]
    if not names:
        return dict(p_values)
    p = np.array([p_values[k] for k in names], dtype=float)
    order = np.argsort(p, kind="stable")
    adj = np.minimum(1.0, np.maximum.accumulate(p[order] * (len(p) - np.arange(len(p)))))
    out = dict(p_values)
    for i, j in enumerate(order):
        out[names[j]] = float(adj[i])
    return out


def band_members(scale: pd.Series, selected, bands: dict) -> dict:
    """Selected vectors by the pilot class band their own scale falls in (lower < s ≤ upper).

    Examples
    --------
    >>> band_members(pd.Series({"a": 90.0, "b": 20.0}), ["a", "b"],
    ...              {"broad": (50.0, np.inf), "fine": (0.0, 50.0)})
    {'broad': ['a'], 'fine': ['b']}
    """
    s = scale.reindex(list(selected)).to_numpy(dtype=float)
    return {name: [v for v, x in zip(selected, s) if lo < x <= hi]
            for name, (lo, hi) in bands.items()}


def _carried(basis: SpatialBasis, bands: dict, structures: dict) -> dict:
    """Share of each class's true structure on the layout's in-band and other vectors."""
    u = basis.vectors.to_numpy()
    s = basis.scale.to_numpy()
    out = {}
    for name, part in structures.items():
        if name not in bands:
            continue
        total = float(np.sum(part ** 2))
        lo, hi = bands[name]
        inside = (s > lo) & (s <= hi)
        proj = u.T @ part
        share = np.sum(proj ** 2, axis=1) / total if total > 0 else np.zeros(len(s))
        out[name] = (float(share[inside].sum()), float(share[~inside].sum()))
    return out


def _simulate(lay: _LayoutModel, s: SimulationSettings, seq: np.random.SeedSequence) -> dict:
    """Draw one landscape at the layout and analyse it with the pipeline's steps."""
    # children by explicit spawn keys, not seq.spawn(): spawn() counts its calls, and every
    # layout must get the same children of the replicate's sequence
    truth = draw_truth(lay, s.model, np.random.default_rng(
        np.random.SeedSequence(seq.entropy, spawn_key=tuple(seq.spawn_key) + (0,))))
    out = analyse_survey(truth["Y"], truth["environment"], lay, s, seq)
    out["truth"] = [float(v) for v in _truth(truth, truth["Y"] - truth["Y"].mean(axis=0))]
    carried = _carried(lay.basis, {n: lay.class_bands[n] for n in s.class_names},
                       truth["structures"])
    out["carried"] = {k: v[0] for k, v in carried.items()}
    out["aliased"] = {k: v[1] for k, v in carried.items()}
    return out


def analyse_survey(Y: np.ndarray, environment: pd.DataFrame | None, lay: _LayoutModel,
                   s: SimulationSettings, seq: np.random.SeedSequence) -> dict:
    """Analyse one survey at a layout as a simulated one is, and say what it detected.

    The pipeline's steps (trend, environment, space on the layout's basis, partition) and
    the detection of each scale class by the selected vectors in its band (Holm across
    classes). Used for simulated surveys and, in validation, for surveys drawn from a known
    truth, so that both are judged by the same rule.

    Returns a dict: ``detected`` (objective → bool), ``estimate`` (fractions), numbers of
    selected variables and vectors, and the stop categories of both selections.

    Examples
    --------
    >>> out = analyse_survey(Y, env, layout_model, settings, np.random.SeedSequence(1))
    ... # doctest: +SKIP
    """
    streams = [np.random.default_rng(np.random.SeedSequence(
        seq.entropy, spawn_key=tuple(seq.spawn_key) + (1, j))) for j in range(5)]
    Y = np.asarray(Y, dtype=float)
    Y = Y - Y.mean(axis=0)
    env_table = environment
    if env_table is not None:
        env_table = env_table[list(lay.env_columns)] if lay.env_columns else None
    alpha, options = s.alpha, StepOptions(n_permutations=s.n_permutations,
                                          step_tests=s.step_tests)
    trend = trend_step(Y, lay.coords, mode=s.trend, alpha=alpha, seed=streams[0],
                       options=options)
    env_step = environment_step(Y, env_table, alpha=alpha, seed=streams[1], options=options)
    space = space_step(Y, basis=lay.basis, level=s.space_level,
                       global_permutations=s.global_permutations, alpha=alpha,
                       conditioning=trend.covariables, seed=streams[2], options=options)
    # without candidate environmental variables at this layout (none in the pilot, or all
    # constant here) the environment's fractions are zero by construction
    candidates = env_table if env_table is not None else pd.DataFrame(index=lay.coords.index)
    partition = partition_step(Y, candidates, env_step.selection,
                               space_group(space.basis, space.selection, trend.covariables),
                               space_p=space.global_p, alpha=alpha, seed=streams[3],
                               options=options)
    env_sel = env_step.selection.selected if env_step.selection is not None else ()
    space_sel = space.selection.selected if space.selection is not None else ()
    # the environment is detected when its unique fraction is significant, with the group
    # the pipeline partitions: the selected variables, or the whole table when the ceiling of
    # the double stopping rule stopped a significant selection before its first variable
    env_p = partition.fraction_tests["environment_only"]
    detected = {"environment": env_p is not None and env_p <= alpha}
    bands = {name: lay.class_bands[name] for name in s.class_names}
    members = band_members(lay.basis.scale, space_sel, bands)
    p_values = holm(scale_class_p_values(Y, lay.basis.vectors, members,
                                         conditioning=trend.covariables, seed=streams[4],
                                         options=options))
    for name in s.class_names:
        detected[f"scale:{name}"] = p_values[name] is not None and p_values[name] <= alpha
    return {"detected": detected,
            "estimate": [float(partition.fractions[f]) for f in FRACTIONS],
            "n_environment": len(env_sel), "n_space": len(space_sel),
            "space_stop": stop_category(space.selection),
            "environment_stop": stop_category(env_step.selection)}


def _truth(truth: dict, Y: np.ndarray) -> list[float]:
    """The partition with the generating predictors (NaN when a group is constant here)."""
    env_true, space_true = truth["env_true"], truth["space_true"]
    try:
        if env_true is not None and space_true is not None:
            tr = partition_variation(Y, {"environment": env_true, "space": space_true},
                                     n_permutations=0).fractions["r2_adj"]
            return [tr["environment_only"], tr["environment_and_space"], tr["space_only"],
                    tr["unexplained"]]
        e = explained_fraction(Y, env_true).r2_adj if env_true is not None else 0.0
        w = explained_fraction(Y, space_true).r2_adj if space_true is not None else 0.0
        return [e, 0.0, w, 1.0 - e - w]
    except InputError:  # a generating group constant at this layout: no oracle value
        return [np.nan] * 4
