"""Tests of the report figures (spatial_ev.report.figures) and maps (spatial_ev.report.maps).

The figure functions compute nothing: the tests feed known plain data and check that the
drawn artists say what the data say (one bar per fraction, negative fractions left of zero,
the scale-bar length for a known extent, arrows per variable, axis percentages ...).
"""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import shapely
from scipy.spatial.distance import cdist
from matplotlib.collections import PathCollection
from matplotlib.colors import to_hex
from matplotlib.figure import Figure
from matplotlib.image import AxesImage
from matplotlib.text import Annotation

from spatial_ev.errors import CRSError, InputError
from spatial_ev.report import _style as st
from spatial_ev.report.figures import (moran_scale_figure, partition_figure, save_figure,
                                       scalogram_figure, triplot_figure, unit_symbol,
                                       weighting_figure)
from spatial_ev.report.labels import label_boxes, overlapping_pairs
from spatial_ev.report.maps import nice_scale_bar, site_map_figure
from spatial_ev.report.surface import smooth_surface, surface_opacity, surface_reach

SEED = 7_310_442_981


def _bars(fig: Figure) -> list:
    return [p for ax in fig.axes for p in ax.patches if p.get_gid() == "fraction-bar"]


def _texts(fig: Figure) -> list[str]:
    out = [t.get_text() for ax in fig.axes for t in ax.texts]
    out += [t.get_text() for t in fig.texts]
    if fig._supxlabel is not None:  # the note under the partition figure
        out.append(fig._supxlabel.get_text())
    return out


def _collection(fig: Figure, gid: str) -> PathCollection:
    found = [c for ax in fig.axes for c in ax.collections if c.get_gid() == gid]
    assert len(found) == 1, f"expected one collection with gid {gid!r}, found {len(found)}"
    return found[0]


def _collection_all(fig: Figure, gid: str) -> list:
    found = [c for ax in fig.axes for c in ax.collections if c.get_gid() == gid]
    assert found, f"no collection with gid {gid!r}"
    return found


def _two_group_table() -> pd.DataFrame:
    # Two orthogonal groups, n = 20, 2 and 3 variables with R² 0.3 and 0.2 (union 0.5):
    # [a] = 0.271429, [b] = -0.053782, [c] = 0.103782 (Borcard, Legendre & Drapeau 1992,
    # Ecology 73:1045-1055 fractions; Ezekiel 1930 adjustment) [derived]; [d] = 1 - 0.321429.
    return pd.DataFrame({
        "name": ["[a] environment only", "[b] shared", "[c] space only", "[d] unexplained"],
        "members": [("environment",), ("environment", "space"), ("space",), ()],
        "r2_adj": [0.271429, -0.053782, 0.103782, 0.678571],
        "testable": [True, False, True, False],
        "p": [0.001, None, 0.2, None]})


def _group_table(groups: list[str]) -> pd.DataFrame:
    """Every non-empty combination of the groups, then the unexplained fraction."""
    rng = np.random.default_rng(SEED)
    combos = [tuple(g for k, g in enumerate(groups) if mask >> k & 1)
              for mask in range(1, 2 ** len(groups))]
    values = rng.uniform(0.0, 0.05, len(combos))
    return pd.DataFrame({"name": [" & ".join(c) for c in combos] + ["unexplained"],
                         "members": combos + [()],
                         "r2_adj": list(values) + [1 - values.sum()],
                         "testable": [len(c) == 1 for c in combos] + [False],
                         "p": [0.01 if len(c) == 1 else None for c in combos] + [None]})


class TestObjectInterface:
    def test_no_pyplot_figures_and_no_style_leak(self):
        import matplotlib
        import matplotlib.pyplot as plt

        before = dict(matplotlib.rcParams)
        names, scale, r2, moran = _basis(10)
        partition_figure(_two_group_table())
        scalogram_figure(r2, scale)
        moran_scale_figure(moran, scale)
        site_map_figure(_points(), column="score")
        polys = gpd.GeoDataFrame({"v": [1.0, 2.0]}, geometry=[shapely.box(0, 0, 1, 1),
                                                              shapely.box(1, 0, 2, 1)])
        site_map_figure(polys, column="v", north_arrow="none")  # drawn through geopandas
        assert plt.get_fignums() == []  # nothing registered in pyplot's global state
        assert dict(matplotlib.rcParams) == before


    def test_user_labels_shown_as_typed(self, tmp_path):
        # "$...$" would be parsed as mathematics (and an unknown command would crash drawing)
        name = r"$\undefinedcommand$ sp."
        sites, species, variables, eig = _scores()
        species = species.rename(index={species.index[0]: name})
        species.iloc[0] = [9.0, 9.0, 9.0]  # the longest, so it is labelled
        fig = triplot_figure(sites, species, variables.rename(index={"pH": name}), eig,
                             scaling=1, n_labels=1)
        save_figure(fig, tmp_path, "triplot", formats=("png",))
        assert [t.get_text() for t in fig.axes[0].texts if t.get_gid() == "species-label"] \
            == [name]


