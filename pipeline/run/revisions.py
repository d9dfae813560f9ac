"""Revisions of published periods: publishing a period again is explicit, and earlier releases stay.

A period's first publication is revision 1. A later run of the same period whose published
tables come out exactly the same (a re-run, a recovery) publishes nothing new: the revision
stays. A run whose published tables would differ is a *revision*: without a reason
(``kidneysurv run --revise "why"``) it stops before its commit with :class:`RevisionNeeded`
(the CLI exits 2) and nothing changes. With a reason:

- the rows of the earlier release move from ``published.<table>`` to
  ``published_history.<table>`` (same columns, with their ``revision``), so both stay readable
  in SQL; ``published.<table>`` holds the current release only, with its ``revision``;
- the ``runs`` row carries ``revision`` and ``revision_reason``, and the run manifest a
  ``revision`` block with the date, the reason and the headline figures before and after, which
  the report shows as a banner;
- the exports of the earlier release move to ``<out>/<period>/revisions/<n>/`` beside the new
  ones in ``<out>/<period>/`` (staged with the new exports, installed after the commit).

Everything happens inside the run's transaction, so a kill at any point leaves the previous
release in place.
"""

from __future__ import annotations

import json
import shutil
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import duckdb

from pipeline.warehouse.catalog import PUBLISHED_TABLES
from pipeline.warehouse.connection import add_missing_columns, fetch_frame
from pipeline.warehouse.sql import sql_over
from pipeline.warehouse.sql_files import checked_name

HISTORY_SCHEMA = "published_history"
REVISIONS_FOLDER = "revisions"


class RevisionNeeded(Exception):
    """The run would change an already published period and no reason for a revision was given."""


@dataclass
class Release:
    """What this run publishes for its period."""

    revision: int  # the revision number of the release now in published.*
    previous: int  # the revision published before this run (0: none)
    revised: bool = False  # a new revision replaced an earlier release
    reason: str | None = None
    previous_run: dict[str, Any] = field(default_factory=dict)  # run_id, started_at, headline


def _published(con: duckdb.DuckDBPyConnection, schema: str, name: str) -> bool:
    return (
        con.execute(
            "select count(*) from duckdb_tables() where schema_name = ? and table_name = ? "
            "and database_name = current_database()",
            [schema, name],
        ).fetchall()[0][0]
        > 0
    )


def _has_column(con: duckdb.DuckDBPyConnection, table: str, column: str) -> bool:
    return (
        con.execute(
            "select count(*) from duckdb_columns() where schema_name = 'main' and table_name = ? "
            "and column_name = ? and database_name = current_database()",
            [table, column],
        ).fetchall()[0][0]
        > 0
    )


def current_release(con: duckdb.DuckDBPyConnection, period: str) -> tuple[int, dict[str, Any]]:
    """The revision now published for ``period`` (0 if never) and its run (id, date, headline)."""
    latest = "from runs where period = ? order by started_at desc, run_id desc limit 1"
    rows = con.execute(
        # a warehouse made before revisions has no revision column: its release is the first
        ("select coalesce(revision, 1), run_id, started_at, manifest " + latest)
        if _has_column(con, "runs", "revision")
        else ("select 1, run_id, started_at, manifest " + latest),
        [period],
    ).fetchall()
    if not rows:
        return 0, {}
    number, run_id, started_at, manifest = rows[0]
    data = json.loads(manifest) if isinstance(manifest, str) else dict(manifest or {})
    return int(number), {
        "run_id": run_id,
        "started_at": str(started_at),
        "headline": data.get("headline", {}),
    }


@dataclass(frozen=True)
class Stash:
    """What :func:`stash_release` left: per published table that held rows of the period before
    this run, the temporary table (of the run's connection) holding those rows.
    """

    period: str
    tables: dict[str, str]  # published table -> its stash


