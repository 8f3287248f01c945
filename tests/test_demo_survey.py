"""Tests of spatial_ev.datasets.mudflat: determinism, committed files, and the expected fractions."""

from __future__ import annotations

import json
import warnings

import numpy as np
import pandas as pd
import pyogrio
import pytest
from sklearn.linear_model import LinearRegression
from sklearn.metrics import r2_score

from spatial_ev.datasets import mudflat as D
from spatial_ev.errors import SpatialEVWarning
from spatial_ev.input.survey import read_survey


@pytest.fixture(scope="module")
def demo():
    return D.generate_demo_survey()


@pytest.fixture(scope="module")
def written(tmp_path_factory, demo):
    return D.write_demo_survey(tmp_path_factory.mktemp("demo"), demo=demo)


class TestGenerateDemoSurvey:
    def test_shape_and_scenario(self, demo):
        assert demo.species.shape == (220, 40)
        assert 150 <= demo.species.shape[0] <= 300 and 30 <= demo.species.shape[1] <= 60
        assert demo.species.columns[0] == "BTX01" and demo.species.index.name == "site_id"
        assert 4 <= demo.environment.shape[1] <= 8
        assert set(demo.environment["sediment_class"]) == {"sand", "muddy sand", "mud"}
        assert demo.sites.crs.to_epsg() == 32630
        assert (demo.species.sum(axis=0) > 0).all() and (demo.species.sum(axis=1) > 0).all()

    def test_deterministic(self, demo):
        again = D.generate_demo_survey()
        pd.testing.assert_frame_equal(again.species, demo.species)
        pd.testing.assert_frame_equal(again.environment, demo.environment)
        assert again.truth == demo.truth

    def test_expected_fractions_are_clearly_non_zero(self, demo):
        f = demo.truth["expected_fractions"]
        for name in ("environment_only", "shared", "space_only"):
            assert 0.15 <= f[name] <= 0.30, name
        assert sum(f.values()) == pytest.approx(1.0, abs=2e-4)
        sd = demo.truth["expected_fractions_sd"]
        realised = demo.truth["realised_fractions"]
        for name in f:  # the shipped draw is a typical draw
            assert abs(realised[name] - f[name]) < 4 * sd[name] + 1e-3

    def test_spatial_fields_independent_of_environment_gradients(self):
        rng = np.random.default_rng(D.SEED)
        u, v, _, _ = D._layout(rng)
        fields = D._spatial_fields(u, v, rng)
        for name in ("broad", "fine"):
            for other in ("shore", "estuary"):
                assert abs(np.corrcoef(fields[name], fields[other])[0, 1]) < 1e-10


class TestPartitionHelper:
    def test_r2_adj_matches_scikit_learn(self):
        rng = np.random.default_rng(559_013_277)
        X = rng.normal(size=(40, 3))
        Y = X @ rng.normal(size=(3, 5)) + rng.normal(size=(40, 5))
        # pooled R2 over responses = scikit-learn's variance-weighted multi-output R2;
        # adjustment per Ezekiel (1930) as in Peres-Neto et al. (2006), Ecology 87:2614-2625
        fit = LinearRegression().fit(X, Y).predict(X)
        r2 = r2_score(Y, fit, multioutput="variance_weighted")
        assert D._r2_adj(Y, X) == pytest.approx(1 - (1 - r2) * 39 / 36, rel=1e-12)

    def test_published_two_group_check_values(self):
        # n = 20, orthogonal groups of 2 and 3 variables with R2 = 0.3 and 0.2 ->
        # [a] = 0.271429, [b] = -0.053782, [c] = 0.103782 [derived] from the partition of
        # Borcard, Legendre & Drapeau (1992), Ecology 73:1045-1055 with Ezekiel's adjustment.
        rng = np.random.default_rng(118_204_339)
        Q, _ = np.linalg.qr(np.column_stack([np.ones(20), rng.normal(size=(20, 6))]))
        Q = Q[:, 1:]  # orthonormal, orthogonal to the constant
        y = Q @ np.sqrt([0.15, 0.15, 0.1, 0.1, 0.0, 0.5])
        a, b, c, d = D.oracle_partition(y[:, None], Q[:, :2], Q[:, 2:5])
        assert (a, b, c) == pytest.approx((0.271429, -0.053782, 0.103782), abs=1e-6)
        assert a + b + c + d == pytest.approx(1.0)


class TestWriteDemoSurvey:
    def test_committed_files_equal_generator_output(self, repo_root, written):
        committed = repo_root / "data_demo"
        for name in ("species.csv", "environment.csv"):
            assert (committed / name).read_bytes() == written[name.split(".")[0]].read_bytes()
        a = pyogrio.read_dataframe(committed / "sites.gpkg")
        b = pyogrio.read_dataframe(written["sites"])
        pd.testing.assert_frame_equal(a.drop(columns="geometry"), b.drop(columns="geometry"))
        assert a.geometry.geom_equals_exact(b.geometry, tolerance=0).all()
        assert a.crs == b.crs
        assert json.loads((committed / "truth.json").read_text()) == \
            json.loads(written["truth"].read_text())

    def test_files_read_cleanly_as_a_survey(self, written):
        with warnings.catch_warnings():
            warnings.simplefilter("error", SpatialEVWarning)
            s = read_survey(written["sites"], written["species"], written["environment"])
        assert s.n_sites == 220 and s.n_species == 40 and s.distance_unit == "metre"
        assert s.categorical == {"sediment_class": ["sediment_class[muddy sand]",
                                                    "sediment_class[sand]"]}
        assert all(not v for v in s.dropped.values())
