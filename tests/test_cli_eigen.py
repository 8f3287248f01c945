"""Tests of the ``spatial-ev eigen`` command."""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest

from spatial_ev.cli.main import main
from spatial_ev.space.graphs import neighbour_graph
from spatial_ev.space.eigen import distance_eigenvectors, graph_eigenvectors
from spatial_ev.input.survey import read_survey


@pytest.fixture(scope="module")
def demo_sites(repo_root):
    return repo_root / "data_demo" / "sites.gpkg"


@pytest.fixture()
def transect_csv(tmp_path):
    path = tmp_path / "plots.csv"
    ids = [f"T{i:02d}" for i in range(30)]
    pd.DataFrame({"plot": ids, "x": 1000.0 + 25 * np.arange(30), "y": 5000.0}).to_csv(
        path, index=False)
    return path


class TestEigenCommand:
    def test_default_basis_written_and_equal_to_the_library(self, demo_sites, tmp_path,
                                                            capsys):
        out = tmp_path / "basis"
        assert main(["eigen", "--sites", str(demo_sites), "--out", str(out)]) == 0
        assert sorted(p.name for p in out.iterdir()) == [
            "spatial_vectors.csv", "spatial_vectors.gpkg", "vector_properties.csv"]
        expected = distance_eigenvectors(read_survey(demo_sites))
        table = pd.read_csv(out / "spatial_vectors.csv", index_col=0)
        assert list(table.index) == list(expected.vectors.index)
        assert np.allclose(table.to_numpy(), expected.vectors.to_numpy(), atol=1e-9)
        props = pd.read_csv(out / "vector_properties.csv", index_col=0)
        assert np.allclose(props["moran_i"], expected.moran_i, rtol=1e-9)
        layer = gpd.read_file(out / "spatial_vectors.gpkg", layer="spatial_vectors")
        assert len(layer) == expected.vectors.shape[0] and "sv001" in layer.columns
        assert layer.crs == read_survey(demo_sites).crs
        text = capsys.readouterr().out
        assert f"{expected.n_vectors} spatial eigenvectors" in text and "metre" in text

    def test_graph_options_and_max_vectors(self, transect_csv, tmp_path):
        out = tmp_path / "g"
        code = main(["eigen", "--sites", str(transect_csv), "--local-unit", "metre",
                     "--graph", "gabriel", "--weighting", "concave_down", "--exponent", "2",
                     "--max-distance", "50", "--max-vectors", "5", "--out", str(out)])
        assert code == 0
        table = pd.read_csv(out / "spatial_vectors.csv", index_col=0)
        assert list(table.columns) == ["sv001", "sv002", "sv003", "sv004", "sv005"]
        survey = read_survey(transect_csv, local_unit="metre")
        b = graph_eigenvectors(neighbour_graph(survey, "gabriel"), weighting="concave_down",
                               exponent=2, max_distance=50.0, max_vectors=5)
        assert np.allclose(table.to_numpy(), b.vectors.to_numpy(), atol=1e-9)

    def test_existing_folder_needs_overwrite(self, transect_csv, tmp_path, capsys):
        out = tmp_path / "o"
        args = ["eigen", "--sites", str(transect_csv), "--local-unit", "metre", "--out",
                str(out)]
        assert main(args) == 0
        assert main(args) == 2
        assert "already exists" in capsys.readouterr().err
        assert main(args + ["--overwrite"]) == 0

    def test_bad_option_combinations_exit_2(self, transect_csv, tmp_path, capsys):
        base = ["eigen", "--sites", str(transect_csv), "--local-unit", "metre"]
        assert main(base + ["--exponent", "2", "--out", str(tmp_path / "a")]) == 2
        assert "--exponent applies to neighbour graphs" in capsys.readouterr().err
        assert main(base + ["--graph", "k_nearest", "--out", str(tmp_path / "b")]) == 2
        assert "--graph k_nearest needs --neighbours" in capsys.readouterr().err
        assert main(base + ["--graph", "gabriel", "--weighting", "linear", "--out",
                            str(tmp_path / "c")]) == 2
        assert "gives every edge weight 0" in capsys.readouterr().err
        assert not (tmp_path / "a").exists() and not (tmp_path / "b").exists()


def test_printed_numbers_to_sensible_figures(transect_csv, tmp_path, capsys):
    """Eigenvalues to 4 significant figures, scales to 3 (Python's own '.4g'/'.3g' rounding
    as the reference), Moran's I to 4 decimals."""
    out = tmp_path / "basis"
    assert main(["eigen", "--sites", str(transect_csv), "--local-unit", "metre",
                 "--out", str(out)]) == 0
    text = capsys.readouterr().out
    props = pd.read_csv(out / "vector_properties.csv", index_col=0)
    rows = {line.split()[0]: line.split()[1:] for line in text.splitlines()
            if line.startswith("sv")}
    assert len(rows) >= 5
    for name, (eigenvalue, moran, scale) in rows.items():
        assert float(eigenvalue.replace(",", "")) == float(f"{props.loc[name, 'eigenvalue']:.4g}")
        assert float(scale.replace(",", "")) == float(f"{props.loc[name, 'scale']:.3g}")
        assert moran == f"{props.loc[name, 'moran_i']:.4f}"
        mantissa = eigenvalue.split("e")[0].replace(",", "").replace(".", "").lstrip("0-")
        assert len(mantissa.rstrip("0") if "." not in eigenvalue else mantissa) <= 4
    first = text.splitlines()[0]
    assert "threshold 25," in first  # 25 m spacing: the MST's longest edge
