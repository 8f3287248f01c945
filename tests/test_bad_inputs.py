"""The bad-input corpus (``tests/data/bad/cases.toml``): the tool does not break.

Every case is checked three ways:

* the library (:func:`spatial_ev.cli.common.survey_from_args`, i.e. :func:`read_survey` with the
  case's options) raises exactly the documented error class with a message naming the file,
  column, line or site at fault — or, for inputs that must work, returns a survey and issues
  exactly the named warnings;
* ``spatial-ev check`` (in-process) exits 2 with one line on standard error, no traceback,
  nothing on standard output and nothing written — or exits 0;
* ``spatial-ev run --out DIR`` exits 2 with one line, and neither ``DIR`` nor a
  ``.partial-`` folder exists afterwards.

Cases marked ``subprocess = true`` are also run through the installed ``spatial-ev`` command;
cases marked ``options_only = true`` are option values that one command (``run`` or ``eigen``)
refuses before any work. Every error line of every command is also checked for the library's
Python names (``n_permutations``, ```k```, ``method='k_nearest'``, ``None`` …): the command
line speaks of the options the user typed.
"""

from __future__ import annotations

import argparse
import importlib.util
import inspect
import re
import shutil
import subprocess
import sys
import warnings
from pathlib import Path

import pytest

try:
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as tomllib

import spatial_ev
from spatial_ev import errors
from spatial_ev.cli.main import main
from spatial_ev.cli.check import configure as configure_check
from spatial_ev.cli.common import survey_from_args
from spatial_ev.cli.run import ANALYSIS_MIN_SITES

BAD = Path(__file__).resolve().parent / "data" / "bad"
CASES = tomllib.loads((BAD / "cases.toml").read_text(encoding="utf-8"))["case"]
DEFAULTS = {"sites": "good/sites.csv", "species": "good/species.csv",
            "environment": "good/environment.csv"}
ERRORS = [c for c in CASES if "error" in c]
WORKING = [c for c in CASES if "error" not in c]
FILE_ERRORS = [c for c in ERRORS if not c.get("options_only")]
READ_ERRORS = [c for c in FILE_ERRORS if c.get("command", "check") == "check"]
ANALYSIS_ERRORS = [c for c in FILE_ERRORS if c.get("command") == "run"]
RUN_OPTION_ERRORS = [c for c in ERRORS if c.get("options_only") and c["command"] == "run"]
EIGEN_OPTION_ERRORS = [c for c in ERRORS if c.get("options_only") and c["command"] == "eigen"]
RUN_FAST = ["--weighting", "distance", "--permutations", "19", "--seed", "20261202", "--quiet"]


def _ids(cases):
    return [c["id"] for c in cases]


def files(case) -> list[str]:
    args = []
    for role, default in DEFAULTS.items():
        path = case.get(role, default)
        if path != "none":
            args += [f"--{role}", path]
    return args


def file_args(case) -> list[str]:
    return files(case) + list(case.get("args", []))


def _library_parameters() -> frozenset[str]:
    """Parameter names of every public function and class of the library."""
    names = set()
    for public in spatial_ev.__all__:
        obj = getattr(spatial_ev, public)
        for target in (obj, getattr(obj, "from_frames", None)):
            if callable(target):
                try:
                    names |= set(inspect.signature(target).parameters)
                except (TypeError, ValueError):
                    pass
    return frozenset(names - {"self", "cls", "args", "kwargs"})


PARAMETERS = _library_parameters()
_PYTHON_FORMS = (
    (re.compile(r"`(\w+)=?`"), "a parameter in backticks"),
    (re.compile(r"(?<![\w\-'`.])(\w+) ?=(?!=)"), "a keyword argument"),
    (re.compile(r"(?<![\w\-'`])(\w+_\w+)(?![\w'`])"), "a parameter name"),
)
_PYTHON_WORDS = re.compile(r"\b(None|True|False|GeoSeries|GeoDataFrame|DataFrame|ndarray)\b"
                           r"|\bparameter `")


def python_names_in(message: str) -> list[str]:
    """The library's Python names in a command-line message (empty when it has none)."""
    found = [f"{what} {m.group(1)!r}" for pattern, what in _PYTHON_FORMS
             for m in pattern.finditer(message) if m.group(1) in PARAMETERS]
    return found + [f"Python word {m.group(0)!r}" for m in _PYTHON_WORDS.finditer(message)]


