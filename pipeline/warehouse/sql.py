"""The SQL runner: builds a table or view from its file in sql/, with bound parameters, and
replaces one period's rows of a period-keyed table.
"""

from __future__ import annotations

import re
from typing import Any

import duckdb
import polars as pl

from pipeline.warehouse.connection import drop_relation, with_frame
from pipeline.warehouse.sql_files import _NAME, checked_name, read_sql


def build_table(
    con: duckdb.DuckDBPyConnection,
    name: str,
    target: str | None = None,
    params: dict[str, Any] | None = None,
    temporary: bool = False,
) -> int:
    """Run ``sql/*/<name>.sql`` into a table (``target`` defaults to ``name``); return its rows.

    ``temporary``: a temporary table of this connection (a run's transient work: it is never
    written to the warehouse file, which inside the run's transaction costs several times more,
    and it is gone when the connection closes).
    """
    target = target or name
    if not all(_NAME.match(part) for part in target.split(".")) or (temporary and "." in target):
        raise ValueError(f"not a plain table name: {target!r}")
    sql, used = _sql_with_params(name, params)
    kind = "temp table" if temporary else "table"
    con.execute(f"create or replace {kind} {checked_name(target, qualified=True)} as\n{sql}", used)
    return con.execute(f"select count(*) from {checked_name(target, qualified=True)}").fetchall()[
        0
    ][0]


def sql_over(name: str, inputs: dict[str, str]) -> str:
    """The query of ``sql/*/<name>.sql`` with the relations it reads defined in front of it, as
    common table expressions (``inputs``: relation name -> a query, or the name of another SQL
    file to inline, given as ``"sql:<file>"``). A CTE shadows a table of the same name, so the
    file runs unchanged over, say, one frame instead of a whole table.

    The file must be one query that starts (after its comments) with ``with``.
    """
    body = re.sub(r"\A(\s*--[^\n]*\n)*\s*", "", read_sql(name))
    if not body[:5].lower() == "with ":
        raise ValueError(f"sql/*/{name}.sql does not start with a WITH clause")
    parts = []
    for relation, query in inputs.items():
        if not _NAME.match(relation):
            raise ValueError(f"not a plain relation name: {relation!r}")
        text = read_sql(query[4:]) if query.startswith("sql:") else query
        parts.append(f"{relation} as (\n{text}\n)")
    return "with " + ",\n".join(parts) + ",\n" + body[5:]


def build_view(con: duckdb.DuckDBPyConnection, name: str) -> None:
    """Define ``sql/*/<name>.sql`` as a view (replacing a table or view of that name)."""
    sql, used = _sql_with_params(name, None)
    drop_relation(con, name)
    con.execute(f"create view {checked_name(name)} as\n{sql}")


def _sql_with_params(name: str, params: dict[str, Any] | None) -> tuple[str, dict[str, Any]]:
    """The SQL of a table and the parameters it uses (a $name in a comment is not one)."""
    sql = read_sql(name)
    code = re.sub(r"--[^\n]*", "", sql)
    return sql, {k: v for k, v in (params or {}).items() if re.search(rf"\${k}\b", code)}


def replace_period_frame(
    con: duckdb.DuckDBPyConnection, name: str, period: str, frame: pl.DataFrame
) -> int:
    """Replace this period's rows of a per-period table by ``frame``, keeping the other periods."""
    if not _NAME.match(name):
        raise ValueError(f"not a plain table name: {name!r}")
    with_frame(
        con,
        frame,
        f"create or replace temp table {checked_name(name + '_new')} as select * from _frame",
    )
    return swap_period_rows(con, name, period)


def replace_period_rows(
    con: duckdb.DuckDBPyConnection, name: str, period: str, params: dict
) -> int:
    """Rebuild this period's rows of a per-period table, keeping the other periods."""
    build_table(con, name, f"{name}_new", params, temporary=True)
    return swap_period_rows(con, name, period)


def swap_period_rows(con: duckdb.DuckDBPyConnection, name: str, period: str) -> int:
    """Replace this period's rows of ``name`` by the temporary table ``<name>_new``."""
    exists = con.execute(
        "select count(*) from duckdb_tables() where schema_name = 'main' and table_name = ?", [name]
    ).fetchall()[0][0]
    if not exists:
        con.execute(f"create table {checked_name(name)} as select * from {checked_name(name)}_new")
    else:
        con.execute(f"delete from {checked_name(name)} where period = ?", [period])
        con.execute(f"insert into {checked_name(name)} select * from {checked_name(name)}_new")
    rows = con.execute(f"select count(*) from {checked_name(name)}_new").fetchall()[0][0]
    con.execute(f"drop table {checked_name(name)}_new")
    return rows
