"""Validation of the layout evaluation (``spatial-ev design``) against known continuous truths.

``python validation/design_power.py [--quick] [--demo] [--simulations N] [--pilots K]``;
results and their reading in ``design_power.md``.

1. **Predicted against true power** on a 12 × 12 grid (10 m spacing) whose generating model is
   known everywhere: Poisson counts mixing a broad field, a fine field and two unstructured
   drivers that are properties of the sites. Two landscapes: *fixed* (one deterministic
   landscape; the tool runs conditional simulation) and *random* (a new stationary landscape for
   every survey; the tool runs its default unconditional simulation). The *true* power of a
   layout is the share of surveys drawn from the truth at its sites that the same analysis and
   detection rule (``analyse_survey``) detects. Layouts: the pilot grid and the 20 m and 30 m
   grids nested in it (40 m leaves 9 sites). Compared for one pilot (a), and over independent
   pilots (b), whose spread measures the pilot's own sampling error.
2. **Nested layouts with common random numbers**: for a subset ⊂ superset pair evaluated with
   one seed, power(superset) ≥ power(subset) − 2 SE for every objective (grids; with ``--demo``
   also the demo pilot ⊂ augment:add=40 and thin:every=2 ⊂ demo pilot).
3. **Thinning loses classes finest first** at the spacing the sampling-interval rule predicts:
   a class whose band lies entirely below 2 sampling intervals is not resolved.

:func:`verdicts` lists the checks; all must hold. Run time about 3 minutes with the defaults
on two cores (``--quick``, the slow test's version: about 20 s).
"""

from __future__ import annotations

import argparse
import math
import sys
import time
import warnings

import numpy as np
import pandas as pd
import shapely

from spatial_ev.design.evaluate import evaluate_design, layout_basis
from spatial_ev.design.layouts import CandidateLayout, grid_layout
from spatial_ev.design.simulate import (
    SimulationSettings,
    analyse_survey,
    layout_model,
    pilot_model,
)
from spatial_ev.errors import SpatialEVWarning
from spatial_ev.input.survey import Survey
from spatial_ev.pipeline.analysis import analyse
from spatial_ev.stats.transform import transform

SPACING, SIDE = 10.0, 12
EXTENT = SPACING * (SIDE - 1)
AREA = shapely.box(0, 0, EXTENT, EXTENT)
N_SPECIES = 10


#: the two truths of the grid fixture: "fixed" (one deterministic landscape, compared with the
#: tool's conditional simulation) and "random" (a new landscape for every survey, compared
#: with its unconditional simulation)
FIXTURES = ("fixed", "random")
#: wavelength bands (map units) and standard deviations of the random landscape's fields
RANDOM_FIELDS = {"broad": ((110.0, 220.0), 1.0), "fine": ((20.0, 30.0), 0.5)}
N_WAVES = 256


def _loadings() -> np.ndarray:
    return np.random.default_rng(20261202).normal(0, 0.9, (4, N_SPECIES))


def random_landscape(rng: np.random.Generator) -> dict:
    """One realisation of the random landscape: per field, N_WAVES plane waves with
    wavelengths log-uniform in its band, uniform directions and phases (a stationary,
    isotropic Gaussian field in the limit of many waves; written here without the package's
    own field code, so the check does not share it)."""
    out = {}
    for name, ((lo, hi), sd) in RANDOM_FIELDS.items():
        lam = np.exp(rng.uniform(np.log(lo), np.log(hi), N_WAVES))
        theta = rng.uniform(0, 2 * np.pi, N_WAVES)
        phase = rng.uniform(0, 2 * np.pi, N_WAVES)
        out[name] = (2 * np.pi / lam * np.cos(theta), 2 * np.pi / lam * np.sin(theta), phase,
                     sd)
    return out


def site_drivers(xy: np.ndarray) -> np.ndarray:
    """The two unstructured drivers at grid points: fixed properties of each site (the same
    value every survey, as a measured depth or salinity is), independent between sites."""
    table = np.random.default_rng(20261203).normal(size=(SIDE, SIDE, 2))
    i = np.rint(np.asarray(xy, dtype=float) / SPACING).astype(int)
    if (i < 0).any() or (i >= SIDE).any() or not np.allclose(i * SPACING, xy):
        raise ValueError("the grid fixture's drivers are defined at its grid points only")
    return table[i[:, 0], i[:, 1]]


