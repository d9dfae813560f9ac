"""End to end: the Prefect flow on the shipped sample extracts, under one Prefect test harness.

Checks the accounting (every input row in lab_results or rejected_rows, or counted superseded,
duplicate, withdrawn or pending, exactly once), that a second run of the month changes nothing,
and that the same measurement sent in the three lab layouts arrives with one canonical value.
"""

from __future__ import annotations

import csv
import json
import shutil
from pathlib import Path

import duckdb
import pytest
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.core.pseudonymise import DEMO_KEY

REPO = Path(__file__).resolve().parents[2]
SAMPLES = REPO / "sample_extracts"
PERIOD = "2026-10"
SOURCE_FOLDERS = ("westerfold_general_lab", "corvale_lab_chain", "fallowmere_reference_lab")

pytestmark = pytest.mark.slow


@pytest.fixture(scope="session")
def prefect_harness():
    from pipeline.run import prefect_env

    prefect_env.configure()
    from prefect.testing.utilities import prefect_test_harness

    with prefect_test_harness(server_startup_timeout=180):
        yield


def _count_input_rows(inbox: Path) -> dict[str, int]:
    """Rows per file, counted independently of the pipeline's readers."""
    counts = {}
    for path in sorted(p for d in SOURCE_FOLDERS for p in (inbox / d).rglob("*")):
        if path.suffix == ".csv":
            lines = [ln for ln in path.read_text(encoding="utf-8").splitlines() if ln.strip()]
            counts[path.relative_to(inbox).as_posix()] = len(lines) - 1
        elif path.name == "Observation.ndjson":
            lines = [ln for ln in path.read_text(encoding="utf-8").splitlines() if ln.strip()]
            counts[path.relative_to(inbox).as_posix()] = len(lines)
    return counts


#: Tables compared before and after a re-run, with their order (ingested_at is wall time, and
#: file_stat the inbox file's inode and times).
RERUN_TABLES = {
    "ingest_files": "file_id",
    "lab_results": "file_id, line_no",
    "rejected_rows": "file_id, line_no",
    "kidney_measures": "file_id, line_no, analyte",
    "person_status": "period, person_key",
    "kidney_events": "period, person_key, rule_id",
    "published.district_ckd_prevalence": "period, district_code, sex, age_band",
    "published.district_screening_coverage": "period, district_code",
}


def _table_dump(con: duckdb.DuckDBPyConnection, table: str) -> list[tuple]:
    columns = "* exclude (ingested_at, file_stat)" if table == "ingest_files" else "*"
    return con.execute(f"select {columns} from {table} order by {RERUN_TABLES[table]}").fetchall()


@pytest.fixture(scope="module")
def demo_run(prefect_harness, tmp_path_factory):
    out = tmp_path_factory.mktemp("demo_out")
    runner = CliRunner()
    first = runner.invoke(
        app, ["demo", "--out", str(out)], env={"KIDNEYSURV_PSEUDONYM_KEY": DEMO_KEY}
    )
    assert first.exit_code == 0, first.output
    con = duckdb.connect(str(out / "surveillance.duckdb"), read_only=True)
    yield out, first.output, con
    con.close()


def test_demo_prints_summary_and_writes_warehouse(demo_run):
    out, output, _ = demo_run
    assert "rows per source" in output
    assert "surveillance.duckdb" in output
    assert (out / "surveillance.duckdb").is_file()
    assert (out / PERIOD / "district_ckd_prevalence.parquet").is_file()
    summary = json.loads((out / PERIOD / "run_summary.json").read_text())
    assert summary["demo_key"] is True


