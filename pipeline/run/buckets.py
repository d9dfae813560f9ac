"""Person buckets (the link stage's shards) as Prefect task runs on Dask, through prefect-dask's
task runner: in a Prefect flow run with executor ``dask``, each bucket is a task run
``person-bucket`` of a subflow ``person-buckets``, shown in the Prefect UI with its state,
duration and retries, on the cluster the run uses (a local one, or ``scheduler_address``).

Why the subflow is told the API's address: Prefect hands each task the settings of the flow that
submits it. With Prefect's temporary server (no ``PREFECT_API_URL`` set) those settings name no
server, and every Dask worker then starts a temporary server of its own (54 s for four trivial
tasks here, shared/FRAMEWORKS.md); given the address of the server the run already uses, the
workers report their task runs to it (1.3 s for the same four). A worker on another machine must
reach that address: with a cluster beyond this machine, run Prefect's server and set
``PREFECT_API_URL`` (README, "Running on a cluster").

Without a flow run (``run_month_plain``: tests, benchmarks) the shards go to the cluster's own
client (:func:`pipeline.stages.link.shards.map_on_client`); both give the same folders in shard
order, and the stage reads them the same way.
"""

from __future__ import annotations

from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import Any

from prefect import flow, task
from prefect.client.orchestration import get_client
from prefect.context import FlowRunContext
from prefect.futures import as_completed
from prefect.settings import PREFECT_API_URL, temporary_settings

from pipeline.stages.link.shards import ShardMapper, run_shard

#: One person bucket: builds the bucket's person-level tables in its folder (run_shard).
bucket_task = task(name="person-bucket")(run_shard)


def prefect_submit() -> ShardMapper | None:
    """How this run sends buckets to Dask: as Prefect task runs when a flow run is in progress,
    else None (the cluster's client, without Prefect).
    """
    if FlowRunContext.get() is None:
        return None
    return submit_as_task_runs


def submit_as_task_runs(
    client: Any, args: list[tuple[str, str, str]], told: Callable[[int, int], None]
) -> list[str]:
    """Each bucket a ``person-bucket`` task run of the flow ``person-buckets``, on the Dask
    cluster ``client`` is connected to (its workers' code already checked).

    The flow runs in a thread of its own, outside the link stage's task run: Prefect sends the
    context of the flow and task runs around a task to the worker with it, and the link stage's
    task (its function reaches the run's open warehouse connection) cannot be pickled.
    """
    from prefect_dask import DaskTaskRunner

    address = client.scheduler.address
    with get_client(sync_client=True) as api:
        api_url = str(api.api_url).rstrip("/")
    runner = person_buckets.with_options(task_runner=DaskTaskRunner(address=address))

    def run() -> list[str]:
        with temporary_settings(updates={PREFECT_API_URL: api_url}):
            return runner(args)

    _listeners.append(told)
    try:
        with ThreadPoolExecutor(max_workers=1, thread_name_prefix="person-buckets") as pool:
            return pool.submit(run).result()
    finally:
        _listeners.remove(told)


#: Who is told as each bucket finishes. The flow reaches them only through :func:`_tell` (a
#: module function, pickled by name): a progress display holds a lock, which cannot be pickled.
_listeners: list[Callable[[int, int], None]] = []


def _tell(done: int, total: int) -> None:
    for told in list(_listeners):
        told(done, total)


@flow(name="person-buckets")
def person_buckets(buckets: list[tuple[str, str, str]]) -> list[str]:
    """Every bucket as a task run; the finished folders in bucket order."""
    futures = [bucket_task.submit(*bucket) for bucket in buckets]
    for done, _ in enumerate(as_completed(futures), start=1):
        _tell(done, len(futures))
    return [future.result() for future in futures]
