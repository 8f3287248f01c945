"""Reduced validation study of the layout evaluation (validation/design_power.py), slow.

The full study and its reading: validation/design_power.md.
"""

from __future__ import annotations

import importlib.util
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]


def _study():
    spec = importlib.util.spec_from_file_location("design_power",
                                                  ROOT / "validation" / "design_power.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.mark.slow
def test_reduced_design_validation():
    # Reduced version of validation/design_power.py (20 simulations and true surveys per
    # layout, 4 independent pilots per landscape). The truth is the grid fixture's known
    # generating model, simulated directly and analysed by the same rule (analyse_survey);
    # every check is listed in design_power.verdicts and read in design_power.md.
    study = _study()
    res = study.study(n_sim=20, n_pilots=4, seed=11)
    checks = study.verdicts(res)
    assert len(checks) == 6 and checks["cells"].gt(0).all()
    assert checks["holds"].all(), checks.to_string()
    # classes a layout does not resolve are detected neither by the tool nor by the truth
    for table in res["single"].values():
        unresolved = table[table["resolution"] == "not resolved"]
        assert len(unresolved) >= 3
        assert (unresolved["power"] == 0).all() and (unresolved["true_power"] <= 0.1).all()
    # the checks can fail: a prediction 0.1 beyond its 2 SE breaks the fixed-landscape check
    moved = {**res, "pilots": {**res["pilots"]}}
    shifted = res["pilots"]["fixed"].copy()
    grid = (shifted["layout"] == "grid 20 m") & (shifted["objective"] == "scale:broad")
    shifted.loc[grid, "difference"] = 2 * shifted.loc[grid, "se"] + 0.1
    moved["pilots"]["fixed"] = shifted
    assert not study.verdicts(moved)["holds"].iloc[0]
