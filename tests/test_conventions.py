"""The package's layering rules, read from the source with :mod:`ast` (no import is executed).

* Floors: every folder of ``spatial_ev`` is one floor and imports only from the floors below it
  (``DESIGN.md``); ``datasets`` stands beside the floors and only the command line imports it.
* No import cycles between modules, whether the import runs at module level or in a function.
* No private name (leading underscore) is imported from another module; a helper that two
  modules share is a documented public name of the floor that owns it.
* Test tooling does not ship inside the package.

Running this file as a script prints every offence (``python tests/test_conventions.py``).
"""

from __future__ import annotations

import ast
import sys
from collections import defaultdict
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "spatial_ev"

# lowest first; a module may import its own floor and every floor listed before it
FLOORS = ("base", "input", "space", "stats", "inference", "selection", "pipeline", "design",
          "report", "datasets", "cli")
# floors that may import a floor listed after them (none) and floors only some may import
ONLY_IMPORTED_BY = {"datasets": {"cli", "datasets"}}


def module_name(path: Path) -> str:
    rel = path.relative_to(PACKAGE.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def floor_of(module: str) -> str:
    parts = module.split(".")
    if parts[-1] == "__main__":
        return "cli"          # the `python -m spatial_ev` entry point
    if len(parts) == 1 or parts[1] not in FLOORS:
        return "base"
    return parts[1]


def package_modules() -> dict[str, Path]:
    return {module_name(p): p for p in sorted(PACKAGE.rglob("*.py"))}


def _resolve(module: str, is_package: bool, node: ast.ImportFrom) -> str:
    if node.level == 0:
        return node.module or ""
    base = module.split(".")
    if not is_package:
        base = base[:-1]
    base = base[: len(base) - (node.level - 1)]
    return ".".join(base + ([node.module] if node.module else []))


def imports_of(module: str, path: Path, modules: dict[str, Path]):
    """(imported module, imported name or None, line) for every import of the package."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    is_package = path.name == "__init__.py"
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.startswith("spatial_ev"):
                    yield alias.name, None, node.lineno
        elif isinstance(node, ast.ImportFrom):
            target = _resolve(module, is_package, node)
            if not target.startswith("spatial_ev"):
                continue
            for alias in node.names:
                sub = f"{target}.{alias.name}"
                if sub in modules:        # `from spatial_ev.input import tables`
                    yield sub, None, node.lineno
                else:
                    yield target, alias.name, node.lineno


def offences() -> dict[str, list[str]]:
    modules = package_modules()
    found: dict[str, list[str]] = defaultdict(list)
    graph: dict[str, set[str]] = defaultdict(set)
    for module, path in modules.items():
        here = floor_of(module)
        for target, name, line in imports_of(module, path, modules):
            where = f"{path.relative_to(PACKAGE.parent)}:{line}"
            if target == "spatial_ev" and name == "__version__":
                continue
            there = floor_of(target)
            if FLOORS.index(there) > FLOORS.index(here) and not (
                    there == "datasets" and here in ONLY_IMPORTED_BY["datasets"]):
                found["upward import"].append(f"{where}: {module} ({here}) imports {target} "
                                              f"({there})")
            if there in ONLY_IMPORTED_BY and here not in ONLY_IMPORTED_BY[there]:
                found["upward import"].append(f"{where}: {module} imports {target}, which only "
                                              f"{sorted(ONLY_IMPORTED_BY[there])} may import")
            if name is not None and name.startswith("_") and not name.startswith("__") \
                    and target != module:
                found["private name across modules"].append(
                    f"{where}: {module} imports {name} from {target}")
            leaf = target.rsplit(".", 1)[-1]
            if leaf.startswith("_") and not leaf.startswith("__") and target != module \
                    and target.rsplit(".", 1)[0] != module.rsplit(".", 1)[0] \
                    and floor_of(target) != "base":
                found["private module across floors"].append(
                    f"{where}: {module} imports private module {target}")
            if target in modules and target != module:
                graph[module].add(target)
    for cycle in _cycles(graph):
        found["import cycle"].append(" -> ".join(cycle))
    return found


def _cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """One representative cycle per strongly connected component of more than one module
    (package ``__init__`` files that re-export are not counted as edges from their children)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on: set[str] = set()
    comps: list[list[str]] = []
    counter = [0]
    sys.setrecursionlimit(10_000)

    def visit(v: str) -> None:
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on.add(v)
        for w in graph.get(v, ()):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                comps.append(sorted(comp))

    for v in list(graph):
        if v not in index:
            visit(v)
    return comps


def test_every_module_sits_on_a_known_floor():
    folders = {p.name for p in PACKAGE.iterdir() if p.is_dir() and (p / "__init__.py").exists()}
    assert folders <= set(FLOORS), f"folders that are no floor: {sorted(folders - set(FLOORS))}"


@pytest.mark.parametrize("kind", ["upward import", "private name across modules",
                                  "private module across floors", "import cycle"])
def test_layering_rule(kind):
    assert offences().get(kind, []) == []


def test_the_checker_sees_offences(tmp_path, monkeypatch):
    """The rules themselves can fail: a fake package with one offence of each kind."""
    pkg = tmp_path / "spatial_ev"
    for folder in ("space", "stats", "report"):
        (pkg / folder).mkdir(parents=True)
        (pkg / folder / "__init__.py").write_text("")
    (pkg / "__init__.py").write_text("")
    (pkg / "space" / "a.py").write_text("from spatial_ev.report.b import draw\n")
    (pkg / "report" / "b.py").write_text("from spatial_ev.space.a import _helper\n"
                                         "def draw(): pass\n")
    (pkg / "stats" / "c.py").write_text("def f():\n    from spatial_ev.stats import d\n")
    (pkg / "stats" / "d.py").write_text("from spatial_ev.stats.c import f\n")
    monkeypatch.setattr(sys.modules[__name__], "PACKAGE", pkg)
    found = offences()
    assert len(found["upward import"]) == 1
    assert len(found["private name across modules"]) == 1
    assert len(found["import cycle"]) == 2   # a <-> b (through report) and c <-> d


def test_test_tooling_is_not_shipped():
    shipped = {p.name for p in PACKAGE.rglob("*.py")}
    assert not shipped & {"_example.py", "browser.py"}


def test_floors_picture_shows_every_floor_and_module(tmp_path):
    """docs/floors.svg is generated by scripts/draw_floors.py; it must show the current package."""
    import importlib.util
    spec = importlib.util.spec_from_file_location(
        "draw_floors", PACKAGE.parent / "scripts" / "draw_floors.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    assert module.stale_names() == [], "run python scripts/draw_floors.py"
    stale = tmp_path / "floors.svg"
    stale.write_text("<svg>space stats</svg>", encoding="utf-8")
    assert "pipeline" in module.stale_names(stale)


if __name__ == "__main__":
    for kind, rows in offences().items():
        print(f"{kind}: {len(rows)}")
        for row in rows:
            print("  ", row)
