"""Turn an :class:`~spatial_ev.pipeline.analysis.Analysis` into the report context and map layers.

Only reading and re-shaping here: every number comes from the analysis result. The context
follows the contract documented in :mod:`spatial_ev.report.html`.
"""

from __future__ import annotations

import datetime as _dt
from typing import Any

import geopandas as gpd
import numpy as np
import pandas as pd

from spatial_ev import __version__
from spatial_ev.pipeline.analysis import Analysis

__all__ = ["analysis_context", "map_layers"]

def _trend_handling(a) -> str:
    """How the planar trend was handled, as a key of the methods text: kept as a covariable,
    tested and not kept (``"none"``), not modelled on a river network, or not modelled."""
    if a.trend_kept:
        return "covariable"
    if a.trend is not None:
        return "none"
    return "network" if a.network is not None else "not_modelled"


def _scheme_parts(name: str) -> dict[str, Any]:
    if name == "river_distance":
        return {"family": "network", "method": "network_distance_based",
                "weighting": "truncated", "orientation": None}
    if name.startswith(("river_aem", "bearing_")):
        prefix, _, weighting = name.partition("/")
        against = prefix.endswith("_against")
        return {"family": "network",
                "method": "aem_river" if prefix.startswith("river_") else "aem_bearing",
                "weighting": weighting,
                "orientation": "against_flow" if against else "with_flow"}
    if name == "distance":
        return {"family": "distance", "method": "distance_based", "weighting": "truncated"}
    if name == "none":
        return {"family": "distance", "method": "none selected", "weighting": "-"}
    graph, _, weighting = name.partition("/")
    return {"family": "graph", "method": graph, "weighting": weighting}


def _surface(grid_scores: pd.DataFrame | None, column: str) -> dict | None:
    """Rebuild the regular grid (1-D x, y; 2-D values with NaN outside the hull)."""
    if grid_scores is None or grid_scores.empty:
        return None
    gx = np.unique(grid_scores["x"].to_numpy())
    gy = np.unique(grid_scores["y"].to_numpy())
    values = np.full((gy.size, gx.size), np.nan)
    ix = np.searchsorted(gx, grid_scores["x"].to_numpy())
    iy = np.searchsorted(gy, grid_scores["y"].to_numpy())
    values[iy, ix] = grid_scores[column].to_numpy()
    return {"x": gx, "y": gy, "values": values}


def _environment_test(analysis: Analysis) -> dict | None:
    """The Moran spectral randomisation test of the environment, when the analysis ran it."""
    test = getattr(analysis, "environment_spectral", None)
    if test is None:
        return None
    only = getattr(analysis, "environment_only_spectral", None)
    return {"method": "moran_spectral_randomisation", "weighting": "distance_decay",
            "n_randomisations": test.n_randomisations, "r2_adj": test.r2_adj,
            "p": test.p_value, "environment_only_p": None if only is None else only.p_value}


def _network_edges(analysis: Analysis) -> gpd.GeoDataFrame | None:
    """The river network's edges (lines with the flow) when the analysis had one."""
    net = getattr(analysis, "network", None)
    if net is None:
        return None
    e = net.edges
    return gpd.GeoDataFrame(
        {"upstream_node": e["upstream_node"].to_numpy(),
         "downstream_node": e["downstream_node"].to_numpy(),
         "length": e["length"].to_numpy(dtype=float),
         "feature": e["feature"].to_numpy()},
        geometry=e.geometry.to_numpy(), crs=analysis.survey.sites.crs,
        index=pd.RangeIndex(len(e), name="edge"))


def _along(grid_scores: pd.DataFrame | None, crs: Any) -> gpd.GeoDataFrame | None:
    """Scores predicted at points along a river network (those carry an ``edge`` column)."""
    if grid_scores is None or grid_scores.empty or "edge" not in grid_scores.columns:
        return None
    return gpd.GeoDataFrame(grid_scores.drop(columns=["x", "y"]),
                            geometry=gpd.points_from_xy(grid_scores["x"], grid_scores["y"]),
                            crs=crs)


def _factor_levels(survey: Any, index: pd.Index) -> dict[str, pd.Series]:
    """Each categorical variable's level at every site, rebuilt from its indicator columns."""
    env = survey.environment
    out: dict[str, pd.Series] = {}
    if env is None:
        return out
    for var, cols in getattr(survey, "categorical", {}).items():
        reference = survey.reference_levels.get(var)
        if reference is None or not cols:
            continue
        labels = pd.Series(str(reference), index=env.index, dtype=object)
        for col in cols:
            labels[env[col].to_numpy() == 1] = col[len(var) + 1:-1]
        out[str(var)] = labels.reindex(index)
    return {k: v for k, v in out.items() if not v.isna().any()}


def _site_frame(analysis: Analysis, values: pd.DataFrame) -> gpd.GeoDataFrame:
    sites = analysis.survey.sites
    return gpd.GeoDataFrame(values.copy(), geometry=sites.geometry.reindex(values.index),
                            crs=sites.crs)