class TestUnitSymbol:
    def test_known_units(self):
        assert unit_symbol("metre") == "m"
        assert unit_symbol("US survey foot") == "ft (US)"
        assert unit_symbol(None) == "map units"
        assert unit_symbol("furlong") == "furlong"


class TestSaveFigure:
    def test_writes_png_and_svg(self, tmp_path):
        paths = save_figure(partition_figure(_two_group_table()), tmp_path, "partition")
        assert paths["png"].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        assert "<svg" in paths["svg"].read_text()[:2000]

    def test_same_figure_same_bytes(self, tmp_path):
        (tmp_path / "a").mkdir()
        (tmp_path / "b").mkdir()
        first = save_figure(partition_figure(_two_group_table()), tmp_path / "a", "p")
        second = save_figure(partition_figure(_two_group_table()), tmp_path / "b", "p")
        for fmt in ("png", "svg"):
            assert first[fmt].read_bytes() == second[fmt].read_bytes(), fmt

    def test_bad_stem(self, tmp_path):
        with pytest.raises(InputError, match="`stem` must contain only letters"):
            save_figure(Figure(), tmp_path, "../escape")

    def test_missing_folder(self, tmp_path):
        with pytest.raises(InputError, match="is not an existing folder"):
            save_figure(Figure(), tmp_path / "nope", "x")

    def test_bad_format(self, tmp_path):
        with pytest.raises(InputError, match="`formats` entries must be"):
            save_figure(Figure(), tmp_path, "x", formats=("gif",))


class TestPartitionFigure:
    def test_one_bar_per_fraction_with_values(self):
        table = _two_group_table()
        fig = partition_figure(table)
        bars = _bars(fig)
        assert len(bars) == 4
        # bars are drawn top to bottom in table order and their lengths are the fractions
        assert [b.get_label() for b in bars] == list(table["name"])
        np.testing.assert_allclose([b.get_width() for b in bars], table["r2_adj"])

    def test_negative_fraction_drawn_left_of_zero_hatched_with_note(self):
        fig = partition_figure(_two_group_table())
        shared = _bars(fig)[1]
        assert shared.get_x() + shared.get_width() < 0 <= shared.get_x()
        assert shared.get_hatch()
        assert all(not b.get_hatch() for b in _bars(fig) if b.get_width() > 0)
        texts = _texts(fig)
        assert any("negative adjusted R² fractions" in t for t in texts)
        assert any(t.startswith("-0.054") and "read as 0" in t for t in texts)

    def test_no_negative_note_when_all_positive(self):
        table = _two_group_table()
        table.loc[1, "r2_adj"] = 0.01
        assert not any("negative adjusted" in t for t in _texts(partition_figure(table)))

    def test_significance_marks_and_untestable(self):
        texts = _texts(partition_figure(_two_group_table(), alpha=0.05))
        assert any(t.startswith("0.271") and "p = 0.001" in t and t.endswith("*")
                   for t in texts)
        assert any(t.startswith("0.104") and "p = 0.200" in t and not t.endswith("*")
                   for t in texts)
        assert sum("not testable" in t for t in texts) == 2

    def test_colours_follow_membership(self):
        bars = _bars(partition_figure(_two_group_table()))
        hexes = [st.matplotlib.colors.to_hex(b.get_facecolor()) for b in bars]
        assert hexes[0] == st.GROUP_COLOURS[0] and hexes[2] == st.GROUP_COLOURS[1]
        assert hexes[3] == st.UNEXPLAINED

    @pytest.mark.parametrize("groups", [["env", "space", "time"],
                                        ["env", "space", "time", "soil"]])
    def test_three_and_four_groups(self, groups):
        table = _group_table(groups)
        fig = partition_figure(table)
        assert len(_bars(fig)) == 2 ** len(groups)
        membership_axes = fig.axes[0]
        assert [t.get_text() for t in membership_axes.get_xticklabels()] == groups

    def test_without_members_column(self):
        fig = partition_figure(_two_group_table().drop(columns="members"))
        assert len(fig.axes) == 1 and len(_bars(fig)) == 4

    def test_validation(self):
        table = _two_group_table()
        with pytest.raises(InputError, match="lacks column\\(s\\) 'testable'"):
            partition_figure(table.drop(columns="testable"))
        bad = table.copy()
        bad.loc[0, "r2_adj"] = np.nan
        with pytest.raises(InputError, match=r"`fractions\['r2_adj'\]` has a missing or "
                                             "infinite value at position 0"):
            partition_figure(bad)
        bad = table.copy()
        bad["p"] = bad["p"].astype(object)
        bad.loc[0, "p"] = 1.5
        with pytest.raises(InputError, match=r"p-values must lie in \(0, 1\]; got 1.5"):
            partition_figure(bad)
        with pytest.raises(InputError, match="parameter `alpha` must be > 0.0"):
            partition_figure(table, alpha=0.0)
        with pytest.raises(InputError, match="2 to 4 explanatory groups"):
            partition_figure(_group_table(list("abcde")))
        with pytest.raises(InputError, match="must be a pandas DataFrame"):
            partition_figure([0.1, 0.2])  # type: ignore[arg-type]


