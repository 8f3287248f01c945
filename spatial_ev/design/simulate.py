"""The pilot's fitted model as a data generator, and one simulated survey's lighter analysis.

Used by :func:`spatial_ev.design.evaluate.evaluate_design` (see its module docstring for the model,
the residual scheme, the environment at new sites and the permutation budget). The pilot is
fitted jointly: transformed community ~ kept trend + selected environmental variables +
selected spatial vectors (least squares, centred). At a layout's sites the signal is rebuilt
from the trend at the new coordinates, the environment there (:func:`environment_at`) and the
pilot vectors extended by :meth:`~spatial_ev.space.eigen.SpatialBasis.extend`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from scipy.spatial import cKDTree

from spatial_ev.design.layouts import CandidateLayout
from spatial_ev.errors import DesignError, InputError

__all__ = ["environment_at"]

_IDW_NEIGHBOURS, _IDW_POWER = 8, 2.0


# ------------------------------------------------------------------------------ environment

def environment_at(pilot, new_coords: Any, *, layer: Any = None) -> tuple[pd.DataFrame, str]:
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
    env = pilot.environment
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


def _environment_from_layer(pilot, new_xy, layer, indicators):
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
class _LayoutModel:
    """Arrays one layout's simulations need (picklable, shipped once per worker)."""

    name: str
    signal: np.ndarray          # (n, p): pilot mean + trend + environment + space
    trend: np.ndarray | None    # (n, 2) centred coordinates (when the pilot tests a trend)
    env: pd.DataFrame | None    # (n, e) candidate environmental variables at the sites
    vectors: pd.DataFrame       # (n, k) the layout's own spatial basis
    scale: pd.Series            # (k,) its scales
    env_true: np.ndarray | None  # generating environmental predictors
    space_true: np.ndarray | None  # generating spatial predictors (trend + extended vectors)
    class_parts: dict = None    # class name -> (n, p) its generating structure, centred


@dataclass(frozen=True)
class SimulationSettings:
    alpha: float
    space_level: float
    n_permutations: int
    global_permutations: int    # for the spatial global test at the (small) corrected level
    trend: str
    breaks: tuple
    class_names: tuple
    residuals: np.ndarray       # (n_pilot, p) inflated residual rows


def pilot_model(pilot) -> dict:
    """Joint least-squares fit of the transformed community on trend, environment, space."""
    Y = pilot.response.to_numpy(dtype=float)
    mean = Y.mean(axis=0)
    xy = pilot.survey.coords.to_numpy()
    centre = xy.mean(axis=0)
    blocks, names = [], []
    if pilot.trend_kept:
        blocks.append(xy - centre)
        names.append("trend")
    env_sel = list(pilot.selected_environment)
    if env_sel:
        blocks.append(pilot.environment[env_sel].to_numpy())
        names.append("environment")
    space_sel = list(pilot.selected_space)
    if space_sel:
        blocks.append(pilot.basis.vectors[space_sel].to_numpy())
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
    widths = [b.shape[1] for b in blocks]
    parts = dict(zip(names, np.split(coef, np.cumsum(widths)[:-1])))
    return {"mean": mean, "centre": centre, "coef": parts, "env_sel": env_sel,
            "space_sel": space_sel, "x_mean": dict(zip(names, np.split(X.mean(axis=0),
                                                                        np.cumsum(widths)[:-1]))),
            "residuals": resid * inflate, "inflate": inflate}


def layout_model(pilot, model, lay: CandidateLayout, basis, layer) -> tuple[_LayoutModel, dict]:
    xy = lay.coords.to_numpy()
    signal = np.broadcast_to(model["mean"], (len(xy), len(model["mean"]))).copy()
    info: dict[str, Any] = {}
    trend = xy - model["centre"] if pilot.settings["trend"] == "test" else None
    space_parts = []
    if "trend" in model["coef"]:
        signal += (xy - model["centre"] - model["x_mean"]["trend"]) @ model["coef"]["trend"]
        space_parts.append(xy - model["centre"])
    env, env_true = None, None
    if pilot.environment is not None and pilot.environment.shape[1]:
        full, info["environment_source"] = environment_at(pilot, xy, layer=layer)
        full.index = lay.coords.index
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
    if model["env_sel"]:
        e = full[model["env_sel"]].to_numpy()
        signal += (e - model["x_mean"]["environment"]) @ model["coef"]["environment"]
        env_true = e
    if model["space_sel"]:
        ext = pilot.basis.extend(xy)[model["space_sel"]].to_numpy()
        if not np.isfinite(ext).all():
            raise DesignError(f"layout {lay.name!r}: the pilot's spatial vectors cannot be "
                              "extended to its sites (unstable vectors); use distance-based "
                              "weighting in the pilot")
        contrib = (ext - model["x_mean"]["space"]) * 1.0
        signal += contrib @ model["coef"]["space"]
        space_parts.append(ext)
        info["class_variance_ratio"] = _class_variance(pilot, model, ext)
    space_true = np.hstack(space_parts) if space_parts else None
    return _LayoutModel(lay.name, signal, trend, env, basis.vectors, basis.scale, env_true,
                        space_true, _class_parts(pilot, model, xy)), info