def _field(xy: np.ndarray, waves: tuple) -> np.ndarray:
    kx, ky, phase, sd = waves
    arg = xy[:, :1] * kx + xy[:, 1:] * ky + phase
    return sd * math.sqrt(2.0 / N_WAVES) * np.cos(arg).sum(axis=1)


def truth_counts(xy: np.ndarray, rng: np.random.Generator,
                 landscape: dict | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Counts and drivers of the grid fixture's truth at grid points (map units): the fixed
    landscape without ``landscape``, else that realisation of the random one; the drivers
    are the sites' own (:func:`site_drivers`), the counts fresh Poisson draws from ``rng``."""
    x, y = xy[:, 0], xy[:, 1]
    if landscape is None:
        broad = np.cos(np.pi * x / EXTENT) + np.cos(np.pi * y / EXTENT)
        fine = np.cos(2 * np.pi * x / 45.0) * np.cos(2 * np.pi * y / 45.0)
    else:
        broad, fine = _field(xy, landscape["broad"]), _field(xy, landscape["fine"])
    drivers = site_drivers(xy)
    eta = 1.2 + np.column_stack([broad, fine, drivers]) @ _loadings()
    counts = rng.poisson(np.exp(eta))
    counts[:, 0] += 1
    return counts, drivers


def _survey(xy: np.ndarray, counts: np.ndarray, drivers: np.ndarray) -> Survey:
    ids = pd.Index([f"Q{i:03d}" for i in range(len(xy))], name="site")
    sites = pd.DataFrame(xy, index=ids, columns=["x", "y"])
    species = pd.DataFrame(counts, index=ids, columns=[f"T{j:02d}" for j in range(N_SPECIES)])
    env = pd.DataFrame(drivers, index=ids, columns=["depth", "salinity"])
    return Survey.from_frames(sites, species, env, local_unit="metre")


def grid_pilot(seed: int = 20261202, fixture: str = "fixed"):
    """The pilot: the truth sampled on the 12 × 12 grid, analysed with one scheme."""
    g = np.arange(SIDE) * SPACING
    gx, gy = np.meshgrid(g, g)
    xy = np.column_stack([gx.ravel(), gy.ravel()])
    rng = np.random.default_rng(seed)
    landscape = random_landscape(rng) if _fixture(fixture) == "random" else None
    counts, drivers = truth_counts(xy, rng, landscape)
    return analyse(_survey(xy, counts, drivers), spatial_weighting="single",
                   schemes="distance", n_permutations=99, seed=seed, trend="ignore")


def grid_layouts() -> list[CandidateLayout]:
    return [grid_layout(spacing=s, area=AREA, name=f"grid {int(s)} m")
            for s in (10.0, 20.0, 30.0)]


def _fixture(fixture: str) -> str:
    if fixture not in FIXTURES:
        raise ValueError(f"fixture must be one of {FIXTURES}; got {fixture!r}")
    return fixture


def true_power(pilot, layouts, n_surveys: int, seed: int, n_permutations: int = 99,
               fixture: str = "fixed"):
    """Share of surveys drawn from the truth at each layout that the analysis detects (a new
    landscape for every survey with the random fixture; the same survey index gives the same
    landscape at every layout)."""
    random = _fixture(fixture) == "random"
    model = pilot_model(pilot)
    alpha = float(pilot.settings.alpha)
    level = float(pilot.weighting.alpha_corrected)
    classes = tuple(f.scale_class.name for f in pilot.scale_fits)
    settings = SimulationSettings(alpha, level, n_permutations,
                                  max(n_permutations, math.ceil(4 / level) - 1),
                                  pilot.settings.trend, tuple(pilot.settings.scale_breaks),
                                  classes, model, step_tests=pilot.settings.step_tests)
    rows = []
    replicates = np.random.SeedSequence(seed).spawn(n_surveys)
    for lay in layouts:
        xy = lay.coords[["x", "y"]].to_numpy()
        basis, _, _ = layout_basis(xy, pilot.settings.chosen_scheme)
        lm, _ = layout_model(pilot, model, lay, basis, None)
        hits = {f"scale:{c}": 0 for c in classes} | {"environment": 0}
        for rep in replicates:
            rng = np.random.default_rng(rep)
            counts, drivers = truth_counts(xy, rng, random_landscape(rng) if random else None)
            Y = transform(counts, pilot.settings.transformation).to_numpy()
            env = pd.DataFrame((drivers - drivers.mean(0)) / drivers.std(0, ddof=1),
                               index=basis.vectors.index, columns=["depth", "salinity"])
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", SpatialEVWarning)
                out = analyse_survey(Y, env, lm, settings, rep)
            for k, v in out["detected"].items():
                hits[k] += bool(v)
        for obj, h in hits.items():
            rows.append({"layout": lay.name, "objective": obj, "true_power": h / n_surveys})
    return pd.DataFrame(rows)


def predict(pilot, n_sim: int, seed: int, fixture: str):
    """The tool's evaluation of the grid layouts from ``pilot``: conditional simulation (the
    pilot's patches kept in place) for the fixed landscape, unconditional simulation (a new
    landscape like the pilot's each time) for the random one."""
    truth_mode = "conditional" if _fixture(fixture) == "fixed" else "unconditional"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SpatialEVWarning)
        return evaluate_design(pilot, grid_layouts(), n_simulations=n_sim, n_permutations=99,
                               seed=seed, reference="none", truth=truth_mode)


