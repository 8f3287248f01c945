"""The demo repeated survey: the invented mudflat surveyed in three successive years.

Scenario (fictional): the 220 cores of the demo mudflat (:mod:`spatial_ev.datasets.mudflat`:
same site ids, positions and CRS, EPSG:32630) are resampled in 2022, 2023 and 2024; forty
invented taxa (``BTX01`` … ``BTX40``) are counted in each core each year.

Generating model (all parameters in :data:`PARAMETERS`; numpy only; one seed):

* ``shore`` (cross-shore gradient) and ``broad`` (patches a few hundred metres across) are the
  same every year — the stable broad structure;
* ``moving``: a plane wave of 180 m wavelength whose crests move by a third of a wavelength
  each year (phase 0, 2π/3, 4π/3) — a fine-scale structure that changes position between
  surveys, i.e. a space–time interaction;
* ``decline``: in the last survey only, at the sites within 90 m of a centre on the mudflat,
  38 of the 40 taxa drop to about 0.25 % of their expected count (log expected count − 6) —
  a cluster of sites that lose most of their species;
* log expected count of taxon j at site i in year t = intercept_j + a_j·shore_i + b_j·broad_i
  + c_j·moving_it − 6·decline_ijt + an overdispersion deviation N(0, 0.3²) drawn anew for every
  site, taxon and year; counts are Poisson draws.

:func:`generate_resurvey` with ``moving=False, decline=False`` gives the no-change variant
(only sampling noise differs between years), used to measure the type I error of the
interaction test; ``replicate`` redraws the noise with everything else fixed.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from spatial_ev.datasets.mudflat import ORIGIN, generate_demo_survey, standardise_columns

__all__ = ["Resurvey", "generate_resurvey", "write_resurvey", "PARAMETERS"]

PARAMETERS: dict[str, Any] = {
    "seed": 20250611,
    "years": [2022, 2023, 2024],
    "n_species": 40,
    "log_mean_count": {"mean": 1.9, "sd": 0.6},
    "response_sd": {"shore": 0.5, "broad": 0.6, "moving": 0.5},
    "moving": {"wavelength_m": 180.0, "direction_deg": 30.0,
               "phase_per_year_rad": 2.0943951023931953},
    "decline": {"centre_offset_m": [420.0, 220.0], "radius_m": 90.0,
                "fraction_of_taxa": 0.95, "log_drop": 6.0},
    "overdispersion_sd": 0.3,
}


@dataclass(frozen=True)
class Resurvey:
    """The generated repeated survey.

    Attributes
    ----------
    sites : geopandas.GeoDataFrame
        The 220 mudflat sites (column ``zone``), EPSG:32630, index ``site_id``.
    species : pandas.DataFrame
        Long form, 660 rows: columns ``site_id``, ``year``, ``BTX01`` … ``BTX40`` (int64).
    truth : dict
        Parameters, the declining sites and the taxa that decline.
    """

    sites: Any
    species: pd.DataFrame
    truth: dict


@lru_cache(maxsize=1)
def _mudflat_sites():
    """The demo mudflat's sites (generated once per process; callers get a copy)."""
    return generate_demo_survey().sites


def _fields(u: np.ndarray, v: np.ndarray, years: list) -> dict[str, np.ndarray]:
    p = PARAMETERS
    shore = standardise_columns(v + 30.0 * np.sin(2 * np.pi * u / 700.0))
    broad = standardise_columns(np.cos(2 * np.pi * (u - 150.0) / 450.0)
                                * np.cos(2 * np.pi * v / 600.0)
                                + 0.6 * np.sin(2 * np.pi * (u + v) / 520.0))
    m = p["moving"]
    angle = np.radians(m["direction_deg"])
    along = (u * np.cos(angle) + v * np.sin(angle)) * 2 * np.pi / m["wavelength_m"]
    phase = m["phase_per_year_rad"] * np.arange(len(years))
    moving = np.sqrt(2.0) * np.cos(along[None, :] - phase[:, None])        # (t, n), unit var
    d = p["decline"]
    centre = np.asarray(d["centre_offset_m"])
    cluster = np.hypot(u - centre[0], v - centre[1]) <= d["radius_m"]
    return {"shore": shore, "broad": broad, "moving": moving, "cluster": cluster}


