"""Validate: row-level rules, versions and duplicates, and the per-file balance.

The landed rows of this run go through ``sql/staging/stg_landed_rows.sql`` and
``sql/intermediate/int_results_validated.sql``: a row breaking a rule goes to ``rejected_rows``
with its reason code and a message; every other row goes to ``result_versions`` in canonical
units. Then the outcome of every version (accepted, superseded, duplicate, withdrawn, pending)
is settled over the whole history, ``lab_results`` is rebuilt from the accepted ones and the
ledger's counts are brought up to date. A file whose counts do not balance stops the run.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable
from dataclasses import dataclass, field

import duckdb

from pipeline.settings import Settings
from pipeline.warehouse import build_table

#: The as-of date of "everything received so far".
NO_LIMIT = dt.date(9999, 12, 31)

OUTCOMES = ("accepted", "rejected", "superseded", "duplicate", "withdrawn", "pending")


class BalanceError(Exception):
    """Rows read differ from the sum of their outcomes for some file."""


@dataclass
class ValidateSummary:
    rows_valid: int = 0
    rows_rejected: int = 0
    lab_results: int = 0
    by_source: dict[str, dict[str, int]] = field(default_factory=dict)
    held_back: dict[str, str] = field(default_factory=dict)  # source -> reason


def validate_landed(
    con: duckdb.DuckDBPyConnection,
    rejection_limits: dict[str, float],
    batch_gate: Callable[[duckdb.DuckDBPyConnection], dict[str, str]] | None = None,
) -> tuple[int, int, dict[str, str]]:
    """Judge this run's landed rows; append them to rejected_rows or result_versions.

    A source whose share of rejected rows in this run exceeds its limit is held back: its files
    are marked ``held_back`` with the reason and none of their rows is stored, so the next run
    tries them again. ``batch_gate`` (the Great Expectations suites) returns the sources whose
    batch failed, with the reason; they are held back the same way.
    """
    build_table(con, "stg_landed_rows", "staging.stg_landed_rows")
    con.execute("create or replace view stg_landed_rows as select * from staging.stg_landed_rows")
    build_table(con, "int_results_validated", "staging.int_results_validated")
    con.execute("drop view stg_landed_rows")
    failed_batches = batch_gate(con) if batch_gate is not None else {}
    held = hold_back_sources(con, rejection_limits, failed_batches)
    rejected = con.execute(
        """
        insert into rejected_rows
        select v.source_id, v.file_id, f.file_path, v.line_no, v.raw_text, v.reason_code, v.message
        from staging.int_results_validated as v
        join ingest_files as f on f.file_id = v.file_id
        where v.reason_code is not null and v.file_id not in (select file_id from ingest_files where status = 'held_back')
        order by v.file_id, v.line_no
        """
    ).fetchall()[0][0]
    valid = con.execute(
        """
        insert into result_versions
        select source_id, file_id, line_no, person_key, specimen_id, collected_date, reported_date,
               reported_date_basis, analyte, loinc, status, value_text, comparator, reported_value,
               reported_unit, value, unit, is_fasting, height_cm, sex, birth_year, age_years,
               district_code, null as outcome
        from staging.int_results_validated
        where reason_code is null and file_id not in (select file_id from ingest_files where status = 'held_back')
        order by file_id, line_no
        """
    ).fetchall()[0][0]
    return valid, rejected, held


def hold_back_sources(con: duckdb.DuckDBPyConnection, rejection_limits: dict[str, float],
                      failed_batches: dict[str, str] | None = None) -> dict[str, str]:
    """The quality gate: mark the files of sources over their rejection limit, or whose batch
    failed its expectation suite."""
    rates = con.execute(
        """
        select source_id, count(*) as n, count(*) filter (where reason_code is not null) as rejected
        from staging.int_results_validated group by source_id order by source_id
        """
    ).fetchall()
    held: dict[str, str] = {}
    for source_id, n, rejected in rates:
        limit = rejection_limits.get(source_id, 1.0)
        reasons = []
        if n and rejected / n > limit:
            reasons.append(
                f"{rejected} of {n} rows rejected ({rejected / n:.1%}), above the limit of "
                f"{limit:.1%}; see rejected reasons with 'kidneysurv sources check'"
            )
        if failed_batches and source_id in failed_batches:
            reasons.append(f"batch failed its expectation suite: {failed_batches[source_id]}")
        if reasons:
            held[source_id] = "held back this month: " + "; ".join(reasons)
            con.execute(
                "update ingest_files set status = 'held_back', message = ? "
                "where source_id = ? and file_id in (select distinct file_id from staging.landed_rows)",
                [held[source_id], source_id],
            )
            # a copy of a held-back file, recorded as its duplicate, is held back with it
            con.execute(
                "update ingest_files set status = 'held_back', message = ? "
                "where source_id = ? and status = 'duplicate_file' and sha256 in "
                "(select sha256 from ingest_files where source_id = ? and status = 'held_back')",
                [held[source_id], source_id, source_id],
            )
    return held


def resolve_versions(con: duckdb.DuckDBPyConnection) -> int:
    """Settle the outcome of every version and rebuild lab_results; return its rows."""
    build_table(con, "int_result_versions_resolved", "staging.int_result_versions_resolved",
                params={"as_of": NO_LIMIT})
    con.execute(
        """
        update result_versions as v set outcome = r.outcome
        from staging.int_result_versions_resolved as r
        where r.file_id = v.file_id and r.line_no = v.line_no
          and v.outcome is distinct from r.outcome
        """
    )
    return build_table(con, "lab_results")


def update_ledger_counts(con: duckdb.DuckDBPyConnection) -> None:
    """Recount every ingested file's outcomes, then check that each file balances."""
    con.execute(
        """
        update ingest_files set
            rows_accepted = c.accepted,
            rows_superseded = c.superseded,
            rows_duplicate = c.duplicate,
            rows_withdrawn = c.withdrawn,
            rows_pending = c.pending,
            rows_rejected = c.rejected
        from (
            select f.file_id,
                   count(v.line_no) filter (where v.outcome = 'accepted') as accepted,
                   count(v.line_no) filter (where v.outcome = 'superseded') as superseded,
                   count(v.line_no) filter (where v.outcome = 'duplicate') as duplicate,
                   count(v.line_no) filter (where v.outcome = 'withdrawn') as withdrawn,
                   count(v.line_no) filter (where v.outcome = 'pending') as pending,
                   coalesce(any_value(r.rejected), 0) as rejected
            from ingest_files as f
            left join result_versions as v on v.file_id = f.file_id
            left join (select file_id, count(*) as rejected from rejected_rows group by file_id) as r
                on r.file_id = f.file_id
            where f.status = 'ingested'
            group by f.file_id
        ) as c
        where ingest_files.file_id = c.file_id
        """
    )
    unbalanced = con.execute(
        """
        select file_path, rows_read,
               rows_accepted + rows_rejected + rows_superseded + rows_duplicate
               + rows_withdrawn + rows_pending as accounted
        from ingest_files
        where status in ('ingested', 'duplicate_file')
          and rows_read <> rows_accepted + rows_rejected + rows_superseded + rows_duplicate
                           + rows_withdrawn + rows_pending
        order by file_id
        """
    ).fetchall()
    if unbalanced:
        detail = "; ".join(f"{p}: read {r}, accounted {a}" for p, r, a in unbalanced[:5])
        raise BalanceError(f"row accounting does not balance for {len(unbalanced)} file(s): {detail}")


