"""The pilot's fitted model as a data generator, and the analysis of one simulated survey.

Used by :func:`spatial_ev.design.evaluate.evaluate_design` (see its module docstring for the model,
the residual scheme, the environment at new sites and the permutation budget). The pilot is
fitted jointly: transformed community ~ kept trend + selected environmental variables +
selected spatial vectors (least squares, centred). At a layout's sites the signal is rebuilt
from the trend at the new coordinates, the environment there (:func:`environment_at`) and the
pilot vectors extended by :meth:`~spatial_ev.space.eigen.SpatialBasis.extend`.

A simulated survey is analysed by the pipeline's own named steps
(:mod:`spatial_ev.pipeline.steps`: trend, environment, space, partition, scale-class tests),
so the simulated analysis is the analysis; only two things are the design's own: the space
step judges the layout's one basis at the pilot's corrected level (next season's analysis
will again compare schemes), and selected vectors are attributed to the pilot's scale
classes by the structure they carry (:func:`_owners`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
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
from spatial_ev.stats.linear import explained_fraction

__all__ = [
    "FRACTIONS",
    "PilotModel",
    "SimulationSettings",
    "Simulator",
    "environment_at",
    "layout_model",
    "pilot_model",
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


# ------------------------------------------------------------------------------ pilot model

@dataclass(frozen=True)
class PilotModel:
    """The pilot's joint least-squares fit, used as the truth of the simulations.

    Attributes
    ----------
    mean : ndarray, shape (p,)
        Mean of the transformed community.
    centre : ndarray, shape (2,)
        Mean pilot coordinates (origin of the trend).
    coef : dict
        Block name (``trend``, ``environment``, ``space``) → coefficients (terms × p).
    x_mean : dict
        Block name → mean of its predictors at the pilot sites.
    environment : tuple of str
        The selected environmental variables.
    space : tuple of str
        The selected spatial vectors.
    residuals : ndarray, shape (n_pilot, p)
        Residual rows inflated by √((n − 1)/(n − 1 − m)).
    inflate : float
        That factor.
    """

    mean: np.ndarray
    centre: np.ndarray
    coef: dict = field(repr=False)
    x_mean: dict = field(repr=False)
    environment: tuple[str, ...]
    space: tuple[str, ...]
    residuals: np.ndarray = field(repr=False)
    inflate: float


@dataclass(frozen=True)
class _LayoutModel:
    """Arrays one layout's simulations need (picklable, shipped once per worker)."""

    name: str
    signal: np.ndarray          # (n, p): pilot mean + trend + environment + space
    coords: pd.DataFrame        # (n, 2) x, y, indexed like the basis vectors
    env: pd.DataFrame | None    # (n, e) candidate environmental variables at the sites
    basis: SpatialBasis         # the layout's own spatial basis
    env_true: np.ndarray | None  # generating environmental predictors
    space_true: np.ndarray | None  # generating spatial predictors (trend + extended vectors)
    class_parts: dict = field(default_factory=dict)  # class -> (n, p) its structure, centred


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
    residuals : ndarray, shape (n_pilot, p)
        Inflated residual rows, resampled whole.
    """

    alpha: float
    space_level: float
    n_permutations: int
    global_permutations: int
    trend: str
    breaks: tuple
    class_names: tuple
    residuals: np.ndarray = field(repr=False)


def pilot_model(pilot: Analysis) -> PilotModel:
    """Joint least-squares fit of the transformed community on trend, environment, space.

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
    return PilotModel(mean=mean, centre=centre, coef=dict(zip(names, np.split(coef, cuts))),
                      x_mean=dict(zip(names, np.split(X.mean(axis=0), cuts))),
                      environment=env_sel, space=space_sel, residuals=resid * inflate,
                      inflate=inflate)


