"""Reprocess: apply a source's current config to the files it already delivered.

A run skips a file it has already ingested, so a corrected source config (a missing sex code, a
unit alias, a test code) changes nothing by itself: the rows made under the old config stay.
:func:`reprocess_source` reads the selected stored files of one source again, from the inbox,
under the current config, and replaces what they produced:

- each file must still be in the inbox with the SHA-256 the ledger recorded, or nothing is done
  and the file is named (:class:`ReprocessRefused`);
- the old rows of those files leave ``result_versions`` and ``rejected_rows`` for
  ``result_versions_replaced`` (outcome ``superseded``) and ``rejected_rows_replaced``: nothing
  is deleted; the new rows keep the file's ``file_id`` and line numbers;
- the new rows go through the same row rules, quality gate, version rules and per-file
  accounting as a monthly run; every version is settled again and every measure recomputed, and
  the link snapshots are dropped so that the next run recomputes every person;
- ``ingest_files.config_sha256`` records the config the file's rows now come from, and
  ``reprocess_log`` the counts before and after.

By default it is a dry run: the same work inside the transaction, then a rollback, and the
difference per outcome and per reason code is shown. ``apply`` commits (one transaction, so a
kill at any point leaves the previous state). Published periods are not changed here: the
analyst publishes a revision with ``kidneysurv run --period P --revise "..."``.

:func:`config_drift` is the check every run makes: a source whose stored rows were made under
another config than the current one is named, with the date, and its new files are held back
until it is reprocessed, so two configs' rows are never mixed silently.
"""

from __future__ import annotations

import datetime as dt
import json
import uuid
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import duckdb

from pipeline.core.faults import maybe_fail
from pipeline.core.pseudonymise import (
    PersonKeyCache,
    add_person_keys,
    resolve_key,
    verify_warehouse_key,
)
from pipeline.core.settings import Settings, load_settings, source_config_sha256
from pipeline.run.runlock import recover_interrupted_run, run_lock
from pipeline.stages.ingest.dates import undated_report_date
from pipeline.stages.ingest.inbox import FileFault, InboxFile, sha256_of
from pipeline.stages.ingest.landing import begin_landed_files, read_inbox_file, record_landed_file
from pipeline.stages.measure import measure_stage
from pipeline.stages.publish import commit_month, open_warehouse
from pipeline.stages.validate import (
    Judged,
    begin_judging,
    judge_file,
    resolve_versions,
    update_ledger_counts,
    validate_landed,
)
from pipeline.warehouse.connection import add_missing_columns, fetch_frame
from pipeline.warehouse.reference import load_reference_tables
from pipeline.warehouse.sql_files import checked_name, read_sql

ALL_OUTCOMES = ("accepted", "rejected", "superseded", "duplicate", "withdrawn", "pending")


class ReprocessRefused(Exception):
    """The reprocess cannot be done as asked; nothing was changed. The message says why."""


@dataclass
class Drift:
    source_id: str
    since: str  # when the earliest file under another config was ingested
    files: int  # files whose stored rows were made under another config
    stored: list[str]  # the other config hashes (first 12 hex digits)
    current: str

    def message(self) -> str:
        return (f"source {self.source_id}: its config changed since its stored rows were made "
                f"({self.files} file(s) ingested from {self.since} under config {', '.join(self.stored)}, "
                f"now {self.current}); its new files are held back so the two configs' rows are not mixed. "
                f"Apply the current config to the stored files with 'kidneysurv reprocess {self.source_id}' "
                "(a dry run; add --apply), then run the month again")  # fmt: skip


def config_drift(con: duckdb.DuckDBPyConnection, settings: Settings) -> dict[str, Drift]:
    """Sources whose ingested files were made under another config than the current one (files
    recorded before the hash was kept, with none, are not counted).
    """
    out: dict[str, Drift] = {}
    for source in settings.sources:
        current = source_config_sha256(settings, source.id)
        rows = con.execute(
            "select min(ingested_at), count(*), list(distinct left(config_sha256, 12) order by left(config_sha256, 12)) "
            "from ingest_files where source_id = ? and status = 'ingested' and config_sha256 is not null "
            "and config_sha256 <> ?",
            [source.id, current],
        ).fetchall()
        since, n, stored = rows[0]
        if n:
            out[source.id] = Drift(source.id, str(since)[:19], int(n), list(stored), current[:12])
    return out


