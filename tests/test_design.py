"""Tests of spectral coverage and simulated power of candidate layouts (spatial_ev.design.evaluate)."""

from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
import shapely

from spatial_ev.design.evaluate import (
    DesignEvaluation,
    evaluate_design,
    layout_basis,
    spectral_coverage,
)
from spatial_ev.design.layouts import grid_layout, transect_layout
from spatial_ev.errors import DesignError, InputError
from spatial_ev.input.survey import Survey
from spatial_ev.pipeline.analysis import analyse


def _grid_survey(n_side: int = 12, spacing: float = 10.0, seed: int = 20261202) -> Survey:
    """Invented regular-grid survey: a broad wave, a fine wave and two drivers, Poisson counts."""
    rng = np.random.default_rng(seed)
    gx, gy = np.meshgrid(np.arange(n_side) * spacing, np.arange(n_side) * spacing)
    x, y = gx.ravel(), gy.ravel()
    ids = pd.Index([f"Q{i:03d}" for i in range(x.size)], name="site")
    extent = spacing * (n_side - 1)
    broad = np.cos(np.pi * x / extent) + np.cos(np.pi * y / extent)
    fine = np.cos(2 * np.pi * x / (4.5 * spacing)) * np.cos(2 * np.pi * y / (4.5 * spacing))
    depth, salt = rng.normal(size=x.size), rng.normal(size=x.size)
    load = rng.normal(0, 0.9, (4, 10))
    counts = rng.poisson(np.exp(1.2 + np.column_stack([broad, fine, depth, salt]) @ load))
    counts[:, 0] += 1
    sites = pd.DataFrame({"x": x, "y": y}, index=ids)
    species = pd.DataFrame(counts, index=ids, columns=[f"T{j:02d}" for j in range(10)])
    env = pd.DataFrame({"depth": depth, "salinity": salt}, index=ids)
    return Survey.from_frames(sites, species, env, local_unit="metre")


@pytest.fixture(scope="module")
def grid_pilot():
    return analyse(_grid_survey(), spatial_weighting="single", schemes="distance",
                   n_permutations=99, seed=20261202, trend="ignore", scale_breaks=[60.0, 30.0])


class TestLayoutBasis:
    def test_finest_scale_regular_grid(self):
        # finest resolvable wavelength ≈ 2–4 sampling intervals (Nyquist-type reasoning
        # [practice]; REFERENCES.md "Sampling design")
        area = shapely.box(0, 0, 160, 160)
        for spacing in (10.0, 20.0, 40.0):
            basis, used, _ = layout_basis(grid_layout(spacing=spacing, area=area)
                                          .coords.to_numpy(), "distance")
            assert used == "distance"
            assert 2.0 <= basis.scale.min() / spacing <= 4.0

    def test_finest_scale_transect(self):
        # on a regular transect a sine of wavelength λ has Moran's I ∝ cos(2π s/λ) at the
        # neighbour lag s, positive only for λ > 4 s [derived from the transect eigenfunctions,
        # Borcard & Legendre 2002]: the finest positive-I vector sits just above 4 intervals
        for spacing in (1.0, 2.5):
            lay = transect_layout(start=(0, 0), bearing=90, spacing=spacing, length=100 * spacing)
            basis, _, _ = layout_basis(lay.coords.to_numpy(), "distance")
            assert 4.0 <= basis.scale.min() / spacing <= 4.3

    def test_graph_scheme_falls_back(self):
        # linear weights on a regular grid give every edge (all as long as d_max) weight 0:
        # that scheme cannot be built there, so distance-based vectors are used, with a note
        lay = grid_layout(spacing=10, area=shapely.box(0, 0, 60, 60))
        basis, used, note = layout_basis(lay.coords.to_numpy(), "gabriel/linear")
        assert used == "distance" and "could not be built" in note and basis.n_vectors > 0

    def test_too_few_sites(self):
        with pytest.raises(DesignError, match="a layout of 3 sites has no spatial eigenvector"):
            layout_basis(np.array([[0.0, 0], [1, 0], [2, 1]]), "distance")


