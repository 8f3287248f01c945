"""Tests of spatial_ev.datasets.lakes: the invented lake survey (polygons in longitude/latitude).

Determinism and the committed files, the geometry (valid, non-overlapping, irregular, the
projection round trip checked with pyproj), lake areas checked against geodesic areas on the
ellipsoid, and the documented fractions recomputed with scikit-learn.
"""

from __future__ import annotations

import json
import warnings

import numpy as np
import pandas as pd
import pyogrio
import pyproj
import pytest
import shapely
from scipy.spatial import cKDTree
from sklearn.linear_model import LinearRegression
from sklearn.metrics import r2_score

from spatial_ev.datasets import lakes as P
from spatial_ev.errors import GeographicCoordinatesWarning, InputError, SpatialEVWarning
from spatial_ev.input.survey import read_survey


@pytest.fixture(scope="module")
def lakes():
    return P.generate_lake_survey()


@pytest.fixture(scope="module")
def written(tmp_path_factory, lakes):
    return P.write_lake_survey(tmp_path_factory.mktemp("lakes"), lakes=lakes)


def _replay():
    """The generator's internal draws, in its order (centres, outlines, fields, environment)."""
    rng = np.random.default_rng(P.SEED)
    u, v, radius, basin, ids = P._centres(rng)
    polygons, area = P._outlines(u, v, radius, rng)
    fields = P._spatial_fields(u, v, rng)
    env, predictors = P._environment(fields, area, rng)
    return u, v, polygons, fields, env, predictors


def _r2_adj(Y: np.ndarray, X: np.ndarray) -> float:
    # pooled R² over responses = scikit-learn's variance-weighted multi-output R²; adjusted per
    # Ezekiel (1930) as in Peres-Neto, Legendre, Dray & Borcard (2006), Ecology 87:2614-2625
    n, m = X.shape
    fit = LinearRegression().fit(X, Y).predict(X)
    r2 = r2_score(Y, fit, multioutput="variance_weighted")
    return 1 - (1 - r2) * (n - 1) / (n - m - 1)


class TestGenerateLakeSurvey:
    def test_shape_and_scenario(self, lakes):
        assert lakes.species.shape == (150, 30)
        assert 80 <= lakes.species.shape[0] <= 200
        assert lakes.species.index.name == "lake_id" and lakes.species.columns[0] == "LKT01"
        assert list(lakes.environment.columns) == ["depth_m", "ph", "area_ha", "colour_mg_pt_l",
                                                   "shore_type"]
        assert set(lakes.environment["shore_type"]) == {"peaty", "sandy", "rocky"}
        assert lakes.sites.crs.to_epsg() == 4326
        assert set(lakes.sites["basin"]) == {"A", "B", "C", "D", "scattered"}
        assert (lakes.species.sum(axis=0) > 0).all() and (lakes.species.sum(axis=1) > 0).all()
        assert lakes.sites.index.equals(lakes.species.index)

    def test_deterministic(self, lakes):
        again = P.generate_lake_survey()
        pd.testing.assert_frame_equal(again.species, lakes.species)
        pd.testing.assert_frame_equal(again.environment, lakes.environment)
        assert again.sites.geometry.geom_equals_exact(lakes.sites.geometry, tolerance=0).all()
        assert again.truth == lakes.truth

    def test_polygons_valid_and_never_touching(self, lakes):
        geoms = lakes.sites.to_crs(P._local_crs()).geometry.to_numpy()
        assert shapely.is_valid(geoms).all()
        assert (shapely.get_num_coordinates(geoms) == 21).all()  # 20 vertices, closed ring
        tree = shapely.STRtree(geoms)
        pairs = tree.query(geoms, predicate="dwithin", distance=19.0)
        assert (pairs[0] == pairs[1]).all()  # each lake is within 19 m only of itself

    def test_layout_is_irregular_and_clustered(self, lakes):
        xy = np.column_stack(_replay()[:2])
        d, _ = cKDTree(xy).query(xy, k=2)
        nn = d[:, 1]
        assert nn.min() > 100 and nn.max() > 5 * np.median(nn)  # clusters and isolated lakes

    def test_projection_round_trip_with_pyproj(self, lakes):
        # the degrees written are the local metres projected with pyproj (1e-7 degree rounding)
        _, _, polygons_m, *_ = _replay()
        back = lakes.sites.to_crs(P._local_crs()).geometry.to_numpy()
        a = shapely.get_coordinates(polygons_m)
        b = shapely.get_coordinates(back)
        assert np.abs(a - b).max() < 0.02

    def test_area_matches_geodesic_area(self, lakes):
        # area on the WGS 84 ellipsoid (Karney 2013, J. Geodesy 87:43-55, via pyproj.Geod)
        geod = pyproj.Geod(ellps="WGS84")
        geodesic = np.array([abs(geod.geometry_area_perimeter(g)[0])
                             for g in lakes.sites.geometry]) / 10_000
        np.testing.assert_allclose(lakes.environment["area_ha"], geodesic, rtol=2e-3, atol=1e-3)

    def test_spatial_fields_independent_of_the_gradient(self):
        *_, fields, _, _ = _replay()
        for name in ("patches", "local"):
            assert abs(np.corrcoef(fields[name], fields["upland"])[0, 1]) < 1e-10
            assert abs(fields[name].mean()) < 1e-12 and fields[name].std() == pytest.approx(1)
        assert abs(np.corrcoef(fields["patches"], fields["local"])[0, 1]) < 1e-10

    def test_realised_fractions_recomputed_with_scikit_learn(self, lakes):
        # partition of Borcard, Legendre & Drapeau (1992), Ecology 73:1045-1055, of Hellinger
        # profiles (Legendre & Gallagher 2001, Oecologia 129:271-280)
        *_, fields, _, predictors = _replay()
        counts = lakes.species.to_numpy(dtype=float)
        Y = np.sqrt(counts / counts.sum(axis=1, keepdims=True))
        X = predictors.to_numpy()
        W = np.column_stack([fields[f] for f in ("upland", "patches", "local")])
        rx, rw, rxw = _r2_adj(Y, X), _r2_adj(Y, W), _r2_adj(Y, np.column_stack([X, W]))
        expected = {"environment_only": rxw - rw, "shared": rx + rw - rxw,
                    "space_only": rxw - rx, "unexplained": 1 - rxw}
        for name, value in expected.items():
            assert lakes.truth["realised_fractions"][name] == pytest.approx(value, abs=6e-5)

    def test_expected_fractions_clearly_non_zero(self, lakes):
        f = lakes.truth["expected_fractions"]
        for name in ("environment_only", "shared", "space_only"):
            assert 0.12 <= f[name] <= 0.35, name
        assert sum(f.values()) == pytest.approx(1.0, abs=2e-4)
        sd, realised = lakes.truth["expected_fractions_sd"], lakes.truth["realised_fractions"]
        for name in f:  # the shipped draw is a typical draw
            assert abs(realised[name] - f[name]) < 4 * sd[name] + 1e-3

    def test_decoy_is_unrelated_to_space_and_taxa_model(self):
        *_, fields, env, _ = _replay()
        r = np.corrcoef(env["colour_mg_pt_l"], fields["upland"])[0, 1]
        assert abs(r) < 0.25  # pure noise: |r| < 0.25 for n = 150 with high probability
        assert "colour_mg_pt_l" in P.generate_lake_survey().truth["decoy_environment_variables"]


