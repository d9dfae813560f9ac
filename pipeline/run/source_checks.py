"""``kidneysurv sources check``: what one file would give, in a throw-away database."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from pathlib import Path

from pipeline.core.periods import Period
from pipeline.core.pseudonymise import DEMO_KEY, PseudonymKey
from pipeline.core.settings import Settings
from pipeline.stages.ingest.inbox import InboxFile, extract_month, sha256_of
from pipeline.stages.ingest.landing import LANDED_FILES, land_inbox
from pipeline.stages.validate import (
    begin_judging,
    judge_file,
    resolve_versions,
    unmapped_codes,
    unmapped_over_limit,
    update_ledger_counts,
    validate_landed,
)
from pipeline.warehouse.connection import connect
from pipeline.warehouse.reference import load_reference_tables
from pipeline.warehouse.sql_files import read_sql


@dataclass
class CheckReport:
    rows_read: int = 0
    fault: str | None = None
    outcomes: dict[str, int] = field(default_factory=dict)
    reasons: dict[str, tuple[int, list[tuple[int, str]]]] = field(default_factory=dict)
    #: field -> {config_key, rows, values}: code values the source config does not map
    unmapped: dict[str, dict] = field(default_factory=dict)
    #: why a run would hold the file's source back (rejection rate, unmapped share)
    would_hold: list[str] = field(default_factory=list)
    #: the period the rows were judged against (None: no month in the name and none given)
    period: str | None = None
    #: accepted rows collected or reported after the period end: count and first line numbers
    outside_period: tuple[int, list[int]] = (0, [])


def check_file(
    settings: Settings, source_id: str, path: Path, period: str | None = None
) -> CheckReport:
    """Ingest and validate one file into an in-memory warehouse and report its outcomes.

    ``period`` (YYYY-MM; default: the month in the file name) is the run the file would go
    into: undated rows are dated at its end, and the rows it would not count (collected or
    reported after its end) are listed.
    """
    if period is None:
        named = extract_month(f"{path.parent.name}/{path.name}", "")  # FHIR: the export's folder
        period = named or None
    con = connect(":memory:")
    try:
        load_reference_tables(con, settings)
        item = InboxFile(source_id, path, path.name, sha256_of(path), path.stat().st_size)
        # person keys are never shown here, so a throw-away key is enough
        key = PseudonymKey(secret=DEMO_KEY.encode(), is_demo=True)
        judged = begin_judging(con, files=LANDED_FILES)
        summary = land_inbox(
            con,
            settings,
            path.parent,
            key,
            period or "check",
            dt.date.today(),
            items=[item],
            sink=lambda con_, frame: judge_file(con_, frame, judged),
        )
        report = CheckReport(period=period)
        if summary.held_back:
            report.fault = summary.held_back[0][1]
            return report
        source = settings.source(source_id)
        gate = settings.pipeline.quality_gate
        report.unmapped = unmapped_codes(con, judged).get(source_id, {})
        unmapped_limit = (
            source.max_unmapped_share
            if source.max_unmapped_share is not None
            else gate.max_unmapped_share
        )
        report.would_hold.extend(
            unmapped_over_limit(con, {source_id: unmapped_limit}, judged).values()
        )
        settled = validate_landed(con, judged, {})
        resolved = resolve_versions(con, settled)
        update_ledger_counts(con, resolved.scope, judged.files)
        row = con.execute(
            "select rows_read, rows_accepted, rows_rejected, rows_superseded, rows_duplicate, "
            "rows_withdrawn, rows_pending from ingest_files"
        ).fetchall()[0]
        report.rows_read = row[0]
        names = ("accepted", "rejected", "superseded", "duplicate", "withdrawn", "pending")
        report.outcomes = dict(zip(names, row[1:], strict=False))
        limit = (
            source.max_rejection_rate
            if source.max_rejection_rate is not None
            else gate.max_rejection_rate
        )
        if report.rows_read and report.outcomes["rejected"] / report.rows_read > limit:
            share = report.outcomes["rejected"] / report.rows_read
            report.would_hold.insert(
                0,
                f"{report.outcomes['rejected']} of {report.rows_read} rows rejected "
                f"({share:.1%}), above the limit of {limit:.1%}",
            )
        if period is not None:
            end = Period.parse(period).end
            n, lines = con.execute(
                read_sql("source_check_outside_period"), {"end": end}
            ).fetchall()[0]
            report.outside_period = (int(n), [int(x) for x in lines])
        for reason, n, lines in con.execute(read_sql("source_check_reasons")).fetchall():
            report.reasons[reason] = (n, [(int(a), b) for a, b in lines])
        return report
    finally:
        con.close()
