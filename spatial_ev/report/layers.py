"""Write map layers (GeoPackage) and tables (CSV) into an output folder."""

from __future__ import annotations

import os
from collections.abc import Mapping
from pathlib import Path

import geopandas as gpd
import pandas as pd

__all__ = ["write_layers", "write_table"]


def write_layers(path: str | os.PathLike, layers: Mapping[str, gpd.GeoDataFrame]) -> Path:
    """Write several GeoDataFrames as named layers of one GeoPackage.

    Layer names must be plain identifiers; the site index is written as a column named after
    the index (``site`` when unnamed) so that it survives the round trip.

    Examples
    --------
    >>> import tempfile, pathlib, geopandas as gpd, shapely
    >>> gdf = gpd.GeoDataFrame({"v": [1.0]}, geometry=[shapely.Point(0, 0)], crs=3857)
    >>> out = write_layers(pathlib.Path(tempfile.mkdtemp()) / "m.gpkg", {"demo": gdf})
    >>> sorted(gpd.list_layers(out)["name"])
    ['demo']
    """
    path = Path(path)
    if not layers:
        raise ValueError("write_layers needs at least one layer")
    for name, gdf in layers.items():
        if not name.replace("_", "").isalnum():
            raise ValueError(f"layer name {name!r} must contain only letters, digits and '_'")
        frame = gdf.copy()
        frame.index = frame.index.rename(frame.index.name or "site")
        frame = frame.reset_index()
        frame.to_file(path, layer=name, driver="GPKG", engine="pyogrio")
    return path


def write_table(path: str | os.PathLike, table: pd.DataFrame, *, index: bool = True,
                float_digits: int = 10) -> Path:
    """Write a table as UTF-8 CSV with a fixed number of significant digits.

    Examples
    --------
    >>> import tempfile, pathlib, pandas as pd
    >>> out = write_table(pathlib.Path(tempfile.mkdtemp()) / "t.csv", pd.DataFrame({"a": [1/3]}))
    >>> out.read_text().splitlines()[1]
    '0,0.3333333333'
    """
    path = Path(path)
    table.to_csv(path, index=index, float_format=f"%.{float_digits}g", encoding="utf-8")
    return path
