"""Reporting periods: a calendar month named YYYY-MM."""

from __future__ import annotations

import calendar
import datetime as dt
import re
from dataclasses import dataclass


@dataclass(frozen=True, order=True)
class Period:
    year: int
    month: int

    @classmethod
    def parse(cls, text: str) -> Period:
        match = re.fullmatch(r"(\d{4})-(\d{2})", text.strip())
        if not match or not 1 <= int(match.group(2)) <= 12:
            raise ValueError(f"period {text!r} is not a month in the form YYYY-MM, e.g. 2026-10")
        return cls(int(match.group(1)), int(match.group(2)))

    @property
    def label(self) -> str:
        return f"{self.year:04d}-{self.month:02d}"

    @property
    def start(self) -> dt.date:
        return dt.date(self.year, self.month, 1)

    @property
    def end(self) -> dt.date:
        return dt.date(self.year, self.month, calendar.monthrange(self.year, self.month)[1])

    @classmethod
    def previous_month(cls, today: dt.date) -> Period:
        """The last complete month before ``today``."""
        first = today.replace(day=1) - dt.timedelta(days=1)
        return cls(first.year, first.month)

    def next(self) -> Period:
        return Period(self.year + self.month // 12, self.month % 12 + 1)

    def __str__(self) -> str:
        return self.label


def months_between(first: Period, last: Period) -> list[Period]:
    """Every month from ``first`` to ``last`` inclusive."""
    out, p = [], first
    while p <= last:
        out.append(p)
        p = p.next()
    return out