def stash_release(con: duckdb.DuckDBPyConnection, period: str) -> Stash:
    """Keep this period's current published rows aside (temporary tables of the run) before the
    summarise stage replaces them.
    """
    stashed = {}
    for table in PUBLISHED_TABLES:
        stash = f"stash_{checked_name(table.name)}"
        if _published(con, "published", table.name):
            con.execute(
                f"create or replace temp table {checked_name(stash)} as "
                f"select * from published.{checked_name(table.name)} where period = ?",
                [period],
            )
            stashed[table.name] = stash
        else:
            con.execute(f"drop table if exists {checked_name(stash)}")
    return Stash(period, stashed)


def settle_release(
    con: duckdb.DuckDBPyConnection,
    period: str,
    reason: str | None,
    headline_after: dict[str, Any],
    stash: Stash,
    present: tuple[str, ...],
) -> Release:
    """After the summarise and disclose stages: decide whether this run is a first release, the
    same release again, or a revision, and number the rows of ``published.*`` accordingly.
    ``stash``: what :func:`stash_release` kept; ``present``: the published tables the disclose
    stage left (``DisclosureResult.present``).

    Raises :class:`RevisionNeeded` when the period was published, its tables would change and no
    ``reason`` was given.
    """
    previous, previous_run = current_release(con, period)
    con.execute(f"create schema if not exists {checked_name(HISTORY_SCHEMA)}")
    for table in PUBLISHED_TABLES:
        if table.name in present:
            published = f"published.{checked_name(table.name)}"
            con.execute(f"alter table {published} add column if not exists revision integer")
            # present (empty) from the first release on, so readers can always query it
            con.execute(
                f"create table if not exists {checked_name(HISTORY_SCHEMA)}.{checked_name(table.name)} "
                f"as select * from {published} limit 0"
            )
        if table.name in stash.tables:
            con.execute(
                f"alter table {checked_name(stash.tables[table.name])} "
                "add column if not exists revision integer"
            )
    changed = previous > 0 and any(
        _differs_for(con, t.name, period, t.name in present, stash.tables.get(t.name))
        for t in PUBLISHED_TABLES
    )
    if changed and not (reason and reason.strip()):
        before = previous_run.get("headline", {})

        def shown(value: object) -> str:  # a blank headline is a suppressed (or absent) count
            return "blank" if value is None else str(value)

        lines = [f"  {k}: {shown(before.get(k))} -> {shown(headline_after.get(k))}"
                 for k in sorted(set(before) | set(headline_after)) if before.get(k) != headline_after.get(k)]  # fmt: skip
        raise RevisionNeeded(
            f"period {period} is already published (revision {previous}, run of {previous_run.get('started_at')}) "
            "and this run would change its published tables; nothing was changed. To publish a revision, "
            f'run again with --revise "<reason>" (the reason is shown in the report).'
            + ("\n  headline figures before -> after:\n" + "\n".join(lines) if lines else "")
        )
    if changed:
        revision = previous + 1
        for table in PUBLISHED_TABLES:
            if table.name not in stash.tables:
                continue
            kept = checked_name(stash.tables[table.name])
            history = f"{checked_name(HISTORY_SCHEMA)}.{checked_name(table.name)}"
            con.execute(f"update {kept} set revision = coalesce(revision, ?)", [previous])
            if not _published(con, HISTORY_SCHEMA, table.name):
                con.execute(f"create table {history} as select * from {kept}")
            else:
                add_missing_columns(
                    con,
                    HISTORY_SCHEMA,
                    table.name,
                    fetch_frame(con, f"select * from {kept} limit 0"),
                )
                con.execute(f"insert into {history} by name select * from {kept}")
    else:
        revision = max(previous, 1)
    for table in PUBLISHED_TABLES:
        if table.name in present:
            con.execute(
                f"update published.{checked_name(table.name)} set revision = ? where period = ?",
                [revision, period],
            )
    return Release(
        revision,
        previous,
        revised=changed,
        reason=reason.strip() if changed and reason else None,
        previous_run=previous_run if changed else {},
    )