def _class_parts(pilot, model, xy) -> dict:
    """Each scale class's generating structure at the layout's sites (centred, n × p)."""
    names = model["space_sel"]
    if not names:
        return {}
    ext = pilot.basis.extend(xy)[names].to_numpy()
    out = {}
    for fit in pilot.scale_fits:
        idx = [names.index(v) for v in fit.scale_class.vectors]
        if idx:
            part = ext[:, idx] @ model["coef"]["space"][idx]
            out[fit.scale_class.name] = part - part.mean(axis=0)
    return out


def _class_variance(pilot, model, ext) -> dict:
    """Variance of each class's fitted structure at the layout relative to the pilot sites."""
    out = {}
    names = model["space_sel"]
    pv = pilot.basis.vectors[names].to_numpy()
    for fit in pilot.scale_fits:
        idx = [names.index(v) for v in fit.scale_class.vectors]
        if not idx:
            continue
        b = model["coef"]["space"][idx]
        at_pilot = (pv[:, idx] - pv[:, idx].mean(0)) @ b
        at_layout = (ext[:, idx] - ext[:, idx].mean(0)) @ b
        out[fit.scale_class.name] = float(np.mean(at_layout ** 2) / np.mean(at_pilot ** 2))
    return out


# ------------------------------------------------------------------------------ simulation

class Simulator:
    """One simulated survey and its lighter analysis; task = (layout position, SeedSequence)."""

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
    from spatial_ev.stats.linear import explained_fraction
    from spatial_ev.selection.partition import partition_variation
    from spatial_ev.inference.permutation import permutation_test
    from spatial_ev.selection.forward import forward_selection

    rng_rows, *streams = [np.random.default_rng(c) for c in seq.spawn(6)]
    n = lay.signal.shape[0]
    Y = lay.signal + s.residuals[rng_rows.integers(0, s.residuals.shape[0], size=n)]
    Y = Y - Y.mean(axis=0)
    P, alpha = s.n_permutations, s.alpha
    cond = None
    if lay.trend is not None:
        t = permutation_test(Y, lay.trend, n_permutations=P, seed=streams[0])
        cond = lay.trend if t.p_value <= alpha else None
    env_sel, env_p, env_r2 = (), None, 0.0
    if lay.env is not None:
        fs = forward_selection(Y, lay.env, alpha=alpha, n_permutations=P, seed=streams[1])
        env_sel, env_p, env_r2 = fs.selected, fs.global_test.p_value, fs.r2_adj
    space_sel = ()
    vec = lay.vectors
    n_model = vec.shape[1] + (0 if cond is None else 2)
    if n - n_model - 1 > 0:
        g = permutation_test(Y, vec, conditioning=cond, n_permutations=s.global_permutations,
                             seed=streams[2])
        if g.p_value <= s.space_level:
            fs = forward_selection(Y, vec, conditioning=cond, alpha=alpha, n_permutations=P,
                                   seed=streams[2], global_test="skip")
            space_sel = fs.selected
    space = [b for b in (cond, vec[list(space_sel)].to_numpy() if space_sel else None)
             if b is not None]
    S = np.hstack(space) if space else None
    E = lay.env[list(env_sel)].to_numpy() if env_sel else None
    if E is not None and S is not None:
        part = partition_variation(Y, {"environment": E, "space": S}, n_permutations=P,
                                   seed=streams[3])
        fr = part.fractions["r2_adj"]
        est = [fr["environment_only"], fr["environment_and_space"], fr["space_only"],
               fr["unexplained"]]
        env_p = float(part.fractions.loc["environment_only", "p_value"])
    else:
        space_r2 = explained_fraction(Y, S).r2_adj if S is not None else 0.0
        est = [env_r2, 0.0, space_r2, 1.0 - env_r2 - space_r2]
    detected = {"environment": bool(env_sel) and env_p is not None and env_p <= alpha}
    owners = _owners(lay, vec, space_sel)
    for name, stream in zip(s.class_names, streams[4].spawn(len(s.class_names))):
        mine = [v for v, o in zip(space_sel, owners) if o == name]
        hit = False
        if mine:
            others = [v for v in space_sel if v not in mine]
            parts = [b for b in (cond, vec[others].to_numpy() if others else None)
                     if b is not None]
            t = permutation_test(Y, vec[mine].to_numpy(),
                                 conditioning=np.hstack(parts) if parts else None,
                                 n_permutations=P, seed=stream)
            hit = t.p_value <= alpha
        detected[f"scale:{name}"] = bool(hit)
    truth = [np.nan] * 4
    try:
        if lay.env_true is not None and lay.space_true is not None:
            tr = partition_variation(Y, {"environment": lay.env_true, "space": lay.space_true},
                                     n_permutations=0).fractions["r2_adj"]
            truth = [tr["environment_only"], tr["environment_and_space"], tr["space_only"],
                     tr["unexplained"]]
        else:
            e = explained_fraction(Y, lay.env_true).r2_adj if lay.env_true is not None else 0.0
            w = explained_fraction(Y, lay.space_true).r2_adj \
                if lay.space_true is not None else 0.0
            truth = [e, 0.0, w, 1.0 - e - w]
    except InputError:  # a generating group constant at this layout: no oracle value
        pass
    return {"detected": detected, "estimate": [float(v) for v in est],
            "truth": [float(v) for v in truth], "n_environment": len(env_sel),
            "n_space": len(space_sel)}


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
