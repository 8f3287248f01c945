"""Tests of spatial_ev.input.network: river networks read from line layers.

External oracles: shapely (distances from sites to lines, line lengths), pyproj (reprojection),
networkx (graph structure: trees, components), pyogrio (the three file formats). Hand-made
networks are small enough to check by eye; their expected values are written out.
"""

from __future__ import annotations

import json
import warnings

import geopandas as gpd
import networkx as nx
import numpy as np
import pandas as pd
import pyproj
import pytest
import shapely

from spatial_ev.errors import CRSError, InputError, SpatialEVWarning
from spatial_ev.input.network import RiverNetwork, build_river_network, read_river_network
from spatial_ev.input.survey import Survey, read_survey

pytestmark = pytest.mark.filterwarnings("ignore:'crs' was not provided:UserWarning")

UPPER = shapely.LineString([(0, 20), (0, 10)])          # digitised downstream
LOWER = shapely.LineString([(0, 10), (0, 0)])
TRIB = shapely.LineString([(10, 20), (0, 10)])
# a point on TRIB at (5, 15), moved 0.6 perpendicular to it
_OFF = 0.6 / np.sqrt(2)
SITES = pd.DataFrame({"x": [0.5, 5 + _OFF, -0.2, 0.0], "y": [15.0, 15 - _OFF, 5.0, 2.0]},
                     index=pd.Index(["s1", "s2", "s3", "s4"], name="site"))


def y_network(**kw) -> RiverNetwork:
    return build_river_network([UPPER, LOWER, TRIB], SITES, snap_tolerance=1.0, **kw)


def as_networkx(net: RiverNetwork) -> nx.DiGraph:
    g = nx.DiGraph()
    g.add_nodes_from(net.nodes.index)
    for e in net.edges.itertuples():
        g.add_edge(e.upstream_node, e.downstream_node, length=e.length)
    return g