def _basis(n: int = 30):
    names = pd.Index([f"sv{i:03d}" for i in range(1, n + 1)])
    scale = pd.Series(10_000.0 / np.arange(1, n + 1), index=names)
    r2 = pd.Series(np.linspace(0.05, 0.001, n), index=names)
    moran = pd.Series(np.linspace(0.95, 0.02, n), index=names)
    return names, scale, r2, moran


class TestScalogramFigure:
    def test_log_scale_selected_highlighted_and_classes_labelled(self):
        names, scale, r2, _ = _basis()
        classes = pd.DataFrame({"name": ["broad", "medium", "fine"],
                                "low": [2_500.0, 800.0, 300.0],
                                "high": [12_000.0, 2_500.0, 800.0]})
        fig = scalogram_figure(r2, scale, selected=["sv001", "sv004", "sv020"],
                               classes=classes, unit="m")
        ax = fig.axes[0]
        assert ax.get_xscale() == "log"
        offsets = _collection(fig, "selected-vector").get_offsets()
        np.testing.assert_allclose(offsets[:, 0], scale[["sv001", "sv004", "sv020"]])
        np.testing.assert_allclose(offsets[:, 1], r2[["sv001", "sv004", "sv020"]])
        assert len(_collection(fig, "other-vector").get_offsets()) == 27
        labels = sorted(t.get_text() for t in ax.texts if t.get_gid() == "class-label")
        assert labels == ["broad", "fine", "medium"]
        assert "scale (m, logarithmic)" in ax.get_xlabel()
        lo, hi = ax.get_xlim()
        assert lo < 300 and hi > 12_000  # the class bands are inside the axis

    def test_many_selected_only_largest_named(self):
        names, scale, r2, _ = _basis()
        fig = scalogram_figure(r2, scale, selected=list(names[:20]))
        named = [t.get_text() for t in fig.axes[0].texts if t.get_text().startswith("sv")]
        assert sorted(named) == sorted(r2[names[:20]].nlargest(10).index)
        assert len(_collection(fig, "selected-vector").get_offsets()) == 20

    def test_validation(self):
        names, scale, r2, _ = _basis()
        with pytest.raises(InputError, match="names vector\\(s\\) \\['sv999'\\]"):
            scalogram_figure(r2, scale, selected=["sv999"])
        with pytest.raises(InputError, match="`r2` must be ≥ 0; vector 'sv002'"):
            scalogram_figure(r2.where(r2.index != "sv002", -0.1), scale)
        with pytest.raises(InputError, match="`scale` has no value for vector"):
            scalogram_figure(r2, scale.iloc[:-1])
        with pytest.raises(InputError, match="0 < low < high"):
            scalogram_figure(r2, scale, classes=pd.DataFrame({"name": ["x"], "low": [5.0],
                                                              "high": [2.0]}))
        with pytest.raises(InputError, match="must be a pandas Series"):
            scalogram_figure(r2.to_numpy(), scale)  # type: ignore[arg-type]


def _scores(seed: int = SEED):
    rng = np.random.default_rng(seed)
    axes = ["canonical_1", "canonical_2", "canonical_3"]
    sites = pd.DataFrame(rng.normal(size=(30, 3)), columns=axes)
    species = pd.DataFrame(rng.normal(size=(12, 3)), columns=axes,
                           index=[f"sp{i:02d}" for i in range(12)])
    variables = pd.DataFrame(rng.normal(size=(3, 3)), columns=axes,
                             index=["moisture", "pH", "cover"])
    eig = pd.Series([0.30, 0.12, 0.05], index=axes)
    return sites, species, variables, eig


