"""The README's Quick start is the project's promise: exactly two commands, and CI runs the second."""

from __future__ import annotations

import re

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


def test_ci_runs_the_readme_test_command_verbatim(repo_root):
    test_command = quick_start_commands((repo_root / "README.md").read_text())[1]
    ci_lines = [line.strip() for line in (repo_root / ".ci" / "run").read_text().splitlines()]
    assert test_command in ci_lines


def test_readme_opens_with_the_job(repo_root):
    text = (repo_root / "README.md").read_text()
    first_paragraph = text.split("\n\n")[1]
    assert "spatial" in first_paragraph and len(first_paragraph.split()) > 40


def test_demo_command_exists_in_parser():
    sub = next(a for a in build_parser()._actions if a.dest == "command")
    assert "demo" in sub.choices