class TestSpectralCoverage:
    def test_thinning_loses_finest_classes_first(self, grid_pilot):
        # thinning the regular grid (every 2nd, 3rd, 4th row and column = spacing 20, 30,
        # 40): the fine class (≤ 30 m) goes first, once 2–4 intervals exceed its upper bound,
        # then the medium class (30–60 m); the broad class stays resolved
        area = shapely.box(0, 0, 110, 110)
        layouts = [grid_layout(spacing=s, area=area, name=f"every {int(s // 10)}")
                   for s in (10.0, 20.0, 30.0, 40.0)]
        cov = spectral_coverage(grid_pilot, layouts)
        counts = cov.classes.pivot(index="layout", columns="scale_class",
                                   values="layout_vectors").loc[[lay.name for lay in layouts]]
        assert counts.loc["every 1", "fine"] > 0
        assert counts.loc["every 2", "fine"] == 0 and counts.loc["every 2", "medium"] > 0
        assert counts.loc["every 4", "medium"] <= counts.loc["every 2", "medium"]
        assert (counts["broad"] > 0).all()
        # the fine class disappears when the finest scale passes its upper bound (30 m)
        finest = cov.layouts["finest_scale"]
        for name in counts.index:
            assert (counts.loc[name, "fine"] == 0) == (finest[name] > 30.0)
        # Nyquist-type bounds [practice]: the finest resolvable wavelength is 2–4 sampling
        # intervals, so a class entirely below 2 intervals has no vector and a class reaching
        # above 4 intervals (within the extent) keeps some
        spacing = {f"every {k}": 10.0 * k for k in (1, 2, 3, 4)}
        for row in cov.classes.itertuples():
            s = spacing[row.layout]
            if row.upper < 2 * s:
                assert row.layout_vectors == 0, row
            if row.upper > 4 * s and row.lower < cov.layouts.loc[row.layout, "broadest_scale"]:
                assert row.layout_vectors > 0, row
        status = cov.classes.set_index(["layout", "scale_class"])["status"]
        assert status[("every 2", "fine")] == "not resolved"
        assert status[("every 1", "broad")] == "resolved"

    def test_status_rule(self, grid_pilot):
        # documented rule: not resolved when no vector lies in the band or the band holds
        # under a quarter of what the basis captures of the class's structure; resolved
        # needs the band to hold the largest share (so at least 1/(classes) of it)
        cov = spectral_coverage(grid_pilot, ["thin:every=1", "thin:every=3"])
        k = cov.classes["scale_class"].nunique()
        for row in cov.classes.itertuples():
            captured = row.carried + row.aliased
            assert 0 <= row.carried and 0 <= row.aliased and captured <= 1 + 1e-9
            in_band = row.carried / captured if captured > 0 else 0.0
            if row.layout_vectors == 0 or in_band < 0.25:
                assert row.status == "not resolved", row
            else:
                assert row.status in ("resolved", "partly"), row
            if row.status == "resolved":
                assert row.carried * (k - 1) >= row.aliased - 1e-12, row
        status = cov.classes.set_index(["layout", "scale_class"])["status"]
        # the pilot's own layout resolves its broad and medium classes; its fine class lies at
        # its resolution limit (27–30 m on a 10 m grid), where half a wave's variation falls
        # on negatively autocorrelated vectors and the rest leaks to the medium band
        assert status[("thin:every=1", "broad")] == status[("thin:every=1", "medium")] \
            == "resolved"
        assert status[("thin:every=1", "fine")] != "not resolved"
        # every 3rd row and column (30 m): the fine and medium bands lie below 2–4 intervals
        assert status[("thin:every=3", "fine")] == "not resolved"

    def test_band_shares_over_a_complete_basis_sum_to_one(self):
        # [derived] Parseval: over a complete orthonormal basis orthogonal to the constant
        # (numpy QR), the shares of any centred field sum to 1, however the bands split the
        # vectors; a band-limited field puts nothing on vectors of a band it has no part in
        # only if those vectors are orthogonal to it, so only the sum is checked
        from spatial_ev.design.evaluate import band_shares
        from spatial_ev.design.simulate import band_spectrum

        rng = np.random.default_rng(20261202)
        xy = rng.uniform(0, 100, (30, 2))
        q, _ = np.linalg.qr(np.column_stack([np.ones(30), rng.normal(size=(30, 29))]))
        basis = SimpleNamespace(vectors=pd.DataFrame(q[:, 1:]),
                                scale=pd.Series(np.geomspace(200, 5, 29)))
        bands = {"broad": (50.0, np.inf), "medium": (20.0, 50.0), "fine": (0.0, 20.0)}
        shares = band_shares(basis, xy, band_spectrum((20.0, 60.0)), bands)
        assert sum(shares.values()) == pytest.approx(1.0, abs=1e-12)

    def test_layout_table(self, grid_pilot):
        cov = spectral_coverage(grid_pilot, ["grid:spacing=20;name=coarse", "thin:every=2"])
        assert list(cov.layouts.index) == ["coarse", "thin:every=2"]
        assert (cov.layouts["broadest_scale"] > cov.layouts["finest_scale"]).all()
        assert cov.layouts.loc["coarse", "n_sites"] == 36

    def test_input_validation(self, grid_pilot):
        with pytest.raises(InputError, match="`pilot` must be an Analysis .* got float"):
            spectral_coverage(3.5, ["thin:every=2"])
        with pytest.raises(InputError, match="`layouts` is empty"):
            spectral_coverage(grid_pilot, [])
        with pytest.raises(InputError, match=r"layout names must be unique; \['a'\]"):
            spectral_coverage(grid_pilot, ["thin:every=2;name=a", "thin:every=3;name=a"])
        with pytest.raises(InputError, match="entries must be CandidateLayout"):
            spectral_coverage(grid_pilot, [3.0])