def test_demo_exports_say_they_were_made_with_the_demo_key(demo_run):
    """A CSV or Parquet file copied out of the folder still says it holds invented data."""
    import pyarrow.parquet as pq

    from pipeline.stages.publish import DEMO_COLUMN, DEMO_NOTICE
    from pipeline.warehouse.catalog import PUBLISHED_TABLES

    out, _, _ = demo_run
    for table in PUBLISHED_TABLES:
        with open(out / PERIOD / f"{table.name}.csv", encoding="utf-8", newline="") as f:
            rows = list(csv.reader(f))
        assert rows[0][-1] == DEMO_COLUMN, table.name
        assert {r[-1] for r in rows[1:]} == {DEMO_NOTICE}, table.name
        meta = pq.read_metadata(out / PERIOD / f"{table.name}.parquet").metadata
        assert meta[b"kidneysurv.pseudonym_key"] == b"demo", table.name
        assert DEMO_COLUMN not in pq.read_schema(out / PERIOD / f"{table.name}.parquet").names


def test_every_input_row_accounted_once(demo_run):
    _, _, con = demo_run
    expected = _count_input_rows(SAMPLES)
    ledger = {
        path: (read, acc, rej, sup, dup, wd, pend, status)
        for path, read, acc, rej, sup, dup, wd, pend, status in con.execute(
            "select file_path, rows_read, rows_accepted, rows_rejected, rows_superseded, "
            "rows_duplicate, rows_withdrawn, rows_pending, status from ingest_files"
        ).fetchall()
    }
    assert set(ledger) == set(expected)
    for path, n in expected.items():
        read, acc, rej, sup, dup, wd, pend, status = ledger[path]
        assert status in ("ingested", "duplicate_file"), path
        assert read == n, path
        assert acc + rej + sup + dup + wd + pend == read, path
    # row level: each (file, line) is in exactly one place
    versions, rejected = con.execute(
        "select (select count(*) from result_versions), (select count(*) from rejected_rows)"
    ).fetchall()[0]
    overlap = con.execute(
        "select count(*) from result_versions v join rejected_rows r using (file_id, line_no)"
    ).fetchall()[0][0]
    assert overlap == 0
    dup_files = con.execute(
        "select coalesce(sum(rows_read), 0) from ingest_files where status = 'duplicate_file'"
    ).fetchall()[0][0]
    assert versions + rejected + dup_files == sum(expected.values())
    accepted = con.execute("select count(*) from lab_results").fetchall()[0][0]
    assert accepted == sum(v[1] for v in ledger.values())


def test_no_incoming_token_in_warehouse(demo_run):
    _, _, con = demo_run
    token = con.execute(
        "select count(*) from rejected_rows where raw_text like '%WF-%'"
    ).fetchall()[0][0]
    assert token == 0
    columns = {c for (c,) in con.execute("select column_name from duckdb_columns()").fetchall()}
    assert "person_token" not in columns


def test_second_run_of_the_month_changes_nothing(demo_run):
    out, _, con = demo_run
    before = {table: _table_dump(con, table) for table in RERUN_TABLES}
    exports = {p.name: p.read_bytes() for p in sorted((out / PERIOD).glob("*.csv"))}
    con.close()
    again = CliRunner().invoke(app, ["demo", "--out", str(out)])
    assert again.exit_code == 0, again.output
    con2 = duckdb.connect(str(out / "surveillance.duckdb"), read_only=True)
    try:
        for table, rows in before.items():
            assert _table_dump(con2, table) == rows, table
    finally:
        con2.close()
    assert {p.name: p.read_bytes() for p in sorted((out / PERIOD).glob("*.csv"))} == exports


