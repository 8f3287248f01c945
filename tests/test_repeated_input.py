"""Reading and validating repeated surveys (long form and one table per survey), and the
invented three-year mudflat resurvey."""

from __future__ import annotations

import json
import warnings

import numpy as np
import pandas as pd
import pyogrio
import pytest

from spatial_ev.datasets.resurvey import generate_resurvey, write_resurvey
from spatial_ev.errors import DroppedSitesWarning, InputError, SpatialEVWarning
from spatial_ev.input.repeated import RepeatedSurvey, read_repeated_survey


@pytest.fixture()
def files(tmp_path):
    rng = np.random.default_rng(11)
    ids = [f"q{i}" for i in range(8)]
    sites = pd.DataFrame({"site": ids, "x": rng.uniform(0, 500, 8) + 1000,
                          "y": rng.uniform(0, 500, 8) + 1000})
    rows = []
    for year in (2020, 2021, 2023):
        for s in ids:
            rows.append({"site": s, "year": year, "sp_a": int(rng.integers(1, 9)),
                         "sp_b": int(rng.integers(0, 5)), "sp_c": 0})
    long = pd.DataFrame(rows)
    paths = {"sites": tmp_path / "sites.csv", "species": tmp_path / "species.csv"}
    sites.to_csv(paths["sites"], index=False)
    long.to_csv(paths["species"], index=False)
    return paths, sites, long


def read(paths, **kw):
    return read_repeated_survey(paths["sites"], paths["species"], local_unit="metre", **kw)


class TestLongForm:
    def test_reads_and_orders(self, files):
        paths, _, _ = files
        with pytest.warns(SpatialEVWarning, match="sp_c"):
            r = read(paths)
        assert r.surveys == ["2020", "2021", "2023"]
        assert r.times.tolist() == [2020.0, 2021.0, 2023.0]      # irregular spacing kept
        assert r.n_sites == 8 and r.n_species == 2 and r.dropped["species"] == ["sp_c"]
        assert r.species.index.names == ["survey", "site"]
        assert r.survey_table("2021").index.tolist() == [f"q{i}" for i in range(8)]

    def test_missing_site_is_an_error_listing_it(self, files):
        paths, _, long = files
        long.drop(index=long.index[(long.site == "q3") & (long.year == 2021)]).to_csv(
            paths["species"], index=False)
        with pytest.raises(InputError, match=r"'q3' \(missing from species survey\(s\) 2021\)"):
            read(paths)

    @pytest.mark.filterwarnings("ignore::spatial_ev.errors.DroppedSpeciesWarning")
    def test_keep_complete_drops_with_warning(self, files):
        paths, _, long = files
        long.drop(index=long.index[(long.site == "q3") & (long.year == 2021)]).to_csv(
            paths["species"], index=False)
        with pytest.warns(DroppedSitesWarning, match="q3"):
            r = read(paths, incomplete_sites="keep_complete")
        assert "q3" not in r.site_ids and r.n_sites == 7 and r.dropped["sites"] == ["q3"]

    def test_duplicated_site_time_row_names_lines(self, files):
        paths, _, long = files
        pd.concat([long, long.iloc[[2]]]).to_csv(paths["species"], index=False)
        with pytest.raises(InputError, match=r"site 'q2' appears more than once in survey "
                                             r"2020 \(line 4, line 26\)"):
            read(paths)

    def test_one_survey_only(self, files):
        paths, _, long = files
        long[long.year == 2020].to_csv(paths["species"], index=False)
        with pytest.raises(InputError, match="at least 2 surveys"):
            read(paths)

    def test_time_that_is_not_a_time(self, files):
        paths, _, long = files
        long = long.astype({"year": object})
        long.loc[5, "year"] = "spring"
        long.to_csv(paths["species"], index=False)
        with pytest.raises(InputError, match=r"'spring' at line 7 \(site 'q5'\), which is "
                                             r"neither a number nor a date"):
            read(paths)

    def test_dates_become_days(self, files):
        paths, _, long = files
        long = long.assign(date=long.year.map({2020: "2020-05-01", 2021: "2020-06-10",
                                               2023: "2021-05-01"})).drop(columns="year")
        long.to_csv(paths["species"], index=False)
        with pytest.warns(SpatialEVWarning):
            r = read(paths)
        assert r.time_unit == "day" and r.times.tolist() == [0.0, 40.0, 365.0]
        assert r.surveys == ["2020-05-01", "2020-06-10", "2021-05-01"]

    def test_unknown_site_and_missing_time_column(self, files):
        paths, _, long = files
        bad = long.copy()
        bad.loc[0, "site"] = "zz"
        bad.to_csv(paths["species"], index=False)
        with pytest.raises(InputError, match="'zz'"):
            read(paths)
        long.rename(columns={"year": "when"}).to_csv(paths["species"], index=False)
        with pytest.raises(InputError, match="no time column found"):
            read(paths)
        with pytest.warns(SpatialEVWarning):
            assert read(paths, time_column="when").n_surveys == 3

    @pytest.mark.filterwarnings("ignore::spatial_ev.errors.DroppedSpeciesWarning")
    def test_empty_site_survey_and_bad_value(self, files):
        paths, _, long = files
        bad = long.copy()
        bad.loc[9, ["sp_a", "sp_b"]] = 0
        bad.to_csv(paths["species"], index=False)
        with pytest.raises(InputError, match=r"'q1' in survey 2021"):
            read(paths)
        bad = long.astype({"sp_b": object})
        bad.loc[3, "sp_b"] = "x"
        bad.to_csv(paths["species"], index=False)
        with pytest.raises(InputError, match=r"column 'sp_b' line 5 \(site 'q3 in survey "
                                             r"2020'\) holds 'x'"):
            read(paths)

    def test_environment_long_form(self, files, tmp_path):
        paths, _, long = files
        env = long[["site", "year"]].assign(temp=np.linspace(10, 20, len(long)),
                                            bed=np.where(np.arange(len(long)) % 2, "mud", "sand"))
        env.to_csv(tmp_path / "env.csv", index=False)
        with pytest.warns(SpatialEVWarning):
            r = read_repeated_survey(paths["sites"], paths["species"], tmp_path / "env.csv",
                                     local_unit="metre")
        assert list(r.environment.columns) == ["temp", "bed[sand]"]
        assert r.environment.index.equals(r.species.index)