def outcome_counts(con: duckdb.DuckDBPyConnection) -> dict[str, dict[str, int]]:
    """Rows read and their outcomes per source, from the ledger."""
    rows = con.execute(
        """
        select source_id, sum(rows_read), sum(rows_accepted), sum(rows_rejected),
               sum(rows_superseded), sum(rows_duplicate), sum(rows_withdrawn), sum(rows_pending),
               count(*) filter (where status = 'held_back')
        from ingest_files group by source_id order by source_id
        """
    ).fetchall()
    keys = ("read", *OUTCOMES, "files_held_back")
    return {r[0]: {k: int(v or 0) for k, v in zip(keys, r[1:])} for r in rows}


def validate_stage(
    con: duckdb.DuckDBPyConnection,
    settings: Settings,
    batch_gate: Callable[[duckdb.DuckDBPyConnection], dict[str, str]] | None = None,
) -> ValidateSummary:
    """The whole validate stage: rules, quality gate, versions, lab_results, ledger balance."""
    default = settings.pipeline.quality_gate.max_rejection_rate
    limits = {
        s.id: s.max_rejection_rate if s.max_rejection_rate is not None else default
        for s in settings.sources
    }
    valid, rejected, held = validate_landed(con, limits, batch_gate)
    n_results = resolve_versions(con)
    update_ledger_counts(con)
    return ValidateSummary(valid, rejected, n_results, outcome_counts(con), held)