class TestEvaluateDesign:
    def test_result_and_model(self, grid_pilot):
        ev = evaluate_design(grid_pilot, ["thin:every=2"], n_simulations=3,
                             n_permutations=99, seed=20261202)
        assert isinstance(ev, DesignEvaluation)
        assert [lay.name for lay in ev.layouts] == ["pilot", "thin:every=2"]
        assert set(ev.power["objective"]) == {"environment", "scale:broad", "scale:medium",
                                              "scale:fine"}
        assert ev.power["power"].between(0, 1).all()
        se = np.sqrt(ev.power["power"] * (1 - ev.power["power"]) / 3)
        assert np.allclose(ev.power["mc_se"], se)
        # Wilson score interval (Wilson 1927), statsmodels as the oracle
        from statsmodels.stats.proportion import proportion_confint

        lo, hi = proportion_confint(np.round(ev.power["power"] * 3), 3, method="wilson")
        assert np.allclose(ev.power["ci_low"], lo) and np.allclose(ev.power["ci_high"], hi)
        # the partition of every simulated table sums to 1 (Borcard et al. 1992)
        est = ev.simulations[[f"estimate_{f}" for f in ("environment_only", "shared",
                                                        "space_only", "unexplained")]]
        assert np.allclose(est.sum(axis=1), 1.0)
        assert len(ev.recommendations) >= 1 and "power ≥ 0.8" in ev.recommendations[0]
        assert "independent" in ev.settings.residual_model
        assert ev.to_dict()["settings"]["seed"] == 20261202
        text = ev.summary()
        assert "3 simulations each" in text and "spatially independent residuals" in text

    def test_ceiling_warning_and_stop_table(self):
        # more than half of a layout's spatial selections stopped by the ceiling: a note
        # naming the share and the pilot's re-detection rates; half or less: none
        from spatial_ev.design.evaluate import _ceiling_notes

        power = pd.DataFrame({"layout": ["pilot", "pilot", "a"],
                              "objective": ["scale:broad", "scale:fine", "scale:fine"],
                              "pilot_significant": [True, True, True],
                              "power": [0.9, 0.05, 0.4]})
        stops = pd.DataFrame({"layout": ["pilot", "pilot", "a"],
                              "selection": ["space", "environment", "space"],
                              "ceiling": [0.75, 0.9, 0.5]})
        notes = _ceiling_notes(power, stops)
        assert len(notes) == 1 and notes[0].startswith("pilot: the adjusted-R² ceiling")
        assert "75%" in notes[0] and "scale:fine: 0.05" in notes[0]

    def test_never_recommended_for_a_class_it_does_not_resolve(self):
        # a layout with high power for a class it does not resolve (aliasing) is named as
        # such and never recommended for it; the cheapest resolving layout is
        from spatial_ev.design.evaluate import _recommend

        classes = pd.DataFrame({"scale_class": ["fine"], "lower": [0.0], "upper": [120.0],
                                "finest_selected": [90.0]})
        power = pd.DataFrame({
            "layout": ["grid 100 m", "dense"], "objective": ["scale:fine"] * 2,
            "pilot_significant": [True, True], "power": [0.93, 0.85], "mc_se": [0.03, 0.04],
            "ci_low": [0.86, 0.76], "ci_high": [0.97, 0.91],
            "resolution": ["not resolved", "resolved"], "carried": [0.0, 0.6],
            "n_sites": [25, 300], "line_length": [np.nan, 540.0]})
        built = [SimpleNamespace(name="grid 100 m", n_sites=25, line_length=None),
                 SimpleNamespace(name="dense", n_sites=300, line_length=540.0)]
        text = _recommend(power, None, 0.8, classes, built)
        assert any("'grid 100 m' reaches power 0.93" in s and "does not resolve" in s
                   for s in text)
        need = [s for s in text if "you need" in s]
        assert len(need) == 1 and "'dense'" in need[0] and "540 map units of line" in need[0]
        assert not any("nan" in s for s in text)

    def test_line_length_text(self):
        from spatial_ev.design.evaluate import _line_text

        assert _line_text(540.0) == ", 540 map units of line"
        assert _line_text(float("nan")) == "" and _line_text(None) == ""

    def test_truth_option_and_common_landscapes(self, grid_pilot):
        # conditional and unconditional truths are both offered; with the same seed a layout
        # listed twice (under two names) gets identical simulations (common random numbers)
        ev = evaluate_design(grid_pilot, ["thin:every=2;name=a", "thin:every=2;name=b"],
                             n_simulations=2, n_permutations=99, seed=5, reference="none",
                             truth="conditional", n_workers=1)
        a = ev.simulations[ev.simulations["layout"] == "a"].drop(columns="layout")
        b = ev.simulations[ev.simulations["layout"] == "b"].drop(columns="layout")
        pd.testing.assert_frame_equal(a.reset_index(drop=True), b.reset_index(drop=True))
        assert ev.settings.truth == "conditional"
        assert set(ev.stops["selection"]) == {"space", "environment"}
        with pytest.raises(InputError, match="parameter `truth` must be one of"):
            evaluate_design(grid_pilot, ["thin:every=2"], truth="fixed")

    def test_same_seed_same_table_any_engine(self, grid_pilot):
        distributed = pytest.importorskip("distributed")
        kwargs = dict(n_simulations=3, n_permutations=99, seed=20261202, reference="none")
        layouts = ["thin:every=2", "grid:spacing=20"]
        one = evaluate_design(grid_pilot, layouts, n_workers=1, **kwargs)
        two = evaluate_design(grid_pilot, layouts, n_workers=2, **kwargs)
        with distributed.LocalCluster(processes=False, n_workers=2, threads_per_worker=1,
                                      dashboard_address=":0") as cluster, \
                distributed.Client(cluster) as client:
            dask = evaluate_design(grid_pilot, layouts, engine="dask", scheduler=client,
                                   **kwargs)
        pd.testing.assert_frame_equal(one.power, two.power)
        pd.testing.assert_frame_equal(one.power, dask.power)
        pd.testing.assert_frame_equal(one.simulations, dask.simulations, rtol=1e-12)

    def test_progress(self, grid_pilot):
        calls = []
        evaluate_design(grid_pilot, ["thin:every=2"], n_simulations=2, n_permutations=99,
                        seed=20261203, reference="none",
                        progress=lambda done, total: calls.append((done, total)))
        assert calls[-1] == (2, 2)

    def test_too_few_sites_message(self, grid_pilot):
        with pytest.raises(DesignError, match=r"'thin:every=20' \(8 sites\) have fewer than "
                                              r"10 sites"):
            evaluate_design(grid_pilot, ["thin:every=20"], n_simulations=2, seed=1)

    def test_input_validation(self, grid_pilot):
        with pytest.raises(InputError, match="parameter `n_simulations` must be >= 1"):
            evaluate_design(grid_pilot, ["thin:every=2"], n_simulations=0)
        with pytest.raises(InputError, match="parameter `space_level` must be one of"):
            evaluate_design(grid_pilot, ["thin:every=2"], space_level="loose")
        with pytest.raises(InputError, match="parameter `seed` must be a non-negative"):
            evaluate_design(grid_pilot, ["thin:every=2"], seed=-4)
        with pytest.raises(InputError, match="parameter `target_power` must be"):
            evaluate_design(grid_pilot, ["thin:every=2"], target_power=1.5)


