"""Link stage: the person-level tables of the period (in process or in shards), with the
incremental carry-over of unchanged persons (in process or in shards alike: only the persons
whose results changed are computed).
"""

from __future__ import annotations

import shutil
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import duckdb

from pipeline.core.periods import Period
from pipeline.core.settings import Settings
from pipeline.stages.link.persons import (
    CHANGED_PERSON_TABLES,
    CHANGED_PERSON_TARGETS,
    ChangedPersonsBuilder,
    ValidatedScope,
    build_known_at_period_end,
    build_person_tables,
    logic_fingerprint,
    record_snapshot,
    usable_snapshot,
    write_trajectory_rules,
)
from pipeline.warehouse.connection import drop_relation
from pipeline.warehouse.sql import swap_period_rows
from pipeline.warehouse.sql_files import checked_name

if TYPE_CHECKING:
    from pipeline.stages.link.shards import ShardMapper

#: Row order of the person-level tables (as their SQL orders them), for putting shards together.
PERSON_TABLE_ORDER = {
    "measures_known": ["person_key", "collected_date", "analyte", "file_id", "line_no"],
    # a day's eGFRs can fall in both families when labs send other birth years for one person
    "daily_values_averaged": ["person_key", "measure", "day", "equation_family"],
    "kidney_events": ["person_key", "rule_id"],
    "person_status": ["person_key"],
}


def build_person_tables_sharded(
    con: duckdb.DuckDBPyConnection,
    settings: Settings,
    period: Period,
    work: Path,
    on_shard: Callable[[int, int], None] | None = None,
    submit: ShardMapper | None = None,
) -> int:
    """The same tables through person-hash shards (executor ``shards`` or ``dask``), every
    person computed; ``on_shard(done, total)`` is told as each shard finishes; ``submit`` sends
    the shards to Dask (:func:`pipeline.stages.link.shards.run_shards`).
    """
    from pipeline.stages.link.shards import export_shard_inputs, run_shards, shard_outputs

    folders = export_shard_inputs(con, work, settings.pipeline.execution.shards)
    done = run_shards(folders, settings, period, on_shard, submit)
    for table, order in PERSON_TABLE_ORDER.items():
        # DuckDB reads the shards' files and sorts within its memory limit: gathered into one
        # polars frame, the driver's memory grew with the warehouse (9.5 GB at 10M results)
        rows = _sorted_rows(order)
        files = {"files": shard_outputs(done, table)}
        if table in ("kidney_events", "person_status"):
            con.execute(
                f"create or replace temp table {checked_name(table + '_new')} as {rows}", files
            )
            swap_period_rows(con, table, period.label)
        else:
            drop_relation(con, table)
            con.execute(f"create table {checked_name(table)} as {rows}", files)
    shutil.rmtree(work, ignore_errors=True)
    return len(done)


def changed_in_shards(
    work: Path,
    on_shard: Callable[[int, int], None] | None = None,
    submit: ShardMapper | None = None,
) -> ChangedPersonsBuilder:
    """The carry-over's :data:`~pipeline.stages.link.persons.ChangedPersonsBuilder` on the
    bucket path: only the changed persons (``link_persons``) go to the shards, with their
    results and measures known at the period end; their rows come back as the shards' files.
    """

    def build(con: duckdb.DuckDBPyConnection, settings: Settings, period: Period) -> None:
        from pipeline.stages.link.shards import export_shard_inputs, run_shards, shard_outputs

        shards = settings.pipeline.execution.shards
        folders = export_shard_inputs(con, work, shards, persons="link_persons")
        done = run_shards(folders, settings, period, on_shard, submit)
        for table, target in zip(CHANGED_PERSON_TABLES, CHANGED_PERSON_TARGETS, strict=True):
            con.execute(
                f"insert into {checked_name(target)} by name "
                + _sorted_rows(PERSON_TABLE_ORDER[table]),
                {"files": shard_outputs(done, table)},
            )
        shutil.rmtree(work, ignore_errors=True)

    return build


def _sorted_rows(order: list[str]) -> str:
    """The rows of the shards' files ``$files``, in the row order of one run."""
    return "select * from read_parquet($files, union_by_name = true) order by " + ", ".join(
        f"{checked_name(c)} nulls first" for c in order
    )


def link_stage(
    con: duckdb.DuckDBPyConnection,
    settings: Settings,
    period: Period,
    work: Path | None = None,
    validated: ValidatedScope | None = None,
    on_shard: Callable[[int, int], None] | None = None,
    submit_shards: ShardMapper | None = None,
) -> LinkSummary:
    """The link stage; with executor ``shards`` or ``dask`` the person-level tables are built
    per person-hash shard in ``work`` (pipeline/stages/link/shards.py). ``validated``: what this
    run's validate stage handed over (the persons of its touched scope, this run's files).
    """
    write_trajectory_rules(con, settings)
    as_stored = build_known_at_period_end(con, period)
    fingerprint = logic_fingerprint(settings)
    executor_local = settings.pipeline.execution.executor == "local" or work is None
    snapshot = usable_snapshot(con, period, fingerprint) if as_stored else None
    if executor_local or snapshot is not None:
        # a month with a usable snapshot sends only its changed persons to the shards
        changed = None if executor_local else changed_in_shards(work, on_shard, submit_shards)
        recomputed = build_person_tables(
            con, settings, period, as_stored=as_stored, snapshot=snapshot, validated=validated,
            build_changed=changed,
        )  # fmt: skip
    else:
        build_person_tables_sharded(con, settings, period, work, on_shard, submit_shards)
        recomputed = -1
    record_snapshot(con, period, fingerprint, recomputed)
    carried = snapshot is not None  # the unchanged persons' rows came from it
    persons = con.execute(
        "select count(*) from person_status where period = ?", [period.label]
    ).fetchall()[0][0]
    confirmed, pending = con.execute(
        "select count(*) filter (where event_status = 'confirmed'), "
        "count(*) filter (where event_status = 'pending') from kidney_events where period = ?",
        [period.label],
    ).fetchall()[0]
    return LinkSummary(
        persons,
        confirmed,
        pending,
        persons if recomputed < 0 else recomputed,
        fingerprint=fingerprint,
        carried_from=snapshot.period if snapshot is not None else None,
        changed_persons="link_persons" if carried else None,
    )


@dataclass(frozen=True)
class LinkSummary:
    """What the link stage leaves: the period's counts, the fingerprint of the rules and code
    that made its person tables and, when the rows of unchanged persons were carried over from an
    earlier period (``carried_from``), the temporary table of the persons computed anew
    (``changed_persons``, one column ``person_key``); both None when every person was computed.
    """

    persons: int
    events_confirmed: int
    events_pending: int
    persons_recomputed: int = 0
    fingerprint: str = ""
    carried_from: str | None = None
    changed_persons: str | None = None
