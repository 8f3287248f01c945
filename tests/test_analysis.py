"""Tests of spatial_ev.pipeline.analysis (the whole chain) on the demo survey and small invented surveys."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from conftest import make_small_survey_tables

from spatial_ev.errors import InputError
from spatial_ev.input.survey import Survey, read_survey
from spatial_ev.pipeline.analysis import Analysis, AnalysisSettings, analyse
from spatial_ev.report.summary import summary_record

CONTRACT_KEYS = {"n_sites", "n_species", "transformation", "crs", "distance_unit",
                 "spatial_basis", "global_tests", "selected", "fractions", "fraction_tests",
                 "scales", "permutations", "seed", "version"}


def small_survey(environment: bool = True, **kwargs) -> Survey:
    sites, species, env = make_small_survey_tables(**kwargs)
    frame = sites.set_index("site").rename(columns={"easting": "x", "northing": "y"})
    return Survey.from_frames(frame, species.set_index("site"),
                              env.set_index("site") if environment else None, crs="EPSG:32633")


@pytest.fixture(scope="module")
def demo_result(repo_root):
    folder = repo_root / "data_demo"
    survey = read_survey(folder / "sites.gpkg", folder / "species.csv",
                         folder / "environment.csv")
    # 199 permutations reach the Šidák level of the 8 default schemes (α' = 0.0064 > 1/200)
    return analyse(survey, n_permutations=199, seed=20240917)


class TestAnalyseDemo:
    @pytest.mark.slow
    def test_recovers_true_fractions(self, demo_result, repo_root):
        # The demo's expected fractions are the adjusted-R² partition (Peres-Neto et al. 2006,
        # Ecology 87:2614-2625) obtained with the true generating predictors, averaged over
        # redraws of the sampling noise (data_demo/README.md; their spread is ~0.004). The
        # analysis has to find the spatial predictors itself, so:
        # - environment-only and shared fractions come from the environmental side and the
        #   broad gradients, which the design resolves well: within 0.05;
        # - the space-only fraction can only be under-recovered: the 'fine' field has
        #   wavelengths of 90-160 m, i.e. 2.25-4 grid intervals of 40 m, at the finest scale a
        #   layout resolves (~2-4 sampling intervals, Nyquist-type reasoning [practice]), and
        #   forward selection with double stopping is conservative by design (Blanchet,
        #   Legendre & Borcard 2008, Ecology 89:2623-2632). Bound: between half the true value
        #   and the true value + 0.05;
        # - what is not recovered moves to the unexplained fraction: at most 0.12 above truth.
        # A wrong fraction formula, a lost trend or a failed selection breaks these bounds.
        truth = json.loads((repo_root / "data_demo" / "truth.json").read_text())
        expected = truth["expected_fractions"]
        got = demo_result.fractions
        assert got["environment_only"] == pytest.approx(expected["environment_only"], abs=0.05)
        assert got["shared"] == pytest.approx(expected["shared"], abs=0.05)
        assert 0.5 * expected["space_only"] <= got["space_only"] <= expected["space_only"] + 0.05
        assert expected["unexplained"] - 0.05 <= got["unexplained"] \
            <= expected["unexplained"] + 0.12
        assert sum(got.values()) == pytest.approx(1.0, abs=1e-12)
        assert demo_result.fraction_tests["environment_only"] <= 0.05
        assert demo_result.fraction_tests["space_only"] <= 0.05

    @pytest.mark.slow
    def test_true_variables_selected(self, demo_result, repo_root):
        truth = json.loads((repo_root / "data_demo" / "truth.json").read_text())
        selected = set(demo_result.selected_environment)
        for name in ("elevation_m", "salinity_psu", "organic_matter_mg_g"):
            assert name in selected
        assert "chlorophyll_ug_g" not in selected  # decoy: unrelated to the community
        assert truth["true_environment_variables"]

    @pytest.mark.slow
    def test_summary_contract(self, demo_result):
        summary = summary_record(demo_result)
        assert CONTRACT_KEYS <= set(summary)
        text = json.dumps(summary, allow_nan=False)  # plain JSON, no NaN
        assert json.loads(text) == summary
        assert summary["n_sites"] == 220 and summary["n_species"] == 40
        assert summary["spatial_basis"]["n_vectors"] == demo_result.basis.n_vectors
        assert set(summary["fractions"]) == {"environment_only", "shared", "space_only",
                                             "unexplained"}
        for entry in summary["selected"]["space"]:
            assert set(entry) >= {"name", "moran_i", "scale", "p"}
        vectors = [v for c in summary["scales"] for v in c["vectors"]]
        assert sorted(vectors) == sorted(demo_result.selected_space)

    @pytest.mark.slow
    def test_scale_classes_respect_bounds(self, demo_result):
        for fit in demo_result.scale_fits:
            lower, upper = fit.scale_class.bounds
            for name in fit.scale_class.vectors:
                assert lower < demo_result.basis.scale[name] <= upper
            if fit.site_scores is not None:
                assert list(fit.site_scores.index) == list(demo_result.survey.site_ids)
                assert fit.grid_scores is not None and len(fit.grid_scores) > 100


class TestAnalyseSmall:
    def test_same_seed_same_summary(self):
        survey = small_survey()
        a = analyse(survey, spatial_weighting="single", schemes="distance",
                    n_permutations=99, seed=123456789)
        b = analyse(survey, spatial_weighting="single", schemes="distance",
                    n_permutations=99, seed=123456789)
        assert summary_record(a) == summary_record(b)

    def test_spatial_only(self):
        res = analyse(small_survey(environment=False), spatial_weighting="single",
                      schemes="gabriel/binary", n_permutations=99, seed=20261202)
        summary = summary_record(res)
        assert summary["fractions"] is None and summary["fraction_tests"] is None
        assert summary["global_tests"]["environment"] is None
        assert any("spatial only" in note for note in res.notes)

    def test_grid_prediction_reproduces_sites(self):
        # The basis extension (Gower 1968 add-a-point, Nyström form) is exact at the sampled
        # sites [derived], so a "grid" made of the site coordinates must give the site scores.
        from spatial_ev.pipeline.options import StepOptions
        from spatial_ev.pipeline.scale_classes import fit_scale_classes

        res = analyse(small_survey(), spatial_weighting="single", schemes="distance",
                      n_permutations=99, seed=4242)
        grid = res.survey.coords.reset_index(drop=True)
        fits = fit_scale_classes(res.response - res.response.mean(), res.basis,
                                 [f.scale_class for f in res.scale_fits], trend=None, grid=grid,
                                 seed=np.random.default_rng(1),
                                 options=StepOptions(n_permutations=19))
        for fit in fits:
            if fit.site_scores is not None:
                np.testing.assert_allclose(fit.grid_scores[["axis_1"]].to_numpy(),
                                           fit.site_scores[["axis_1"]].to_numpy(), atol=1e-8)

    def test_no_structure_selects_nothing_spatial(self):
        # Species drawn independently of space and environment: the global spatial test
        # protects against false selection (Blanchet et al. 2008) — with this seed nothing is
        # selected; fractions then follow the documented zero-by-construction rule.
        rng = np.random.default_rng(987654321)
        survey = small_survey()
        noise = pd.DataFrame(rng.poisson(3.0, size=survey.species.shape) + 1.0,
                             index=survey.species.index, columns=survey.species.columns)
        null = Survey.from_frames(survey.sites, noise)
        res = analyse(null, spatial_weighting="single", schemes="distance", n_permutations=199,
                      seed=55555)
        assert res.selected_space == ()
        assert res.scale_fits and all(f.site_scores is None for f in res.scale_fits)

    # --- input validation -------------------------------------------------------------
    def test_needs_species(self):
        sites, _, _ = make_small_survey_tables()
        frame = sites.set_index("site").rename(columns={"easting": "x", "northing": "y"})
        with pytest.raises(InputError, match="no species table"):
            analyse(Survey.from_frames(frame, crs="EPSG:32633"))

    def test_not_a_survey(self):
        with pytest.raises(InputError, match="must be a Survey"):
            analyse(pd.DataFrame({"a": [1]}))

    def test_bad_alpha(self):
        with pytest.raises(InputError, match="alpha"):
            analyse(small_survey(), alpha=0.9)

    def test_bad_seed(self):
        with pytest.raises(InputError, match="seed"):
            analyse(small_survey(), seed=-3)

    def test_single_needs_one_scheme(self):
        with pytest.raises(InputError, match="exactly one scheme"):
            analyse(small_survey(), spatial_weighting="single",
                    schemes=["distance", "gabriel/binary"])


class TestAnalyseOptions:
    def test_max_vectors_caps_the_basis(self):
        res = analyse(small_survey(), spatial_weighting="single", schemes="distance",
                      n_permutations=99, seed=777, max_vectors=5)
        assert res.basis.n_vectors == 5
        assert res.settings.max_vectors == 5

    def test_large_survey_default_is_recorded(self, monkeypatch):
        import spatial_ev.pipeline.steps as module

        monkeypatch.setattr(module, "DENSE_LIMIT", 50)  # treat the 64-site survey as large
        survey = small_survey()
        res = analyse(survey, spatial_weighting="single", schemes="distance",
                      n_permutations=99, seed=778)
        count = module.large_survey_candidates(survey.coords)
        # 64 sites: the design's count (at most n // 2) is below the budget, so it decides
        assert count.n_vectors == count.design_vectors <= 32
        assert res.settings.max_vectors == count.n_vectors
        assert res.basis.n_vectors <= count.n_vectors
        assert any(f"{count.n_vectors} per scheme were candidates" in note
                   for note in res.notes)

    def test_environment_group_fallback(self):
        # Double stopping can stop before the first variable although the global test was
        # significant (Blanchet et al. 2008 ceiling); the partition then uses the whole table.
        from types import SimpleNamespace

        from spatial_ev.pipeline.steps import partition_step

        env = pd.DataFrame({"a": [1.0, 2, 3], "b": [0.0, 1, 0]})
        Y = np.array([[1.0], [2.0], [0.5]])
        stopped = SimpleNamespace(selected=(), global_test=SimpleNamespace(p_value=0.01),
                                  r2_adj=0.0)
        step = partition_step(Y, env, stopped, None)
        assert step.environment_group is env
        assert "ceiling" in step.notes[0]
        assert step.fraction_tests["environment_only"] == 0.01
        rejected = SimpleNamespace(selected=(), global_test=SimpleNamespace(p_value=0.2),
                                   r2_adj=0.0)
        step = partition_step(Y, env, rejected, None)
        assert step.environment_group is None and not any("ceiling" in n for n in step.notes)
        chosen = SimpleNamespace(selected=("b",), global_test=None, r2_adj=0.3)
        step = partition_step(Y, env, chosen, None)
        assert list(step.environment_group.columns) == ["b"]
        # a group with nothing selected contributes zero: the fractions still sum to one
        assert step.fractions["space_only"] == 0.0 and step.fractions["environment_only"] == 0.3
        assert sum(step.fractions.values()) == pytest.approx(1.0, abs=1e-12)

    def test_bad_max_vectors(self):
        with pytest.raises(InputError, match="max_vectors"):
            analyse(small_survey(), max_vectors=0)


@pytest.fixture(scope="module")
def result():
    return analyse(small_survey(), spatial_weighting="single", schemes="distance",
                   n_permutations=99, seed=4343)


class TestTypedResults:
    def test_settings_are_a_frozen_value(self, result):
        import dataclasses

        settings = result.settings
        assert isinstance(settings, AnalysisSettings)
        assert settings.n_permutations == 99 and settings.schemes == ("distance",)
        assert settings["seed"] == settings.seed == 4343
        with pytest.raises(dataclasses.FrozenInstanceError):
            settings.alpha = 0.1
        with pytest.raises(KeyError):
            settings["no_such_setting"]
        record = settings.to_dict()
        assert json.loads(json.dumps(record)) == record
        assert record["schemes"] == ["distance"] and isinstance(record["scale_breaks"], list)

    def test_result_is_frozen(self, result):
        import dataclasses

        with pytest.raises(dataclasses.FrozenInstanceError):
            result.notes = ()
        assert isinstance(result.scale_fits, tuple) and isinstance(result.notes, tuple)

    def test_analyse_runs_the_named_steps(self, result):
        # analyse() orchestrates the named steps: the trend step run alone on the analysis's
        # trend stream (the first of seven spawned from the seed) gives the same test
        from spatial_ev.pipeline.options import StepOptions
        from spatial_ev.pipeline.steps import trend_step

        stream = np.random.default_rng(4343).spawn(7)[0]
        alone = trend_step(result.response, result.survey.coords, alpha=0.05, seed=stream,
                           options=StepOptions(n_permutations=99))
        assert alone.test.p_value == result.trend.p_value
        assert alone.test.statistic == result.trend.statistic
        assert alone.kept == result.trend_kept
        assert all(note in result.notes for note in alone.notes)

    def test_default_trend_rule_tests_a_planar_trend(self, result):
        # without a river network the default rule ("auto") is the planar trend test
        assert result.settings.trend == "test" and result.trend is not None

    def test_summary_record_needs_an_analysis(self):
        with pytest.raises(InputError, match="`analysis` must be an Analysis"):
            summary_record({"n_sites": 3})
        assert Analysis.__dataclass_params__.frozen


class TestSequentialStepTests:
    def test_every_selection_follows_the_rule(self, repo_root):
        folder = repo_root / "data_demo"
        survey = read_survey(folder / "sites.gpkg", folder / "species.csv",
                             folder / "environment.csv")
        kwargs = dict(n_permutations=199, seed=5, environment_test="permutation",
                      schemes=["distance", "gabriel/binary"])
        full = analyse(survey, **kwargs)
        early = analyse(survey, **kwargs, step_tests="sequential")
        assert early.settings.step_tests == "sequential" and full.settings.step_tests == "full"
        for a, b in ((full.environment_selection, early.environment_selection),
                     (full.space_selection, early.space_selection)):
            assert b.sequential and not a.sequential
            assert b.selected == a.selected
            assert (b.steps["permutations"] <= 199).all()
        # the fraction tests keep the full count and the same draws
        assert early.fraction_tests == full.fraction_tests
        assert early.fractions == full.fractions

    def test_shared_permutations_reach_every_selection(self, repo_root):
        folder = repo_root / "data_demo"
        survey = read_survey(folder / "sites.gpkg", folder / "species.csv",
                             folder / "environment.csv")
        shared = analyse(survey, n_permutations=199, seed=5, environment_test="permutation",
                         schemes=["distance", "gabriel/binary"], step_tests="shared")
        assert shared.settings.step_tests == "shared"
        for selection in (shared.environment_selection, shared.space_selection):
            assert selection.shared and not selection.sequential and selection.selected
            assert "permutations" not in selection.steps.columns
        assert "one set shared by every step" in shared.space_selection.summary()

    def test_bad_rule_is_named(self):
        with pytest.raises(InputError, match="step_tests"):
            analyse(small_survey(), n_permutations=99, seed=1, step_tests="early")

    def test_auto_rule_follows_the_number_of_sites(self, monkeypatch):
        import spatial_ev.pipeline.steps as steps

        survey = small_survey()
        kwargs = dict(n_permutations=99, seed=3, environment_test="permutation",
                      schemes=["distance"])
        small = analyse(survey, **kwargs)
        assert small.settings.step_tests == "full"
        assert not any("step-test rule" in note for note in small.notes)
        # the same survey counted as large: the default shares the step permutations, the
        # settings record the rule that ran (so a pilot rerun repeats it) and a note says so
        monkeypatch.setattr(steps, "SHARED_STEPS_ABOVE", survey.n_sites - 1)
        large = analyse(survey, **kwargs)
        assert large.settings.step_tests == "shared"
        ran = [sel for sel in (large.environment_selection, large.space_selection)
               if sel is not None]
        assert ran and all(sel.shared for sel in ran)
        assert any("step-test rule 'auto' above" in note for note in large.notes)
        explicit = analyse(survey, **kwargs, step_tests="full")
        assert explicit.settings.step_tests == "full"


class TestTrendRule:
    def test_auto_resolves_by_network(self):
        from spatial_ev.pipeline.steps import resolve_trend

        assert resolve_trend("auto", on_network=False) == ("test", None)
        mode, note = resolve_trend("auto", on_network=True)
        assert mode == "ignore" and "tributaries" in note
        for given in ("test", "ignore"):
            assert resolve_trend(given, on_network=True) == (given, None)

    def test_bad_rule_is_named(self):
        from spatial_ev.pipeline.steps import resolve_trend, trend_step

        with pytest.raises(InputError, match="trend"):
            resolve_trend("planar", on_network=False)
        with pytest.raises(InputError, match="on_network"):
            resolve_trend("auto", on_network="yes")
        # the step itself runs only a resolved rule
        coords = pd.DataFrame({"x": np.arange(12.0), "y": np.zeros(12)})
        with pytest.raises(InputError, match="mode"):
            trend_step(np.ones((12, 2)), coords, mode="auto")
