"""Write the GIS files of the bad-input corpus (binary or verbose formats, so generated).

The plain-text cases (CSV, TSV, odd encodings) are committed as files in this folder; the
GeoPackage, GeoJSON and Shapefile cases are written by :func:`write_gis_cases` into a folder
(the tests call it once per session on a copy of this folder). Every file is built from
``good/sites.csv`` (12 invented sites on a jittered 100 m grid, UTM zone 33N) so ids match
``good/species.csv`` and ``good/environment.csv``.

Run by hand to look at the files: ``python tests/data/bad/make_corpus.py OUT_FOLDER``.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
UTM = "EPSG:32633"


def _good_sites():
    import pandas as pd

    return pd.read_csv(HERE / "good" / "sites.csv", dtype={"site": str})


def _points(frame, crs=UTM, z=None):
    import geopandas as gpd

    return gpd.GeoDataFrame({"site": frame["site"]}, crs=crs,
                            geometry=gpd.points_from_xy(frame["easting"], frame["northing"], z))


def _squares(frame, half=20.0, hole=None):
    """Square plots around each site, optionally with a square hole of half-width ``hole``."""
    import geopandas as gpd
    import shapely

    polys = []
    for x, y in zip(frame["easting"], frame["northing"]):
        shell = [(x - half, y - half), (x + half, y - half), (x + half, y + half),
                 (x - half, y + half)]
        holes = [] if hole is None else [[(x - hole, y - hole), (x - hole, y + hole),
                                          (x + hole, y + hole), (x + hole, y - hole)]]
        polys.append(shapely.Polygon(shell, holes))
    return gpd.GeoDataFrame({"site": frame["site"]}, geometry=polys, crs=UTM)


def _feature_collection(features, crs_member=None) -> str:
    doc = {"type": "FeatureCollection", "features": features}
    if crs_member is not None:
        doc["crs"] = {"type": "name", "properties": {"name": crs_member}}
    return json.dumps(doc, indent=1)


def _point_features(frame, *, lonlat=False, geometry_of=None):
    feats = []
    for k, row in enumerate(frame.itertuples()):
        if lonlat:  # a small area near 59.9 N, 10.7 E (invented)
            coords = [10.70 + (row.easting - 500000) / 55_800, 59.90 + (row.northing - 6650000)
                      / 111_200]
        else:
            coords = [row.easting, row.northing]
        geom = {"type": "Point", "coordinates": coords}
        if geometry_of is not None:
            geom = geometry_of(k, coords, geom)
        feats.append({"type": "Feature", "properties": {"site": row.site}, "geometry": geom})
    return feats


def write_gis_cases(folder: str | Path) -> list[str]:
    """Write every GIS case file into ``folder``; return their names."""
    import geopandas as gpd
    import pandas as pd
    import shapely

    out = Path(folder)
    out.mkdir(parents=True, exist_ok=True)
    frame = _good_sites()
    written = []

    def keep(name):
        written.append(name)
        return out / name

    # valid: square plots with a square hole (e.g. a plot around an unsampled channel)
    _squares(frame, hole=8.0).to_file(keep("sites_polygons_holes.gpkg"), layer="plots")
    # valid: points with elevation (GPS exports)
    _points(frame, z=frame["easting"] * 0 + 2.5).to_file(keep("sites_pointz.gpkg"))
    # two layers in one GeoPackage
    _points(frame).to_file(keep("sites_two_layers.gpkg"), layer="cores")
    _squares(frame).to_file(out / "sites_two_layers.gpkg", layer="plots", mode="a")
    # Shapefile without its .prj
    _points(frame).to_file(keep("sites_no_prj.shp"))
    (out / "sites_no_prj.prj").unlink()
    # a projected GeoPackage, to combine with a conflicting --crs or a foreign-CRS table
    _points(frame).to_file(keep("sites_utm.gpkg"))
    # longitude/latitude written into a file that declares UTM (a wrongly assigned CRS)
    keep("sites_degrees_labelled_utm.geojson")
    (out / "sites_degrees_labelled_utm.geojson").write_text(_feature_collection(
        _point_features(frame, lonlat=True), crs_member="urn:ogc:def:crs:EPSG::32633"))
    # web Mercator at 60 N: map distances twice the ground distances
    _points(frame).to_crs("EPSG:3857").to_file(keep("sites_web_mercator.gpkg"))
    # species as a GeoJSON attribute table in another CRS (WGS 84)
    species = pd.read_csv(HERE / "good" / "species.csv", dtype={"site": str})
    lonlat = _point_features(frame, lonlat=True)
    for feat, (_, row) in zip(lonlat, species.iterrows()):
        feat["properties"] = {k: (v if k == "site" else int(v)) for k, v in row.items()}
    keep("species_wgs84.geojson")
    (out / "species_wgs84.geojson").write_text(_feature_collection(lonlat))
    # GeoJSON with the obsolete `crs` member (projected coordinates, named CRS)
    keep("sites_crs_member.geojson")
    (out / "sites_crs_member.geojson").write_text(_feature_collection(
        _point_features(frame), crs_member="urn:ogc:def:crs:EPSG::32633"))
    # self-intersecting ("bow-tie") polygon at site S04
    bowtie = _squares(frame)
    x, y = frame.loc[3, "easting"], frame.loc[3, "northing"]
    bowtie.loc[3, "geometry"] = shapely.Polygon([(x - 20, y - 20), (x + 20, y + 20),
                                                 (x + 20, y - 20), (x - 20, y + 20)])
    bowtie.to_file(keep("sites_bowtie.gpkg"))
    # null geometry (S06) and empty geometry (S09)
    null = _point_features(frame)
    null[5]["geometry"] = None
    keep("sites_null_geometry.geojson")
    (out / "sites_null_geometry.geojson").write_text(_feature_collection(null))
    empty = _points(frame)
    empty.loc[8, "geometry"] = shapely.Point()
    empty.to_file(keep("sites_empty_geometry.gpkg"))
    # points and polygons mixed; a line; a two-part multipoint
    mixed = _point_features(frame, geometry_of=lambda k, c, g: g if k != 2 else {
        "type": "Polygon", "coordinates": [[[c[0] - 5, c[1] - 5], [c[0] + 5, c[1] - 5],
                                            [c[0] + 5, c[1] + 5], [c[0] - 5, c[1] - 5]]]})
    keep("sites_mixed_types.geojson")
    (out / "sites_mixed_types.geojson").write_text(_feature_collection(mixed, UTM))
    lines = _point_features(frame, geometry_of=lambda k, c, g: g if k != 7 else {
        "type": "LineString", "coordinates": [c, [c[0] + 30, c[1]]]})
    keep("sites_line.geojson")
    (out / "sites_line.geojson").write_text(_feature_collection(lines, UTM))
    multi = _point_features(frame, geometry_of=lambda k, c, g: g if k != 1 else {
        "type": "MultiPoint", "coordinates": [c, [c[0] + 3, c[1] + 3]]})
    keep("sites_multipoint.geojson")
    (out / "sites_multipoint.geojson").write_text(_feature_collection(multi, UTM))
    # features without any attribute (no id field)
    bare = _point_features(frame)
    for feat in bare:
        feat["properties"] = {}
    keep("sites_no_attributes.geojson")
    (out / "sites_no_attributes.geojson").write_text(_feature_collection(bare, UTM))
    # species as an attribute-only GeoPackage table (no geometry column); the same as sites
    import pyogrio

    pyogrio.write_dataframe(species, keep("species_attributes.gpkg"), layer="counts")
    pyogrio.write_dataframe(species, keep("sites_attributes_only.gpkg"), layer="counts")
    # a download cut short
    keep("sites_truncated.geojson")
    (out / "sites_truncated.geojson").write_text(_feature_collection(_point_features(frame))[:300])
    # empty layer
    gpd.GeoDataFrame({"site": pd.Series([], dtype=str)}, geometry=[], crs=UTM).to_file(
        keep("sites_empty_layer.gpkg"))
    return written


if __name__ == "__main__":  # pragma: no cover - manual use
    target = Path(sys.argv[1] if len(sys.argv) > 1 else "bad-gis")
    print("\n".join(write_gis_cases(target)))
