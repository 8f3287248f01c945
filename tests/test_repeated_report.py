"""Report of a repeated-survey analysis: figures, summary, map layer, HTML page, run folder,
and the `spatial-ev change` command."""

from __future__ import annotations

import json
import re

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest

from spatial_ev.cli import main as cli_main
from spatial_ev.cli import repeated as cli_repeated
from spatial_ev.errors import InputError
from spatial_ev.input.repeated import read_repeated_survey
from spatial_ev.pipeline.repeated import analyse_repeated
from spatial_ev.report.change import (change_layer, change_map_figure, change_summary,
                                      loss_gain_figure, render_change_report,
                                      write_change_folder)


@pytest.fixture(scope="module")
def analysis(repo_root):
    folder = repo_root / "data_demo" / "resurvey"
    survey = read_repeated_survey(folder / "sites.gpkg", folder / "species.csv")
    return analyse_repeated(survey, n_permutations=49, site_permutations=4999, seed=5)


@pytest.fixture(scope="module")
def folder(analysis, tmp_path_factory):
    out = tmp_path_factory.mktemp("change") / "run"
    return write_change_folder(analysis, out)


class TestFigures:
    def test_map_rings_exceptional_sites_in_both_panels(self, analysis):
        layer = change_layer(analysis)
        fig = change_map_figure(layer, unit="m", title="2022 to 2024")
        rings = [c for ax in fig.axes for c in ax.collections if c.get_gid() == "exceptional"]
        assert len(rings) == 2
        assert all(len(r.get_offsets()) == layer["exceptional"].sum() for r in rings)
        assert [ax.get_title(loc="left") for ax in fig.axes[:2]] == ["Losses, 2022 to 2024",
                                                                    "Gains, 2022 to 2024"]

    def test_loss_gain_has_one_to_one_line(self, analysis):
        fig = loss_gain_figure(analysis.change.table, before="2022", after="2024")
        ax = fig.axes[0]
        line = [ln for ln in ax.lines if ln.get_gid() == "one-to-one"][0]
        x, y = line.get_data()
        np.testing.assert_allclose(x, y)
        assert ax.get_xlim() == ax.get_ylim()

    def test_bad_input(self):
        with pytest.raises(InputError, match="lacks column"):
            loss_gain_figure(pd.DataFrame({"losses": [0.1]}))
        with pytest.raises(InputError, match="no losses/gains"):
            loss_gain_figure(pd.DataFrame({"losses": [np.nan], "gains": [np.nan],
                                           "exceptional": [False]}))


class TestRunFolder:
    def test_files(self, folder):
        names = {p.name for p in folder.iterdir()}
        assert names == {"summary.json", "manifest.json", "report.html", "figures", "tables",
                         "change.gpkg"}
        assert {p.name for p in (folder / "tables").iterdir()} >= {
            "space_time_tests.csv", "site_change.csv", "within_surveys.csv", "within_sites.csv"}
        assert {p.name for p in (folder / "figures").iterdir()} == {
            "change_map.png", "change_map.svg", "loss_gain.png", "loss_gain.svg"}

    def test_summary_keys_and_values(self, folder, analysis):
        text = (folder / "summary.json").read_text()
        s = json.loads(text)
        assert "NaN" not in text
        assert s["n_sites"] == 220 and s["n_surveys"] == 3 and s["surveys"] == ["2022", "2023",
                                                                                 "2024"]
        tests = s["space_time"]["tests"]
        assert set(tests) == {"space", "time", "interaction"}
        assert tests["interaction"]["p_value"] == pytest.approx(
            analysis.space_time.table.loc["interaction", "p_value"])
        assert s["change"]["exceptional_sites"] == analysis.change.exceptional_sites
        assert s["change"]["balance"]["dominant"] == "losses"
        assert s == change_summary(analysis)

    def test_layer(self, folder, analysis):
        layer = gpd.read_file(folder / "change.gpkg", layer="site_change")
        assert len(layer) == 220 and layer.crs.to_epsg() == 32630
        assert {"dissimilarity", "losses", "gains", "p_adjusted", "exceptional"} <= set(layer)
        assert int(layer["exceptional"].sum()) == len(analysis.change.exceptional_sites)

    def test_report_page(self, folder, analysis):
        html = (folder / "report.html").read_text()
        assert html.count("data:image/png;base64,") == 2
        assert "<script src" not in html and "<link" not in html     # self-contained
        assert 'id="space-time-table"' in html and 'id="exceptional-sites"' in html
        for site in analysis.change.exceptional_sites:
            assert f"<td>{site}</td>" in html
        assert "Space × time interaction" in html

    def test_same_seed_same_summary_bytes(self, analysis, folder, tmp_path):
        again = write_change_folder(analysis, tmp_path / "again")
        assert (again / "summary.json").read_bytes() == (folder / "summary.json").read_bytes()
        for name in ("space_time_tests.csv", "site_change.csv"):
            assert (again / "tables" / name).read_bytes() == \
                (folder / "tables" / name).read_bytes()

    def test_existing_folder_and_atomicity(self, analysis, folder, tmp_path):
        with pytest.raises(InputError, match="already exists"):
            write_change_folder(analysis, folder)
        with pytest.raises(InputError, match="RepeatedAnalysis"):
            write_change_folder(analysis.change, tmp_path / "x")
        assert not (tmp_path / "x").exists()
        assert not [p for p in tmp_path.iterdir() if p.name.startswith(".x.partial")]

    @pytest.mark.browser
    def test_page_displays_in_a_browser(self, folder):
        from browser_check import inspect_in_browser

        check = inspect_in_browser(folder / "report.html")
        assert check.problems() == []
        assert check.instrumented and check.images_total == 2 and check.images_broken == ()

    def test_html_escapes_titles(self, analysis):
        html = render_change_report(analysis, title="<b>x</b>", figures={})
        assert "<b>x</b>" not in html and "&lt;b&gt;x&lt;/b&gt;" in html