THREE_LAYOUTS = {
    "westerfold_general_lab/results_2026-01.csv": (
        "person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,"
        "status,height_cm,reported_at,fasting\n"
        "WF-0000aaaa,1966,F,WF01,WGH1,2026-01-10,2160-0,1.00,mg/dL,final,,2026-01-11,\n"
    ),
    "corvale_lab_chain/export_202601.csv": (
        "PatientRef;YearOfBirth;Gender;AreaCode;SampleNo;SampleDate;TestCode;Result;Units;State;ReportDate\n"
        "WF-0000aaaa;1966;F;WF01;CV-1;10/01/2026;CREA;88,4;µmol/l;F;11/01/2026\n"
    ),
    "fallowmere_reference_lab/2026-01/Patient.ndjson": (
        '{"resourceType":"Patient","id":"fr-1","identifier":[{"system":"urn:westerfold:linkage-token",'
        '"value":"WF-0000aaaa"}],"gender":"female","birthDate":"1966","address":[{"district":"Alderbank"}]}\n'
    ),
    "fallowmere_reference_lab/2026-01/Observation.ndjson": (
        '{"resourceType":"Observation","id":"o1","status":"final","code":{"coding":[{"system":'
        '"http://loinc.org","code":"14682-9"}]},"subject":{"reference":"Patient/fr-1"},"specimen":'
        '{"reference":"Specimen/FR1"},"effectiveDateTime":"2026-01-10","issued":"2026-01-11",'
        '"valueQuantity":{"value":88.4,"unit":"umol/L","system":"http://unitsofmeasure.org","code":"umol/L"}}\n'
    ),
}


def test_same_measurement_in_three_layouts_gives_one_canonical_value(prefect_harness, tmp_path):
    """88.4 µmol/L = 1.00 mg/dL (1 mg/dL = 88.4 µmol/L; DEVELOPERS.md, Methods and sources, confirmed)."""
    from pipeline.run.flows import monthly_surveillance

    inbox = tmp_path / "inbox"
    for rel, text in THREE_LAYOUTS.items():
        path = inbox / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text, encoding="utf-8")
    out = tmp_path / "out"
    monthly_surveillance(period="2026-01", config_dir=str(REPO / "config"), inbox=str(inbox),
                         out=str(out), demo=True)  # fmt: skip
    con = duckdb.connect(str(out / "surveillance.duckdb"), read_only=True)
    try:
        rows = con.execute(
            "select source_id, value, unit, outcome, count(distinct person_key) over () "
            "from result_versions where analyte = 'creatinine' order by source_id"
        ).fetchall()
        accepted = con.execute(
            "select source_id from lab_results where analyte = 'creatinine'"
        ).fetchall()
        egfr = con.execute("select distinct round(egfr, 9) from kidney_measures").fetchall()
    finally:
        con.close()
    assert [r[0] for r in rows] == sorted(
        s.split("/")[0] for s in THREE_LAYOUTS if "Patient" not in s
    )
    assert {(round(v, 9), u) for _, v, u, _, _ in rows} == {(1.0, "mg/dL")}
    assert rows[0][4] == 1  # one person: the shared linkage token links the three labs
    # the same result from three sources is counted once (DEVELOPERS.md: reported first, then
    # source id); the other two are duplicates
    assert sorted(r[3] for r in rows) == ["accepted", "duplicate", "duplicate"]
    assert accepted == [("corvale_lab_chain",)]
    assert len(egfr) == 1
    shutil.rmtree(out)


def test_backfill_runs_in_order_skips_published_and_force_reruns(prefect_harness, tmp_path):
    out = tmp_path / "out"
    args = ["backfill", "--from", "2025-11", "--to", "2026-01", "--config", str(REPO / "config"),
            "--inbox", str(SAMPLES), "--out", str(out), "--demo-key"]  # fmt: skip
    runner = CliRunner()
    first = runner.invoke(app, args[:4] + ["2025-12"] + args[5:])
    assert first.exit_code == 0, first.output
    assert "[1/2] 2025-11" in first.output and "[2/2] 2025-12" in first.output
    second = runner.invoke(app, args)
    assert second.exit_code == 0, second.output
    assert "2025-11: already published, skipped" in second.output
    assert "2025-12: already published, skipped" in second.output
    assert "[3/3] 2026-01" in second.output and "2026-01: already" not in second.output
    forced = runner.invoke(app, args[:4] + ["2025-11", "--force"] + args[5:])
    assert forced.exit_code == 0, forced.output
    assert "already published" not in forced.output
    con = duckdb.connect(str(out / "surveillance.duckdb"), read_only=True)
    try:
        periods = [
            p
            for (p,) in con.execute(
                "select period from runs order by started_at, period"
            ).fetchall()
        ]
    finally:
        con.close()
    assert periods == ["2025-11", "2025-12", "2026-01", "2025-11"]


