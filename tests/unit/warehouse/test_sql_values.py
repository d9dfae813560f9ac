"""No value enters SQL text by formatting (DEVELOPERS.md, "SQL text and values").

Every f-string or ``.format()`` that reaches a query call in pipeline/ may interpolate only a
name passed through :func:`pipeline.warehouse.sql_files.checked_name`, or one of the listed
fragments below, each with the reason it is safe. Values (dates, periods, numbers, paths, text)
are bound parameters. The scan follows an f-string assigned to a local name and then passed to
the call, one step.
"""

from __future__ import annotations

import ast
import re
from pathlib import Path

import pytest

from pipeline.warehouse.sql_files import _NAME, checked_name

PACKAGE = Path(__file__).resolve().parents[3] / "pipeline"
#: Calls whose first argument (fetch_frame, with_frame: the second) is SQL text.
SQL_CALLS = {
    "execute": 0,
    "executemany": 0,
    "sql": 0,
    "query": 0,
    "fetch_frame": 1,
    "with_frame": 2,
    "measure_query": 1,  # the rows the measure SQL runs over
    "sql_over": 1,  # the inputs put in front of a file of sql/
}

#: The fragments formatted into SQL that are not names: (module, expression) -> why it is safe.
FRAGMENTS = {
    ("run/revisions.py", "cols"): "quoted column names read from the catalog of the same table",
    ("stages/link/shards.py", "shard_expression()"): "a constant expression with a bound $shards",
    (
        "stages/measure.py",
        "near_changed(changed)",
    ): "a constant predicate over a checked name",
    (
        "stages/validate.py",
        "these_files",
    ): "a constant predicate over the checked name of the judged files",
    ("stages/validate.py", "changed"): "the constant name changed_versions",
    ("stages/link/stage.py", "rows"): "a query built just above from checked column names",
    ("stages/link/shards.py", "among"): "a semi join on a checked table name, or nothing",
    (
        "stages/link/persons.py",
        "query",
    ): "SQL text of a file in sql/ with checked names in front (sql_over)",
    (
        "warehouse/sql.py",
        "query",
    ): "SQL text of a file in sql/ with checked names in front (sql_over)",
    (
        "stages/validate.py",
        "query",
    ): "SQL text of a file in sql/ with checked names in front (sql_over)",
    (
        "stages/validate.py",
        "recount",
    ): "SQL text of a file in sql/ with checked names in front (sql_over)",
    (
        "stages/measure.py",
        "near_changed('measure_rows')",
    ): "a constant predicate over a checked name",
    (
        "stages/measure.py",
        "sql",
    ): "SQL of sql/derived/kidney_measures.sql with its inputs in front (sql_over)",
    (
        "warehouse/measure_sql.py",
        "sql",
    ): "SQL of sql/derived/kidney_measures.sql with its inputs in front (sql_over)",
    ("stages/measure.py", "stored"): "a constant query built just above",
    ("stages/measure.py", "differs"): "a predicate over the module's constant MEASURE_COLUMNS",
    ("stages/publish.py", "query"): "a query built just above from a checked table name",
    ("stages/publish.py", "parquet"): "constant COPY options",
    ("stages/publish.py", "marked"): "the query above with a bound $notice column",
    ("stages/publish.py", "order"): "the table's key columns from the published-table catalog",
    (
        "stages/quality_gate.py",
        "base",
    ): "a constant FROM clause and a predicate from the gate's own list",
    (
        "stages/quality_gate.py",
        "columns",
    ): "casts of the standard columns to their types (constants)",
    ("stages/quality_gate.py", "predicate"): "a predicate from the gate's own constant list",
    (
        "warehouse/catalog.py",
        "_quote(text)",
    ): "COMMENT ON takes no parameter; our own catalog text, quoted",
    (
        "warehouse/catalog.py",
        "_quote(str(description))",
    ): "COMMENT ON takes no parameter; our catalog text, quoted",
    ("warehouse/connection.py", "dtype"): "a DuckDB type name taken from a relation's own types",
    ("warehouse/sql.py", "sql"): "SQL text read from a file in sql/",
    ("warehouse/versions.py", "seed"): "a query given by the caller in code (no value inside)",
    ("warehouse/versions.py", "columns"): "one of two constant column lists",
}


def _calls(tree: ast.AST):
    for node in ast.walk(tree):
        if isinstance(node, ast.Call):
            fn = node.func
            name = fn.attr if isinstance(fn, ast.Attribute) else getattr(fn, "id", None)
            if name in SQL_CALLS and len(node.args) > SQL_CALLS[name] - (
                1 if name == "with_frame" else 0
            ):
                index = SQL_CALLS[name] if name != "with_frame" else 2
                if index < len(node.args):
                    yield node, node.args[index]


def _assigned_fstrings(func: ast.AST) -> dict[str, list[ast.AST]]:
    found: dict[str, list[ast.AST]] = {}
    for node in ast.walk(func):
        if (
            isinstance(node, ast.Assign)
            and len(node.targets) == 1
            and isinstance(node.targets[0], ast.Name)
        ):
            found.setdefault(node.targets[0].id, []).append(node.value)
    return found


