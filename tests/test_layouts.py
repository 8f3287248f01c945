"""Tests of the candidate-layout builders and the layout spec syntax (spatial_ev.design.layouts)."""

from __future__ import annotations

import math

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj
import pytest
import shapely
from scipy.spatial import cKDTree

from spatial_ev.errors import DesignError, InputError
from spatial_ev.design.layouts import (augmented_layout, build_layout, file_layout, grid_layout,
                                parse_layout_spec, thinned_layout, transect_layout)


def _square_pilot(n_side: int = 10, spacing: float = 10.0) -> pd.DataFrame:
    gx, gy = np.meshgrid(np.arange(n_side) * spacing, np.arange(n_side) * spacing)
    return pd.DataFrame({"x": gx.ravel(), "y": gy.ravel()},
                        index=pd.Index([f"P{i:03d}" for i in range(gx.size)], name="site"))


class TestParseLayoutSpec:
    def test_every_kind(self):
        assert parse_layout_spec("grid:spacing=30").values == {"spacing": 30.0}
        spec = parse_layout_spec("grid:spacing=30;angle=20;extent=0,0,100,50;name=coarse")
        assert spec.values == {"spacing": 30.0, "angle": 20.0,
                               "extent": (0.0, 0.0, 100.0, 50.0), "name": "coarse"}
        spec = parse_layout_spec("transect:start=452300.5,5612800;bearing=45;spacing=10;"
                                 "length=500")
        assert spec.values["start"] == (452300.5, 5612800.0)
        assert parse_layout_spec("thin:every=2").values == {"every": 2}
        assert parse_layout_spec("thin:fraction=0.5;seed=7").values == {"fraction": 0.5,
                                                                         "seed": 7}
        assert parse_layout_spec("augment:add=40").values == {"add": 40}
        assert parse_layout_spec("file:some dir/points.csv").values == {
            "path": "some dir/points.csv"}

    def test_unknown_kind(self):
        with pytest.raises(InputError, match="unknown kind 'hexagon'"):
            parse_layout_spec("hexagon:spacing=3")

    def test_no_colon(self):
        with pytest.raises(InputError, match="must look like KIND:key=value"):
            parse_layout_spec("grid")

    def test_unknown_key(self):
        with pytest.raises(InputError, match="'spcing=3' is not key=value with a key of 'grid'"):
            parse_layout_spec("grid:spcing=3")

    def test_not_a_number(self):
        with pytest.raises(InputError, match="spacing='3,5m' is not a number"):
            parse_layout_spec("grid:spacing=3,5m")

    def test_wrong_count(self):
        with pytest.raises(InputError, match="start takes 2 comma-separated number"):
            parse_layout_spec("transect:start=1;bearing=0;spacing=1;length=9")

    def test_missing_keys(self):
        with pytest.raises(InputError, match="lacks bearing, length"):
            parse_layout_spec("transect:start=0,0;spacing=10")

    def test_whole_numbers(self):
        with pytest.raises(InputError, match="every must be a whole number; got 2.5"):
            parse_layout_spec("thin:every=2.5")


