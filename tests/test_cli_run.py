"""Tests of ``spatial-ev run`` and ``spatial-ev demo`` (run folder contract, config, errors)."""

from __future__ import annotations

import json

import geopandas as gpd
import pytest

from conftest import make_small_survey_tables
from spatial_ev.cli.main import main

FAST = ["--weighting", "distance", "--permutations", "99", "--seed", "20261202", "--quiet"]
RUN_FILES = {"summary.json", "manifest.json", "report.html", "maps.gpkg", "figures", "tables"}


def run_args(paths, out, *extra):
    return ["run", "--sites", str(paths["sites"]), "--species", str(paths["species"]),
            "--environment", str(paths["environment"]), "--x", "easting", "--y", "northing",
            "--crs", "EPSG:32633", "--out", str(out), *FAST, *extra]


def leftovers(folder):
    return [p.name for p in folder.iterdir() if ".partial-" in p.name or ".old-" in p.name]


class TestRun:
    def test_csv_projected(self, small_survey_files, tmp_path, capsys):
        out = tmp_path / "run1"
        assert main(run_args(small_survey_files, out)) == 0
        assert RUN_FILES <= {p.name for p in out.iterdir()}
        summary = json.loads((out / "summary.json").read_text())
        assert summary["n_sites"] == 64 and summary["n_species"] == 12
        assert summary["crs"].startswith("EPSG:32633")
        assert summary["distance_unit"] == "metre"
        assert summary["permutations"] == 99 and summary["seed"] == 20261202
        manifest = json.loads((out / "manifest.json").read_text())
        assert set(manifest["inputs"]) == {"sites", "species", "environment"}
        assert all(len(v["sha256"]) == 64 for v in manifest["inputs"].values())
        assert manifest["parameters"]["n_permutations"] == 99
        layers = set(gpd.list_layers(out / "maps.gpkg")["name"])
        assert "lcbd" in layers
        assert "run folder written" in capsys.readouterr().out

    def test_geopackage_sites(self, small_survey_files, tmp_path):
        sites, _, _ = make_small_survey_tables()
        gdf = gpd.GeoDataFrame(sites[["site"]], crs="EPSG:32633",
                               geometry=gpd.points_from_xy(sites["easting"], sites["northing"]))
        gdf.to_file(tmp_path / "sites.gpkg", layer="cores")
        out = tmp_path / "run-gpkg"
        args = ["run", "--sites", str(tmp_path / "sites.gpkg"),
                "--species", str(small_survey_files["species"]),
                "--environment", str(small_survey_files["environment"]), "--out", str(out),
                *FAST]
        assert main(args) == 0
        assert json.loads((out / "summary.json").read_text())["n_sites"] == 64

    def test_geographic_csv_is_projected(self, tmp_path):
        sites, species, env = make_small_survey_tables(geographic=True)
        for name, frame in (("sites", sites), ("species", species), ("environment", env)):
            frame.to_csv(tmp_path / f"{name}.csv", index=False)
        out = tmp_path / "run-geo"
        args = ["run", "--sites", str(tmp_path / "sites.csv"), "--x", "lon", "--y", "lat",
                "--crs", "EPSG:4326", "--species", str(tmp_path / "species.csv"),
                "--environment", str(tmp_path / "environment.csv"), "--out", str(out), *FAST]
        assert main(args) == 0
        summary = json.loads((out / "summary.json").read_text())
        assert summary["distance_unit"] == "metre"
        assert "4326" not in summary["crs"]  # analysed in a local metric projection
        # scales in metres, not degrees: the grid spacing is 50 m
        assert summary["resolvable_scales"]["finest"] > 20

    def test_config_file_same_keys(self, small_survey_files, tmp_path):
        config = tmp_path / "analysis.toml"
        config.write_text(
            'sites = "sites.csv"\nspecies = "species.csv"\nenvironment = "environment.csv"\n'
            'x = "easting"\ny = "northing"\ncrs = "EPSG:32633"\nweighting = "distance"\n'
            'permutations = 99\nseed = 7\nout = "from-config"\n', encoding="utf-8")
        assert main(["run", "--config", str(config), "--quiet", "--seed", "11"]) == 0
        summary = json.loads((tmp_path / "from-config" / "summary.json").read_text())
        assert summary["seed"] == 11  # the command line overrides the file
        assert summary["permutations"] == 99

    def test_existing_folder_needs_overwrite(self, small_survey_files, tmp_path, capsys):
        out = tmp_path / "exists"
        out.mkdir()
        (out / "keep.txt").write_text("x")
        assert main(run_args(small_survey_files, out)) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and "already exists" in err[0] and "--overwrite" in err[0]
        assert (out / "keep.txt").exists()
        assert main(run_args(small_survey_files, out, "--overwrite")) == 0
        assert not (out / "keep.txt").exists() and (out / "summary.json").exists()
        assert leftovers(tmp_path) == []

    # --- bad input: exit 2, one line, nothing written ---------------------------------
    def test_site_missing_from_species(self, small_survey_files, tmp_path, capsys):
        lines = small_survey_files["species"].read_text().splitlines()
        small_survey_files["species"].write_text("\n".join(lines[:-1]) + "\n")
        out = tmp_path / "bad"
        assert main(run_args(small_survey_files, out)) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and "P063" in err[0]
        assert not out.exists() and leftovers(tmp_path) == []

    def test_species_required(self, small_survey_files, tmp_path, capsys):
        args = ["run", "--sites", str(small_survey_files["sites"]), "--x", "easting", "--y",
                "northing", "--crs", "EPSG:32633", "--out", str(tmp_path / "o"), *FAST]
        assert main(args) == 2
        assert "needs a species table" in capsys.readouterr().err

    def test_unknown_config_key(self, tmp_path, capsys):
        config = tmp_path / "analysis.toml"
        config.write_text('sites = "a.csv"\ncolour = "red"\n', encoding="utf-8")
        assert main(["run", "--config", str(config)]) == 2
        err = capsys.readouterr().err
        assert "unknown key 'colour'" in err and str(config) in err

    def test_too_few_permutations(self, small_survey_files, tmp_path, capsys):
        args = run_args(small_survey_files, tmp_path / "o")
        args[args.index("99")] = "5"
        assert main(args) == 2
        assert "at least 19" in capsys.readouterr().err

    def test_options_refused_before_the_files_are_read(self, small_survey_files, tmp_path,
                                                       capsys):
        # the species file does not exist: an option error must be what the user hears first
        missing = dict(small_survey_files, species=tmp_path / "not-there.csv")
        for extra, said in ((["--weighting", "gabriel"], "--weighting 'gabriel' is not"),
                            (["--alpha", "0.9"], "--alpha must be"),
                            (["--scale-breaks", "-3"], "--scale-breaks must be > 0")):
            assert main(run_args(missing, tmp_path / "o", *extra)) == 2
            err = capsys.readouterr().err.strip().splitlines()
            assert len(err) == 1 and said in err[0], err

    def test_scale_breaks_outside_the_basis(self, small_survey_files, tmp_path, capsys):
        # only the analysis knows the basis's scales: said in option words, nothing written
        out = tmp_path / "o"
        assert main(run_args(small_survey_files, out, "--scale-breaks", "1e9")) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1
        assert "--scale-breaks 1e+09 lie(s) outside the scales of the spatial basis" in err[0]
        assert "metre); give boundaries between them" in err[0]
        assert not out.exists() and leftovers(tmp_path) == []