class TestTriplotFigure:
    def test_arrows_labels_and_axis_percentages(self):
        sites, species, variables, eig = _scores()
        fig = triplot_figure(sites, species, variables, eig, scaling=2, total_variance=1.5,
                             n_labels=4)
        ax = fig.axes[0]
        arrows = [c for c in ax.get_children()
                  if isinstance(c, Annotation) and c.get_gid() == "variable-arrow"]
        assert len(arrows) == 3
        labelled = [t.get_text() for t in ax.texts if t.get_gid() == "species-label"]
        norms = np.hypot(species["canonical_1"], species["canonical_2"])
        assert sorted(labelled) == sorted(norms.nlargest(4).index)
        # 0.30 / 1.5 = 20 %, 0.12 / 1.5 = 8 % of total variation
        assert ax.get_xlabel() == "axis 1 (20.0 % of total variation)"
        assert ax.get_ylabel() == "axis 2 (8.0 % of total variation)"
        assert ax.get_aspect() == 1.0
        assert "correlations" in ax.get_title(loc="left")
        assert len(_collection(fig, "site-scores").get_offsets()) == 30

    def test_scaling_one_and_other_axes(self):
        sites, species, variables, eig = _scores()
        fig = triplot_figure(sites, species, None, eig, scaling=1, axes=(0, 2))
        ax = fig.axes[0]
        assert "distances" in ax.get_title(loc="left")
        # without total variance: share of the eigenvalues given, 0.05 / 0.47
        assert ax.get_ylabel() == f"axis 3 ({100 * 0.05 / 0.47:.1f} % of the axes shown)"
        assert not [c for c in ax.get_children() if getattr(c, "get_gid", lambda: 0)()
                    == "variable-arrow"]

    def test_species_huddled_at_origin_stretched(self):
        sites, species, variables, eig = _scores()
        small = species * 0.01
        fig = triplot_figure(sites, small, None, eig, scaling=2)
        drawn = _collection(fig, "species-scores").get_offsets()
        factor = drawn[0, 0] / small.iloc[0, 0]
        np.testing.assert_allclose(drawn,
                                   small[["canonical_1", "canonical_2"]].to_numpy() * factor)
        site_r = np.hypot(sites["canonical_1"], sites["canonical_2"]).max()
        assert np.hypot(drawn[:, 0], drawn[:, 1]).max() == pytest.approx(0.8 * site_r)
        note = [t.get_text() for t in fig.axes[0].texts if t.get_gid() == "stretch-note"]
        assert note == [f"species × {factor:.3g}"]
        fig = triplot_figure(sites, small, None, eig, scaling=2, species_stretch="none")
        np.testing.assert_allclose(_collection(fig, "species-scores").get_offsets(),
                                   small[["canonical_1", "canonical_2"]].to_numpy())

    def test_arrow_directions_kept(self):
        sites, species, variables, eig = _scores()
        fig = triplot_figure(sites, species, variables, eig, scaling=2)
        tips = np.array([a.xy for a in fig.axes[0].get_children()
                         if isinstance(a, Annotation) and a.get_gid() == "variable-arrow"])
        raw = variables[["canonical_1", "canonical_2"]].to_numpy()
        ratio = tips / raw  # one common stretch factor for every arrow and coordinate
        np.testing.assert_allclose(ratio, ratio[0, 0], rtol=1e-12)

    def test_validation(self):
        sites, species, variables, eig = _scores()
        with pytest.raises(InputError, match="`scaling` must be 1 or 2; got 3"):
            triplot_figure(sites, species, variables, eig, scaling=3)
        with pytest.raises(InputError, match="must start with the axes of `site_scores`"):
            triplot_figure(sites, species.rename(columns={"canonical_1": "residual_1"}),
                           variables, eig, scaling=1)
        with pytest.raises(InputError, match="`eigenvalues` has no value for axis 'canonical_2'"):
            triplot_figure(sites, species, variables, eig.iloc[:1], scaling=1)
        with pytest.raises(InputError, match="`n_labels` must be a non-negative integer"):
            triplot_figure(sites, species, variables, eig, scaling=1, n_labels=-1)
        with pytest.raises(InputError, match="parameter `species_stretch` must be one of"):
            triplot_figure(sites, species, variables, eig, scaling=1, species_stretch="big")
        with pytest.raises(InputError, match="`total_variance` must be > 0"):
            triplot_figure(sites, species, variables, eig, scaling=1, total_variance=0.0)


class TestWeightingFigure:
    TABLE = pd.DataFrame({"scheme": ["gabriel/binary", "gabriel/linear", "delaunay/binary"],
                          "r2_adj": [0.12, 0.15, 0.09], "p": [0.004, 0.001, 0.03]})

    def test_corrected_level_and_highlight(self):
        # Šidák level for k = 3 schemes: 1 - 0.95^(1/3) = 0.016952 (Bauman et al. 2018,
        # Ecology 99:2159-2166, correction formula) [derived]
        corrected = 1 - 0.95 ** (1 / 3)
        fig = weighting_figure(self.TABLE, corrected_alpha=corrected, chosen="gabriel/linear")
        ax_r, ax_p = fig.axes
        level = [ln for ln in ax_p.lines if ln.get_gid() == "corrected-level"]
        assert len(level) == 1 and level[0].get_xdata()[0] == pytest.approx(0.016952, abs=1e-6)
        bars = ax_r.patches
        assert len(bars) == 3
        colours = [st.matplotlib.colors.to_hex(b.get_facecolor()) for b in bars]
        assert colours[1] == st.group_colour(1) and colours[0] == colours[2] == st.MUTED
        below = _collection(fig, "p-below-level").get_offsets()
        assert sorted(below[:, 0]) == [0.001, 0.004]  # 0.03 is above the corrected level
        assert ax_p.get_xscale() == "log"

    def test_validation(self):
        with pytest.raises(InputError, match="`chosen` 'knn' is not one of the schemes"):
            weighting_figure(self.TABLE, chosen="knn")
        with pytest.raises(InputError, match="parameter `corrected_alpha` must be > 0.0 and "
                                             "<= 0.05; got 0.1"):
            weighting_figure(self.TABLE, corrected_alpha=0.1)
        bad = self.TABLE.assign(r2_adj=[0.1, float("inf"), 0.2])
        with pytest.raises(InputError, match="infinite value; use NaN"):
            weighting_figure(bad)


