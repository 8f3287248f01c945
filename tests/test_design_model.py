"""Tests of the pilot model used as a data generator (spatial_ev.design.simulate)."""

from __future__ import annotations

from types import SimpleNamespace

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
from conftest import make_small_survey_tables
from scipy.spatial.distance import cdist

from spatial_ev.design.evaluate import layout_basis
from spatial_ev.design.layouts import CandidateLayout
from spatial_ev.design.simulate import (
    _LayoutModel,
    _owners,
    environment_at,
    layout_model,
    pilot_model,
)
from spatial_ev.errors import InputError
from spatial_ev.input.survey import Survey
from spatial_ev.pipeline.analysis import analyse


@pytest.fixture(scope="module")
def pilot():
    sites, species, env = make_small_survey_tables()
    sites = sites.set_index("site").rename(columns={"easting": "x", "northing": "y"})
    survey = Survey.from_frames(sites, species.set_index("site"), env.set_index("site"),
                                crs="EPSG:32633")
    return analyse(survey, spatial_weighting="single", schemes="distance", n_permutations=99,
                   seed=20261202)


class TestEnvironmentAt:
    def test_exact_at_pilot_sites(self, pilot):
        xy = pilot.survey.coords.to_numpy()[:7]
        env, how = environment_at(pilot, xy)
        assert np.allclose(env.to_numpy(), pilot.environment.to_numpy()[:7])
        assert "inverse distance" in how

    def test_inverse_distance_oracle(self, pilot):
        # Shepard's inverse-distance weighting, w = 1/d² over the 8 nearest sites, computed
        # here by brute force with scipy's cdist [practice]
        rng = np.random.default_rng(20261202)
        xy = pilot.survey.coords.to_numpy()
        new = xy.min(axis=0) + rng.uniform(0, 1, (5, 2)) * np.ptp(xy, axis=0)
        env, _ = environment_at(pilot, new)
        d = cdist(new, xy)
        near = np.argsort(d, axis=1)[:, :8]
        w = 1.0 / np.take_along_axis(d, near, axis=1) ** 2
        values = pilot.environment.to_numpy()
        expected = np.einsum("mk,mkc->mc", w / w.sum(1, keepdims=True), values[near])
        numeric = [c for c in env.columns if "[" not in c]
        cols = [list(env.columns).index(c) for c in numeric]
        assert np.allclose(env.to_numpy()[:, cols], expected[:, cols])
        # category indicators come from the nearest site (0/1 preserved)
        ind = [i for i, c in enumerate(env.columns) if "[" in c]
        assert np.array_equal(env.to_numpy()[:, ind], values[near[:, 0]][:, ind])

    def test_layer(self, pilot):
        raw = pilot.survey.environment
        xy = pilot.survey.coords.to_numpy()[:4] + 0.5
        layer = gpd.GeoDataFrame({"depth_m": [1.0, 2.0, 3.0, 4.0],
                                  "substrate": ["sand", "mud", "sand", "mud"]},
                                 geometry=gpd.points_from_xy(xy[:, 0], xy[:, 1]),
                                 crs=pilot.survey.crs)
        env, how = environment_at(pilot, xy, layer=layer)
        col = raw["depth_m"].to_numpy()
        assert np.allclose(env["depth_m"], (np.arange(1.0, 5.0) - col.mean()) / col.std(ddof=1))
        indicator = pilot.survey.categorical["substrate"][0]
        level = indicator[len("substrate") + 1:-1]
        assert env[indicator].tolist() == [float(v == level) for v in layer["substrate"]]
        assert "layer" in how

    def test_layer_missing_column(self, pilot):
        xy = pilot.survey.coords.to_numpy()[:2]
        layer = gpd.GeoDataFrame({"other": [1.0, 2.0]},
                                 geometry=gpd.points_from_xy(xy[:, 0], xy[:, 1]),
                                 crs=pilot.survey.crs)
        with pytest.raises(InputError, match=r"environment layer lacks the pilot variable\(s\)"):
            environment_at(pilot, xy, layer=layer)