def _load_make_corpus():
    spec = importlib.util.spec_from_file_location("make_corpus", BAD / "make_corpus.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="session")
def corpus(tmp_path_factory) -> Path:
    """A copy of the corpus folder with the GIS cases generated into it."""
    folder = tmp_path_factory.mktemp("bad") / "corpus"
    shutil.copytree(BAD, folder, ignore=shutil.ignore_patterns("__pycache__"))
    _load_make_corpus().write_gis_cases(folder)
    return folder


@pytest.fixture()
def in_corpus(corpus, monkeypatch) -> Path:
    monkeypatch.chdir(corpus)
    return corpus


def listing(folder: Path) -> dict[str, int]:
    return {str(p.relative_to(folder)): p.stat().st_mtime_ns for p in folder.rglob("*")}


def check_fragments(text: str, case) -> None:
    missing = [f for f in case["match"] if f not in text]
    assert not missing, f"fragments {missing} not in message: {text}"


def one_error_line(err: str, command: str) -> str:
    """The error line of a failed command (the last line; any line before it is a warning,
    one line each); fails on a Python name in any of them."""
    lines = err.strip().splitlines()
    assert lines, "nothing on stderr"
    assert "Traceback" not in err
    assert all(line.startswith("warning (") for line in lines[:-1]), err
    assert lines[-1].startswith(f"spatial-ev {command}: error: "), err
    for line in lines:
        leaks = python_names_in(line.split(": error: ", 1)[-1])
        assert not leaks, f"Python names in a command-line message: {leaks}: {line}"
    return lines[-1]


class TestPythonNamesDetector:
    """The check above must catch what the command line used to print."""

    @pytest.mark.parametrize("message", [
        "`schemes` entry 'gabriel' is not 'distance' or '<graph>/<weighting>'",
        "method='k_nearest' needs `k` (number of neighbours, e.g. 4); got None",
        "increase `threshold` or leave it None (smallest connecting distance)",
        "needs site polygons: pass `polygons=` (a GeoSeries) or a Survey of polygon sites",
        "n_permutations = 99 cannot reach the corrected level 0.001000 for 1 schemes",
        "pass crs= (EPSG code or WKT, --crs) or local_unit= for local planar coordinates",
        "parameter `max_vectors` must be >= 1; got 0",
        "coordinate columns need x and y: pass x= and y=",
    ])
    def test_old_messages_are_caught(self, message):
        assert python_names_in(message)

    @pytest.mark.parametrize("message", [
        "--weighting 'gabriel' is not 'distance' or '<graph>/<weighting>' (e.g. 'gabriel/linear')",
        "--graph k_nearest needs --neighbours (number of neighbours, e.g. 4)",
        "column 'site_id' line 3 (site 'S02') is empty; write 0",
        "sites file 'my_sites.csv': pass --crs EPSG:4326 for WGS 84 degrees",
    ])
    def test_command_line_words_pass(self, message):
        assert python_names_in(message) == []

    def test_knows_the_parameters(self):
        assert {"n_permutations", "schemes", "k", "threshold", "crs", "local_unit",
                "max_vectors", "keep"} <= PARAMETERS


class TestManifest:
    def test_size_and_shape(self):
        assert len(CASES) >= 40 and len(ERRORS) >= 40
        assert len(set(_ids(CASES))) == len(CASES), "case ids must be unique"
        allowed = {"id", "what", "sites", "species", "environment", "args", "error",
                   "warnings", "match", "command", "subprocess", "full_run", "options_only"}
        for case in CASES:
            assert set(case) <= allowed, f"{case['id']}: unknown keys {set(case) - allowed}"
            assert case["match"] and case["what"], case["id"]
            assert case.get("command", "check") in (
                ("run", "eigen") if case.get("options_only") else ("check", "run")), case["id"]
            if "error" in case:
                assert issubclass(getattr(errors, case["error"]), errors.SpatialEVError)
            for name in case.get("warnings", []):
                assert issubclass(getattr(errors, name), errors.SpatialEVWarning)

    def test_every_file_is_used(self, corpus):
        used = {case.get(role, default) for case in CASES for role, default in DEFAULTS.items()}
        on_disk = {p.name for p in corpus.iterdir() if p.is_file()
                   and p.suffix not in {".py", ".toml", ".shx", ".dbf", ".cpg", ".prj"}}
        assert on_disk - used == set(), f"corpus files without a case: {on_disk - used}"


def _library(case):
    parser = argparse.ArgumentParser()
    configure_check(parser)
    return survey_from_args(parser.parse_args(file_args(case)))


class TestLibrary:
    @pytest.mark.parametrize("case", READ_ERRORS, ids=_ids(READ_ERRORS))
    def test_error_class_and_message(self, case, in_corpus):
        before = listing(in_corpus)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", errors.SpatialEVWarning)
            with pytest.raises(errors.SpatialEVError) as info:
                _library(case)
        assert type(info.value) is getattr(errors, case["error"]), \
            f"{type(info.value).__name__}: {info.value}"
        check_fragments(str(info.value), {"match": [f for f in case["match"]
                                                    if not f.startswith("after ")]})
        assert listing(in_corpus) == before

    @pytest.mark.parametrize("case", WORKING, ids=_ids(WORKING))
    def test_input_that_must_work(self, case, in_corpus):
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            survey = _library(case)
        named = [w for w in caught if issubclass(w.category, errors.SpatialEVWarning)]
        assert sorted({w.category.__name__ for w in named}) == sorted(case.get("warnings", []))
        text = survey.describe() + "\n" + "\n".join(str(w.message) for w in named)
        check_fragments(text, case)
        # whatever the file's quirks, the survey is the 12 (or 8 after dropping) good sites
        assert survey.coords.notna().all().all()
        assert survey.species is None or (survey.species.to_numpy() >= 0).all()
        assert list(survey.species.index) == list(survey.coords.index)

    def test_run_stage_errors(self, in_corpus):
        from spatial_ev.pipeline.analysis import analyse

        for case in ANALYSIS_ERRORS:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", errors.SpatialEVWarning)
                survey = _library(case)
                with pytest.raises(getattr(errors, case["error"])) as info:
                    analyse(survey, spatial_weighting="single", n_permutations=19, seed=1)
            assert type(info.value) is getattr(errors, case["error"])
            check_fragments(str(info.value), case)


class TestCommandLine:
    # `check` applies every rule `run` applies to the files (ANALYSIS_ERRORS: e.g. too few sites)
    @pytest.mark.parametrize("case", FILE_ERRORS, ids=_ids(FILE_ERRORS))
    def test_check_exits_2_with_one_line(self, case, in_corpus, capsys):
        before = listing(in_corpus)
        assert main(["check", *file_args(case)]) == 2
        out, err = capsys.readouterr()
        assert out == ""
        line = one_error_line(err, "check")
        check_fragments(line, case)
        assert listing(in_corpus) == before

    @pytest.mark.parametrize("case", FILE_ERRORS + RUN_OPTION_ERRORS,
                             ids=_ids(FILE_ERRORS + RUN_OPTION_ERRORS))
    def test_run_exits_2_and_writes_nothing(self, case, in_corpus, tmp_path, capsys):
        out_dir = tmp_path / "run"
        before = listing(in_corpus)
        # the case's options come last, so that they win over the fast settings
        assert main(["run", *files(case), "--out", str(out_dir), *RUN_FAST,
                     *case.get("args", [])]) == 2
        out, err = capsys.readouterr()
        line = one_error_line(err, "run")
        check_fragments(line, case)
        assert not out_dir.exists()
        assert list(tmp_path.iterdir()) == [], "leftovers beside the output folder"
        assert listing(in_corpus) == before

    @pytest.mark.parametrize("case", WORKING, ids=_ids(WORKING))
    def test_check_passes(self, case, in_corpus, capsys):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", errors.SpatialEVWarning)
            n_sites = _library(case).n_sites
        status = main(["check", *file_args(case)])
        out, err = capsys.readouterr()
        if n_sites < ANALYSIS_MIN_SITES:
            # readable, but fewer sites than `run` takes (e.g. after dropping incomplete ones):
            # `check` refuses it as `run` would, after showing the warnings one line each
            assert status == 2 and out == ""
            assert f"`run` needs at least {ANALYSIS_MIN_SITES}" in one_error_line(err, "check")
            err = "\n".join(err.strip().splitlines()[:-1])
        else:
            assert status == 0
            assert "check passed; nothing was written" in out
        warned = {line.split(")")[0].removeprefix("warning (")
                  for line in err.strip().splitlines() if line}
        assert warned == set(case.get("warnings", [])), err
        check_fragments(out + err, case)


SITE_ERRORS = [c for c in READ_ERRORS if "species" not in c and "environment" not in c]
# Small awkward-but-valid surveys analysed end to end (some select no environmental variable:
# the chain must still write a whole run folder).
FULL_RUNS = [pytest.param(c, id=c["id"]) for c in WORKING if c.get("full_run")]


class TestOtherCommands:
    @pytest.mark.parametrize("case", SITE_ERRORS + EIGEN_OPTION_ERRORS,
                             ids=_ids(SITE_ERRORS + EIGEN_OPTION_ERRORS))
    def test_eigen_exits_2_and_writes_nothing(self, case, in_corpus, tmp_path, capsys):
        args = file_args(case)
        for role in ("--species", "--environment"):  # `eigen` reads the site table only
            at = args.index(role)
            del args[at:at + 2]
        out_dir = tmp_path / "basis"
        assert main(["eigen", *args, "--out", str(out_dir)]) == 2
        check_fragments(one_error_line(capsys.readouterr().err, "eigen"), case)
        assert list(tmp_path.iterdir()) == []

    @pytest.mark.parametrize("case", FULL_RUNS)
    def test_whole_analysis_runs(self, case, in_corpus, tmp_path, capsys):
        import json

        out_dir = tmp_path / "run"
        status = main(["run", *file_args(case), "--out", str(out_dir), *RUN_FAST])
        assert status == 0, capsys.readouterr().err
        summary = json.loads((out_dir / "summary.json").read_text(encoding="utf-8"))
        assert summary["n_sites"] == 12 and summary["n_species"] == 5
        assert summary["seed"] == 20261202 and summary["permutations"] == 19
        assert [p.name for p in tmp_path.iterdir()] == ["run"]


SUBPROCESS = [c for c in ERRORS if c.get("subprocess")]


def _installed_command() -> list[str]:
    script = Path(sys.executable).with_name("spatial-ev")
    return [str(script)] if script.exists() else [sys.executable, "-m", "spatial_ev"]


class TestInstalledCommand:
    @pytest.mark.parametrize("case", SUBPROCESS, ids=_ids(SUBPROCESS))
    def test_exit_2_one_line(self, case, corpus, tmp_path):
        out_dir = tmp_path / "run"
        proc = subprocess.run([*_installed_command(), "run", *file_args(case),
                               "--out", str(out_dir), *RUN_FAST],
                              cwd=corpus, capture_output=True, text=True, timeout=120)
        assert proc.returncode == 2, proc.stderr
        check_fragments(one_error_line(proc.stderr, "run"), case)
        assert proc.stdout == ""
        assert not out_dir.exists() and list(tmp_path.iterdir()) == []

    def test_debug_shows_the_traceback(self, corpus):
        case = SUBPROCESS[0]
        proc = subprocess.run([*_installed_command(), "check", *file_args(case), "--debug"],
                              cwd=corpus, capture_output=True, text=True, timeout=120)
        assert proc.returncode != 0 and "Traceback" in proc.stderr
        assert case["error"] in proc.stderr


# ------------------------------------------------------------------ in-memory frames
def _frames():
    import numpy as np
    import pandas as pd

    rng = np.random.default_rng(20261202)
    ids = pd.Index([f"S{i:02d}" for i in range(12)], name="site")
    sites = pd.DataFrame({"x": rng.uniform(0, 1000, 12), "y": rng.uniform(0, 1000, 12)},
                         index=ids)
    species = pd.DataFrame(rng.poisson(3, (12, 4)) + 1, index=ids, columns=list("abcd"))
    return sites, species


def _survey(sites=None, species=None, environment=None, **kw):
    from spatial_ev.input.survey import Survey

    s0, y0 = _frames()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", errors.SpatialEVWarning)
        return Survey.from_frames(s0 if sites is None else sites,
                                  y0 if species is None else species, environment,
                                  local_unit="metre", **kw)


class TestInMemoryFrames:
    """Frames built in Python reach the same checks as files, whatever their dtypes."""

    def test_nullable_integer_species_with_missing(self):
        _, species = _frames()
        with pytest.raises(errors.InputError, match=r"column 'a' row \d+ \(site 'S\d+'\) is "
                                                    r"empty or missing"):
            _survey(species=species.astype("Int64").mask(species > 4))
        assert _survey(species=species.astype("Int64")).species.dtypes.eq("float64").all()

    def test_nullable_float_and_boolean_environment(self):
        import pandas as pd

        sites, _ = _frames()
        env = pd.DataFrame({"d": pd.array(range(12), dtype="Float64"),
                            "g": pd.array([True, False, None] * 4, dtype="boolean")},
                           index=sites.index)
        with pytest.raises(errors.InputError, match=r"4 site\(s\) have missing values "
                                                    r"\(columns 'g'\): 'S02', 'S05'"):
            _survey(environment=env)
        survey = _survey(environment=env, incomplete_sites="drop")
        assert list(survey.environment.columns) == ["d", "g"] and survey.n_sites == 8

    def test_multi_level_columns(self):
        import pandas as pd

        _, species = _frames()
        species.columns = pd.MultiIndex.from_product([["taxa"], species.columns])
        with pytest.raises(errors.InputError, match="multi-level column names .* flatten"):
            _survey(species=species)

    def test_complex_values(self):
        _, species = _frames()
        with pytest.raises(errors.InputError, match=r"holds '\(\d\+0j\)', which is not a "
                                                    r"number \(48 such cell"):
            _survey(species=species.astype(complex))

    def test_missing_coordinates(self):
        sites, _ = _frames()
        sites.iloc[[4, 7], 1] = float("nan")
        with pytest.raises(errors.InputError, match=r"coordinate column 'y' row 5 \(site "
                                                    r"'S04'\) is empty; .*\(2 such cell"):
            _survey(sites=sites)

    def test_text_species_values(self):
        _, species = _frames()
        assert _survey(species=species.astype(str)).species.equals(
            _survey(species=species.astype(float)).species)
