"""Shared test settings: a non-interactive plotting backend, the demo files' location, and
which marked tests run.

Two markers (declared in pyproject.toml) depend on the machine. The README's test command must
pass on a machine with nothing but Python, and CI must run everything:

* ``browser`` tests need headless Chromium. Where it is missing they skip with a one-line
  reason; with ``SPATIAL_EV_REQUIRE_BROWSER=1`` (set by ``.ci/run``, which installs Chromium)
  a missing browser fails them instead.
* ``slow`` tests are seeded statistical studies and end-to-end runs (notebooks, the demo
  command) that take tens of seconds to minutes. They skip with a one-line reason
  unless ``SPATIAL_EV_RUN_SLOW=1`` (set by ``.ci/run``).

Both variables accept ``1`` (on) or ``0`` / empty / unset (off); any other value stops the
session with a usage error rather than being guessed at.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Mapping
from pathlib import Path

import matplotlib
import pytest

matplotlib.use("Agg")
os.environ.setdefault("MPLBACKEND", "Agg")

ROOT = Path(__file__).resolve().parents[1]

pytest_plugins = ["pytester"]  # tests/test_readme.py runs the hooks below in a small session

RUN_SLOW = "SPATIAL_EV_RUN_SLOW"
REQUIRE_BROWSER = "SPATIAL_EV_REQUIRE_BROWSER"


def switch_is_on(environ: Mapping[str, str], name: str) -> bool:
    """Read an on/off environment variable: "1" is on; "0", "" or unset is off."""
    value = environ.get(name, "").strip()
    if value not in ("", "0", "1"):
        raise pytest.UsageError(f"environment variable {name}={value!r}: use 1 (on) or 0 (off)")
    return value == "1"


def chromium_problem() -> str | None:
    """None when headless Chromium is available, else one line saying why it is not."""
    from browser_check import find_chromium

    try:
        find_chromium()
    except FileNotFoundError as exc:
        return " ".join(str(exc).split())
    return None


def marker_decision(markers: set[str], environ: Mapping[str, str],
                    chromium: Callable[[], str | None]) -> tuple[str, str] | None:
    """What to do with a test carrying ``markers``: None (run it), ("skip", reason) or
    ("fail", reason). ``chromium`` is asked (lazily) why the browser is unavailable."""
    if "slow" in markers and not switch_is_on(environ, RUN_SLOW):
        return "skip", f"slow study or end-to-end run; set {RUN_SLOW}=1 to run it (CI does)"
    if "browser" in markers:
        problem = chromium()
        if problem is not None:
            if switch_is_on(environ, REQUIRE_BROWSER):
                return "fail", f"{REQUIRE_BROWSER}=1 but {problem}"
            return "skip", f"{problem}; CI installs it and sets {REQUIRE_BROWSER}=1"
    return None


_REQUIRED_BUT_MISSING = pytest.StashKey[str]()


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    """Skip (or mark as failing) the slow and browser tests as :func:`marker_decision` says."""
    cache: list[str | None] = []

    def chromium() -> str | None:
        if not cache:
            cache.append(chromium_problem())
        return cache[0]

    for item in items:
        decision = marker_decision({m.name for m in item.iter_markers()}, os.environ, chromium)
        if decision is None:
            continue
        action, reason = decision
        if action == "skip":
            item.add_marker(pytest.mark.skip(reason=reason))
        else:
            item.stash[_REQUIRED_BUT_MISSING] = reason


def pytest_runtest_setup(item: pytest.Item) -> None:
    """Fail a required test whose requirement is missing (see pytest_collection_modifyitems)."""
    reason = item.stash.get(_REQUIRED_BUT_MISSING, None)
    if reason is not None:
        pytest.fail(reason, pytrace=False)


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
