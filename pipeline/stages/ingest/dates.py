"""Dates: the collection and report dates of landed rows, parsed in the source's format; the
report date of a row without one.
"""

from __future__ import annotations

import calendar
import datetime as dt
import re

import polars as pl

from pipeline.core.settings import SourceConfig
from pipeline.stages.ingest.inbox import InboxFile, _month_end_from_name

#: A date in ISO 8601 as the standard layout sends it: a calendar date, optionally a time.
_ISO_DATE = (
    r"\d{4}-\d{2}-\d{2}(?:[T ]\d{2}:\d{2}(?::\d{2}(?:[.,]\d+)?)?(?:Z|[+-]\d{2}(?::?\d{2})?)?)?"
)
_STRFTIME_PARTS = {"Y": r"\d{4}", "m": r"\d{2}", "d": r"\d{2}", "H": r"\d{2}", "M": r"\d{2}", "S": r"\d{2}",
                   "y": r"\d{2}", "f": r"\d{1,9}", "b": r"[A-Za-z]{3}", "B": r"[A-Za-z]{3,9}",
                   "z": r"[+-]\d{4}", "%": "%"}  # fmt: skip


def date_shape(date_format: str | None) -> str:
    """The regular expression a date text must match in full: ISO 8601 when no format is set,
    else the configured strftime format with each part at its full width (``%d`` two digits),
    so that trailing text and unpadded dates are refused rather than read leniently.
    """
    if date_format is None:
        return _ISO_DATE
    out, i = [], 0
    while i < len(date_format):
        ch = date_format[i]
        if ch == "%" and i + 1 < len(date_format):
            out.append(_STRFTIME_PARTS.get(date_format[i + 1], re.escape("%" + date_format[i + 1])))
            i += 2
        else:
            out.append(re.escape(ch))
            i += 1
    return "".join(out)


def undated_report_date(run_period: str, fallback: dt.date) -> dt.date:
    """The report date of a row without one, in a file without a month in its name: the last day
    of the period of the run that first ingests the file (never the day it happened to be
    loaded, which is after the period end and would hide the rows from their month);
    ``fallback`` only when ``run_period`` is not a month (``sources check`` without a period).
    """
    match = re.fullmatch(r"(\d{4})-(0[1-9]|1[0-2])", run_period or "")
    if not match:
        return fallback
    year, month = int(match.group(1)), int(match.group(2))
    return dt.date(year, month, calendar.monthrange(year, month)[1])


def add_dates(frame: pl.DataFrame, source: SourceConfig, item: InboxFile, undated_on: dt.date,
              run_day: dt.date | None = None) -> pl.DataFrame:  # fmt: skip
    """Parse the collection and report dates; keep the text as reported beside them.

    A row without a report date is known at the end of its extract's month: the month in the
    file name (basis ``file_name``), else ``undated_on``, the end of the period of the run that
    first ingests the file (basis ``run_period``; :func:`undated_report_date`); a row collected
    after that month, at the end of its own collection month (basis ``collected_month``).

    A date must match the source's format in full (:func:`date_shape`). A report date given
    but not readable rejects the row (``invalid_report_date``) instead of falling back to the
    extract's month; a collection date after ``run_day`` (the day of the run, today if not
    given) rejects it (``collected_after_run``) whatever its report date says.
    """
    run_day = run_day or dt.date.today()
    fmt = source.date_format or "%Y-%m-%d"
    shape = date_shape(source.date_format)

    def parse(col: str) -> pl.Expr:
        text = pl.col(col).str.strip_chars()
        whole = text.str.contains(rf"^(?:{shape})$")
        if source.date_format is None:
            text = text.str.slice(0, 10)
        return pl.when(whole).then(text.str.strptime(pl.Date, fmt, strict=False))

    from_name = _month_end_from_name(item.rel_path)
    extract_date = from_name or undated_on
    basis_extract = "file_name" if from_name else "run_period"
    collected = parse("collected_text")
    # a row collected after its extract's month (a history sent as one file) cannot have been
    # known before its own collection month ended: never date it before it was collected
    collected_month_end = collected.dt.month_end()
    later = collected_month_end > pl.lit(extract_date)
    reported_given = pl.col("reported_text").str.strip_chars().fill_null("") != ""
    out = frame.with_columns(
        collected.alias("collected_date"),
        pl.coalesce(
            parse("reported_text"),
            pl.when(later).then(collected_month_end).otherwise(pl.lit(extract_date)),
        ).alias("reported_date"),
        pl.when(parse("reported_text").is_not_null())
        .then(pl.lit("reported"))
        .when(later)
        .then(pl.lit("collected_month"))
        .otherwise(pl.lit(basis_extract))
        .alias("reported_date_basis"),
    )
    fault = (
        pl.when(reported_given & parse("reported_text").is_null())
        .then(pl.format("invalid_report_date:report date \"{}\" is not a date in the format {}",
                        pl.col("reported_text"), pl.lit(source.date_format or "YYYY-MM-DD")))
        .when(pl.col("collected_date") > pl.lit(run_day))
        .then(pl.format("collected_after_run:collected {}, after the day of this run ({})",
                        pl.col("collected_date").dt.strftime("%Y-%m-%d"), pl.lit(run_day.isoformat())))
    )  # fmt: skip
    return out.with_columns(pl.coalesce(pl.col("row_fault"), fault).alias("row_fault"))