def analysis_context(analysis: Analysis, *, title: str | None = None,
                     subtitle: str | None = None) -> dict[str, Any]:
    """Build the report context (see :mod:`spatial_ev.report.html`) from an analysis.

    Parameters
    ----------
    analysis : Analysis
    title, subtitle : str, optional
        Page title and subtitle.

    Returns
    -------
    dict

    Examples
    --------
    >>> ctx = analysis_context(result)  # doctest: +SKIP
    >>> ctx["data"]["n_sites"]  # doctest: +SKIP
    220
    """
    a = analysis
    survey = a.survey
    info = survey.summary()
    unit = survey.distance_unit
    basis = a.basis
    settings = a.settings
    reasons: dict[str, str] = {}

    data = {
        "n_sites": survey.n_sites, "n_species": survey.n_species,
        "n_variables": 0 if survey.environment is None else survey.environment.shape[1],
        "crs": info["crs"], "source_crs": info["source_crs"],
        "projection_note": info["projection_note"], "distance_unit": unit,
        "geometry_type": survey.geometry_type,
        "extent": {k: info["extent"][k] for k in ("xmin", "ymin", "xmax", "ymax")},
        "spacing": {"nearest_min": info["spacing"]["min"],
                    "nearest_median": info["spacing"]["median"],
                    "nearest_max": info["spacing"]["max"]},
        "species_names": [str(c) for c in survey.species.columns],
        "variable_names": info["environment_columns"],
        "dropped": {k: [str(v) for v in vals] for k, vals in info["dropped"].items()},
    }
    chosen = settings.chosen_scheme
    env_sel = a.environment_selection
    methods = {
        "transformation": settings.transformation,
        "trend": _trend_handling(a),
        "basis": {**_scheme_parts(chosen),
                  **({"method": basis.method} if basis.method.startswith(("aem_", "network_"))
                     else {}),
                  "threshold": basis.threshold,
                  "n_vectors": basis.n_vectors, "sign": "positive"},
        "schemes_compared": list(a.weighting.table.index),
        "corrected_alpha": a.weighting.alpha_corrected if a.weighting.n_schemes > 1 else None,
        "chosen_scheme": chosen, "alpha": settings.alpha,
        "selection": "forward_double_stop",
        "n_permutations": settings.n_permutations,
        "step_tests": settings.step_tests,
        "permutation_method": "reduced_residual", "seed": settings.seed,
        "environment_test": _environment_test(a),
    }

    partition = None
    if a.fractions is not None:
        f, t = a.fractions, a.fraction_tests or {}
        partition = {"fractions": pd.DataFrame({
            "name": ["[a] environment only", "[b] shared", "[c] space only", "[d] unexplained"],
            "members": [("environment",), ("environment", "space"), ("space",), ()],
            "r2_adj": [f["environment_only"], f["shared"], f["space_only"], f["unexplained"]],
            "testable": [True, False, True, False],
            "p": [t.get("environment_only"), None, t.get("space_only"), None]}),
            "alpha": settings.alpha}
    else:
        reasons["partition"] = ("no environmental table was given, so the analysis is spatial "
                                "only and there is nothing to partition")

    selected_env = a.environment_table() if env_sel is not None else None
    if env_sel is None:
        reasons.setdefault("selected", "no environmental table was given")
    space_table = a.space_table()

    classes = pd.DataFrame({
        "name": [fit.scale_class.name for fit in a.scale_fits],
        "low": [fit.scale_class.bounds[0] for fit in a.scale_fits],
        "high": [min(fit.scale_class.bounds[1], float(basis.scale.max()) * 1.05)
                 for fit in a.scale_fits]})
    classes["low"] = classes["low"].clip(lower=float(basis.scale.min()) * 0.95)
    scal = {"r2": a.scalogram["r2"], "scale": a.scalogram["scale"],
            "selected": list(a.selected_space), "classes": classes}
    basis_moran = {"moran_i": basis.moran_i, "scale": basis.scale,
                   "selected": list(a.selected_space), "expected": -1.0 / (survey.n_sites - 1)}

    wt = a.weighting.table
    weighting = None
    if len(wt) > 1:
        weighting = {"table": pd.DataFrame({"scheme": list(wt.index),
                                            "r2_adj": wt["r2_adj"].to_numpy(dtype=float),
                                            "p": wt["global_p"].to_numpy(dtype=float)}),
                     "alpha": settings.alpha, "corrected_alpha": a.weighting.alpha_corrected,
                     "chosen": a.weighting.best}
    else:
        reasons["weighting"] = f"one scheme was named ({chosen}); nothing was compared"

    edges = _network_edges(a)
    if edges is not None:
        data["network"] = {"n_edges": int(len(edges)),
                           "total_length": float(edges["length"].sum()),
                           "direction": a.network.direction, "source": a.network.source}
    scale_maps = []
    for fit in a.scale_fits:
        if fit.site_scores is None:
            continue
        sc = fit.scale_class
        entry = {"name": sc.name, "scale_range": sc.scale_range, "vectors": list(sc.vectors),
                 "r2_adj": fit.r2_adj, "p": fit.p_value,
                 "sites": _site_frame(a, fit.site_scores[["axis_1"]].rename(
                     columns={"axis_1": "fitted"})),
                 "column": "fitted"}
        along = _along(fit.grid_scores, survey.sites.crs)
        if along is not None:
            entry["along"] = along
            entry["along_column"] = "axis_1"
        else:
            surface = _surface(fit.grid_scores, "axis_1")
            if surface is not None:
                entry["surface"] = surface
        if edges is not None:
            entry["network"] = edges
        scale_maps.append(entry)
    if not scale_maps:
        reasons["scale_maps"] = ("no spatial vector was selected, so there is no spatial "
                                 "structure to map")

    lcbd_frame = a.beta.to_frame()
    lcbd = {"sites": _site_frame(a, lcbd_frame), "column": "lcbd",
            "p_column": "p" if "p" in lcbd_frame else None,
            "p_corrected_column": "p_holm" if "p_holm" in lcbd_frame else None,
            "alpha": settings.alpha}
    if edges is not None:
        lcbd["network"] = edges

    rda = a.ordination
    triplot = {"eigenvalues": None, "total_variance": rda.total_variance, "n_labels": 10}
    has_axes = len(rda.canonical_eigenvalues) >= 2 or \
        (len(rda.canonical_eigenvalues) == 0 and len(rda.residual_eigenvalues) >= 2)
    if has_axes:
        eig = rda.canonical_eigenvalues if len(rda.canonical_eigenvalues) \
            else rda.residual_eigenvalues
        triplot["eigenvalues"] = eig
        for scaling in (1, 2):
            triplot[f"scaling_{scaling}"] = {
                "sites": rda.site_scores(scaling),
                "species": rda.species_scores(scaling),
                "variables": rda.biplot_scores(scaling) if len(rda.canonical_eigenvalues)
                else None}
        factors = _factor_levels(survey, rda.site_scores(1).index)
        if factors:
            triplot["factors"] = factors
    else:
        triplot = None
        reasons["triplot"] = ("the ordination has fewer than two axes (a single selected "
                              "environmental variable); a triplot needs two")

    notes = list(a.notes)
    if methods["environment_test"] is not None:
        # the analysis's own note says what was tested and its result; this one only adds
        # how the randomisation works, so the explanation is not given twice
        notes.append("How the spectral randomisation works: the environment's coefficients "
                     "on all spatial eigenvectors of a distance-decay weighting exp(−d/t) (t the "
                     "truncation distance of the distance-based eigenvectors) get random signs, "
                     "the same for every variable, which keeps each variable's Moran's I and "
                     "the correlations among variables; only this spatial spectrum is kept, "
                     "not higher-order structure such as patch shapes.")
    limits = {"finest_scale": float(basis.scale.min()),
              "broadest_scale": float(basis.scale.max()),
              "n_positive_vectors": int(basis.n_vectors), "notes": notes}

    return {
        "title": title or "Spatial structure of the survey community",
        "subtitle": subtitle or f"{survey.n_sites} sites, {survey.n_species} species",
        "illustrative": False, "version": __version__,
        "generated": _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "missing_reasons": reasons, "data": data, "methods": methods, "partition": partition,
        "selected_environment": selected_env, "selected_space": space_table,
        "scalogram": scal, "basis_moran": basis_moran, "weighting": weighting,
        "scale_maps": scale_maps or None, "lcbd": lcbd, "triplot": triplot, "limits": limits,
    }


