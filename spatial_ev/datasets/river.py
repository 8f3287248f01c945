"""A third demo survey: invented kick-net samples along an invented river network.

Scenario (fictional): a lowland river (the "main stem", about 34 km of channel) flowing west to
east, joined by three tributaries (``A`` and ``C`` from the north, ``B`` from the south). The
channels are delivered as a line layer digitised downstream, split at the confluences into
seven reaches, in WGS 84 / UTM zone 29N (EPSG:32629, metres) — the coordinates lie over the
open Atlantic on purpose: no real river is represented. 120 kick-net sites are spread along
the channels in proportion to reach length, their GPS positions a few metres off the digitised
centre line. Thirty-five invented macroinvertebrate taxa (``RVT01`` … ``RVT35``) are counted
per standard three-minute kick sample; four environmental variables are recorded, one of them
categorical.

Generating model (all parameters in :data:`PARAMETERS`; numpy and shapely only, one seed):

* geometry in local metres (x east, y north of the outlet area), every channel a sinuous
  polyline; each site has a reach and an along-channel position, and hence an along-network
  distance to the outlet;
* **downstream drift** (the directional component): 30 point inputs at random positions on
  the network with random signed strengths (e.g. organic enrichment, a tributary's drift of
  larvae); the field at a site is the sum over the inputs *upstream of it* of
  strength × exp(−d/λ), d the along-channel distance from the input down to the site, λ = 4 km.
  Nothing travels upstream or across between tributaries. It is computed here from the
  channels' own parameterisation (reach chain and along-channel positions), not with the
  package's network code. Over the sites it is centred, scaled to unit variance and made
  orthogonal to the altitude gradient;
* environment: ``altitude_m`` rises with along-network distance from the outlet;
  ``conductivity_us_cm`` is high on tributary ``B`` (a limestone catchment) and downstream of
  its confluence, low elsewhere; ``substrate`` (``cobble`` / ``gravel`` / ``sand``) is a noisy
  cut of altitude; ``canopy_percent`` is a decoy the taxa do not respond to;
* taxa: log expected count = intercept + responses to standardised altitude and log
  conductivity + substrate effects + response to the drift field + a site-by-taxon normal
  deviation (overdispersion); counts are Poisson draws.

"Expected fractions" are defined as in :mod:`spatial_ev.datasets.mudflat`: the adjusted-R²
variation partition (Borcard, Legendre & Drapeau 1992, Ecology 73:1045–1055; adjusted R² per
Peres-Neto et al. 2006, Ecology 87:2614–2625) of Hellinger-transformed counts (Legendre &
Gallagher 2001, Oecologia 129:271–280) between the true environmental predictors and the true
spatial field (drift), averaged over redraws of the overdispersion and Poisson noise.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from spatial_ev.datasets.mudflat import (hellinger_rows, oracle_partition, residualise,
                                         standardise_columns)

__all__ = ["RiverSurvey", "generate_river_survey", "write_river_survey", "PARAMETERS"]

SEED = 20261203
EPSG = 32629
ORIGIN = (262_000.0, 5_921_000.0)     # local (0, 0) in UTM 29N metres (open sea)

PARAMETERS: dict[str, Any] = {
    "seed": SEED,
    "epsg": EPSG,
    "origin_utm_m": list(ORIGIN),
    # main stem: x from 0 to 24000 m, y = a1 sin(2πx/w1) + a2 sin(2πx/w2 + 1); vertices 100 m
    "main_stem": {"length_x_m": 24000.0, "vertex_step_m": 100.0,
                  "amplitudes_m": [1500.0, 400.0], "wavelengths_m": [9000.0, 2300.0]},
    # tributaries: from their source to the main stem at x = joins_at_x_m; sinuous offset
    "tributaries": {
        "A": {"source_m": [3000.0, 7000.0], "joins_at_x_m": 6000.0, "wiggle_m": 300.0},
        "B": {"source_m": [15000.0, -7000.0], "joins_at_x_m": 13000.0, "wiggle_m": 350.0},
        "C": {"source_m": [22000.0, 8000.0], "joins_at_x_m": 19000.0, "wiggle_m": 250.0},
    },
    "sites": {"count": 120, "end_margin_m": 40.0, "gps_sd_m": 4.0, "gps_clip_m": 12.0},
    "drift": {"inputs": 30, "decay_m": 4000.0, "strength_sd": 1.0},
    "environment": {
        "altitude_m": {"intercept": 35.0, "per_km_from_outlet": 4.5, "noise_sd": 6.0,
                       "decimals": 1},
        "conductivity_us_cm": {"low": 180.0, "limestone": 520.0, "mixed": 330.0,
                               "log_noise_sd": 0.12, "decimals": 0},
        "canopy_percent": {"low": 0.0, "high": 95.0, "decimals": 0},
    },
    "substrate": {"score": "z(altitude) + N(0, 0.8)", "breaks": [-0.5, 0.6],
                  "labels": ["sand", "gravel", "cobble"]},
    "n_species": 35,
    "response_sd": {"altitude": 0.5, "conductivity": 0.45, "substrate": 0.45, "drift": 0.75},
    "log_mean_count": {"mean": 1.8, "sd": 0.6},
    "overdispersion_sd": 0.35,
    "n_replicates": 200,
}

# reach name -> (downstream reach or None); the main stem is split at the three confluences
_REACHES = ("M1", "M2", "M3", "M4", "A", "B", "C")
_DOWNSTREAM = {"M1": "M2", "M2": "M3", "M3": "M4", "M4": None, "A": "M2", "B": "M3",
               "C": "M4"}


@dataclass(frozen=True)
class RiverSurvey:
    """The generated river survey.

    Attributes
    ----------
    channels : geopandas.GeoDataFrame
        Seven reaches (``reach``: ``M1`` … ``M4`` for the main stem, ``A``, ``B``, ``C``;
        ``channel``: ``main stem`` or ``tributary X``), lines digitised downstream, EPSG:32629.
    sites : geopandas.GeoDataFrame
        (120, 1) column ``reach``; point geometry (GPS position) in EPSG:32629; index
        ``site_id``.
    species : pandas.DataFrame
        (120, 35) int64 counts, columns ``RVT01`` … ``RVT35``.
    environment : pandas.DataFrame
        (120, 4) three numeric columns and the text column ``substrate``.
    truth : dict
        Generating parameters, the drift field at the sites and the expected fractions.
    """

    channels: Any
    sites: Any
    species: pd.DataFrame
    environment: pd.DataFrame
    truth: dict


def generate_river_survey() -> RiverSurvey:
    """Generate the river survey (deterministic: the same output on every call).

    Returns
    -------
    RiverSurvey

    Examples
    --------
    >>> river = generate_river_survey()  # doctest: +SKIP
    >>> river.species.shape, len(river.channels)  # doctest: +SKIP
    ((120, 35), 7)
    """
    import geopandas as gpd
    import shapely

    p = PARAMETERS
    rng = np.random.default_rng(p["seed"])
    reaches = _reach_lines()
    site_reach, site_pos, site_xy = _sites(reaches, rng)
    dto = _distance_to_outlet(reaches, site_reach, site_pos)
    fields = _fields(reaches, site_reach, site_pos, dto, rng)
    env, predictors = _environment(site_reach, dto, rng)

    k = p["n_species"]
    sd = p["response_sd"]
    coef = {name: rng.normal(0.0, sd[name], size=k)
            for name in ("altitude", "conductivity", "drift")}
    sub_coef = rng.normal(0.0, sd["substrate"], size=(2, k))
    intercept = rng.normal(p["log_mean_count"]["mean"], p["log_mean_count"]["sd"], size=k)
    Z = predictors
    eta = (intercept
           + np.outer(Z["altitude_m"], coef["altitude"])
           + np.outer(Z["log_conductivity"], coef["conductivity"])
           + Z[["substrate[gravel]", "substrate[cobble]"]].to_numpy() @ sub_coef
           + np.outer(fields["drift"], coef["drift"]))
    noise_rng = np.random.default_rng([p["seed"], 1])
    counts = _draw_counts(eta, noise_rng)
    X = predictors.to_numpy()
    W = fields["drift"][:, None]
    replicate = _draw_counts(np.broadcast_to(eta, (p["n_replicates"],) + eta.shape), noise_rng)
    reps = oracle_partition(hellinger_rows(replicate), X, W)
    realised = oracle_partition(hellinger_rows(counts), X, W)
    names = ["environment_only", "shared", "space_only", "unexplained"]

    n = len(site_reach)
    ids = pd.Index([f"K{i + 1:03d}" for i in range(n)], name="site_id")
    species = pd.DataFrame(counts, index=ids, columns=[f"RVT{j + 1:02d}" for j in range(k)])
    environment = env.set_axis(ids)
    ox, oy = ORIGIN
    sites = gpd.GeoDataFrame(
        {"reach": np.asarray(_REACHES, dtype=object)[site_reach]}, index=ids,
        geometry=shapely.points(np.round(site_xy + [ox, oy], 2)), crs=EPSG)
    lines = [shapely.set_coordinates(reaches[r].line,
                                     np.round(shapely.get_coordinates(reaches[r].line)
                                              + [ox, oy], 2)) for r in _REACHES]
    channels = gpd.GeoDataFrame(
        {"reach": list(_REACHES),
         "channel": ["main stem"] * 4 + [f"tributary {r}" for r in "ABC"]},
        geometry=lines, crs=EPSG, index=pd.RangeIndex(len(_REACHES), name="fid"))
    truth = {
        "description": "Invented river survey (kick-net sites on a dendritic network, "
                       "EPSG:32629) generated by spatial_ev.datasets.river (see "
                       "data_demo/river/README.md).",
        "parameters": p,
        "crs": f"EPSG:{EPSG}",
        "n_sites": n, "n_species": k,
        "snap_tolerance_m": 30.0,
        "outlet_utm_m": [float(v) for v in np.round(
            shapely.get_coordinates(reaches["M4"].line)[-1] + [ox, oy], 2)],
        "true_environment_variables": ["altitude_m", "conductivity_us_cm (as log)",
                                       "substrate"],
        "decoy_environment_variables": ["canopy_percent"],
        "true_spatial_fields": ["drift"],
        "drift_at_sites": {i: round(float(v), 8) for i, v in zip(ids, fields["drift"])},
        "distance_to_outlet_m": {i: round(float(v), 3) for i, v in zip(ids, dto)},
        "expected_fractions_definition": (
            "mean over n_replicates redraws of the overdispersion and Poisson noise of the "
            "adjusted-R2 variation partition of Hellinger-transformed counts between the true "
            "environmental predictors (altitude_m, log conductivity, substrate indicators with "
            "'sand' as reference) and the true spatial field (drift); numpy least squares"),
        "expected_fractions": {nm: round(float(val), 4)
                               for nm, val in zip(names, reps.mean(axis=0))},
        "expected_fractions_sd": {nm: round(float(val), 4)
                                  for nm, val in zip(names, reps.std(axis=0, ddof=1))},
        "realised_fractions": {nm: round(float(val), 4) for nm, val in zip(names, realised)},
    }
    return RiverSurvey(channels=channels, sites=sites, species=species,
                       environment=environment, truth=truth)


def write_river_survey(folder: str | os.PathLike, *,
                       river: RiverSurvey | None = None) -> dict[str, Path]:
    """Write ``network.gpkg``, ``sites.gpkg``, ``species.csv``, ``environment.csv``, ``truth.json``.

    The folder must exist; files in it with these names are replaced. Returns role → path.

    Examples
    --------
    >>> import tempfile
    >>> paths = write_river_survey(tempfile.mkdtemp())  # doctest: +SKIP
    >>> sorted(paths)  # doctest: +SKIP
    ['environment', 'network', 'sites', 'species', 'truth']
    """
    from spatial_ev.errors import InputError
    from spatial_ev.report.layers import write_layers, write_table

    if not isinstance(folder, (str, os.PathLike)):
        raise InputError(f"`folder` must be a path; got {type(folder).__name__}")
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError(f"folder {str(folder)!r} does not exist; create it first")
    if river is None:
        river = generate_river_survey()
    elif not isinstance(river, RiverSurvey):
        raise InputError(f"`river` must be a RiverSurvey from generate_river_survey() or None; "
                         f"got {type(river).__name__}")
    paths = {"network": folder / "network.gpkg", "sites": folder / "sites.gpkg",
             "species": folder / "species.csv", "environment": folder / "environment.csv",
             "truth": folder / "truth.json"}
    for key in ("network", "sites"):
        if paths[key].exists():
            paths[key].unlink()
    write_layers(paths["network"], {"channels": river.channels})
    write_layers(paths["sites"], {"sites": river.sites})
    write_table(paths["species"], river.species)
    write_table(paths["environment"], river.environment)
    paths["truth"].write_text(json.dumps(river.truth, indent=2) + "\n", encoding="utf-8")
    return paths


# ------------------------------------------------------------------------------- internals

@dataclass(frozen=True)
class _Reach:
    line: Any          # shapely LineString, local metres, digitised downstream
    length: float


def _main_y(x: np.ndarray) -> np.ndarray:
    m = PARAMETERS["main_stem"]
    (a1, a2), (w1, w2) = m["amplitudes_m"], m["wavelengths_m"]
    return a1 * np.sin(2 * np.pi * x / w1) + a2 * np.sin(2 * np.pi * x / w2 + 1.0)


def _reach_lines() -> dict[str, _Reach]:
    """The seven reaches: the main stem split at the confluences, and the tributaries."""
    import shapely

    m = PARAMETERS["main_stem"]
    tribs = PARAMETERS["tributaries"]
    x = np.arange(0.0, m["length_x_m"] + m["vertex_step_m"] / 2, m["vertex_step_m"])
    main = np.column_stack([x, _main_y(x)])
    cuts = [0.0] + sorted(t["joins_at_x_m"] for t in tribs.values()) + [m["length_x_m"]]
    out = {}
    for name, (a, b) in zip(("M1", "M2", "M3", "M4"), zip(cuts[:-1], cuts[1:])):
        sel = (x >= a - 1e-9) & (x <= b + 1e-9)
        line = shapely.LineString(main[sel])
        out[name] = _Reach(line, float(line.length))
    for name, t in tribs.items():
        sx, sy = t["source_m"]
        jx = t["joins_at_x_m"]
        jy = float(_main_y(np.array([jx]))[0])
        s = np.linspace(0.0, 1.0, 61)
        dx, dy = jx - sx, jy - sy
        norm = np.hypot(dx, dy)
        wig = t["wiggle_m"] * np.sin(3 * np.pi * s) * np.sin(np.pi * s)
        px = sx + s * dx - wig * dy / norm
        py = sy + s * dy + wig * dx / norm
        px[-1], py[-1] = jx, jy                      # ends exactly on the main stem's vertex
        line = shapely.LineString(np.column_stack([px, py]))
        out[name] = _Reach(line, float(line.length))
    return out


def _sites(reaches: dict[str, _Reach], rng: np.random.Generator):
    """Sites per reach in proportion to length (largest remainder), stratified positions."""
    import shapely

    s = PARAMETERS["sites"]
    lengths = np.array([reaches[r].length for r in _REACHES])
    share = s["count"] * lengths / lengths.sum()
    count = np.floor(share).astype(int)
    extra = np.argsort(-(share - count), kind="stable")[: s["count"] - count.sum()]
    count[extra] += 1
    reach_idx, pos = [], []
    for r, c in enumerate(count):                 # seven reaches
        usable = lengths[r] - 2 * s["end_margin_m"]
        bins = np.linspace(0.0, usable, c + 1)
        pos.append(s["end_margin_m"] + rng.uniform(bins[:-1], bins[1:]))
        reach_idx.append(np.full(c, r))
    reach_idx, pos = np.concatenate(reach_idx), np.concatenate(pos)
    lines = np.array([reaches[_REACHES[r]].line for r in reach_idx], dtype=object)
    on_line = shapely.get_coordinates(shapely.line_interpolate_point(lines, pos))
    gps = np.clip(rng.normal(0.0, s["gps_sd_m"], size=on_line.shape),
                  -s["gps_clip_m"], s["gps_clip_m"])
    return reach_idx, pos, on_line + gps


def _reach_offsets(reaches: dict[str, _Reach]) -> dict[str, float]:
    """Along-channel distance from each reach's downstream end to the outlet."""
    off: dict[str, float] = {}
    for r in ("M4", "M3", "M2", "M1", "A", "B", "C"):     # downstream reaches first
        down = _DOWNSTREAM[r]
        off[r] = 0.0 if down is None else off[down] + reaches[down].length
    return off


