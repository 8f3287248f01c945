"""A second demo survey: invented upland lakes as polygons in latitude / longitude.

Scenario (fictional): 150 small lakes on an invented upland plateau, drawn as polygons and
delivered in geographic coordinates (EPSG:4326, degrees), the way lake outlines usually arrive
from a mapping agency. The lakes are irregular in position — four clusters ("basins" ``A`` …
``D``) of 25–40 lakes and 20 scattered lakes — and in shape and size (about 0.2 to 8 ha).
Thirty invented littoral taxa (``LKT01`` … ``LKT30``) are counted in a standard sweep per lake;
five environmental variables are recorded, one of them categorical. The coordinates lie over
open sea on purpose: no real lake is represented.

Generating model (all parameters in :data:`PARAMETERS`; numpy only, one seed):

* lake centres in local metres (u east, v north of the plateau centre); each lake is a
  20-vertex polygon around its centre with a log-normal radius and a random wobble, placed so
  that no two lakes overlap; the polygons are converted to longitude / latitude with an
  azimuthal equidistant projection centred on the plateau (pyproj);
* spatial fields on the lakes (centred, unit variance): ``upland`` (a broad west–east
  gradient, drives depth, pH and shore type), ``patches`` (a smooth pattern of ~3–3.5 km
  patches) and ``local`` (a sum of random waves with 1.2–2.2 km wavelengths), the last two
  made exactly orthogonal to the gradient and to each other over the lakes, so they are
  spatial structure independent of the environment;
* environment: ``depth_m`` and ``ph`` follow the gradient plus local noise, ``area_ha`` is the
  polygon's area (local, spatially unstructured), ``shore_type`` (``peaty`` / ``sandy`` /
  ``rocky``) is a noisy cut of the gradient, and ``colour_mg_pt_l`` (water colour) is a decoy
  the taxa do not respond to;
* taxa: log expected count = intercept + responses to standardised depth, pH and log area +
  shore-type effects + responses to ``patches`` and ``local`` + a lake-by-taxon normal
  deviation (overdispersion); counts are Poisson draws.

"Expected fractions" are defined as in :mod:`spatial_ev.datasets.mudflat`: the adjusted-R²
variation partition (Borcard, Legendre & Drapeau 1992, Ecology 73:1045–1055; adjusted R² per
Peres-Neto et al. 2006, Ecology 87:2614–2625) of Hellinger-transformed counts (Legendre &
Gallagher 2001, Oecologia 129:271–280) between the true environmental predictors and the true
spatial fields, averaged over redraws of the overdispersion and Poisson noise.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from spatial_ev.datasets.mudflat import hellinger_rows, oracle_partition, residualise, standardise_columns

__all__ = ["LakeSurvey", "generate_lake_survey", "write_lake_survey", "PARAMETERS"]

SEED = 20261202
CENTRE = (62.4, -31.7)  # latitude, longitude of the invented plateau's centre (open sea)

PARAMETERS: dict[str, Any] = {
    "seed": SEED,
    "centre_lat_lon": list(CENTRE),
    "clusters": {"A": {"centre_m": [-3500.0, 2000.0], "lakes": 40, "sd_m": 700.0},
                 "B": {"centre_m": [2500.0, 2800.0], "lakes": 35, "sd_m": 900.0},
                 "C": {"centre_m": [-1000.0, -2600.0], "lakes": 30, "sd_m": 600.0},
                 "D": {"centre_m": [4200.0, -1800.0], "lakes": 25, "sd_m": 800.0}},
    "scattered": {"lakes": 20, "half_width_m": 6000.0, "half_height_m": 4500.0},
    "shape": {"vertices": 20, "log_radius_mean": float(np.log(70.0)), "log_radius_sd": 0.45,
              "radius_clip_m": [25.0, 170.0], "wobble": 0.22, "gap_m": 20.0},
    "fields": {"upland": "u + 0.35 v", "patches_wavelength_m": [7000.0, 6000.0],
               "local_waves": 40, "local_wavelength_m": [1200.0, 2200.0]},
    "environment": {
        "depth_m": {"intercept": 3.0, "upland": 0.9, "noise_sd": 0.8, "clip": [0.3, None],
                    "decimals": 1},
        "ph": {"intercept": 6.4, "upland": -0.45, "noise_sd": 0.3, "clip": [None, None],
               "decimals": 2},
        "colour_mg_pt_l": {"intercept": 40.0, "upland": 0.0, "noise_sd": 12.0,
                           "clip": [2.0, None], "decimals": 1},
    },
    "shore_type": {"score": "0.9 upland + N(0, 1)", "breaks": [-0.6, 0.6],
                   "labels": ["peaty", "sandy", "rocky"]},
    "n_species": 30,
    "response_sd": {"depth": 0.5, "ph": 0.5, "log_area": 0.45, "shore_type": 0.45,
                    "patches": 0.6, "local": 0.5},
    "log_mean_count": {"mean": 1.6, "sd": 0.6},
    "overdispersion_sd": 0.35,
    "n_replicates": 200,
}


@dataclass(frozen=True)
class LakeSurvey:
    """The generated lake survey.

    Attributes
    ----------
    sites : geopandas.GeoDataFrame
        (150, 1) column ``basin`` (``A`` … ``D`` or ``scattered``); polygon geometry in
        EPSG:4326 (longitude, latitude); index ``lake_id``.
    species : pandas.DataFrame
        (150, 30) int64 counts, columns ``LKT01`` … ``LKT30``.
    environment : pandas.DataFrame
        (150, 5) four numeric columns and the text column ``shore_type``.
    truth : dict
        Generating parameters, the true predictors and the expected fractions.
    """

    sites: Any
    species: pd.DataFrame
    environment: pd.DataFrame
    truth: dict


def generate_lake_survey() -> LakeSurvey:
    """Generate the lake survey (deterministic: the same output on every call).

    Returns
    -------
    LakeSurvey

    Examples
    --------
    >>> lakes = generate_lake_survey()  # doctest: +SKIP
    >>> lakes.species.shape, str(lakes.sites.crs)  # doctest: +SKIP
    ((150, 30), 'EPSG:4326')
    """
    import geopandas as gpd

    p = PARAMETERS
    rng = np.random.default_rng(p["seed"])
    u, v, radius, basin, ids = _centres(rng)
    polygons_m, area_m2 = _outlines(u, v, radius, rng)
    fields = _spatial_fields(u, v, rng)
    env, predictors = _environment(fields, area_m2, rng)

    k = p["n_species"]
    sd = p["response_sd"]
    coef = {name: rng.normal(0.0, sd[name], size=k)
            for name in ("depth", "ph", "log_area", "patches", "local")}
    shore_coef = rng.normal(0.0, sd["shore_type"], size=(2, k))
    intercept = rng.normal(p["log_mean_count"]["mean"], p["log_mean_count"]["sd"], size=k)
    Z = predictors
    eta = (intercept
           + np.outer(Z["depth_m"], coef["depth"]) + np.outer(Z["ph"], coef["ph"])
           + np.outer(Z["log_area"], coef["log_area"])
           + Z[["shore_type[sandy]", "shore_type[rocky]"]].to_numpy() @ shore_coef
           + np.outer(fields["patches"], coef["patches"])
           + np.outer(fields["local"], coef["local"]))
    noise_rng = np.random.default_rng([p["seed"], 1])
    counts = _draw_counts(eta, noise_rng)
    X = predictors.to_numpy()
    W = np.column_stack([fields[f] for f in ("upland", "patches", "local")])
    replicate_counts = _draw_counts(np.broadcast_to(eta, (p["n_replicates"],) + eta.shape),
                                    noise_rng)
    reps = oracle_partition(hellinger_rows(replicate_counts), X, W)
    realised = oracle_partition(hellinger_rows(counts), X, W)
    names = ["environment_only", "shared", "space_only", "unexplained"]

    index = pd.Index(ids, name="lake_id")
    species = pd.DataFrame(counts, index=index, columns=[f"LKT{j + 1:02d}" for j in range(k)])
    environment = env.set_axis(index)
    sites = gpd.GeoDataFrame({"basin": basin}, index=index,
                             geometry=_to_lon_lat(polygons_m), crs=4326)
    truth = {
        "description": "Invented upland lakes (polygons, EPSG:4326) generated by "
                       "spatial_ev.datasets.lakes (see data_demo/lakes/README.md).",
        "parameters": p,
        "crs": "EPSG:4326",
        "n_sites": int(len(ids)), "n_species": k,
        "true_environment_variables": ["depth_m", "ph", "area_ha (as log area)", "shore_type"],
        "decoy_environment_variables": ["colour_mg_pt_l"],
        "true_spatial_fields": ["upland", "patches", "local"],
        "expected_fractions_definition": (
            "mean over n_replicates redraws of the overdispersion and Poisson noise of the "
            "adjusted-R2 variation partition of Hellinger-transformed counts between the true "
            "environmental predictors (depth_m, ph, log area, shore_type indicators with "
            "'peaty' as reference) and the true spatial fields (upland, patches, local); "
            "numpy least squares"),
        "expected_fractions": {nm: round(float(val), 4)
                               for nm, val in zip(names, reps.mean(axis=0))},
        "expected_fractions_sd": {nm: round(float(val), 4)
                                  for nm, val in zip(names, reps.std(axis=0, ddof=1))},
        "realised_fractions": {nm: round(float(val), 4) for nm, val in zip(names, realised)},
    }
    return LakeSurvey(sites=sites, species=species, environment=environment, truth=truth)


def write_lake_survey(folder: str | os.PathLike, *,
                      lakes: LakeSurvey | None = None) -> dict[str, Path]:
    """Write ``lakes.gpkg``, ``species.csv``, ``environment.csv`` and ``truth.json``.

    The folder must exist; files in it with these names are replaced. Returns role → path.

    Examples
    --------
    >>> import tempfile
    >>> paths = write_lake_survey(tempfile.mkdtemp())  # doctest: +SKIP
    >>> sorted(paths)  # doctest: +SKIP
    ['environment', 'sites', 'species', 'truth']
    """
    from spatial_ev.report.layers import write_layers, write_table

    folder, lakes = _check_write(folder, lakes)
    paths = {"sites": folder / "lakes.gpkg", "species": folder / "species.csv",
             "environment": folder / "environment.csv", "truth": folder / "truth.json"}
    if paths["sites"].exists():
        paths["sites"].unlink()
    write_layers(paths["sites"], {"lakes": lakes.sites})
    write_table(paths["species"], lakes.species)
    write_table(paths["environment"], lakes.environment)
    paths["truth"].write_text(json.dumps(lakes.truth, indent=2) + "\n", encoding="utf-8")
    return paths


# ------------------------------------------------------------------------------- internals

def _check_write(folder: Any, lakes: Any) -> tuple[Path, LakeSurvey]:
    from spatial_ev.errors import InputError

    if not isinstance(folder, (str, os.PathLike)):
        raise InputError(f"`folder` must be a path; got {type(folder).__name__}")
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError(f"folder {str(folder)!r} does not exist; create it first")
    if lakes is None:
        return folder, generate_lake_survey()
    if not isinstance(lakes, LakeSurvey):
        raise InputError(f"`lakes` must be a LakeSurvey from generate_lake_survey() or None; "
                         f"got {type(lakes).__name__}")
    return folder, lakes


def _centres(rng: np.random.Generator):
    """Lake radii, then non-overlapping centres (metres), basin labels and ids.

    A candidate centre is rejected when its largest possible outline (radius × (1 + wobble))
    would come closer than ``gap_m`` to an already placed lake's.
    """
    p = PARAMETERS
    s = p["shape"]
    n = sum(c["lakes"] for c in p["clusters"].values()) + p["scattered"]["lakes"]
    radius = np.clip(np.exp(rng.normal(s["log_radius_mean"], s["log_radius_sd"], n)),
                     *s["radius_clip_m"])
    reach = radius * (1 + 1.5 * s["wobble"])
    placed: list[tuple[float, float]] = []
    basin, ids = [], []

    def far_enough(x: float, y: float) -> bool:
        if not placed:
            return True
        xy = np.asarray(placed)
        k = len(placed)
        gap = np.hypot(xy[:, 0] - x, xy[:, 1] - y) - reach[:k] - reach[k]
        return bool(gap.min() > s["gap_m"])

    def draw(name: str, count: int, sample) -> None:
        done = 0
        while done < count:  # rejection sampling, at generation time only
            x, y = sample()
            if far_enough(x, y):
                placed.append((x, y))
                done += 1
                basin.append(name)
                ids.append(f"{'X' if name == 'scattered' else name}{done:02d}")

    for name, c in p["clusters"].items():
        draw(name, c["lakes"], lambda c=c: rng.normal(c["centre_m"], c["sd_m"]))
    sc = p["scattered"]
    draw("scattered", sc["lakes"],
         lambda: (rng.uniform(-sc["half_width_m"], sc["half_width_m"]),
                  rng.uniform(-sc["half_height_m"], sc["half_height_m"])))
    xy = np.asarray(placed)
    return xy[:, 0], xy[:, 1], radius, basin, ids


def _outlines(u: np.ndarray, v: np.ndarray, radius: np.ndarray, rng: np.random.Generator):
    """Irregular lake polygons in metres (20 vertices each) and their areas (m²)."""
    import shapely

    s = PARAMETERS["shape"]
    n, m = u.size, s["vertices"]
    theta = np.linspace(0.0, 2 * np.pi, m, endpoint=False)
    a1, a2 = rng.uniform(0, s["wobble"], n), rng.uniform(0, s["wobble"] / 2, n)
    p1, p2 = rng.uniform(0, 2 * np.pi, n), rng.uniform(0, 2 * np.pi, n)
    r = radius[:, None] * (1 + a1[:, None] * np.cos(theta + p1[:, None])
                           + a2[:, None] * np.cos(2 * theta + p2[:, None]))
    x = np.round(u[:, None] + r * np.cos(theta), 2)
    y = np.round(v[:, None] + r * np.sin(theta), 2)
    polygons = shapely.polygons(np.stack([x, y], axis=-1))
    return polygons, shapely.area(polygons)


def _local_crs():
    import pyproj

    lat0, lon0 = CENTRE
    return pyproj.CRS.from_proj4(f"+proj=aeqd +lat_0={lat0} +lon_0={lon0} +datum=WGS84 "
                                 f"+units=m +no_defs")


def _to_lon_lat(polygons_m: np.ndarray) -> np.ndarray:
    """Polygons in local metres → longitude / latitude (degrees, 7 decimals ≈ 1 cm)."""
    import pyproj
    import shapely

    to_geo = pyproj.Transformer.from_crs(_local_crs(), 4326, always_xy=True)
    coords = shapely.get_coordinates(polygons_m)
    lon, lat = to_geo.transform(coords[:, 0], coords[:, 1])
    out = shapely.set_coordinates(polygons_m.copy(),
                                  np.column_stack([np.round(lon, 7), np.round(lat, 7)]))
    return out


def _spatial_fields(u, v, rng) -> dict[str, np.ndarray]:
    f = PARAMETERS["fields"]
    upland = standardise_columns(u + 0.35 * v)
    wx, wy = f["patches_wavelength_m"]
    patches_raw = np.cos(2 * np.pi * u / wx) * np.sin(2 * np.pi * v / wy)
    lo, hi = f["local_wavelength_m"]
    n_waves = f["local_waves"]
    wavelength = rng.uniform(lo, hi, n_waves)
    angle = rng.uniform(0.0, np.pi, n_waves)
    phase = rng.uniform(0.0, 2 * np.pi, n_waves)
    arg = (np.outer(u, np.cos(angle)) + np.outer(v, np.sin(angle))) * (2 * np.pi / wavelength)
    local_raw = np.cos(arg + phase).sum(axis=1)
    base = np.column_stack([np.ones_like(u), upland])
    patches = residualise(patches_raw, base)
    local = residualise(local_raw, np.column_stack([base, patches]))
    return {"upland": upland, "patches": patches, "local": local}


def _environment(fields, area_m2, rng):
    spec = PARAMETERS["environment"]
    n = fields["upland"].size
    e = rng.standard_normal((n, len(spec) + 1))
    env = {}
    for i, (name, c) in enumerate(spec.items()):
        value = c["intercept"] + c["upland"] * fields["upland"] + c["noise_sd"] * e[:, i]
        env[name] = np.round(np.clip(value, *c["clip"]), c["decimals"])
    env["area_ha"] = np.round(area_m2 / 10_000.0, 3)
    cut = PARAMETERS["shore_type"]
    score = 0.9 * fields["upland"] + e[:, -1]
    labels = np.array(cut["labels"], dtype=object)
    shore = labels[np.searchsorted(cut["breaks"], score, side="right")]
    env = pd.DataFrame(env)[["depth_m", "ph", "area_ha", "colour_mg_pt_l"]]
    env["shore_type"] = pd.Series(shore, dtype=object)
    predictors = pd.DataFrame({
        "depth_m": standardise_columns(env["depth_m"].to_numpy()),
        "ph": standardise_columns(env["ph"].to_numpy()),
        "log_area": standardise_columns(np.log(env["area_ha"].to_numpy())),
        "shore_type[sandy]": (shore == "sandy").astype(float),
        "shore_type[rocky]": (shore == "rocky").astype(float)})
    return env, predictors


def _draw_counts(eta: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    sd = PARAMETERS["overdispersion_sd"]
    mu = np.exp(eta + rng.normal(0.0, sd, size=eta.shape))
    return rng.poisson(mu).astype(np.int64)
