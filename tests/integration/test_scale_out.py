"""Scale-out: the person-level work run per person-hash shard on a Dask cluster the run did not
start (a real 2-worker ``distributed.LocalCluster``, reached through
``execution.scheduler_address``), with a relative ``--out`` and an incremental next month on the
same warehouse (only the persons whose results changed sent to the shards), gives
byte-identical published exports and the same person tables as local runs of the same two
months; so does the bucket path in this process (``executor: shards``); and a worker running
other code than the run is refused by name."""

from __future__ import annotations

import hashlib
import shutil
from pathlib import Path

import duckdb
import pytest

from pipeline.run.flows import run_month_plain
from pipeline.stages.link import shards

REPO = Path(__file__).resolve().parents[2]
SAMPLES = REPO / "sample_extracts"
MONTHS = ("2024-11", "2024-12", "2025-01", "2025-02", "2025-03", "2025-04")
NEXT = "2025-05"
SOURCES = ("westerfold_general_lab", "corvale_lab_chain", "fallowmere_reference_lab")
TABLES = ("person_status", "kidney_events", "kidney_measures", "daily_values_averaged",
          "link_snapshots", "published.district_ckd_prevalence",
          "published.district_screening_coverage",
          "published.district_decline_incidence")  # fmt: skip

pytestmark = pytest.mark.slow


def copy_months(root: Path, months: tuple[str, ...]) -> None:
    for source in SOURCES:
        for path in (SAMPLES / source).rglob("*"):
            if path.is_file() and any(
                m in path.as_posix() or m.replace("-", "") in path.name for m in months
            ):
                target = root / path.relative_to(SAMPLES)
                target.parent.mkdir(parents=True, exist_ok=True)
                shutil.copy2(path, target)


@pytest.fixture(scope="module")
def cluster():
    """A cluster the run does not own: two worker processes, one thread each."""
    from distributed import LocalCluster

    with LocalCluster(n_workers=2, **shards.LOCAL_CLUSTER) as running:
        yield running


def dask_config(target: Path, address: str) -> Path:
    """The shipped config, with the person-level work sent to the scheduler at ``address``."""
    return edited_config(target, (("  executor: local\n", "  executor: dask\n"),
                                  ("  scheduler_address: null\n", f'  scheduler_address: "{address}"\n')))  # fmt: skip


def edited_config(target: Path, edits: tuple[tuple[str, str], ...]) -> Path:
    """A copy of the shipped config with ``edits`` (old, new) made to its pipeline.yaml."""
    shutil.copytree(REPO / "config", target)
    pipeline_yaml = target / "pipeline.yaml"
    text = pipeline_yaml.read_text(encoding="utf-8")
    for old, new in edits:
        assert old in text, old
        text = text.replace(old, new)
    pipeline_yaml.write_text(text, encoding="utf-8")
    return target


def two_months(config: Path, inbox: Path, out: str | Path) -> list[tuple[dict, dict]]:
    """The first six sample months as one run for 2025-04, then 2025-05 added to the inbox and
    run into the same warehouse (the monthly path); each run's tables and exports."""
    copy_months(inbox, MONTHS)
    seen = []
    for period in (MONTHS[-1], NEXT):
        if period == NEXT:
            copy_months(inbox, (NEXT,))
        run_month_plain(period, str(config), str(inbox), str(out), demo=True)
        seen.append(state(Path(out), period))
    return seen


def state(out: Path, period: str) -> tuple[dict[str, list[tuple]], dict[str, str]]:
    con = duckdb.connect(str(out / "surveillance.duckdb"), read_only=True)
    try:
        tables = {t: con.execute(f"select * from {t} order by all").fetchall() for t in TABLES}
    finally:
        con.close()
    exports = {p.name: hashlib.sha256(p.read_bytes()).hexdigest()
               for p in sorted((out / period).glob("*")) if p.suffix in (".csv", ".parquet")}  # fmt: skip
    return tables, exports


@pytest.fixture(scope="module")
def local(tmp_path_factory) -> list[tuple[dict, dict]]:
    """The two months run locally (the reference every scaled-out run must equal)."""
    base = tmp_path_factory.mktemp("local")
    return two_months(REPO / "config", base / "inbox", base / "out")


