"""The user guide, README and notebooks mention only commands, options and names that exist.

* every ``spatial-ev COMMAND --option`` line in docs/guide.md, README.md and the notebooks names
  a real command and real options of ``spatial_ev.cli.main.build_parser()``; command lines in code
  blocks parse completely;
* every ``--option`` mentioned in the guide belongs to some command;
* every ``spatial_ev.<name>`` and ``from spatial_ev[.module] import X`` resolves;
* docs/cli.md equals what scripts/make_cli_reference.py generates now;
* the guide's worked example ("your own files") runs: its three tables are written out, the
  exact ``check`` and ``run`` commands succeed, and every file the run writes is described in
  the guide's output table.
"""

from __future__ import annotations

import argparse
import contextlib
import importlib
import importlib.util
import io
import json
import re
import shlex
import shutil
from pathlib import Path

import nbformat
import pytest

from spatial_ev.cli.main import build_parser, main

ROOT = Path(__file__).resolve().parents[1]
GUIDE = ROOT / "docs" / "guide.md"
CLI_MD = ROOT / "docs" / "cli.md"
NOTEBOOKS = sorted((ROOT / "notebooks").glob("*.ipynb"))
CODE_BLOCK = re.compile(r"```[a-z]*\n(.*?)```", re.S)
COMMAND = re.compile(r"spatial-ev\s+([A-Za-z_][\w-]*)([^`\n]*)")
OPTION = re.compile(r"(?<![\w-])(--[a-z][a-z0-9-]*)")
NAME = re.compile(r"(?<![\w/])spatial_ev((?:\.[A-Za-z_]\w*)+)")
FROM_IMPORT = re.compile(r"from (spatial_ev(?:\.\w+)*) import (\([^)]*\)|[^\n#]+)")


def _texts() -> dict[str, str]:
    texts = {"docs/guide.md": GUIDE.read_text(encoding="utf-8"),
             "README.md": (ROOT / "README.md").read_text(encoding="utf-8")}
    for path in NOTEBOOKS:
        nb = nbformat.read(path, as_version=4)
        texts[f"notebooks/{path.name}"] = "\n\n".join(c.source for c in nb.cells)
    return texts


def _subparsers() -> dict[str, argparse.ArgumentParser]:
    parser = build_parser()
    action = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return dict(action.choices)


def _options(parser: argparse.ArgumentParser) -> set[str]:
    return {s for a in parser._actions for s in a.option_strings}


def _command_mentions() -> list[tuple[str, str, str]]:
    """(source, command, rest of the line) for every ``spatial-ev COMMAND ...`` mention."""
    found = []
    for source, text in _texts().items():
        for m in COMMAND.finditer(text):
            if m.group(1) == m.group(1).upper():  # a placeholder such as COMMAND
                continue
            found.append((source, m.group(1), m.group(2)))
    return found


def _code_block_commands() -> list[tuple[str, str]]:
    out = []
    for source, text in _texts().items():
        for block in CODE_BLOCK.findall(text):
            for line in re.sub(r"\\\n\s*", " ", block).splitlines():  # join continued lines
                line = line.split("  #")[0].strip()
                if line.startswith("spatial-ev "):
                    out.append((source, line))
    return out


class TestCommandsExist:
    def test_mentions_are_found(self):
        mentions = _command_mentions()
        assert {"check", "run", "demo", "design", "eigen"} <= {c for _, c, _ in mentions}
        assert len(_code_block_commands()) >= 8

    @pytest.mark.parametrize("source,command,rest", _command_mentions(),
                             ids=lambda v: v if isinstance(v, str) and len(v) < 30 else None)
    def test_command_and_options_exist(self, source, command, rest):
        subs = _subparsers()
        assert command in subs, f"{source}: `spatial-ev {command}` is not a command"
        known = _options(subs[command])
        unknown = [o for o in OPTION.findall(rest) if o not in known]
        assert not unknown, f"{source}: spatial-ev {command} has no option(s) {unknown}"

    @pytest.mark.parametrize("source,line", _code_block_commands())
    def test_code_block_command_lines_parse(self, source, line):
        argv = shlex.split(line)[1:]
        stderr = io.StringIO()
        with contextlib.redirect_stderr(stderr):
            try:
                build_parser().parse_args(argv)
            except SystemExit as exc:  # argparse reports the problem and exits
                pytest.fail(f"{source}: `{line}` does not parse: {stderr.getvalue().strip()} "
                            f"(exit {exc.code})")

    def test_every_option_in_the_guide_belongs_to_a_command(self):
        every = set().union(*(_options(p) for p in _subparsers().values()))
        text = GUIDE.read_text(encoding="utf-8")
        unknown = sorted({o for o in OPTION.findall(text) if o not in every})
        assert not unknown, f"docs/guide.md mentions options no command has: {unknown}"


