"""The import graph, built from the source: one direction among the packages, no cycle.

Floors, from the bottom: ``spanwatch.rules`` (the core: types, checks, physics, alarm state
machines), ``spanwatch.connectors`` (adapters), ``spanwatch.monitor`` (the application). A module
may import from its own floor and the floors below it, never above; and no package (folder)
imports a package that imports it back, directly or through others. Every import counts,
including those inside functions.
"""

from __future__ import annotations

import ast
import tomllib
from collections import defaultdict
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
FLOORS = {"rules": 0, "connectors": 1, "monitor": 2}
FOLDERS = {"rules": "rules", "connectors": "connectors", "monitor": "monitor"}


def _package_of(path: Path) -> str:
    """``spanwatch.connectors.mqtt`` for connectors/mqtt/source.py; ``spanwatch.monitor`` for monitor/cli.py."""
    rel = path.relative_to(REPO).parent
    return ".".join(["spanwatch", *rel.parts])


def _imports(path: Path) -> list[tuple[int, str]]:
    """(line, absolute module name) of every import in a file, relative ones resolved."""
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    pkg = _package_of(path)
    out = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out += [(node.lineno, a.name) for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = pkg.split(".")
                base = base[: len(base) - (node.level - 1)]
                name = ".".join([*base, node.module] if node.module else base)
            else:
                name = node.module or ""
            out.append((node.lineno, name))
    return out


def _sources() -> list[Path]:
    return sorted(p for folder in FOLDERS for p in (REPO / folder).rglob("*.py"))


def graph() -> dict[str, set[str]]:
    """Package -> the spanwatch packages its modules import (module imports mapped to their package)."""
    packages = {_package_of(p) for p in _sources()}
    g: dict[str, set[str]] = defaultdict(set)
    for path in _sources():
        src = _package_of(path)
        g[src]
        for _, name in _imports(path):
            if not name.startswith("spanwatch."):
                continue
            # the longest package that is a prefix of the imported name
            target = max((p for p in packages if name == p or name.startswith(p + ".")), key=len, default=None)
            if target and target != src:
                g[src].add(target)
    return dict(g)


def _floor(package: str) -> int | None:
    parts = package.split(".")
    return FLOORS.get(parts[1]) if len(parts) > 1 else None


def test_every_source_file_is_seen():
    names = {p.relative_to(REPO).as_posix() for p in _sources()}
    assert {"rules/base.py", "connectors/opcua.py", "monitor/cli.py"} <= names


def test_no_import_runs_up_a_floor():
    bad = []
    for path in _sources():
        own = _floor(_package_of(path))
        for line, name in _imports(path):
            if name.startswith("spanwatch.") and (f := _floor(name)) is not None and f > own:
                bad.append(f"{path.relative_to(REPO)}:{line} imports {name}")
    assert not bad, "imports that run up a floor:\n" + "\n".join(bad)


def test_no_package_imports_a_package_that_imports_it_back():
    # A subpackage belongs to its parent (monitor.simline reads monitor's config and monitor runs it), so edges
    # between a package and its own ancestors are not counted; every other edge is, floors and siblings alike.
    def related(a: str, b: str) -> bool:
        return a.startswith(b + ".") or b.startswith(a + ".")

    g = {a: {b for b in targets if not related(a, b)} for a, targets in graph().items()}
    for a, targets in graph().items():  # the three floors as wholes
        for b in targets:
            top_a, top_b = ".".join(a.split(".")[:2]), ".".join(b.split(".")[:2])
            if top_a != top_b:
                g.setdefault(top_a, set()).add(top_b)
    cycles = []

    def visit(node: str, stack: list[str], seen: set[str]) -> None:
        for nxt in sorted(g.get(node, ())):
            if nxt in stack:
                cycles.append(" -> ".join([*stack[stack.index(nxt):], nxt]))
            elif nxt not in seen:
                seen.add(nxt)
                visit(nxt, [*stack, nxt], seen)

    for start in sorted(g):
        visit(start, [start], {start})
    assert not cycles, "package cycles:\n" + "\n".join(sorted(set(cycles)))


@pytest.mark.parametrize("folder", ["rules", "connectors", "monitor", "tests", "benchmarks"])
def test_no_bare_top_level_names(folder):
    # The three folders are installed under spanwatch only; a bare "import rules" would find a foreign
    # distribution of that name (there are distributions called rules and connectors on PyPI).
    bad = []
    for path in sorted((REPO / folder).rglob("*.py")):
        for line, name in _imports(path):
            if name.split(".")[0] in FOLDERS:
                bad.append(f"{path.relative_to(REPO)}:{line} imports {name}")
    assert not bad, "\n".join(bad)


def test_every_package_folder_is_in_the_wheel():
    cfg = tomllib.loads((REPO / "pyproject.toml").read_text(encoding="utf-8"))["tool"]["setuptools"]
    listed = set(cfg["packages"])
    on_disk = {_package_of(p) for p in _sources() if p.name == "__init__.py" and "_spanwatch" not in p.parts}
    assert on_disk <= listed, f"package folders missing from pyproject's packages: {sorted(on_disk - listed)}"
    for name, folder in cfg["package-dir"].items():
        assert (REPO / folder).is_dir(), f"{name} maps to a missing folder {folder}"


def test_the_graph_has_the_three_floors():
    g = graph()
    edges = {(a.split(".")[1], b.split(".")[1]) for a, targets in g.items() for b in targets}
    # the application wires the adapters and the core; the adapters use the core
    assert {("monitor", "rules"), ("monitor", "connectors"), ("connectors", "rules")} <= edges
