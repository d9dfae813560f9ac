"""Tests for pipeline.core.periods against Python's ``calendar`` and ``datetime`` (the Gregorian
calendar: a leap year is divisible by 4, except centuries not divisible by 400)."""

from __future__ import annotations

import calendar
import datetime as dt

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.core.periods import Period, months_between

MONTHS = st.builds(Period, st.integers(1900, 2200), st.integers(1, 12))


@pytest.mark.parametrize(
    ("label", "last_day"),
    [("2024-02", 29), ("2100-02", 28), ("2000-02", 29), ("2026-04", 30), ("2026-12", 31)],
)
def test_the_last_day_follows_the_gregorian_calendar(label, last_day):
    assert Period.parse(label).end == dt.date(*map(int, label.split("-")), last_day)


@pytest.mark.parametrize("text", ["2026-13", "2026-00", "26-01", "2026/01", "2026-1", ""])
def test_a_text_that_is_not_a_month_is_refused(text):
    with pytest.raises(ValueError, match="YYYY-MM"):
        Period.parse(text)


@settings(max_examples=100, deadline=None, database=None)
@given(MONTHS)
def test_a_period_spans_its_calendar_month(p):
    assert Period.parse(p.label) == p
    assert p.start == dt.date(p.year, p.month, 1)
    assert (p.end - p.start).days + 1 == calendar.monthrange(p.year, p.month)[1]
    assert p.next().start == p.end + dt.timedelta(days=1)


@settings(max_examples=100, deadline=None, database=None)
@given(MONTHS, st.integers(0, 60))
def test_months_between_counts_every_month_once(first, extra):
    last = first
    for _ in range(extra):
        last = last.next()
    got = months_between(first, last)
    assert len(got) == 12 * (last.year - first.year) + last.month - first.month + 1 == extra + 1
    assert got == sorted(set(got)) and got[0] == first and got[-1] == last


@settings(max_examples=100, deadline=None, database=None)
@given(st.dates(dt.date(1901, 1, 1), dt.date(2199, 12, 31)))
def test_the_previous_month_is_the_last_complete_one(today):
    p = Period.previous_month(today)
    assert p.end < today and p.next().start == today.replace(day=1)