class TestDemo:
    def test_demo_writes_inputs_and_truth(self, tmp_path, capsys):
        out = tmp_path / "demo"
        assert main(["demo", "--out", str(out), *FAST]) == 0
        assert RUN_FILES | {"inputs"} <= {p.name for p in out.iterdir()}
        assert {p.name for p in (out / "inputs").iterdir()} == {
            "sites.gpkg", "species.csv", "environment.csv", "truth.json"}
        printed = capsys.readouterr().out
        assert "true fractions of the generating model" in printed
        summary = json.loads((out / "summary.json").read_text())
        assert summary["n_sites"] == 220


@pytest.mark.browser
class TestRunReportInBrowser:
    def test_real_report_displays(self, tmp_path):
        # The run's own report (not an example page) opened in headless Chromium: every figure
        # loads, the page records no script or image errors, the screenshot is not blank.
        from browser_check import inspect_in_browser

        out = tmp_path / "run"
        assert main(["demo", "--out", str(out), *FAST]) == 0
        check = inspect_in_browser(out / "report.html")
        assert check.problems() == []
        # partition, scalogram, Moran's I, >= 1 scale map, LCBD, two triplots
        assert check.images_total >= 7 and check.images_broken == ()
        assert check.page_errors == () and check.console_messages == ()
        assert check.screenshot_std > 5.0


