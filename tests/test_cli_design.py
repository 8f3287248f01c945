"""Tests of ``spatial-ev design`` (design folder contract, errors, nothing written on error)."""

from __future__ import annotations

import json
import shutil

import geopandas as gpd
import pandas as pd
import pytest
import shapely

from spatial_ev.cli.main import main

FILES = {"design.json", "coverage.csv", "power.csv", "fractions.csv", "layouts.csv",
         "selection_stops.csv", "figures", "design_report.html", "layouts.gpkg"}
TRANSECT = "transect:start=452300,5612900;bearing=90;spacing=15;length=540"


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo") / "pilot"
    assert main(["demo", "--out", str(out), "--weighting", "distance", "--permutations", "99",
                 "--seed", "20240917", "--quiet"]) == 0
    return out


def design_args(pilot, out, *layouts, extra=()):
    return ["design", "--pilot", str(pilot), *[a for s in layouts for a in ("--layout", s)],
            "--simulations", "2", "--permutations", "99", "--seed", "20261202", "--quiet",
            "--out", str(out), *extra]


class TestDesignCommand:
    def test_three_layouts_write_the_folder(self, demo_run, tmp_path, capsys):
        out = tmp_path / "design"
        # study area: the grid part of the mudflat, given in WGS 84 (reprojected by the command)
        box = shapely.box(452300, 5612800, 452860, 5613240)
        area = gpd.GeoDataFrame(geometry=[box], crs=32630).to_crs(4326)
        area.to_file(tmp_path / "area.geojson", driver="GeoJSON")
        code = main(design_args(demo_run, out, "grid:spacing=80", "thin:every=2", TRANSECT,
                                extra=("--reference", "none", "--area",
                                       str(tmp_path / "area.geojson"))))
        assert code == 0
        assert FILES <= {p.name for p in out.iterdir()}
        assert not [p for p in tmp_path.iterdir() if ".partial-" in p.name]
        record = json.loads((out / "design.json").read_text())
        assert record["settings"]["seed"] == 20261202
        assert record["settings"]["n_simulations"] == 2
        assert len(record["layouts"]) == 3 and record["recommendations"]
        power = pd.read_csv(out / "power.csv")
        assert len(power) == 3 * 4 and power["power"].between(0, 1).all()
        coverage = pd.read_csv(out / "coverage.csv")
        assert set(coverage["status"]) <= {"resolved", "partly", "not resolved"}
        layers = gpd.list_layers(out / "layouts.gpkg")["name"].tolist()
        assert len(layers) == 3
        grid = gpd.read_file(out / "layouts.gpkg", layer=layers[0])
        assert grid["layout"].iloc[0] == "grid:spacing=80"
        assert box.buffer(0.01).contains(grid.geometry).all() and len(grid) == 8 * 6
        transect = gpd.read_file(out / "layouts.gpkg", layer=layers[2])
        assert len(transect) == 37 and transect.crs.to_epsg() == 32630
        page = (out / "design_report.html").read_text()
        assert "How to read this report, and its limits" in page
        assert "spatially independent" in page and "data:image/png;base64," in page
        assert {p.name for p in (out / "figures").iterdir()} >= {
            "design_coverage.png", "design_coverage.svg", "design_power.png",
            "design_layouts.svg"}
        printed = capsys.readouterr().out
        assert f"design folder written: {out}" in printed
        assert "power (share of simulations detecting each objective):" in printed
        # a transect among other layouts: no recommendation speaks of "nan" line length
        assert "nan" not in printed.lower() and "nan" not in " ".join(record["recommendations"])
        # plain column headers on the page (the CSV files keep machine names)
        assert "<th>scale class</th>" in page and "<th>scale_class</th>" not in page
        stops = pd.read_csv(out / "selection_stops.csv")
        reasons = ["no global significance", "p > alpha", "ceiling", "exhausted"]
        assert (stops[reasons].sum(axis=1).round(12) == 1).all()

    def test_bad_spec_exit_2_nothing_written(self, demo_run, tmp_path, capsys):
        out = tmp_path / "design"
        assert main(design_args(demo_run, out, "grid:spcing=80")) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and "'spcing=80' is not key=value" in err[0]
        assert not out.exists()

    def test_existing_folder(self, demo_run, tmp_path, capsys):
        out = tmp_path / "design"
        out.mkdir()
        assert main(design_args(demo_run, out, "thin:every=2")) == 2
        assert "already exists" in capsys.readouterr().err

    def test_changed_input(self, demo_run, tmp_path, capsys):
        copy = tmp_path / "pilot"
        shutil.copytree(demo_run, copy)
        species = copy / "inputs" / "species.csv"
        species.write_text(species.read_text() + "\n")
        out = tmp_path / "design"
        assert main(design_args(copy, out, "thin:every=2")) == 2
        err = capsys.readouterr().err
        assert "has changed since the run" in err and len(err.strip().splitlines()) == 1
        assert not out.exists()

    def test_not_a_run_folder(self, tmp_path, capsys):
        assert main(design_args(tmp_path, tmp_path / "d", "thin:every=2")) == 2
        assert "has no manifest.json" in capsys.readouterr().err

    def test_help_documents_syntax(self, capsys):
        with pytest.raises(SystemExit):
            main(["design", "--help"])
        text = " ".join(capsys.readouterr().out.split())
        for fragment in ("grid:spacing=S", "transect:start=X,Y;bearing=DEG;spacing=S;length=L",
                         "thin:every=K", "augment:add=N", "file:PATH"):
            assert fragment in text