def test_deployment_has_its_cron_and_a_triggered_run_publishes(
    prefect_harness, tmp_path, monkeypatch
):
    """The schedule exists with the configured cron, and triggering the deployment runs the flow
    (without waiting for the 3rd of the month): a Runner picks the run up once."""
    import asyncio

    from prefect.client.orchestration import get_client
    from prefect.deployments import run_deployment
    from prefect.runner import Runner

    from pipeline.core.settings import load_settings
    from pipeline.run.schedule import DEPLOYMENT_NAME, FLOW_NAME, build_deployment

    monkeypatch.setenv("KIDNEYSURV_PSEUDONYM_KEY", "a-test-key-that-is-not-the-demo-key")
    inbox = tmp_path / "inbox"
    for rel, text in THREE_LAYOUTS.items():
        (inbox / rel).parent.mkdir(parents=True, exist_ok=True)
        (inbox / rel).write_text(text, encoding="utf-8")
    out = tmp_path / "out"
    deployment = build_deployment(load_settings(REPO / "config"), REPO / "config", inbox, out)
    deployment_id = deployment.apply()
    with get_client(sync_client=True) as client:
        stored = client.read_deployment(deployment_id)
    assert [s.schedule.cron for s in stored.schedules] == ["0 6 3 * *"]  # config/pipeline.yaml
    flow_run = run_deployment(
        f"{FLOW_NAME}/{DEPLOYMENT_NAME}", parameters={"period": "2026-01"}, timeout=0
    )
    runner = Runner(query_seconds=1)
    runner.add_deployment(deployment)
    asyncio.run(runner.start(run_once=True))
    with get_client(sync_client=True) as client:
        state = client.read_flow_run(flow_run.id).state
    assert state.is_completed(), state
    manifest = json.loads((out / "2026-01" / "run_manifest.json").read_text())
    assert manifest["demo_key"] is False
    # no demo mark on the exports of a run with a real key
    header = (
        (out / "2026-01" / "district_ckd_prevalence.csv")
        .read_text(encoding="utf-8")
        .splitlines()[0]
    )
    assert not header.endswith("key_notice")
    import pyarrow.parquet as pq

    assert b"kidneysurv.pseudonym_key" not in (
        pq.read_metadata(out / "2026-01" / "district_ckd_prevalence.parquet").metadata or {}
    )


def test_the_demo_publishes_no_blank_a_reader_can_narrow(demo_run):
    """Everything the demo month publishes, read together (every published table, their margins,
    the standardised rates' splits are checked in the run): no blank confined to 1-10 or to less
    than the protection width, by each blank's least and greatest value (linear programming,
    the usual audit of suppressed tables, common practice), and one mark for every blank."""
    from pipeline.core.settings import DisclosureSettings
    from pipeline.stages.disclose.audit import (
        MARK,
        _relations,
        build_system,
        failing_cells,
        table_from_frames,
    )
    from pipeline.warehouse.catalog import PUBLISHED_TABLES
    from pipeline.warehouse.connection import fetch_frame

    out, _, _ = demo_run
    con = duckdb.connect(
        str(out / "surveillance.duckdb"), read_only=True
    )  # an earlier test may close its own
    tables = {}
    for spec in PUBLISHED_TABLES:
        order = list(spec.keys)
        published = fetch_frame(
            con, f"select * from published.{spec.name} where period = ?", [PERIOD]
        ).sort(order)
        internal = fetch_frame(
            con, f"select * from main.{spec.name} where period = ?", [PERIOD]
        ).sort(order)
        assert set(published["suppression"].to_list()) <= {"", MARK}
        for column in spec.counts:
            assert not published[column].drop_nulls().is_between(1, 10).any(), (spec.name, column)
        tables[spec.name] = table_from_frames(spec.name, published, internal, spec)
    con.close()
    system = build_system(tables, _relations())
    assert failing_cells(system, DisclosureSettings(), exact=True) == {}
