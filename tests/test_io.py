"""Tests of spatial_ev.input.io: CSV quirks, GIS layers and numeric parsing."""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import shapely

from spatial_ev import errors
from spatial_ev.input.io import file_format, numeric_hint, parse_numeric, read_csv_table, read_vector


class TestFileFormat:
    def test_kinds(self, tmp_path):
        for name, kind in [("a.csv", "csv"), ("a.TSV", "csv"), ("a.gpkg", "gis"),
                           ("a.geojson", "gis"), ("a.shp", "gis")]:
            (tmp_path / name).write_text("x")
            assert file_format(tmp_path / name, role="sites") == kind

    def test_missing_folder_unknown(self, tmp_path):
        with pytest.raises(errors.InputError, match=r"sites file .*b\.csv' does not exist"):
            file_format(tmp_path / "b.csv", role="sites")
        with pytest.raises(errors.InputError, match="is a folder"):
            file_format(tmp_path, role="sites")
        (tmp_path / "a.dat").write_text("x")
        with pytest.raises(errors.InputError, match=r"unknown format '\.dat'; supported: "):
            file_format(tmp_path / "a.dat", role="species")


class TestReadCsvTable:
    def _read(self, tmp_path, content, **kw):
        path = tmp_path / "t.csv"
        (path.write_bytes if isinstance(content, bytes) else path.write_text)(content)
        return read_csv_table(path, role="species", **kw)

    def test_header_stripped_numbers_parsed_ids_text(self, tmp_path):
        t = self._read(tmp_path, 'site, A ,B,C\n 01 ," 3 ",4,NA\ns2,5,6,x\n')
        assert list(t.columns) == ["site", "A", "B", "C"]
        assert t["A"].tolist() == [3.0, 5.0] and t["site"].tolist() == [" 01 ", "s2"]
        assert pd.isna(t["C"].iloc[0]) and t["C"].iloc[1] == "x"

    def test_utf8_bom_and_utf16(self, tmp_path):
        assert list(self._read(tmp_path, "\ufeffsite,A\ns1,1\n").columns) == ["site", "A"]
        t = self._read(tmp_path, "site,Å\ns1,1\n".encode("utf-16"))
        assert list(t.columns) == ["site", "Å"]

    def test_not_utf8(self, tmp_path):
        with pytest.raises(errors.InputError, match=r"not UTF-8 text \(byte 0xe9 on line 2\)"):
            self._read(tmp_path, "site,A\ncaf\xe9,1\n".encode("latin-1"))

    def test_declared_encoding(self, tmp_path):
        t = self._read(tmp_path, "site,A\ncaf\xe9,1\n".encode("cp1252"), encoding="cp1252")
        assert t["site"].tolist() == ["caf\xe9"]
        with pytest.raises(errors.InputError, match="`encoding` 'klingon' is not a known"):
            self._read(tmp_path, "site,A\n", encoding="klingon")

    def test_empty_and_header_only(self, tmp_path):
        with pytest.raises(errors.InputError, match="is empty"):
            self._read(tmp_path, "\n  \n")
        with pytest.raises(errors.InputError, match="has a header but no data rows"):
            self._read(tmp_path, "site,A,B\n")

    def test_row_names_export_gets_site_column(self, tmp_path):
        assert list(self._read(tmp_path, ",A\ns1,1\n").columns) == ["site", "A"]

    def test_row_counter_beside_named_site_column_dropped(self, tmp_path):
        for first in (0, 1):  # pandas index (0, 1, ...) or R row names ("1", "2", ...)
            t = self._read(tmp_path, f',site,A\n"{first}",s1,1\n"{first + 1}",s2,2\n')
            assert list(t.columns) == ["site", "A"] and t["site"].tolist() == ["s1", "s2"]
        t = self._read(tmp_path, ",core,A\n0,s1,1\n1,s2,2\n", id_column="core")
        assert list(t.columns) == ["core", "A"]
        with pytest.raises(errors.InputError, match=r"first column has no name and holds 'p', "
                                                    r"'q', \.\.\. while the site ids are in "
                                                    r"column 'site'"):
            self._read(tmp_path, ",site,A\np,s1,1\nq,s2,2\n")

    def test_blank_lines_above_header(self, tmp_path):
        frame = self._read(tmp_path, "\n  \nsite,A\ns1,1\n\ns2,2\n")
        assert frame["A"].tolist() == [1, 2] and frame.attrs["lines"].tolist() == [4, 6]

    def test_title_line_above_header(self, tmp_path):
        with pytest.raises(errors.InputError, match="more fields than the header line"):
            self._read(tmp_path, "# field tablet export\nsite,A\ns1,1\n")

    def test_encoding_option_only_for_files_that_are_not_utf8(self, tmp_path):
        t = self._read(tmp_path, "site,A\ncafé,1\n".encode("utf-8"), encoding="latin-1")
        assert t["site"].tolist() == ["café"]
        t = self._read(tmp_path, "site,Å\ns1,1\n".encode("utf-16"), encoding="latin-1")
        assert list(t.columns) == ["site", "Å"]
        with pytest.raises(errors.InputError, match=r"neither UTF-8 nor valid ascii text "
                                                    r"\(byte 0xe9 on line 2\)"):
            self._read(tmp_path, "site,A\ncaf\xe9,1\n".encode("latin-1"), encoding="ascii")

    def test_utf16_without_byte_order_mark(self, tmp_path):
        raw = "site,A\ns1,1\n".encode("utf-16-le")
        with pytest.raises(errors.InputError, match=r"NUL characters \(line 1\).*"
                                                    r"--encoding utf-16-le"):
            self._read(tmp_path, raw)
        assert self._read(tmp_path, raw, encoding="utf-16-le")["A"].tolist() == [1]

    def test_unnamed_and_duplicated_columns(self, tmp_path):
        with pytest.raises(errors.InputError, match=r"column\(s\) \[3\] have no name"):
            self._read(tmp_path, "site,A,,B\ns1,1,2,3\n")
        with pytest.raises(errors.InputError, match=r"column name\(s\) \['A'\] appear more "
                                                    r"than once"):
            self._read(tmp_path, "site,A,B,A\ns1,1,2,3\n")

    def test_ragged_rows(self, tmp_path):
        with pytest.raises(errors.InputError, match=r"cannot be read as CSV with delimiter ','"):
            self._read(tmp_path, "site,A\ns1,1\ns2,1,5,6\n")

    def test_delimiter_suggestion(self, tmp_path):
        with pytest.raises(errors.InputError, match=r"pass delimiter='\\t' \(command line: "
                                                    r"--delimiter 'tab'\), or leave the "):
            self._read(tmp_path, "site\tA\ns1\t1\n", delimiter=",")

    def test_delimiter_detected_per_file(self, tmp_path):
        assert self._read(tmp_path, "site\tA\ns1\t1\n")["A"].tolist() == [1]
        assert self._read(tmp_path, "site;A\ns1;1,5\n", decimal=",")["A"].tolist() == [1.5]
        # decimal=',' does not apply to a comma-delimited file (no unquoted decimal commas)
        assert self._read(tmp_path, "site,A\ns1,1.5\n", decimal=",")["A"].tolist() == [1.5]

    def test_spreadsheet_padding_dropped_with_line_numbers(self, tmp_path):
        frame = self._read(tmp_path, "site,A,,\ns1,1,,\n,,,\ns2,2,,\n,,,\n")
        assert list(frame.columns) == ["site", "A"] and frame["A"].tolist() == [1, 2]
        assert frame.attrs["lines"].tolist() == [2, 4]

    def test_bad_options(self, tmp_path):
        with pytest.raises(errors.InputError, match="both ','"):
            self._read(tmp_path, "site;A\ns1;1,5\n", decimal=",", delimiter=",")
        with pytest.raises(errors.InputError, match="one character"):
            self._read(tmp_path, "site;A\n", delimiter=";;")


