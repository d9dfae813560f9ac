"""Dates of the landed rows: an undated row is known at the end of its run's month.

Outside facts: the Gregorian calendar's month lengths, February having 29 days in a year
divisible by 4 except centuries not divisible by 400 (common practice; Python's ``calendar``
agrees).
"""

from __future__ import annotations

import datetime as dt

import pytest

from pipeline.stages.ingest.dates import undated_report_date

FALLBACK = dt.date(2030, 1, 1)


@pytest.mark.parametrize(
    ("period", "end"),
    [
        ("2024-02", dt.date(2024, 2, 29)),  # leap year
        ("2100-02", dt.date(2100, 2, 28)),  # a century not divisible by 400
        ("2000-02", dt.date(2000, 2, 29)),  # divisible by 400
        ("2026-04", dt.date(2026, 4, 30)),
        ("2026-12", dt.date(2026, 12, 31)),
    ],
)
def test_an_undated_row_is_known_at_its_run_periods_last_day(period, end):
    assert undated_report_date(period, FALLBACK) == end


@pytest.mark.parametrize("period", ["", "2026-13", "2026-1", "not a month"])
def test_without_a_month_the_fallback_is_used(period):
    assert undated_report_date(period, FALLBACK) == FALLBACK
