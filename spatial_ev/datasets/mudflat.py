"""The demo survey: an invented estuarine mudflat with a known generating model.

Scenario (fictional): benthic sediment cores on a regular grid across a mudflat (15 × 12
cores, 40 m apart, placed within ±3 m) plus a transect of 40 cores along the curving upper
shore (15 m apart); 220 sites in WGS 84 / UTM zone 30N (EPSG:32630, metres). Forty invented
taxa (``BTX01`` … ``BTX40``) are counted in each core; six environmental variables in mixed
units are measured, one of them categorical.

Generating model (all parameters in :data:`PARAMETERS`; everything from one seed, numpy only):

* spatial fields on the sites, each centred and scaled to unit variance:
  ``shore`` (cross-shore gradient, drives tidal elevation and mud), ``estuary`` (along-axis
  gradient, drives salinity), ``broad`` (a smooth pattern of ~300 m patches) and ``fine``
  (a sum of random waves with 90–160 m wavelengths); ``broad`` and ``fine`` are made exactly
  orthogonal to the two gradients (and to each other) over the sites, so they are spatial
  structure independent of the environment;
* environment: ``elevation_m`` and ``salinity_psu`` are mostly spatially structured,
  ``mud_percent`` mixes both gradients and local noise, ``organic_matter_mg_g`` is local
  (spatially unstructured), ``sediment_class`` is ``mud_percent`` cut at 30 % and 60 %, and
  ``chlorophyll_ug_g`` is a decoy the taxa do not respond to;
* taxa: log expected count = intercept + responses to standardised elevation, salinity and
  organic matter + sediment-class effects + responses to ``broad`` and ``fine`` + a
  site-by-taxon normal deviation (overdispersion); counts are Poisson draws.

"Expected fractions" are defined operationally: the adjusted-R² variation partition of
Hellinger-transformed counts between two groups — the true environmental predictors
(elevation, salinity, organic matter, sediment-class indicators) and the true spatial fields
(shore, estuary, broad, fine) — averaged over replicate draws of the overdispersion and
Poisson noise with everything else fixed. That is what an analysis with oracle predictors
would find; an analysis with spatial eigenvectors and forward selection estimates it with
extra error. Computed with plain numpy least squares (Peres-Neto et al. 2006, Ecology
87:2614–2625 for the adjusted-R² partition; Legendre & Gallagher 2001, Oecologia 129:271–280
for the Hellinger transformation).
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

__all__ = ["DemoSurvey", "generate_demo_survey", "write_demo_survey", "PARAMETERS"]

SEED = 20240917
EPSG = 32630
ORIGIN = (452_300.0, 5_612_800.0)  # south-west corner of the grid, UTM 30N metres

PARAMETERS: dict[str, Any] = {
    "seed": SEED,
    "grid": {"columns": 15, "rows": 12, "spacing_m": 40.0, "jitter_m": 3.0},
    "shore_transect": {"cores": 40, "spacing_m": 15.0, "offset_m": 40.0,
                       "amplitude_m": 25.0, "wavelength_m": 600.0},
    "n_species": 40,
    # value = intercept + shore*field + estuary*field + noise_sd*N(0, 1), clipped, rounded
    "environment": {
        "elevation_m": {"intercept": 1.6, "shore": 0.55, "estuary": 0.0, "noise_sd": 0.25,
                        "clip": [None, None], "decimals": 2},
        "salinity_psu": {"intercept": 22.0, "shore": 0.0, "estuary": 4.0, "noise_sd": 1.6,
                         "clip": [None, None], "decimals": 1},
        "mud_percent": {"intercept": 50.0, "shore": -14.0, "estuary": -6.0, "noise_sd": 12.0,
                        "clip": [3.0, 97.0], "decimals": 1},
        "organic_matter_mg_g": {"intercept": 14.0, "shore": 0.0, "estuary": 0.0,
                                "noise_sd": 3.5, "clip": [1.0, None], "decimals": 2},
        "chlorophyll_ug_g": {"intercept": 6.0, "shore": 0.0, "estuary": 0.0, "noise_sd": 1.8,
                             "clip": [0.1, None], "decimals": 2},
    },
    "sediment_class": {"from": "mud_percent", "breaks": [30.0, 60.0],
                       "labels": ["sand", "muddy sand", "mud"]},
    "response_sd": {"elevation": 0.55, "salinity": 0.45, "organic_matter": 0.55,
                    "sediment_class": 0.45, "broad": 0.60, "fine": 0.55},
    "log_mean_count": {"mean": 1.9, "sd": 0.6},
    "overdispersion_sd": 0.35,
    "n_replicates": 200,
}


@dataclass(frozen=True)
class DemoSurvey:
    """The generated demo survey.

    Attributes
    ----------
    sites : geopandas.GeoDataFrame
        (220, 1) column ``zone``; point geometry in EPSG:32630; index ``site_id``.
    species : pandas.DataFrame
        (220, 40) int64 counts, columns ``BTX01`` … ``BTX40``.
    environment : pandas.DataFrame
        (220, 6) five numeric columns and the text column ``sediment_class``.
    truth : dict
        Generating parameters, the true predictors and the expected fractions.
    """

    sites: Any
    species: pd.DataFrame
    environment: pd.DataFrame
    truth: dict


def generate_demo_survey() -> DemoSurvey:
    """Generate the demo survey (deterministic: same output on every call).

    Returns
    -------
    DemoSurvey

    Examples
    --------
    >>> demo = generate_demo_survey()  # doctest: +SKIP
    >>> demo.species.shape  # doctest: +SKIP
    (220, 40)
    """
    import geopandas as gpd
    import shapely

    p = PARAMETERS
    rng = np.random.default_rng(p["seed"])
    u, v, zone, ids = _layout(rng)
    n = len(u)
    fields = _spatial_fields(u, v, rng)
    env, predictors = _environment(fields, rng)

    k = p["n_species"]
    sd = p["response_sd"]
    coef = {name: rng.normal(0.0, sd[name], size=k) for name in
            ("elevation", "salinity", "organic_matter", "broad", "fine")}
    sediment_coef = rng.normal(0.0, sd["sediment_class"], size=(2, k))
    intercept = rng.normal(p["log_mean_count"]["mean"], p["log_mean_count"]["sd"], size=k)
    Z = predictors
    eta = (intercept
           + np.outer(Z["elevation_m"], coef["elevation"])
           + np.outer(Z["salinity_psu"], coef["salinity"])
           + np.outer(Z["organic_matter_mg_g"], coef["organic_matter"])
           + Z[["sediment_class[muddy sand]", "sediment_class[mud]"]].to_numpy() @ sediment_coef
           + np.outer(fields["broad"], coef["broad"])
           + np.outer(fields["fine"], coef["fine"]))
    noise_rng = np.random.default_rng([p["seed"], 1])
    counts = _draw_counts(eta, noise_rng)

    X = predictors.to_numpy()
    W = np.column_stack([fields[f] for f in ("shore", "estuary", "broad", "fine")])
    replicate_counts = _draw_counts(np.broadcast_to(eta, (p["n_replicates"],) + eta.shape),
                                    noise_rng)
    reps = oracle_partition(hellinger_rows(replicate_counts), X, W)
    realised = oracle_partition(hellinger_rows(counts), X, W)
    names = ["environment_only", "shared", "space_only", "unexplained"]

    index = pd.Index(ids, name="site_id")
    species = pd.DataFrame(counts, index=index,
                           columns=[f"BTX{j + 1:02d}" for j in range(k)])
    environment = env.set_axis(index)
    x = np.round(ORIGIN[0] + u, 2)
    y = np.round(ORIGIN[1] + v, 2)
    sites = gpd.GeoDataFrame({"zone": zone}, index=index,
                             geometry=shapely.points(x, y), crs=EPSG)
    truth = {
        "description": "Invented estuarine mudflat survey generated by "
                       "spatial_ev.datasets.mudflat (see data_demo/README.md).",
        "parameters": p,
        "crs": f"EPSG:{EPSG}",
        "n_sites": n, "n_species": k,
        "true_environment_variables": ["elevation_m", "salinity_psu", "organic_matter_mg_g",
                                       "sediment_class"],
        "decoy_environment_variables": ["chlorophyll_ug_g", "mud_percent (only through "
                                        "sediment_class)"],
        "true_spatial_fields": ["shore", "estuary", "broad", "fine"],
        "expected_fractions_definition": (
            "mean over n_replicates redraws of the overdispersion and Poisson noise of the "
            "adjusted-R2 variation partition of Hellinger-transformed counts between the true "
            "environmental predictors (elevation_m, salinity_psu, organic_matter_mg_g, "
            "sediment_class indicators with 'sand' as reference) and the true spatial fields "
            "(shore, estuary, broad, fine); numpy least squares"),
        "expected_fractions": {nm: round(float(val), 4)
                               for nm, val in zip(names, reps.mean(axis=0))},
        "expected_fractions_sd": {nm: round(float(val), 4)
                                  for nm, val in zip(names, reps.std(axis=0, ddof=1))},
        "realised_fractions": {nm: round(float(val), 4) for nm, val in zip(names, realised)},
    }
    return DemoSurvey(sites=sites, species=species, environment=environment, truth=truth)


def write_demo_survey(folder: str | os.PathLike, *,
                      demo: DemoSurvey | None = None) -> dict[str, Path]:
    """Write ``sites.gpkg``, ``species.csv``, ``environment.csv`` and ``truth.json``.

    The folder must exist; files in it with these names are replaced. Returns role → path.

    Examples
    --------
    >>> import tempfile
    >>> paths = write_demo_survey(tempfile.mkdtemp())  # doctest: +SKIP
    >>> sorted(paths)  # doctest: +SKIP
    ['environment', 'sites', 'species', 'truth']
    """
    from spatial_ev.report.layers import write_layers, write_table

    folder = Path(folder)
    demo = generate_demo_survey() if demo is None else demo
    paths = {"sites": folder / "sites.gpkg", "species": folder / "species.csv",
             "environment": folder / "environment.csv", "truth": folder / "truth.json"}
    if paths["sites"].exists():
        paths["sites"].unlink()
    write_layers(paths["sites"], {"sites": demo.sites})
    write_table(paths["species"], demo.species)
    write_table(paths["environment"], demo.environment)
    paths["truth"].write_text(json.dumps(demo.truth, indent=2, sort_keys=False) + "\n",
                              encoding="utf-8")
    return paths


# ------------------------------------------------------------------------------- internals

def _layout(rng: np.random.Generator):
    g = PARAMETERS["grid"]
    t = PARAMETERS["shore_transect"]
    col, row = np.meshgrid(np.arange(g["columns"]), np.arange(g["rows"]))
    col, row = col.ravel(), row.ravel()
    gu = col * g["spacing_m"] + rng.uniform(-g["jitter_m"], g["jitter_m"], col.size)
    gv = row * g["spacing_m"] + rng.uniform(-g["jitter_m"], g["jitter_m"], col.size)
    tu = np.arange(t["cores"]) * t["spacing_m"]
    top = (g["rows"] - 1) * g["spacing_m"]
    tv = top + t["offset_m"] + t["amplitude_m"] * (1 + np.sin(2 * np.pi * tu / t["wavelength_m"]))
    ids = [f"G{r + 1:02d}-{c + 1:02d}" for r, c in zip(row, col)] + \
          [f"S{i + 1:02d}" for i in range(t["cores"])]
    zone = ["grid"] * col.size + ["shore transect"] * t["cores"]
    return np.concatenate([gu, tu]), np.concatenate([gv, tv]), zone, ids


def standardise_columns(a: np.ndarray) -> np.ndarray:
    a = a - a.mean()
    return a / a.std()


def residualise(a: np.ndarray, basis: np.ndarray) -> np.ndarray:
    coef, *_ = np.linalg.lstsq(basis, a, rcond=None)
    return standardise_columns(a - basis @ coef)


def _spatial_fields(u, v, rng) -> dict[str, np.ndarray]:
    shore = standardise_columns(v + 30.0 * np.sin(2 * np.pi * u / 700.0))
    estuary = standardise_columns(u + 0.2 * v)
    broad_raw = (np.cos(2 * np.pi * (u - 150.0) / 450.0) * np.cos(2 * np.pi * v / 600.0)
                 + 0.6 * np.sin(2 * np.pi * (u + v) / 520.0))
    n_waves = 60
    wavelength = rng.uniform(90.0, 160.0, n_waves)
    angle = rng.uniform(0.0, np.pi, n_waves)
    phase = rng.uniform(0.0, 2 * np.pi, n_waves)
    arg = (np.outer(u, np.cos(angle)) + np.outer(v, np.sin(angle))) * (2 * np.pi / wavelength)
    fine_raw = np.cos(arg + phase).sum(axis=1)
    base = np.column_stack([np.ones_like(u), shore, estuary])
    broad = residualise(broad_raw, base)
    fine = residualise(fine_raw, np.column_stack([base, broad]))
    return {"shore": shore, "estuary": estuary, "broad": broad, "fine": fine}


def _environment(fields, rng):
    spec = PARAMETERS["environment"]
    n = fields["shore"].size
    e = rng.standard_normal((n, len(spec)))
    env = {}
    for i, (name, c) in enumerate(spec.items()):
        value = (c["intercept"] + c["shore"] * fields["shore"] + c["estuary"] * fields["estuary"]
                 + c["noise_sd"] * e[:, i])
        env[name] = np.round(np.clip(value, *c["clip"]), c["decimals"])
    cut = PARAMETERS["sediment_class"]
    labels = np.array(cut["labels"], dtype=object)
    sediment = labels[np.searchsorted(cut["breaks"], env[cut["from"]], side="right")]
    env = pd.DataFrame(env)
    env["sediment_class"] = pd.Series(sediment, dtype=object)
    predictors = pd.DataFrame({
        "elevation_m": standardise_columns(env["elevation_m"].to_numpy()),
        "salinity_psu": standardise_columns(env["salinity_psu"].to_numpy()),
        "organic_matter_mg_g": standardise_columns(env["organic_matter_mg_g"].to_numpy()),
        "sediment_class[muddy sand]": (sediment == "muddy sand").astype(float),
        "sediment_class[mud]": (sediment == "mud").astype(float)})
    return env, predictors


def _draw_counts(eta: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    sd = PARAMETERS["overdispersion_sd"]
    mu = np.exp(eta + rng.normal(0.0, sd, size=eta.shape))
    return rng.poisson(mu).astype(np.int64)


def hellinger_rows(counts: np.ndarray) -> np.ndarray:
    """Hellinger profiles of (..., sites, taxa) counts (Legendre & Gallagher 2001)."""
    total = counts.sum(axis=-1, keepdims=True)
    return np.sqrt(counts / np.where(total > 0, total, 1))


def _r2_adj(Y: np.ndarray, X: np.ndarray) -> np.ndarray:
    """Adjusted R² of the multivariate regression of Y (..., n, p) on X (n, m), pooled over
    the responses (total sum of squares), one value per leading index of Y."""
    n = X.shape[0]
    Xc = X - X.mean(axis=0)
    U, sv, _ = np.linalg.svd(Xc, full_matrices=False)
    rank = int((sv > sv[0] * n * np.finfo(float).eps).sum())
    U = U[:, :rank]
    Yc = Y - Y.mean(axis=-2, keepdims=True)
    fitted = np.einsum("ik,...kj->...ij", U, np.einsum("ik,...ij->...kj", U, Yc))
    r2 = (fitted ** 2).sum(axis=(-2, -1)) / (Yc ** 2).sum(axis=(-2, -1))
    return 1.0 - (1.0 - r2) * (n - 1) / (n - rank - 1)


def oracle_partition(Y: np.ndarray, X: np.ndarray, W: np.ndarray) -> np.ndarray:
    """Fractions [a], [b], [c], [d] (Borcard, Legendre & Drapeau 1992, Ecology 73:1045–1055)
    for Y (..., n, p); returns (..., 4)."""
    rx, rw, rxw = _r2_adj(Y, X), _r2_adj(Y, W), _r2_adj(Y, np.column_stack([X, W]))
    return np.stack([rxw - rw, rx + rw - rxw, rxw - rx, 1.0 - rxw], axis=-1)