def _distance_to_outlet(reaches, reach_idx: np.ndarray, pos: np.ndarray) -> np.ndarray:
    off = _reach_offsets(reaches)
    length = np.array([reaches[r].length for r in _REACHES])
    offset = np.array([off[r] for r in _REACHES])
    return offset[reach_idx] + length[reach_idx] - pos


def _downstream_chain(r: str) -> list[str]:
    chain = [r]
    while _DOWNSTREAM[chain[-1]] is not None:
        chain.append(_DOWNSTREAM[chain[-1]])
    return chain


def _fields(reaches, site_reach, site_pos, dto, rng) -> dict[str, np.ndarray]:
    """Altitude gradient (distance to outlet) and the downstream-drift field at the sites."""
    d = PARAMETERS["drift"]
    lengths = np.array([reaches[r].length for r in _REACHES])
    # inputs uniformly along the whole network
    u = rng.uniform(0.0, lengths.sum(), d["inputs"])
    in_reach = np.searchsorted(np.cumsum(lengths), u, side="right")
    in_pos = u - np.concatenate([[0.0], np.cumsum(lengths)])[in_reach]
    strength = rng.normal(0.0, d["strength_sd"], d["inputs"])
    in_dto = _distance_to_outlet(reaches, in_reach, in_pos)
    # input i reaches site s when the site's reach is on the input's downstream chain and
    # the site lies below the input (smaller distance to the outlet)
    on_chain = np.array([[_REACHES[sr] in _downstream_chain(_REACHES[ir])
                          for sr in range(len(_REACHES))] for ir in range(len(_REACHES))])
    reaches_site = on_chain[in_reach][:, site_reach] & (in_dto[:, None] >= dto[None, :])
    gap = in_dto[:, None] - dto[None, :]
    raw = (reaches_site * strength[:, None] * np.exp(-np.where(reaches_site, gap, 0.0)
                                                     / d["decay_m"])).sum(axis=0)
    altitude = standardise_columns(dto)
    drift = standardise_columns(residualise(raw, np.column_stack([np.ones_like(dto),
                                                                  altitude])))
    return {"altitude": altitude, "drift": drift, "drift_raw": raw}


