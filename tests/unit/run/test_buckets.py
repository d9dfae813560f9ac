"""The person buckets as Prefect task runs (pipeline/run/buckets.py). The whole path, on a real
Dask cluster under a real Prefect server, is tests/integration/test_scale_out.py; these check
what it relies on: Prefect sends the flow and the task with every bucket, pickled, so neither
may reach a progress display (it holds a lock)."""

from __future__ import annotations

import threading

import cloudpickle

from pipeline.run import buckets


def test_outside_a_flow_run_the_shards_go_to_the_cluster_client():
    assert buckets.prefect_submit() is None


def test_the_flow_and_the_task_pickle_while_a_display_listens():
    lock = threading.Lock()
    seen: list[tuple[int, int]] = []

    def told(done: int, total: int) -> None:
        with lock:  # what a progress display holds
            seen.append((done, total))

    buckets._listeners.append(told)
    try:
        for thing in (buckets.person_buckets, buckets.bucket_task):
            assert cloudpickle.loads(cloudpickle.dumps(thing)).name == thing.name
        buckets._tell(1, 4)
    finally:
        buckets._listeners.remove(told)
    assert seen == [(1, 4)]
    assert buckets.bucket_task.name == "person-bucket"
    assert buckets.person_buckets.name == "person-buckets"
