"""Tests of the pilot model used as a data generator (spatial_ev.design.simulate)."""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
from conftest import make_small_survey_tables
from scipy.spatial.distance import cdist

from spatial_ev.design.evaluate import layout_basis
from spatial_ev.design.layouts import CandidateLayout
from spatial_ev.design.simulate import (
    band_members,
    band_spectrum,
    draw_fields,
    draw_truth,
    environment_at,
    field_covariance,
    holm,
    layout_model,
    pilot_model,
    site_uniforms,
    stop_category,
    vector_spectrum,
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


def _pilot_layout(pilot):
    return CandidateLayout("pilot", "pilot", pilot.survey.coords[["x", "y"]], None, {})


class TestPilotModel:
    def test_fit_and_class_fields(self, spatial_pilot):
        pilot = spatial_pilot
        # the joint least-squares fit (numpy lstsq as the oracle): each scale class's
        # field components at the pilot sites rebuild that class's fitted structure, shrunk
        # by a factor in (0, 1] (the class's adjusted/raw R² ratio)
        model = pilot_model(pilot)
        Y = pilot.response.to_numpy()
        names = list(pilot.selected_space)
        parts = [pilot.environment[list(pilot.selected_environment)].to_numpy(),
                 pilot.basis.vectors[names].to_numpy()]
        X = np.column_stack([np.ones(len(Y))] + parts)
        coef, *_ = np.linalg.lstsq(X, Y, rcond=None)
        space_coef = coef[1 + parts[0].shape[1]:]
        assert pilot.selected_space and pilot.selected_environment
        comps = {c.name: c for c in model.components}
        for fit in pilot.scale_fits:
            idx = [names.index(v) for v in fit.scale_class.vectors]
            if not idx:
                assert fit.scale_class.name not in comps
                continue
            structure = parts[1][:, idx] @ space_coef[idx]
            structure -= structure.mean(axis=0)
            comp = comps[fit.scale_class.name]
            rebuilt = comp.pilot_scores @ comp.loadings
            factor = np.sum(rebuilt * structure) / np.sum(structure ** 2)
            assert 0 < factor <= 1 + 1e-9
            assert np.allclose(rebuilt, factor * structure, atol=1e-9)
            # latent fields have unit variance among the pilot sites
            assert np.allclose(comp.pilot_scores.var(axis=0, ddof=1), 1.0)
            lam, w = comp.spectrum
            assert np.all(lam > 0) and w.sum() == pytest.approx(1.0) and np.all(w >= 0)
        n, m = X.shape[0], X.shape[1] - 1
        resid = (Y - X @ coef) * np.sqrt((n - 1) / (n - 1 - m))
        # the independent residual rows are the fit's, inflated, and shrunk by the share moved
        # into the unselected-structure field
        shrink = np.sum(model.residuals * resid) / np.sum(resid ** 2)
        assert np.allclose(model.residuals, shrink * resid, atol=1e-10) and 0 < shrink <= 1

    def test_conditional_truth_keeps_the_pilot_patches(self, spatial_pilot):
        # conditional simulation (simple kriging on the pilot's structure): at the pilot's
        # own sites every draw reproduces each class's (shrunk) fitted structure
        pilot = spatial_pilot
        model = pilot_model(pilot)
        lay = _pilot_layout(pilot)
        basis, _, _ = layout_basis(lay.coords.to_numpy(), "distance")
        lm, _ = layout_model(pilot, model, lay, basis, None, conditional=True)
        for seed in (1, 2):
            truth = draw_truth(lm, model, np.random.default_rng(seed))
            for comp in model.components:
                target = comp.pilot_scores @ comp.loadings
                got = truth["structures"][comp.name]
                assert np.corrcoef(got.ravel(), target.ravel())[0, 1] > 0.99
        # unconditional draws do not: two seeds give different landscapes at the pilot sites
        lm0, _ = layout_model(pilot, model, lay, basis, None)
        a = draw_truth(lm0, model, np.random.default_rng(1))["structures"]
        b = draw_truth(lm0, model, np.random.default_rng(2))["structures"]
        name = model.components[0].name
        assert abs(np.corrcoef(a[name].ravel(), b[name].ravel())[0, 1]) < 0.9

    def test_environment_local_part(self, pilot):
        # at pilot sites the environment is the pilot's; one pilot spacing or more away, the
        # simulated local part has the pilot's leave-one-out inverse-distance error as its
        # standard deviation (brute force with scipy's cdist as the oracle; an irregular
        # pilot, so that no two neighbours tie); category indicators get none
        indicators = {c for cols in pilot.survey.categorical.values() for c in cols}
        model = pilot_model(pilot)
        xy = pilot.survey.coords.to_numpy()
        d = cdist(xy, xy)
        np.fill_diagonal(d, np.inf)
        near = np.argsort(d, axis=1)[:, :8]
        w = 1.0 / np.take_along_axis(d, near, axis=1) ** 2
        values = pilot.environment.to_numpy()
        loo = np.einsum("mk,mkc->mc", w / w.sum(1, keepdims=True), values[near])
        expected = np.sqrt(np.mean((values - loo) ** 2, axis=0))
        expected[[c in indicators for c in pilot.environment.columns]] = 0.0
        assert expected.max() > 0
        got = np.array([model.environment_sd[c] for c in pilot.environment.columns])
        assert np.allclose(got, expected)
        far = xy.max(axis=0) + 3 * model.spacing
        new = np.vstack([xy[:3], far])
        lay = CandidateLayout("x", "file", pd.DataFrame(new, columns=["x", "y"]), None, {})
        basis = SimpleBasis(len(new))
        lm, _ = layout_model(pilot, model, lay, basis, None)
        assert np.allclose(lm.env_local_sd[:3], 0.0)
        assert np.allclose(lm.env_local_sd[3], expected)


class SimpleBasis:
    """Only what layout_model reads from a basis: the row index."""

    def __init__(self, n):
        self.vectors = pd.DataFrame(index=pd.RangeIndex(n))


class TestFields:
    def test_covariance_is_the_band_average_of_j0(self):
        # [derived] a plane wave of random direction has correlation J0(κh) (Watson 1944,
        # Bessel Functions §2.2 [memory]); the band's correlation is its average over log λ,
        # computed with scipy's quad and j0 as the oracle
        from scipy.integrate import quad
        from scipy.special import j0

        spectrum = band_spectrum((40.0, 160.0))
        for h in (0.0, 10.0, 35.0, 90.0):
            exact = quad(lambda s: j0(2 * np.pi * h / np.exp(s)), np.log(40), np.log(160))[0] \
                / np.log(4)
            assert field_covariance(np.array([h]), spectrum)[0] == pytest.approx(exact,
                                                                                 abs=2e-3)

    def test_draws_have_that_covariance(self):
        # Monte Carlo: over 4000 realisations the correlation of the field at two points h
        # apart matches field_covariance within 3 standard errors (SE ≈ (1 − r²)/√N)
        from spatial_ev.design.simulate import FieldComponent

        comp = FieldComponent("x", band_spectrum((40.0, 160.0)), np.ones((1, 1)), 1.0,
                              np.zeros((1, 1)))
        xy = np.array([[0.0, 0.0], [25.0, 0.0], [0.0, 60.0]])
        rng = np.random.default_rng(20261202)
        draws = np.array([draw_fields((comp,), rng, xy)[0][:, 0] for _ in range(4000)])
        assert draws.var(axis=0).mean() == pytest.approx(1.0, abs=0.08)
        for j, h in ((1, 25.0), (2, 60.0)):
            r = np.corrcoef(draws[:, 0], draws[:, j])[0, 1]
            expected = field_covariance(np.array([h]), comp.spectrum)[0]
            assert abs(r - expected) < 3 * (1 - expected ** 2) / np.sqrt(4000) + 0.01

    def test_common_random_numbers_site_by_site(self):
        # the same generator gives the same landscape, so a site shared by two layouts gets
        # the same field value and the same site-keyed noise whatever the other sites
        from spatial_ev.design.simulate import FieldComponent

        comp = FieldComponent("x", band_spectrum((40.0, 160.0)), np.ones((2, 3)), 1.3,
                              np.zeros((1, 2)))
        a = np.array([[5.0, 5.0], [100.0, 20.0]])
        b = np.array([[300.0, 1.0], [7.0, 9.0], [5.0, 5.0]])
        fa = draw_fields((comp,), np.random.default_rng(3), a)[0]
        fb = draw_fields((comp,), np.random.default_rng(3), b)[0]
        assert np.array_equal(fa[0], fb[2])
        ua, ub = site_uniforms(a, 11, 4, 1e-6), site_uniforms(b, 11, 4, 1e-6)
        assert np.array_equal(ua[0], ub[2]) and not np.array_equal(ua[0], ua[1])
        assert not np.array_equal(site_uniforms(a, 12, 4, 1e-6), ua)
        # uniform: mean 1/2, variance 1/12 over many sites (Kolmogorov–Smirnov with scipy)
        from scipy import stats

        many = site_uniforms(np.random.default_rng(0).uniform(0, 1e3, (5000, 2)), 5, 1, 1e-6)
        assert stats.kstest(many[:, 0], "uniform").pvalue > 0.001


    def test_vector_spectrum_finds_a_known_wave(self):
        # a plane wave of 40 m at 30° sampled on an irregular layout, centred and normed: its
        # spectrum peaks at 40 m (within one grid step, 64 points over 10–400 m)
        rng = np.random.default_rng(4)
        xy = rng.uniform(0, 300, (150, 2))
        k = 2 * np.pi / 40.0 * np.array([np.cos(0.52), np.sin(0.52)])
        u = np.cos(xy @ k)[:, None]
        u -= u.mean(0)
        u /= np.linalg.norm(u)
        lam, w = vector_spectrum(xy, u, np.array([1.0]), (10.0, 400.0))
        assert lam[w.argmax()] == pytest.approx(40.0, rel=np.log(40) / 64 * 1.1)


class TestDetectionPieces:
    def test_holm_matches_statsmodels(self):
        # Holm 1979 step-down adjustment, statsmodels' multipletests as the oracle
        from statsmodels.stats.multitest import multipletests

        p = {"broad": 0.001, "medium": 0.04, "fine": 0.03, "none": None}
        got = holm(p)
        expected = multipletests([0.001, 0.04, 0.03], method="holm")[1]
        assert np.allclose([got["broad"], got["medium"], got["fine"]], expected)
        assert got["none"] is None

    def test_members_by_their_own_scale(self):
        # a selected vector belongs to the band its own scale falls in, whatever structure
        # it carries (bounds: lower < scale <= upper)
        scale = pd.Series({"sv001": 400.0, "sv002": 150.0, "sv003": 60.0, "sv004": 120.0})
        bands = {"broad": (150.0, np.inf), "medium": (80.0, 150.0), "fine": (0.0, 80.0)}
        got = band_members(scale, ["sv003", "sv001", "sv002", "sv004"], bands)
        assert got == {"broad": ["sv001"], "medium": ["sv002", "sv004"], "fine": ["sv003"]}

    def test_stop_categories(self):
        from spatial_ev.selection.forward import forward_selection

        rng = np.random.default_rng(20261202)
        x = pd.DataFrame(rng.normal(size=(40, 3)), columns=["a", "b", "c"])
        y = np.column_stack([x["a"] * 2 + rng.normal(size=40), rng.normal(size=40)])
        sel = forward_selection(y, x, n_permutations=99, seed=1)
        assert stop_category(sel) in ("p > alpha", "ceiling")
        assert stop_category(None) == "no global significance"


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

    def test_simulated_analyses_follow_the_pilots_step_rule(self, spatial_pilot, monkeypatch):
        # a pilot run with sequential step tests is simulated with them too (one pipeline)
        import dataclasses

        import spatial_ev.design.simulate as simulate
        from spatial_ev.design.evaluate import evaluate_design

        rules = []
        original = simulate.StepOptions

        def recorded(*args, **kwargs):
            options = original(*args, **kwargs)
            rules.append(options.step_tests)
            return options
        monkeypatch.setattr(simulate, "StepOptions", recorded)
        sequential = dataclasses.replace(spatial_pilot, settings=dataclasses.replace(
            spatial_pilot.settings, step_tests="sequential"))
        evaluate_design(sequential, ["thin:every=2"], n_simulations=2, n_permutations=99,
                        seed=20261202, n_workers=1)
        assert rules == ["sequential"] * 4
        rules.clear()
        evaluate_design(spatial_pilot, ["thin:every=2"], n_simulations=2, n_permutations=99,
                        seed=20261202, n_workers=1)
        assert rules == ["full"] * 4