def _differs_for(
    con: duckdb.DuckDBPyConnection, name: str, period: str, present: bool, stash: str | None
) -> bool:
    """Whether the period's rows of ``published.<name>`` differ from the release before (its
    ``stash``; None: it had none). ``present``: the disclose stage left the table.
    """
    new_rows = (
        present
        and con.execute(
            f"select count(*) from published.{checked_name(name)} where period = ?", [period]
        ).fetchall()[0][0]
        > 0
    )
    old_rows = (
        stash is not None
        and con.execute(f"select count(*) from {checked_name(stash)}").fetchall()[0][0] > 0
    )
    if not new_rows or not old_rows:
        return bool(new_rows) != bool(old_rows)
    # by column name: a table an upgrade gave a new column has changed (and cannot be compared
    # by position)
    new_cols = [c for (c,) in con.execute(
        "select column_name from duckdb_columns() where schema_name = 'published' and table_name = ? "
        "and database_name = current_database() order by column_index", [name]).fetchall()]  # fmt: skip
    old_cols = [c for (c,) in con.execute(
        "select column_name from duckdb_columns() where database_name = 'temp' and table_name = ? "
        "order by column_index",
        [stash]).fetchall()]  # fmt: skip
    if set(new_cols) != set(old_cols):
        return True
    cols = ", ".join(f'"{checked_name(c)}"' for c in new_cols if c != "revision")
    query = sql_over(
        "revision_difference",
        {
            "new_rows": f"select {cols} from published.{checked_name(name)} where period = $p",
            "old_rows": f"select {cols} from {checked_name(stash)}",
        },
    )
    return con.execute(query, {"p": period}).fetchall()[0][0] > 0


def describe(
    release: Release, period: str, revised_on: str, headline_after: dict[str, Any]
) -> dict[str, Any]:
    """The manifest's ``revision`` block (read by the report's banner)."""
    out: dict[str, Any] = {"number": release.revision, "period": period}
    if release.revised:
        out.update(
            previous=release.previous,
            revised_on=revised_on,
            reason=release.reason,
            previous_run_id=release.previous_run.get("run_id"),
            previous_published_at=release.previous_run.get("started_at"),
            headline_before=release.previous_run.get("headline", {}),
            headline_after=headline_after,
        )
    return out


def carry_releases(out_dir: Path, period: str, staged: Path, release: Release) -> None:
    """Into the staged exports: the earlier releases' folders, and for a revision the exports now
    in ``<out>/<period>/`` as ``revisions/<previous>/``.
    """
    final = out_dir / period
    kept = final / REVISIONS_FOLDER
    target = staged / REVISIONS_FOLDER
    if kept.is_dir():
        shutil.copytree(kept, target, dirs_exist_ok=True)
    if release.revised and final.is_dir():
        earlier = target / str(release.previous)
        shutil.rmtree(earlier, ignore_errors=True)
        shutil.copytree(
            final, earlier, ignore=lambda d, names: [REVISIONS_FOLDER] if Path(d) == final else []
        )


def late_results(
    con: duckdb.DuckDBPyConnection, period: str, landed_files: str | None
) -> dict[str, int]:
    """Count, per other published period, the results this run received that would change it.

    Other periods are the earlier ones, and later ones when an earlier period is revised; a
    result counts when a revision would take it: versions stored by this run (not duplicates, not preliminary) collected and
    reported by that period's end. (A period is rebuilt as known at its end, so a result reported
    later can never change it; those are not counted.) ``landed_files``: the relation naming this
    run's files (one column ``file_id``), as the ingest stage left it; None: no files.
    """
    if landed_files is None:
        return {}
    query = sql_over(
        "late_results", {"landed_files": f"select file_id from {checked_name(landed_files)}"}
    )
    rows = con.execute(query, {"p": period}).fetchall()
    return {p: int(n) for p, n in rows}