def _environment(site_reach, dto, rng):
    spec = PARAMETERS["environment"]
    n = len(site_reach)
    e = rng.standard_normal((n, 3))
    a = spec["altitude_m"]
    altitude = np.round(a["intercept"] + a["per_km_from_outlet"] * dto / 1000.0
                        + a["noise_sd"] * e[:, 0], a["decimals"])
    c = spec["conductivity_us_cm"]
    name = np.asarray(_REACHES, dtype=object)[site_reach]
    base = np.where(name == "B", c["limestone"],
                    np.where(np.isin(name, ["M3", "M4"]), c["mixed"], c["low"]))
    conductivity = np.round(base * np.exp(c["log_noise_sd"] * e[:, 1]), c["decimals"])
    cp = spec["canopy_percent"]
    canopy = np.round(rng.uniform(cp["low"], cp["high"], n), cp["decimals"])
    cut = PARAMETERS["substrate"]
    z_alt = standardise_columns(altitude)
    score = z_alt + 0.8 * e[:, 2]
    labels = np.array(cut["labels"], dtype=object)
    substrate = labels[np.searchsorted(cut["breaks"], score, side="right")]
    env = pd.DataFrame({"altitude_m": altitude, "conductivity_us_cm": conductivity,
                        "canopy_percent": canopy})
    env["substrate"] = pd.Series(substrate, dtype=object)
    predictors = pd.DataFrame({
        "altitude_m": z_alt,
        "log_conductivity": standardise_columns(np.log(conductivity)),
        "substrate[gravel]": (substrate == "gravel").astype(float),
        "substrate[cobble]": (substrate == "cobble").astype(float)})
    return env, predictors


def _draw_counts(eta: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    sd = PARAMETERS["overdispersion_sd"]
    mu = np.exp(eta + rng.normal(0.0, sd, size=eta.shape))
    return rng.poisson(mu).astype(np.int64)
