"""Tests of the whole-analysis HTML report (spatial_ev.report.html)."""

from __future__ import annotations

import base64
import html
import re

import numpy as np
import pytest
from report_example import example_context
from statsmodels.stats.multitest import multipletests

from spatial_ev.errors import InputError
from spatial_ev.report.html import (
    REFERENCES,
    SECTIONS,
    build_figures,
    render_report,
    write_report,
)

MALICIOUS = "<script>alert(1)</script>"
FIGURE_PARTS = ("partition", "scalogram", "basis_moran", "weighting", "scale_maps", "lcbd",
                "triplot")


@pytest.fixture(scope="module")
def context():
    return example_context()


@pytest.fixture(scope="module")
def page(context):
    return render_report(context)


def _light(context, **changes):
    """The example context without its figure-heavy parts (fast to render), then changes."""
    out = dict(context)
    out.update({k: None for k in FIGURE_PARTS})
    out.update(changes)
    return out


def _section(page: str, key: str) -> str:
    start = page.index(f'<section id="{key}">')
    return page[start:page.index("</section>", start)]


class TestExampleContext:
    def test_complete_and_labelled_illustrative(self, context):
        assert context["illustrative"] is True
        for key in ("data", "methods", "partition", "selected_environment", "selected_space",
                    "scalogram", "basis_moran", "weighting", "scale_maps", "lcbd", "triplot",
                    "limits"):
            assert context[key] is not None, key
        assert context["data"]["n_sites"] == len(context["lcbd"]["sites"]) == 120
        assert len(context["data"]["species_names"]) == context["data"]["n_species"]
        fractions = context["partition"]["fractions"]
        assert fractions["r2_adj"].sum() == pytest.approx(1.0)  # fractions add to the total

    def test_repeatable(self):
        a, b = example_context(seed=123_456_789), example_context(seed=123_456_789)
        assert a["lcbd"]["sites"].equals(b["lcbd"]["sites"])


class TestInputsUnchanged:
    def test_render_leaves_context_as_it_was(self, context, page):
        fresh = example_context()  # same seed: what the context held before rendering
        assert context["partition"]["fractions"].equals(fresh["partition"]["fractions"])
        assert context["lcbd"]["sites"].equals(fresh["lcbd"]["sites"])
        assert list(context["lcbd"]["sites"].columns) == ["lcbd", "p", "geometry"]
        for a, b in zip(context["scale_maps"], fresh["scale_maps"]):
            assert a["sites"].equals(b["sites"])
        assert context["triplot"]["scaling_2"]["species"].equals(
            fresh["triplot"]["scaling_2"]["species"])


class TestBuildFigures:
    def test_one_figure_per_part(self, context):
        names = set(build_figures(_light(context, partition=context["partition"],
                                         scale_maps=context["scale_maps"][:2])))
        assert names == {"partition", "scale_map_1", "scale_map_2"}