def _resolve(dotted: str):
    parts = dotted.split(".")
    for cut in range(len(parts), 0, -1):
        try:
            obj = importlib.import_module(".".join(parts[:cut]))
        except ModuleNotFoundError:
            continue
        for attr in parts[cut:]:
            obj = getattr(obj, attr)
        return obj
    raise ModuleNotFoundError(dotted)


def _python_names() -> list[tuple[str, str]]:
    names = set()
    for source, text in _texts().items():
        for m in NAME.finditer(text):
            names.add((source, "spatial_ev" + m.group(1).rstrip(".")))
        for module, imported in FROM_IMPORT.findall(text):
            for name in re.split(r"[\s,()]+", imported):
                if name:
                    names.add((source, f"{module}.{name}"))
    return sorted(names)


class TestPythonNamesExist:
    def test_names_are_found(self):
        assert len(_python_names()) >= 20

    @pytest.mark.parametrize("source,dotted", _python_names())
    def test_name_resolves(self, source, dotted):
        try:
            _resolve(dotted)
        except (AttributeError, ModuleNotFoundError) as exc:
            pytest.fail(f"{source} mentions {dotted}, which does not exist ({exc})")


def _reference_module():
    spec = importlib.util.spec_from_file_location(
        "make_cli_reference", ROOT / "scripts" / "make_cli_reference.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


class TestCliReference:
    def test_docs_cli_md_is_up_to_date(self):
        generated = _reference_module().render()
        assert CLI_MD.read_text(encoding="utf-8") == generated, \
            "docs/cli.md is out of date: run python scripts/make_cli_reference.py"

    def test_every_command_and_option_is_documented(self):
        text = CLI_MD.read_text(encoding="utf-8")
        for name, parser in _subparsers().items():
            assert f"## spatial-ev {name}" in text
            for action in parser._actions:
                for option in action.option_strings:
                    if option not in ("-h", "--help"):
                        assert f"`{option}`" in text, f"{name} {option} missing from cli.md"

    def test_reference_does_not_depend_on_terminal_width(self, monkeypatch):
        module = _reference_module()
        monkeypatch.setenv("COLUMNS", "40")
        narrow = module.render()
        monkeypatch.setenv("COLUMNS", "200")
        assert module.render() == narrow

    def test_check_mode_reports_drift(self, monkeypatch, tmp_path, capsys):
        module = _reference_module()
        assert module.main(["--check"]) == 0
        stale = tmp_path / "cli.md"
        stale.write_text("# old\n", encoding="utf-8")
        monkeypatch.setattr(module, "TARGET", stale)
        assert module.main(["--check"]) == 1
        assert "out of date" in capsys.readouterr().err


def _own_files_section() -> str:
    text = GUIDE.read_text(encoding="utf-8")
    start = text.index("## 1. From your own files to a report")
    return text[start:text.index("## 2. Input files")]


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    """The guide's three inline tables, written to files."""
    folder = tmp_path_factory.mktemp("own_files")
    section = _own_files_section()
    tables = re.findall(r"`(\w+\.csv)` — [^\n]*\n\n```csv\n(.*?)```", section, re.S)
    assert [name for name, _ in tables] == ["sites.csv", "species.csv", "environment.csv"]
    for name, body in tables:
        (folder / name).write_text(body, encoding="utf-8")
    return folder


class TestWorkedExample:
    def _command(self, name: str) -> list[str]:
        lines = [line for source, line in _code_block_commands()
                 if source == "docs/guide.md"
                 and line.startswith(f"spatial-ev {name} --sites sites.csv")]
        assert len(lines) == 1, lines
        return shlex.split(lines[0])[1:]

    def test_check_passes_on_the_inline_tables(self, folder, monkeypatch, capsys):
        monkeypatch.chdir(folder)
        assert main(self._command("check")) == 0
        out = capsys.readouterr().out
        assert "sites: 16 (point), ids from column 'plot'" in out
        assert "reference level 'mown'" in out and "metre" in out

    def test_run_writes_the_documented_folder(self, folder, monkeypatch, capsys):
        monkeypatch.chdir(folder)
        argv = self._command("run")
        assert main(argv) == 0
        out = folder / argv[argv.index("--out") + 1]
        section = _own_files_section()
        documented = set(re.findall(r"^\| `([^`]+)` \|", section, re.M))
        written = {str(p.relative_to(out)) for p in out.rglob("*")
                   if p.is_file() and p.parent.name not in ("figures", "inputs")}
        assert written - documented == set(), "files written but not described in the guide"
        assert "inputs/" in documented
        copied = {p.name for p in (out / "inputs").iterdir()}
        assert {Path(argv[argv.index(f"--{role}") + 1]).name
                for role in ("sites", "species", "environment")} == copied
        assert {"report.html", "summary.json", "manifest.json", "maps.gpkg",
                "tables/fractions.csv"} <= written
        assert (out / "figures").is_dir()
        assert "fractions (adjusted R²)" in capsys.readouterr().out
        # what the guide says about this example's result
        fractions = json.loads((out / "summary.json").read_text())["fractions"]
        assert fractions["shared"] > fractions["environment_only"] > 0
        assert -0.05 < fractions["space_only"] < 0.02

    def test_config_file_example_loads(self, folder):
        from spatial_ev.cli.run import load_config

        toml = re.search(r"```toml\n(.*?)```", _own_files_section(), re.S).group(1)
        (folder / "analysis.toml").write_text(toml, encoding="utf-8")
        parser = build_parser()
        args = parser.parse_args(["run", "--config", str(folder / "analysis.toml")])
        args = load_config(args.config, args._run_parser, args)
        assert Path(args.sites) == folder / "sites.csv"
        assert args.crs == "EPSG:32633" and args.weighting == "gabriel/binary"
        assert args.permutations == 999 and args.seed == 1


def _error_rows() -> list[str]:
    text = GUIDE.read_text(encoding="utf-8")
    section = text[text.index("## 3. Common errors"):text.index("## 4. Choosing")]
    return re.findall(r"^\| `([^`]+)` \|", section, re.M)


def _replace(path: Path, old: str, new: str, encoding: str = "utf-8") -> None:
    text = path.read_text(encoding="utf-8")
    assert old in text
    path.write_bytes(text.replace(old, new, 1).encode(encoding))


def _row(path: Path, site: str) -> str:
    return next(r for r in path.read_text(encoding="utf-8").splitlines()
                if r.startswith(f"{site},"))


def _error_case(key: str, here: Path) -> list[str]:
    """Command line, run in ``here`` (a copy of the guide's tables), that produces the error
    whose message contains ``key``; the file it spoils is changed in place."""
    s, sp, env = here / "sites.csv", here / "species.csv", here / "environment.csv"
    crs = ["--crs", "EPSG:32633"]
    check_species = ["check", "--sites", "sites.csv", "--species", "species.csv"] + crs
    check_environment = ["check", "--sites", "sites.csv", "--environment",
                         "environment.csv"] + crs
    if key == "CSV coordinates need a reference system":
        return ["check", "--sites", "sites.csv"]
    if key == "look like longitude/latitude":
        s.write_text("site,lon,lat\nA,10.1,50.2\nB,10.2,50.3\nC,10.3,50.1\nD,10.0,50.0\n"
                     "E,10.4,50.4\n", encoding="utf-8")
        return ["check", "--sites", "sites.csv"]
    if key == "are missing from it":
        lines = sp.read_text(encoding="utf-8").splitlines(keepends=True)
        sp.write_text("".join(lines[:-2]), encoding="utf-8")
        return check_species
    if key == "duplicate site id(s)":
        _replace(s, "\nP02,", "\nP01,")
        return ["check", "--sites", "sites.csv"] + crs
    if key == "which is not a number":
        cells = _row(sp, "P05").split(",")
        _replace(sp, _row(sp, "P05"), ",".join(cells[:2] + ["seven"] + cells[3:]))
        return check_species
    if key == "decimal comma":
        env.write_text(env.read_text(encoding="utf-8").replace(",", ";").replace(".", ","),
                       encoding="utf-8")
        return check_environment
    if key == "is not UTF-8 text":
        _replace(env, "P01,5,4.9,unmown", "P01,5,4.9,fauché", encoding="latin-1")
        return check_environment
    if key == "have missing values":
        _replace(env, "P07,15,", "P07,,")
        return check_environment
    if key == "have no species at all":
        _replace(sp, _row(sp, "P05"), "P05" + ",0" * 5)
        return check_species
    if key == "cannot reach the corrected level":
        return ["run", "--sites", "sites.csv", "--species", "species.csv", "--permutations",
                "99", "--out", "never"] + crs
    if key == "already exists":
        (here / "fen-run").mkdir()
        return ["run", "--sites", "sites.csv", "--species", "species.csv", "--out",
                "fen-run"] + crs
    if key == "contiguity graph is disconnected":
        return ["eigen", "--sites", str(ROOT / "data_demo" / "lakes" / "lakes.gpkg"),
                "--graph", "contiguity", "--out", "never"]
    raise AssertionError(f"no case for the guide's error row containing {key!r}")


_ERROR_KEYS = ["CSV coordinates need a reference system", "look like longitude/latitude",
               "are missing from it", "duplicate site id(s)", "which is not a number",
               "decimal comma", "is not UTF-8 text", "have missing values",
               "have no species at all", "cannot reach the corrected level", "already exists",
               "contiguity graph is disconnected"]


class TestCommonErrors:
    def test_every_row_has_a_case(self):
        rows = _error_rows()
        assert len(rows) == len(_ERROR_KEYS)
        for row in rows:
            assert sum(key in row for key in _ERROR_KEYS) == 1, row

    @pytest.mark.parametrize("key", _ERROR_KEYS)
    def test_message_in_the_guide_is_the_programs(self, key, folder, tmp_path, monkeypatch,
                                                    capsys):
        # each fragment of the shortened message (split at "...") appears in the real one
        row = next(r for r in _error_rows() if key in r)
        for name in ("sites.csv", "species.csv", "environment.csv"):
            shutil.copy(folder / name, tmp_path / name)
        monkeypatch.chdir(tmp_path)
        assert main(_error_case(key, tmp_path)) == 2
        message = capsys.readouterr().err
        for fragment in (f.strip(" ;:") for f in row.split("...")):
            assert fragment in message, f"{fragment!r} not in {message!r}"


class TestGuideCoversTheTopics:
    def test_sections(self):
        headings = re.findall(r"^## (.+)$", GUIDE.read_text(encoding="utf-8"), re.M)
        for topic in ("your own files", "Input files", "Common errors", "transformation",
                      "connectivity and weights", "fractions and their tests",
                      "scalogram and the scale maps", "Planning a survey", "dask"):
            assert any(topic in h for h in headings), topic

    def test_key_cautions_are_stated(self):
        text = " ".join(GUIDE.read_text(encoding="utf-8").split())
        for phrase in ("**not testable**", "**Inflation**", "Šidák-corrected level",
                       "Moran spectral randomisation", "read them as zero",
                       'engine="dask"', "--engine dask --scheduler", "LocalCluster"):
            assert phrase in text, phrase


def test_sequential_rule_numbers_quoted_in_the_guide(repo_root):
    """Section 9 quotes the sequential rule at 999 permutations and α = 0.05: the earliest
    significant stop and the exceedance count of a non-significant stop."""
    import numpy as np

    from spatial_ev.inference.null import SequentialRule

    rule = SequentialRule.checked(0.05)
    looks = np.asarray(rule.looks(999)[:-1])
    first_stop = int(looks[rule.significant_counts(999) >= 0][0])
    text = " ".join((repo_root / "docs" / "guide.md").read_text(encoding="utf-8").split())
    assert (f"With 999 permutations and α = 0.05, a clearly significant step stops after "
            f"{first_stop} permutations and a clearly non-significant one at its "
            f"{rule.exceedances(999)}th exceedance") in text


def test_step_rule_threshold_quoted_in_the_guide_and_cli(repo_root):
    """Section 9 and the command-line help quote the site count above which the default step
    rule shares permutations; both follow the constant that decides it."""
    from spatial_ev.pipeline.steps import SHARED_STEPS_ABOVE, resolve_step_tests

    assert resolve_step_tests("auto", SHARED_STEPS_ABOVE)[0] == "full"
    assert resolve_step_tests("auto", SHARED_STEPS_ABOVE + 1)[0] == "shared"
    text = " ".join((repo_root / "docs" / "guide.md").read_text(encoding="utf-8").split())
    assert (f"draws new permutations for every step (`full`) up to {SHARED_STEPS_ABOVE:,} "
            f"sites and shares them (`shared`) above") in text
    cli = " ".join((repo_root / "docs" / "cli.md").read_text(encoding="utf-8").split())
    assert f"auto (default): full up to {SHARED_STEPS_ABOVE:,} sites, shared above" in cli
