"""Tests of rebuilding a pilot analysis from a run folder (spatial_ev.pipeline.rerun)."""

from __future__ import annotations

import json
import shutil
import sys
from unittest import mock

import pytest

from conftest import make_small_survey_tables
from spatial_ev.cli.main import main
from spatial_ev.errors import DesignError, InputError
from spatial_ev.pipeline.rerun import load_pilot


@pytest.fixture(scope="module")
def run_folder(tmp_path_factory):
    base = tmp_path_factory.mktemp("pilot")
    sites, species, env = make_small_survey_tables()
    paths = {"sites": base / "sites.csv", "species": base / "species.csv",
             "environment": base / "environment.csv"}
    sites.to_csv(paths["sites"], index=False)
    species.to_csv(paths["species"], index=False)
    env.to_csv(paths["environment"], index=False)
    out = base / "run"
    argv = ["run", "--sites", str(paths["sites"]), "--species", str(paths["species"]),
            "--environment", str(paths["environment"]), "--x", "easting", "--y", "northing",
            "--crs", "EPSG:32633", "--weighting", "distance", "--permutations", "99",
            "--seed", "20261202", "--quiet", "--out", str(out)]
    with mock.patch.object(sys, "argv", ["spatial-ev", *argv]):  # recorded in the manifest
        assert main(argv) == 0
    return out, paths


class TestLoadPilot:
    def test_rebuild_is_identical(self, run_folder):
        out, _ = run_folder
        pilot = load_pilot(out)
        summary = json.loads((out / "summary.json").read_text())
        rebuilt = pilot.summary_dict()
        for key, value in summary["fractions"].items():
            assert rebuilt["fractions"][key] == pytest.approx(value, abs=1e-9)
        assert rebuilt["selected"] == summary["selected"]
        assert rebuilt["seed"] == 20261202 and pilot.settings["n_permutations"] == 99
        assert not any("differ" in n for n in pilot.notes)

    def test_changed_input(self, run_folder, tmp_path):
        out, paths = run_folder
        copy = tmp_path / "run"
        shutil.copytree(out, copy)
        manifest = json.loads((copy / "manifest.json").read_text())
        changed = tmp_path / "species.csv"
        changed.write_text(paths["species"].read_text().replace(",1,", ",2,", 1))
        manifest["inputs"]["species"]["path"] = str(changed)
        (copy / "manifest.json").write_text(json.dumps(manifest))
        with pytest.raises(DesignError, match=r"species.csv' \(species\) has changed since the "
                                              r"run: SHA-256"):
            load_pilot(copy)

    def test_missing_input(self, run_folder, tmp_path):
        out, _ = run_folder
        copy = tmp_path / "run"
        shutil.copytree(out, copy)
        manifest = json.loads((copy / "manifest.json").read_text())
        manifest["inputs"]["environment"]["path"] = str(tmp_path / "gone.csv")
        (copy / "manifest.json").write_text(json.dumps(manifest))
        with pytest.raises(DesignError, match=r"gone.csv' \(environment\) recorded in the "
                                              r"manifest is missing"):
            load_pilot(copy)

    def test_not_a_run_folder(self, tmp_path):
        with pytest.raises(DesignError, match="has no manifest.json"):
            load_pilot(tmp_path)
        (tmp_path / "manifest.json").write_text("{not json")
        with pytest.raises(DesignError, match="is not valid JSON"):
            load_pilot(tmp_path)

    def test_bad_argument(self):
        with pytest.raises(InputError, match="`folder` must be the path of a run folder"):
            load_pilot(42)


class TestDesignFromFolder:
    def test_evaluate_design_takes_the_folder(self, run_folder):
        from spatial_ev.design.evaluate import evaluate_design, spectral_coverage

        out, _ = run_folder
        cov = spectral_coverage(out, ["thin:every=2"])
        assert cov.layouts.loc["thin:every=2", "n_sites"] == 32
        ev = evaluate_design(out, ["thin:every=2"], n_simulations=2, n_permutations=99,
                             seed=20261202, reference="none")
        assert ev.settings["pilot_seed"] == 20261202 and len(ev.power) >= 2
