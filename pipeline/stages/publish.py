"""Publish: commit the month in one transaction, then write the exports of the published tables.

The whole run works inside one DuckDB transaction opened by :func:`open_warehouse`; a crash or
an error before :func:`commit_month` leaves the warehouse as it was. Exports are staged in a
temporary folder inside the transaction and moved into ``out/<period>/`` only after the commit
(``pipeline.run.runlock``), so a kill at any point leaves the published exports as they were.
"""

from __future__ import annotations

import json
import os
import shutil
from dataclasses import dataclass
from pathlib import Path

import duckdb

from pipeline.core.periods import Period
from pipeline.warehouse.catalog import PUBLISHED_TABLES, apply_comments
from pipeline.warehouse.connection import WAREHOUSE_FILE, connect
from pipeline.warehouse.sql_files import checked_name

#: The run's transient tables of staging, dropped before the commit (not kept).
TRANSIENT_TABLES = (
    "landed_rows",
    "landed_rows_typed",
    "results_validated",
    "result_versions_resolved",
    "scope_persons",
    "scope_versions",
    "link_persons",
)


def open_warehouse(out_dir: Path, memory_limit: str = "1.5GB") -> duckdb.DuckDBPyConnection:
    """Open ``<out>/surveillance.duckdb`` (owner-only folder) and begin the run's transaction."""
    out_dir.mkdir(parents=True, exist_ok=True)
    os.chmod(out_dir, 0o700)
    con = connect(out_dir / WAREHOUSE_FILE, memory_limit)
    con.execute("begin transaction")
    return con


@dataclass(frozen=True)
class Committed:
    """What :func:`commit_month` did: the transient tables it dropped before the commit."""

    dropped: tuple[str, ...]


def commit_month(con: duckdb.DuckDBPyConnection) -> Committed:
    apply_comments(con)
    for table in TRANSIENT_TABLES:  # transient: not kept
        con.execute(f"drop table if exists staging.{checked_name(table)}")
    con.execute("commit")
    return Committed(TRANSIENT_TABLES)


def write_json(path: Path, data: object) -> None:
    """JSON with sorted keys, written to a temporary file and renamed into place."""
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_text(json.dumps(data, indent=2, sort_keys=True, default=str) + "\n", encoding="utf-8")
    tmp.replace(path)


def quality_docs_dir(out_dir: Path, period: Period) -> Path:
    """Where this run's Data Docs are built; moved into ``out/<period>/quality/`` with the exports."""
    return out_dir / f".{period.label}.quality"


#: What marks an export made with the public demo key (README, "Keys"): a last CSV column and a
#: Parquet key-value entry, so that a copied file still says it holds invented data.
DEMO_NOTICE = "made with the public demo key: invented data, not for real use"
DEMO_COLUMN = "key_notice"


@dataclass(frozen=True)
class Exports:
    """What :func:`write_exports` staged: the folder and the files per published table."""

    folder: Path
    tables: tuple[str, ...]
    documents: tuple[str, ...]


def write_exports(
    con: duckdb.DuckDBPyConnection,
    out_dir: Path,
    period: Period,
    documents: dict[str, object],
    demo_key: bool = False,
) -> Exports:
    """Parquet and CSV of every published table for the period, plus the run's JSON documents,
    staged in ``<out>/.<period>.partial/``; ``runlock.commit_and_install`` moves them into
    ``<out>/<period>/`` after the commit. With the demo key every CSV row ends with the column
    ``key_notice`` and every Parquet file carries the entry ``kidneysurv.pseudonym_key: demo``
    (the Parquet columns stay those of the published table).
    """
    work = out_dir / f".{period.label}.partial"
    shutil.rmtree(work, ignore_errors=True)
    work.mkdir(parents=True, mode=0o700)
    parquet = (
        "format parquet, kv_metadata {'kidneysurv.pseudonym_key': 'demo'}"
        if demo_key
        else "format parquet"
    )
    notice = f", $notice as {checked_name(DEMO_COLUMN)}" if demo_key else ""
    for table in PUBLISHED_TABLES:
        source = f"published.{checked_name(table.name)}"
        order = ", ".join(checked_name(k) for k in table.keys)
        query = f"select * from {source} where period = $period order by {order}"
        marked = f"select *{notice} from {source} where period = $period order by {order}"
        # the target of COPY is a bound parameter too ($path)
        con.execute(
            f"copy ({query}) to $path ({parquet})",
            {"period": period.label, "path": str(work / (table.name + ".parquet"))},
        )
        params = (
            {"period": period.label, "notice": DEMO_NOTICE}
            if demo_key
            else {"period": period.label}
        )
        con.execute(
            f"copy ({marked}) to $path (format csv, header true)",
            {**params, "path": str(work / (table.name + ".csv"))},
        )
    for name, data in documents.items():
        write_json(work / name, data)
    docs = quality_docs_dir(out_dir, period)
    if docs.is_dir():
        docs.rename(work / "quality")
    # moved into out/<period>/ after the commit (runlock.commit_and_install)
    return Exports(work, tuple(t.name for t in PUBLISHED_TABLES), tuple(sorted(documents)))