def hold_back_drifted(items: list[InboxFile], drift: dict[str, Drift]) -> None:
    """Mark the new files of drifted sources held back (the ingest stage records them so)."""
    for item in items:
        if item.source_id in drift and item.status == "new":
            item.status, item.fault = (
                "held_back",
                f"{item.rel_path}: " + drift[item.source_id].message(),
            )


@dataclass
class ReprocessResult:
    source_id: str
    files: list[str]
    skipped_current: list[str]
    applied: bool
    config_after: str
    outcomes: dict[str, tuple[int, int]] = field(default_factory=dict)  # outcome -> (before, after)
    reasons: dict[str, tuple[int, int]] = field(
        default_factory=dict
    )  # reason code -> (before, after)
    other_sources: dict[str, dict[str, tuple[int, int]]] = field(default_factory=dict)
    periods: list[str] = field(default_factory=list)  # published periods the change reaches
    reprocess_id: str = ""


def _select_files(con: duckdb.DuckDBPyConnection, source_id: str, from_month: str | None,
                  file: str | None) -> list[tuple]:  # fmt: skip
    query = (
        "select file_id, file_path, sha256, size_bytes, ingested_at, config_sha256, run_period from ingest_files "
        "where source_id = $s and status = 'ingested'"
    )
    params: dict[str, Any] = {"s": source_id}
    if from_month:
        query += " and extract_month >= $m"
        params["m"] = from_month
    if file:
        query += " and file_path = $f"
        params["f"] = file
    return con.execute(query + " order by file_id", params).fetchall()


def _outcomes(con: duckdb.DuckDBPyConnection) -> dict[str, int]:
    row = con.execute(
        "select "
        + ", ".join(f"coalesce(sum({checked_name('rows_' + o)}), 0)" for o in ALL_OUTCOMES)
        + " from ingest_files where file_id in (select file_id from reprocess_files)"
    ).fetchall()[0]
    return dict(zip(ALL_OUTCOMES, (int(v) for v in row), strict=False))


def _per_file(con: duckdb.DuckDBPyConnection) -> dict[int, dict[str, int]]:
    rows = con.execute(
        "select file_id, "
        + ", ".join(f"{checked_name('rows_' + o)}" for o in ALL_OUTCOMES)
        + " from ingest_files where file_id in (select file_id from reprocess_files)"
    ).fetchall()
    return {r[0]: dict(zip(ALL_OUTCOMES, r[1:], strict=False)) for r in rows}


def _reasons(con: duckdb.DuckDBPyConnection) -> dict[str, int]:
    return dict(con.execute(
        "select reason_code, count(*) from rejected_rows where file_id in (select file_id from reprocess_files) "
        "group by 1 order by 1").fetchall())  # fmt: skip


def _by_source(con: duckdb.DuckDBPyConnection) -> dict[str, dict[str, int]]:
    rows = con.execute(
        "select source_id, "
        + ", ".join(f"sum({checked_name('rows_' + o)})" for o in ALL_OUTCOMES)
        + " from ingest_files where status in ('ingested', 'duplicate_file') group by 1 order by 1"
    ).fetchall()
    return {r[0]: dict(zip(ALL_OUTCOMES, (int(v or 0) for v in r[1:]), strict=False)) for r in rows}


def _pairs(before: dict[str, int], after: dict[str, int]) -> dict[str, tuple[int, int]]:
    return {k: (before.get(k, 0), after.get(k, 0)) for k in sorted(set(before) | set(after))}


def _inbox_relative(inbox: Path, file: str) -> str:
    path = Path(file)
    for candidate in (path, Path.cwd() / path):
        try:
            return candidate.resolve().relative_to(inbox.resolve()).as_posix()
        except ValueError:
            continue
    return path.as_posix()  # already relative to the inbox


