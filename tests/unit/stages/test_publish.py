"""Tests for pipeline.stages.publish: the month is one transaction, the JSON documents are
standard JSON, and exports are staged apart from the published folder.

Outside facts: JSON (RFC 8259) read back by Python's ``json`` module; a DuckDB transaction not
committed leaves nothing behind (DuckDB documentation, "Transaction Management": ACID); a folder
mode 0o700 is readable by its owner only (POSIX permission bits, common practice).
"""

from __future__ import annotations

import json
import stat

import duckdb

from pipeline.core.periods import Period
from pipeline.stages.publish import commit_month, open_warehouse, quality_docs_dir, write_json
from pipeline.warehouse.connection import WAREHOUSE_FILE


def test_json_is_standard_sorted_and_written_whole(tmp_path):
    path = tmp_path / "summary.json"
    data = {"zeta": 1, "alpha": [1.5, None, "µmol/L"], "when": Period.parse("2026-01")}
    write_json(path, data)
    text = path.read_text(encoding="utf-8")
    assert json.loads(text) == {"alpha": [1.5, None, "µmol/L"], "when": "2026-01", "zeta": 1}
    assert text.index('"alpha"') < text.index('"when"') < text.index('"zeta"')
    assert text.endswith("\n") and not list(tmp_path.glob("*.tmp"))


def test_a_month_not_committed_leaves_nothing(tmp_path):
    out = tmp_path / "out"
    con = open_warehouse(out)
    con.execute("create table probe as select 1 as x")
    con.close()  # no commit: as if the run had stopped here
    assert stat.S_IMODE(out.stat().st_mode) == 0o700
    check = duckdb.connect(str(out / WAREHOUSE_FILE))
    assert check.execute(
        "select count(*) from duckdb_tables() where table_name = 'probe'"
    ).fetchall() == [(0,)]
    check.close()


def test_a_committed_month_is_kept(tmp_path):
    out = tmp_path / "out"
    con = open_warehouse(out)
    con.execute("create schema if not exists staging")
    con.execute("create table staging.landed_rows as select 1 as x")
    con.execute("create table probe as select 1 as x")
    commit_month(con)
    con.close()
    check = duckdb.connect(str(out / WAREHOUSE_FILE))
    names = {n for (n,) in check.execute("select table_name from duckdb_tables()").fetchall()}
    check.close()
    assert "probe" in names and "landed_rows" not in names  # transient staging is dropped


def test_data_docs_are_built_in_a_hidden_folder_of_the_period(tmp_path):
    folder = quality_docs_dir(tmp_path, Period.parse("2026-03"))
    assert folder.parent == tmp_path and folder.name == ".2026-03.quality"
