"""Backfill: which months of a range still need a run."""

from __future__ import annotations

from pathlib import Path

import duckdb

from pipeline.periods import Period, months_between
from pipeline.warehouse import WAREHOUSE_FILE


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
    """Every month from ``first`` to ``last``, with True where it is skipped."""
    done = set() if force else published_periods(out)
    return [(p, p.label in done) for p in months_between(first, last)]