def layout_model(pilot: Analysis, model: PilotModel, lay: CandidateLayout, basis: SpatialBasis,
                 layer: Any) -> tuple[_LayoutModel, dict]:
    """The generating signal and the analysis inputs at one layout's sites.

    Returns the layout's model and diagnostics (environment source, variables constant at the
    layout, ratio of each class's variance at the layout to that at the pilot sites).

    Examples
    --------
    >>> lm, info = layout_model(pilot, pilot_model(pilot), layout, basis, None)  # doctest: +SKIP
    """
    xy = lay.coords[["x", "y"]].to_numpy()
    index = basis.vectors.index
    signal = np.broadcast_to(model.mean, (len(xy), len(model.mean))).copy()
    info: dict[str, Any] = {}
    space_parts = []
    if "trend" in model.coef:
        signal += (xy - model.centre - model.x_mean["trend"]) @ model.coef["trend"]
        space_parts.append(xy - model.centre)
    env, env_true = None, None
    if pilot.environment is not None and pilot.environment.shape[1]:
        full, info["environment_source"] = environment_at(pilot, xy, layer=layer)
        full.index = index
        env = full
        varying = env.columns[env.to_numpy().std(axis=0) > 1e-12]
        if len(varying) < env.shape[1]:
            info["constant_environment"] = [c for c in env.columns if c not in varying]
        env = env[varying] if len(varying) else None
        pilot_sd = pilot.environment.to_numpy().std(axis=0)
        if env is not None:
            kept = env.to_numpy().std(axis=0) / pilot_sd[[list(pilot.environment.columns)
                                                         .index(c) for c in env.columns]]
            info["environment_sd_ratio"] = dict(zip(env.columns, np.round(kept, 4)))
    if model.environment:
        e = full[list(model.environment)].to_numpy()
        signal += (e - model.x_mean["environment"]) @ model.coef["environment"]
        env_true = e
    if model.space:
        ext = pilot.basis.extend(xy)[list(model.space)].to_numpy()
        if not np.isfinite(ext).all():
            raise DesignError(f"layout {lay.name!r}: the pilot's spatial vectors cannot be "
                              "extended to its sites (unstable vectors); use distance-based "
                              "weighting in the pilot")
        signal += (ext - model.x_mean["space"]) @ model.coef["space"]
        space_parts.append(ext)
        info["class_variance_ratio"] = _class_variance(pilot, model, ext)
    space_true = np.hstack(space_parts) if space_parts else None
    coords = pd.DataFrame(xy, index=index, columns=["x", "y"])
    return _LayoutModel(lay.name, signal, coords, env, basis, env_true, space_true,
                        _class_parts(pilot, model, xy)), info


def _class_parts(pilot: Analysis, model: PilotModel, xy: np.ndarray) -> dict:
    """Each scale class's generating structure at the layout's sites (centred, n × p)."""
    names = list(model.space)
    if not names:
        return {}
    ext = pilot.basis.extend(xy)[names].to_numpy()
    out = {}
    for fit in pilot.scale_fits:
        idx = [names.index(v) for v in fit.scale_class.vectors]
        if idx:
            part = ext[:, idx] @ model.coef["space"][idx]
            out[fit.scale_class.name] = part - part.mean(axis=0)
    return out


def _class_variance(pilot: Analysis, model: PilotModel, ext: np.ndarray) -> dict:
    """Variance of each class's fitted structure at the layout relative to the pilot sites."""
    out = {}
    names = list(model.space)
    pv = pilot.basis.vectors[names].to_numpy()
    for fit in pilot.scale_fits:
        idx = [names.index(v) for v in fit.scale_class.vectors]
        if not idx:
            continue
        b = model.coef["space"][idx]
        at_pilot = (pv[:, idx] - pv[:, idx].mean(0)) @ b
        at_layout = (ext[:, idx] - ext[:, idx].mean(0)) @ b
        out[fit.scale_class.name] = float(np.mean(at_layout ** 2) / np.mean(at_pilot ** 2))
    return out


# ------------------------------------------------------------------------------ simulation

