"""Tests of spatial_ev.input.survey: reading every input format, alignment and every validation rule."""

from __future__ import annotations

import warnings
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import shapely
from hypothesis import given, settings
from hypothesis import strategies as st

from spatial_ev import errors
from spatial_ev.input.survey import Survey, read_survey

EPSG_UTM = 32630


# ------------------------------------------------------------------------------ fixtures

def _layout(n: int = 12, seed: int = 84_213_901):
    rng = np.random.default_rng(seed)
    ids = [f"C{i:03d}" for i in range(n)]
    x = 452_000.0 + np.round(rng.uniform(0, 500, n), 2)
    y = 5_612_000.0 + np.round(rng.uniform(0, 400, n), 2)
    species = pd.DataFrame(rng.poisson(4.0, size=(n, 4)) + np.eye(n, 4, dtype=int),
                           index=pd.Index(ids, name="core"), columns=["BTX01", "BTX02",
                                                                      "BTX03", "BTX04"])
    species.iloc[:, 0] += 1  # no empty site
    env = pd.DataFrame({"depth_m": np.round(rng.uniform(0, 3, n), 2),
                        "substrate": (["sand", "mud", "gravel"] * n)[:n]},
                       index=pd.Index(ids, name="core"))
    return ids, x, y, species, env


def _write_csvs(tmp_path: Path, ids, x, y, species, env):
    pd.DataFrame({"core": ids, "easting": x, "northing": y}).to_csv(tmp_path / "sites.csv",
                                                                   index=False)
    species.to_csv(tmp_path / "species.csv")
    env.to_csv(tmp_path / "environment.csv")
    return tmp_path / "sites.csv", tmp_path / "species.csv", tmp_path / "environment.csv"


def _polygons(x, y, size=10.0):
    return [shapely.box(a - size, b - size, a + size, b + size) for a, b in zip(x, y)]


@pytest.fixture
def layout():
    return _layout()


@pytest.fixture
def files(tmp_path, layout):
    ids, x, y, species, env = layout
    return _write_csvs(tmp_path, ids, x, y, species, env)


def _listing(folder: Path) -> set:
    return {p.relative_to(folder) for p in folder.rglob("*")}


def _raises_nothing_written(tmp_path, exc, match, func, *args, **kwargs):
    before = _listing(tmp_path)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", errors.SpatialEVWarning)
        with pytest.raises(exc, match=match):
            func(*args, **kwargs)
    assert _listing(tmp_path) == before


# ------------------------------------------------------------------------------- formats

