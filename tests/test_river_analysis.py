"""The whole analysis of the invented river survey with its network layer, through the command
line: directional vectors selected, mapped along the network, written to the run folder; bad
networks refused in one line with exit status 2.

External references: the Šidák level 1 − (1 − α)^(1/k) (Šidák 1967, J. Am. Stat. Assoc.
62:626–633) [memory]; lengths and distances from shapely/geopandas; SHA-256 from hashlib.
"""

from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import geopandas as gpd
import numpy as np
import pyogrio
import pytest
import shapely

from spatial_ev.cli.main import main

ROOT = Path(__file__).resolve().parents[1]
RIVER = ROOT / "data_demo" / "river"
SEED = 20261203
NETWORK_ARGS = ["--network", str(RIVER / "network.gpkg"), "--snap-tolerance", "30"]


def _survey_args(sites=RIVER / "sites.gpkg"):
    return ["--sites", str(sites), "--species", str(RIVER / "species.csv"),
            "--environment", str(RIVER / "environment.csv")]


@pytest.fixture(scope="module")
def river_run(tmp_path_factory) -> Path:
    """One whole run from an analysis.toml holding the network keys (a relative network path);
    the directional scheme is named alone, 99 permutations."""
    folder = tmp_path_factory.mktemp("river")
    shutil.copy2(RIVER / "network.gpkg", folder / "channels.gpkg")
    config = folder / "analysis.toml"
    config.write_text("\n".join([
        f'sites = "{RIVER / "sites.gpkg"}"', f'species = "{RIVER / "species.csv"}"',
        f'environment = "{RIVER / "environment.csv"}"',
        'network = "channels.gpkg"', "snap-tolerance = 30", 'weighting = "river_aem/binary"',
        "permutations = 99", f"seed = {SEED}", "quiet = true", 'out = "run"']),
        encoding="utf-8")
    assert main(["run", "--config", str(config)]) == 0
    return folder / "run"