class TestMoranScaleFigure:
    def test_points_reference_line_and_selection(self):
        names, scale, _, moran = _basis(20)
        fig = moran_scale_figure(moran, scale, selected=["sv002"], expected=-1 / 19)
        ax = fig.axes[0]
        # E[I] = -1/(n - 1) (Cliff & Ord 1981, Spatial Processes) [memory]
        ref = [ln for ln in ax.lines if ln.get_ydata()[0] == pytest.approx(-1 / 19)]
        assert len(ref) == 1
        np.testing.assert_allclose(_collection(fig, "selected-vector").get_offsets(),
                                   [[scale["sv002"], moran["sv002"]]])
        assert ax.get_xscale() == "log"

    def test_validation(self):
        names, scale, _, moran = _basis(5)
        with pytest.raises(InputError, match="`scale` must be > 0"):
            moran_scale_figure(moran, scale * 0)
        with pytest.raises(InputError, match="missing or infinite value at position 2"):
            moran_scale_figure(moran.where(moran.index != "sv003", np.nan), scale)


class TestNiceScaleBar:
    @pytest.mark.parametrize(("width", "unit", "expected"), [
        (12_000.0, "m", (2000.0, "2 km")),      # 12 km / 5 = 2.4 km -> 2 km
        (11_200.0, "m", (2000.0, "2 km")),
        (4_999.0, "m", (500.0, "500 m")),       # 1 km would exceed a fifth
        (5_000.0, "m", (1000.0, "1 km")),
        (430.0, "m", (50.0, "50 m")),
        (1.0, "m", (0.2, "0.2 m")),
        (30.0, "km", (5.0, "5 km")),
        (900.0, "map units", (100.0, "100 map units")),
    ])
    def test_round_lengths(self, width, unit, expected):
        assert nice_scale_bar(width, unit=unit) == expected

    def test_validation(self):
        with pytest.raises(InputError, match="`width` must be a positive finite length"):
            nice_scale_bar(0.0)


def _points(crs="EPSG:32633"):
    rng = np.random.default_rng(SEED)
    x = np.r_[0.0, 10_000.0, rng.uniform(0, 10_000, 28)] + 500_000
    y = np.r_[0.0, 6_000.0, rng.uniform(0, 6_000, 28)] + 4_000_000
    return gpd.GeoDataFrame({"score": rng.normal(size=30), "lcbd": rng.uniform(0, 0.05, 30)},
                            geometry=gpd.points_from_xy(x, y), crs=crs)


def _surface_image(fig: Figure) -> AxesImage:
    found = [im for im in fig.axes[0].images if im.get_gid() == "surface"]
    assert len(found) == 1
    return found[0]


def _pixels(image: AxesImage) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Centres (x, y) of the surface image's pixels and their opacity, flattened."""
    rgba = np.asarray(image.get_array())
    x0, x1, y0, y1 = image.get_extent()
    ny, nx = rgba.shape[:2]
    px = x0 + (np.arange(nx) + 0.5) * (x1 - x0) / nx
    py = y0 + (np.arange(ny) + 0.5) * (y1 - y0) / ny
    PX, PY = np.meshgrid(px, py)
    return PX.ravel(), PY.ravel(), rgba[..., 3].ravel()


