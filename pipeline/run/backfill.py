"""Backfill: which months of a range still need a run."""

from __future__ import annotations

from pathlib import Path

import duckdb

from pipeline.core.periods import Period, months_between
from pipeline.warehouse.connection import WAREHOUSE_FILE


def published_periods(out: Path) -> set[str]:
    """Periods with a published run in ``<out>/surveillance.duckdb`` (none if it does not exist)."""
    path = out / WAREHOUSE_FILE
    if not path.exists():
        return set()
    con = duckdb.connect(str(path), read_only=True)
    try:
        exists = con.execute(
            "select count(*) from duckdb_tables() where table_name = 'runs' and schema_name = 'main'"
        ).fetchall()[0][0]
        if not exists:
            return set()
        return {p for (p,) in con.execute("select distinct period from runs").fetchall()}
    finally:
        con.close()


def months_to_run(out: Path, first: Period, last: Period, force: bool) -> list[tuple[Period, bool]]:
    """Every month from ``first`` to ``last``, with True where it is skipped: published in the
    warehouse and its exports in place (``<out>/<period>/``). A month that committed but whose
    exports never reached their folder is run again unless :func:`finish_interrupted` could
    put them in place first.
    """
    done = set() if force else published_periods(out)
    return [(p, p.label in done and (out / p.label).is_dir()) for p in months_between(first, last)]


def finish_interrupted(out: Path) -> list[str]:
    """Finish what a stopped run left in ``out`` (a month committed whose exports were not yet
    moved into place: they are installed; staged exports of a month not committed: removed),
    under the run lock, as the next run would. Returns one line per thing done.
    """
    from pipeline.run.runlock import recover_interrupted_run, run_lock

    path = out / WAREHOUSE_FILE
    if (
        not path.exists()
        or not any(out.glob(".*.publishing.json"))
        and not any(out.glob(".*.partial"))
    ):
        return []
    with run_lock(out):
        con = duckdb.connect(str(path))
        try:
            return recover_interrupted_run(out, con)
        finally:
            con.close()