def compare(pilot, n_sim: int, seed: int, fixture: str = "fixed") -> tuple[pd.DataFrame, object]:
    """Predicted (:func:`predict`) against true power per layout and objective."""
    layouts = grid_layouts()
    ev = predict(pilot, n_sim, seed, fixture)
    truth = true_power(pilot, layouts, n_sim, seed + 1, fixture=fixture)
    table = ev.power.merge(truth, on=["layout", "objective"])
    se_t = np.sqrt(table["true_power"] * (1 - table["true_power"]) / n_sim)
    table["combined_se"] = np.sqrt(table["mc_se"] ** 2 + se_t ** 2)
    table["difference"] = table["power"] - table["true_power"]
    return table[["layout", "objective", "resolution", "power", "true_power", "difference",
                  "combined_se"]], ev


def pilot_spread(n_pilots: int, n_sim: int, seed: int, truth: pd.DataFrame, n_true: int,
                 fixture: str) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Predictions from ``n_pilots`` independent pilots of one truth, against its true power.

    A prediction rests on one pilot, so besides the Monte Carlo error of its simulations it
    carries that pilot's sampling error: its realisation of the landscape (random fixture),
    its noise and its chance selections. The tool predicts power for what the pilot detected
    (``pilot_significant``); for an objective the pilot missed it reports the rate at which
    unselected structure happens to be detected and recommends nothing for it. So each
    objective is summarised over the pilots that detected it: their number, the mean and
    standard deviation of their predictions, the true power (``truth``, from ``n_true``
    surveys), the difference and its standard error.

    Returns the summary and the per-pilot predictions.
    """
    runs = []
    for k in range(n_pilots):
        ev = predict(grid_pilot(seed=20261300 + k, fixture=fixture), n_sim, seed, fixture)
        runs.append(ev.power[["layout", "objective", "pilot_significant", "power"]]
                    .assign(pilot=k))
    each = pd.concat(runs, ignore_index=True)
    found = each[each["pilot_significant"]]
    out = found.groupby(["layout", "objective"], sort=False)["power"].agg(
        pilots="size", predicted_mean="mean", predicted_sd="std").reset_index()
    out = out.merge(truth[["layout", "objective", "true_power"]], on=["layout", "objective"])
    out["difference"] = out["predicted_mean"] - out["true_power"]
    sd = out["predicted_sd"].fillna(0.0)
    out["se"] = np.sqrt(sd ** 2 / out["pilots"]
                        + out["true_power"] * (1 - out["true_power"]) / n_true)
    return out, each


def nested_check(ev, pairs) -> pd.DataFrame:
    """power(superset) − power(subset) per class, with the 2 SE allowance."""
    p = ev.power.set_index(["layout", "objective"])
    rows = []
    for sub, sup in pairs:
        for obj in ev.power["objective"].unique():
            a, b = p.loc[(sub, obj)], p.loc[(sup, obj)]
            se = math.sqrt(a["mc_se"] ** 2 + b["mc_se"] ** 2)
            rows.append({"subset": sub, "superset": sup, "objective": obj,
                         "subset_power": a["power"], "superset_power": b["power"],
                         "allowance_2se": 2 * se,
                         "holds": bool(b["power"] >= a["power"] - 2 * se)})
    return pd.DataFrame(rows)


def thinning_check(ev) -> pd.DataFrame:
    """Per grid spacing and class: status, and whether the sampling-interval rule predicts a
    loss (class band entirely below 2 sampling intervals)."""
    cov = ev.coverage.classes
    rows = []
    for r in cov.itertuples():
        spacing = float(r.layout.split()[1])
        rows.append({"layout": r.layout, "spacing": spacing, "scale_class": r.scale_class,
                     "upper": r.upper, "rule_says_lost": bool(r.upper < 2 * spacing),
                     "status": r.status})
    return pd.DataFrame(rows)


def demo_nested(n_sim: int, seed: int) -> pd.DataFrame:
    from spatial_ev.datasets.mudflat import generate_demo_survey

    demo = generate_demo_survey()
    pilot = analyse(Survey.from_frames(demo.sites, demo.species, demo.environment),
                    spatial_weighting="single", schemes="distance", n_permutations=99,
                    seed=20240917)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SpatialEVWarning)
        ev = evaluate_design(pilot, ["augment:add=40", "thin:every=2"], n_simulations=n_sim,
                             n_permutations=99, seed=seed)
    return nested_check(ev, [("pilot", "augment:add=40"), ("thin:every=2", "pilot")])


#: power differences below this do not change a layout decision (absolute tolerance beside
#: the statistical one, for cells whose true power is 0 or 1 and whose SE is then near 0)
TOLERANCE = 0.05


def study(n_sim: int, n_pilots: int, seed: int) -> dict:
    """Every table of the study: single-pilot comparisons (``single``), the spread over
    independent pilots (``pilots``) per fixture, and the nested and thinning checks."""
    out: dict = {"single": {}, "evaluations": {}, "pilots": {}, "missed": {}, "bounds": {}}
    for fixture in FIXTURES:
        pilot = grid_pilot(fixture=fixture)
        table, ev = compare(pilot, n_sim, seed, fixture)
        out["single"][fixture], out["evaluations"][fixture] = table, ev
        out["bounds"][fixture] = [round(b, 1) for b in pilot.settings.scale_breaks]
        spread, each = pilot_spread(n_pilots, max(n_sim // 4, 20), seed, table, n_sim, fixture)
        out["pilots"][fixture] = spread
        out["missed"][fixture] = each.groupby("objective")["pilot_significant"].apply(
            lambda v: int((~v).sum())).to_dict()
    out["nested"] = {f: nested_check(ev, [("grid 30 m", "grid 10 m"),
                                          ("grid 20 m", "grid 10 m")])
                     for f, ev in out["evaluations"].items()}
    out["thinning"] = thinning_check(out["evaluations"]["random"])
    return out


def verdicts(res: dict) -> pd.DataFrame:
    """The study's checks, one row each, with whether it holds.

    * fixed landscape, conditional simulation: over independent pilots, the mean predicted
      power of every objective the pilots detected is within 2 SE (or TOLERANCE) of the truth;
    * random landscape, unconditional simulation: the same at the pilot layout for the
      environment and the broad and fine classes (the classes the truth has); at thinner
      layouts the prediction is not above the truth by more than 2 SE (it may be below:
      conservative); the medium class, absent from the truth, is reported, not checked;
    * nested layouts (common random numbers): power(superset) ≥ power(subset) − 2 SE;
    * thinning: a class whose band lies below 2 sampling intervals is not resolved, and
      classes are lost finest first.
    """
    rows = []
    fixed = res["pilots"]["fixed"]
    close = (np.abs(fixed["difference"]) <= 2 * fixed["se"] + 1e-12) | \
        (np.abs(fixed["difference"]) <= TOLERANCE)
    rows.append({"check": "fixed landscape: mean prediction within 2 SE (or 0.05) of the truth",
                 "cells": len(fixed), "failing": int((~close).sum())})
    rnd = res["pilots"]["random"]
    real = rnd["objective"] != "scale:medium"
    at_pilot = real & (rnd["layout"] == "grid 10 m")
    close = (np.abs(rnd["difference"]) <= 2 * rnd["se"] + 1e-12) | \
        (np.abs(rnd["difference"]) <= TOLERANCE)
    rows.append({"check": "random landscape, pilot layout: within 2 SE (or 0.05) of the truth",
                 "cells": int(at_pilot.sum()), "failing": int((at_pilot & ~close).sum())})
    thinner = real & (rnd["layout"] != "grid 10 m")
    over = rnd["difference"] > 2 * rnd["se"] + TOLERANCE
    rows.append({"check": "random landscape, thinner layouts: not above the truth by > 2 SE",
                 "cells": int(thinner.sum()), "failing": int((thinner & over).sum())})
    for fixture, nested in res["nested"].items():
        rows.append({"check": f"nested grids ({fixture}): superset ≥ subset − 2 SE",
                     "cells": len(nested), "failing": int((~nested["holds"]).sum())})
    thin = res["thinning"]
    bad = int((thin.loc[thin["rule_says_lost"], "status"] != "not resolved").sum())
    order = {"broad": 0, "medium": 1, "fine": 2}
    for _, part in thin.groupby("layout"):
        lost = part.loc[part["status"] == "not resolved", "scale_class"].map(order)
        kept = part.loc[part["status"] != "not resolved", "scale_class"].map(order)
        bad += int(len(lost) > 0 and len(kept) > 0 and kept.max() >= lost.min())
    rows.append({"check": "thinning: lost where the sampling-interval rule says, finest first",
                 "cells": len(thin), "failing": bad})
    out = pd.DataFrame(rows)
    out["holds"] = out["failing"] == 0
    return out


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="the reduced version (tests)")
    parser.add_argument("--demo", action="store_true", help="also the demo's nested layouts")
    parser.add_argument("--seed", type=int, default=11)
    parser.add_argument("--simulations", type=int, default=200,
                        help="simulations and true surveys per layout (default 200)")
    parser.add_argument("--pilots", type=int, default=10,
                        help="independent pilots per landscape (default 10)")
    args = parser.parse_args(argv)
    n_sim = 20 if args.quick else args.simulations
    n_pilots = 4 if args.quick else args.pilots
    pd.set_option("display.width", 160)
    start = time.time()
    res = study(n_sim, n_pilots, args.seed)
    for number, fixture in zip("ab", FIXTURES):
        how = "conditional" if fixture == "fixed" else "unconditional"
        table = res["single"][fixture]
        print(f"1{number}. {fixture} landscape, one pilot, {how} simulation: predicted vs true "
              f"power ({n_sim} simulations and {n_sim} true surveys per layout, seed "
              f"{args.seed}); pilot class bounds {res['bounds'][fixture]}")
        print(table.round(3).to_string(index=False))
        outside = table[np.abs(table["difference"]) > 2 * table["combined_se"] + 1e-12]
        print(f"   beyond 2 Monte Carlo SE: {len(outside)} of {len(table)} (a single pilot's "
              f"sampling error is not in this SE; see 1c/1d)")
    for number, fixture in zip("cd", FIXTURES):
        print(f"1{number}. {fixture} landscape, {n_pilots} independent pilots "
              f"({max(n_sim // 4, 20)} simulations per layout each), over the pilots that "
              f"detected each objective; pilots x layouts that missed it: "
              f"{res['missed'][fixture]}")
        print(res["pilots"][fixture].round(3).to_string(index=False))
    for fixture, nested in res["nested"].items():
        print(f"2. nested grids, common random numbers ({fixture} landscape)")
        print(nested.round(3).to_string(index=False))
    print("3. thinning the grid (random landscape)")
    print(res["thinning"].to_string(index=False))
    if args.demo:
        print("2b. demo pilot, nested layouts")
        print(demo_nested(n_sim, args.seed).round(3).to_string(index=False))
    print("Checks")
    print(verdicts(res).to_string(index=False))
    print(f"({time.time() - start:.0f} s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
