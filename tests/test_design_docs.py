"""The design numbers quoted in README.md and docs/guide.md come from the documented command.

Slow: runs the guide's two commands (``spatial-ev demo`` then ``spatial-ev design`` with its
seed) in a temporary folder and compares every quoted number with the written tables.
"""

from __future__ import annotations

import re
import shlex
from pathlib import Path

import pandas as pd
import pytest

from spatial_ev.cli.main import main

ROOT = Path(__file__).resolve().parents[1]


def _guide_commands(text: str) -> list[list[str]]:
    section = text[text.index("## 8. Planning a survey"):]
    block = re.search(r"```bash\n(.*?)```", section, re.S).group(1)
    return [shlex.split(line)[1:] for line in block.strip().splitlines()]


def _quoted_table(text: str) -> pd.DataFrame:
    """The markdown table after the marker ``design numbers (guide command, seed 5)``."""
    section = text[text.index("design numbers (guide command, seed 5)"):]
    rows = [line for line in section.splitlines() if line.startswith("|")]
    header = [c.strip() for c in rows[0].strip("|").split("|")]
    body = [[c.strip() for c in r.strip("|").split("|")] for r in rows[2:]]
    return pd.DataFrame(body, columns=header)


@pytest.mark.slow
def test_documented_design_numbers(tmp_path, monkeypatch):
    guide = (ROOT / "docs" / "guide.md").read_text(encoding="utf-8")
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    commands = _guide_commands(guide)
    assert [c[0] for c in commands] == ["demo", "design"] and "--seed" in commands[1]
    monkeypatch.chdir(tmp_path)
    for args in commands:
        assert main(args + ["--quiet"]) == 0
    power = pd.read_csv(tmp_path / "design" / "power.csv")
    got = power.pivot(index="layout", columns="objective", values="power").round(2)
    coverage = pd.read_csv(tmp_path / "design" / "coverage.csv")
    status = coverage.set_index(["layout", "scale_class"])["status"]
    table = _quoted_table(guide)
    assert len(table) == 4
    for row in table.itertuples(index=False):
        layout = row[0]
        for cls, cell in zip(("broad", "medium", "fine"), row[2:5]):
            value = float(cell.split()[0])
            assert value == got.loc[layout, f"scale:{cls}"], (layout, cls)
            assert ("not resolved" in cell) == (status[(layout, cls)] == "not resolved")
    # README: the fine class's power, pilot → pilot + 40, and the halved pilot
    m = re.search(r"fine scale class from (\d\.\d\d) to (\d\.\d\d)", readme)
    assert m, "README sentence about adding 40 sites not found"
    assert float(m.group(1)) == got.loc["pilot", "scale:fine"]
    assert float(m.group(2)) == got.loc["pilot + 40", "scale:fine"]
    m = re.search(r"halving the pilot \(every second site\) gives (\d\.\d\d)", readme)
    assert m and float(m.group(1)) == got.loc["half pilot", "scale:fine"]