def reprocess_source(config_dir: str | Path, inbox: str | Path, out: str | Path, source_id: str,
                     from_month: str | None = None, file: str | None = None, apply: bool = False,
                     demo: bool = False) -> ReprocessResult:  # fmt: skip
    """Read the stored files of ``source_id`` again under the current config (see the module
    docstring); a dry run unless ``apply``. Raises :class:`ReprocessRefused` (nothing changed).
    """
    settings = load_settings(config_dir)
    source = settings.source(source_id)
    key = resolve_key(demo=demo)
    inbox, out = Path(inbox), Path(out)
    rel_file = _inbox_relative(inbox, file) if file else None
    current = source_config_sha256(settings, source_id)
    with run_lock(out):
        con = open_warehouse(out, settings.pipeline.execution.memory_limit)
        try:
            recover_interrupted_run(out, con)
            verify_warehouse_key(
                con, key
            )  # another key would split every person from their history
            chosen = _select_files(con, source_id, from_month, rel_file)
            if not chosen:
                what = (
                    f"file {rel_file}"
                    if rel_file
                    else f"files from {from_month}"
                    if from_month
                    else "files"
                )
                raise ReprocessRefused(
                    f"source {source_id}: no ingested {what} in the warehouse {out}; nothing to reprocess"
                )
            todo = [f for f in chosen if f[5] != current]
            result = ReprocessResult(source_id, [f[1] for f in todo], [f[1] for f in chosen if f[5] == current],
                                     applied=False, config_after=current)  # fmt: skip
            if not todo:
                return result
            for _, rel, sha, *_ in todo:  # every file first: refuse before changing anything
                path = inbox / rel
                if not path.is_file():
                    raise ReprocessRefused(
                        f"{path}: ingested earlier but no longer in the inbox; nothing was reprocessed. Put the "
                        "file back as it was received, or leave it out with --from-month or --file"
                    )
                now = sha256_of(path)
                if now != sha:
                    raise ReprocessRefused(
                        f"{path}: its content differs from what was ingested (SHA-256 now {now[:12]}, "
                        f"ingested {sha[:12]}); nothing was reprocessed. A changed file is a new version: "
                        "the monthly run ingests it; reprocess the unchanged files with --file or --from-month"
                    )
            _replace(con, settings, source, key, inbox, todo, result, current)
            if apply:
                maybe_fail("reprocess:before_commit")
                commit_month(con)
                result.applied = True
            return result
        finally:
            try:
                con.execute("rollback")  # a dry run, or a failure: nothing is kept
            except duckdb.Error:
                pass
            con.close()


