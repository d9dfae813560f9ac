"""What a run says about its own period: rows it cannot see, sources that sent nothing, and the
period's own per-source counts.

Nothing here changes a number; it makes visible what would otherwise be silent:

- **rows outside the period**: accepted rows of the files this run ingested that were collected
  or reported after the period end. They wait for their month (the indicators are as known at
  the period end), so a run that loads a late extract, or a whole history, says how many and
  from which source, instead of publishing a period that quietly lacks them.
- **missing deliveries**: a configured source with no inbox folder, or with no new extract for
  the period (by its ``cadence``), is named; ``completeness.missing_source`` in
  ``config/pipeline.yaml`` decides whether that only warns or holds the period (exit 1).
- **the period's own counts**: rows of the files ingested for this period, per source and
  outcome (held back included), apart from the whole warehouse's totals.

The SQL is small and kept beside its use; every value comes in as a parameter.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import duckdb

from pipeline.core.periods import Period
from pipeline.core.settings import Settings
from pipeline.warehouse.sql import sql_over
from pipeline.warehouse.sql_files import checked_name, read_sql

#: The columns of the period's per-source table, in the order they are shown.
PERIOD_COLUMNS = ("files", "read", "accepted", "rejected", "superseded", "duplicate", "withdrawn",
                  "pending", "held_back")  # fmt: skip


def rows_outside_period(
    con: duckdb.DuckDBPyConnection, period: Period, files: str
) -> dict[str, dict[str, int]]:
    """Per source, the accepted rows of this run's files (``files``: the ingest stage's table of
    them, ``Landed.files``) and
    how many of them were collected or reported after the period end (invisible to the period);
    only sources with such rows.
    """
    files = checked_name(files)
    rows = con.execute(
        sql_over("period_rows_after_end", {"landed_files": f"select file_id from {files}"}),
        {"period_end": period.end},
    ).fetchall()
    keys = ("accepted", "after_period_end", "reported_after", "collected_after")
    return {r[0]: dict(zip(keys, (int(x) for x in r[1:]), strict=False)) for r in rows}


def outside_period_lines(outside: dict[str, dict[str, int]], period: Period) -> list[str]:
    """One sentence per source for the terminal, the run summary and the report."""
    out = []
    for source, c in outside.items():
        whole = "all" if c["after_period_end"] == c["accepted"] else f"{c['after_period_end']:,} of"
        out.append(
            f"{source}: {whole} {c['accepted']:,} accepted rows of this run's files are not counted in "
            f"{period.label} ({c['reported_after']:,} reported, {c['collected_after']:,} collected after "
            f"{period.end.isoformat()}); they count from their own month on. Run that month, or for a "
            "first load of history run 'kidneysurv backfill' from the earliest month"
        )
    return out


def _months_back(period: Period, cadence: str) -> list[str]:
    """The months an extract for ``period`` may be named after under ``cadence``."""
    n = {"monthly": 1, "quarterly": 3}.get(cadence, 1)
    months, p = [], period
    for _ in range(n):
        months.append(p.label)
        p = Period(p.year - (p.month == 1), 12 if p.month == 1 else p.month - 1)
    return months


def missing_deliveries(con: duckdb.DuckDBPyConnection, settings: Settings, inbox: Path,
                       period: Period) -> dict[str, str]:  # fmt: skip
    """Configured sources that sent nothing for ``period``, with why: no inbox folder, or no
    file of the source in the ledger for this period (ingested by a run of this period, or
    named for one of its months). A source with ``cadence: none`` (sends when it has results)
    is never expected.
    """
    missing: dict[str, str] = {}
    for source in settings.sources:
        if source.cadence == "none":
            continue
        folder = inbox / source.folder
        if not folder.is_dir():
            missing[source.id] = (
                f"no inbox folder {folder} ({settings.config_dir / 'sources' / (source.id + '.yaml')}, key 'folder'); "
                "nothing from this source is in the period"
            )
            continue
        months = _months_back(period, source.cadence)
        n = con.execute(
            "select count(*) from ingest_files where source_id = $source "
            "and (run_period = $period or extract_month in (select unnest($months::varchar[])))",
            {"source": source.id, "period": period.label, "months": months},
        ).fetchall()[0][0]
        if not n:
            missing[source.id] = (
                f"no new extract for {period.label} in {folder} (cadence {source.cadence}); "
                "the indicators lack this source's results for the period"
            )
    return missing


def period_counts(con: duckdb.DuckDBPyConnection, period: Period) -> dict[str, dict[str, int]]:
    """Rows of the files ingested for ``period`` (``ingest_files.run_period``), per source and
    outcome; rows of held-back files are counted as ``held_back``, so per file rows read =
    accepted + rejected + superseded + duplicate + withdrawn + pending + held back.
    """
    rows = con.execute(
        read_sql("period_file_rows"),
        {"period": period.label},
    ).fetchall()
    return {
        r[0]: {k: int(v or 0) for k, v in zip(PERIOD_COLUMNS, r[1:], strict=False)} for r in rows
    }


def period_checks(con: duckdb.DuckDBPyConnection, settings: Settings, inbox: Path,
                  period: Period, files: str) -> dict[str, Any]:  # fmt: skip
    """Everything above, as plain data for the run summary, the manifest and the report;
    ``files``: the ingest stage's table of this run's files (``Landed.files``).
    """
    outside = rows_outside_period(con, period, files)
    return {
        "period_sources": period_counts(con, period),
        "rows_outside_period": outside,
        "rows_outside_period_notes": outside_period_lines(outside, period),
        "missing_sources": missing_deliveries(con, settings, inbox, period),
    }
