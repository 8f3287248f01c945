"""A complete, illustrative report context built from synthetic data (a test helper).

Everything here is invented: 120 sites scattered over a 12 km × 8 km area in UTM zone 33N,
24 species responding to two environmental gradients and to three spatial patterns (broad:
one half-wave across the area; medium: about 3 km patches; fine: about 1 km patches). The
numbers shown in the report (fractions, p-values, selected vectors) are made up to be
plausible and mutually consistent; they are not the output of the statistics modules, which
this module does not import. The report built from it carries an "illustrative" banner.
"""

from __future__ import annotations

from typing import Any

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely

__all__ = ["example_context"]


def _grid_inside_hull(x: np.ndarray, y: np.ndarray, nx: int = 90, ny: int = 60
                      ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    hull = shapely.convex_hull(shapely.multipoints(np.column_stack([x, y])))
    gx = np.linspace(x.min(), x.max(), nx)
    gy = np.linspace(y.min(), y.max(), ny)
    mx, my = np.meshgrid(gx, gy)
    inside = shapely.contains_xy(hull, mx, my) | shapely.intersects_xy(hull, mx, my)
    return gx, gy, inside


def example_context(*, seed: int = 20261202) -> dict[str, Any]:
    """Return a complete report context made from synthetic data (illustrative only).

    The context follows the contract in :mod:`spatial_ev.report.html`; the report tests use it
    to check the layout. ``seed`` fixes the synthetic data.

    Examples
    --------
    >>> ctx = example_context()
    >>> ctx["illustrative"], ctx["data"]["n_sites"]
    (True, 120)
    """
    rng = np.random.default_rng(seed)
    n, n_species = 120, 24
    width, height = 12_000.0, 8_000.0
    x = 500_000.0 + rng.uniform(0, width, n)
    y = 4_100_000.0 + rng.uniform(0, height, n)
    ids = pd.Index([f"S{i:03d}" for i in range(1, n + 1)], name="site")
    u, v = (x - 500_000.0) / width, (y - 4_100_000.0) / height

    def broad(uu, vv):
        return np.sin(np.pi * uu) * np.cos(np.pi * vv)

    def medium(uu, vv):
        return np.sin(4 * np.pi * uu + 1.0) * np.sin(3 * np.pi * vv)

    def fine(uu, vv):
        return np.sin(11 * np.pi * uu) * np.cos(8 * np.pi * vv + 0.5)

    moisture = 0.8 * broad(u, v) + rng.normal(0, 0.5, n)
    ph = 6.2 + 0.6 * (u - 0.5) + rng.normal(0, 0.3, n)
    canopy = rng.uniform(0, 1, n)
    environment = pd.DataFrame({"soil_moisture": moisture, "soil_pH": ph,
                                "canopy_cover": canopy,
                                "litter_depth": rng.gamma(2.0, 1.5, n)}, index=ids)

    drivers = np.column_stack([(moisture - moisture.mean()) / moisture.std(),
                               (ph - ph.mean()) / ph.std(), broad(u, v), medium(u, v),
                               fine(u, v)])
    weights = rng.normal(0, 0.7, (drivers.shape[1], n_species))
    counts = rng.poisson(np.exp(0.8 + drivers @ weights)) + (rng.uniform(size=(n, n_species))
                                                             < 0.02)
    counts[:, 0] += 1  # every site holds at least one individual
    species_names = [f"Species {chr(65 + j)}" for j in range(n_species)]
    hellinger = np.sqrt(counts / counts.sum(axis=1, keepdims=True))
    centred = hellinger - hellinger.mean(axis=0)
    total_variance = float((centred ** 2).sum() / (n - 1))

    # an RDA-like ordination of the synthetic table on three variables (illustrative scores)
    chosen_env = ["soil_moisture", "soil_pH", "canopy_cover"]
    xs = environment[chosen_env].to_numpy()
    xs = (xs - xs.mean(axis=0)) / xs.std(axis=0)
    coef, *_ = np.linalg.lstsq(xs, centred, rcond=None)
    fitted = xs @ coef
    left, sing, right_t = np.linalg.svd(fitted, full_matrices=False)
    axes = ["canonical_1", "canonical_2", "canonical_3"]  # the library's own axis names
    eigenvalues = pd.Series(sing[:3] ** 2 / (n - 1), index=axes)
    site_fit = fitted @ right_t[:3].T
    biplot = np.array([[np.corrcoef(xs[:, j], site_fit[:, k])[0, 1] for k in range(3)]
                       for j in range(len(chosen_env))])
    lam_sqrt = np.sqrt(eigenvalues.to_numpy())
    scaling_1 = {"sites": pd.DataFrame(site_fit, index=ids, columns=axes),
                 "species": pd.DataFrame(right_t[:3].T, index=species_names, columns=axes),
                 "variables": pd.DataFrame(biplot, index=chosen_env, columns=axes)}
    scaling_2 = {"sites": pd.DataFrame(site_fit / lam_sqrt, index=ids, columns=axes),
                 "species": pd.DataFrame(right_t[:3].T * lam_sqrt, index=species_names,
                                         columns=axes),
                 "variables": pd.DataFrame(biplot * lam_sqrt, index=chosen_env, columns=axes)}

    # a made-up spatial basis: 40 vectors, scale shrinking and Moran's I falling with rank
    k = np.arange(1, 41)
    names = pd.Index([f"sv{i:03d}" for i in k])
    scale = pd.Series(15_000.0 / k ** 0.85, index=names)
    moran_i = pd.Series(np.round(1.02 * np.exp(-k / 18.0) - 0.04, 4), index=names)
    r2 = pd.Series(rng.gamma(1.2, 0.004, len(k)), index=names)
    picks = {"sv001": 0.061, "sv002": 0.038, "sv004": 0.024, "sv009": 0.019, "sv015": 0.012,
             "sv023": 0.009}
    for name, value in picks.items():
        r2[name] = value
    classes = pd.DataFrame({"name": ["broad", "medium", "fine"],
                            "low": [4_000.0, 1_500.0, 500.0],
                            "high": [16_000.0, 4_000.0, 1_500.0]})

    def class_of(s: float) -> str:
        row = classes[(classes["low"] <= s) & (s < classes["high"])]
        return str(row["name"].iloc[0]) if len(row) else "outside"

    selected_space = pd.DataFrame({
        "vector": list(picks), "moran_i": moran_i[list(picks)].to_numpy(),
        "scale": scale[list(picks)].to_numpy(),
        "p": [0.001, 0.001, 0.002, 0.004, 0.011, 0.032],
        "scale_class": [class_of(scale[p]) for p in picks]})

    gx, gy, inside = _grid_inside_hull(x, y)
    mgu, mgv = np.meshgrid((gx - 500_000.0) / width, (gy - 4_100_000.0) / height)
    points = gpd.points_from_xy(x, y)
    crs = "EPSG:32633"
    scale_maps = []
    for cls, pattern, vectors, r2_adj, p in (
            ("broad", broad, ["sv001", "sv002"], 0.083, 0.001),
            ("medium", medium, ["sv004", "sv009"], 0.036, 0.001),
            ("fine", fine, ["sv015", "sv023"], 0.014, 0.021)):
        values = pattern(u, v) * 0.3 + rng.normal(0, 0.03, n)
        surface = np.where(inside, pattern(mgu, mgv) * 0.3, np.nan)
        row = classes.set_index("name").loc[cls]
        scale_maps.append({
            "name": cls, "scale_range": (float(row["low"]), float(row["high"])),
            "vectors": vectors, "r2_adj": r2_adj, "p": p,
            "sites": gpd.GeoDataFrame({"fitted": values}, geometry=points, index=ids, crs=crs),
            "column": "fitted", "surface": {"x": gx, "y": gy, "values": surface}})

    squares = centred ** 2
    lcbd = squares.sum(axis=1) / squares.sum()
    # made-up per-site p-values: small only for the most unusual sites (illustrative)
    lcbd_p = np.where(lcbd > np.quantile(lcbd, 0.93), 0.02, 0.4)
    dists = np.hypot(x[:, None] - x[None, :], y[:, None] - y[None, :])
    np.fill_diagonal(dists, np.inf)
    nearest = dists.min(axis=1)
    schemes = ["gabriel · binary", "gabriel · linear", "delaunay · binary",
               "delaunay · concave down", "relative neighbourhood · binary",
               "distance band · truncated"]
    corrected = 1 - (1 - 0.05) ** (1 / len(schemes))  # Šidák level for 6 schemes [derived]

    return {
        "title": "Spatial structure of a synthetic ground-beetle survey",
        "subtitle": "Illustrative example: 120 invented sites over 12 km × 8 km",
        "illustrative": True,
        "version": "0.1.0",
        "generated": "2026-01-01T00:00:00Z",
        "missing_reasons": {},
        "data": {
            "n_sites": n, "n_species": n_species, "n_variables": environment.shape[1],
            "crs": "WGS 84 / UTM zone 33N (EPSG:32633)", "source_crs": "WGS 84 (EPSG:4326)",
            "projection_note": "Longitude/latitude were projected to UTM zone 33N; "
                               "distances are in metres.",
            "distance_unit": "metre", "geometry_type": "point",
            "extent": {"xmin": float(x.min()), "ymin": float(y.min()),
                       "xmax": float(x.max()), "ymax": float(y.max())},
            "spacing": {"nearest_min": float(nearest.min()),
                        "nearest_median": float(np.median(nearest)),
                        "nearest_max": float(nearest.max())},
            "species_names": species_names, "variable_names": list(environment.columns),
            "dropped": {"species": [], "sites": []},
        },
        "methods": {
            "transformation": "hellinger", "trend": "none",
            "basis": {"family": "graph", "method": "gabriel", "weighting": "linear",
                      "threshold": None, "n_vectors": 40, "sign": "positive"},
            "schemes_compared": schemes, "corrected_alpha": corrected,
            "chosen_scheme": "gabriel · linear", "alpha": 0.05,
            "selection": "forward_double_stop", "n_permutations": 999,
            "permutation_method": "reduced_residual", "seed": seed,
        },
        "partition": {"fractions": pd.DataFrame({
            "name": ["[a] environment only", "[b] shared", "[c] space only",
                     "[d] unexplained"],
            "members": [("environment",), ("environment", "space"), ("space",), ()],
            "r2_adj": [0.142, 0.087, 0.121, 0.650],
            "testable": [True, False, True, False],
            "p": [0.001, None, 0.001, None]}), "alpha": 0.05},
        "selected_environment": pd.DataFrame({"variable": chosen_env,
                                              "r2_adj_cum": [0.138, 0.191, 0.229],
                                              "p": [0.001, 0.001, 0.013]}),
        "selected_space": selected_space,
        "scalogram": {"r2": r2, "scale": scale, "selected": list(picks), "classes": classes},
        "basis_moran": {"moran_i": moran_i, "scale": scale, "selected": list(picks),
                        "expected": -1.0 / (n - 1)},
        "weighting": {"table": pd.DataFrame({
            "scheme": schemes, "r2_adj": [0.183, 0.208, 0.176, 0.195, 0.151, 0.162],
            "p": [0.001, 0.001, 0.002, 0.001, 0.006, 0.018]}),
            "alpha": 0.05, "corrected_alpha": corrected, "chosen": "gabriel · linear"},
        "scale_maps": scale_maps,
        "lcbd": {"sites": gpd.GeoDataFrame({"lcbd": lcbd, "p": lcbd_p}, geometry=points,
                                           index=ids, crs=crs),
                 "column": "lcbd", "p_column": "p", "alpha": 0.05},
        "triplot": {"eigenvalues": eigenvalues, "total_variance": total_variance,
                    "n_labels": 8, "scaling_1": scaling_1, "scaling_2": scaling_2},
        "limits": {"finest_scale": float(3 * np.median(nearest)),
                   "broadest_scale": float(2 * width), "n_positive_vectors": 52,
                   "notes": ["Sites are irregularly spaced: scales near the finest limit are "
                             "resolved only where sites are dense."]},
    }