class TestHandMadeNetwork:
    def test_snap_distances_equal_shapely_distance(self):
        net = y_network()
        lines = shapely.union_all([UPPER, LOWER, TRIB])
        # oracle: shapely's distance from each site to the nearest line
        expected = shapely.distance(shapely.points(SITES.to_numpy()), lines)
        np.testing.assert_allclose(net.sites["snap_distance"], expected, rtol=0, atol=1e-12)
        np.testing.assert_allclose(net.sites["snap_distance"], [0.5, 0.6, 0.2, 0.0],
                                   atol=1e-12)          # hand values of the layout
        snapped = shapely.points(net.sites[["x", "y"]].to_numpy())
        assert (shapely.distance(snapped, lines) < 1e-9).all()

    def test_structure_is_a_tree_draining_to_one_outlet(self):
        net = y_network()
        g = as_networkx(net)
        # networkx oracle: a directed tree whose edges all lead to the single sink
        assert nx.is_tree(g.to_undirected())
        sinks = [v for v in g if g.out_degree(v) == 0]
        assert sinks == list(net.outlets)
        assert net.nodes.loc[sinks[0], ["x", "y"]].tolist() == [0.0, 0.0]
        assert all(nx.has_path(g, v, sinks[0]) for v in g)
        assert max(d for _, d in g.out_degree()) == 1
        kinds = net.nodes.set_index(["x", "y"])["kind"]
        assert kinds.loc[(0.0, 10.0)] == "confluence"
        assert kinds.loc[(0.0, 20.0)] == kinds.loc[(10.0, 20.0)] == "source"
        assert (net.nodes.loc[net.site_nodes, "kind"] == "site").all()

    def test_lines_split_at_sites_keep_total_length(self):
        net = y_network()
        # 3 lines + 4 sites inside them -> 7 stretches; lengths from shapely
        assert len(net.edges) == 7
        assert net.total_length == pytest.approx(sum(shapely.length([UPPER, LOWER, TRIB])),
                                                 rel=1e-12)
        assert (net.edges["length"] > 0).all()
        np.testing.assert_allclose(net.edges["length"], shapely.length(net.edges.geometry))

    def test_edge_geometry_runs_from_upstream_to_downstream_node(self):
        net = y_network()
        first = shapely.get_coordinates(shapely.get_point(net.edges.geometry.values, 0))
        last = shapely.get_coordinates(shapely.get_point(net.edges.geometry.values, -1))
        np.testing.assert_array_equal(
            first, net.nodes.loc[net.edges["upstream_node"], ["x", "y"]].to_numpy())
        np.testing.assert_array_equal(
            last, net.nodes.loc[net.edges["downstream_node"], ["x", "y"]].to_numpy())

    def test_tributary_ending_on_a_line_interior_becomes_a_confluence(self):
        main = shapely.LineString([(0, 20), (0, 0)])
        joined = build_river_network([main, TRIB], SITES, snap_tolerance=1.0,
                                     node_tolerance=1e-6)
        three = y_network()
        assert len(joined.edges) == len(three.edges)
        assert joined.total_length == pytest.approx(three.total_length)
        assert (joined.nodes["kind"] == "confluence").sum() == 1
        assert joined.nodes.loc[joined.nodes["kind"] == "confluence", ["x", "y"]].values.tolist() \
            == [[0.0, 10.0]]
        assert any("interior" in n for n in joined.notes)

    def test_node_tolerance_joins_ends_that_miss_each_other(self):
        trib = shapely.LineString([(10, 20), (0.3, 10)])
        with pytest.raises(InputError, match=r"separate parts.*\(0\.3, 10\).*0\.3 "):
            build_river_network([UPPER, LOWER, trib], SITES, snap_tolerance=1.0)
        net = build_river_network([UPPER, LOWER, trib], SITES, snap_tolerance=1.0,
                                  node_tolerance=0.5)
        assert len(net.outlets) == 1 and net.node_tolerance == 0.5
        assert nx.is_tree(as_networkx(net).to_undirected())

    def test_site_beyond_the_snap_tolerance_is_named_with_its_distance(self):
        sites = pd.concat([SITES, pd.DataFrame({"x": [30.0], "y": [0.0]},
                                               index=pd.Index(["far"], name="site"))])
        # shapely oracle: distance to the nearest line (the tributary's source, 28.28)
        d = float(shapely.distance(shapely.Point(30, 0), shapely.union_all([UPPER, LOWER, TRIB])))
        with pytest.raises(InputError, match=rf"1 site\(s\).*'far' \({d:.4g} map unit\)"):
            build_river_network([UPPER, LOWER, TRIB], sites, snap_tolerance=1.0)

    def test_loop_is_refused_naming_where_it_closes(self):
        side = shapely.LineString([(0, 20), (3, 15), (0, 10)])       # a side channel
        with pytest.raises(InputError, match=r"loop \(a braided reach.*between \(0, 10\) and "
                                             r"\(0, 15\)"):
            build_river_network([UPPER, LOWER, TRIB, side], SITES, snap_tolerance=1.0)
        with pytest.raises(InputError, match="loop"):                 # duplicated line
            build_river_network([UPPER, LOWER, TRIB, LOWER], SITES, snap_tolerance=1.0)

    def test_closed_ring_is_refused(self):
        ring = shapely.LineString([(20, 0), (25, 0), (25, 5), (20, 0)])
        with pytest.raises(InputError, match=r"starts and ends at the same point \(20, 0\)"):
            build_river_network([UPPER, LOWER, TRIB, ring], SITES, snap_tolerance=1.0)

    def test_line_digitised_against_the_flow_is_named(self):
        upper_reversed = shapely.reverse(UPPER)
        with pytest.raises(InputError, match=r"2 lines leave the point \(0, 10\).*2 outlets "
                                             r"\(\(0, 20\), \(0, 0\)\).*against the flow"):
            build_river_network([upper_reversed, LOWER, TRIB], SITES, snap_tolerance=1.0)

    def test_declared_outlet_orients_every_line_towards_it(self):
        lines = [shapely.reverse(UPPER), LOWER, shapely.reverse(TRIB)]
        net = build_river_network(lines, SITES, snap_tolerance=1.0, direction="outlet",
                                  outlet=(0.0, 0.0))
        ref = y_network()
        key = ["upstream_node", "downstream_node"]
        a = net.edges.assign(ux=net.nodes.loc[net.edges["upstream_node"], "x"].values,
                             uy=net.nodes.loc[net.edges["upstream_node"], "y"].values)
        b = ref.edges.assign(ux=ref.nodes.loc[ref.edges["upstream_node"], "x"].values,
                             uy=ref.nodes.loc[ref.edges["upstream_node"], "y"].values)
        assert sorted(zip(a.ux, a.uy, a.length.round(9))) == \
            sorted(zip(b.ux, b.uy, b.length.round(9)))
        g = as_networkx(net)
        assert [v for v in g if g.out_degree(v) == 0] == list(net.outlets)
        first = shapely.get_coordinates(shapely.get_point(net.edges.geometry.values, 0))
        np.testing.assert_array_equal(first,
                                      net.nodes.loc[net.edges[key[0]], ["x", "y"]].to_numpy())

    def test_outlet_errors(self):
        with pytest.raises(InputError, match=r"outlet \(50, 50\) lies"):
            y_network(direction="outlet", outlet=(50.0, 50.0))
        with pytest.raises(InputError, match="same connected part"):
            y_network(direction="outlet", outlet=[(0.0, 0.0), (0.0, 20.0)])
        with pytest.raises(InputError, match="needs `outlet`"):
            y_network(direction="outlet")
        with pytest.raises(InputError, match="`outlet` applies"):
            y_network(outlet=(0.0, 0.0))

    def test_separate_catchments_on_request(self):
        other = shapely.LineString([(50, 20), (50, 0)])
        with pytest.raises(InputError, match="components='several'"):
            build_river_network([UPPER, LOWER, TRIB, other], SITES, snap_tolerance=1.0)
        net = build_river_network([UPPER, LOWER, TRIB, other], SITES, snap_tolerance=1.0,
                                  components="several")
        assert len(net.outlets) == 1 and any("without any site" in n for n in net.notes)
        sites = pd.concat([SITES, pd.DataFrame({"x": [50.2], "y": [5.0]},
                                               index=pd.Index(["s5"], name="site"))])
        two = build_river_network([UPPER, LOWER, TRIB, other], sites, snap_tolerance=1.0,
                                  components="several")
        assert len(two.outlets) == 2 and two.nodes["component"].nunique() == 2

    def test_multilines_are_exploded_and_other_geometries_refused(self):
        multi = shapely.MultiLineString([UPPER, LOWER])
        net = build_river_network([multi, TRIB], SITES, snap_tolerance=1.0)
        assert len(net.edges) == 7 and set(net.edges["feature"]) == {0, 1}
        with pytest.raises(InputError, match="feature 1 is a Polygon"):
            build_river_network([UPPER, shapely.box(0, 0, 1, 1)], SITES, snap_tolerance=1.0)

    def test_sites_on_one_spot_share_a_node(self):
        sites = pd.DataFrame({"x": [0.1, -0.1, 0.0], "y": [5.0, 5.0, 15.0]},
                             index=list("abc"))
        net = build_river_network([UPPER, LOWER, TRIB], sites, snap_tolerance=1.0)
        assert net.sites.loc["a", "node"] == net.sites.loc["b", "node"]
        assert any("share a network position" in n for n in net.notes)

    def test_bad_arguments_name_themselves(self):
        with pytest.raises(InputError, match="`direction`"):
            y_network(direction="downhill")
        with pytest.raises(InputError, match="`snap_tolerance`"):
            build_river_network([UPPER], SITES, snap_tolerance=-1)
        with pytest.raises(InputError, match="`sites`"):
            build_river_network([UPPER], SITES.to_numpy(), snap_tolerance=1)