def generate_resurvey(*, moving: bool = True, decline: bool = True,
                      replicate: int = 0) -> Resurvey:
    """Generate the demo repeated survey (deterministic for given arguments).

    Parameters
    ----------
    moving : bool
        Include the fine-scale structure that moves between years (the interaction).
    decline : bool
        Include the cluster of sites losing taxa in the last year.
    replicate : int
        0 for the shipped survey; other values redraw only the overdispersion and Poisson
        noise (for simulation studies).

    Returns
    -------
    Resurvey

    Examples
    --------
    >>> r = generate_resurvey()  # doctest: +SKIP
    >>> r.species.shape  # doctest: +SKIP
    (660, 42)
    """
    p = PARAMETERS
    base = _mudflat_sites().copy()
    u = base.geometry.x.to_numpy() - ORIGIN[0]
    v = base.geometry.y.to_numpy() - ORIGIN[1]
    years = list(p["years"])
    f = _fields(u, v, years)
    rng = np.random.default_rng(p["seed"])
    k = p["n_species"]
    sd = p["response_sd"]
    intercept = rng.normal(p["log_mean_count"]["mean"], p["log_mean_count"]["sd"], size=k)
    coef = {name: rng.normal(0.0, sd[name], size=k) for name in ("shore", "broad", "moving")}
    d = p["decline"]
    declining_taxa = np.sort(rng.choice(k, size=int(round(d["fraction_of_taxa"] * k)),
                                        replace=False))
    t, n = len(years), u.size
    eta = (intercept + np.outer(f["shore"], coef["shore"])
           + np.outer(f["broad"], coef["broad"]))[None, :, :].repeat(t, axis=0)   # (t, n, k)
    if moving:
        eta = eta + f["moving"][:, :, None] * coef["moving"][None, None, :]
    if decline:
        drop = np.zeros((n, k))
        drop[np.ix_(f["cluster"], declining_taxa)] = d["log_drop"]
        eta[-1] -= drop
    noise = np.random.default_rng([p["seed"], 1, int(replicate)])
    mu = np.exp(eta + noise.normal(0.0, p["overdispersion_sd"], size=eta.shape))
    counts = noise.poisson(mu).astype(np.int64)
    names = [f"BTX{j + 1:02d}" for j in range(k)]
    species = pd.DataFrame(counts.reshape(t * n, k), columns=names)
    species.insert(0, "year", np.repeat(years, n))
    species.insert(0, "site_id", np.tile(base.index.to_numpy(), t))
    truth = {
        "description": "Invented repeated mudflat survey generated by "
                       "spatial_ev.datasets.resurvey (see data_demo/resurvey/README.md).",
        "parameters": p, "crs": "EPSG:32630", "n_sites": int(n), "n_species": k,
        "years": years, "moving_structure": bool(moving), "declining_cluster": bool(decline),
        "declining_sites": [str(s) for s in base.index[f["cluster"]]] if decline else [],
        "declining_taxa": [names[j] for j in declining_taxa] if decline else [],
    }
    return Resurvey(sites=base, species=species, truth=truth)


def write_resurvey(folder: str | os.PathLike, *, survey: Resurvey | None = None
                   ) -> dict[str, Path]:
    """Write ``sites.gpkg``, ``species.csv`` (long form) and ``truth.json`` into ``folder``.

    The folder must exist; files with these names are replaced. Returns role → path.

    Examples
    --------
    >>> import tempfile
    >>> sorted(write_resurvey(tempfile.mkdtemp()))  # doctest: +SKIP
    ['sites', 'species', 'truth']
    """
    from spatial_ev.report.layers import write_layers, write_table

    folder = Path(folder)
    survey = generate_resurvey() if survey is None else survey
    paths = {"sites": folder / "sites.gpkg", "species": folder / "species.csv",
             "truth": folder / "truth.json"}
    if paths["sites"].exists():
        paths["sites"].unlink()
    write_layers(paths["sites"], {"sites": survey.sites})
    write_table(paths["species"], survey.species, index=False)
    paths["truth"].write_text(json.dumps(survey.truth, indent=2) + "\n", encoding="utf-8")
    return paths