class TestRiverRun:
    def test_selects_directional_vectors(self, river_run):
        summary = json.loads((river_run / "summary.json").read_text())
        basis = summary["spatial_basis"]
        assert basis["method"] == "aem_river" and basis["threshold"] is None
        assert basis["scheme"] == "river_aem/binary"
        assert basis["scale_measure"] == "along_network"
        selected = summary["selected"]["space"]
        assert selected and all(v["name"].startswith("aem") for v in selected)
        assert all(v["scale"] > 0 for v in selected)
        assert summary["weighting_schemes"]["compared"] == ["river_aem/binary"]
        # the network as read: 7 lines, 58.2 km (geopandas' lengths of the layer)
        lines = gpd.read_file(RIVER / "network.gpkg")
        assert summary["network"]["total_length"] == pytest.approx(
            float(lines.geometry.length.sum()), rel=1e-9)
        assert summary["network"]["direction"] == "digitised"
        assert summary["network"]["n_components"] == 1
        assert 0 < summary["network"]["snap_distance_max"] <= 30
        assert summary["bearing"] is None
        assert any("along the network" in n for n in summary["notes"])

    def test_network_and_along_network_layers(self, river_run):
        layers = {name for name, _ in pyogrio.list_layers(river_run / "maps.gpkg")}
        assert "river_network" in layers
        edges = gpd.read_file(river_run / "maps.gpkg", layer="river_network")
        lines = gpd.read_file(RIVER / "network.gpkg")
        assert edges.geometry.length.sum() == pytest.approx(lines.geometry.length.sum(),
                                                            rel=1e-9)
        summary = json.loads((river_run / "summary.json").read_text())
        mapped = [c["class"] for c in summary["scales"] if c["vectors"]]
        assert mapped
        channel = shapely.union_all(lines.geometry.to_numpy())
        for name in mapped:
            key = name.replace(" ", "_")
            assert f"scale_{key}_along_network" in layers
            assert f"scale_{key}_grid" not in layers            # no open grid
            along = gpd.read_file(river_run / "maps.gpkg", layer=f"scale_{key}_along_network")
            assert len(along) >= 2000 and {"axis_1", "edge", "offset"} <= set(along.columns)
            # every prediction point lies on a channel (shapely distance)
            assert float(shapely.distance(along.geometry.to_numpy(), channel).max()) < 1e-3
            # the predicted structure continues the fitted site scores: the point nearest to
            # each site along its channel carries nearly the site's value
            sites = gpd.read_file(river_run / "maps.gpkg", layer=f"scale_{key}")
            nearest = along.sindex.nearest(sites.geometry, return_all=False)[1]
            r = np.corrcoef(sites["axis_1"].to_numpy(),
                            along["axis_1"].to_numpy()[nearest])[0, 1]
            assert r > 0.9

    def test_maps_and_report(self, river_run):
        figures = river_run / "figures"
        for name in ("scale_map_1.png", "lcbd_map.png"):
            assert (figures / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        html = (river_run / "report.html").read_text(encoding="utf-8")
        assert "asymmetric eigenvector maps" in html
        assert "predicted at points spaced along the network" in html     # the maps' lead
        assert "The background surface is the same fit" not in html
        assert "Blanchet, F. G., Legendre, P. &amp; Borcard, D. (2008). Modelling" in html
        # the methods say why no planar trend was modelled (default rule on a network)
        assert "upstream–downstream structure is left to the directional vectors" in html

    def test_manifest_hashes_the_network(self, river_run):
        manifest = json.loads((river_run / "manifest.json").read_text())
        network = manifest["inputs"]["network"]
        copied = river_run.parent / "channels.gpkg"
        assert network["sha256"] == hashlib.sha256(copied.read_bytes()).hexdigest()
        assert Path(network["path"]) == copied.resolve()          # relative to the config
        # the run folder keeps a copy of the network beside the survey files
        kept = river_run / network["copy"]
        assert kept.parent.name == "inputs"
        assert hashlib.sha256(kept.read_bytes()).hexdigest() == network["sha256"]
        assert manifest["parameters"]["network_options"]["snap_tolerance"] == 30


@pytest.mark.browser
def test_river_report_displays(river_run):
    from browser_check import inspect_in_browser

    check = inspect_in_browser(river_run / "report.html")
    assert check.problems() == []
    assert check.images_total >= 7 and check.images_broken == ()
    assert check.page_errors == () and check.console_messages == ()
    assert check.screenshot_std > 5.0


def test_network_map_draws_lines_and_values_along_them():
    from matplotlib.collections import LineCollection, PathCollection

    from spatial_ev.report.maps import site_map_figure

    lines = gpd.read_file(RIVER / "network.gpkg")
    sites = gpd.read_file(RIVER / "sites.gpkg").assign(v=np.linspace(-1, 1, 120))
    pts = lines.geometry.interpolate(0.5, normalized=True)
    along = gpd.GeoDataFrame({"p": np.linspace(-2, 2, len(pts))}, geometry=pts.to_numpy(),
                             crs=lines.crs)
    fig = site_map_figure(sites, column="v", network=lines, along=along, along_column="p")
    ax = fig.axes[0]
    gids = {c.get_gid() for c in ax.collections}
    assert {"network", "along-network", "sites"} <= gids
    drawn = [c for c in ax.collections if isinstance(c, LineCollection)
             and c.get_gid() == "network"]
    assert len(drawn[0].get_segments()) == len(lines)
    # the colour scale covers the values along the network (±2), not only the sites' (±1)
    along_artist = [c for c in ax.collections if isinstance(c, PathCollection)
                    and c.get_gid() == "along-network"][0]
    assert along_artist.norm.vmax == pytest.approx(2.0)
    x0, x1 = ax.get_xlim()
    xmin, _, xmax, _ = lines.total_bounds
    assert x0 < xmin and x1 > xmax


def test_comparison_counts_directional_schemes():
    from spatial_ev.input.network import read_river_network
    from spatial_ev.input.survey import read_survey
    from spatial_ev.pipeline.analysis import analyse

    survey = read_survey(RIVER / "sites.gpkg", RIVER / "species.csv",
                         RIVER / "environment.csv")
    net = read_river_network(RIVER / "network.gpkg", survey, snap_tolerance=30)
    # the default trend rule ("auto") leaves a planar trend out on a river network
    result = analyse(survey, network=net, n_permutations=239, seed=SEED,
                     environment_test="permutation")
    assert result.settings.trend == "ignore" and result.trend is None
    assert any("trend rule 'auto' on a river network" in n for n in result.notes)
    # the drift travels with the flow: the comparison picks a directional basis and selects
    # its vectors (the shipped scenario; data_demo/river/README.md)
    assert result.settings.chosen_scheme.startswith("river_aem")
    assert len(result.space_selection.selected) > 0
    table = result.weighting.table
    directional = ["river_aem/binary", "river_aem/linear", "river_distance"]
    assert list(table.index[:3]) == directional and len(table) == 11
    # Šidák 1967: α' = 1 − (1 − α)^(1/k), k = 11 schemes [memory]
    assert result.weighting.alpha_corrected == pytest.approx(1 - 0.95 ** (1 / 11), rel=1e-12)
    assert table.loc[directional, "significant"].all()
    assert np.isfinite(table.loc[directional, "r2_adj"]).all()
    assert any("Directional schemes compared" in n for n in result.notes)
    assert result.settings.directional["orientations"] == ["with_flow"]


def _one_error_line(capsys) -> str:
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "Traceback" not in err[0]
    return err[0]


class TestBadNetworks:
    def test_site_off_the_network(self, tmp_path, capsys):
        sites = gpd.read_file(RIVER / "sites.gpkg")
        far = sites.geometry.iloc[[4]].translate(0, 600).to_numpy()[0]
        sites.loc[4, "geometry"] = far
        moved = tmp_path / "sites.gpkg"
        sites.to_file(moved, layer="sites")
        code = main(["run", *_survey_args(moved), *NETWORK_ARGS, "--out",
                     str(tmp_path / "run"), "--permutations", "99", "--weighting",
                     "river_aem/binary"])
        assert code == 2
        line = _one_error_line(capsys)
        assert sites.loc[4, "site_id"] in line and "--snap-tolerance" in line
        assert not (tmp_path / "run").exists()

    def test_loop_in_the_network(self, tmp_path, capsys):
        lines = gpd.read_file(RIVER / "network.gpkg")
        stem = np.asarray(lines.geometry.iloc[1].coords)       # reach M2
        a, b = stem[10], stem[40]
        middle = (a + b) / 2 + np.array([0.0, 400.0])
        side = shapely.LineString([a, middle, b])              # a side channel: a loop
        looped = gpd.GeoDataFrame({"reach": [*lines["reach"], "side"]},
                                  geometry=[*lines.geometry, side], crs=lines.crs)
        path = tmp_path / "looped.gpkg"
        looped.to_file(path, layer="channels")
        code = main(["run", *_survey_args(), "--network", str(path), "--snap-tolerance", "30",
                     "--out", str(tmp_path / "run"), "--permutations", "99", "--weighting",
                     "river_aem/binary"])
        assert code == 2
        line = _one_error_line(capsys)
        assert "loop" in line.lower()
        # names the place: a stretch of the loop, between the side channel's two ends
        import re

        xs = [float(x) for x in re.findall(r"\((\d+(?:\.\d+)?), ", line)]
        assert xs and all(a[0] <= x <= b[0] for x in xs)
        # UTM northings in plain decimals a user can paste into a GIS, not 5.92e+06
        ys = [float(y) for y in re.findall(r", (\d+(?:\.\d+)?)\)", line)]
        assert ys and all(y > 5e6 for y in ys) and "e+" not in line

    def test_options_in_their_own_words(self, tmp_path, capsys):
        out = str(tmp_path / "run")
        assert main(["run", *_survey_args(), "--network", str(RIVER / "network.gpkg"),
                     "--out", out]) == 2
        assert "--network needs --snap-tolerance" in _one_error_line(capsys)
        assert main(["run", *_survey_args(), "--weighting", "river_aem/binary",
                     "--out", out]) == 2
        assert "add --network FILE" in _one_error_line(capsys)
        assert main(["run", *_survey_args(), *NETWORK_ARGS, "--flow", "outlet",
                     "--out", out]) == 2
        assert "--flow outlet needs --outlet X,Y" in _one_error_line(capsys)
        assert main(["run", *_survey_args(), *NETWORK_ARGS, "--edge-weighting", "steep",
                     "--out", out]) == 2
        assert "--edge-weighting 'steep'" in _one_error_line(capsys)
        # 11 schemes need 1/(N+1) <= 1 - 0.95^(1/11) = 0.004652 [Šidák 1967, memory]:
        # N >= 214 [derived]
        assert main(["run", *_survey_args(), *NETWORK_ARGS, "--permutations", "199",
                     "--out", out]) == 2
        assert "use at least --permutations 214" in _one_error_line(capsys)


def test_check_describes_the_network(capsys):
    assert main(["check", *_survey_args(), *NETWORK_ARGS, "--against-flow"]) == 0
    out = capsys.readouterr().out
    assert "river network: 127 edges" in out
    assert "`run` would add 5 to the comparison" in out


def test_eigen_writes_network_layers(tmp_path, capsys):
    out = tmp_path / "basis"
    assert main(["eigen", "--sites", str(RIVER / "sites.gpkg"), *NETWORK_ARGS,
                 "--out", str(out)]) == 0
    layers = {name for name, _ in pyogrio.list_layers(out / "spatial_vectors.gpkg")}
    assert layers == {"spatial_vectors", "river_network", "spatial_vectors_along_network"}
    vectors = gpd.read_file(out / "spatial_vectors.gpkg", layer="spatial_vectors")
    assert [c for c in vectors.columns if c != "geometry"][1].startswith("aem")
    assert "asymmetric eigenvector maps" in capsys.readouterr().out
    assert main(["eigen", "--sites", str(RIVER / "sites.gpkg"), *NETWORK_ARGS,
                 "--graph", "gabriel", "--out", str(tmp_path / "b2")]) == 2
    assert "does not apply with --network" in _one_error_line(capsys)


def test_bearing_basis_maps_at_sites_only():
    # A current's direction without a network: the AEM of the Delaunay graph oriented along
    # the bearing is named alone; its vectors exist at the sites only, so no prediction points
    from spatial_ev.input.survey import read_survey
    from spatial_ev.pipeline.analysis import analyse
    from spatial_ev.report.context import map_layers
    from spatial_ev.report.summary import summary_record

    survey = read_survey(RIVER / "sites.gpkg", RIVER / "species.csv")
    result = analyse(survey, bearing=90, n_permutations=99, seed=SEED,
                     spatial_weighting="single", schemes=["bearing_90/binary"],
                     environment_test="permutation")
    record = summary_record(result)
    assert record["spatial_basis"]["method"] == "aem_bearing"
    assert record["spatial_basis"]["threshold"] is None
    assert record["bearing"] == 90 and record["network"] is None
    assert all(fit.grid_scores is None for fit in result.scale_fits)
    assert not any(name.endswith(("_grid", "_along_network")) for name in map_layers(result))
    assert any("defined at the sampled sites only" in n for n in result.notes)