# ---------------------------------------------------------------------------- files and CRS

UTM = pyproj.CRS(32631)
ORIGIN = np.array([500_000.0, 5_700_000.0])


UTM_SITES = pd.concat([SITES, pd.DataFrame({"x": [0.0], "y": [18.0]},
                                           index=pd.Index(["s5"], name="site"))])


def _utm_survey(tmp_path) -> Survey:
    xy = UTM_SITES.to_numpy() * 100 + ORIGIN         # 100 m units; a survey needs 5 sites
    frame = pd.DataFrame(xy, index=UTM_SITES.index, columns=["x", "y"])
    species = pd.DataFrame({"sp1": [1, 2, 3, 4, 5], "sp2": [4, 3, 2, 1, 1]},
                           index=UTM_SITES.index)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SpatialEVWarning)
        return Survey.from_frames(frame, species, crs=UTM, shared_coordinates="error")


def _utm_lines() -> list:
    return [shapely.transform(g, lambda c: c * 100 + ORIGIN) for g in (UPPER, LOWER, TRIB)]


class TestReadingFiles:
    @pytest.mark.parametrize("suffix,driver", [(".gpkg", "GPKG"), (".geojson", "GeoJSON"),
                                               (".shp", "ESRI Shapefile")])
    def test_formats_and_reprojection(self, tmp_path, suffix, driver):
        survey = _utm_survey(tmp_path)
        lines = gpd.GeoDataFrame({"name": ["upper", "lower", "trib"]}, geometry=_utm_lines(),
                                 crs=UTM).to_crs(4326)
        path = tmp_path / f"rivers{suffix}"
        lines.to_file(path, driver=driver, engine="pyogrio")
        net = read_river_network(path, survey, snap_tolerance=100.0)
        # oracle: the layer projected back to UTM by pyproj, distances by shapely
        back = gpd.read_file(path).to_crs(UTM).geometry.union_all()
        expected = shapely.distance(shapely.points(survey.coords.to_numpy()), back)
        np.testing.assert_allclose(net.sites["snap_distance"], expected, atol=1e-6)
        np.testing.assert_allclose(net.sites["snap_distance"], [50, 60, 20, 0, 0], atol=0.01)
        assert net.crs.equals(UTM) and net.distance_unit == "metre"
        assert len(net.edges) == 8 and net.edges.crs.equals(UTM)

    def test_layer_without_crs_needs_one(self, tmp_path):
        survey = _utm_survey(tmp_path)
        path = tmp_path / "rivers.geojson"
        gpd.GeoDataFrame(geometry=_utm_lines()).to_file(path, driver="GeoJSON",
                                                        engine="pyogrio")
        raw = json.loads(path.read_text())
        raw.pop("crs", None)
        path.write_text(json.dumps(raw))
        shp = tmp_path / "nocrs.shp"
        gpd.GeoDataFrame(geometry=_utm_lines()).to_file(shp, engine="pyogrio")
        with pytest.raises(CRSError, match="declares no CRS; pass crs="):
            read_river_network(shp, survey, snap_tolerance=100.0)
        net = read_river_network(shp, survey, snap_tolerance=100.0, crs=32631)
        assert net.n_sites == 5
        with pytest.raises(CRSError, match="but crs=.*was given"):
            read_river_network(path, survey, snap_tolerance=100.0, crs=3857)

    def test_local_survey_cannot_align_with_a_georeferenced_layer(self, tmp_path):
        path = tmp_path / "rivers.gpkg"
        gpd.GeoDataFrame(geometry=_utm_lines(), crs=UTM).to_file(path, engine="pyogrio")
        with pytest.raises(CRSError, match="local planar coordinates without a CRS"):
            read_river_network(path, SITES * 100 + ORIGIN, snap_tolerance=100.0)

    def test_geojson_in_local_metres_is_named_as_such(self, tmp_path):
        # RFC 7946 (Butler et al. 2016): GeoJSON positions are longitude/latitude (WGS 84), so
        # readers give every GeoJSON layer EPSG:4326, also lines drawn in local metres
        path = tmp_path / "ditches.geojson"
        lines = gpd.GeoSeries(_utm_lines()).translate(-ORIGIN[0], -ORIGIN[1])
        gpd.GeoDataFrame(geometry=lines).to_file(path, driver="GeoJSON", engine="pyogrio")
        assert gpd.read_file(path).crs.to_epsg() == 4326
        with pytest.raises(CRSError, match=r"coordinates are longitude/latitude by definition"
                                           r".*are not degrees.*GeoPackage or Shapefile"):
            read_river_network(path, SITES * 100, snap_tolerance=100.0)

    def test_missing_file_and_point_layer(self, tmp_path):
        with pytest.raises(InputError, match="network file"):
            read_river_network(tmp_path / "none.gpkg", SITES, snap_tolerance=1)
        path = tmp_path / "points.gpkg"
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)      # pyogrio: no CRS written
            gpd.GeoDataFrame(geometry=shapely.points([[0, 0], [1, 1]])).to_file(
                path, engine="pyogrio")
        with pytest.raises(InputError, match="is a Point"):
            read_river_network(path, SITES, snap_tolerance=1)


