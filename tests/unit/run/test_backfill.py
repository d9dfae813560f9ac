"""Tests for pipeline.run.backfill: which months of a range still need a run.

Outside fact: the months of a range are the Gregorian calendar's (Python's ``calendar`` counts
them: 12 per year), inclusive of both ends; a month counts as done only when the warehouse
lists its run and its exports folder exists (the project's rule, README "Backfill").
"""

from __future__ import annotations

import duckdb

from pipeline.core.periods import Period
from pipeline.run.backfill import finish_interrupted, months_to_run, published_periods
from pipeline.warehouse.connection import WAREHOUSE_FILE


def warehouse_with_runs(out, periods):
    out.mkdir(parents=True, exist_ok=True)
    con = duckdb.connect(str(out / WAREHOUSE_FILE))
    con.execute("create table runs (period varchar)")
    con.executemany("insert into runs values (?)", [[p] for p in periods])
    con.close()


def test_an_empty_folder_runs_every_month_of_the_range(tmp_path):
    months = months_to_run(tmp_path, Period.parse("2024-11"), Period.parse("2025-02"), force=False)
    assert [(p.label, skip) for p, skip in months] == [
        ("2024-11", False), ("2024-12", False), ("2025-01", False), ("2025-02", False)
    ]  # fmt: skip
    assert published_periods(tmp_path) == set() and finish_interrupted(tmp_path) == []


def test_a_published_month_with_its_exports_is_skipped_unless_forced(tmp_path):
    warehouse_with_runs(tmp_path, ["2025-01", "2025-02", "2025-02"])
    (tmp_path / "2025-01").mkdir()  # 2025-02 committed but its exports never moved into place
    assert published_periods(tmp_path) == {"2025-01", "2025-02"}
    months = months_to_run(tmp_path, Period.parse("2024-12"), Period.parse("2025-02"), force=False)
    assert [(p.label, skip) for p, skip in months] == [
        ("2024-12", False), ("2025-01", True), ("2025-02", False)
    ]  # fmt: skip
    forced = months_to_run(tmp_path, Period.parse("2024-12"), Period.parse("2025-02"), force=True)
    assert not any(skip for _, skip in forced)


def test_a_whole_year_is_twelve_runs(tmp_path):
    assert (
        len(months_to_run(tmp_path, Period.parse("2024-01"), Period.parse("2024-12"), False)) == 12
    )


def test_a_warehouse_without_runs_has_nothing_published(tmp_path):
    con = duckdb.connect(str(tmp_path / WAREHOUSE_FILE))
    con.execute("create table other (x int)")
    con.close()
    assert published_periods(tmp_path) == set()
