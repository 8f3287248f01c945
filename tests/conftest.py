"""Shared test settings: a non-interactive plotting backend and the demo files' location."""

from __future__ import annotations

import os
from pathlib import Path

import matplotlib
import pytest

matplotlib.use("Agg")
os.environ.setdefault("MPLBACKEND", "Agg")

ROOT = Path(__file__).resolve().parents[1]


def load_validation_studies():
    """The simulation studies of validation/error_rates.py, imported once as a module (the
    tests and the validation script share them)."""
    import importlib.util
    import sys

    if "error_rates" in sys.modules:
        return sys.modules["error_rates"]
    spec = importlib.util.spec_from_file_location("error_rates",
                                                  ROOT / "validation" / "error_rates.py")
    module = importlib.util.module_from_spec(spec)
    sys.modules["error_rates"] = module      # dataclasses look their module up there
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="session")
def repo_root() -> Path:
    """The repository's top folder."""
    return ROOT


def make_small_survey_tables(n_side: int = 8, n_species: int = 12, *, seed: int = 20261202,
                             geographic: bool = False):
    """A small invented survey: an n_side x n_side jittered grid, a broad spatial gradient and
    one environmental driver, Poisson counts. Returns (sites, species, environment) frames
    with a ``site`` id column. Coordinates are UTM 33N metres, or lon/lat degrees near 60° N.
    """
    import numpy as np
    import pandas as pd

    rng = np.random.default_rng(seed)
    gx, gy = np.meshgrid(np.arange(n_side) * 50.0, np.arange(n_side) * 50.0)
    x = gx.ravel() + rng.uniform(-5, 5, gx.size)
    y = gy.ravel() + rng.uniform(-5, 5, gy.size)
    n = x.size
    ids = [f"P{i:03d}" for i in range(n)]
    broad = np.cos(np.pi * x / x.max()) + np.sin(np.pi * y / y.max())
    depth = 2.0 + 0.8 * rng.standard_normal(n)
    load = rng.normal(0, 0.8, (3, n_species))
    eta = 1.0 + np.column_stack([broad, (depth - 2.0), rng.standard_normal(n) * 0.3]) @ load
    counts = rng.poisson(np.exp(eta))
    counts[:, 0] += 1
    if geographic:
        sites = pd.DataFrame({"site": ids, "lon": 15.0 + x / 55_800.0, "lat": 60.0 + y / 111_200.0})
    else:
        sites = pd.DataFrame({"site": ids, "easting": 500_000.0 + x,
                              "northing": 6_650_000.0 + y})
    species = pd.DataFrame(counts, columns=[f"SP{j:02d}" for j in range(n_species)])
    species.insert(0, "site", ids)
    env = pd.DataFrame({"site": ids, "depth_m": depth.round(3),
                        "substrate": np.where(rng.uniform(size=n) < 0.5, "mud", "sand")})
    return sites, species, env


@pytest.fixture()
def small_survey_files(tmp_path):
    """Write the small survey as CSV files; return a dict of paths."""
    sites, species, env = make_small_survey_tables()
    paths = {"sites": tmp_path / "sites.csv", "species": tmp_path / "species.csv",
             "environment": tmp_path / "environment.csv"}
    sites.to_csv(paths["sites"], index=False)
    species.to_csv(paths["species"], index=False)
    env.to_csv(paths["environment"], index=False)
    return paths
