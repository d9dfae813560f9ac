"""Validate: row-level rules, versions and duplicates, and the per-file balance.

Each file's landed rows go through ``sql/landing/landed_rows_typed.sql`` and
``sql/derived/results_validated.sql`` as the ingest stage hands them over
(:func:`judge_file`), so a run's rows are read and written once. Then, over the whole run, the
quality gate holds back the sources over their rejection limit or failing their expectation
suite; a row breaking a rule goes to ``rejected_rows`` with its reason code, a message and its
raw line; every other row goes to ``result_versions`` in canonical units. Then the outcome of
every version (accepted, superseded, duplicate, withdrawn, pending) is settled over the whole
history, ``lab_results`` is rebuilt from the accepted ones and the ledger's counts are brought
up to date. A file whose counts do not balance stops the run.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable
from dataclasses import dataclass, field

import duckdb
import polars as pl

from pipeline.core.landed import empty_landed
from pipeline.core.settings import Settings
from pipeline.warehouse.connection import with_frame
from pipeline.warehouse.sql import build_table, build_view, sql_over
from pipeline.warehouse.sql_files import checked_name, read_sql
from pipeline.warehouse.versions import close_over_partitions

#: The as-of date of "everything received so far".
NO_LIMIT = dt.date(9999, 12, 31)

OUTCOMES = ("accepted", "rejected", "superseded", "duplicate", "withdrawn", "pending")


class BalanceError(Exception):
    """Rows read differ from the sum of their outcomes for some file."""


# --------------------------------------------------------------------------- the hand-offs
# Each step below takes what the step before it left, by name, from its result: no step reads
# another's temporary relation by a name of its own or probes whether it exists.


@dataclass(frozen=True)
class Judged:
    """What :func:`begin_judging` starts and :func:`judge_file` fills, for the quality gate and
    :func:`validate_landed`: this run's judged rows, its unmapped code values and the ids of the
    files it landed (filled by the ingest stage; None when no such relation is kept).
    """

    rows: str = "results_validated"
    unmapped: str = "unmapped_code_values"
    files: str | None = "landed_files"


@dataclass(frozen=True)
class Settled:
    """What :func:`validate_landed` leaves for :func:`resolve_versions`: this run's versions
    (``versions``, a temporary view over ``judged.rows``) and the counts it passes on.
    """

    judged: Judged
    versions: str
    valid: int
    rejected: int
    held: dict[str, str]


@dataclass(frozen=True)
class Resolved:
    """What :func:`resolve_versions` leaves: the rows of lab_results, the scope it settled and,
    in a touched scope, ``changed`` (the temporary table of the results whose accepted set the
    run can change, for the measure stage, which drops it). None in a scope of every version.
    """

    lab_results: int
    scope: Scope
    changed: str | None = None


@dataclass(frozen=True)
class ValidateSummary:
    rows_valid: int = 0
    rows_rejected: int = 0
    lab_results: int = 0
    by_source: dict[str, dict[str, int]] = field(default_factory=dict)
    held_back: dict[str, str] = field(default_factory=dict)  # source -> reason
    scope: Scope | None = None
    #: source -> field -> {config_key, rows, values}: code values the source config does not map
    unmapped: dict[str, dict[str, dict]] = field(default_factory=dict)
    #: the temporary table of the results this run's versions changed (a touched scope), for the
    #: measure stage; None when every version was settled (every measure is computed again)
    changed_versions: str | None = None


def _judged_sql() -> str:
    """results_validated over one landed frame (``_frame``), its staging inlined."""
    return sql_over("results_validated", {
        "landed_rows": "select * from _frame",
        "landed_rows_typed": "sql:landed_rows_typed",
    })  # fmt: skip


def _unmapped_sql() -> str:
    """unmapped_code_values over one landed frame (``_frame``), its staging inlined."""
    return sql_over("unmapped_code_values", {
        "landed_rows": "select * from _frame",
        "landed_rows_typed": "sql:landed_rows_typed",
    })  # fmt: skip


def begin_judging(con: duckdb.DuckDBPyConnection, files: str | None = "landed_files") -> Judged:
    """Start this run's ``results_validated`` and ``unmapped_code_values`` (temporary
    tables), empty; ``files``: the relation of this run's file ids that the ingest stage fills.
    """
    judged = Judged(files=files)
    with_frame(
        con,
        empty_landed(),
        f"create or replace temp table {checked_name(judged.rows)} as\n" + _judged_sql(),
    )
    with_frame(
        con,
        empty_landed(),
        f"create or replace temp table {checked_name(judged.unmapped)} as\n" + _unmapped_sql(),
    )
    return judged


def judge_file(
    con: duckdb.DuckDBPyConnection, frame: pl.DataFrame, judged: Judged = Judged()
) -> None:
    """Judge one file's landed rows (the ingest stage's sink) into ``judged.rows``.

    The rules read one row and the reference tables only, so judging file by file gives the
    same rows as judging the run at once; the raw line is kept on rejected rows only.
    """
    with_frame(
        con,
        frame,
        f"insert into {checked_name(judged.rows)}\n" + _judged_sql(),
        batch_rows=JUDGE_BATCH_ROWS,
    )
    candidates = _unmapped_candidates(con, frame)
    if candidates.height:  # usually none: the unmapped-code query then costs nothing
        with_frame(
            con,
            candidates,
            f"insert into {checked_name(judged.unmapped)}\n" + _unmapped_sql(),
        )


_KNOWN_SEX = ["F", "FEMALE", "M", "MALE", "U", "UNKNOWN", "OTHER"]
_KNOWN_FASTING = ["Y", "YES", "TRUE", "1", "N", "NO", "FALSE", "0"]
_FHIR = ["final", "amended", "corrected", "cancelled", "entered-in-error", "preliminary"]


def _unmapped_candidates(con: duckdb.DuckDBPyConnection, frame: pl.DataFrame) -> pl.DataFrame:
    """The rows of ``frame`` that may carry a code no config maps: a superset of what
    ``unmapped_code_values.sql`` counts, found in polars against the (small) reference tables, so
    that the query runs only over them.
    """
    if not frame.height:
        return frame
    loincs = [r[0] for r in con.execute("select loinc from reference.analyte_codes").fetchall()]
    units = [
        r[0] for r in con.execute("select distinct unit from reference.unit_factors").fetchall()
    ]
    keys = [r[0] for r in con.execute("select alias_key from reference.unit_aliases").fetchall()]

    def text(col: str) -> pl.Expr:
        return pl.col(col).str.strip_chars()

    def given(col: str) -> pl.Expr:
        return text(col).fill_null("") != ""

    unit_key = text("unit_text").str.to_lowercase().str.replace_all("µ", "u", literal=True) \
        .str.replace_all("μ", "u", literal=True)  # fmt: skip
    mask = (
        (given("sex_text") & ~text("sex_text").str.to_uppercase().is_in(_KNOWN_SEX))
        | (given("fasting_text") & ~text("fasting_text").str.to_uppercase().is_in(_KNOWN_FASTING))
        | (given("status_text") & ~pl.col("status").fill_null("").is_in(_FHIR))
        | (given("test_code_text") & ~pl.col("test_code").fill_null("").is_in(loincs))
        | (given("unit_text") & ~text("unit_text").is_in(units) & ~unit_key.is_in(keys))
    )
    return frame.filter(mask.fill_null(True))


#: Fields whose unmapped values change an indicator without rejecting the row (an unknown sex
#: gives no eGFR) or reject it wholesale (an unknown unit): their share is gated.
GATED_UNMAPPED_FIELDS = ("sex", "unit")


def unmapped_codes(
    con: duckdb.DuckDBPyConnection, judged: Judged | None
) -> dict[str, dict[str, dict]]:
    """Return this run's unmapped code values, per source and field: the config key that maps them,
    the rows affected and the rows per value (most frequent first, at most 20 values). None
    (nothing was judged): none.
    """
    out: dict[str, dict[str, dict]] = {}
    if judged is None:
        return out
    for source, field_name, key, code, n in con.execute(
        "select source_id, field, config_key, code, sum(rows)::bigint "
        f"from {checked_name(judged.unmapped)} "
        "group by all order by source_id, field, sum(rows) desc, code"
    ).fetchall():
        entry = out.setdefault(source, {}).setdefault(
            field_name, {"config_key": key, "rows": 0, "values": {}}
        )
        entry["rows"] += int(n)
        if len(entry["values"]) < 20:
            entry["values"][code] = int(n)
    return out


def unmapped_over_limit(
    con: duckdb.DuckDBPyConnection, limits: dict[str, float], judged: Judged | None
) -> dict[str, str]:
    """Sources whose share of this run's rows with an unmapped sex or unit value exceeds their
    limit, with the reason (the quality gate holds them back like the rejection rate).
    """
    held: dict[str, str] = {}
    if judged is None:
        return held
    query = sql_over(
        "unmapped_share",
        {
            "judged_rows": f"select * from {checked_name(judged.rows)}",
            "judged_unmapped": f"select * from {checked_name(judged.unmapped)}",
        },
    )
    rows = con.execute(query, {"fields": list(GATED_UNMAPPED_FIELDS)}).fetchall()
    for source, n, unmapped in rows:
        limit = limits.get(source, 1.0)
        if n and unmapped / n > limit:
            held[source] = (
                f"{int(unmapped)} of {n} rows have a sex or unit value the source config does not map "
                f"({unmapped / n:.1%}), above the limit of {limit:.1%}; map them under 'sex_codes' / "
                "'unit_aliases' (see 'kidneysurv sources check')"
            )
    return held


#: Rows per Arrow batch when judging a file: the judging query then runs on every core.
JUDGE_BATCH_ROWS = 32_768


#: The quality gate's Great Expectations suites over a run's judged rows: the sources whose
#: batch failed, with the reason.
BatchGate = Callable[[duckdb.DuckDBPyConnection, Judged], dict[str, str]]


def validate_landed(
    con: duckdb.DuckDBPyConnection,
    judged: Judged,
    rejection_limits: dict[str, float],
    batch_gate: BatchGate | None = None,
    unmapped_limits: dict[str, float] | None = None,
) -> Settled:
    """Settle this run's judged rows (``judged.rows``, filled by :func:`judge_file`):
    append them to rejected_rows, or keep them as this run's versions (the temporary view
    ``new_versions``, named in the result and stored by :func:`resolve_versions`).

    A source whose share of rejected rows in this run exceeds its limit is held back: its files
    are marked ``held_back`` with the reason and none of their rows is stored, so the next run
    tries them again. ``batch_gate`` (the Great Expectations suites) returns the sources whose
    batch failed, with the reason; they are held back the same way.
    """
    failed_batches = batch_gate(con, judged) if batch_gate is not None else {}
    unmapped = unmapped_over_limit(con, unmapped_limits, judged) if unmapped_limits else {}
    held = hold_back_sources(con, judged, rejection_limits, failed_batches, unmapped)
    rows = checked_name(judged.rows)
    rejected = con.execute(
        f"""
        insert into rejected_rows
        select v.source_id, v.file_id, f.file_path, v.line_no, v.raw_text, v.reason_code, v.message
        from {rows} as v
        join ingest_files as f on f.file_id = v.file_id
        where v.reason_code is not null and v.file_id not in (select file_id from ingest_files where status = 'held_back')
        """
    ).fetchall()[0][0]
    # this run's versions are the validated rows that remain: the others are rejected (stored
    # just above) or belong to a held-back file. They wait, as a view, until their outcomes are
    # settled (resolve_versions): inserted once with their outcome, not inserted and then updated
    con.execute(
        f"delete from {rows} where reason_code is not null "
        "or file_id in (select file_id from ingest_files where status = 'held_back')"
    )
    con.execute(
        "create or replace temp view new_versions as "
        "select * exclude (reason_code, message, raw_text), cast(null as varchar) as outcome "
        f"from {rows}"
    )
    valid = con.execute("select count(*) from new_versions").fetchall()[0][0]
    return Settled(judged, "new_versions", valid, rejected, held)


def hold_back_sources(
    con: duckdb.DuckDBPyConnection,
    judged: Judged,
    rejection_limits: dict[str, float],
    failed_batches: dict[str, str] | None = None,
    unmapped: dict[str, str] | None = None,
) -> dict[str, str]:
    """The quality gate: mark the files of sources over their rejection limit, over their
    limit of unmapped sex or unit values, or whose batch failed its expectation suite.
    """
    rates = con.execute(
        "select source_id, count(*) as n, count(*) filter (where reason_code is not null) "
        f"as rejected from {checked_name(judged.rows)} group by source_id order by source_id"
    ).fetchall()
    # the files of this run that a held-back source's rows came from
    these_files = (
        f"file_id in (select file_id from {checked_name(judged.files)})"
        if judged.files
        else f"file_id in (select file_id from {checked_name(judged.rows)})"
    )
    held: dict[str, str] = {}
    for source_id, n, rejected in rates:
        limit = rejection_limits.get(source_id, 1.0)
        reasons = []
        if n and rejected / n > limit:
            reasons.append(
                f"{rejected} of {n} rows rejected ({rejected / n:.1%}), above the limit of "
                f"{limit:.1%}; see rejected reasons with 'kidneysurv sources check'"
            )
        if unmapped and source_id in unmapped:
            reasons.append(unmapped[source_id])
        if failed_batches and source_id in failed_batches:
            reasons.append(f"batch failed its expectation suite: {failed_batches[source_id]}")
        if reasons:
            held[source_id] = "held back this month: " + "; ".join(reasons)
            con.execute(
                "update ingest_files set status = 'held_back', message = ? "
                f"where source_id = ? and {these_files}",
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


#: Below this share of new versions a run settles only the touched versions (see settle_scope).
FULL_SCOPE_SHARE = 0.3


@dataclass(frozen=True)
class Scope:
    """The versions a run settles: all of them, or those that new rows can change.

    In a touched scope ``person_table`` and ``version_table`` name the temporary tables of its
    persons and versions (kept for the rest of the run: the link stage starts from its persons
    when its seed is the same); None in a scope of every version.
    """

    kind: str  # "all" | "touched"
    versions: int
    persons: int
    person_table: str | None = None
    version_table: str | None = None


def settle_scope(con: duckdb.DuckDBPyConnection, settled: Settled, full: bool = False) -> Scope:
    """Point the view ``versions_in_scope`` at the versions whose outcome this run must settle.

    New rows (this run's versions, ``settled.versions``) can change only the outcome of versions that share a
    partition with them in ``result_versions_resolved.sql``: the same person (copies, and
    versions without a specimen id, and the same result from two sources are all within one
    person) or the same source + specimen + analyte (versions with a specimen id, which a
    faulty extract may give under two persons). The scope is the closure of both relations,
    taken until it stops growing, so settling it gives exactly what settling every version
    would. When most versions are new (a first run, a backfill) the whole table is the scope,
    and so it is when ``full`` (a reprocess, whose replaced rows no longer seed the closure).
    """
    new_versions = checked_name(settled.versions)
    con.execute(
        "create or replace temp view all_versions as "
        f"select * from result_versions union all by name select * from {new_versions}"
    )
    stored = con.execute("select count(*) from result_versions").fetchall()[0][0]
    new = con.execute(f"select count(*) from {new_versions}").fetchall()[0][0]
    total = stored + new
    if total == 0 or full or new >= FULL_SCOPE_SHARE * total:
        con.execute("create or replace temp view versions_in_scope as select * from all_versions")
        persons = con.execute("select count(distinct person_key) from all_versions").fetchall()[0][
            0
        ]
        return Scope("all", total, persons)
    size = close_over_partitions(
        con,
        f"select person_key, source_id, specimen_id, analyte from {new_versions}",
        {},
        "scope_persons",
        "scope_versions",
        versions="all_versions",
    )
    con.execute("create or replace temp view versions_in_scope as select * from scope_versions")
    persons = con.execute("select count(*) from scope_persons").fetchall()[0][0]
    return Scope("touched", size, persons, "scope_persons", "scope_versions")


#: This run's versions stored per statement, a batch of whole files at a time, so that joining
#: them to their outcome stays within DuckDB's memory limit (at 30M results one statement over
#: every version ran out of memory at a 1.5 GB limit).
STORE_BATCH_ROWS = 4_000_000


def file_batches(con: duckdb.DuckDBPyConnection, relation: str, rows: int) -> list[tuple[int, int]]:
    """Ranges of ``file_id`` (first, last, inclusive), in order, covering every row of
    ``relation``, each of whole files and at most ``rows`` rows unless one file has more.
    """
    counts = con.execute(
        f"select file_id, count(*) from {checked_name(relation)} group by file_id order by file_id"
    ).fetchall()
    batches: list[list[int]] = []  # [first, last, rows]
    for file_id, n in counts:
        if batches and batches[-1][2] + n <= rows:
            batches[-1][1:] = [file_id, batches[-1][2] + n]
        else:
            batches.append([file_id, file_id, n])
    return [(first, last) for first, last, _ in batches]


def resolve_versions(
    con: duckdb.DuckDBPyConnection, settled: Settled, full: bool = False
) -> Resolved:
    """Settle the outcome of the versions in scope and bring lab_results up to date.

    Returns the rows of lab_results (a view: the accepted versions) and the scope; in a touched
    scope ``changed`` names the results whose accepted set may have changed, for the measure
    stage.
    """
    new_versions = checked_name(settled.versions)
    scope = settle_scope(con, settled, full)
    build_table(con, "result_versions_resolved", params={"as_of": NO_LIMIT}, temporary=True)
    changed = None
    if scope.kind == "touched":
        # the results whose accepted set this run can change: its own versions and the stored
        # ones whose outcome changes; the measure stage recomputes only around them
        changed = "changed_versions"
        query = sql_over("changed_versions", {"new_versions": f"select * from {new_versions}"})
        con.execute(f"create or replace temp table {changed} as\n{query}")
    # stored versions whose outcome changed (an amendment supersedes them, ...), then this
    # run's versions, stored once with their outcome
    con.execute(
        """
        update result_versions as v set outcome = r.outcome
        from result_versions_resolved as r
        where r.file_id = v.file_id and r.line_no = v.line_no
          and v.outcome is distinct from r.outcome
        """
    )
    for first, last in file_batches(con, new_versions, STORE_BATCH_ROWS):
        con.execute(
            f"""
            insert into result_versions
            select n.* replace (r.outcome as outcome)
            from (select * from {new_versions} where file_id between $first and $last) as n
            join (select file_id, line_no, outcome from result_versions_resolved
                  where file_id between $first and $last) as r
                on r.file_id = n.file_id and r.line_no = n.line_no
            """,
            {"first": first, "last": last},
        )
    record_specimen_conflicts(con)
    con.execute("drop view all_versions")
    con.execute(f"drop view {new_versions}")
    con.execute("drop view versions_in_scope")
    build_view(con, "lab_results")
    n = con.execute("select count(*) from lab_results").fetchall()[0][0]
    return Resolved(n, scope, changed)


def record_specimen_conflicts(con: duckdb.DuckDBPyConnection) -> None:
    """Give every version rejected by the version rules (a specimen id under two persons) its
    reason in ``rejected_rows``, for the versions just settled: the ledger counts it there once
    (as rejected, not as a version), and ``sources check`` and the quality report show why.
    """
    con.execute(
        """
        delete from rejected_rows as j
        where j.reason_code = 'specimen_conflict'
          and exists (select 1 from result_versions_resolved as r
                      where r.file_id = j.file_id and r.line_no = j.line_no)
        """
    )
    con.execute(
        """
        insert into rejected_rows
        select v.source_id, v.file_id, f.file_path, v.line_no, null, 'specimen_conflict',
               'specimen ' || v.specimen_id || ' (' || v.analyte || ') is reported under more than one '
               || 'person: every row of it is kept out until the lab corrects it'
        from result_versions as v
        join result_versions_resolved as r on r.file_id = v.file_id and r.line_no = v.line_no
        join ingest_files as f on f.file_id = v.file_id
        where r.outcome = 'rejected'
        """
    )


def update_ledger_counts(
    con: duckdb.DuckDBPyConnection, scope: Scope | None = None, files: str | None = None
) -> None:
    """Recount the outcomes of the files this run touched (every ingested file when the scope
    was all versions): the files of the scope's versions and this run's (``files``, the
    relation of their ids); then check that each file balances
    (``sql/checks/ledger_recount.sql``, ``sql/checks/ledger_unbalanced.sql``).
    """
    touched = scope is not None and scope.kind == "touched" and scope.version_table is not None
    parts = []
    if touched:
        parts.append(f"select file_id from {checked_name(scope.version_table)}")
    if touched and files:
        parts.append(f"select file_id from {checked_name(files)}")
    touched_files = " union ".join(parts) or "select null::bigint as file_id where false"
    recount = sql_over("ledger_recount", {"touched_files": touched_files})
    con.execute(
        f"""
        update ingest_files set
            rows_accepted = c.accepted,
            rows_superseded = c.superseded,
            rows_duplicate = c.duplicate,
            rows_withdrawn = c.withdrawn,
            rows_pending = c.pending,
            rows_rejected = c.rejected
        from ({recount}) as c
        where ingest_files.file_id = c.file_id
        """,
        {"all_files": not touched},
    )
    unbalanced = con.execute(read_sql("ledger_unbalanced")).fetchall()
    if unbalanced:
        detail = "; ".join(f"{p}: read {r}, accounted {a}" for p, r, a in unbalanced[:5])
        raise BalanceError(
            f"row accounting does not balance for {len(unbalanced)} file(s): {detail}"
        )


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
    return {r[0]: {k: int(v or 0) for k, v in zip(keys, r[1:], strict=False)} for r in rows}


def validate_stage(
    con: duckdb.DuckDBPyConnection,
    settings: Settings,
    judged: Judged,
    batch_gate: BatchGate | None = None,
) -> ValidateSummary:
    """The whole validate stage over what :func:`begin_judging` started and the ingest stage
    filled (``judged``): rules, quality gate, versions, lab_results, ledger balance.
    """
    default = settings.pipeline.quality_gate.max_rejection_rate
    limits = {
        s.id: s.max_rejection_rate if s.max_rejection_rate is not None else default
        for s in settings.sources
    }
    gate = settings.pipeline.quality_gate
    unmapped_limits = {
        s.id: s.max_unmapped_share if s.max_unmapped_share is not None else gate.max_unmapped_share
        for s in settings.sources
    }
    # before the gate: a held-back source's gaps are named too
    unmapped = unmapped_codes(con, judged)
    settled = validate_landed(con, judged, limits, batch_gate, unmapped_limits)
    resolved = resolve_versions(con, settled)
    update_ledger_counts(con, resolved.scope, judged.files)
    return ValidateSummary(
        settled.valid,
        settled.rejected,
        resolved.lab_results,
        outcome_counts(con),
        settled.held,
        resolved.scope,
        unmapped,
        resolved.changed,
    )