class TestRenderReport:
    def test_every_section_heading(self, page):
        for key, heading in SECTIONS.items():
            assert f'<section id="{key}">' in page
            assert heading in page, heading

    def test_embeds_every_figure_as_png(self, context, page):
        images = re.findall(r'<img src="data:image/png;base64,([A-Za-z0-9+/=]+)"', page)
        # partition, scalogram, Moran's I, weighting, 3 scale maps, LCBD, 2 triplots
        assert len(images) == 10 == 7 + len(context["scale_maps"])
        for data in images:
            assert base64.b64decode(data)[:8] == b"\x89PNG\r\n\x1a\n"
        assert all(f'id="{k}"' in page for k in ("scale_maps", "triplot"))

    def test_self_contained(self, page):
        assert page.startswith("<!DOCTYPE html>")
        assert not re.search(r'(src|href)="(?!data:|#)', page), "external resource referenced"
        assert "<link" not in page and "@import" not in page and "url(" not in page

    def test_error_recorder_present(self, page):
        assert 'data-report-errors="[]"' in page
        assert "naturalWidth" in page and "data-report-images" in page

    def test_methods_follow_the_choices(self, context, page):
        methods = _section(page, "methods")
        assert "Hellinger-transformed" in methods and "999 random permutations" in methods
        assert "Random seed: 20261202" in methods
        assert "α′ = 0.008512" in methods  # Šidák level for 6 schemes [derived]
        assert "gabriel neighbour graph with linear edge weights" in methods
        other = dict(context["methods"], transformation="chord", n_permutations=4999,
                     seed=None, schemes_compared=["gabriel · binary"], selection="none",
                     permutation_method="raw",
                     basis={"family": "distance", "threshold": 1250.0, "n_vectors": 31,
                            "sign": "positive"})
        methods = _section(render_report(_light(context, methods=other)), "methods")
        assert "chord-transformed" in methods and "Hellinger" not in methods
        assert "4,999 random permutations of the rows" in methods
        assert "No seed was fixed" in methods
        assert "distances truncated at 1.25 km" in methods
        assert "No variable selection was made" in methods
        assert "Šidák" not in methods and "Freedman" not in methods

    def test_citations_match_reference_list(self, page):
        body = page[:page.index('<section id="references">')]
        refs = _section(page, "references")
        for key, full in REFERENCES.items():
            cited = html.escape(key) in body
            listed = html.escape(full) in refs
            assert cited == listed, key
        assert "Gilbert &amp; Bennett 2010" in body and "Legendre et al. 2002" in body

    def test_notes_cite_known_works(self, context):
        limits = dict(context["limits"], notes=["The link was also tested by Moran spectral "
                                                "randomisation (Wagner & Dray 2015)."])
        page = render_report(_light(context, limits=limits))
        assert "Wagner, H. H. &amp; Dray, S. (2015)" in _section(page, "references")
        assert "Wagner, H. H." not in render_report(_light(context))

    def test_limits_section(self, context, page):
        limits = _section(page, "limits")
        assert "exchangeable" in limits and "not show that the spatial pattern is caused" in limits
        assert "has no test of its own" in limits
        assert "inflates the type I error" in limits
        finest = context["limits"]["finest_scale"]
        assert f"finer than about {finest / 1000:.3g} km" in limits

    def test_lcbd_caption_names_sites(self, context, page):
        lcbd = _section(page, "lcbd")
        top = context["lcbd"]["sites"]["lcbd"].idxmax()
        assert f"Highest contributions: site {top} (" in lcbd
        n_sig = int((context["lcbd"]["sites"]["p"] <= 0.05).sum())
        assert f"Thin dashed rings: the {n_sig} site(s) whose LCBD has p ≤ 0.05" in lcbd
        assert "not corrected for testing every site" in lcbd

    def test_lcbd_marks_follow_the_corrected_p(self, context):
        sites = context["lcbd"]["sites"].copy()
        p = sites["p"].to_numpy()
        sites.loc[sites.index[np.argsort(p)[:2]], "p"] = 0.0001  # two strong sites
        # Holm (1979, Scand. J. Stat. 6:65-70) step-down adjustment, computed by statsmodels
        sites["p_holm"] = multipletests(sites["p"].to_numpy(), method="holm")[1]
        lc = {"sites": sites, "column": "lcbd", "p_column": "p", "p_corrected_column": "p_holm",
              "alpha": 0.05}
        n_holm = int((sites["p_holm"] <= 0.05).sum())
        n_weak = int(((sites["p"] <= 0.05) & (sites["p_holm"] > 0.05)).sum())
        assert n_holm >= 2 and n_weak >= 1
        fig = build_figures(_light(context, lcbd=lc))["lcbd_map"]
        ax = fig.axes[0]
        heavy = [c for c in ax.collections if c.get_gid() == "highlight"][0]
        weak = [c for c in ax.collections if c.get_gid() == "weak-highlight"][0]
        assert len(heavy.get_offsets()) == n_holm and len(weak.get_offsets()) == n_weak
        legend = [t.get_text() for t in ax.get_legend().get_texts()]
        assert legend == [f"Holm-corrected p ≤ 0.05 ({n_holm} sites)",
                          f"p ≤ 0.05 before correction only ({n_weak} site"
                          + ("" if n_weak == 1 else "s") + ")"]
        page = render_report(_light(context, lcbd=lc))
        assert f"Heavy rings: the {n_holm} site(s) whose LCBD keeps p ≤ 0.05 after the Holm" \
            in _section(page, "lcbd")
        # nothing survives the correction: the legend says so and claims no "p ≤ 0.05" site
        sites["p_holm"] = 1.0
        ax = build_figures(_light(context, lcbd=lc))["lcbd_map"].axes[0]
        legend = [t.get_text() for t in ax.get_legend().get_texts()]
        assert legend[0] == "Holm-corrected p ≤ 0.05 (0 sites)"
        assert len([c for c in ax.collections if c.get_gid() == "highlight"][0]
                   .get_offsets()) == 0

    def test_at_a_glance(self, page, context):
        start = page.index('id="at-a-glance"')
        glance = page[start:page.index("</aside>", start)]
        assert ("[a] environment only: 14.2% of the variation in composition, significant "
                "(p = 0.001).") in glance
        assert "[b] shared: 8.7% of the variation in composition." in glance
        assert "3 environmental variable(s) kept: soil_moisture, soil_pH, canopy_cover." \
            in glance
        assert "6 spatial vector(s) kept: sv001, sv002, sv004, sv009, sv015, sv023." in glance
        assert "broad (4 km–16 km, adjusted R² 0.083)" in glance
        negative = context["partition"]["fractions"].copy()
        negative.loc[1, "r2_adj"] = -0.02
        negative.loc[2, "p"] = 0.2
        page = render_report(_light(context, partition={"fractions": negative}))
        assert "[b] shared: 0.0% of the variation in composition (adjusted R² -0.020, read " \
               "as zero)." in page
        assert "[c] space only: 12.1% of the variation in composition, not significant " \
               "(p = 0.200)." in page

    def test_triplot_reading_note(self, page):
        triplot = _section(page, "triplot")
        assert "scaling 1 when the question is about sites" in triplot
        assert "scaling 2 when it is about species and variables" in triplot

    def test_escapes_user_strings(self, context):
        data = dict(context["data"], species_names=[MALICIOUS, "Species B"],
                    crs=f'EPSG:"{MALICIOUS}"')
        reasons = {"lcbd": MALICIOUS}
        page = render_report(_light(context, title=f"Survey {MALICIOUS}", data=data,
                                    missing_reasons=reasons))
        assert MALICIOUS not in page
        assert "&lt;script&gt;alert(1)&lt;/script&gt;" in page
        assert page.count("<script>") == 1  # only the report's own error recorder

    def test_missing_section_is_stated(self, context):
        page = render_report(_light(context, missing_reasons={
            "partition": "no environmental table was supplied"}))
        partition = _section(page, "partition")
        assert "Not available in this report: no environmental table was supplied" in partition
        assert "<img" not in partition
        for key in ("scalogram", "weighting", "scale_maps", "lcbd", "triplot"):
            assert "Not available in this report" in _section(page, key), key
        assert "Not available" not in _section(page, "data")

    def test_minimal_context(self):
        keys = ("data", "methods", "partition", "selected_environment", "selected_space",
                "scalogram", "basis_moran", "weighting", "scale_maps", "lcbd", "triplot",
                "limits")
        page = render_report({"title": "Empty", **{k: None for k in keys}})
        for key in ("data", "methods", "partition", "lcbd", "limits"):
            assert "Not available in this report" in _section(page, key), key
        assert "<img" not in page

    def test_empty_selection_says_so(self, context):
        empty = context["selected_space"].iloc[:0]
        page = render_report(_light(context, selected_space=empty, scale_maps=[]))
        assert "No spatial vector was selected." in _section(page, "selected")
        assert "no spatial structure to map" in _section(page, "scale_maps")

    def test_summary_style_column_names(self, context):
        space = context["selected_space"].rename(columns={"vector": "name",
                                                          "scale_class": "class"})
        env = context["selected_environment"].rename(columns={"variable": "name",
                                                              "r2_adj_cum": "r2_adj"})
        page = render_report(_light(context, selected_space=space, selected_environment=env))
        selected = _section(page, "selected")
        assert "<td>sv001</td>" in selected and "<td>soil_pH</td>" in selected
        assert "0.191" in selected and "medium" in selected

    def test_weighting_without_correction_says_so(self, context):
        weighting = dict(context["weighting"], corrected_alpha=None)
        page = render_report(_light(context, weighting=weighting))
        assert "No correction for trying several schemes" in _section(page, "weighting")
        assert "No correction" not in _section(self_page := render_report(
            _light(context, weighting=context["weighting"])), "weighting")
        assert "stricter level (solid line)" in _section(self_page, "weighting")

    def test_map_units_without_distance_unit(self, context):
        data = dict(context["data"], distance_unit=None)
        page = render_report(_light(context, data=data,
                                    selected_space=context["selected_space"]))
        assert "scale (map units)" in _section(page, "selected")

    def test_errors_name_the_context_entry(self, context):
        bad = dict(context["partition"], fractions=context["partition"]["fractions"].drop(
            columns="testable"))
        with pytest.raises(InputError, match=r"context\['partition'\]: `fractions` lacks "
                                             r"column\(s\) 'testable'"):
            render_report(_light(context, partition=bad))
        with pytest.raises(InputError, match=r"context\['selected_space'\]: needs a column "
                                             r"'vector' or 'name'"):
            render_report(_light(context, selected_space=context["selected_space"].drop(
                columns="vector")))
        with pytest.raises(InputError, match=r"context\['lcbd'\] lacks the entry 'column'"):
            render_report(_light(context, lcbd={"sites": context["lcbd"]["sites"]}))

    def test_validation(self, context):
        with pytest.raises(InputError, match="`context` must be a mapping"):
            render_report([("title", "x")])  # type: ignore[arg-type]
        with pytest.raises(InputError, match=r"`context\['title'\]` must be a non-empty"):
            render_report(dict(context, title=""))
        incomplete = {k: v for k, v in context.items() if k != "lcbd"}
        with pytest.raises(InputError, match=r"lacks key\(s\) \['lcbd'\]; pass None"):
            render_report(incomplete)