def _replace(con: duckdb.DuckDBPyConnection, settings: Settings, source: Any, key: Any, inbox: Path,
             todo: list[tuple], result: ReprocessResult, current: str) -> None:  # fmt: skip
    con.execute("create or replace temp table reprocess_files (file_id bigint)")
    con.execute("insert into reprocess_files select unnest($ids)", {"ids": [f[0] for f in todo]})
    outcomes_before, reasons_before, sources_before = _outcomes(con), _reasons(con), _by_source(con)
    files_before = _per_file(con)
    old_persons = con.execute(
        "select count(distinct person_key) from result_versions where file_id in (select file_id from reprocess_files)"
    ).fetchall()[0][0]
    reprocess_id = uuid.uuid4().hex
    result.reprocess_id = reprocess_id
    # the old rows are kept as superseded versions; the new ones take their (file_id, line_no)
    add_missing_columns(
        con,
        "main",
        "result_versions_replaced",
        fetch_frame(con, "select * from result_versions limit 0"),
    )
    con.execute(
        "insert into result_versions_replaced by name select $id as reprocess_id, outcome as outcome_before, "
        "* replace ('superseded' as outcome) from result_versions where file_id in (select file_id from reprocess_files)",
        {"id": reprocess_id},
    )
    con.execute(
        "create or replace temp table reprocess_old_persons as select distinct person_key "
        "from result_versions where file_id in (select file_id from reprocess_files)"
    )
    con.execute(
        "insert into rejected_rows_replaced by name select $id as reprocess_id, * from rejected_rows "
        "where file_id in (select file_id from reprocess_files)", {"id": reprocess_id})  # fmt: skip
    con.execute(
        "delete from result_versions where file_id in (select file_id from reprocess_files)"
    )
    con.execute("delete from rejected_rows where file_id in (select file_id from reprocess_files)")
    maybe_fail("reprocess:replaced")
    # the same path as a monthly run: reference tables, row rules file by file, gate, versions
    load_reference_tables(con, settings)
    files = begin_landed_files(con)  # the ingest stage's table of this run's files
    judged = begin_judging(con, files=files)
    cache = PersonKeyCache(key)
    for file_id, rel, sha, size, ingested_at, _, run_period in todo:
        item = InboxFile(source.id, inbox / rel, rel, sha, size, file_id=file_id)
        # rows without a report date get the one they got when first ingested
        undated_on = undated_report_date(
            run_period, ingested_at.date() if ingested_at else dt.date.today()
        )
        try:
            frame = read_inbox_file(source, item, settings, undated_on)
        except FileFault as fault:
            raise ReprocessRefused(f"{fault}; under the current config the file cannot be read, nothing was "
                                   "reprocessed") from None  # fmt: skip
        keyed = add_person_keys(frame, key, cache)
        del frame
        judge_file(con, keyed, judged)
        del keyed
        record_landed_file(con, files, file_id)
    default = settings.pipeline.quality_gate.max_rejection_rate
    limit = source.max_rejection_rate if source.max_rejection_rate is not None else default
    gate = settings.pipeline.quality_gate
    unmapped = (
        source.max_unmapped_share
        if source.max_unmapped_share is not None
        else gate.max_unmapped_share
    )
    settled = validate_landed(
        con, judged, {source.id: limit}, _batch_gate(settings), {source.id: unmapped}
    )
    held = settled.held
    if held:
        raise ReprocessRefused(f"source {source.id}: under the current config the quality gate would hold it "
                               f"back ({held.get(source.id, '')}); nothing was reprocessed")  # fmt: skip
    resolved = resolve_versions(con, settled, full=True)
    update_ledger_counts(con, resolved.scope, judged.files)
    con.execute("update ingest_files set config_sha256 = ? where file_id in (select file_id from reprocess_files)",
                [current])  # fmt: skip
    measure_stage(con, settings, touched_only=False)
    # the persons' events and status are recomputed in full by the next run
    con.execute("delete from link_snapshots")
    shared = con.execute(
        "select count(*) from (select distinct person_key from result_versions "
        "where file_id in (select file_id from reprocess_files)) join reprocess_old_persons using (person_key)"
    ).fetchall()[0][0]
    if old_persons >= 5 and shared == 0:
        raise ReprocessRefused(
            f"source {source.id}: none of the {old_persons} persons of the stored rows has the same person key "
            "now: the pseudonymisation key is not the one the warehouse was built with; nothing was reprocessed"
        )
    outcomes_after = _outcomes(con)
    result.outcomes = {k: (outcomes_before[k], outcomes_after[k]) for k in ALL_OUTCOMES}
    result.reasons = _pairs(reasons_before, _reasons(con))
    after = _by_source(con)
    result.other_sources = {s: _pairs(sources_before.get(s, {}), after.get(s, {})) for s in sorted(set(after) | set(sources_before))
                            if s != source.id and sources_before.get(s) != after.get(s)}  # fmt: skip
    result.periods = [p for (p,) in con.execute(read_sql("reprocess_periods"), {"id": reprocess_id}).fetchall()]  # fmt: skip
    files_after = _per_file(con)
    now = dt.datetime.now(dt.UTC).replace(tzinfo=None)
    for file_id, rel, sha, _, _, before_hash, _ in todo:
        con.execute(
            "insert into reprocess_log values (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            [reprocess_id, now, source.id, file_id, rel, sha, before_hash, current,
             json.dumps(files_before.get(file_id, {})), json.dumps(files_after.get(file_id, {}))],
        )  # fmt: skip


def _batch_gate(settings: Settings) -> Any:
    gate = settings.pipeline.quality_gate
    if not gate.great_expectations:
        return None

    def check(con: duckdb.DuckDBPyConnection, judged: Judged) -> dict[str, str]:
        from pipeline.stages.quality_gate import (  # GX is imported only when the gate runs
            Batch,
            check_batches,
        )

        checks = check_batches(
            con, settings, None, quality_pages="never", batch=Batch(judged.rows, judged.files)
        )
        return {s: "; ".join(c.failed[:3]) for s, c in checks.items() if not c.success}

    return check