class TestShippedRiver:
    def test_demo_network_reads_cleanly(self, repo_root):
        folder = repo_root / "data_demo" / "river"
        truth = json.loads((folder / "truth.json").read_text())
        with warnings.catch_warnings():
            warnings.simplefilter("error", SpatialEVWarning)
            survey = read_survey(folder / "sites.gpkg", folder / "species.csv",
                                 folder / "environment.csv")
            net = read_river_network(folder / "network.gpkg", survey,
                                     snap_tolerance=truth["snap_tolerance_m"])
        g = as_networkx(net)
        assert nx.is_tree(g.to_undirected()) and len(net.outlets) == 1
        assert net.nodes.loc[net.outlets[0], ["x", "y"]].tolist() == truth["outlet_utm_m"]
        kinds = net.nodes["kind"].value_counts()
        assert kinds["source"] == 4 and kinds["confluence"] == 3
        assert net.sites["snap_distance"].max() <= 12 * np.sqrt(2)    # GPS error clip
        lines = gpd.read_file(folder / "network.gpkg")
        assert net.total_length == pytest.approx(float(lines.length.sum()), rel=1e-9)
        summary = net.summary()
        assert summary["n_sites"] == 120 and summary["direction"] == "digitised"
        assert "120" in net.describe()


def test_site_at_a_confluence_made_from_a_line_interior_takes_that_node():
    main = shapely.LineString([(0, 20), (0, 0)])
    sites = pd.DataFrame({"x": [0.0, 0.0, 5.0], "y": [10.0, 4.0, 15.0]}, index=list("abc"))
    net = build_river_network([main, TRIB], sites, snap_tolerance=1.0, node_tolerance=1e-6)
    node = net.sites.loc["a", "node"]
    assert net.nodes.loc[node, ["x", "y"]].tolist() == [0.0, 10.0]
    assert net.nodes.loc[node, "kind"] == "confluence"
    assert (net.edges["length"] > 0).all() and len(net.edges) == 5


def test_lines_in_degrees_are_refused_by_the_in_memory_builder():
    lines = gpd.GeoSeries([UPPER, LOWER, TRIB], crs=4326)
    with pytest.raises(CRSError, match="geographic CRS EPSG:4326"):
        build_river_network(lines, SITES, snap_tolerance=1.0)
