"""The README's Quick start is the project's promise: exactly two commands, the second passes on a
machine with nothing but Python, and CI runs the same command with the slow and browser tests
switched on (tests/conftest.py decides what runs)."""

from __future__ import annotations

import re
import shutil

import conftest
import pytest
from conftest import REQUIRE_BROWSER, RUN_SLOW, marker_decision, switch_is_on

from spatial_ev.cli.main import build_parser


def quick_start_commands(readme: str) -> list[str]:
    section = readme.split("## Quick start", 1)[1].split("\n## ", 1)[0]
    block = re.search(r"```(?:bash|sh)?\n(.*?)```", section, re.S).group(1)
    return [line.strip() for line in block.splitlines() if line.strip()]


def test_quick_start_has_exactly_two_commands(repo_root):
    commands = quick_start_commands((repo_root / "README.md").read_text())
    assert len(commands) == 2
    assert "spatial-ev demo" in commands[0]
    assert "pytest" in commands[1]


def ci_exports(script: str) -> dict[str, str]:
    """Variables the CI script exports (``export A=1 B=2`` lines, before the test command)."""
    out = {}
    for line in script.splitlines():
        if line.strip().startswith("export "):
            out.update(item.split("=", 1) for item in line.split()[1:])
    return out


def test_ci_runs_the_readme_test_command_verbatim(repo_root):
    test_command = quick_start_commands((repo_root / "README.md").read_text())[1]
    ci_lines = [line.strip() for line in (repo_root / ".ci" / "run").read_text().splitlines()]
    assert test_command in ci_lines
    # and switches on, before it, exactly the variables tests/conftest.py reads
    before = "\n".join(ci_lines[:ci_lines.index(test_command)])
    assert ci_exports(before) == {RUN_SLOW: "1", REQUIRE_BROWSER: "1"}


def test_readme_says_what_skips_and_how_ci_runs_it(repo_root):
    section = (repo_root / "README.md").read_text().split("## Quick start", 1)[1]
    section = section.split("\n## ", 1)[0]
    assert RUN_SLOW in section and REQUIRE_BROWSER in section and ".ci/run" in section




def test_readme_opens_with_the_job(repo_root):
    text = (repo_root / "README.md").read_text()
    first_paragraph = text.split("\n\n")[1]
    assert "spatial" in first_paragraph and len(first_paragraph.split()) > 40


def test_demo_command_exists_in_parser():
    sub = next(a for a in build_parser()._actions if a.dest == "command")
    assert "demo" in sub.choices


# --------------------------------------------------------------- what the README command runs

def _no_browser() -> str:
    return "headless Chromium not found"


def _browser() -> None:
    return None


class TestMarkerDecision:
    # the rule table of tests/conftest.py: (markers, environment, browser) -> run / skip / fail
    def test_plain_tests_always_run(self):
        for env in ({}, {RUN_SLOW: "1", REQUIRE_BROWSER: "1"}):
            assert marker_decision(set(), env, _no_browser) is None
            assert marker_decision({"parametrize"}, env, _no_browser) is None

    def test_slow_skips_unless_switched_on(self):
        action, reason = marker_decision({"slow"}, {}, _browser)
        assert action == "skip" and f"{RUN_SLOW}=1" in reason and "\n" not in reason
        assert marker_decision({"slow"}, {RUN_SLOW: "0"}, _browser)[0] == "skip"
        assert marker_decision({"slow"}, {RUN_SLOW: "1"}, _browser) is None

    def test_browser_runs_where_chromium_is(self):
        assert marker_decision({"browser"}, {}, _browser) is None
        assert marker_decision({"browser"}, {REQUIRE_BROWSER: "1"}, _browser) is None

    def test_browser_skips_without_chromium_unless_required(self):
        action, reason = marker_decision({"browser"}, {}, _no_browser)
        assert action == "skip" and "Chromium not found" in reason
        assert f"{REQUIRE_BROWSER}=1" in reason and "\n" not in reason
        action, reason = marker_decision({"browser"}, {REQUIRE_BROWSER: "1"}, _no_browser)
        assert action == "fail" and "Chromium not found" in reason

    def test_browser_is_not_looked_for_when_not_needed(self):
        def forbidden():
            raise AssertionError("Chromium looked up for a test that does not need it")
        assert marker_decision({"slow"}, {}, forbidden)[0] == "skip"
        assert marker_decision(set(), {}, forbidden) is None

    def test_unclear_switch_values_are_refused(self):
        assert switch_is_on({}, RUN_SLOW) is False
        assert switch_is_on({RUN_SLOW: " 1 "}, RUN_SLOW) is True
        for value in ("yes", "true", "2"):
            with pytest.raises(pytest.UsageError, match=f"{RUN_SLOW}='{value}': use 1"):
                switch_is_on({RUN_SLOW: value}, RUN_SLOW)


