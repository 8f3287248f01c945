"""Tests of the design figures, page and folder (spatial_ev.report.design_report)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import shapely

from spatial_ev.design.evaluate import (
    DesignEvaluation,
    DesignSettings,
    SpectralCoverage,
    layout_basis,
)
from spatial_ev.design.layouts import grid_layout
from spatial_ev.errors import InputError
from spatial_ev.report.design_report import (
    coverage_figure,
    layer_name,
    layout_map_figure,
    power_figure,
    render_design_report,
)


def _evaluation(name: str = "grid:spacing=20") -> DesignEvaluation:
    lay = grid_layout(spacing=20, area=shapely.box(0, 0, 100, 100), name=name)
    basis, used, _ = layout_basis(lay.coords.to_numpy(), "distance")
    layouts = pd.DataFrame({"kind": ["grid"], "n_sites": [lay.n_sites], "line_length": [None],
                            "scheme": [used], "n_vectors": [basis.n_vectors],
                            "broadest_scale": [basis.scale.max()],
                            "finest_scale": [basis.scale.min()], "note": [""]},
                           index=pd.Index([name], name="layout"))
    classes = pd.DataFrame({"layout": [name] * 2, "scale_class": ["broad", "fine"],
                            "lower": [60.0, 0.0], "upper": [np.inf, 60.0],
                            "pilot_significant": [True, False], "pilot_vectors": [2, 0],
                            "layout_vectors": [int((basis.scale > 60).sum()),
                                               int((basis.scale <= 60).sum())],
                            "status": ["resolved", "not resolved"]})
    power = pd.DataFrame({"layout": [name] * 2, "objective": ["environment", "scale:broad"],
                          "pilot_significant": [True, True], "power": [0.9, 0.5],
                          "mc_se": [0.03, 0.05], "n_sites": [lay.n_sites] * 2,
                          "line_length": [None, None]})
    fractions = pd.DataFrame({"layout": [name], "fraction": ["environment_only"],
                              "pilot": [0.2], "truth": [0.19], "mean_estimate": [0.18],
                              "bias": [-0.01], "sd": [0.02]})
    settings = DesignSettings(seed=1, n_simulations=100, n_permutations=199,
                              global_space_permutations=199, alpha=0.05,
                              space_level="corrected", space_test_level=0.05, target_power=0.8,
                              scheme="distance", scale_breaks=(60.0, 30.0),
                              environment_source="interpolated",
                              residual_model="resampled rows; spatially independent",
                              pilot_seed=1, engine="local", layout_diagnostics={})
    return DesignEvaluation((lay,), SpectralCoverage(layouts, classes, {name: basis}), power,
                            fractions, pd.DataFrame(), ("To detect <x> you need y.",),
                            settings, ("a note",))


class TestCoverageFigure:
    def test_ticks_per_vector(self):
        ev = _evaluation()
        cov = ev.coverage
        fig = coverage_figure(cov.layouts, cov.classes,
                              {n: b.scale for n, b in cov.bases.items()})
        ticks = [c for c in fig.axes[0].collections if c.get_gid() == "layout-vectors"]
        assert len(ticks) == 1
        assert len(ticks[0].get_segments()) == cov.layouts["n_vectors"].iloc[0]
        assert fig.axes[0].get_xscale() == "log"

    def test_class_colours_shared_with_the_run_report(self):
        # each class label takes the strong colour of the shared code (finest class first),
        # the one the run report's class maps and scalogram use
        from matplotlib.colors import to_hex

        from spatial_ev.report import _style as st

        ev = _evaluation()
        cov = ev.coverage
        fig = coverage_figure(cov.layouts, cov.classes,
                              {n: b.scale for n, b in cov.bases.items()})
        labels = [t for t in fig.axes[0].texts if t.get_gid() == "class-label"]
        first = cov.classes.drop_duplicates("scale_class")
        expected = dict(zip(first["scale_class"],
                            [c[1] for c in st.scale_class_colours(first["lower"])]))
        assert labels
        for text in labels:
            name = text.get_text().rstrip(" *")
            assert to_hex(text.get_color()) == to_hex(expected[name])

    def test_missing_scales(self):
        ev = _evaluation()
        with pytest.raises(InputError, match="no vector scales for layout"):
            coverage_figure(ev.coverage.layouts, ev.coverage.classes, {})


class TestPowerFigure:
    def test_target_line_and_order(self):
        t = pd.DataFrame({"layout": ["dear", "cheap"], "objective": ["environment"] * 2,
                          "power": [0.9, 0.4], "mc_se": [0.03, 0.05], "n_sites": [90, 40]})
        fig = power_figure(t, target=0.7)
        ax = fig.axes[0]
        assert [ln.get_ydata()[0] for ln in ax.lines if ln.get_gid() == "target-power"] == [0.7]
        assert [t.get_text().split("\n")[0] for t in ax.get_xticklabels()] == ["cheap", "dear"]

    def test_intervals_at_certainty(self):
        # power 1 and 0 with intervals touching the estimate (rounding may put them a hair
        # beyond it): the bars are drawn without error
        t = pd.DataFrame({"layout": ["a", "b"], "objective": ["environment"] * 2,
                          "power": [1.0, 0.0], "mc_se": [0.0, 0.0], "n_sites": [40, 90],
                          "ci_low": [0.93, 0.0], "ci_high": [1.0 - 1e-16, 1e-17]})
        assert len(power_figure(t).axes) == 1

    def test_missing_column(self):
        with pytest.raises(InputError, match="`power` lacks column 'mc_se'"):
            power_figure(pd.DataFrame({"layout": [], "objective": [], "power": [],
                                       "n_sites": []}))


class TestLayoutMapFigure:
    def test_one_panel_per_layout(self):
        xy = np.random.default_rng(20261202).uniform(0, 100, (30, 2))
        fig = layout_map_figure(xy, {"a": pd.DataFrame(xy[:5], columns=["x", "y"]),
                                     "b": pd.DataFrame(xy[5:], columns=["x", "y"])})
        assert len(fig.axes) == 2

    def test_empty(self):
        with pytest.raises(InputError, match="`layouts` is empty"):
            layout_map_figure(np.zeros((3, 2)), {})


class TestRenderDesignReport:
    def test_page_escapes_and_limits(self):
        page = render_design_report(_evaluation("<b>grid</b>"), pilot_xy=np.zeros((4, 2)))
        assert page.startswith("<!DOCTYPE html>")
        assert "<b>grid</b>" not in page and "&lt;b&gt;grid&lt;/b&gt;" in page
        assert "To detect &lt;x&gt; you need y." in page
        assert "How to read this report, and its limits" in page
        assert page.count("data:image/png;base64,") == 3

    def test_not_an_evaluation(self):
        with pytest.raises(InputError, match="`evaluation` must be a DesignEvaluation"):
            render_design_report({"power": None})


class TestPlainHeaders:
    def test_no_machine_names(self):
        from spatial_ev.report.design_report import plain_header

        for name in ("scale_class", "mc_se", "n_sites", "layout_vectors", "space_stop",
                     "environment_only", "ci_low"):
            assert "_" not in plain_header(name)
        assert plain_header("mc_se") == "Monte Carlo SE"
        assert plain_header("power") == "power"


class TestLayerName:
    def test_plain_identifier(self):
        assert layer_name(3, "transect:start=1,2;bearing=45") == \
            "layout_03_transect_start_1_2_bearing_45"
        assert layer_name(1, "///") == "layout_01_layout"
