"""Draw the package's floors and the imports between them (docs/floors.svg).

The picture is generated from the source, not drawn by hand: each floor of ``spatial_ev`` is a
band listing its modules, lowest floor at the bottom; an arrow from floor A to floor B counts the
module-level and function-level imports of B by modules of A (read with :mod:`ast` by the
conventions test's reader). Every arrow points down: a floor imports only the floors below it.

Usage: python scripts/draw_floors.py [--check]
(--check: exit 1 when docs/floors.svg misses a floor or module of the package; the test suite
runs it, so the picture cannot fall behind the code)
"""

from __future__ import annotations

import io
import sys
from collections import Counter
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "tests"))
import test_conventions as conv  # noqa: E402  (the one reader of the import graph)

TARGET = ROOT / "docs" / "floors.svg"
_PURPOSE = {
    "base": "errors, parameter rules, optional imports",
    "input": "reading surveys, CRS",
    "space": "geometry, graphs, spatial bases, Moran's I, scales",
    "stats": "linear-model core, transformations, RDA, beta diversity",
    "inference": "null-distribution service, permutation tests, engines",
    "selection": "forward selection, weighting schemes, partitioning",
    "pipeline": "analyse() as named steps, scale-class fits, pilot rebuild",
    "design": "layouts, coverage, simulated power (pipeline steps)",
    "report": "figures, HTML, layers, summary.json",
    "datasets": "invented demo surveys (beside the floors)",
    "cli": "the spatial-ev commands",
}


def floor_edges() -> tuple[dict[str, list[str]], Counter]:
    """Modules per floor and import counts between floors (from, to)."""
    modules = conv.package_modules()
    members: dict[str, list[str]] = {f: [] for f in conv.FLOORS}
    edges: Counter = Counter()
    for module, path in modules.items():
        here = conv.floor_of(module)
        leaf = module.rsplit(".", 1)[-1]
        if path.name != "__init__.py" and leaf != "__main__":
            members[here].append(leaf)
        for target, _name, _line in conv.imports_of(module, path, modules):
            there = conv.floor_of(target)
            if there != here and target != "spatial_ev":
                edges[(here, there)] += 1
    return members, edges


def draw() -> bytes:
    """The SVG of the floors picture (deterministic: no dates, fixed hash salt)."""
    members, edges = floor_edges()
    floors = list(conv.FLOORS)
    plt.rcParams["svg.hashsalt"] = "spatial_ev-floors"
    plt.rcParams["svg.fonttype"] = "none"
    fig, ax = plt.subplots(figsize=(12.5, 0.62 * len(floors) + 0.6))
    height = 0.8
    for level, floor in enumerate(floors):
        ax.add_patch(plt.Rectangle((0, level - height / 2), 9.0, height, facecolor="#eef3f0",
                                   edgecolor="#5b7f6e", linewidth=1.0))
        ax.text(0.12, level + 0.14, floor, fontsize=10, fontweight="bold", va="center",
                color="#23402f")
        ax.text(0.12, level - 0.17, _PURPOSE.get(floor, ""), fontsize=7.5, va="center",
                color="#3c5a4a")
        names = sorted(members[floor])
        half = (len(names) + 1) // 2 if len(names) > 6 else len(names)
        text = ", ".join(names[:half]) + (",\n" + ", ".join(names[half:]) if names[half:] else "")
        ax.text(4.3, level, text or "—", fontsize=7.5, va="center", color="#333333")
    # arrows on the right: one lane per source floor, downward
    for k, ((src, dst), count) in enumerate(sorted(edges.items(),
                                                   key=lambda e: (floors.index(e[0][0]),
                                                                  floors.index(e[0][1])))):
        x = 9.25 + 0.11 * k
        y0, y1 = floors.index(src), floors.index(dst)
        colour = "#2f6f8f" if y1 < y0 else "#c0392b"
        ax.annotate("", xy=(x, y1 + 0.25), xytext=(x, y0 - 0.25),
                    arrowprops=dict(arrowstyle="-|>", color=colour, lw=0.8, shrinkA=0, shrinkB=0))
    width = 9.35 + 0.11 * max(len(edges), 1)
    ax.set_xlim(-0.05, width)
    ax.set_ylim(-0.6, len(floors) - 0.4)
    ax.axis("off")
    ax.set_title("spatial_ev floors (lowest first); arrows on the right: imports, each pointing "
                 "to a floor below", fontsize=9, loc="left")
    out = io.BytesIO()
    fig.savefig(out, format="svg", bbox_inches="tight", metadata={"Date": None})
    plt.close(fig)
    return out.getvalue()


def stale_names(target: Path = TARGET) -> list[str]:
    """Floors and modules of the package that the picture at ``target`` does not show."""
    text = target.read_text(encoding="utf-8") if target.is_file() else ""
    members, _ = floor_edges()
    wanted = [f for f in conv.FLOORS] + [m for names in members.values() for m in names]
    return sorted({name for name in wanted if name not in text})


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    if "--check" in argv:
        missing = stale_names()
        if missing:
            print(f"{TARGET} is out of date (missing {missing}): run python "
                  "scripts/draw_floors.py", file=sys.stderr)
            return 1
        return 0
    TARGET.write_bytes(draw())
    print(f"written: {TARGET}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
