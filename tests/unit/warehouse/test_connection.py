"""Frames written into the warehouse inside a run's transaction are not kept alive by DuckDB.

A run is one transaction. A frame passed to ``con.register`` stays referenced by the connection
until the transaction ends, even after ``unregister`` (DuckDB 2.0.1, measured in the benchmark:
the ingest of 10M rows held every file's frame, several GB). ``with_frame`` goes through a
relation instead; these checks count the Python references to the Arrow table, which is exact
and does not depend on the machine's memory.
"""

from __future__ import annotations

import sys

import duckdb
import polars as pl
import pyarrow as pa
import pytest

from pipeline.warehouse.connection import with_frame


def test_with_frame_inserts_and_releases_the_frame_inside_a_transaction():
    con = duckdb.connect()
    con.execute("begin")
    table = pa.table({"a": list(range(1000)), "b": [str(i) for i in range(1000)]})
    before = sys.getrefcount(table)
    with_frame(con, table, "create temp table t as select * from _frame")
    with_frame(con, table, "insert into t select * from _frame")
    assert sys.getrefcount(table) == before  # nothing of DuckDB's still holds it
    assert con.execute("select count(*), count(distinct a) from t").fetchall() == [(2000, 1000)]
    con.execute("commit")


def test_with_frame_takes_a_polars_frame_and_by_name_inserts():
    con = duckdb.connect()
    con.execute("create table t (a integer, b varchar)")
    with_frame(
        con, pl.DataFrame({"b": ["x"], "a": [1]}), "insert into t by name select * from _frame"
    )
    assert con.execute("select a, b from t").fetchall() == [(1, "x")]


def test_register_is_what_with_frame_avoids():
    # the behaviour that with_frame exists for: if a DuckDB release stops holding registered
    # frames, this fails and with_frame could go back to register (the simpler call)
    con = duckdb.connect()
    con.execute("begin")
    table = pa.table({"a": list(range(1000))})
    before = sys.getrefcount(table)
    con.register("x", table)
    con.execute("create temp table t as select * from x")
    con.unregister("x")
    assert sys.getrefcount(table) > before
    con.execute("commit")


def test_batches_keep_the_rows_in_order_and_release_the_frame():
    """``batch_rows`` hands the frame over in slices; the rows keep their order and the table is
    released afterwards. Outside reference: DuckDB 2.0 documentation, "Order preservation"
    (SQL dialect): a SELECT from a single table, and an INSERT of it, keep the row order."""
    con = duckdb.connect()
    con.execute("begin")
    con.execute("create table t (a bigint)")
    table = pa.table({"a": list(range(100_000))})
    before = sys.getrefcount(table)
    with_frame(con, table, "insert into t select * from _frame", batch_rows=4096)
    assert sys.getrefcount(table) == before
    assert [a for (a,) in con.execute("select a from t").fetchall()] == list(range(100_000))
    con.execute("commit")


def test_sql_over_puts_inputs_in_front_of_a_sql_file():
    """The staging SQL run over a frame by name: a CTE shadows the table it names."""
    from pipeline.warehouse.sql import sql_over

    text = sql_over("results_validated", {"landed_rows": "select * from _frame",
                                              "landed_rows_typed": "sql:landed_rows_typed"})  # fmt: skip
    assert text.startswith(
        "with landed_rows as (\nselect * from _frame\n),\nlanded_rows_typed as ("
    )
    assert "from landed_rows_typed as s" in text
    with pytest.raises(ValueError, match="not a plain relation name"):
        sql_over("results_validated", {"x; drop": "select 1"})


def test_sql_over_a_file_that_starts_with_select_shadows_its_tables_too():
    """A file that is one SELECT (sql/derived/daily_values_averaged.sql) gets the inputs as a
    WITH clause in front of it, and runs over them instead of the tables they name."""
    from pipeline.warehouse.sql import sql_over

    text = sql_over("daily_values_averaged", {"measures_known": "select * from changed_rows"})
    assert text.startswith("with measures_known as (\nselect * from changed_rows\n)\nselect ")
    con = duckdb.connect()
    con.execute("create table measures_known as select 1 as x")  # would be read without the CTE
    con.execute("create table t as select 2 as x")
    assert con.execute(
        "with measures_known as (select * from t) select x from measures_known"
    ).fetchall() == [(2,)]  # a CTE's name hides a table's (SQL scoping; common practice)


def test_a_stage_can_run_under_a_share_of_the_memory_limit_and_gives_it_back():
    """memory_limit_within: DuckDB's limit is the share while the block runs (the ingest stage's
    two thirds) and the configured limit again after it, also when the block fails. DuckDB
    reads "GB" as 1000 MB and shows the limit in MiB/GiB (DuckDB docs, configuration: from
    memory)."""
    from pipeline.warehouse.connection import memory_limit_within, scaled_memory_limit

    assert scaled_memory_limit("1.5GB", 2 / 3) == "1000MB"
    assert scaled_memory_limit("1500MB", 0.5) == "750MB"
    with pytest.raises(ValueError, match="not a memory limit"):
        scaled_memory_limit("1.5 GiB", 0.5)
    con = duckdb.connect()
    con.execute("set memory_limit = '1.5GB'")

    def limit() -> str:
        return con.execute("select current_setting('memory_limit')").fetchall()[0][0]

    full = limit()
    with memory_limit_within(con, "1.5GB", 2 / 3):
        assert limit() == "953.6 MiB"  # 1000 MB
    assert limit() == full
    with pytest.raises(RuntimeError), memory_limit_within(con, "1.5GB", 0.5):
        raise RuntimeError("a stage fails")
    assert limit() == full