class TestPerSurveyTables:
    def test_list_with_times(self, files, tmp_path):
        paths, _, long = files
        tables = []
        for year in (2020, 2021, 2023):
            p = tmp_path / f"sp{year}.csv"
            long[long.year == year].drop(columns="year").to_csv(p, index=False)
            tables.append(p)
        with pytest.warns(SpatialEVWarning):
            r = read_repeated_survey(paths["sites"], tables, times=[2020, 2021, 2023],
                                     local_unit="metre")
        with pytest.warns(SpatialEVWarning):
            ref = read(paths)
        pd.testing.assert_frame_equal(r.species, ref.species)
        with pytest.raises(InputError, match="one time per species table"):
            read_repeated_survey(paths["sites"], tables, times=[2020, 2021],
                                 local_unit="metre")

    def test_different_species_columns(self, files, tmp_path):
        paths, _, long = files
        a, b = tmp_path / "a.csv", tmp_path / "b.csv"
        long[long.year == 2020].drop(columns="year").to_csv(a, index=False)
        long[long.year == 2021].drop(columns=["year", "sp_c"]).to_csv(b, index=False)
        with pytest.raises(InputError, match="only in the first 'sp_c'"):
            read_repeated_survey(paths["sites"], [a, b], times=[1, 2], local_unit="metre")


class TestResurveyDemo:
    def test_committed_files_equal_generator(self, repo_root, tmp_path):
        written = write_resurvey(tmp_path)
        committed = repo_root / "data_demo" / "resurvey"
        assert (committed / "species.csv").read_bytes() == written["species"].read_bytes()
        assert json.loads((committed / "truth.json").read_text()) == \
            json.loads(written["truth"].read_text())
        a = pyogrio.read_dataframe(committed / "sites.gpkg")
        b = pyogrio.read_dataframe(written["sites"])
        pd.testing.assert_frame_equal(a.drop(columns="geometry"), b.drop(columns="geometry"))
        assert a.geometry.geom_equals_exact(b.geometry, tolerance=0).all() and a.crs == b.crs

    def test_files_read_cleanly(self, repo_root):
        folder = repo_root / "data_demo" / "resurvey"
        with warnings.catch_warnings():
            warnings.simplefilter("error", SpatialEVWarning)
            r = read_repeated_survey(folder / "sites.gpkg", folder / "species.csv")
        assert (r.n_sites, r.n_surveys, r.n_species) == (220, 3, 40)
        assert r.base.distance_unit == "metre"

    def test_model_as_documented(self):
        g = generate_resurvey()
        t = g.truth
        assert len(t["declining_sites"]) == 16 and len(t["declining_taxa"]) == 38
        counts = g.species.set_index(["year", "site_id"])
        cluster = counts.xs(2024, level=0).loc[t["declining_sites"], t["declining_taxa"]]
        before = counts.xs(2023, level=0).loc[t["declining_sites"], t["declining_taxa"]]
        assert cluster.to_numpy().sum() < 0.02 * before.to_numpy().sum()
        still = generate_resurvey(moving=False, decline=False)
        assert still.truth["declining_sites"] == [] and not still.truth["moving_structure"]
        again = generate_resurvey(moving=False, decline=False, replicate=3)
        assert not again.species.equals(still.species)

    def test_from_frames_equals_files(self, repo_root):
        g = generate_resurvey()
        r = RepeatedSurvey.from_frames(g.sites, g.species)
        folder = repo_root / "data_demo" / "resurvey"
        f = read_repeated_survey(folder / "sites.gpkg", folder / "species.csv")
        np.testing.assert_array_equal(r.species.to_numpy(), f.species.to_numpy())


def test_bad_value_in_a_per_survey_table_names_its_file_and_line(files, tmp_path):
    paths, _, long = files
    tables = []
    for year in (2020, 2021):
        p = tmp_path / f"sp{year}.csv"
        part = long[long.year == year].drop(columns="year").astype({"sp_b": object})
        if year == 2021:
            part.iloc[2, part.columns.get_loc("sp_b")] = "n/a?"
        part.to_csv(p, index=False)
        tables.append(p)
    with pytest.raises(InputError, match=r"sp2021\.csv' \(survey 2021\): column 'sp_b' line 4 "
                                         r"\(site 'q2 in survey 2021'\) holds 'n/a\?'"):
        read_repeated_survey(paths["sites"], tables, times=[2020, 2021], local_unit="metre")