class TestGridLayout:
    def test_clipped_to_polygon(self):
        # a triangle: every node inside; the count matches a brute-force lattice count
        # (shapely as the oracle for point-in-polygon)
        tri = shapely.Polygon([(0, 0), (200, 0), (0, 200)])
        lay = grid_layout(spacing=10, area=tri)
        pts = shapely.points(lay.coords.to_numpy())
        assert shapely.covers(tri.buffer(1e-6), pts).all()
        brute = sum(1 for i in range(21) for j in range(21) if i + j <= 20)
        assert lay.n_sites == brute == 231
        assert lay.kind == "grid" and lay.line_length is None

    def test_default_area_is_pilot_hull(self):
        lay = grid_layout(spacing=30, pilot_coords=_square_pilot())
        xy = lay.coords.to_numpy()
        assert xy.min() >= -1e-9 and xy.max() <= 90 + 1e-9
        assert lay.n_sites == 16  # 0, 30, 60, 90 in each direction

    def test_rotation_keeps_spacing(self):
        lay = grid_layout(spacing=25, area=shapely.box(0, 0, 400, 300), angle=30)
        xy = lay.coords.to_numpy()
        d, _ = cKDTree(xy).query(xy, k=2)
        assert np.allclose(d[:, 1], 25.0)
        # rows run at 30°: the nearest neighbour directions are 30° and 120°
        centre = int(np.argmin(np.hypot(xy[:, 0] - 200, xy[:, 1] - 150)))
        dist, idx = cKDTree(xy).query(xy[centre], k=5)
        assert np.allclose(dist[1:], 25.0)
        angles = {round(math.degrees(math.atan2(*(xy[j] - xy[centre])[::-1])) % 90, 6)
                  for j in idx[1:]}
        assert angles == {30.0}
        # density ≈ area / spacing² (Weyl-type count for a lattice)
        assert abs(lay.n_sites - 400 * 300 / 25 ** 2) < 0.15 * 400 * 300 / 25 ** 2

    def test_extent(self):
        lay = grid_layout(spacing=10, area=shapely.box(0, 0, 100, 100), extent=(0, 0, 50, 20))
        assert lay.n_sites == 6 * 3

    def test_extent_outside(self):
        with pytest.raises(DesignError, match="does not overlap the study area"):
            grid_layout(spacing=10, area=shapely.box(0, 0, 100, 100),
                        extent=(500, 500, 600, 600))

    def test_bad_spacing(self):
        with pytest.raises(InputError, match="parameter `spacing` must be > 0"):
            grid_layout(spacing=0, area=shapely.box(0, 0, 1, 1))

    def test_collinear_pilot_needs_area(self):
        line = pd.DataFrame({"x": np.arange(10.0), "y": 0.0})
        with pytest.raises(DesignError, match="lie on a line"):
            grid_layout(spacing=1, pilot_coords=line)


class TestTransectLayout:
    def test_length_spacing_bearing(self):
        lay = transect_layout(start=(1000.0, 2000.0), bearing=45, spacing=10, length=500)
        xy = lay.coords.to_numpy()
        assert lay.n_sites == 51
        steps = np.diff(xy, axis=0)
        assert np.allclose(np.hypot(steps[:, 0], steps[:, 1]), 10.0)
        # bearing 45° clockwise from north: equal steps east and north
        assert np.allclose(steps, 10 / math.sqrt(2))
        assert lay.line_length == pytest.approx(500.0)
        assert tuple(xy[0]) == (1000.0, 2000.0)

    def test_bearing_convention(self):
        north = transect_layout(start=(0, 0), bearing=0, spacing=5, length=10).coords
        east = transect_layout(start=(0, 0), bearing=90, spacing=5, length=10).coords
        assert np.allclose(north.to_numpy()[-1], [0, 10], atol=1e-12)
        assert np.allclose(east.to_numpy()[-1], [10, 0], atol=1e-12)

    def test_length_not_multiple(self):
        lay = transect_layout(start=(0, 0), bearing=180, spacing=30, length=100)
        assert lay.n_sites == 4 and lay.line_length == pytest.approx(90.0)

    def test_bad_start(self):
        with pytest.raises(InputError, match="`start` must be a point"):
            transect_layout(start=5.0, bearing=0, spacing=1, length=2)


class TestThinnedLayout:
    def test_every(self):
        pilot = _square_pilot()
        lay = thinned_layout(pilot, every=3)
        assert lay.coords.index.tolist() == pilot.index[::3].tolist()
        assert lay.coords.index.name == "site"

    def test_fraction_repeatable(self):
        pilot = _square_pilot()
        a = thinned_layout(pilot, fraction=0.3, seed=20261202)
        b = thinned_layout(pilot, fraction=0.3, seed=20261202)
        c = thinned_layout(pilot, fraction=0.3, seed=20261203)
        assert a.n_sites == 30 and a.coords.index.equals(b.coords.index)
        assert not a.coords.index.equals(c.coords.index)
        assert a.coords.index.isin(pilot.index).all()

    def test_exactly_one_rule(self):
        with pytest.raises(InputError, match="give exactly one of `every`"):
            thinned_layout(_square_pilot(), every=2, fraction=0.5)