class TestSiteMapFigure:
    def test_scale_bar_for_known_extent(self):
        # sites span 10 km; with 6 % padding on each side the map is 11.2 km wide, a fifth is
        # 2.24 km, so the round bar is 2 km long [practice: 1-2-5 rounding]
        fig = site_map_figure(_points(), column="score")
        ax = fig.axes[0]
        labels = [t.get_text() for t in ax.texts if t.get_gid() == "scale-bar-label"]
        assert labels == ["2 km"]
        segments = [p for p in ax.patches if p.get_gid() == "scale-bar"]
        assert sum(p.get_width() for p in segments) == pytest.approx(2000.0)
        assert ax.get_xlim()[1] - ax.get_xlim()[0] == pytest.approx(11_200.0)

    def test_diverging_scale_centred_on_zero(self):
        pts = _points()
        fig = site_map_figure(pts, column="score", palette="diverging")
        sites = _collection(fig, "sites")
        vmax = np.abs(pts["score"]).max()
        assert sites.norm.vmin == pytest.approx(-vmax) and sites.norm.vmax == pytest.approx(vmax)
        np.testing.assert_allclose(sites.get_array(), pts["score"])

    def test_sequential_scale_spans_values(self):
        pts = _points()
        sites = _collection(site_map_figure(pts, column="lcbd", palette="sequential"), "sites")
        assert (sites.norm.vmin, sites.norm.vmax) == (pts["lcbd"].min(), pts["lcbd"].max())
        assert sites.cmap.name == "cividis"

    def test_axes_equal_units_arrow_and_colourbar(self):
        fig = site_map_figure(_points(), column="score", value_label="fitted")
        ax, cbar = fig.axes
        assert ax.get_aspect() == 1.0
        assert ax.get_xlabel() == "easting (m)" and ax.get_ylabel() == "northing (m)"
        assert cbar.get_ylabel() == "fitted"
        assert [c for c in ax.get_children() if isinstance(c, Annotation)
                and c.get_gid() == "north-arrow"]
        fig = site_map_figure(_points(), column="score", north_arrow="none")
        assert not [c for c in fig.axes[0].get_children() if isinstance(c, Annotation)
                    and c.get_gid() == "north-arrow"]

    def test_surface_under_sites_and_polygons(self):
        gx, gy = np.linspace(500_000, 510_000, 11), np.linspace(4_000_000, 4_006_000, 7)
        values = np.outer(np.linspace(-1, 1, 7), np.ones(11))
        values[0, 0] = np.nan  # a missing cell
        fig = site_map_figure(_points(), column="score", clip="none",
                              surface={"x": gx, "y": gy, "values": values})
        image = _surface_image(fig)
        assert image.get_zorder() < _collection(fig, "sites").get_zorder()
        px, py, alpha = _pixels(image)
        # fine pixels whose nearest given cell is the missing one are hidden, the rest shown
        # (a pixel exactly half-way between two cells may go either way: left out)
        off = np.maximum(np.abs(px - gx[0]), np.abs(py - gy[0]))
        assert np.all(alpha[off < 499] == 0) and np.all(alpha[off > 501] > 0)
        # bilinear resampling of a field linear in y keeps it linear (drawing only) [derived]
        assert image.get_interpolation() == "bilinear"

    def test_surface_clipped_to_hull(self):
        tri = gpd.GeoDataFrame({"v": [0.0, 1.0, -1.0]},
                               geometry=gpd.points_from_xy([0, 100, 0], [0, 0, 100]))
        g = np.linspace(0, 100, 11)
        full = {"x": g, "y": g, "values": np.ones((11, 11))}
        px, py, alpha = _pixels(_surface_image(site_map_figure(tri, column="v", surface=full,
                                                               unit="m")))
        hull = shapely.Polygon([(0, 0), (100, 0), (0, 100)])
        # shown inside the hull, hidden farther than one grid step (10) outside it (shapely)
        inside = shapely.contains_xy(hull, px, py)
        far = shapely.distance(hull, shapely.points(px, py)) > 10.0 + 1e-9
        assert np.all(alpha[inside] > 0) and np.all(alpha[far] == 0) and far.any()
        px, py, alpha = _pixels(_surface_image(site_map_figure(tri, column="v", surface=full,
                                                               clip="none", unit="m")))
        assert np.all(alpha > 0)
        farther = {"x": g + 1e6, "y": g, "values": np.ones((11, 11))}
        with pytest.raises(InputError, match="no cell inside the convex hull"):
            site_map_figure(tri, column="v", surface=farther)

    def test_surface_fades_beyond_the_sites_reach(self):
        # two dense transects 400 m apart and a structure of wavelength 160 m: each site
        # reaches max(2 x 10 m, 160 / 4) = 40 m, so the gap between transects is hidden
        xs = np.arange(0.0, 201.0, 10.0)
        pts = gpd.GeoDataFrame({"v": np.sin(np.r_[xs, xs] / 30.0)},
                               geometry=gpd.points_from_xy(np.r_[xs, xs],
                                                           np.r_[np.zeros(21), np.full(21, 400)]))
        g = np.linspace(0, 400, 41)
        surface = {"x": g[:21], "y": g, "values": np.ones((41, 21))}
        fig = site_map_figure(pts, column="v", surface=surface, wavelength=160.0, clip="none",
                              north_arrow="none")
        px, py, alpha = _pixels(_surface_image(fig))
        xy = np.column_stack([pts.geometry.x, pts.geometry.y])
        d = cdist(np.column_stack([px, py]), xy)  # scipy as the distance oracle
        spacing = np.sort(cdist(xy, xy), axis=1)[:, 1]
        reach = np.maximum(2 * spacing, 160.0 / 4)
        assert np.allclose(reach, 40.0)
        beyond = np.all(d > reach, axis=1)
        within_half = np.any(d <= reach / 2, axis=1)
        assert beyond.sum() > 0.5 * len(px)  # most of the gap is hidden
        assert np.all(alpha[beyond] == 0)
        assert np.allclose(alpha[within_half], 0.85)
        ramp = ~beyond & ~within_half
        assert np.all((alpha[ramp] > 0) & (alpha[ramp] < 0.85))
        # without a wavelength nothing fades
        px, py, alpha = _pixels(_surface_image(site_map_figure(
            pts, column="v", surface=surface, clip="none", north_arrow="none")))
        assert np.all(alpha > 0)
        with pytest.raises(InputError, match="`wavelength` must be a positive length"):
            site_map_figure(pts, column="v", surface=surface, wavelength=-1.0)

    def test_class_colour_frames_the_map(self):
        fig = site_map_figure(_points(), column="score", class_colour=st.CLASS_COLOURS[2])
        assert {to_hex(sp.get_edgecolor()) for sp in fig.axes[0].spines.values()} \
            == {st.CLASS_COLOURS[2]}

    def test_polygons(self):
        polys = gpd.GeoDataFrame({"v": [1.0, 2.0]}, geometry=[shapely.box(0, 0, 10, 10),
                                                              shapely.box(10, 0, 20, 10)])
        fig = site_map_figure(polys, column="v", palette="sequential", unit="map units",
                              north_arrow="none")
        assert fig.axes[0].get_xlabel() == "x (map units)"
        assert len(fig.axes[0].collections) == 1

    def test_highlighted_sites_ringed(self):
        pts = _points()
        pts["unusual"] = pts["lcbd"] > pts["lcbd"].quantile(0.8)
        fig = site_map_figure(pts, column="lcbd", palette="sequential", highlight="unusual",
                              highlight_label="p ≤ 0.05")
        rings = _collection(fig, "highlight").get_offsets()
        expected = pts.geometry[pts["unusual"]]
        np.testing.assert_allclose(rings, np.column_stack([expected.x, expected.y]))
        assert [t.get_text() for t in fig.axes[0].get_legend().get_texts()] == ["p ≤ 0.05"]
        with pytest.raises(InputError, match=r"`sites\['lcbd'\]` must be boolean"):
            site_map_figure(pts, column="lcbd", highlight="lcbd")

    def test_validation(self):
        pts = _points()
        with pytest.raises(CRSError, match="geographic CRS"):
            site_map_figure(pts.to_crs(4326), column="score")
        with pytest.raises(InputError, match="`column` must name a column of `sites`"):
            site_map_figure(pts, column="nope")
        bad = pts.copy()
        bad.loc[bad.index[3], "score"] = np.nan
        with pytest.raises(InputError, match="missing value at site 3"):
            site_map_figure(bad, column="score")
        with pytest.raises(InputError, match="must have shape \\(len\\(y\\), len\\(x\\)\\)"):
            site_map_figure(pts, column="score", surface={"x": [0, 1, 2], "y": [0, 1],
                                                          "values": np.zeros((3, 2))})
        with pytest.raises(InputError, match="parameter `palette` must be one of"):
            site_map_figure(pts, column="score", palette="rainbow")
        with pytest.raises(InputError, match="must be a GeoDataFrame"):
            site_map_figure(pd.DataFrame({"score": [1.0]}), column="score")


