"""Tests of spatial_ev.input.crs: CRS parsing, range checks and the local metric projection."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pyproj
import pytest

from spatial_ev import errors
from spatial_ev.input.crs import (check_geographic_ranges, crs_label, distance_unit_of,
                            is_local_metric_crs, local_metric_crs, looks_geographic_name,
                            normalise_local_unit,
                            parse_crs)
from spatial_ev.input.survey import Survey


def _pairwise_errors(lon, lat, max_km=100.0):
    """Relative error of planar distances in the working CRS against geodesic distances."""
    sites = pd.DataFrame({"x": lon, "y": lat},
                         index=pd.Index([f"s{i}" for i in range(len(lon))], name="site"))
    with pytest.warns(errors.GeographicCoordinatesWarning):
        survey = Survey.from_frames(sites, crs="EPSG:4326")
    xy = survey.coords.to_numpy()
    i, j = np.triu_indices(len(lon), k=1)
    planar = np.hypot(xy[i, 0] - xy[j, 0], xy[i, 1] - xy[j, 1])
    # Reference: geodesics on the WGS 84 ellipsoid by pyproj.Geod, which implements
    # Karney (2013), "Algorithms for geodesics", J. Geodesy 87:43-55 (accurate to ~15 nm).
    _, _, geodesic = pyproj.Geod(ellps="WGS84").inv(lon[i], lat[i], lon[j], lat[j])
    near = geodesic <= max_km * 1000.0
    return np.abs(planar[near] / geodesic[near] - 1.0), survey, geodesic


def _centre(crs):
    params = {p.name: p.value for p in crs.coordinate_operation.params}
    return params["Longitude of natural origin"], params["Latitude of natural origin"]


class TestLocalMetricCrs:
    def test_high_latitude_survey_distances_against_geodesics(self):
        # 400 sites over ~ 330 km (E-W) x 280 km (N-S) between 65 and 67.5 degrees north
        rng = np.random.default_rng(731_500_284)
        lon = rng.uniform(-22.0, -15.0, 400)
        lat = rng.uniform(65.0, 67.5, 400)
        rel, survey, geodesic = _pairwise_errors(lon, lat)
        assert geodesic.max() > 250_000  # the survey really is > 200 km across
        assert rel.size > 1000
        assert rel.max() <= 0.005  # task requirement: <= 0.5 % for pairs within 100 km
        # what the azimuthal equidistant projection achieves here (measured 1.6e-4 over
        # 20,497 pairs;
        # the scale error grows as (distance from centre)^2 / (6 R^2) [derived])
        assert rel.max() < 5e-4
        assert survey.distance_unit == "metre"
        assert "azimuthal equidistant" in survey.projection_note

    def test_survey_straddling_the_antimeridian(self):
        lon = np.array([179.6, 179.8, -179.9, -179.7, 179.9, -179.95])
        lat = np.array([-16.0, -16.2, -16.1, -15.9, -15.8, -16.3])
        rel, survey, _ = _pairwise_errors(lon, lat)
        assert rel.max() < 1e-5
        centre_lon = _centre(survey.crs)[0]
        assert abs(abs(centre_lon) - 180.0) < 0.2

    def test_keeps_the_datum(self):
        crs, note = local_metric_crs(np.array([10.0, 11.0]), np.array([50.0, 51.0]),
                                     pyproj.CRS("EPSG:4258"))
        assert "ETRS89" in crs.geodetic_crs.name and "ETRS89" in note

    def test_distance_from_centre_is_exact(self):
        crs, _ = local_metric_crs(np.array([-20.0, -18.0]), np.array([66.0, 66.0]))
        to_local = pyproj.Transformer.from_crs(4326, crs, always_xy=True)
        x, y = to_local.transform(-18.0, 66.0)
        lon0, lat0 = _centre(crs)
        _, _, d = pyproj.Geod(ellps="WGS84").inv(lon0, lat0, -18.0, 66.0)
        assert np.hypot(x, y) == pytest.approx(d, rel=1e-9)

    def test_continental_extent_rejected(self):
        with pytest.raises(errors.CRSError, match=r"would distort distances by up to 1\.[0-9] %"):
            local_metric_crs(np.array([-10.0, 30.0]), np.array([40.0, 60.0]))
        crs, note = local_metric_crs(np.array([-10.0, 10.0]), np.array([45.0, 55.0]))
        assert "scale error at most 0.33 %" in note  # c = 0.141 rad: c/sin(c) - 1 [derived]

    def test_whole_globe_rejected(self):
        with pytest.raises(errors.CRSError, match="whole globe"):
            local_metric_crs(np.array([0.0, 180.0]), np.array([0.0, 0.0]))


class TestParseCrs:
    @pytest.mark.parametrize("value", [32630, "32630", "EPSG:32630", pyproj.CRS(32630).to_wkt()])
    def test_forms(self, value):
        assert parse_crs(value).to_epsg() == 32630

    def test_compound_reduced_to_horizontal(self):
        assert parse_crs("EPSG:32630+5773").to_epsg() == 32630

    def test_invalid(self):
        with pytest.raises(errors.CRSError, match=r"`crs` 'EPSG:999999' is not a coordinate "
                                                  r"reference system.*'EPSG:32630'"):
            parse_crs("EPSG:999999")

    def test_geocentric_rejected(self):
        with pytest.raises(errors.CRSError, match="neither geographic nor projected"):
            parse_crs(4978)


class TestHelpers:
    def test_distance_unit_of(self):
        assert distance_unit_of(pyproj.CRS(2263)) == "US survey foot"
        assert distance_unit_of(pyproj.CRS(32630)) == "metre"

    def test_crs_label(self):
        assert crs_label(pyproj.CRS(32630)) == "EPSG:32630 (WGS 84 / UTM zone 30N)"

    def test_local_units(self):
        assert normalise_local_unit(" Kilometers ") == "kilometre"
        with pytest.raises(errors.CRSError, match=r"`local_unit` 'parsec' is not a known"):
            normalise_local_unit("parsec")

    def test_geographic_names(self):
        assert looks_geographic_name("Longitude", "x") and not looks_geographic_name("x", "x")

    def test_ranges(self):
        with pytest.raises(errors.CRSError, match=r"longitude \(x\) value.*200.0 at site 'b'"):
            check_geographic_ranges(np.array([10.0, 200.0]), np.array([0.0, 0.0]),
                                    source="sites", site_ids=["a", "b"])
        with pytest.raises(errors.CRSError, match="swapped"):
            check_geographic_ranges(np.array([45.0]), np.array([120.0]), source="sites")


class TestScaleRange:
    """Point scale factors from PROJ: web Mercator scales by 1/cos(latitude) (Snyder 1987,
    Map Projections -- A Working Manual, USGS PP 1395, p. 44 [memory]); UTM by 0.9996 on its
    central meridian (Snyder 1987, p. 57 [memory])."""

    def test_web_mercator_and_utm(self):
        import numpy as np
        import pyproj

        from spatial_ev.input.crs import scale_range

        lon, lat = np.array([15.0, 15.1]), np.array([60.0, 60.1])
        for code, expected in ((3857, 1 / np.cos(np.radians(lat))), (32633, [0.9996, 0.9996])):
            crs = pyproj.CRS(code)
            x, y = pyproj.Transformer.from_crs(4326, crs, always_xy=True).transform(lon, lat)
            low, high, utm = scale_range(crs, x, y)
            assert low == pytest.approx(min(expected), rel=1e-4)
            assert high == pytest.approx(max(expected), rel=1e-4)
            assert utm == "EPSG:32633"

    def test_survey_warns_for_distorting_crs(self):
        import geopandas as gpd
        import numpy as np

        from spatial_ev.errors import MapDistortionWarning
        from spatial_ev.input.survey import Survey

        pts = gpd.GeoSeries(gpd.points_from_xy(15 + np.arange(6) * 1e-3, 60 + np.arange(6) % 3
                                               * 1e-3), crs=4326)
        sites = gpd.GeoDataFrame({"site": list("abcdef")}, geometry=pts).set_index("site")
        with pytest.warns(MapDistortionWarning, match=r"are 2 times the ground distances"):
            survey = Survey.from_frames(sites.to_crs(3857))
        assert "2 times the ground distances" in survey.projection_note
        with warnings.catch_warnings():
            warnings.simplefilter("error", MapDistortionWarning)
            Survey.from_frames(sites.to_crs(32633))


class TestLocalProjectionLabels:
    def test_local_projection_recognised(self):
        crs, _ = local_metric_crs(np.array([15.0, 15.01]), np.array([60.0, 60.01]))
        assert is_local_metric_crs(crs) and is_local_metric_crs(crs.to_wkt())
        assert not is_local_metric_crs(pyproj.CRS(32633))
        assert not is_local_metric_crs(pyproj.CRS(4326)) and not is_local_metric_crs(None)
        # an azimuthal equidistant CRS that is not the survey's own: not ours
        assert not is_local_metric_crs(pyproj.CRS("+proj=aeqd +lat_0=60 +lon_0=15"))

    def test_map_axes_of_a_lon_lat_survey(self):
        """Degrees projected around the survey centre are labelled as offsets from that
        centre in the local projection, not as a projected CRS's easting/northing."""
        from spatial_ev.report.maps import site_map_figure

        lon = 15.0 + np.array([0.0, 0.004, 0.008, 0.0, 0.004, 0.008])
        lat = 60.0 + np.array([0.0, 0.0, 0.0, 0.003, 0.003, 0.003])
        sites = pd.DataFrame({"lon": lon, "lat": lat},
                             index=pd.Index([f"s{i}" for i in range(6)], name="site"))
        with pytest.warns(errors.GeographicCoordinatesWarning):
            survey = Survey.from_frames(sites, x="lon", y="lat", crs="EPSG:4326")
        layer = survey.sites.assign(value=np.arange(6.0) - 2.5)
        ax = site_map_figure(layer, column="value").axes[0]
        assert ax.get_xlabel() == "east of survey centre (m, local azimuthal equidistant)"
        assert ax.get_ylabel() == "north of survey centre (m, local azimuthal equidistant)"
        # the centre lies inside the survey: offsets of both signs, within the survey's extent
        assert survey.coords["x"].min() < 0 < survey.coords["x"].max()
        utm = survey.sites.to_crs(32633).assign(value=np.arange(6.0) - 2.5)
        ax = site_map_figure(utm, column="value").axes[0]
        assert (ax.get_xlabel(), ax.get_ylabel()) == ("easting (m)", "northing (m)")