class Simulator:
    """One simulated survey and its analysis; task = (layout position, SeedSequence).

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


def _simulate(lay: _LayoutModel, s: SimulationSettings, seq: np.random.SeedSequence) -> dict:
    """Draw one survey at the layout and analyse it with the pipeline's steps."""
    rng_rows, *streams = [np.random.default_rng(c) for c in seq.spawn(6)]
    n = lay.signal.shape[0]
    Y = lay.signal + s.residuals[rng_rows.integers(0, s.residuals.shape[0], size=n)]
    Y = Y - Y.mean(axis=0)
    alpha, options = s.alpha, StepOptions(n_permutations=s.n_permutations)
    trend = trend_step(Y, lay.coords, mode=s.trend, alpha=alpha, seed=streams[0],
                       options=options)
    environment = environment_step(Y, lay.env, alpha=alpha, seed=streams[1], options=options)
    space = space_step(Y, basis=lay.basis, level=s.space_level,
                       global_permutations=s.global_permutations, alpha=alpha,
                       conditioning=trend.covariables, seed=streams[2], options=options)
    # without candidate environmental variables at this layout (none in the pilot, or all
    # constant here) the environment's fractions are zero by construction
    candidates = lay.env if lay.env is not None else pd.DataFrame(index=lay.coords.index)
    partition = partition_step(Y, candidates, environment.selection,
                               space_group(space.basis, space.selection, trend.covariables),
                               space_p=space.global_p, alpha=alpha, seed=streams[3],
                               options=options)
    env_sel = environment.selection.selected if environment.selection is not None else ()
    space_sel = space.selection.selected if space.selection is not None else ()
    env_p = partition.fraction_tests["environment_only"]
    detected = {"environment": bool(env_sel) and env_p is not None and env_p <= alpha}
    owners = _owners(lay, lay.basis.vectors, space_sel)
    members = {name: [v for v, o in zip(space_sel, owners) if o == name]
               for name in s.class_names}
    p_values = scale_class_p_values(Y, lay.basis.vectors, members,
                                    conditioning=trend.covariables, seed=streams[4],
                                    options=options)
    for name in s.class_names:
        detected[f"scale:{name}"] = p_values[name] is not None and p_values[name] <= alpha
    return {"detected": detected,
            "estimate": [float(partition.fractions[f]) for f in FRACTIONS],
            "truth": [float(v) for v in _truth(lay, Y)], "n_environment": len(env_sel),
            "n_space": len(space_sel)}


def _truth(lay: _LayoutModel, Y: np.ndarray) -> list[float]:
    """The partition with the generating predictors (NaN when a group is constant here)."""
    try:
        if lay.env_true is not None and lay.space_true is not None:
            tr = partition_variation(Y, {"environment": lay.env_true, "space": lay.space_true},
                                     n_permutations=0).fractions["r2_adj"]
            return [tr["environment_only"], tr["environment_and_space"], tr["space_only"],
                    tr["unexplained"]]
        e = explained_fraction(Y, lay.env_true).r2_adj if lay.env_true is not None else 0.0
        w = explained_fraction(Y, lay.space_true).r2_adj if lay.space_true is not None else 0.0
        return [e, 0.0, w, 1.0 - e - w]
    except InputError:  # a generating group constant at this layout: no oracle value
        return [np.nan] * 4


def _owners(lay: _LayoutModel, vec: pd.DataFrame, selected) -> list:
    """The pilot scale class whose generating structure each selected vector carries most of.

    Share of class c carried by unit vector u: ‖F_cᵀu‖² with F_c the class's structure at
    the layout's sites. Attribution by structure, not by the vector's nominal scale, because
    scale estimates differ between bases (a denser layout labels the same wave finer).
    """
    if not selected or not lay.class_parts:
        return [None] * len(selected)
    u = vec[list(selected)].to_numpy()
    u = u / np.linalg.norm(u, axis=0)
    names = list(lay.class_parts)
    shares = np.stack([np.sum((u.T @ lay.class_parts[c]) ** 2, axis=1) for c in names])
    return [names[i] for i in shares.argmax(axis=0)]