class TestParseNumeric:
    def test_values(self):
        nums, missing, bad = parse_numeric(pd.Series(["1", " 2.5", "1e3", "NA", "", "x", "inf"]))
        np.testing.assert_array_equal(nums[[0, 1, 2, 6]], [1.0, 2.5, 1000.0, np.inf])
        assert missing.tolist() == [False, False, False, True, True, False, False]
        assert bad.tolist() == [False, False, False, False, False, True, False]

    def test_decimal_comma(self):
        nums, missing, bad = parse_numeric(pd.Series(["1,5", "2", "1.5"]), decimal=",")
        assert nums[0] == 1.5 and nums[1] == 2.0 and bad.tolist() == [False, False, True]

    def test_hints(self):
        assert "thousands separators" in numeric_hint(["1,234.5"], ".")
        assert "thousands separators" in numeric_hint(["12'345"], ".")
        assert "degrees, minutes and seconds" in numeric_hint(["59°54'30\"N"], ".")
        assert numeric_hint(["abc"], ".") == ""
        nums, missing, bad = parse_numeric(pd.Series(["-", "3"]))
        assert missing.tolist() == [True, False] and not bad.any()

    def test_numeric_dtype_passes_through(self):
        nums, missing, bad = parse_numeric(pd.Series([1.0, np.nan]))
        assert missing.tolist() == [False, True] and not bad.any()


class TestReadVector:
    def test_layers(self, tmp_path):
        gdf = gpd.GeoDataFrame({"site": ["a"]}, geometry=[shapely.Point(0, 0)], crs=32630)
        path = tmp_path / "m.gpkg"
        gdf.to_file(path, layer="cores")
        gdf.to_file(path, layer="transect")
        with pytest.raises(errors.InputError, match=r"has 2 layers \(cores, transect\); choose "
                                                    r"one with layer="):
            read_vector(path, role="sites")
        with pytest.raises(errors.InputError, match="has no layer 'plots'"):
            read_vector(path, role="sites", layer="plots")
        assert read_vector(path, role="sites", layer="transect").crs.to_epsg() == 32630

    def test_corrupt_file(self, tmp_path):
        path = tmp_path / "bad.gpkg"
        path.write_bytes(b"this is not a geopackage")
        with pytest.raises(errors.InputError, match=r"sites file .*bad\.gpkg' cannot be read as "
                                                    r"a GIS file"):
            read_vector(path, role="sites")
