"""Tests for pipeline.run.period_checks: the months a delivery may be named after, and the
period's own counts from the ledger.

Outside facts: a quarter is three consecutive calendar months and the month before January is
December of the previous year (Gregorian calendar; Python's ``datetime`` is the reference);
per file, rows read = the sum of the rows of every outcome (row accounting, common practice of
reconciliation: nothing lost, nothing counted twice).
"""

from __future__ import annotations

import datetime as dt

import duckdb
import pytest

from pipeline.core.periods import Period
from pipeline.run.period_checks import (
    PERIOD_COLUMNS,
    _months_back,
    outside_period_lines,
    period_counts,
)


def month_before(label: str) -> str:
    first = dt.date.fromisoformat(label + "-01") - dt.timedelta(days=1)
    return first.strftime("%Y-%m")


@pytest.mark.parametrize("label", ["2026-01", "2026-02", "2026-03", "2025-12", "2024-03"])
def test_a_quarterly_source_may_name_any_of_the_last_three_months(label):
    expected = [label, month_before(label), month_before(month_before(label))]
    assert _months_back(Period.parse(label), "quarterly") == expected
    assert _months_back(Period.parse(label), "monthly") == [label]


def test_the_period_counts_add_up_per_source():
    con = duckdb.connect()
    con.execute(
        "create table ingest_files (source_id varchar, run_period varchar, status varchar, "
        "rows_read bigint, rows_accepted bigint, rows_rejected bigint, rows_superseded bigint, "
        "rows_duplicate bigint, rows_withdrawn bigint, rows_pending bigint)"
    )
    con.executemany(
        "insert into ingest_files values (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
        [
            ["lab_a", "2026-01", "ingested", 10, 6, 1, 1, 1, 0, 1],
            ["lab_a", "2026-01", "held_back", 4, 0, 0, 0, 0, 0, 0],
            ["lab_b", "2026-01", "ingested", 3, 3, 0, 0, 0, 0, 0],
            ["lab_b", "2025-12", "ingested", 99, 99, 0, 0, 0, 0, 0],  # another period
        ],
    )
    got = period_counts(con, Period.parse("2026-01"))
    assert got["lab_a"] == {"files": 2, "read": 14, "accepted": 6, "rejected": 1, "superseded": 1,
                            "duplicate": 1, "withdrawn": 0, "pending": 1, "held_back": 4}  # fmt: skip
    assert got["lab_b"]["read"] == 3 and got["lab_b"]["held_back"] == 0
    for counts in got.values():
        assert counts["read"] == sum(counts[c] for c in PERIOD_COLUMNS[2:])


def test_rows_after_the_period_end_are_named_with_the_last_day():
    lines = outside_period_lines(
        {"lab_a": {"accepted": 1200, "after_period_end": 1200, "reported_after": 1200,
                   "collected_after": 3}},
        Period.parse("2024-02"),
    )  # fmt: skip
    assert len(lines) == 1 and lines[0].startswith("lab_a: all 1,200 accepted rows")
    assert "after 2024-02-29" in lines[0]  # a leap year's February