class TestReadSurveyFormats:
    def test_csv_points(self, files, layout):
        ids, x, y, species, env = layout
        s = read_survey(*files, crs=EPSG_UTM)
        assert list(s.site_ids) == ids and s.site_ids.name == "core"
        np.testing.assert_array_equal(s.coords["x"], x)
        np.testing.assert_array_equal(s.coords["y"], y)
        pd.testing.assert_frame_equal(s.species, species.astype(float), check_names=False)
        assert s.geometry_type == "point" and s.distance_unit == "metre"
        assert s.crs.to_epsg() == EPSG_UTM and s.source_crs.startswith("EPSG:32630")
        assert s.sources["species"] == str(files[1])
        assert s.coords.dtypes.tolist() == [np.float64, np.float64]

    @pytest.mark.parametrize("suffix,driver", [(".gpkg", "GPKG"), (".geojson", "GeoJSON"),
                                               (".shp", "ESRI Shapefile")])
    @pytest.mark.parametrize("kind", ["point", "polygon"])
    def test_gis_round_trip(self, tmp_path, layout, suffix, driver, kind):
        ids, x, y, species, env = layout
        geom = shapely.points(x, y) if kind == "point" else _polygons(x, y)
        gdf = gpd.GeoDataFrame({"core": ids, "zone": "grid"}, geometry=geom, crs=EPSG_UTM)
        if driver == "GeoJSON":  # GeoJSON is WGS 84 by definition
            gdf = gdf.to_crs(4326)
        path = tmp_path / f"sites{suffix}"
        gdf.to_file(path, driver=driver, engine="pyogrio")
        species.to_csv(tmp_path / "species.csv")
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            s = read_survey(path, tmp_path / "species.csv")
        assert list(s.site_ids) == ids
        assert s.geometry_type == kind
        assert s.sites.geometry.iloc[0].geom_type == ("Point" if kind == "point" else "Polygon")
        assert s.sites["zone"].tolist() == ["grid"] * len(ids)
        pd.testing.assert_frame_equal(s.species, species.astype(float), check_names=False)
        if driver == "GeoJSON":
            assert any(issubclass(w.category, errors.GeographicCoordinatesWarning)
                       for w in caught)
            assert "azimuthal equidistant" in s.projection_note
            # distances between sites agree with the UTM distances to well under 0.1 %
            d_local = np.hypot(*(s.coords.to_numpy()[:, None] - s.coords.to_numpy()).T)
            xy = np.column_stack([x, y])
            d_utm = np.hypot(*(xy[:, None] - xy).T)
            off = d_utm > 0
            # UTM scale factor near the central meridian is 0.9996-1.0004 [practice]
            assert np.max(np.abs(d_local[off] / d_utm[off] - 1)) < 1e-3
        else:
            expect = np.column_stack([x, y])
            got = s.coords.to_numpy()
            # polygons: representative point lies inside each box
            tol = 1e-6 if kind == "point" else 10.0
            assert np.max(np.abs(got - expect)) <= tol
            assert s.crs.to_epsg() == EPSG_UTM

    def test_environment_from_gis_attributes(self, tmp_path, layout):
        ids, x, y, species, env = layout
        gpd.GeoDataFrame(env.reset_index(), geometry=shapely.points(x, y),
                         crs=EPSG_UTM).to_file(tmp_path / "env.gpkg")
        gpd.GeoDataFrame({"core": ids}, geometry=shapely.points(x, y),
                         crs=EPSG_UTM).to_file(tmp_path / "sites.gpkg")
        s = read_survey(tmp_path / "sites.gpkg", environment=tmp_path / "env.gpkg")
        assert s.environment["depth_m"].tolist() == env["depth_m"].tolist()

    def test_tables_aligned_in_site_order(self, tmp_path, files, layout):
        ids, x, y, species, env = layout
        species.iloc[::-1].to_csv(files[1])
        env.sample(frac=1.0, random_state=7).to_csv(files[2])
        s = read_survey(*files, crs=EPSG_UTM)
        assert list(s.species.index) == ids
        pd.testing.assert_frame_equal(s.species, species.astype(float), check_names=False)
        np.testing.assert_array_equal(s.environment["depth_m"], env["depth_m"])

    def test_categorical_indicator_columns(self, files):
        s = read_survey(*files, crs=EPSG_UTM)
        assert s.categorical == {"substrate": ["substrate[mud]", "substrate[sand]"]}
        assert s.reference_levels == {"substrate": "gravel"}
        assert list(s.environment.columns) == ["depth_m", "substrate[mud]", "substrate[sand]"]
        assert set(np.unique(s.environment["substrate[mud]"])) == {0.0, 1.0}
        assert "substrate[mud]" in s.describe()

    def test_numeric_ids_one_and_one_point_zero_match(self, tmp_path):
        ids, x, y, species, env = _layout(6)
        pd.DataFrame({"site": [1, 2, 3, 4, 5, 6], "x": x, "y": y}).to_csv(
            tmp_path / "s.csv", index=False)
        sp = species.set_axis(pd.Index([f"{i}.0" for i in range(1, 7)], name="site"))
        sp.to_csv(tmp_path / "y.csv")
        s = read_survey(tmp_path / "s.csv", tmp_path / "y.csv", crs=EPSG_UTM)
        assert s.site_ids.tolist() == [1, 2, 3, 4, 5, 6]
        assert s.site_ids.dtype == np.int64

    def test_decimal_comma_and_semicolon_when_declared(self, tmp_path, layout):
        ids, x, y, species, env = layout
        pd.DataFrame({"core": ids, "x": x, "y": y}).to_csv(tmp_path / "s.csv", sep=";",
                                                           decimal=",", index=False)
        env.to_csv(tmp_path / "e.csv", sep=";", decimal=",")
        s = read_survey(tmp_path / "s.csv", environment=tmp_path / "e.csv", crs=EPSG_UTM,
                        delimiter=";", decimal=",")
        np.testing.assert_array_equal(s.coords["x"], x)
        np.testing.assert_array_equal(s.environment["depth_m"], env["depth_m"])

    def test_local_planar_coordinates(self, tmp_path):
        ids, x, y, species, env = _layout(8)
        pd.DataFrame({"core": ids, "x": x - 452_000, "y": y - 5_612_000}).to_csv(
            tmp_path / "s.csv", index=False)
        s = read_survey(tmp_path / "s.csv", local_unit="m")
        assert s.crs is None and s.distance_unit == "metre" and s.source_crs is None

    def test_projected_feet_keeps_map_units(self, tmp_path):
        ids, x, y, species, env = _layout(8)
        pd.DataFrame({"core": ids, "x": 980_000 + x - 452_000, "y": 200_000 + y - 5_612_000}
                     ).to_csv(tmp_path / "s.csv", index=False)
        s = read_survey(tmp_path / "s.csv", crs="EPSG:2263")
        assert s.distance_unit == "US survey foot"
        assert s.coords["x"].iloc[0] == pytest.approx(980_000 + x[0] - 452_000)

    def test_csv_degrees_projected_with_warning(self, tmp_path):
        ids, x, y, species, env = _layout(8)
        pd.DataFrame({"core": ids, "longitude": -3 + (x - 452_000) / 1e5,
                      "latitude": 50.6 + (y - 5_612_000) / 1e5}).to_csv(tmp_path / "s.csv",
                                                                        index=False)
        with pytest.warns(errors.GeographicCoordinatesWarning, match="azimuthal equidistant"):
            s = read_survey(tmp_path / "s.csv", crs=4326)
        assert s.distance_unit == "metre" and s.crs.is_projected
        assert s.source_crs.startswith("EPSG:4326")