class TestWriteLakeSurvey:
    def test_committed_files_equal_generator_output(self, repo_root, written):
        committed = repo_root / "data_demo" / "lakes"
        for name in ("species.csv", "environment.csv"):
            assert (committed / name).read_bytes() == written[name.split(".")[0]].read_bytes()
        a = pyogrio.read_dataframe(committed / "lakes.gpkg")
        b = pyogrio.read_dataframe(written["sites"])
        pd.testing.assert_frame_equal(a.drop(columns="geometry"), b.drop(columns="geometry"))
        assert a.geometry.geom_equals_exact(b.geometry, tolerance=0).all()
        assert a.crs == b.crs
        assert json.loads((committed / "truth.json").read_text()) == \
            json.loads(written["truth"].read_text())

    def test_readme_states_the_expected_fractions(self, repo_root, lakes):
        text = (repo_root / "data_demo" / "lakes" / "README.md").read_text(encoding="utf-8")
        for value in lakes.truth["expected_fractions"].values():
            assert f"{value:.4f}" in text
        assert str(P.SEED) in text

    def test_files_read_as_a_projected_polygon_survey(self, written):
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", SpatialEVWarning)
            s = read_survey(written["sites"], written["species"], written["environment"])
        assert [w.category for w in caught] == [GeographicCoordinatesWarning]
        assert s.n_sites == 150 and s.n_species == 30 and s.geometry_type == "polygon"
        assert s.distance_unit == "metre" and s.crs.is_projected
        assert s.categorical == {"shore_type": ["shore_type[rocky]", "shore_type[sandy]"]}
        # representative points lie inside their lakes
        inside = shapely.contains_xy(s.sites.geometry.to_numpy(), s.coords["x"].to_numpy(),
                                     s.coords["y"].to_numpy())
        assert inside.all()

    # -------------------------------------------------------------- input validation
    def test_missing_folder_is_named(self, tmp_path):
        with pytest.raises(InputError, match=r"folder '.*nowhere' does not exist; create it"):
            P.write_lake_survey(tmp_path / "nowhere")

    def test_folder_must_be_a_path(self):
        with pytest.raises(InputError, match=r"`folder` must be a path; got int"):
            P.write_lake_survey(3)

    def test_lakes_must_be_a_lake_survey(self, tmp_path):
        with pytest.raises(InputError, match=r"`lakes` must be a LakeSurvey .*; got dict"):
            P.write_lake_survey(tmp_path, lakes={})