def _interpolations(expr: ast.AST, local: dict[str, list[ast.AST]], depth: int = 0):
    """What ``expr`` formats into SQL text: each interpolated expression, judged as a whole (a
    nested f-string or conditional is looked into; a local name is followed to its value once).
    """
    stack = [expr]
    while stack:
        node = stack.pop()
        if isinstance(node, ast.FormattedValue):
            value = node.value
            if isinstance(value, (ast.JoinedStr, ast.IfExp)):
                stack.append(value)
            else:
                yield value
                if isinstance(value, ast.Name) and depth == 0 and value.id in local:
                    for assigned in local[value.id]:
                        yield from _interpolations(assigned, local, depth + 1)
        elif (
            isinstance(node, ast.Call)
            and isinstance(node.func, ast.Attribute)
            and node.func.attr == "format"
        ):
            yield from (k.value for k in node.keywords)
            yield from node.args
            stack.append(node.func.value)
        elif isinstance(node, ast.Name) and depth == 0 and node.id in local:
            for assigned in local[node.id]:
                yield from _interpolations(assigned, local, depth + 1)
        else:
            stack.extend(ast.iter_child_nodes(node))


def _is_checked(node: ast.AST) -> bool:
    return isinstance(node, ast.Call) and getattr(node.func, "id", None) == "checked_name"


def _is_plain_name(node: ast.AST) -> bool:
    return (
        isinstance(node, ast.Constant)
        and isinstance(node.value, str)
        and bool(_NAME.match(node.value))
    )


def _is_safe(node: ast.AST, safe: set[str]) -> bool:
    """A checked name, a keyword-like literal ("view", "temp table"), a name that holds one, or
    an f-string or conditional made only of those.
    """
    if _is_checked(node) or isinstance(node, ast.Name) and node.id in safe:
        return True
    if isinstance(node, ast.Constant) and isinstance(node.value, str):
        return bool(re.fullmatch(r"[a-z_ ,.$]*", node.value))
    if isinstance(node, ast.JoinedStr):
        return all(
            _is_safe(v.value if isinstance(v, ast.FormattedValue) else v, safe) for v in node.values
        )
    if isinstance(node, ast.IfExp):
        return _is_safe(node.body, safe) and _is_safe(node.orelse, safe)
    return False


def _safe_names(tree: ast.Module, func: ast.AST) -> set[str]:
    """Names that hold only checked names and keywords: every assignment of them (in ``func``,
    or at module level) is such a value.
    """
    values: dict[str, list[ast.AST]] = {}
    for scope in (tree.body, list(ast.walk(func))):
        for node in scope:
            if (
                isinstance(node, ast.Assign)
                and len(node.targets) == 1
                and isinstance(node.targets[0], ast.Name)
            ):
                values.setdefault(node.targets[0].id, []).append(node.value)
    safe: set[str] = set()
    while True:  # a name built from other safe names
        more = {
            n for n, vs in values.items() if n not in safe and all(_is_safe(v, safe) for v in vs)
        }
        if not more:
            return safe
        safe |= more


def _findings() -> list[str]:
    out = []
    for path in sorted(PACKAGE.rglob("*.py")):
        module = path.relative_to(PACKAGE).as_posix()
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for func in [n for n in ast.walk(tree) if isinstance(n, ast.FunctionDef)]:
            local = _assigned_fstrings(func)
            safe = _safe_names(tree, func)
            for call, sql in _calls(func):
                for value in _interpolations(sql, local):
                    text = ast.unparse(value)
                    if _is_checked(value) or (module, text) in FRAGMENTS:
                        continue
                    if isinstance(value, ast.Name) and value.id in safe:
                        continue
                    out.append(f"{module}:{call.lineno}: {text}")
    return sorted(set(out))


def test_only_checked_names_and_listed_fragments_are_formatted_into_sql():
    assert _findings() == []


def test_every_listed_fragment_is_still_there():
    """The exceptions list does not outlive the code it excuses."""
    seen = set()
    for path in sorted(PACKAGE.rglob("*.py")):
        module = path.relative_to(PACKAGE).as_posix()
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for func in [n for n in ast.walk(tree) if isinstance(n, ast.FunctionDef)]:
            local = _assigned_fstrings(func)
            for _call, sql in _calls(func):
                seen |= {(module, ast.unparse(v)) for v in _interpolations(sql, local)}
    assert set(FRAGMENTS) <= seen, sorted(set(FRAGMENTS) - seen)


@pytest.mark.parametrize("name", ["kidney_events", "published.district_ckd_prevalence", "stash_x1"])
def test_checked_name_passes_plain_names(name):
    assert checked_name(name) == name


@pytest.mark.parametrize(
    "name",
    ["x; drop table runs", "a.b.c", "Runs", "", "1abc", "x'--", 'x"', "x y", "a.", "é"],
)
def test_checked_name_refuses_anything_else(name):
    with pytest.raises(ValueError, match="not a plain relation name"):
        checked_name(name)
