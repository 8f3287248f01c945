"""Tests of ``spatial-ev check``: description of valid input, one-line errors, nothing written."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from spatial_ev.cli.main import main


@pytest.fixture
def workdir(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    return tmp_path


def _listing(folder: Path) -> set:
    return {p.relative_to(folder) for p in folder.rglob("*")}


def _demo_args(repo_root):
    d = repo_root / "data_demo"
    return ["--sites", str(d / "sites.gpkg"), "--species", str(d / "species.csv"),
            "--environment", str(d / "environment.csv")]


def _small_survey(folder: Path, n: int = 12, seed: int = 640_118_352):
    rng = np.random.default_rng(seed)
    ids = [f"P{i}" for i in range(n)]
    pd.DataFrame({"plot": ids, "x": rng.uniform(0, 1000, n).round(1),
                  "y": rng.uniform(0, 1000, n).round(1)}).to_csv(folder / "sites.csv",
                                                                  index=False)
    pd.DataFrame(rng.poisson(3, (n, 3)) + 1, index=pd.Index(ids, name="plot"),
                 columns=["BTX01", "BTX02", "BTX03"]).to_csv(folder / "species.csv")
    pd.DataFrame({"depth": rng.uniform(0, 2, n).round(2), "substrate": (["mud", "sand"] * n)[:n]},
                 index=pd.Index(ids, name="plot")).to_csv(folder / "env.csv")
    return folder / "sites.csv", folder / "species.csv", folder / "env.csv"


class TestCheckCommand:
    def test_demo_description(self, workdir, repo_root, capsys):
        before = _listing(workdir)
        assert main(["check", *_demo_args(repo_root)]) == 0
        out = capsys.readouterr().out
        assert "sites: 220 (point), ids from column 'site_id'" in out
        assert "species: 40 ('BTX01'" in out
        assert "categorical 'sediment_class': indicators sediment_class[muddy sand], " \
               "sediment_class[sand] (reference level 'mud')" in out
        assert "working CRS EPSG:32630 (WGS 84 / UTM zone 30N); distances in metre" in out
        # the demo's spacing 15.0032 / 37.1131 / 42.1043 m, to three significant figures
        assert "nearest-neighbour spacing (metre): min 15, median 37.1, max 42.1" in out
        # 5 numeric columns and a 3-level category coded as 2 indicator columns
        assert "environment: 6 column(s) (7 after coding categorical levels)" in out
        assert "dropped: nothing" in out and "nothing was written" in out
        assert _listing(workdir) == before

    def test_reports_what_would_be_dropped(self, workdir, capsys):
        sites, species, env = _small_survey(workdir)
        pd.read_csv(species).assign(BTX09=0).to_csv(species, index=False)
        pd.read_csv(env).assign(season="spring").to_csv(env, index=False)
        before = _listing(workdir)
        status = main(["check", "--sites", str(sites), "--species", str(species),
                       "--environment", str(env), "--local-unit", "metre"])
        captured = capsys.readouterr()
        assert status == 0
        assert "species (never present (all zero)): 'BTX09'" in captured.out
        assert "variables (constant across sites): 'season'" in captured.out
        assert "warning (DroppedSpeciesWarning)" in captured.err
        assert _listing(workdir) == before

    def test_options_reach_the_reader(self, workdir, capsys):
        sites, species, env = _small_survey(workdir)
        for path in (sites, env):  # the delimiter and decimal mark apply to every CSV
            pd.read_csv(path).to_csv(path, sep="\t", decimal=",", index=False)
        status = main(["check", "--sites", str(sites), "--environment", str(env),
                       "--delimiter", "tab", "--decimal", ",", "--local-unit", "m",
                       "--site-id", "plot"])
        assert status == 0
        assert "numeric: depth" in capsys.readouterr().out

    @pytest.mark.parametrize("mutate,args,match", [
        (lambda f: None, ["--species", "missing.csv"], "species file 'missing.csv' does not "
                                                       "exist"),
        (lambda f: None, [], "CSV coordinates need a reference system"),
        (lambda f: pd.read_csv(f[1]).assign(BTX02="x").to_csv(f[1], index=False),
         ["--local-unit", "m"], "column 'BTX02' line 2 (site 'P0') holds 'x'"),
        (lambda f: pd.read_csv(f[1]).iloc[:-1].to_csv(f[1], index=False),
         ["--local-unit", "m"], "are missing from it: 'P11'"),
        (lambda f: None, ["--crs", "EPSG:0"], "is not a coordinate reference system"),
    ])
    def test_bad_input_exit_2_one_line_nothing_written(self, workdir, capsys, mutate, args,
                                                       match):
        files = _small_survey(workdir)
        mutate(files)
        before = _listing(workdir)
        argv = ["check", "--sites", str(files[0])]
        if "--species" not in args:
            argv += ["--species", str(files[1])]
        status = main(argv + args)
        err = capsys.readouterr().err.strip().splitlines()
        assert status == 2
        assert len(err) == 1 and err[0].startswith("spatial-ev check: error: ")
        assert match in err[0]
        assert "Traceback" not in err[0]
        assert _listing(workdir) == before

    def test_refuses_what_run_refuses(self, workdir, capsys):
        # 8 sites read well but are too few for the analysis: `check` must not pass them
        from spatial_ev.cli.run import ANALYSIS_MIN_SITES
        from spatial_ev.errors import InputError
        from spatial_ev.input.survey import read_survey
        from spatial_ev.pipeline.analysis import analyse

        sites, species, env = _small_survey(workdir, n=ANALYSIS_MIN_SITES - 2)
        assert main(["check", "--sites", str(sites), "--species", str(species),
                     "--local-unit", "m"]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert err == ["spatial-ev check: error: the survey has 8 sites; `run` needs at least "
                       "10 (spatial eigenvectors, selection and permutation tests)"]
        # the rule is the analysis's own: it refuses one site fewer, not the minimum itself
        for n, refused in ((ANALYSIS_MIN_SITES - 1, True), (ANALYSIS_MIN_SITES, False)):
            sites, species, env = _small_survey(workdir, n=n)
            survey = read_survey(sites, species, local_unit="m")
            if refused:
                with pytest.raises(InputError, match=f"{n} sites.*at least {ANALYSIS_MIN_SITES}"):
                    analyse(survey, n_permutations=19, seed=1, spatial_weighting="single")
            else:
                assert main(["check", "--sites", str(sites), "--species", str(species),
                             "--local-unit", "m"]) == 0

    def test_installed_entry_point(self, workdir, repo_root):
        exe = shutil.which("spatial-ev", path=str(Path(sys.executable).parent)) \
            or shutil.which("spatial-ev")
        assert exe is not None, "the spatial-ev entry point is not installed"
        env = {**os.environ, "PYTHONWARNINGS": "ignore::DeprecationWarning"}
        ok = subprocess.run([exe, "check", *_demo_args(repo_root)], capture_output=True,
                            text=True, env=env, timeout=120)
        assert ok.returncode == 0 and "sites: 220" in ok.stdout
        bad = subprocess.run([exe, "check", "--sites", str(workdir / "none.gpkg")],
                             capture_output=True, text=True, env=env, timeout=120)
        assert bad.returncode == 2
        assert bad.stderr.strip() == (f"spatial-ev check: error: sites file "
                                      f"'{workdir / 'none.gpkg'}' does not exist; check the path")
        assert _listing(workdir) == set()


class TestPresenceAbsenceHint:
    def test_hellinger_of_zero_one_rows_is_their_chord_profile(self):
        """What the hint says: on 0/1 rows, Hellinger sqrt(y_ij / y_i+) and chord
        y_ij / ||y_i|| both give 1/sqrt(richness) for each species present (Legendre &
        Gallagher 2001, Oecologia 129:271-280, their formulas; the equality [derived])."""
        from spatial_ev.stats.transform import transform

        rng = np.random.default_rng(11)
        y = (rng.uniform(size=(15, 6)) < 0.5).astype(float)
        y[:, 0] = 1.0
        expected = y / np.sqrt(y.sum(axis=1, keepdims=True))
        for method in ("hellinger", "chord", "log_chord"):
            np.testing.assert_allclose(transform(y, method).to_numpy(), expected, atol=1e-15)

    def test_check_and_run_name_a_suitable_transformation(self, workdir, capsys):
        sites, species, env = _small_survey(workdir, n=14)
        table = pd.read_csv(species, index_col=0)
        (table > 3).astype(int).assign(BTX01=1).to_csv(species)
        files = ["--sites", str(sites), "--species", str(species), "--environment", str(env),
                 "--local-unit", "metre"]
        assert main(["check", *files]) == 0
        out = capsys.readouterr().out
        assert "note: every species value is 0 or 1 (presence–absence)" in out
        assert "--transformation chord (the same as the default hellinger here)" in out
        fast = ["--weighting", "distance", "--permutations", "99", "--seed", "3", "--quiet"]
        assert main(["run", *files, "--out", str(workdir / "r1"), *fast]) == 0
        out = capsys.readouterr().out
        assert "every species value is 0 or 1" in out and "--transformation chord says" in out
        assert main(["run", *files, "--out", str(workdir / "r2"), *fast,
                     "--transformation", "chord"]) == 0
        assert "0 or 1" not in capsys.readouterr().out
        # counts: no hint
        pd.DataFrame(table + 1).to_csv(species)
        assert main(["check", *files]) == 0
        assert "presence–absence" not in capsys.readouterr().out
