"""Landing: each new file read by its layout's reader, its rows keyed and handed to the run's
sink, and recorded in the ``ingest_files`` ledger; what the stage leaves for the next ones.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path

import duckdb
import polars as pl

from pipeline.core import identifiers
from pipeline.core.landed import _LANDED_SCHEMA, LANDED_COLUMNS
from pipeline.core.pseudonymise import PersonKeyCache, PseudonymKey, add_person_keys
from pipeline.core.settings import Settings, SourceConfig, source_config_sha256
from pipeline.stages.ingest.dates import add_dates, undated_report_date
from pipeline.stages.ingest.delimited import read_delimited
from pipeline.stages.ingest.fhir import read_fhir_export
from pipeline.stages.ingest.inbox import FileFault, InboxFile, extract_month, scan_inbox
from pipeline.stages.ingest.parquet import read_parquet
from pipeline.stages.ingest.rows import district_places, reject_control_characters
from pipeline.warehouse.connection import memory_limit_within
from pipeline.warehouse.sql_files import checked_name, read_sql

#: The temporary table (``file_id bigint``) of this run's files that gave rows; the stage's
#: result (:class:`Landed`) names it for the stages that read it.
LANDED_FILES = "landed_files"


@dataclass(frozen=True)
class Landed:
    """What the ingest stage leaves for the next ones: ``files``, the temporary table of this
    run's files that gave rows (their ids), and the counts the run reports.
    """

    files: str
    files_new: int = 0
    files_skipped: int = 0
    files_held_back: int = 0
    rows_landed: int = 0
    held_back: tuple[tuple[str, str], ...] = ()  # (path, message)
    #: (path, column, pattern, reason) of every flagged column a source config allows
    allowed_identifiers: tuple[tuple[str, str, str, str], ...] = ()


def begin_landed_files(con: duckdb.DuckDBPyConnection) -> str:
    """Create the run's (empty) table of landed files; its name. A reprocess, which lands stored
    files again, fills it the same way (:func:`record_landed_file`).
    """
    con.execute(f"create or replace temp table {LANDED_FILES} (file_id bigint)")
    return LANDED_FILES


def record_landed_file(con: duckdb.DuckDBPyConnection, files: str, file_id: int) -> None:
    """Add a file that gave rows to the table ``files`` (:func:`begin_landed_files`)."""
    files = checked_name(files)
    con.execute(f"insert into {files} values (?)", [file_id])


@dataclass
class IngestSummary:
    """The counts of :func:`land_inbox` while it runs (its result is :class:`Landed`)."""

    files_new: int = 0
    files_skipped: int = 0
    files_held_back: int = 0
    rows_landed: int = 0
    held_back: list[tuple[str, str]] = field(default_factory=list)  # (path, message)
    #: (path, column, pattern, reason) of every flagged column a source config allows
    allowed_identifiers: list[tuple[str, str, str, str]] = field(default_factory=list)


def read_inbox_file(source: SourceConfig, item: InboxFile, settings: Settings, undated_on: dt.date,
                    run_day: dt.date | None = None) -> pl.DataFrame:  # fmt: skip
    """Landed rows of one file, dates parsed, the person token still present; ``undated_on`` is
    the report date of rows without one in a file without a month in its name, ``run_day`` the
    day of the run (a collection date after it is rejected; today if not given).
    """
    if source.layout == "fhir_ndjson":
        frame = read_fhir_export(source, item, settings)
    elif source.layout == "parquet":
        frame = read_parquet(source, item, district_places(settings))
    else:
        frame = read_delimited(source, item, places=district_places(settings))
    return add_dates(
        reject_control_characters(frame.select(LANDED_COLUMNS)), source, item, undated_on, run_day
    )


#: DuckDB's share of ``execution.memory_limit`` while files are landed. The stage holds two files
#: in Python (one read ahead, one keyed and judged) beside DuckDB's buffer, and DuckDB only
#: appends their rows there (an append spills to disk at the limit, nothing has to fit at once).
#: At 30M results the stage peaked at 3.2 GB with the whole 1.5 GB and 2.6 GB with 1 GB, 6 %
#: slower; the stages after it get the whole limit back for their joins.
INGEST_MEMORY_SHARE = 2 / 3


def land_inbox(
    con: duckdb.DuckDBPyConnection,
    settings: Settings,
    inbox: Path,
    key: PseudonymKey,
    run_period: str,
    ingested_on: dt.date,
    items: list[InboxFile] | None = None,
    *,
    sink: Callable[[duckdb.DuckDBPyConnection, pl.DataFrame], None],
    on_file: Callable[[int, int, int], None] | None = None,
) -> Landed:
    """Read every new file, hand its keyed rows to ``sink`` and record it in ``ingest_files``.

    Person tokens are re-keyed before the rows reach DuckDB, each distinct token once per run.
    Each file's rows go to ``sink`` (``pipeline.stages.validate.judge_file`` in a run) as soon as it is
    read, so only one file is held in memory. The result names the temporary table of this
    run's files that gave rows (``Landed.files``) and carries the counts. ``items`` replaces the inbox scan (``sources check``
    reads one given file). ``on_file(done, total, rows)``, when given, is told after each file
    that is not skipped: files done of those to take, and the rows landed so far (the run's
    progress display).
    """
    summary = IngestSummary()
    undated_on = undated_report_date(run_period, ingested_on)
    if items is None:
        items = scan_inbox(con, settings, inbox)
    next_id = con.execute("select coalesce(max(file_id), 0) + 1 from ingest_files").fetchall()[0][0]
    files = begin_landed_files(con)
    keys = PersonKeyCache(key)
    for item in items:  # ids in inbox order, as the files are recorded
        if item.status != "already_ingested":
            item.allowed_identifiers.clear()
            item.file_id = next_id
            next_id += 1
    # Read ahead: the next new file is read in a second thread while this one is keyed and
    # judged (polars and DuckDB release the GIL, so the two overlap on two cores); the files
    # are still taken in inbox order and at most one is read ahead, so the ids, the ledger and
    # every table are what the one-at-a-time loop gives (tests/unit/stages/ingest/test_landing.py).
    ahead = [i for i in items if i.status == "new"]
    reads: dict[int, Future[pl.DataFrame]] = {}
    pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="read-ahead")

    def read_next(after: int) -> None:
        for candidate in ahead[after : after + 2]:  # this file and the next one
            if id(candidate) not in reads:
                reads[id(candidate)] = pool.submit(
                    read_inbox_file, settings.source(candidate.source_id), candidate, settings,
                    undated_on, ingested_on)  # fmt: skip

    limit = settings.pipeline.execution.memory_limit
    try:
        with memory_limit_within(con, limit, INGEST_MEMORY_SHARE):
            return _land_items(con, settings, items, key, keys, files, summary, run_period,
                               undated_on, ingested_on, sink, ahead, reads, read_next,
                               on_file or _unheard)  # fmt: skip
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


def _unheard(done: int, total: int, rows: int) -> None:
    """No one listens to the progress of the files."""


def _land_items(con: duckdb.DuckDBPyConnection, settings: Settings, items: list[InboxFile],
                key: PseudonymKey, keys: PersonKeyCache, files: str, summary: IngestSummary,
                run_period: str, undated_on: dt.date, ingested_on: dt.date,
                sink: Callable[[duckdb.DuckDBPyConnection, pl.DataFrame], None],
                ahead: list[InboxFile], reads: dict[int, Future[pl.DataFrame]],
                read_next: Callable[[int], None],
                on_file: Callable[[int, int, int], None]) -> Landed:  # fmt: skip
    """The loop of :func:`land_inbox` over the scanned files, with its read-ahead."""
    position = {id(i): n for n, i in enumerate(ahead)}
    to_take = sum(i.status != "already_ingested" for i in items)
    taken = 0
    for item in items:
        if item.status == "already_ingested":
            summary.files_skipped += 1
            if item.stat is not None and not item.hash_reused:
                # hashed again (first scan after an upgrade, or the file touched or copied, its
                # content the same): its status now, so the next scan need not read it
                con.execute(
                    "update ingest_files set file_stat = $stat where file_id = (select max(file_id) "
                    "from ingest_files where source_id = $source and file_path = $path "
                    "and sha256 = $sha and status in ('ingested', 'duplicate_file'))",
                    {"stat": item.stat, "source": item.source_id, "path": item.rel_path,
                     "sha": item.sha256},
                )  # fmt: skip
            continue
        source = settings.source(item.source_id)
        # a file held back earlier is tried again: its old ledger row (no rows stored) goes
        con.execute(
            "delete from ingest_files where source_id = ? and file_path = ? and sha256 = ? "
            "and status = 'held_back'",
            [item.source_id, item.rel_path, item.sha256],
        )
        version = con.execute(
            "select count(distinct sha256) + 1 from ingest_files where source_id = ? and file_path = ?",
            [item.source_id, item.rel_path],
        ).fetchall()[0][0]
        status, message, rows_read = "ingested", None, 0
        original = con.execute(
            "select rows_read from ingest_files where source_id = ? and sha256 = ? "
            "and status = 'ingested' order by file_id limit 1",
            [item.source_id, item.sha256],
        ).fetchall() if item.status == "duplicate_file" else []  # fmt: skip
        if item.status in ("unreadable", "held_back"):  # held_back: the source's config changed
            status, message = "held_back", item.fault
            summary.files_held_back += 1
            summary.held_back.append((item.rel_path, item.fault or ""))
        elif original:
            status = "duplicate_file"
            message = (
                f"same content as {item.same_as}, already ingested; every row counted as duplicate"
            )
            rows_read = original[0][0]
            summary.files_skipped += 1
        else:  # new, or a copy of a file that was not ingested (held back): read it
            try:
                if id(item) in position:
                    read_next(position[id(item)])
                    frame = reads.pop(id(item)).result()
                else:  # a copy of a file held back earlier: read here
                    frame = read_inbox_file(source, item, settings, undated_on, ingested_on)
            except FileFault as fault:
                status, message = "held_back", item.safe(str(fault))
                summary.files_held_back += 1
                summary.held_back.append((item.rel_path, message))
            else:
                rows_read = frame.height
                keyed = add_person_keys(frame, key, keys)
                del frame
                if keyed.schema != _LANDED_SCHEMA:
                    raise AssertionError(
                        f"landed columns {dict(keyed.schema)} differ from {dict(_LANDED_SCHEMA)}"
                    )
                sink(con, keyed)
                del keyed
                if rows_read:
                    record_landed_file(con, files, item.file_id)
                summary.files_new += 1
                summary.rows_landed += rows_read
                if item.notes:
                    message = "; ".join(item.notes)
                if item.allowed_identifiers:
                    note = identifiers.allowance_note(item.allowed_identifiers)
                    message = f"{message}; {note}" if message else note
                    summary.allowed_identifiers.extend(
                        (item.rel_path, f.column, f.pattern, f.allowed_reason or "")
                        for f in item.allowed_identifiers
                    )
        con.execute(
            "insert into ingest_files by name " + read_sql("ingest_file_entry"),
            {"file_id": item.file_id, "source_id": item.source_id, "file_path": item.rel_path,
             "version": version, "sha256": item.sha256, "size_bytes": item.size_bytes,
             "status": status, "message": message, "rows_read": rows_read,
             "rows_duplicate": rows_read if status == "duplicate_file" else 0,
             "run_period": run_period, "extract_month": extract_month(item.rel_path, run_period),
             "config_sha256": source_config_sha256(settings, item.source_id),
             "file_stat": item.stat if status != "held_back" else None},
        )  # fmt: skip
        taken += 1
        on_file(taken, to_take, summary.rows_landed)
    return Landed(
        files,
        summary.files_new,
        summary.files_skipped,
        summary.files_held_back,
        summary.rows_landed,
        tuple(summary.held_back),
        tuple(summary.allowed_identifiers),
    )
