"""The package's layout: DEVELOPERS.md's tree names every module and package of pipeline/ and
nothing that is gone, and the imports keep to the floors it describes (no circle, no stage
importing another stage, no arrow from a lower floor to a higher one).
"""

from __future__ import annotations

import ast
import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
PACKAGE = ROOT / "pipeline"

#: What each part of the package may import (DEVELOPERS.md, Layout).
ALLOWED = {
    "core": {"core"},
    "warehouse": {"core", "warehouse"},
    "stages": {"core", "warehouse"},  # and its own stage
    "report": {"core", "warehouse", "report"},
    "run": {"core", "warehouse", "stages", "report", "run"},
    "cli": {"core", "warehouse", "stages", "report", "run"},
}


def _documented() -> set[str]:
    text = (ROOT / "DEVELOPERS.md").read_text(encoding="utf-8")
    block = text.split("## Layout", 1)[1].split("```", 2)[1]
    body = block.split("\nsql/", 1)[0]  # the pipeline/ part of the tree
    found, stack = set(), []
    for line in body.splitlines()[1:]:
        m = re.match(r"^( {2,12})(\w+(?:\.py|\.css|/))", line)  # a name, not a wrapped description
        if not m:
            continue
        depth = len(m.group(1)) // 2 - 1
        del stack[depth:]
        found.add(
            "/".join([*stack, m.group(2).rstrip("/")]) + ("/" if m.group(2).endswith("/") else "")
        )
        if m.group(2).endswith("/"):
            stack.append(m.group(2).rstrip("/"))
    return found


def _present() -> set[str]:
    """Modules and packages of pipeline/, and data folders (not what they hold)."""
    names = set()
    for path in PACKAGE.rglob("*"):
        rel = path.relative_to(PACKAGE)
        inside_data = any(
            not (PACKAGE / Path(*rel.parts[:i]) / "__init__.py").exists()
            for i in range(1, len(rel.parts))
        )
        if "__pycache__" in rel.parts or inside_data:
            continue
        if path.is_dir():
            names.add(rel.as_posix() + "/")
        elif path.suffix in (".py", ".css") and path.name != "__init__.py":
            names.add(rel.as_posix())
    return names


def _modules() -> dict[str, Path]:
    return {
        ".".join(p.relative_to(ROOT).with_suffix("").parts).removesuffix(".__init__"): p
        for p in PACKAGE.rglob("*.py")
        if "__pycache__" not in p.parts
    }


def _imports(path: Path, modules: dict[str, Path]) -> set[str]:
    """The pipeline modules a file imports, anywhere in it (inside functions too)."""
    found = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom) and node.module and node.module.startswith("pipeline"):
            for alias in node.names:
                full = f"{node.module}.{alias.name}"
                found.add(full if full in modules else node.module)
        elif isinstance(node, ast.Import):
            found |= {a.name for a in node.names if a.name.startswith("pipeline")}
    return {m for m in found if m in modules and m != "pipeline"}


def _part(module: str) -> tuple[str, str | None]:
    """(floor, stage) of a module: pipeline.stages.link.persons -> ("stages", "link")."""
    parts = module.split(".")[1:]
    if parts[0] == "stages":
        return "stages", parts[1] if len(parts) > 1 else None
    return parts[0], None


def test_developers_layout_matches_the_package():
    assert _documented() == _present()


def test_imports_keep_to_the_floors():
    modules = _modules()
    wrong = []
    for name, path in modules.items():
        if name in ("pipeline",) or name.endswith("__init__"):
            continue
        floor, stage = _part(name)
        for target in _imports(path, modules):
            t_floor, t_stage = _part(target)
            if t_floor == "stages" and floor == "stages":
                if t_stage != stage:
                    wrong.append(f"{name} imports another stage: {target}")
            elif t_floor not in ALLOWED[floor]:
                wrong.append(f"{name} ({floor}) imports {target} ({t_floor})")
    assert wrong == []


def test_no_import_circle():
    modules = _modules()
    graph = {name: _imports(path, modules) for name, path in modules.items()}
    circles, state = [], {}

    def visit(node: str, trail: list[str]) -> None:
        state[node] = "open"
        for nxt in sorted(graph.get(node, ())):
            if state.get(nxt) == "open":
                circles.append(" -> ".join([*trail[trail.index(nxt) :], nxt]))
            elif nxt not in state:
                visit(nxt, [*trail, nxt])
        state[node] = "done"

    for name in sorted(graph):
        if name not in state:
            visit(name, [name])
    assert circles == []


@pytest.mark.parametrize("floor", ["core"])
def test_core_has_no_duckdb(floor):
    users = [
        p.name
        for p in (PACKAGE / floor).rglob("*.py")
        if re.search(r"^\s*import duckdb", p.read_text(), re.M)
    ]
    assert users == []