class TestAugmentedLayout:
    def test_fills_the_largest_gap(self):
        pilot = _square_pilot(12, 10.0)
        hole = (pilot["x"].between(30, 80)) & (pilot["y"].between(30, 80))
        holed = pilot[~hole]
        lay = augmented_layout(holed, add=6)
        added = lay.coords.iloc[len(holed):].to_numpy()
        assert lay.n_sites == len(holed) + 6
        assert lay.coords.index[:len(holed)].equals(holed.index)
        # every added site lies in the hole, and the first one near its centre
        assert np.all((added > 25) & (added < 85))
        assert np.hypot(*(added[0] - 55.0)) < 6.0

    def test_first_site_is_farthest_point(self):
        # brute force over a fine lattice: the first added point maximises the distance to
        # the nearest pilot site (the largest empty circle, up to the lattice step)
        rng = np.random.default_rng(20261202)
        pilot = pd.DataFrame(rng.uniform(0, 100, (25, 2)), columns=["x", "y"])
        lay = augmented_layout(pilot, add=1)
        first = lay.coords.to_numpy()[-1]
        hull = shapely.convex_hull(shapely.multipoints(pilot.to_numpy()))
        g = np.linspace(0, 100, 801)
        X, Y = np.meshgrid(g, g)
        cand = np.column_stack([X.ravel(), Y.ravel()])
        cand = cand[shapely.contains_xy(hull, cand[:, 0], cand[:, 1])]
        best = cKDTree(pilot.to_numpy()).query(cand)[0].max()
        got = cKDTree(pilot.to_numpy()).query(first)[0]
        assert got == pytest.approx(best, abs=0.5)

    def test_largest_gap_shrinks(self):
        rng = np.random.default_rng(20261203)
        pilot = pd.DataFrame(rng.uniform(0, 100, (30, 2)), columns=["x", "y"])
        area = shapely.box(0, 0, 100, 100)
        g = np.linspace(0, 100, 201)
        X, Y = np.meshgrid(g, g)
        probe = np.column_stack([X.ravel(), Y.ravel()])
        gaps = [cKDTree(augmented_layout(pilot, add=k, area=area).coords.to_numpy())
                .query(probe)[0].max() for k in (1, 10, 40)]
        before = cKDTree(pilot.to_numpy()).query(probe)[0].max()
        assert before > gaps[0] > gaps[1] > gaps[2]


class TestFileLayout:
    def test_csv_same_crs(self, tmp_path):
        path = tmp_path / "candidates.csv"
        pd.DataFrame({"site": ["c1", "c2", "c3", "c4", "c5"],
                      "x": [452300.0, 452400, 452500, 452600, 452700],
                      "y": [5612800.0, 5612900, 5613000, 5613100, 5613200]}).to_csv(path,
                                                                                   index=False)
        lay = file_layout(str(path), crs=None, distance_unit="metre")
        assert lay.coords.index.tolist() == ["c1", "c2", "c3", "c4", "c5"]
        assert lay.coords["x"].iloc[2] == 452500.0
        # a CSV for a pilot in EPSG:32630 is read in that CRS: coordinates unchanged
        utm = file_layout(str(path), crs=pyproj.CRS.from_epsg(32630))
        assert np.array_equal(utm.coords.to_numpy(), lay.coords.to_numpy())

    def test_gpkg_reprojected(self, tmp_path):
        # pyproj as the oracle of the transformation to the pilot's CRS
        lon = np.array([-3.70, -3.69, -3.68, -3.67, -3.66])
        lat = np.array([50.66, 50.661, 50.662, 50.663, 50.664])
        gdf = gpd.GeoDataFrame({"site": [f"k{i}" for i in range(5)]},
                               geometry=gpd.points_from_xy(lon, lat), crs=4326)
        path = tmp_path / "cand.gpkg"
        gdf.to_file(path, layer="cand", driver="GPKG")
        lay = file_layout(str(path), crs=pyproj.CRS.from_epsg(32630))
        x, y = pyproj.Transformer.from_crs(4326, 32630, always_xy=True).transform(lon, lat)
        assert np.allclose(lay.coords["x"], x, atol=1e-6)
        assert np.allclose(lay.coords["y"], y, atol=1e-6)


class TestBuildLayout:
    def test_specs(self):
        pilot = _square_pilot()
        assert build_layout("thin:every=2", pilot).n_sites == 50
        assert build_layout("grid:spacing=30;name=coarse", pilot).name == "coarse"
        assert build_layout("augment:add=5", pilot).n_sites == 105
        t = build_layout("transect:start=0,0;bearing=90;spacing=10;length=90", pilot)
        assert t.n_sites == 10 and t.line_length == 90

    def test_random_thin_uses_seed(self):
        pilot = _square_pilot()
        a = build_layout("thin:fraction=0.5", pilot, seed=20261202)
        b = build_layout("thin:fraction=0.5", pilot, seed=20261202)
        assert a.coords.index.equals(b.coords.index)

    def test_bad_spec_type(self):
        with pytest.raises(InputError, match="must be a layout spec string"):
            build_layout(3, _square_pilot())
