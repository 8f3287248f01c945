"""Validation of the layout evaluation (``spatial-ev design``) against known continuous truths.

Three checks, each printed as a table (``python validation/design_power.py [--quick]``;
results and their reading in ``design_power.md``):

1. **Predicted against true power** on a 12 × 12 grid fixture (10 m spacing) whose truth is
   continuous and known everywhere: a broad field (two half-waves across the extent, 220 m), a
   fine field (45 m waves), two unstructured drivers, Poisson counts. A pilot survey is drawn
   on the grid and analysed; the tool predicts each layout's power from that pilot. The *true*
   power of a layout is the share of surveys drawn from the truth itself at the layout's sites
   (fresh drivers and counts) that the same analysis and detection rule (``analyse_survey``)
   detect. Layouts: the pilot grid and regular grids of 20 and 30 m nested in it (40 m leaves 9 sites).
2. **Nested layouts with common random numbers**: for a subset ⊂ superset pair evaluated with
   one seed, power(superset) ≥ power(subset) − 2 SE for every class (grid fixture: 20 m
   and 30 m ⊂ pilot grid; with ``--demo``, also the demo pilot ⊂ augment:add=40 and thin:every=2 ⊂
   demo pilot).
3. **Thinning loses classes finest first** at the spacing the sampling-interval rule predicts:
   a class whose band lies entirely below 2 sampling intervals is not resolved and not
   recommended; classes are lost in order fine → medium → broad as spacing grows.

Run time: about 3 minutes with the defaults on two cores (``--quick``: the reduced version
the slow test runs).
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


def _loadings() -> np.ndarray:
    return np.random.default_rng(20261202).normal(0, 0.9, (4, N_SPECIES))


def truth_counts(xy: np.ndarray, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Counts and drivers of the grid fixture's truth at any points (map units)."""
    x, y = xy[:, 0], xy[:, 1]
    broad = np.cos(np.pi * x / EXTENT) + np.cos(np.pi * y / EXTENT)
    fine = np.cos(2 * np.pi * x / 45.0) * np.cos(2 * np.pi * y / 45.0)
    drivers = rng.normal(size=(len(xy), 2))
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


def grid_pilot(seed: int = 20261202):
    """The pilot: the truth sampled on the 12 × 12 grid, analysed with one scheme."""
    g = np.arange(SIDE) * SPACING
    gx, gy = np.meshgrid(g, g)
    xy = np.column_stack([gx.ravel(), gy.ravel()])
    counts, drivers = truth_counts(xy, np.random.default_rng(seed))
    return analyse(_survey(xy, counts, drivers), spatial_weighting="single",
                   schemes="distance", n_permutations=99, seed=seed, trend="ignore")


def grid_layouts() -> list[CandidateLayout]:
    return [grid_layout(spacing=s, area=AREA, name=f"grid {int(s)} m")
            for s in (10.0, 20.0, 30.0)]


def true_power(pilot, layouts, n_surveys: int, seed: int, n_permutations: int = 99):
    """Share of surveys drawn from the truth at each layout that the analysis detects."""
    model = pilot_model(pilot)
    alpha = float(pilot.settings.alpha)
    level = float(pilot.weighting.alpha_corrected)
    classes = tuple(f.scale_class.name for f in pilot.scale_fits)
    settings = SimulationSettings(alpha, level, n_permutations,
                                  max(n_permutations, math.ceil(4 / level) - 1),
                                  pilot.settings.trend, tuple(pilot.settings.scale_breaks),
                                  classes, model)
    rows = []
    replicates = np.random.SeedSequence(seed).spawn(n_surveys)
    for lay in layouts:
        xy = lay.coords[["x", "y"]].to_numpy()
        basis, _, _ = layout_basis(xy, pilot.settings.chosen_scheme)
        lm, _ = layout_model(pilot, model, lay, basis, None)
        hits = {f"scale:{c}": 0 for c in classes} | {"environment": 0}
        for rep in replicates:
            counts, drivers = truth_counts(xy, np.random.default_rng(rep))
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


def compare(pilot, n_sim: int, seed: int) -> tuple[pd.DataFrame, object]:
    layouts = grid_layouts()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SpatialEVWarning)
        ev = evaluate_design(pilot, layouts, n_simulations=n_sim, n_permutations=99,
                             seed=seed, reference="none")
    truth = true_power(pilot, layouts, n_sim, seed + 1)
    table = ev.power.merge(truth, on=["layout", "objective"])
    se_t = np.sqrt(table["true_power"] * (1 - table["true_power"]) / n_sim)
    table["combined_se"] = np.sqrt(table["mc_se"] ** 2 + se_t ** 2)
    table["difference"] = table["power"] - table["true_power"]
    return table[["layout", "objective", "resolution", "power", "true_power", "difference",
                  "combined_se"]], ev


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


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="the reduced version (tests)")
    parser.add_argument("--demo", action="store_true", help="also the demo's nested layouts")
    parser.add_argument("--seed", type=int, default=11)
    args = parser.parse_args(argv)
    n_sim = 20 if args.quick else 60
    pd.set_option("display.width", 160)
    start = time.time()
    pilot = grid_pilot()
    table, ev = compare(pilot, n_sim, args.seed)
    print(f"1. predicted vs true power, grid fixture ({n_sim} simulations and {n_sim} true "
          f"surveys per layout, seed {args.seed})")
    print(table.round(3).to_string(index=False))
    outside = table[np.abs(table["difference"]) > 2 * table["combined_se"] + 1e-12]
    print(f"   beyond 2 combined SE: {len(outside)} of {len(table)}")
    nested = nested_check(ev, [("grid 30 m", "grid 10 m"), ("grid 20 m", "grid 10 m")])
    print("2. nested grids, common random numbers")
    print(nested.round(3).to_string(index=False))
    print("3. thinning the grid")
    print(thinning_check(ev).to_string(index=False))
    if args.demo:
        print("2b. demo pilot, nested layouts")
        print(demo_nested(n_sim, args.seed).round(3).to_string(index=False))
    print(f"({time.time() - start:.0f} s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
