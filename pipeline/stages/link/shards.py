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

Every path handed to a worker is absolute (a worker's working folder is not the run's: a relative
``--out`` would name another folder there), and before any shard is sent every worker must run
the same code as the run: the same package version and the same source files (Python and SQL),
compared by :func:`code_fingerprint`; otherwise the run stops and names the workers that differ.
"""

from __future__ import annotations

import hashlib
import shutil
from collections.abc import Callable
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path
from typing import Any

import duckdb

from pipeline.core.periods import Period
from pipeline.core.settings import Settings, load_settings
from pipeline.warehouse.reference import reference_tables
from pipeline.warehouse.sql_files import checked_name

#: Tables a shard writes, in the order they are built.
SHARD_OUTPUTS = ("measures_known", "daily_values_averaged", "kidney_events", "person_status")


def shard_expression() -> str:
    """SQL giving a person's shard (of ``$shards``, a bound parameter): the person key is hex (HMAC-SHA256), so its first 8 hex
    digits are uniformly spread.
    """
    return "(('0x' || substr(person_key, 1, 8))::ubigint % $shards)"


def export_shard_inputs(
    con: duckdb.DuckDBPyConnection, work: Path, shards: int, persons: str | None = None
) -> list[Path]:
    """Write each shard's known results, and the reference tables, as Parquet under ``work``;
    return the shard folders, absolute.

    ``persons``: a table of the persons to send (``person_key``), the changed persons of a month
    whose other persons are carried over; each shard then gets their measures known at the
    period end too (the warehouse's, not measured again).
    """
    work = work.resolve()
    shutil.rmtree(work, ignore_errors=True)
    (work / "reference").mkdir(parents=True)
    for table in reference_tables(con):
        con.execute(
            f"copy reference.{checked_name(table)} to $path (format parquet)",
            {"path": str(work / "reference" / (table + ".parquet"))},
        )
    inputs = ("results_known",) if persons is None else SHARD_INPUTS
    among = "" if persons is None else f"semi join {checked_name(persons)} using (person_key) "
    folders = []
    for shard in range(shards):
        folder = work / f"shard_{shard:03d}"
        folder.mkdir()
        for table in inputs:
            con.execute(
                f"copy (select * from {checked_name(table)} {among}"
                f"where {shard_expression()} = $shard) to $path (format parquet)",
                {"shards": shards, "shard": shard, "path": str(folder / f"{table}.parquet")},
            )
        folders.append(folder)
    return folders


#: What a shard may be given: its results known at the period end and, for the changed persons
#: of a month (``export_shard_inputs(persons=...)``), their measures known then.
SHARD_INPUTS = ("results_known", "measures_known")


def run_shard(folder: str, config_dir: str, period_label: str) -> str:
    """The person-level tables of one shard, from its Parquet inputs, in a throw-away database.

    A plain function of paths and names, so a Dask worker on another machine can run it (with
    the same project installed and the work folder on shared storage).
    """
    from pipeline.stages.link.persons import build_from_measures, build_person_tables

    settings = load_settings(config_dir)
    period = Period.parse(period_label)
    folder_path = Path(folder)
    # the run's memory limit per worker, spilling into the shard's folder beyond it
    con = duckdb.connect(":memory:", config={
        "memory_limit": settings.pipeline.execution.memory_limit,
        "temp_directory": str(folder_path / ".duckdb_tmp"),
    })  # fmt: skip
    try:
        for schema in ("staging", "reference"):
            con.execute(f"create schema {checked_name(schema)}")
        for path in sorted((folder_path.parent / "reference").glob("*.parquet")):
            con.execute(
                f"create table reference.{checked_name(path.stem)} as select * from read_parquet(?)",
                [str(path)],
            )
        given = [t for t in SHARD_INPUTS if (folder_path / f"{t}.parquet").is_file()]
        for table in given:
            con.execute(
                f"create table {checked_name(table)} as select * from read_parquet(?)",
                [str(folder_path / f"{table}.parquet")],
            )
        if "measures_known" in given:  # a month's changed persons: measured in the warehouse
            build_from_measures(con, settings, period)
        else:
            build_person_tables(con, settings, period, sharded=True)
        for table in SHARD_OUTPUTS:
            con.execute(
                f"copy (select * from {checked_name(table)}) to ? (format parquet)",
                [str(folder_path / (table + ".out.parquet"))],
            )
    finally:
        con.close()
    return folder


def run_shards(
    folders: list[Path],
    settings: Settings,
    period: Period,
    on_done: Callable[[int, int], None] | None = None,
    submit: ShardMapper | None = None,
) -> list[str]:
    """Run every shard with the configured executor; return the finished folders in order.
    ``on_done(done, total)``, when given, is told as each shard finishes (the progress display).

    On Dask, the workers' code is checked first (:func:`check_workers_code`), then ``submit``
    sends the shards: by default straight to the cluster's client; in a Prefect flow run the run
    layer gives one that sends each shard as a Prefect task run (pipeline/run/buckets.py).
    """
    told = on_done or (lambda done, total: None)
    send = submit or map_on_client
    e = settings.pipeline.execution
    # absolute: a worker resolves a relative path against its own working folder
    args = [(str(Path(f).resolve()), str(settings.config_dir.resolve()), period.label)
            for f in folders]  # fmt: skip
    if e.executor != "dask":
        finished = []
        for a in args:
            finished.append(run_shard(*a))
            told(len(finished), len(args))
        return finished
    from distributed import Client, LocalCluster

    if e.scheduler_address:
        with Client(e.scheduler_address) as client:
            check_workers_code(client)
            return send(client, args, told)
    with (
        LocalCluster(n_workers=e.dask_workers, **LOCAL_CLUSTER) as cluster,
        Client(cluster) as client,
    ):
        check_workers_code(client)
        return send(client, args, told)


#: How the run starts a local cluster: worker processes of one thread each, and no dashboard.
#: Without a dashboard the scheduler still serves HTTP (health, metrics) on port 8787 by
#: default, and a second cluster on the machine (another run, a parallel test) then failed to
#: start on the warning that the port is taken; a free port is asked for instead.
LOCAL_CLUSTER: dict[str, Any] = {
    "threads_per_worker": 1,
    "processes": True,
    "dashboard_address": None,
    "scheduler_kwargs": {"dashboard_address": "127.0.0.1:0"},
}

#: What sends the shards to a Dask cluster: (client, the arguments of :func:`run_shard` per
#: shard, told as each finishes) -> the finished folders in shard order.
ShardMapper = Callable[[Any, list[tuple[str, str, str]], Callable[[int, int], None]], list[str]]


class WorkerCodeMismatch(RuntimeError):
    """A Dask worker runs other code than the run (another version or other source files)."""


def code_fingerprint() -> dict[str, str]:
    """The code this process runs: the installed package's version and a SHA-256 of every
    Python and SQL file of the package and its sql/ folder (relative path and content), so
    that a worker with an edited or older copy is told apart from the run's own.
    """
    package = Path(__file__).resolve().parents[2]
    digest = hashlib.sha256()
    files = sorted([*package.rglob("*.py"), *(package.parent / "sql").rglob("*.sql")])
    for path in files:
        digest.update(path.relative_to(package.parent).as_posix().encode() + b"\0")
        digest.update(path.read_bytes() + b"\0")
    try:
        installed = version("kidneysurv")
    except PackageNotFoundError:  # pragma: no cover - running from a bare source tree
        installed = "unknown"
    return {"version": installed, "sources_sha256": digest.hexdigest()}


def check_workers_code(client: Any) -> None:
    """Stop before any shard is sent if a worker's :func:`code_fingerprint` differs from the
    run's, naming the workers and what differs.
    """
    mine = code_fingerprint()
    theirs = client.run(code_fingerprint)
    differing = {w: f for w, f in theirs.items() if f != mine}
    if differing:
        detail = "; ".join(
            f"{worker}: version {f.get('version')} (run: {mine['version']}), sources "
            f"{str(f.get('sources_sha256'))[:12]} (run: {mine['sources_sha256'][:12]})"
            for worker, f in sorted(differing.items())
        )
        raise WorkerCodeMismatch(
            f"{len(differing)} of {len(theirs)} Dask workers run other code than this run "
            f"(install the same kidneysurv on every worker): {detail}"
        )


def map_on_client(
    client: Any, args: list[tuple[str, str, str]], told: Callable[[int, int], None]
) -> list[str]:
    """Each shard as a Dask task of ``client``; the finished folders in shard order."""
    from distributed import as_completed

    futures = [client.submit(run_shard, *a, pure=False) for a in args]
    for done, _ in enumerate(as_completed(futures), start=1):
        told(done, len(futures))
    return client.gather(futures)


def shard_outputs(folders: list[str], table: str) -> list[str]:
    """The files of one output table of every shard, in shard order."""
    return [str(Path(f) / f"{table}.out.parquet") for f in folders]