class TestSurveyFromFrames:
    def test_dataframe_with_xy_and_inputs_unmodified(self, layout):
        ids, x, y, species, env = layout
        sites = pd.DataFrame({"x": x, "y": y}, index=pd.Index(ids, name="core"))
        copies = [sites.copy(), species.copy(), env.copy()]
        s = Survey.from_frames(sites, species, env, crs=EPSG_UTM)
        for before, after in zip(copies, [sites, species, env]):
            pd.testing.assert_frame_equal(before, after)
        assert list(s.site_ids) == ids and s.n_sites == len(ids) and s.n_species == 4

    def test_geodataframe_with_site_id_column(self, layout):
        ids, x, y, species, env = layout
        gdf = gpd.GeoDataFrame({"core": ids}, geometry=_polygons(x, y), crs=EPSG_UTM)
        s = Survey.from_frames(gdf, species, site_id="core")
        assert s.geometry_type == "polygon" and list(s.site_ids) == ids

    def test_summary_and_spacing(self):
        sites = pd.DataFrame({"x": [0.0, 1, 3, 6, 10, 15], "y": 0.0},
                             index=pd.Index(list("abcdef"), name="site"))
        s = Survey.from_frames(sites, local_unit="km")
        info = s.summary()
        assert info["spacing"] == {"min": 1.0, "median": 2.5, "max": 5.0}
        assert info["extent"]["width"] == 15.0 and info["distance_unit"] == "kilometre"
        with pytest.raises(Exception):
            s.coords = None  # frozen


# --------------------------------------------------------------------------- validation

