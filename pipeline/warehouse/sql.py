"""The SQL runner: builds a table or view from its file in sql/, with bound parameters, and
replaces one period's rows of a period-keyed table.
"""

from __future__ import annotations

import re
from typing import Any

import duckdb
import polars as pl

from pipeline.core.pseudonymise import person_range
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

    The file must be one query (starting, after its comments, with ``with`` or ``select``).
    """
    body = re.sub(r"\A(\s*--[^\n]*\n)*\s*", "", read_sql(name))
    starts_with = body[:5].lower() == "with "
    if not starts_with and body[:7].lower() != "select ":
        raise ValueError(f"sql/*/{name}.sql does not start with a WITH clause or a SELECT")
    parts = []
    for relation, query in inputs.items():
        if not _NAME.match(relation):
            raise ValueError(f"not a plain relation name: {relation!r}")
        text = read_sql(query[4:]) if query.startswith("sql:") else query
        parts.append(f"{relation} as (\n{text}\n)")
    if not starts_with:  # the common table expressions in front of the whole query
        return "with " + ",\n".join(parts) + "\n" + body
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


#: Daily values per person-key range of the event rules (sql/analysis/kidney_events.sql): a
#: large warehouse runs them one range at a time, so that one statement's windows and joins stay
#: within DuckDB's memory limit (at 30M results one whole pass ran out at its 2 GB limit).
DAILY_VALUES_PER_RANGE = 4_000_000


def ranges_for(rows: int, per_range: int | None = None) -> int:
    """How many person-key ranges keep each within ``per_range`` rows (at least one; by default
    :data:`DAILY_VALUES_PER_RANGE`).
    """
    return max(1, -(-rows // (per_range or DAILY_VALUES_PER_RANGE)))


def in_person_range(
    sources: dict[str, str], params: dict, chunk: int, chunks: int
) -> tuple[dict[str, str], dict]:
    """The inputs of :func:`sql_over` that keep only one person-key range's rows
    (:func:`pipeline.core.pseudonymise.person_range`; ``sources``: relation the SQL reads ->
    relation it reads from) and ``params`` with the range's bounds.

    The first range has no lower bound (and takes a missing key) and the last no upper one, so
    every row, whatever the form of its key, falls in exactly one range, as in one whole pass.
    """
    lower, upper = person_range(chunk, chunks)
    where = _RANGE_FILTER[(chunk > 0, chunk + 1 < chunks)]
    inputs = {
        relation: f"select * from {checked_name(source)}{where}"
        for relation, source in sources.items()
    }
    return inputs, {**params, "lower": lower, "upper": upper}


def used_params(query: str, params: dict) -> dict:
    """The parameters ``query`` names (a $name in a comment is not one)."""
    code = re.sub(r"--[^\n]*", "", query)
    return {k: v for k, v in params.items() if re.search(rf"\${k}\b", code)}


def replace_period_rows_by_range(
    con: duckdb.DuckDBPyConnection,
    name: str,
    period: str,
    params: dict,
    inputs: tuple[str, ...],
    chunks: int,
) -> int:
    """Rebuild this period's rows of a per-period, per-person table one person-key range at a
    time (:func:`in_person_range`), keeping the other periods.

    ``inputs``: the relations the SQL reads per person (each is read through a common table
    expression of the same name that keeps only the range's persons, so the file runs
    unchanged). Its rows must depend on one person's rows only and be ordered by
    ``person_key`` first, so the ranges, taken in order, give the rows of one whole build in
    the same order.
    """
    if not _NAME.match(name):
        raise ValueError(f"not a plain table name: {name!r}")
    target = checked_name(f"{name}_new")
    chunks = max(1, chunks)
    for chunk in range(chunks):
        ranged, bound = in_person_range({r: r for r in inputs}, params, chunk, chunks)
        query = sql_over(name, ranged)
        verb = f"insert into {target}" if chunk else f"create or replace temp table {target} as"
        con.execute(f"{verb}\n{query}", used_params(query, bound))
    return swap_period_rows(con, name, period)


#: The filter of a person-key range: (has a lower bound, has an upper bound) -> WHERE clause.
_RANGE_FILTER = {
    (False, False): "",
    (True, False): " where person_key >= $lower",
    (False, True): " where (person_key < $upper or person_key is null)",
    (True, True): " where person_key >= $lower and person_key < $upper",
}


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