SAMPLE_TESTS = """
import pytest

def test_plain():
    pass

@pytest.mark.slow
def test_study():
    pass

@pytest.mark.browser
def test_page():
    pass
"""


class TestHooksInASession:
    """The hooks of tests/conftest.py applied to a small session of three tests (one plain, one
    slow, one browser); Chromium is made present or absent with $SPATIAL_EV_CHROMIUM."""

    @pytest.fixture()
    def session(self, pytester, monkeypatch):
        pytester.makeconftest(
            "import importlib.util\n"
            f"spec = importlib.util.spec_from_file_location('project_hooks', {conftest.__file__!r})\n"
            "hooks = importlib.util.module_from_spec(spec)\n"
            "spec.loader.exec_module(hooks)\n"
            "pytest_collection_modifyitems = hooks.pytest_collection_modifyitems\n"
            "pytest_runtest_setup = hooks.pytest_runtest_setup\n"
            "def pytest_configure(config):\n"
            "    config.addinivalue_line('markers', 'slow: study')\n"
            "    config.addinivalue_line('markers', 'browser: page')\n")
        pytester.makepyfile(test_sample=SAMPLE_TESTS)
        for name in (RUN_SLOW, REQUIRE_BROWSER):
            monkeypatch.delenv(name, raising=False)

        def run(chromium_present: bool, **env: str):
            fake = shutil.which("true") if chromium_present else "/nonexistent/chromium"
            monkeypatch.setenv("SPATIAL_EV_CHROMIUM", fake)
            for name, value in env.items():
                monkeypatch.setenv(name, value)
            return pytester.runpytest("-p", "no:cacheprovider", "-rs")
        return run

    def test_readme_command_on_a_bare_machine(self, session):
        result = session(chromium_present=False)
        result.assert_outcomes(passed=1, skipped=2)
        result.stdout.fnmatch_lines([f"SKIPPED*slow study or end-to-end run; set {RUN_SLOW}=1*",
                                     f"SKIPPED*sets {REQUIRE_BROWSER}=1"])

    def test_ci_with_chromium_runs_everything(self, session):
        result = session(chromium_present=True, **{RUN_SLOW: "1", REQUIRE_BROWSER: "1"})
        result.assert_outcomes(passed=3)

    def test_ci_without_chromium_fails(self, session):
        result = session(chromium_present=False, **{RUN_SLOW: "1", REQUIRE_BROWSER: "1"})
        result.assert_outcomes(passed=2, errors=1)
        result.stdout.fnmatch_lines([f"{REQUIRE_BROWSER}=1 but *not an executable file"])
        assert result.ret != 0

    def test_unclear_value_stops_the_session(self, session):
        result = session(chromium_present=True, **{RUN_SLOW: "yes"})
        assert result.ret == pytest.ExitCode.USAGE_ERROR


# ------------------------------------------------------------- the README's quoted demo numbers

def _readme_demo_table(text: str) -> dict[str, tuple[float, float | None]]:
    section = text.split("## The demo survey recovers its truth", 1)[1].split("\n## ", 1)[0]
    rows = {}
    for key, label in (("environment_only", "[a]"), ("shared", "[b]"),
                       ("space_only", "[c]"), ("unexplained", "[d]")):
        line = next(row for row in section.splitlines() if row.startswith(f"| {label}"))
        cells = [c.strip() for c in line.strip("|").split("|")]
        estimate = re.match(r"(-?\d+\.\d+)(?: \(p = (\d+\.\d+)\))?", cells[2])
        rows[key] = (float(estimate.group(1)),
                     float(estimate.group(2)) if estimate.group(2) else None)
    return rows


@pytest.mark.slow   # runs the Quick start's demo (999 permutations); CI runs it
def test_demo_table_is_what_the_quick_start_demo_prints(repo_root, tmp_path, capsys):
    """The README's demo table comes from `spatial-ev demo` (the Quick start's command, 999
    permutations, the demo's fixed seed): run it and compare every quoted number."""
    import json

    from spatial_ev.cli.main import main

    assert main(["demo", "--out", str(tmp_path / "demo-run")]) == 0
    printed = capsys.readouterr().out
    summary = json.loads((tmp_path / "demo-run" / "summary.json").read_text(encoding="utf-8"))
    quoted = _readme_demo_table((repo_root / "README.md").read_text(encoding="utf-8"))
    for key, (value, p) in quoted.items():
        assert round(summary["fractions"][key], 3) == value, key
        assert f"{key.replace('_', ' ')} {value:.3f}" in printed, key
        if p is not None:
            assert round(summary["fraction_tests"][key]["p"], 3) == p, key
    assert summary["permutations"] == 999 and summary["seed"] == 20240917
    assert "permutations, seed 20240917" in (repo_root / "README.md").read_text(encoding="utf-8")