class TestReadSurveyValidation:
    """Every rule: the error names the file/column/site and nothing is written."""

    def test_missing_file(self, tmp_path, files):
        _raises_nothing_written(tmp_path, errors.InputError, r"species file .*nope\.csv.* does "
                                r"not exist", read_survey, files[0], tmp_path / "nope.csv",
                                crs=EPSG_UTM)

    def test_unknown_format(self, tmp_path, files):
        (tmp_path / "sites.xlsx").write_bytes(b"PK")
        _raises_nothing_written(tmp_path, errors.InputError, r"unknown format '\.xlsx'",
                                read_survey, tmp_path / "sites.xlsx")

    def test_duplicate_site_ids(self, tmp_path, layout):
        ids, x, y, species, env = layout
        ids = ids[:-1] + [ids[0]]
        pd.DataFrame({"core": ids, "x": x, "y": y}).to_csv(tmp_path / "s.csv", index=False)
        _raises_nothing_written(tmp_path, errors.InputError,
                                r"duplicate site id\(s\) 'C000'.*line 2, line 13",
                                read_survey, tmp_path / "s.csv", crs=EPSG_UTM)

    def test_sites_missing_from_species(self, tmp_path, files, layout):
        ids, x, y, species, env = layout
        species.iloc[:-2].to_csv(files[1])
        _raises_nothing_written(tmp_path, errors.InputError,
                                r"species file .*2 site\(s\) of the sites table .* are missing "
                                r"from it: 'C010', 'C011'", read_survey, *files, crs=EPSG_UTM)

    def test_extra_site_in_environment(self, tmp_path, files, layout):
        ids, x, y, species, env = layout
        extra = pd.concat([env, env.iloc[[0]].set_axis(pd.Index(["X99"], name="core"))])
        extra.to_csv(files[2])
        _raises_nothing_written(tmp_path, errors.InputError, r"not in the sites table: 'X99'",
                                read_survey, *files, crs=EPSG_UTM)

    def test_transposed_species_table(self, tmp_path, files, layout):
        ids, x, y, species, env = layout
        species.T.to_csv(files[1])
        _raises_nothing_written(tmp_path, errors.InputError, "appears transposed",
                                read_survey, *files, crs=EPSG_UTM)

    @pytest.mark.parametrize("value,match", [
        ("abc", r"column 'BTX02' line 5 \(site 'C003'\) holds 'abc', which is not a number"),
        ("2,5", r"decimal comma: pass decimal=','"),
        ("-1", r"column 'BTX02' line 5 \(site 'C003'\) is negative"),
        ("", r"is empty or missing .*write 0 where the species was absent"),
        ("NaN", r"is empty or missing"),
        ("inf", r"is infinite"),
    ])
    def test_bad_species_values(self, tmp_path, files, layout, value, match):
        ids, x, y, species, env = layout
        sp = species.astype(object)
        sp.iloc[3, 1] = value
        sp.to_csv(files[1])
        _raises_nothing_written(tmp_path, errors.InputError, match, read_survey, *files,
                                crs=EPSG_UTM)

    def test_quoted_numbers_and_bom_are_read(self, tmp_path, files, layout):
        ids, x, y, species, env = layout
        text = "\ufeff" + species.to_csv(quoting=1)  # csv.QUOTE_ALL, UTF-8 byte-order mark
        files[1].write_text(text, encoding="utf-8")
        s = read_survey(*files, crs=EPSG_UTM)
        assert s.species.index.name == "core"
        pd.testing.assert_frame_equal(s.species, species.astype(float), check_names=False)

    def test_environment_missing_value_is_an_error(self, tmp_path, files, layout):
        ids, x, y, species, env = layout
        env = env.astype(object)
        env.iloc[2, 0] = ""
        env.to_csv(files[2])
        _raises_nothing_written(tmp_path, errors.InputError,
                                r"1 site\(s\) have missing values \(columns 'depth_m'\): "
                                r"'C002'.*incomplete_sites='drop'", read_survey, *files,
                                crs=EPSG_UTM)

    def test_environment_missing_value_dropped_on_request(self, tmp_path, files, layout):
        ids, x, y, species, env = layout
        env = env.astype(object)
        env.iloc[2, 0] = "NA"
        env.iloc[5, 1] = ""
        env.to_csv(files[2])
        with pytest.warns(errors.DroppedSitesWarning, match=r"'C002', 'C005'"):
            s = read_survey(*files, crs=EPSG_UTM, incomplete_sites="drop")
        assert s.dropped["sites"] == ["C002", "C005"]
        assert "C002" not in s.species.index and s.n_sites == len(ids) - 2
        assert list(s.species.index) == list(s.environment.index) == list(s.site_ids)

    def test_environment_numeric_typo(self, tmp_path, files, layout):
        ids, x, y, species, env = layout
        env = env.astype(object)
        env.iloc[4, 0] = "1.2m"
        env.to_csv(files[2])
        _raises_nothing_written(tmp_path, errors.InputError,
                                r"column 'depth_m' looks numeric but line 6 \(site 'C004'\) "
                                r"holds '1.2m'", read_survey, *files, crs=EPSG_UTM)

    def test_all_zero_species_dropped(self, tmp_path, files, layout):
        ids, x, y, species, env = layout
        species.assign(BTX99=0).to_csv(files[1])
        with pytest.warns(errors.DroppedSpeciesWarning, match="'BTX99'"):
            s = read_survey(*files, crs=EPSG_UTM)
        assert "BTX99" not in s.species.columns and s.dropped["species"] == ["BTX99"]

    def test_all_zero_site_is_an_error(self, tmp_path, files, layout):
        ids, x, y, species, env = layout
        sp = species.copy()
        sp.iloc[4] = 0
        sp.to_csv(files[1])
        _raises_nothing_written(tmp_path, errors.InputError,
                                r"1 site\(s\) have no species at all .*'C004'.*Hellinger and "
                                r"chord transformations divide by each site's total.*"
                                r"empty_sites='drop'",
                                read_survey, *files, crs=EPSG_UTM)

    def test_all_zero_sites_dropped_on_request(self, tmp_path, files, layout):
        ids, x, y, species, env = layout
        sp = species.copy()
        sp.iloc[[4, 7]] = 0
        sp.to_csv(files[1])
        with pytest.warns(errors.EmptySitesWarning, match=r"dropped 2 site\(s\) with no "
                                                          r"species at all.*'C004', 'C007'"):
            s = read_survey(*files, crs=EPSG_UTM, empty_sites="drop")
        assert s.dropped["empty_sites"] == ["C004", "C007"]
        assert s.n_sites == len(ids) - 2 and "C004" not in s.coords.index
        assert list(s.species.index) == list(s.environment.index) == list(s.site_ids)
        assert (s.species.sum(axis=1) > 0).all()
        with pytest.raises(errors.InputError, match="`empty_sites` must be one of"):
            read_survey(*files, crs=EPSG_UTM, empty_sites="keep")

    def test_fewer_than_five_sites(self, tmp_path):
        pd.DataFrame({"core": list("abcd"), "x": [0, 1, 2, 3], "y": [0, 1, 0, 1]}).to_csv(
            tmp_path / "s.csv", index=False)
        _raises_nothing_written(tmp_path, errors.InputError, r"4 site\(s\).*at least 5",
                                read_survey, tmp_path / "s.csv", local_unit="m")

    def test_shared_coordinates_error(self, tmp_path, layout):
        ids, x, y, species, env = layout
        x, y = x.copy(), y.copy()
        x[7], y[7] = x[2], y[2]
        pd.DataFrame({"core": ids, "x": x, "y": y}).to_csv(tmp_path / "s.csv", index=False)
        _raises_nothing_written(tmp_path, errors.InputError,
                                r"2 sites share coordinates .*'C002' = 'C007'.*"
                                r"shared_coordinates='merge'", read_survey, tmp_path / "s.csv",
                                crs=EPSG_UTM)

    def test_shared_coordinates_merged_on_request(self, tmp_path, layout):
        ids, x, y, species, env = layout
        x, y = x.copy(), y.copy()
        x[7], y[7] = x[2], y[2]
        env = env.copy()
        env.iloc[7, 1] = env.iloc[2, 1]
        paths = _write_csvs(tmp_path, ids, x, y, species, env)
        with pytest.warns(errors.MergedSitesWarning, match=r"C002 \+ C007"):
            s = read_survey(*paths, crs=EPSG_UTM, shared_coordinates="merge")
        assert s.n_sites == len(ids) - 1 and "C007" not in s.site_ids
        assert s.dropped["merged_sites"] == [["C002", "C007"]]
        expect = (species.loc["C002"] + species.loc["C007"]) / 2
        np.testing.assert_allclose(s.species.loc["C002"], expect)
        assert s.environment.loc["C002", "depth_m"] == pytest.approx(
            (env.loc["C002", "depth_m"] + env.loc["C007", "depth_m"]) / 2)

    def test_constant_environment_column_dropped(self, tmp_path, files, layout):
        ids, x, y, species, env = layout
        env.assign(tide="spring").assign(year=2024).to_csv(files[2])
        with pytest.warns(errors.DroppedVariablesWarning, match="'tide', 'year'"):
            s = read_survey(*files, crs=EPSG_UTM)
        assert s.dropped["variables"] == ["tide", "year"]
        assert "year" not in s.environment.columns

    def test_text_column_unique_per_site(self, tmp_path, files, layout):
        ids, x, y, species, env = layout
        env.assign(notes=[f"core {i}" for i in range(len(ids))]).to_csv(files[2])
        _raises_nothing_written(tmp_path, errors.InputError,
                                "text column 'notes' has a different value at every site",
                                read_survey, *files, crs=EPSG_UTM)

    def test_mixed_geometries(self, tmp_path, layout):
        ids, x, y, species, env = layout
        geom = list(shapely.points(x[:6], y[:6])) + _polygons(x[6:], y[6:])
        gpd.GeoDataFrame({"core": ids}, geometry=geom, crs=EPSG_UTM).to_file(
            tmp_path / "s.gpkg")
        _raises_nothing_written(tmp_path, errors.InputError, "mixes points and polygons",
                                read_survey, tmp_path / "s.gpkg")

    def test_empty_geometry(self, tmp_path, layout):
        ids, x, y, species, env = layout
        geom = list(shapely.points(x, y))
        geom[3] = None
        gpd.GeoDataFrame({"core": ids}, geometry=geom, crs=EPSG_UTM).to_file(
            tmp_path / "s.gpkg")
        _raises_nothing_written(tmp_path, errors.InputError, r"have no geometry.*'C003'",
                                read_survey, tmp_path / "s.gpkg")

    def test_single_part_multipoints_are_points(self, tmp_path, layout):
        ids, x, y, species, env = layout
        geom = [shapely.MultiPoint([(a, b)]) for a, b in zip(x, y)]
        gpd.GeoDataFrame({"core": ids}, geometry=geom, crs=EPSG_UTM).to_file(
            tmp_path / "s.gpkg")
        s = read_survey(tmp_path / "s.gpkg")
        assert s.geometry_type == "point" and (s.sites.geom_type == "Point").all()
        np.testing.assert_array_equal(s.coords["x"], x)
        geom[0] = shapely.MultiPoint([(x[0], y[0]), (x[0] + 5, y[0])])
        gpd.GeoDataFrame({"core": ids}, geometry=geom, crs=EPSG_UTM).to_file(
            tmp_path / "s2.gpkg")
        _raises_nothing_written(tmp_path, errors.InputError, r"\['MultiPoint'\] are not "
                                r"supported \(e.g. site 'C000'\)", read_survey,
                                tmp_path / "s2.gpkg")

    def test_lines_are_not_sites(self, tmp_path, layout):
        ids, x, y, species, env = layout
        geom = [shapely.LineString([(a, b), (a + 1, b + 1)]) for a, b in zip(x, y)]
        gpd.GeoDataFrame({"core": ids}, geometry=geom, crs=EPSG_UTM).to_file(
            tmp_path / "s.gpkg")
        _raises_nothing_written(tmp_path, errors.InputError, r"\['LineString'\] are not "
                                r"supported", read_survey, tmp_path / "s.gpkg")

    def test_three_dimensional_points_warn(self, tmp_path, layout):
        ids, x, y, species, env = layout
        gpd.GeoDataFrame({"core": ids}, geometry=shapely.points(x, y, np.ones_like(x)),
                         crs=EPSG_UTM).to_file(tmp_path / "s.gpkg")
        with pytest.warns(errors.ThreeDimensionalCoordinatesWarning, match="only x and y"):
            s = read_survey(tmp_path / "s.gpkg")
        assert not s.sites.has_z.any()
        np.testing.assert_array_equal(s.coords["x"], x)

    def test_layers_in_different_crs(self, tmp_path, layout):
        ids, x, y, species, env = layout
        gpd.GeoDataFrame({"core": ids}, geometry=shapely.points(x, y), crs=EPSG_UTM).to_file(
            tmp_path / "s.gpkg")
        e = gpd.GeoDataFrame(env.reset_index(), geometry=shapely.points(x, y), crs=EPSG_UTM)
        e.to_crs(3857).to_file(tmp_path / "e.gpkg")
        _raises_nothing_written(tmp_path, errors.CRSError,
                                r"layers in different CRSs: sites in EPSG:32630 .*environment "
                                r".* in EPSG:3857.*reproject", read_survey, tmp_path / "s.gpkg",
                                environment=tmp_path / "e.gpkg")

    def test_file_crs_differs_from_given(self, tmp_path, layout):
        ids, x, y, species, env = layout
        gpd.GeoDataFrame({"core": ids}, geometry=shapely.points(x, y), crs=EPSG_UTM).to_file(
            tmp_path / "s.gpkg")
        _raises_nothing_written(tmp_path, errors.CRSError,
                                r"is in EPSG:32630 .* but crs=EPSG:32631", read_survey,
                                tmp_path / "s.gpkg", crs=32631)

    def test_lat_lon_columns_without_crs(self, tmp_path):
        pd.DataFrame({"site": list("abcdef"), "lat": np.linspace(60, 61, 6),
                      "lon": np.linspace(10, 11, 6)}).to_csv(tmp_path / "s.csv", index=False)
        _raises_nothing_written(tmp_path, errors.CRSError, r"'lon'/'lat' look like "
                                r"longitude/latitude but no CRS was given; pass "
                                r"crs='EPSG:4326'", read_survey, tmp_path / "s.csv")

    def test_csv_without_crs(self, tmp_path, files):
        _raises_nothing_written(tmp_path, errors.CRSError, "local_unit='metre'", read_survey,
                                files[0])

    def test_swapped_lat_lon(self, tmp_path):
        pd.DataFrame({"site": list("abcdef"), "x": np.linspace(60, 61, 6),
                      "y": np.linspace(150, 151, 6)}).to_csv(tmp_path / "s.csv", index=False)
        _raises_nothing_written(tmp_path, errors.CRSError, r"look swapped: the latitude \(y\) "
                                r"column 'y' holds 150 at site 'a' \(line 2\).*x='y', y='x'",
                                read_survey, tmp_path / "s.csv", crs=4326)

    def test_semicolon_file_with_comma_delimiter(self, tmp_path, layout):
        ids, x, y, species, env = layout
        pd.DataFrame({"core": ids, "x": x, "y": y}).to_csv(tmp_path / "s.csv", sep=";",
                                                           index=False)
        _raises_nothing_written(tmp_path, errors.InputError, r"pass delimiter=';'",
                                read_survey, tmp_path / "s.csv", crs=EPSG_UTM, delimiter=",")
        # without the option the delimiter is detected from the header
        assert read_survey(tmp_path / "s.csv", crs=EPSG_UTM).n_sites == len(ids)

    def test_decimal_comma_coordinates_without_option(self, tmp_path, layout):
        ids, x, y, species, env = layout
        pd.DataFrame({"core": ids, "x": x, "y": y}).to_csv(tmp_path / "s.csv", sep=";",
                                                           decimal=",", index=False)
        _raises_nothing_written(tmp_path, errors.InputError, r"decimal comma: pass decimal=','",
                                read_survey, tmp_path / "s.csv", crs=EPSG_UTM, delimiter=";")

    def test_no_coordinate_columns(self, tmp_path, layout):
        ids, x, y, species, env = layout
        pd.DataFrame({"core": ids, "a": x, "b": y}).to_csv(tmp_path / "s.csv", index=False)
        _raises_nothing_written(tmp_path, errors.InputError, r"no coordinate columns found.*"
                                r"--x COL --y COL", read_survey, tmp_path / "s.csv",
                                crs=EPSG_UTM)

    def test_unknown_site_id_column(self, tmp_path, files):
        _raises_nothing_written(tmp_path, errors.InputError, r"no site-id column 'plot'",
                                read_survey, *files, crs=EPSG_UTM, site_id="plot")

    def test_options_checked(self, files):
        with pytest.raises(errors.InputError, match="`incomplete_sites` must be one of"):
            read_survey(*files, crs=EPSG_UTM, incomplete_sites="ignore")
        with pytest.raises(errors.CRSError, match="either `crs`.*or `local_unit`"):
            read_survey(*files, crs=EPSG_UTM, local_unit="m")