def test_small_survey_note_and_single_scheme_suggestion(tmp_path, capsys):
    """16 sites (< 30): the analysis notes that 8 schemes compared at the Šidák level
    1 - 0.95^(1/8) = 0.006391 [derived; Šidák 1967, J. Am. Stat. Assoc.] is rarely reached, both
    `check` and `run` suggest one scheme, and the Methods never say the retained scheme was
    'none'."""
    sites, species, env = make_small_survey_tables(n_side=4)
    paths = {}
    for name, frame in (("sites", sites), ("species", species), ("environment", env)):
        paths[name] = tmp_path / f"{name}.csv"
        frame.to_csv(paths[name], index=False)
    files = ["--sites", str(paths["sites"]), "--species", str(paths["species"]),
             "--environment", str(paths["environment"]), "--x", "easting", "--y", "northing",
             "--crs", "EPSG:32633"]
    assert main(["check", *files]) == 0
    out = capsys.readouterr().out
    assert "note: 16 sites, fewer than 30" in out and "--weighting distance" in out
    run = tmp_path / "run"
    assert main(["run", *files, "--out", str(run), "--permutations", "199", "--seed", "5",
                 "--quiet"]) == 0
    out = capsys.readouterr().out
    assert "note: 16 sites, fewer than 30" in out and "--weighting distance" in out
    summary = json.loads((run / "summary.json").read_text())
    note = summary["notes"][0]
    assert note.startswith("The survey has 16 sites, fewer than 30: comparing 8 weighting "
                           "schemes tests each at the corrected level 0.006391 instead of 0.05")
    page = (run / "report.html").read_text(encoding="utf-8")
    assert "retained was none" not in page
    # one scheme chosen beforehand: no note, no suggestion
    single = tmp_path / "single"
    assert main(["run", *files, "--out", str(single), *FAST]) == 0
    assert "fewer than 30" not in capsys.readouterr().out
    assert not any("fewer than 30" in n
                   for n in json.loads((single / "summary.json").read_text())["notes"])


def test_manifest_records_read_options(small_survey_files, tmp_path):
    # A run folder must be rebuildable from its files alone: the reading options are recorded
    # explicitly, not only as the command line.
    out = tmp_path / "run-opts"
    assert main(run_args(small_survey_files, out)) == 0
    recorded = json.loads((out / "manifest.json").read_text())["parameters"]["read_options"]
    assert recorded["x"] == "easting" and recorded["y"] == "northing"
    assert recorded["crs"] == "EPSG:32633"


def test_progress_lines_in_a_log(small_survey_files, tmp_path, capsys):
    """Standard error that is not a terminal (pytest's capture) gets plain timestamped
    progress lines; --quiet silences them."""
    import re
    from datetime import datetime, timezone

    args = [a for a in run_args(small_survey_files, tmp_path / "logged") if a != "--quiet"]
    assert main(args) == 0
    err = capsys.readouterr().err.splitlines()
    stamped = [line for line in err if not line.startswith("warning (")]
    assert stamped, err
    pattern = re.compile(r"^\[(\d{4}-\d\d-\d\d \d\d:\d\d:\d\d) UTC, +(\d+\.\d) s\] \S")
    for line in stamped:
        match = pattern.match(line)
        assert match, line
        when = datetime.strptime(match.group(1), "%Y-%m-%d %H:%M:%S").replace(
            tzinfo=timezone.utc)
        assert abs((datetime.now(timezone.utc) - when).total_seconds()) < 600
    seconds = [float(pattern.match(line).group(2)) for line in stamped]
    assert all(b - a >= 10.0 - 0.05 for a, b in zip(seconds, seconds[1:]))  # throttled
    assert main(run_args(small_survey_files, tmp_path / "quiet")) == 0  # FAST has --quiet
    assert capsys.readouterr().err == ""


def test_progress_log_throttles_to_its_interval():
    import io

    from spatial_ev.cli.common import ProgressLog

    times = iter([0.0, 0.5, 3.0, 10.4, 10.6, 12.0, 25.0, 25.2])
    out = io.StringIO()
    log = ProgressLog(out, interval=10.0, clock=lambda: next(times))
    for message in ("a", "b", "c", "d", "e", "f"):
        log(message)
    log.finish("end")
    said = [line.split("] ", 1)[1] for line in out.getvalue().splitlines()]
    assert said == ["a", "d", "f", "end"]


def test_sequential_step_tests_are_recorded_and_reported(repo_root, tmp_path, capsys):
    demo = repo_root / "data_demo"
    out = tmp_path / "run"
    code = main(["run", "--sites", str(demo / "sites.gpkg"), "--species",
                 str(demo / "species.csv"), "--environment", str(demo / "environment.csv"),
                 "--weighting", "distance", "--permutations", "99", "--seed", "3",
                 "--step-tests", "sequential", "--quiet", "--out", str(out)])
    assert code == 0, capsys.readouterr().err
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["parameters"]["step_tests"] == "sequential"
    import pandas as pd

    steps = pd.read_csv(out / "tables" / "space_selection_steps.csv")
    assert "permutations" in steps.columns and steps["permutations"].le(99).all()
    report = (out / "report.html").read_text(encoding="utf-8")
    assert "stopped drawing permutations once the decision" in report
    assert "Besag" in report and "Gandy" in report