def test_validation_numbers_are_those_of_the_published_study(repo_root):
    """The README's type I and power numbers are the rates of validation/error_rates.md (written
    by `python validation/error_rates.py --replicates 2000 --permutations 199 --seed 20261202`),
    rounded half up to three decimals."""
    from decimal import ROUND_HALF_UP, Decimal

    readme = (repo_root / "README.md").read_text(encoding="utf-8")
    study = (repo_root / "validation" / "error_rates.md").read_text(encoding="utf-8")
    assert "--replicates 2000 --permutations 199 --seed 20261202" in study

    def rate(study_row: str, layout: str) -> str:
        line = next(r for r in study.splitlines()
                    if r.startswith(f"| {study_row}") and f"| {layout} |" in r)
        value = Decimal(line.split("|")[5].strip())
        return str(value.quantize(Decimal("0.001"), rounding=ROUND_HALF_UP))

    def quoted(readme_row: str) -> list[str]:
        line = next(r for r in readme.splitlines() if r.startswith(f"| {readme_row}"))
        return [c.strip() for c in line.strip("|").split("|")[1:]]

    for readme_row, study_row in (
            ("type I: global test of all positive-I MEM", "type I: global test of"),
            ("type I: forward selection with global test", "type I: forward selection"),
            ("type I: environment-only fraction [a]", "type I: environment-only fraction")):
        assert quoted(readme_row) == [rate(study_row, "grid"), rate(study_row, "irregular")]
    text = " ".join(readme.split())
    assert f"from {rate('power: broad structure', 'grid 6×6')} (6 × 6 grid) to " \
           f"{rate('power: broad structure', 'grid 10×10')} (10 × 10)" in text
    assert f"6 × 6 grid ({rate('power: fine structure', 'grid 6×6')})" in text
    assert f"10 × 10 grid ({rate('power: fine structure', 'grid 10×10')})" in text


def test_sequential_step_numbers_are_those_of_the_study(repo_root):
    """The README's sequential-decision summary is the 'Sequential step decisions' table of
    validation/error_rates.md: no selection differs, and the range of mean permutations per
    step test."""
    import re

    readme = " ".join((repo_root / "README.md").read_text(encoding="utf-8").split())
    study = (repo_root / "validation" / "error_rates.md").read_text(encoding="utf-8")
    part = study[study.index("## Sequential step decisions"):]
    rows = [r for r in part.splitlines() if "sequential steps (selections differ in" in r]
    assert len(rows) == 6
    differ = [float(re.search(r"selections differ in ([0-9.]+)", r).group(1)) for r in rows]
    drawn = [int(re.search(r"999 → (\d+)", r).group(1)) for r in rows]
    assert max(differ) == 0.0
    assert f"in every replicate of all {len(rows)} settings" in readme
    assert f"drew {min(drawn)}–{max(drawn)} permutations on average instead of 999" in readme
    assert "1,000 replicates per setting" in readme and "--replicates 1000" in part


def test_shared_step_numbers_are_those_of_the_study(repo_root):
    """The README's shared-permutation summary is the 'Shared step permutations' table of
    validation/error_rates.md: the range of the paired differences in mean vectors selected,
    each within 2 Monte Carlo standard errors (to the table's rounding)."""
    import re

    readme = " ".join((repo_root / "README.md").read_text(encoding="utf-8").split())
    study = (repo_root / "validation" / "error_rates.md").read_text(encoding="utf-8")
    part = study[study.index("## Shared step permutations"):]
    rows = [r for r in part.splitlines() if "shared permutations (mean vectors selected" in r]
    assert len(rows) == 6
    pairs = [re.search(r"paired difference ([+-][0-9.]+) ± ([0-9.]+) SE", r).groups()
             for r in rows]
    gaps = [float(d) for d, _ in pairs]
    assert all(abs(float(d)) <= 2 * float(se) + 0.0005 for d, se in pairs)
    low, high = min(gaps), max(gaps)
    assert (f"paired differences in the mean number of vectors selected of "
            f"{low:+.3f} to {high:+.3f}".replace("-", "−")) in readme
    assert f"each within 2 Monte Carlo SE, in all {len(rows)} settings" in readme
    assert "1,000 replicates per setting" in readme and "--replicates 1000" in part
