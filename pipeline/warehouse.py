"""The DuckDB warehouse: connection, ledger tables, reference tables and the SQL runner.

SQL lives in ``sql/`` as plain ``select`` statements, one file per table, the file name being
the table name; :func:`build_table` adds ``create or replace table``. Values reach SQL as
reference tables or bound parameters, never by string formatting; the only names put into SQL
text are the file names under ``sql/`` and the table names of ``sql/catalog.yaml``, both checked
against a plain-identifier pattern.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import duckdb
import polars as pl
import pyarrow as pa
import yaml

from pipeline.equations import KDIGO_GFR_LOWER_BOUNDS, KDIGO_RISK
from pipeline.settings import Settings

SQL_DIR = Path(__file__).resolve().parent.parent / "sql"
WAREHOUSE_FILE = "surveillance.duckdb"
_NAME = re.compile(r"^[a-z][a-z0-9_]{0,62}$")
LEDGER_TABLES = (
    "ingest_files",
    "result_versions",
    "rejected_rows",
    "runs",
    "link_snapshots",
    "key_check",
    "result_versions_replaced",
    "rejected_rows_replaced",
    "reprocess_log",
)


def sql_path(name: str) -> Path:
    """The file of a table in sql/ (any layer)."""
    if not _NAME.match(name):
        raise ValueError(f"not a plain table name: {name!r}")
    matches = sorted(SQL_DIR.glob(f"*/{name}.sql"))
    if len(matches) != 1:
        raise FileNotFoundError(f"expected one sql/*/{name}.sql, found {len(matches)}")
    return matches[0]


def read_sql(name: str) -> str:
    return sql_path(name).read_text(encoding="utf-8")


def connect(path: Path | str, memory_limit: str = "2GB") -> duckdb.DuckDBPyConnection:
    """Open (or create) a warehouse file with the ledger tables in place."""
    path = Path(path)
    con = duckdb.connect(str(path))
    temp_dir = path.parent / ".duckdb_tmp" if str(path) != ":memory:" else None
    con.execute(f"set memory_limit = '{memory_limit}'")
    if temp_dir is not None:
        temp_dir.mkdir(parents=True, exist_ok=True)
        con.execute("set temp_directory = ?", [str(temp_dir)])
    con.execute("set preserve_insertion_order = true")
    ensure_schema(con)
    return con


def ensure_schema(con: duckdb.DuckDBPyConnection) -> None:
    for schema in ("staging", "reference", "published"):
        con.execute(f"create schema if not exists {schema}")
    for table in LEDGER_TABLES:
        con.execute(read_sql(table))
    # columns added after a table was first written (warehouses made by an earlier version)
    con.execute("alter table ingest_files add column if not exists extract_month varchar")
    con.execute("alter table ingest_files add column if not exists config_sha256 varchar")
    con.execute("alter table runs add column if not exists revision integer")
    con.execute("alter table runs add column if not exists revision_reason varchar")


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
    con.execute(f"create or replace {'temp ' if temporary else ''}table {target} as\n{sql}", used)
    return con.execute(f"select count(*) from {target}").fetchall()[0][0]


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
    con.execute(f"create view {name} as\n{sql}")


def _sql_with_params(name: str, params: dict[str, Any] | None) -> tuple[str, dict[str, Any]]:
    """The SQL of a table and the parameters it uses (a $name in a comment is not one)."""
    sql = read_sql(name)
    code = re.sub(r"--[^\n]*", "", sql)
    return sql, {k: v for k, v in (params or {}).items() if re.search(rf"\${k}\b", code)}


def load_reference_tables(con: duckdb.DuckDBPyConnection, settings: Settings) -> None:
    """Write the config the SQL needs as tables in schema ``reference`` (replaced every run)."""
    analytes = settings.analytes.analytes
    frames = {
        "analytes": pl.DataFrame(
            [{"analyte": n, "canonical_unit": a.canonical_unit, "result_type": a.result_type,
              "description": a.description} for n, a in analytes.items()],
            schema_overrides={"canonical_unit": pl.String},
        ),
        "ordinal_readings": pl.DataFrame(
            [{"analyte": n, "spelling": k.strip().lower(), "reading": v}
             for n, a in analytes.items() for k, v in a.readings.items()],
            schema={"analyte": pl.String, "spelling": pl.String, "reading": pl.String},
        ),
        "analyte_codes": pl.DataFrame(
            [{"loinc": c, "analyte": n, "is_fasting_code": c in a.fasting_loinc}
             for n, a in analytes.items() for c in a.loinc]
        ),
        "unit_factors": pl.DataFrame(
            [{"analyte": n, "unit": u, "factor": f.factor, "offset": f.offset,
              "is_canonical": u == a.canonical_unit, "factor_source": f.source}
             for n, a in analytes.items() for u, f in a.units.items()],
            schema_overrides={"factor_source": pl.String},
        ),
        "ranges": pl.DataFrame(
            [{"analyte": n, "min_value": r.min, "max_value": r.max, "range_source": r.source}
             for n, r in settings.pipeline.ranges.items()]
        ),
        "unit_aliases": pl.DataFrame(
            [{"source_id": "*", "alias_key": k, "unit": v} for k, v in settings.analytes.unit_aliases.items()]
            + [{"source_id": s.id, "alias_key": k.strip().lower().replace("µ", "u").replace("μ", "u"), "unit": v}
               for s in settings.sources for k, v in s.unit_aliases.items()]
        ),
        "districts": pl.DataFrame(
            [{"district_code": c, "district_name": n} for c, n in settings.districts.items()]
        ),
        "population": pl.DataFrame(settings.population).select(
            "district_code", "sex", "age_band", pl.col("population").cast(pl.Int64)
        ),
        "age_bands": _age_bands(settings.pipeline.summaries.age_bands),
        "gfr_categories": _gfr_categories(),
        "gfr_categories_ordered": _gfr_categories().with_row_index("band_order"),
        "kdigo_risk": pl.DataFrame(
            [{"g_category": g, "a_category": a, "risk_category": r} for (g, a), r in KDIGO_RISK.items()]
        ),
    }  # fmt: skip
    for name, frame in frames.items():
        with_frame(con, frame, f"create or replace table reference.{name} as select * from _frame")


def _gfr_categories() -> pl.DataFrame:
    """KDIGO GFR categories as [lower, upper) bounds, from the one table in pipeline.equations."""
    rows, upper = [], float("inf")
    for category, lower in KDIGO_GFR_LOWER_BOUNDS:
        rows.append({"g_category": category, "lower_bound": lower, "upper_bound": upper})
        upper = lower
    return pl.DataFrame(rows)


def _age_bands(lower_bounds: list[int]) -> pl.DataFrame:
    rows = []
    for i, low in enumerate(lower_bounds):
        high = lower_bounds[i + 1] - 1 if i + 1 < len(lower_bounds) else None
        rows.append(
            {
                "age_band": f"{low}-{high}" if high is not None else f"{low}+",
                "age_min": low,
                "age_max": high if high is not None else 200,
                "band_order": i,
            }
        )
    return pl.DataFrame(rows)


def load_catalog() -> dict[str, Any]:
    with (SQL_DIR / "catalog.yaml").open(encoding="utf-8") as fh:
        return yaml.safe_load(fh)["tables"]


def relation_kind(con: duckdb.DuckDBPyConnection, name: str) -> str | None:
    """'table', 'view' or None for a name in schema main."""
    found = con.execute(
        "select 'table' from duckdb_tables() where database_name = current_database() "
        "and schema_name = 'main' and table_name = $n "
        "union all select 'view' from duckdb_views() where database_name = current_database() "
        "and schema_name = 'main' and view_name = $n and not internal",
        {"n": name},
    ).fetchall()
    return found[0][0] if found else None


def with_frame(
    con: duckdb.DuckDBPyConnection, frame: Any, sql: str, batch_rows: int | None = None
) -> None:
    """Run one statement ``sql`` in which ``frame`` (a polars frame or an Arrow table) is the
    table ``_frame``: ``create ... as select * from _frame``, ``insert into t select ... from _frame``.

    Through a relation's ``query``, not ``register()``: inside a transaction (a run is one) a
    registered frame stays in memory until the transaction ends, even after ``unregister``.
    Measured with DuckDB 2.0.1: 60 inserts of 170k rows through ``register`` grew the process by
    2.3 GB, through a relation by nothing (tests/unit/test_warehouse_frames.py).

    ``batch_rows``: hand the frame over in record batches of that many rows (zero-copy
    slices). DuckDB scans an Arrow table batch by batch, so a query doing real work over one
    batch uses one core: judging 12 files of 170k rows took 4.7–5.1 s in one batch each and
    3.7–4.0 s in batches of 32k. A plain insert into a stored table is slower in small batches
    (the 10M measure writes went from about 10 to 16 s), so it is not the default.
    """
    table = frame.to_arrow() if isinstance(frame, pl.DataFrame) else frame
    if batch_rows and table.num_rows > batch_rows:
        table = pa.Table.from_batches(
            table.to_batches(max_chunksize=batch_rows), schema=table.schema
        )
    con.from_arrow(table).query("_frame", sql)


def add_missing_columns(
    con: duckdb.DuckDBPyConnection, schema: str, name: str, frame: pl.DataFrame
) -> None:
    """A table written by an earlier version gets the columns of ``frame`` it lacks (empty for
    its earlier rows); a table that does not exist yet is left alone.
    """
    if not (_NAME.match(schema) and _NAME.match(name)):
        raise ValueError(f"not a plain table name: {schema}.{name}")
    have = {c for (c,) in con.execute(
        "select column_name from duckdb_columns() where schema_name = ? and table_name = ?", [schema, name]
    ).fetchall()}  # fmt: skip
    if not have:
        return
    wanted = con.from_arrow(frame.head(0).to_arrow())
    for column, dtype in zip(wanted.columns, wanted.types, strict=False):
        if column not in have:
            con.execute(f'alter table {schema}.{name} add column "{column}" {dtype}')


def drop_relation(con: duckdb.DuckDBPyConnection, name: str) -> None:
    """Drop the table or view ``name`` of schema main, if there is one (an intermediate table is
    a view in some runs, a table in others; CREATE OR REPLACE does not change the kind).
    """
    if not _NAME.match(name):
        raise ValueError(f"not a plain table name: {name!r}")
    kind = relation_kind(con, name)
    if kind:
        con.execute(f"drop {kind} {name}")


def apply_comments(con: duckdb.DuckDBPyConnection) -> None:
    """Write the catalog's descriptions as COMMENTs on every table, view and column it documents."""
    existing = {
        (s, t): "table"
        for s, t in con.execute(
            "select schema_name, table_name from duckdb_tables() where database_name = current_database()"
        ).fetchall()
    }
    existing.update({
        (s, t): "view" for s, t in con.execute(
            "select schema_name, view_name from duckdb_views() where database_name = current_database() "
            "and not internal and not temporary"
        ).fetchall()
    })  # fmt: skip
    for qualified, entry in load_catalog().items():
        schema, _, table = qualified.rpartition(".")
        schema = schema or "main"
        if (schema, table) not in existing:
            continue
        target = f"{schema}.{table}"
        if not all(_NAME.match(p) for p in (schema, table)):
            raise ValueError(f"catalog.yaml: not a plain table name {qualified!r}")
        text = f"{entry['description'].strip()} Grain: {entry['grain'].strip()}"
        con.execute(f"comment on {existing[(schema, table)]} {target} is {_quote(text)}")
        columns = {
            c
            for (c,) in con.execute(
                "select column_name from duckdb_columns() where schema_name = ? and table_name = ?",
                [schema, table],
            ).fetchall()
        }
        for column, description in (entry.get("columns") or {}).items():
            if column in columns:
                con.execute(f'comment on column {target}."{column}" is {_quote(str(description))}')


def _quote(text: str) -> str:
    # COMMENT ON does not take bound parameters; the text comes from our own catalog file.
    return "'" + text.replace("'", "''") + "'"


def replace_period_frame(
    con: duckdb.DuckDBPyConnection, name: str, period: str, frame: pl.DataFrame
) -> int:
    """Replace this period's rows of a per-period table by ``frame``, keeping the other periods."""
    if not _NAME.match(name):
        raise ValueError(f"not a plain table name: {name!r}")
    with_frame(con, frame, f"create or replace temp table {name}_new as select * from _frame")
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
        con.execute(f"create table {name} as select * from {name}_new")
    else:
        con.execute(f"delete from {name} where period = ?", [period])
        con.execute(f"insert into {name} select * from {name}_new")
    rows = con.execute(f"select count(*) from {name}_new").fetchall()[0][0]
    con.execute(f"drop table {name}_new")
    return rows


def fetch_frame(
    con: duckdb.DuckDBPyConnection, query: str, params: list | dict | None = None
) -> pl.DataFrame:
    """A query's result as a polars frame (through Arrow, no extra copy)."""
    return con.sql(query, params=params).pl()
