"""``kidneysurv sources check``: what one file would give, in a throw-away database."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from pathlib import Path

from pipeline.ingest import InboxFile, land_inbox, sha256_of
from pipeline.pseudonymise import DEMO_KEY, PseudonymKey
from pipeline.settings import Settings
from pipeline.validate import begin_judging, judge_file, resolve_versions, update_ledger_counts, validate_landed
from pipeline.warehouse import connect, load_reference_tables


@dataclass
class CheckReport:
    rows_read: int = 0
    fault: str | None = None
    outcomes: dict[str, int] = field(default_factory=dict)
    reasons: dict[str, tuple[int, list[tuple[int, str]]]] = field(default_factory=dict)


def check_file(settings: Settings, source_id: str, path: Path) -> CheckReport:
    """Ingest and validate one file into an in-memory warehouse and report its outcomes."""
    con = connect(":memory:")
    try:
        load_reference_tables(con, settings)
        item = InboxFile(source_id, path, path.name, sha256_of(path), path.stat().st_size)
        # person keys are never shown here, so a throw-away key is enough
        key = PseudonymKey(secret=DEMO_KEY.encode(), is_demo=True)
        begin_judging(con)
        summary = land_inbox(con, settings, path.parent, key, "check", dt.date.today(), items=[item],
                             sink=judge_file)
        report = CheckReport()
        if summary.held_back:
            report.fault = summary.held_back[0][1]
            return report
        validate_landed(con, {})
        _, scope = resolve_versions(con)
        update_ledger_counts(con, scope)
        row = con.execute(
            "select rows_read, rows_accepted, rows_rejected, rows_superseded, rows_duplicate, "
            "rows_withdrawn, rows_pending from ingest_files"
        ).fetchall()[0]
        report.rows_read = row[0]
        names = ("accepted", "rejected", "superseded", "duplicate", "withdrawn", "pending")
        report.outcomes = dict(zip(names, row[1:]))
        for reason, n, lines in con.execute(
            """
            select reason_code, count(*), list([line_no::varchar, message] order by line_no)[1:10]
            from rejected_rows group by reason_code order by count(*) desc, reason_code
            """
        ).fetchall():
            report.reasons[reason] = (n, [(int(a), b) for a, b in lines])
        return report
    finally:
        con.close()
