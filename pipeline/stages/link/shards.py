"""Person-level work by person-hash shard, locally or on a Dask cluster.

The person-level part of the link stage (the measures of the results known at the period end,
daily values, events and person status) depends on one person's results only, so it can run
per shard of persons and be put back together: the tables are the same whatever the shard
count or the machine. The shard inputs and outputs are Parquet files in a work folder; the
warehouse is written only by the main process (the single writer), after every shard is done.

Executors (``execution.executor`` in config/pipeline.yaml):
- ``local``: no shards; everything inside the warehouse connection (the default, fastest here).
- ``shards``: the shard path in this process, one shard after another (to test the path).
- ``dask``: the shards as tasks of a ``distributed`` client: a local cluster of
  ``execution.dask_workers`` processes, or the scheduler at ``execution.scheduler_address``.
"""

from __future__ import annotations

import shutil
from pathlib import Path
from typing import Any

import duckdb
import polars as pl

from pipeline.core.periods import Period
from pipeline.core.settings import Settings, load_settings
from pipeline.warehouse.sql_files import checked_name

#: Tables a shard reads from the main warehouse (besides its own results).
REFERENCE_TABLES = ("gfr_categories", "gfr_categories_ordered", "kdigo_risk", "age_bands",
                    "districts", "trajectory_rules")  # fmt: skip
#: Tables a shard writes, in the order they are built.
SHARD_OUTPUTS = ("measures_known", "daily_values_averaged", "kidney_events", "person_status")


def shard_expression() -> str:
    """SQL giving a person's shard (of ``$shards``, a bound parameter): the person key is hex (HMAC-SHA256), so its first 8 hex
    digits are uniformly spread.
    """
    return "(('0x' || substr(person_key, 1, 8))::ubigint % $shards)"


def export_shard_inputs(con: duckdb.DuckDBPyConnection, work: Path, shards: int) -> list[Path]:
    """Write each shard's known results, and the reference tables, as Parquet under ``work``."""
    shutil.rmtree(work, ignore_errors=True)
    (work / "reference").mkdir(parents=True)
    for table in REFERENCE_TABLES:
        con.execute(
            f"copy reference.{checked_name(table)} to $path (format parquet)",
            {"path": str(work / "reference" / (table + ".parquet"))},
        )
    folders = []
    for shard in range(shards):
        folder = work / f"shard_{shard:03d}"
        folder.mkdir()
        con.execute(
            f"copy (select * from results_known where {shard_expression()} = $shard) "
            "to $path (format parquet)",
            {"shards": shards, "shard": shard, "path": str(folder / "results_known.parquet")},
        )
        folders.append(folder)
    return folders


def run_shard(folder: str, config_dir: str, period_label: str) -> str:
    """The person-level tables of one shard, from its Parquet inputs, in a throw-away database.

    A plain function of paths and names, so a Dask worker on another machine can run it (with
    the same project installed and the work folder on shared storage).
    """
    from pipeline.stages.link.persons import build_person_tables

    settings = load_settings(config_dir)
    period = Period.parse(period_label)
    folder_path = Path(folder)
    con = duckdb.connect(":memory:")
    try:
        for schema in ("staging", "reference"):
            con.execute(f"create schema {checked_name(schema)}")
        for path in sorted((folder_path.parent / "reference").glob("*.parquet")):
            con.execute(
                f"create table reference.{checked_name(path.stem)} as select * from read_parquet(?)",
                [str(path)],
            )
        con.execute(
            "create table results_known as select * from read_parquet(?)",
            [str(folder_path / "results_known.parquet")],
        )
        build_person_tables(con, settings, period, sharded=True)
        for table in SHARD_OUTPUTS:
            con.execute(
                f"copy (select * from {checked_name(table)}) to ? (format parquet)",
                [str(folder_path / (table + ".out.parquet"))],
            )
    finally:
        con.close()
    return folder


def run_shards(folders: list[Path], settings: Settings, period: Period) -> list[str]:
    """Run every shard with the configured executor; return the finished folders in order."""
    e = settings.pipeline.execution
    args = [(str(f), str(settings.config_dir.resolve()), period.label) for f in folders]
    if e.executor != "dask":
        return [run_shard(*a) for a in args]
    from distributed import Client, LocalCluster

    if e.scheduler_address:
        with Client(e.scheduler_address) as client:
            return _map(client, args)
    with LocalCluster(n_workers=e.dask_workers, threads_per_worker=1, processes=True,
                      dashboard_address=None) as cluster, Client(cluster) as client:  # fmt: skip
        return _map(client, args)


def _map(client: Any, args: list[tuple[str, str, str]]) -> list[str]:
    futures = [client.submit(run_shard, *a, pure=False) for a in args]
    return client.gather(futures)


def load_shard_outputs(folders: list[str], table: str) -> pl.DataFrame:
    """One output table of every shard, put back together."""
    frames = [pl.read_parquet(Path(f) / f"{table}.out.parquet") for f in folders]
    return pl.concat(frames, how="vertical_relaxed")