@pytest.fixture()
def command(monkeypatch):
    monkeypatch.setitem(cli_main.COMMANDS, "change",
                        cli_main.Command(cli_repeated.configure, cli_repeated.execute,
                                         cli_repeated.HELP))
    return cli_main.main


class TestCommand:
    def test_files_and_per_survey_tables(self, command, repo_root, tmp_path, capsys):
        folder = repo_root / "data_demo" / "resurvey"
        long = pd.read_csv(folder / "species.csv")
        paths = []
        for year in (2022, 2024):
            p = tmp_path / f"y{year}.csv"
            long[long.year == year].drop(columns="year").to_csv(p, index=False)
            paths.append(str(p))
        status = command(["change", "--sites", str(folder / "sites.gpkg"), "--species", *paths,
                          "--times", "2022", "2024", "--permutations", "19",
                          "--site-permutations", "4999", "--out", str(tmp_path / "run")])
        out = capsys.readouterr().out
        assert status == 0 and "run folder written" in out
        s = json.loads((tmp_path / "run" / "summary.json").read_text())
        assert s["surveys"] == ["2022", "2024"] and s["space_time"]["n_time_vectors"] == 1
        manifest = json.loads((tmp_path / "run" / "manifest.json").read_text())
        assert len(manifest["inputs"]["species"]) == 2
        assert all(re.fullmatch(r"[0-9a-f]{64}", e["sha256"]) for e in
                   manifest["inputs"]["species"])

    def test_bad_input_exits_2_with_one_line(self, command, repo_root, tmp_path, capsys):
        folder = repo_root / "data_demo" / "resurvey"
        long = pd.read_csv(folder / "species.csv")
        long.iloc[:-1].to_csv(tmp_path / "sp.csv", index=False)
        status = command(["change", "--sites", str(folder / "sites.gpkg"), "--species",
                          str(tmp_path / "sp.csv"), "--out", str(tmp_path / "run")])
        err = capsys.readouterr().err
        assert status == 2 and len(err.strip().splitlines()) == 1
        assert "'S40' (missing from species survey(s) 2024)" in err
        assert "--incomplete-sites keep_complete" in err
        assert not (tmp_path / "run").exists()

    def test_times_with_a_long_table_refused(self, command, repo_root, tmp_path, capsys):
        folder = repo_root / "data_demo" / "resurvey"
        status = command(["change", "--sites", str(folder / "sites.gpkg"), "--species",
                          str(folder / "species.csv"), "--times", "1", "--out",
                          str(tmp_path / "r")])
        assert status == 2 and "--time-column" in capsys.readouterr().err

    def test_demo_needs_no_files(self, command, tmp_path, capsys):
        status = command(["change", "--demo", "--permutations", "19", "--site-permutations",
                          "99", "--out", str(tmp_path / "demo")])
        assert status == 0
        html = (tmp_path / "demo" / "report.html").read_text()
        assert 'id="illustrative-banner"' in html
        notes = json.loads((tmp_path / "demo" / "summary.json").read_text())["notes"]
        assert any("no site can reach" in n for n in notes)