def map_layers(analysis: Analysis) -> dict[str, gpd.GeoDataFrame]:
    """GeoPackage layers: one per scale class (site scores, original geometry), the LCBD layer,
    and one grid layer per scale class with the structure predicted at unsampled points.

    With a river network: the network's edges (layer ``river_network``, lines with the flow)
    and, for a network basis, one layer per scale class of the structure predicted at points
    along the channels (``scale_<class>_along_network``, with each point's ``edge`` and
    ``offset`` from the edge's upstream end) instead of a grid.

    Examples
    --------
    >>> sorted(map_layers(result))[:2]  # doctest: +SKIP
    ['lcbd', 'scale_broad']
    """
    a = analysis
    crs = a.survey.sites.crs
    layers: dict[str, gpd.GeoDataFrame] = {}
    for fit in a.scale_fits:
        if fit.site_scores is None:
            continue
        key = fit.scale_class.name.replace(" ", "_")
        layers[f"scale_{key}"] = _site_frame(a, fit.site_scores)
        along = _along(fit.grid_scores, crs)
        if along is not None:
            layers[f"scale_{key}_along_network"] = along
        elif fit.grid_scores is not None and not fit.grid_scores.empty:
            g = fit.grid_scores
            layers[f"scale_{key}_grid"] = gpd.GeoDataFrame(
                g.drop(columns=["x", "y"]), geometry=gpd.points_from_xy(g["x"], g["y"]),
                crs=crs)
    layers["lcbd"] = _site_frame(a, a.beta.to_frame())
    edges = _network_edges(a)
    if edges is not None:
        layers["river_network"] = edges
    return layers