class TestSwappedColumns:
    def _sites(self, lon, lat, names=("lon", "lat")):
        return pd.DataFrame({names[0]: lon, names[1]: lat},
                            index=pd.Index([f"s{i}" for i in range(len(lon))], name="site"))

    def test_columns_named_the_other_way_round(self):
        # valid degrees either way round (10 E 60 N or 60 E 10 N): only the names tell
        sites = self._sites([10.0, 10.01, 10.02, 10.0, 10.01], [60.0, 60.0, 60.0, 60.01, 60.01])
        with pytest.raises(errors.CRSError, match=r"look swapped: the x column 'lat' is named "
                                                  r"like a latitude and the y column 'lon' "
                                                  r"like a longitude.*x='lon', y='lat'"):
            Survey.from_frames(sites, x="lat", y="lon", crs="EPSG:4326")
        with pytest.raises(errors.CRSError, match="look swapped"):  # also before a CRS is given
            Survey.from_frames(sites, x="lat", y="lon")
        with pytest.warns(errors.GeographicCoordinatesWarning):
            assert Survey.from_frames(sites, x="lon", y="lat", crs="EPSG:4326").n_sites == 5

    def test_degrees_that_fit_only_swapped(self):
        # latitudes of 150 are impossible; the values fit with x and y exchanged
        sites = self._sites([-33.8, -33.801, -33.802, -33.803, -33.804],
                            [150.1, 150.101, 150.102, 150.103, 150.104], names=("a", "b"))
        with pytest.raises(errors.CRSError, match=r"look swapped: the latitude \(y\) column "
                                                  r"'b' holds 150.1 at site 's0' \(row 1\)"):
            Survey.from_frames(sites, x="a", y="b", crs="EPSG:4326")
        # a projected CRS: no degrees, so no swap check (a false easting is not a latitude)
        utm = self._sites([500_000.0 + i for i in range(5)], [150.0 + i for i in range(5)])
        survey = Survey.from_frames(utm, x="lon", y="lat", crs="EPSG:32633")
        assert survey.n_sites == 5