def test_external_cluster_relative_out_and_next_month_equal_local_runs(
    cluster, local, tmp_path, monkeypatch
):
    assert local[0][0]["person_status"], "the sample months should give persons"

    config = dask_config(tmp_path / "dask_config", cluster.scheduler_address)
    monkeypatch.chdir(tmp_path)  # "--out dask": relative to the run's working folder only
    before = dict(cluster.scheduler.task_prefixes)
    scaled = two_months(config, tmp_path / "dask_inbox", "dask")

    # the shards went to the cluster given, four per month (execution.shards), none elsewhere
    prefix = cluster.scheduler.task_prefixes.get("run_shard")
    assert prefix is not None and "run_shard" not in before
    assert prefix.state_counts["memory"] == 2 * 4
    assert (tmp_path / "dask" / "surveillance.duckdb").is_file()
    for (tables, exports), (local_tables, local_exports), period in zip(
        scaled, local, (MONTHS[-1], NEXT), strict=True
    ):
        assert exports and exports == local_exports, period  # byte-identical published files
        for table, rows in local_tables.items():
            # link_snapshots too: the same persons counted and recomputed each month
            assert tables[table] == rows, (period, table)
    # the next month is incremental on the cluster as in process: its shards get only the
    # persons whose results changed, the others' rows are carried over from the month before
    snapshots = {row[0]: row for row in scaled[1][0]["link_snapshots"]}
    *_, persons, recomputed = snapshots[NEXT]
    assert 0 < recomputed < persons


def test_buckets_in_process_give_the_local_runs_month_after_month(local, tmp_path):
    """``executor: shards`` (the bucket path in this process, no cluster): the same tables and
    files as the local runs, and the next month incremental as locally."""
    config = edited_config(tmp_path / "shards_config",
                           (("  executor: local\n", "  executor: shards\n"),))  # fmt: skip
    sharded = two_months(config, tmp_path / "inbox", tmp_path / "out")
    for (tables, exports), (local_tables, local_exports), period in zip(
        sharded, local, (MONTHS[-1], NEXT), strict=True
    ):
        assert exports and exports == local_exports, period
        for table, rows in local_tables.items():
            # link_snapshots too: the month's persons recomputed are the local month's
            assert tables[table] == rows, (period, table)
    # the buckets' files are removed once their rows are in the warehouse
    assert not list((tmp_path / "out" / ".work").rglob("*.parquet"))


def test_a_worker_running_other_code_is_refused_by_name(cluster, monkeypatch):
    from distributed import Client

    with Client(cluster.scheduler_address) as client:
        shards.check_workers_code(client)  # the same code everywhere: nothing to say
        # this process now claims another version than the workers have installed
        monkeypatch.setattr(shards, "version", lambda name: "0.0.0-other")
        with pytest.raises(shards.WorkerCodeMismatch) as refused:
            shards.check_workers_code(client)
    message = str(refused.value)
    assert "2 of 2 Dask workers run other code" in message
    assert all(worker in message for worker in cluster.scheduler.workers)
    assert "0.0.0-other" in message


def test_in_a_prefect_flow_run_each_bucket_is_a_task_run_on_the_cluster(cluster, local, tmp_path):
    """Through Prefect's Dask task runner (prefect-dask): the monthly flow sends each person
    bucket to the cluster as a task run ``person-bucket`` of a subflow ``person-buckets``, which
    the Prefect API (and so its UI) shows completed; the exports equal a local run's."""
    from prefect.client.orchestration import get_client
    from prefect.client.schemas.filters import (
        FlowFilter,
        FlowFilterName,
        TaskRunFilter,
        TaskRunFilterName,
    )

    from pipeline.run import prefect_env

    prefect_env.configure()
    from prefect.testing.utilities import prefect_test_harness

    from pipeline.run.flows import monthly_surveillance

    inbox = tmp_path / "inbox"
    copy_months(inbox, MONTHS)
    run_month_plain(
        MONTHS[-1], str(REPO / "config"), str(inbox), str(tmp_path / "local"), demo=True
    )
    config = dask_config(tmp_path / "dask_config", cluster.scheduler_address)
    before = _bucket_tasks(cluster)
    with prefect_test_harness(server_startup_timeout=180):
        monthly_surveillance(period=MONTHS[-1], config_dir=str(config), inbox=str(inbox),
                             out=str(tmp_path / "flow"), demo=True)  # fmt: skip
        with get_client(sync_client=True) as api:
            buckets = api.read_task_runs(
                task_run_filter=TaskRunFilter(name=TaskRunFilterName(like_="person-bucket"))
            )
            subflows = api.read_flow_runs(
                flow_filter=FlowFilter(name=FlowFilterName(any_=["person-buckets"]))
            )
    assert len(buckets) == 4  # execution.shards of the shipped config
    assert {b.state_name for b in buckets} == {"Completed"}
    assert [f.state_name for f in subflows] == ["Completed"]
    assert _bucket_tasks(cluster) > before  # run on the cluster's workers
    assert state(tmp_path / "flow", MONTHS[-1])[1] == local[0][1]  # the exports, byte for byte


def _bucket_tasks(cluster) -> int:
    """How often the scheduler has counted a task of the bucket function's name in some state."""
    prefix = cluster.scheduler.task_prefixes.get("run_shard")
    return sum(prefix.state_counts.values()) if prefix is not None else 0
