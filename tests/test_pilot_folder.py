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
from spatial_ev.report.summary import summary_record


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
        rebuilt = summary_record(pilot)
        for key, value in summary["fractions"].items():
            assert rebuilt["fractions"][key] == pytest.approx(value, abs=1e-9)
        assert rebuilt["selected"] == summary["selected"]
        assert rebuilt["seed"] == 20261202 and pilot.settings.n_permutations == 99
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
        # the folder's own copy is intact: the analysed file is read from it
        assert load_pilot(copy).survey.sources["species"] == str(copy / "inputs" / "species.csv")
        kept = copy / "inputs" / "species.csv"
        kept.write_text(kept.read_text() + "\n")
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
        (copy / "inputs" / "environment.csv").unlink()
        with pytest.raises(DesignError, match=r"gone.csv' \(environment\) recorded in the "
                                              r"manifest is missing"):
            load_pilot(copy)

    def test_inputs_copied_with_their_hashes(self, run_folder):
        """Every input is copied into the run folder; its SHA-256 (hashlib as the oracle of
        the FIPS 180-4 digest) is the original file's."""
        import hashlib

        out, paths = run_folder
        manifest = json.loads((out / "manifest.json").read_text())
        for role, path in paths.items():
            entry = manifest["inputs"][role]
            assert entry["copy"] == f"inputs/{path.name}"
            digest = hashlib.sha256((out / entry["copy"]).read_bytes()).hexdigest()
            assert digest == entry["sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()

    def test_moved_folder_is_read_by_design(self, run_folder, tmp_path, capsys):
        """A run folder moved away from its inputs (which are then gone) still rebuilds the
        same pilot, and `design` reads it."""
        out, paths = run_folder
        moved = tmp_path / "elsewhere" / "run"
        shutil.copytree(out, moved)
        hidden = tmp_path / "hidden"
        hidden.mkdir()
        for path in paths.values():
            shutil.move(path, hidden / path.name)
        try:
            pilot = load_pilot(moved)
            assert str(moved / "inputs") in pilot.survey.sources["sites"]
            summary = json.loads((moved / "summary.json").read_text())
            assert summary_record(pilot)["fractions"] == pytest.approx(summary["fractions"],
                                                                      abs=1e-9)
            design = tmp_path / "design"
            assert main(["design", "--pilot", str(moved), "--layout", "thin:every=2",
                         "--simulations", "2", "--permutations", "99", "--seed", "7",
                         "--quiet", "--out", str(design)]) == 0, capsys.readouterr().err
            assert (design / "design.json").is_file()
        finally:
            for path in paths.values():
                shutil.move(hidden / path.name, path)

    def test_not_a_run_folder(self, tmp_path):
        with pytest.raises(DesignError, match="has no manifest.json"):
            load_pilot(tmp_path)
        (tmp_path / "manifest.json").write_text("{not json")
        with pytest.raises(DesignError, match="is not valid JSON"):
            load_pilot(tmp_path)

    def test_bad_argument(self):
        with pytest.raises(InputError, match="`folder` must be the path of a run folder"):
            load_pilot(42)


    def test_changed_fractions_are_noted_on_a_new_result(self, run_folder, tmp_path):
        # the rebuilt pilot is frozen: a note about a differing summary.json goes into a new
        # result (dataclasses.replace), the analysis is never modified after construction
        out, _ = run_folder
        copy = tmp_path / "run"
        shutil.copytree(out, copy)
        summary = json.loads((copy / "summary.json").read_text())
        summary["fractions"]["shared"] += 0.1
        (copy / "summary.json").write_text(json.dumps(summary))
        pilot = load_pilot(copy)
        assert sum("differ from the run folder's summary.json" in n for n in pilot.notes) == 1


class TestDesignFromFolder:
    def test_evaluate_design_takes_the_loaded_pilot(self, run_folder):
        from spatial_ev.design.evaluate import evaluate_design, spectral_coverage

        out, _ = run_folder
        pilot = load_pilot(out)  # loading the folder is the caller's explicit step
        cov = spectral_coverage(pilot, ["thin:every=2"])
        assert cov.layouts.loc["thin:every=2", "n_sites"] == 32
        ev = evaluate_design(pilot, ["thin:every=2"], n_simulations=2, n_permutations=99,
                             seed=20261202, reference="none")
        assert ev.settings.pilot_seed == 20261202 and len(ev.power) >= 2

    def test_a_folder_path_is_refused(self, run_folder):
        # the design floor never reads a run folder or re-runs an analysis by itself
        from spatial_ev.design.evaluate import evaluate_design, spectral_coverage

        out, _ = run_folder
        for call in (lambda: spectral_coverage(out, ["thin:every=2"]),
                     lambda: evaluate_design(str(out), ["thin:every=2"], n_simulations=2)):
            with pytest.raises(InputError, match=r"`pilot` must be an Analysis; got the path "
                                                 r".*load_pilot\(folder\)"):
                call()