def test_weighting_figure_marks_schemes_without_selection_or_basis():
    # a scheme whose global test failed has no adjusted R² (NaN); one that could not be built
    # has no p-value either: both are labelled, not drawn, and the figure is still made
    import pandas as pd

    from spatial_ev.report.figures import weighting_figure

    table = pd.DataFrame({"scheme": ["gabriel/binary", "delaunay/binary", "distance_band/linear"],
                          "r2_adj": [0.12, float("nan"), float("nan")],
                          "p": [0.002, 0.4, float("nan")]})
    fig = weighting_figure(table, corrected_alpha=0.016952, chosen="gabriel/binary")
    labels = [t.get_text().strip() for t in fig.axes[0].texts if t.get_gid() == "no-bar-label"]
    assert labels == ["none selected", "not built"]
    assert len(fig.axes[0].patches) == 1


class TestSurfaceFunctions:
    def test_reach_matches_pairwise_distances(self):
        rng = np.random.default_rng(SEED)
        sites = rng.uniform(0, 1000, (40, 2))
        points = rng.uniform(-100, 1100, (300, 2))
        d, r = surface_reach(sites, points, 600.0, k=5)
        full = cdist(points, sites)  # scipy as the oracle for the nearest sites
        np.testing.assert_allclose(d, np.sort(full, axis=1)[:, :5])
        spacing = np.sort(cdist(sites, sites), axis=1)[:, 1]
        nearest = np.argsort(full, axis=1)[:, 0]
        np.testing.assert_allclose(r[:, 0], np.maximum(2 * spacing[nearest], 150.0))
        with pytest.raises(InputError, match="`wavelength` must be a positive length"):
            surface_reach(sites, points, 0.0)

    def test_opacity_ramp_and_best_site(self):
        # smoothstep 3t² − 2t³ at t = 0.5 is 0.5 [derived]
        assert surface_opacity(np.array([7.5]), np.array([10.0]))[0] == pytest.approx(0.5)
        both = surface_opacity(np.array([[12.0, 3.0]]), np.array([[10.0, 10.0]]))
        assert both.tolist() == [1.0]

    def test_smoothing_keeps_a_plane(self):
        # bilinear interpolation reproduces any function a + b x + c y exactly [derived]
        x, y = np.linspace(0, 90, 10), np.linspace(0, 50, 6)
        X, Y = np.meshgrid(x, y)
        fx, fy, fz = smooth_surface(x, y, 2.0 + 0.3 * X - 0.1 * Y, factor=3)
        FX, FY = np.meshgrid(fx, fy)
        inner = (FX >= 0) & (FX <= 90) & (FY >= 0) & (FY <= 50)
        np.testing.assert_allclose(fz[inner], (2.0 + 0.3 * FX - 0.1 * FY)[inner], atol=1e-12)
        assert fz.shape == (18, 30)


def _text_boxes(fig: Figure, gids: set[str]) -> np.ndarray:
    """Agg-rendered boxes of the figure's texts whose gid is in ``gids``."""
    fig.canvas.draw() if hasattr(fig.canvas, "get_renderer") else None
    texts = [t for ax in fig.axes for t in ax.texts if t.get_gid() in gids]
    assert texts, f"no text with gid in {gids}"
    return label_boxes(fig, texts)