@pytest.fixture(scope="module")
def spatial_pilot():
    from test_design import _grid_survey

    return analyse(_grid_survey(), spatial_weighting="single", schemes="distance",
                   n_permutations=99, seed=20261202, trend="ignore")


class TestPilotModel:
    def test_signal_at_pilot_sites_is_the_fit(self, spatial_pilot):
        pilot = spatial_pilot
        # at the pilot's own sites the generating signal is the least-squares fit of the
        # transformed community on trend + selected environment + selected vectors
        # (numpy lstsq as the oracle)
        model = pilot_model(pilot)
        lay = CandidateLayout("pilot", "pilot", pilot.survey.coords[["x", "y"]], None, {})
        basis, _, _ = layout_basis(lay.coords.to_numpy(), "distance")
        lm, info = layout_model(pilot, model, lay, basis, None)
        Y = pilot.response.to_numpy()
        parts = []
        if pilot.trend_kept:
            parts.append(pilot.survey.coords.to_numpy())
        if pilot.selected_environment:
            parts.append(pilot.environment[list(pilot.selected_environment)].to_numpy())
        parts.append(pilot.basis.vectors[list(pilot.selected_space)].to_numpy())
        X = np.column_stack([np.ones(len(Y))] + parts)
        coef, *_ = np.linalg.lstsq(X, Y, rcond=None)
        assert np.allclose(lm.signal, X @ coef, atol=1e-10)
        assert pilot.selected_space and pilot.selected_environment
        assert all(abs(v - 1.0) < 1e-9 for v in info["class_variance_ratio"].values())
        # residual rows: the fit's residuals inflated by sqrt((n - 1)/(n - 1 - m))
        n, m = X.shape[0], X.shape[1] - 1
        assert np.allclose(model.residuals,
                           (Y - X @ coef) * np.sqrt((n - 1) / (n - 1 - m)), atol=1e-10)


class TestOwners:
    def test_vectors_go_to_the_structure_they_carry(self):
        # a vector aligned with one class's structure is attributed to it, whatever its
        # nominal scale (orthonormal columns from numpy's QR)
        rng = np.random.default_rng(20261202)
        q, _ = np.linalg.qr(rng.normal(size=(40, 3)) - 0.0)
        q -= q.mean(axis=0)
        q, _ = np.linalg.qr(q)
        load = rng.normal(size=(1, 5))
        parts = {"broad": np.outer(q[:, 0], load[0]), "fine": np.outer(q[:, 2], load[0])}
        vec = pd.DataFrame(q, columns=["sv001", "sv002", "sv003"])
        lay = _LayoutModel("x", np.zeros((40, 5)), pd.DataFrame({"x": q[:, 0], "y": q[:, 1]}),
                           None, SimpleNamespace(vectors=vec), None, None, parts)
        assert _owners(lay, vec, ("sv003", "sv001")) == ["fine", "broad"]
        assert _owners(lay, vec, ()) == []


class TestSimulatorRunsThePipeline:
    def test_every_named_step_runs_once_per_simulation(self, spatial_pilot, monkeypatch):
        # the simulated analysis is the pipeline's own steps, not a copy of them: each named
        # step (and the scale-class test) is called exactly once per simulated survey
        import spatial_ev.design.simulate as simulate
        from spatial_ev.design.evaluate import evaluate_design

        calls = {}
        for name in ("trend_step", "environment_step", "space_step", "partition_step",
                     "scale_class_p_values"):
            original = getattr(simulate, name)

            def counted(*args, _name=name, _original=original, **kwargs):
                calls[_name] = calls.get(_name, 0) + 1
                return _original(*args, **kwargs)
            monkeypatch.setattr(simulate, name, counted)
        evaluate_design(spatial_pilot, ["thin:every=2"], n_simulations=2, n_permutations=99,
                        seed=20261202, n_workers=1)
        assert calls == {name: 4 for name in calls} and len(calls) == 5  # 2 layouts × 2