class TestReadSurveyMoreInputs:
    def test_shapefile_without_prj_needs_a_crs(self, tmp_path, layout):
        ids, x, y, species, env = layout
        gpd.GeoDataFrame({"core": ids}, geometry=shapely.points(x, y), crs=EPSG_UTM).to_file(
            tmp_path / "s.shp")
        (tmp_path / "s.prj").unlink()
        _raises_nothing_written(tmp_path, errors.CRSError, r"declares no CRS; pass crs=",
                                read_survey, tmp_path / "s.shp")
        s = read_survey(tmp_path / "s.shp", crs=EPSG_UTM)
        assert s.crs.to_epsg() == EPSG_UTM

    def test_layer_option(self, tmp_path, layout):
        ids, x, y, species, env = layout
        gdf = gpd.GeoDataFrame({"core": ids}, geometry=shapely.points(x, y), crs=EPSG_UTM)
        gdf.to_file(tmp_path / "m.gpkg", layer="cores")
        gdf.iloc[:6].to_file(tmp_path / "m.gpkg", layer="pilot")
        assert read_survey(tmp_path / "m.gpkg", layer="pilot").n_sites == 6
        _raises_nothing_written(tmp_path, errors.InputError, "has 2 layers", read_survey,
                                tmp_path / "m.gpkg")

    def test_leading_zero_ids_match(self, tmp_path):
        ids, x, y, species, env = _layout(6)
        pd.DataFrame({"site": [f"0{i}" for i in range(1, 7)], "x": x, "y": y}).to_csv(
            tmp_path / "s.csv", index=False)
        species.set_axis(pd.Index(range(1, 7), name="site")).to_csv(tmp_path / "y.csv")
        s = read_survey(tmp_path / "s.csv", tmp_path / "y.csv", crs=EPSG_UTM)
        assert s.site_ids.tolist() == ["01", "02", "03", "04", "05", "06"]  # kept as written
        assert s.species.iloc[:, 0].tolist() == species.iloc[:, 0].astype(float).tolist()

    def test_degrees_with_projected_crs(self, tmp_path):
        pd.DataFrame({"site": list("abcdef"), "lon": np.linspace(-3, -2, 6),
                      "lat": np.linspace(50, 51, 6)}).to_csv(tmp_path / "s.csv", index=False)
        _raises_nothing_written(tmp_path, errors.CRSError, r"hold degrees but the given CRS "
                                r"EPSG:32630 .* is projected", read_survey, tmp_path / "s.csv",
                                crs=EPSG_UTM)

    def test_coordinate_as_first_column_hint(self, tmp_path):
        pd.DataFrame({"x": [1.0, 2, 3, 4, 5], "y": [5.0, 4, 3, 2, 1], "v": 1}).to_csv(
            tmp_path / "s.csv", index=False)
        _raises_nothing_written(tmp_path, errors.InputError, "first column 'x' looks like a "
                                "coordinate", read_survey, tmp_path / "s.csv", local_unit="m")

    def test_merge_refuses_disagreeing_categories(self, tmp_path, layout):
        ids, x, y, species, env = layout
        x, y = x.copy(), y.copy()
        x[4], y[4] = x[1], y[1]
        env = env.copy()
        env.iloc[1, 1], env.iloc[4, 1] = "mud", "sand"
        paths = _write_csvs(tmp_path, ids, x, y, species, env)
        _raises_nothing_written(tmp_path, errors.InputError, r"'C001', 'C004' share "
                                r"coordinates but have different categories", read_survey,
                                *paths, crs=EPSG_UTM, shared_coordinates="merge")

    def test_frames_with_site_id_column_and_summary_is_plain(self, layout):
        import json

        ids, x, y, species, env = layout
        sites = pd.DataFrame({"core": ids, "x": x, "y": y})
        s = Survey.from_frames(sites, species.reset_index(), env.reset_index(), site_id="core",
                               crs=EPSG_UTM)
        assert list(s.species.index) == ids and s.environment.shape == (len(ids), 3)
        text = json.dumps(s.summary())
        assert '"n_sites": 12' in text

    def test_species_presence_absence_and_cover(self, tmp_path, files, layout):
        ids, x, y, species, env = layout
        cover = (species / species.to_numpy().max() * 100).round(1)
        cover.to_csv(files[1])
        s = read_survey(*files, crs=EPSG_UTM)
        np.testing.assert_allclose(s.species.to_numpy(), cover.to_numpy())
        (species > 0).astype(int).to_csv(files[1])
        s = read_survey(*files, crs=EPSG_UTM)
        assert set(np.unique(s.species.to_numpy())) <= {0.0, 1.0}

    def test_species_table_without_id_column(self, tmp_path, files, layout):
        ids, x, y, species, env = layout
        species.to_csv(files[1], index=False)
        _raises_nothing_written(tmp_path, errors.InputError, r"none of its ids \(column 'BTX01'"
                                r".*is 'BTX01' the site-id column\?", read_survey, *files,
                                crs=EPSG_UTM)

    def test_ids_differing_in_case(self, tmp_path, files, layout):
        ids, x, y, species, env = layout
        species.set_axis(pd.Index([i.lower() for i in ids[:3]] + ids[3:], name="core")
                         ).to_csv(files[1])
        _raises_nothing_written(tmp_path, errors.InputError, "differ only in upper/lower case",
                                read_survey, *files, crs=EPSG_UTM)

    def test_spreadsheet_hint(self, tmp_path):
        (tmp_path / "sites.xlsx").write_bytes(b"PK")
        _raises_nothing_written(tmp_path, errors.InputError, "export the sheet as CSV",
                                read_survey, tmp_path / "sites.xlsx")

    def test_invalid_polygon(self, tmp_path, layout):
        ids, x, y, species, env = layout
        geom = _polygons(x, y)
        a, b = x[2], y[2]
        geom[2] = shapely.Polygon([(a, b), (a + 9, b + 9), (a + 9, b), (a, b + 9)])  # bow tie
        gpd.GeoDataFrame({"core": ids}, geometry=geom, crs=EPSG_UTM).to_file(
            tmp_path / "s.gpkg")
        _raises_nothing_written(tmp_path, errors.InputError, r"1 invalid polygon\(s\), e.g. "
                                r"site 'C002' \(Self-intersection", read_survey,
                                tmp_path / "s.gpkg")


class TestAlignmentProperty:
    @settings(max_examples=10, deadline=None)
    @given(st.permutations(list(range(12))), st.permutations(list(range(12))))
    def test_row_order_of_tables_never_matters(self, species_order, env_order):
        ids, x, y, species, env = _layout()
        sites = pd.DataFrame({"x": x, "y": y}, index=pd.Index(ids, name="core"))
        reference = Survey.from_frames(sites, species, env, crs=EPSG_UTM)
        shuffled = Survey.from_frames(sites, species.iloc[list(species_order)],
                                      env.iloc[list(env_order)], crs=EPSG_UTM)
        pd.testing.assert_frame_equal(shuffled.species, reference.species)
        pd.testing.assert_frame_equal(shuffled.environment, reference.environment)