class TestLabelsApart:
    def test_overlap_detection_itself(self):
        # two boxes sharing a corner region overlap, touching edges do not [derived]
        boxes = np.array([[0, 0, 10, 10], [9, 9, 20, 20], [20, 0, 30, 9.0]])
        assert overlapping_pairs(boxes) == [(0, 1)]

    def test_scalogram_names_never_overlap(self):
        # twelve selected vectors crowded within a factor 1.3 of scale, similar heights
        names = [f"sv{i:03d}" for i in range(40)]
        scale = pd.Series(np.geomspace(100, 130, 40), index=names)
        r2 = pd.Series(0.02 + 0.001 * np.sin(np.arange(40)), index=names)
        fig = scalogram_figure(r2, scale, selected=names[::3])
        boxes = _text_boxes(fig, {"vector-label"})
        assert len(boxes) == len(names[::3]) and overlapping_pairs(boxes) == []
        # and none runs into the class names or the legend
        classes = pd.DataFrame({"name": ["fine", "broad"], "low": [90.0, 115.0],
                                "high": [115.0, 140.0]})
        fig = scalogram_figure(r2, scale, selected=names[::3], classes=classes)
        every = _text_boxes(fig, {"vector-label", "class-label"})
        assert overlapping_pairs(every) == []

    def test_triplot_labels_never_overlap(self):
        sites, species, variables, eig = _scores()
        crowd = species * 0.05 + 0.3  # every species label in one corner
        fig = triplot_figure(sites, crowd, variables, eig, scaling=2, n_labels=12,
                             species_stretch="none")
        boxes = _text_boxes(fig, {"species-label", "variable-label"})
        assert len(boxes) == 12 + 3 and overlapping_pairs(boxes) == []

    def test_weighting_axis_labels_and_ticks_apart(self):
        t = pd.DataFrame({"scheme": [f"graph_{i}/binary" for i in range(8)],
                          "r2_adj": np.full(8, np.nan),  # nothing selected anywhere
                          "p": [0.31, 0.52, 0.44, 0.9, 0.27, 0.66, 0.35, 0.71]})
        fig = weighting_figure(t, corrected_alpha=0.006391)
        renderer = fig.canvas.get_renderer()
        xlabels = [ax.xaxis.label.get_window_extent(renderer) for ax in fig.axes]
        boxes = np.array([[b.x0, b.y0, b.x1, b.y1] for b in xlabels])
        assert overlapping_pairs(boxes) == []
        for ax in fig.axes:
            ticks = [t for t in ax.get_xticklabels() if t.get_text()]
            tb = np.array([[b.x0, b.y0, b.x1, b.y1] for b in
                           (t.get_window_extent(renderer) for t in ticks)])
            assert len(ticks) >= 3 and overlapping_pairs(tb) == []


class TestTriplotCases:
    def test_categorical_levels_as_centroids_with_reference(self):
        sites, species, variables, eig = _scores()
        rng = np.random.default_rng(SEED)
        level = pd.Series(rng.choice(["mud", "sand", "gravel"], size=30), index=sites.index)
        cols = ["canonical_1", "canonical_2", "canonical_3"]
        v = pd.concat([variables.iloc[:1],
                       pd.DataFrame([[0.5, 0.2, 0.0], [-0.3, 0.4, 0.1]], columns=cols,
                                    index=["sediment[mud]", "sediment[sand]"])])
        fig = triplot_figure(sites, species, v, eig, scaling=1, factors={"sediment": level})
        ax = fig.axes[0]
        arrows = [c for c in ax.get_children()
                  if isinstance(c, Annotation) and c.get_gid() == "variable-arrow"]
        assert len(arrows) == 1  # only the numeric variable is an arrow
        centroids = _collection_all(fig, "level-centroid")
        drawn = np.vstack([c.get_offsets() for c in centroids])
        # each level at the mean of its sites' scores (pandas groupby as the oracle)
        means = sites.iloc[:, :2].groupby(level).mean()
        for name, row in means.iterrows():
            assert np.isclose(drawn, row.to_numpy()).all(axis=1).any(), name
        texts = sorted(t.get_text() for t in ax.texts if t.get_gid() == "level-label")
        assert texts == ["sediment: gravel (reference)", "sediment: mud", "sediment: sand"]

    def test_nothing_environmental_kept(self):
        sites, species, _, eig = _scores()
        for scaling in (1, 2):
            fig = triplot_figure(sites, species, None, eig, scaling=scaling)
            words = " ".join(_texts(fig) + [fig.axes[0].get_title(loc="left")])
            assert "Unconstrained ordination (no environmental variable kept)" in words
            assert "arrows" not in words and "Triplot" not in words
        fig = triplot_figure(sites, species, pd.DataFrame(columns=sites.columns, dtype=float),
                             eig, scaling=2)
        assert "arrows" not in fig.axes[0].get_title(loc="left")
