"""Link: person trajectories across labs and months, events and person status at the period end.

The rules are in ``sql/analysis/kidney_events.sql`` and ``sql/analysis/person_status.sql``; their
numbers come from config/pipeline.yaml ("trajectories") through ``reference.trajectory_rules``
and bound parameters.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import duckdb

from pipeline.core.periods import Period
from pipeline.core.rule_params import event_params, trajectory_rules
from pipeline.core.settings import Settings
from pipeline.warehouse.connection import (
    drop_relation,
    with_frame,
)
from pipeline.warehouse.measure_sql import measure_into
from pipeline.warehouse.sql import (
    build_table,
    ranges_for,
    replace_period_rows_by_range,
    sql_over,
    swap_period_rows,
    used_params,
)
from pipeline.warehouse.sql_files import checked_name, read_sql, sql_path
from pipeline.warehouse.versions import close_over_partitions


def write_trajectory_rules(con: duckdb.DuckDBPyConnection, settings: Settings) -> None:
    with_frame(
        con,
        trajectory_rules(settings),
        "create or replace table reference.trajectory_rules as select * from _frame",
    )


def write_known_as_of(con: duckdb.DuckDBPyConnection, period: Period) -> None:
    """``reference.known_as_of``: the period whose end the views ``results_known`` and
    ``measures_known`` read (a view holds no bound parameters; the date goes in here as one).
    """
    con.execute("create schema if not exists reference")
    con.execute(
        "create or replace table reference.known_as_of as select ?::varchar as period, "
        "?::date as period_end",
        [period.label, period.end],
    )


def build_known_at_period_end(con: duckdb.DuckDBPyConnection, period: Period) -> bool:
    """The results as known at the period end (``results_known``): versions reported later
    do not count, so a past period is rebuilt as it was known then.

    Returns True when nothing in the warehouse is reported after the period end (the usual
    monthly run): the outcomes as known then are the stored ones, and the accepted rows are
    taken as they are, without settling the versions a second time.
    """
    later = con.execute(
        "select count(*) from result_versions where reported_date > ?", [period.end]
    ).fetchall()[0][0]
    drop_relation(con, "results_known")
    if later == 0:
        # the same rows as sql/derived/results_known.sql gives in this case, as a view (no
        # copy); a view holds no parameters, so it reads the date from reference.known_as_of
        write_known_as_of(con, period)
        con.execute(
            "create view results_known as select * from result_versions where outcome = 'accepted' "
            "and collected_date <= (select period_end from reference.known_as_of)"
        )
        return True
    con.execute("create or replace temp view versions_in_scope as select * from result_versions")
    build_table(
        con, "result_versions_resolved", "versions_as_of", {"as_of": period.end}, temporary=True
    )
    con.execute("drop view versions_in_scope")
    build_table(con, "results_known", params={"period_end": period.end})
    con.execute("drop table versions_as_of")
    return False


def build_person_tables(
    con: duckdb.DuckDBPyConnection,
    settings: Settings,
    period: Period,
    sharded: bool = False,
    as_stored: bool = False,
    snapshot: Snapshot | None = None,
    validated: ValidatedScope | None = None,
    build_changed: ChangedPersonsBuilder | None = None,
) -> int:
    """From ``results_known``: the measures known at the period end, daily values, events
    and person status; returns the persons whose events were computed.

    ``as_stored``: the results known at the period end are those of ``lab_results``, so their
    measures are ``kidney_measures`` as they are (not computed a second time). ``snapshot``: an
    earlier period whose person-level rows can be carried over for every person whose results
    did not change since (:func:`carry_over`; ``validated``: what the validate stage handed
    over, see :class:`ValidatedScope`; ``build_changed``: where the changed persons' rows are
    computed, by default :func:`build_changed_in_warehouse`). ``sharded``: a shard's own
    throw-away database (plain tables, no other periods to keep).
    """
    params = event_params(settings, period)
    drop_relation(con, "measures_known")
    if as_stored:
        write_known_as_of(con, period)
        con.execute(
            "create view measures_known as select * from kidney_measures "
            "where collected_date <= (select period_end from reference.known_as_of)"
        )
    else:
        measure_into(con, settings, "results_known", "measures_known")
    if snapshot is not None:
        return carry_over(con, settings, period, snapshot, validated, build_changed)
    if sharded:
        build_from_measures(con, settings, period)
        return -1
    build_table(con, "daily_values_averaged", params=params)
    daily = con.execute("select count(*) from daily_values_averaged").fetchall()[0][0]
    chunks = ranges_for(daily)
    replace_period_rows_by_range(
        con, "kidney_events", period.label, params,
        ("daily_values_averaged", "measures_known", "results_known"), chunks,
    )  # fmt: skip
    replace_period_rows_by_range(
        con, "person_status", period.label, params,
        ("daily_values_averaged", "results_known", "kidney_events"), chunks,
    )  # fmt: skip
    return -1


@dataclass(frozen=True)
class Snapshot:
    period: str
    period_end: object
    max_file_id: int


@dataclass(frozen=True)
class ValidatedScope:
    """What this run's validate stage hands the link stage: the temporary table of the persons
    of the touched scope it settled (None when it settled every version) and the relation of the
    ids of the files this run landed. With both, the usual month starts its changed persons
    from the validate stage's closure instead of taking it again.
    """

    persons: str | None = None
    run_files: str | None = None


def logic_fingerprint(settings: Settings) -> str:
    """What the person-level tables depend on besides the data: settings, rules, code and SQL."""
    digest = hashlib.sha256()
    for part in (settings.pipeline.measures, settings.pipeline.trajectories, settings.analytes):
        digest.update(part.model_dump_json().encode())
    for path in LOGIC_FILES:
        digest.update(path.read_bytes())
    return digest.hexdigest()


_PACKAGE = Path(__file__).resolve().parents[2]

#: Code and SQL whose change makes every person's events be recomputed.
LOGIC_FILES = tuple(
    [_PACKAGE / n for n in ("core/measure_rules.py", "core/equations.py", "core/rule_params.py",
                            "stages/link/persons.py")]
    + [sql_path(n) for n in ("results_known", "daily_values_averaged", "kidney_events",
                             "result_versions_resolved", "kidney_events_carried",
                             "person_status_carried", "link_seed_versions",
                             "kidney_measures", "measure_ages")]  # the stored measures' rules
)  # fmt: skip


def usable_snapshot(
    con: duckdb.DuckDBPyConnection, period: Period, fingerprint: str
) -> Snapshot | None:
    """The latest built period, when it ends before this one and was built by the same logic."""
    rows = con.execute(
        "select period, period_end, max_file_id, fingerprint from link_snapshots "
        "order by period_end desc limit 1"
    ).fetchall()
    if not rows:
        return None
    label, end, max_file_id, built_with = rows[0]
    if end >= period.end or built_with != fingerprint:
        return None
    return Snapshot(label, end, max_file_id)


def changed_persons(
    con: duckdb.DuckDBPyConnection,
    period: Period,
    snapshot: Snapshot,
    validated: ValidatedScope | None = None,
) -> int:
    """``link_persons``: the persons whose results as known at this period end may differ
    from those known when the snapshot was built: a version ingested since, or reported between
    the two period ends, and (as in the validate stage's scope) every person sharing a version
    partition with one of those. Every other person's events are the snapshot's.
    """
    params = {
        "max_file_id": snapshot.max_file_id,
        "snap_end": snapshot.period_end,
        "period_end": period.end,
    }
    if validated is not None and _same_seed_as_validate(con, params, validated):
        # the usual month: the versions ingested since the snapshot are this run's, and no
        # earlier one is reported between the two period ends, so the seed is the validate
        # stage's and so is its closure
        con.execute(
            "create or replace temp table link_persons as "
            f"select * from {checked_name(validated.persons or '')}"
        )
    else:
        close_over_partitions(con, read_sql("link_seed_versions"), params, "link_persons")
    return con.execute("select count(*) from link_persons").fetchall()[0][0]


def _same_seed_as_validate(
    con: duckdb.DuckDBPyConnection, params: dict, validated: ValidatedScope
) -> bool:
    """Whether this run's validate stage settled a touched scope whose seed (this run's new
    versions) is exactly the snapshot's seed (``sql/derived/link_seed_others.sql``).
    """
    if not validated.persons or not validated.run_files:
        return False
    query = sql_over(
        "link_seed_others",
        {"this_run_files": f"select file_id from {checked_name(validated.run_files)}"},
    )
    other = con.execute(query, params).fetchall()[0][0]
    return other == 0


def build_from_measures(con: duckdb.DuckDBPyConnection, settings: Settings, period: Period) -> None:
    """Daily values, events and person status as plain tables of ``con``, from its
    ``results_known`` and ``measures_known`` (a shard's or the carry-over's own database, which
    holds no other period).
    """
    params = event_params(settings, period)
    for table in CHANGED_PERSON_TABLES:
        build_table(con, table, params=params)


#: The person-level tables the changed persons' rows are computed for (in this order) by a
#: :data:`ChangedPersonsBuilder`.
CHANGED_PERSON_TABLES = ("daily_values_averaged", "kidney_events", "person_status")

#: Computes the daily values, events and person status of the persons in ``link_persons`` from
#: their rows of ``results_known`` and ``measures_known``, and appends them to the warehouse's
#: ``daily_values_averaged``, ``kidney_events_new`` and ``person_status_new`` (in the order of
#: ``pipeline.stages.link.stage.PERSON_TABLE_ORDER`` or any other: the tables are read sorted).
#: :func:`build_changed_in_warehouse` does it in the warehouse's own connection; the link
#: stage's bucket path sends the persons' buckets to Dask instead.
ChangedPersonsBuilder = Callable[[duckdb.DuckDBPyConnection, Settings, Period], None]


def carry_over(
    con: duckdb.DuckDBPyConnection,
    settings: Settings,
    period: Period,
    snapshot: Snapshot,
    validated: ValidatedScope | None = None,
    build_changed: ChangedPersonsBuilder | None = None,
) -> int:
    """Build this period's person-level rows from the snapshot's, for every person whose results did
    not change since it was built; the changed persons' rows computed from their own results
    with the same SQL (daily values, events, person status) by ``build_changed`` (by default in
    the warehouse's connection, :func:`build_changed_in_warehouse`). Returns the changed
    persons, who are left in the temporary table ``link_persons``.

    Why this equals a full rebuild: daily values and events depend on a person's values only;
    of person status only the age and age band depend on the period end, and they are
    recomputed here as in ``sql/analysis/person_status.sql``.
    """
    n = changed_persons(con, period, snapshot, validated)
    carried = {"period": period.label, "period_end": period.end, "snapshot": snapshot.period}
    build_table(con, "kidney_events_carried", "kidney_events_new", carried, temporary=True)
    build_table(con, "person_status_carried", "person_status_new", carried, temporary=True)
    con.execute(
        "delete from daily_values_averaged "
        "where person_key in (select person_key from link_persons)"
    )
    if n:  # a month without new results sends nothing to the buckets, nor starts a cluster
        (build_changed or build_changed_in_warehouse)(con, settings, period)
    swap_period_rows(con, "kidney_events", period.label)
    swap_period_rows(con, "person_status", period.label)
    # ``link_persons`` stays: the link stage's result names it (LinkSummary.changed_persons),
    # and the summarise stage recomputes the equation comparison for these persons only
    return n


def build_changed_in_warehouse(
    con: duckdb.DuckDBPyConnection, settings: Settings, period: Period
) -> None:
    """The :data:`ChangedPersonsBuilder` of the in-process run: the changed persons' rows
    computed in the warehouse's own connection. Their results and measures are taken once into
    temporary tables, and each SQL file reads those (and the changed persons' rows built before
    it) through common table expressions of the names it reads (:func:`sql_over`), so it runs
    unchanged; nothing is copied between databases.
    """
    params = event_params(settings, period)
    shadow = {}
    for table in ("results_known", "measures_known"):
        shadow[table] = f"select * from {checked_name('changed_' + table)}"
        con.execute(
            f"create or replace temp table {checked_name('changed_' + table)} as "
            f"select * from {checked_name(table)} semi join link_persons using (person_key)"
        )
    for table, target in zip(CHANGED_PERSON_TABLES, CHANGED_PERSON_TARGETS, strict=True):
        query = sql_over(table, shadow)
        changed = checked_name("changed_" + table)
        con.execute(
            f"create or replace temp table {changed} as\n{query}", used_params(query, params)
        )
        con.execute(f"insert into {checked_name(target)} by name select * from {changed}")
        shadow[table] = f"select * from {changed}"
    for table in ("results_known", "measures_known", *CHANGED_PERSON_TABLES):
        con.execute(f"drop table {checked_name('changed_' + table)}")


#: Where a :data:`ChangedPersonsBuilder` appends each of :data:`CHANGED_PERSON_TABLES`.
CHANGED_PERSON_TARGETS = ("daily_values_averaged", "kidney_events_new", "person_status_new")


def record_snapshot(
    con: duckdb.DuckDBPyConnection, period: Period, fingerprint: str, recomputed: int
) -> None:
    persons = con.execute(
        "select count(*) from person_status where period = ?", [period.label]
    ).fetchall()[0][0]
    con.execute("delete from link_snapshots where period = ?", [period.label])
    con.execute(
        "insert into link_snapshots select ?, ?, (select coalesce(max(file_id), 0) from ingest_files), "
        "?, ?, ?",
        [period.label, period.end, fingerprint, persons, persons if recomputed < 0 else recomputed],
    )