@pytest.fixture(scope="module")
def demo_pilot():
    from spatial_ev.datasets.mudflat import generate_demo_survey

    demo = generate_demo_survey()
    survey = Survey.from_frames(demo.sites, demo.species, demo.environment)
    return analyse(survey, spatial_weighting="single", schemes="distance", n_permutations=99,
                   seed=20240917)


@pytest.mark.slow
class TestPowerOnDemoModel:
    def test_power_rises_with_sites(self, demo_pilot):
        # 55, 110 and 220 sites of the demo layout: detection of the broad and medium scale
        # classes cannot fall as sites are added, and rises clearly from 55 to 220
        ev = evaluate_design(demo_pilot, ["thin:every=4", "thin:every=2"], n_simulations=20,
                             n_permutations=99, seed=20261202)
        power = ev.power.pivot(index="layout", columns="objective", values="power")
        order = ["thin:every=4", "thin:every=2", "pilot"]
        for obj in ("scale:broad", "scale:medium"):
            p = power.loc[order, obj].to_numpy()
            assert np.all(np.diff(p) >= -0.1), (obj, p)
            assert p[-1] - p[0] >= 0.4, (obj, p)
        # the environmental fraction is strong in the demo model: detected at every size
        assert (power["environment"] >= 0.8).all()
        # fractions at the pilot's own layout: the simulated truth is close to the pilot's
        # estimate (the model was fitted there); bias is reported, spread positive
        fr = ev.fractions.set_index(["layout", "fraction"])
        assert abs(fr.loc[("pilot", "environment_only"), "truth"]
                   - fr.loc[("pilot", "environment_only"), "pilot"]) < 0.05
        assert (ev.fractions["sd"] > 0).all()
        assert math.isfinite(fr.loc[("thin:every=4", "space_only"), "bias"])


@pytest.mark.slow
class TestDemoDoneWhen:
    def test_augmenting_keeps_and_thinning_loses_the_fine_class(self, demo_pilot):
        # on the demo pilot: 40 sites added in the largest gaps detect the fine class at
        # least as often as the pilot (within 2 SE, common random numbers), and thinning by
        # 2 loses it (not resolved, never detected, never recommended for it)
        ev = evaluate_design(demo_pilot, ["augment:add=40", "thin:every=2"], n_simulations=30,
                             n_permutations=99, seed=11)
        p = ev.power.set_index(["layout", "objective"])
        a, b = p.loc[("augment:add=40", "scale:fine")], p.loc[("pilot", "scale:fine")]
        assert a["power"] >= b["power"] - 2 * np.hypot(a["mc_se"], b["mc_se"])
        thin = p.loc[("thin:every=2", "scale:fine")]
        assert thin["resolution"] == "not resolved" and thin["power"] == 0
        fine = [r for r in ev.recommendations if "fine scale class" in r]
        assert fine and not any("'thin:every=2'" in r and "you need" in r for r in fine)