class TestWriteReport:
    def test_writes_page_and_figures(self, context, tmp_path):
        path = write_report(_light(context, partition=context["partition"]), tmp_path)
        assert path == tmp_path / "report.html"
        assert path.read_text(encoding="utf-8").count("data:image/png;base64,") == 1
        assert sorted(p.name for p in (tmp_path / "figures").iterdir()) == [
            "partition.png", "partition.svg"]

    def test_validation(self, context, tmp_path):
        with pytest.raises(InputError, match="is not an existing folder"):
            write_report(context, tmp_path / "missing")


class TestReportWords:
    def test_p_at_entry_flagged(self, context):
        page = render_report(_light(context))
        selected = _section(page, "selected")
        assert selected.count("<th class=\"num\">p at entry</th>") + \
            selected.count("<th>p at entry</th>") == 2
        assert selected.count("p at entry: the permutation p-value") == 2
        assert ">p</th>" not in selected

    def test_moran_above_one_explained_only_when_present(self, context):
        space = context["selected_space"]
        assert (space["moran_i"] <= 1).all()
        page = render_report(_light(context))
        assert "can exceed 1" not in page and "On extreme values" not in page
        # eigenvectors of a binary graph can have I above 1 (e.g. 1.033 in the demo run)
        high = space.assign(moran_i=space["moran_i"] + 0.11)
        assert (high["moran_i"] > 1).any()
        page = render_report(_light(context, selected_space=high))
        assert "Moran's I can exceed 1 here" in html.unescape(_section(page, "selected"))
        # de Jong, Sprenger & van Veen (1984, Geogr. Anal. 16:17-24) [memory]: the bounds of
        # I are set by the extreme eigenvalues of the weights, so the reference is listed
        assert "On extreme values of Moran's I and Geary's c" in html.unescape(page)

    def test_scale_described_one_way(self, context):
        page = html.unescape(re.sub(r"<[^>]+>", " ", render_report(_light(context))))
        assert "equivalent wavelength" in page and "half of it is roughly the size" in page
        assert "size of the structure a vector describes" not in page

    def test_spectral_explanation_once(self):
        limits = {"finest_scale": 10.0, "broadest_scale": 500.0, "n_positive_vectors": 20,
                  "notes": ["The community–environment link was also tested by Moran spectral "
                            "randomisation of the environmental table (Wagner & Dray 2015).",
                            "How the spectral randomisation works: random signs."]}
        page = render_report({"title": "t", **dict.fromkeys(
            ("data", "methods", "partition", "selected_environment", "selected_space",
             "scalogram", "basis_moran", "weighting", "scale_maps", "lcbd", "triplot")),
            "limits": limits})
        text = html.unescape(re.sub(r"<[^>]+>", " ", page))
        assert text.count("tested by Moran spectral randomisation") == 1

    def test_nothing_environmental_kept(self, context):
        tp = context["triplot"]
        bare = dict(tp, scaling_1=dict(tp["scaling_1"], variables=None),
                    scaling_2=dict(tp["scaling_2"], variables=None))
        page = render_report(_light(context, triplot=bare))
        section = _section(page, "triplot")
        assert "No environmental variable was kept" in section
        assert "variable arrows" not in section
        figures = build_figures(_light(context, triplot=bare))
        for key in ("triplot_scaling_1", "triplot_scaling_2"):
            ax = figures[key].axes[0]
            assert "arrows" not in ax.get_title(loc="left")
            assert figures[key]._suptitle.get_text().startswith("Unconstrained ordination")
        page = render_report(_light(context, triplot=tp))
        assert "variable arrows approximate their correlations" in _section(page, "triplot")
