"""Tests for the Great Expectations quality gate per source batch (pipeline.stages.quality_gate).

One in-memory warehouse holds a hand-made ``results_validated`` with one source per
case: a clean batch, and batches that each break one expectation once. All of them are checked
in a single ``check_batches`` call (Great Expectations is imported once for the module; the
import alone takes seconds), which also writes the Data Docs (a batch failed). Further tests:
a large batch (the summary GX validates does not grow with the rows, and one bad row among
thousands is still found with its id), a broken table schema, when the Data Docs are built, and
one real month run in which a defect that slipped past the row rules holds its source back.

Outside references: the FHIR R4 Observation status value set (final, amended, corrected,
cancelled, entered-in-error, preliminary; HL7 FHIR R4, ValueSet observation-status); canonical
units creatinine mg/dL, ACR mg/g, HbA1c % (NGSP) are UCUM codes of the project's contract
(DEVELOPERS.md, Design notes); the plausible range of serum creatinine 0.1-25 mg/dL is config/pipeline.yaml's
("common practice": wide physiological limits). Row values are invented (region Westerfold).
"""

from __future__ import annotations

import importlib.util
import re
from pathlib import Path
from typing import Any

import pytest

from pipeline.core.settings import load_settings
from pipeline.warehouse.connection import connect
from pipeline.warehouse.reference import load_reference_tables
from tests.conftest import make_small_config

pytestmark = pytest.mark.skipif(
    importlib.util.find_spec("great_expectations") is None,
    reason="great_expectations not installed",
)

STAGING_DDL = """
create temp table results_validated (
    source_id varchar, file_id bigint, line_no bigint, raw_text varchar, person_key varchar,
    specimen_id varchar, collected_date date, reported_date date, reported_date_basis varchar,
    loinc varchar, analyte varchar, status varchar, value_text varchar, comparator varchar,
    reported_value double, reported_unit varchar, height_cm double, is_fasting boolean,
    sex varchar, birth_year integer, district_code varchar, value double, unit varchar,
    age_years bigint, reason_code varchar, message varchar
)
"""
COLUMNS = ("source_id", "file_id", "line_no", "raw_text", "person_key", "specimen_id", "collected_date",
           "reported_date", "reported_date_basis", "loinc", "analyte", "status", "value_text", "comparator",
           "reported_value", "reported_unit", "height_cm", "is_fasting", "sex", "birth_year",
           "district_code", "value", "unit", "age_years", "reason_code", "message")  # fmt: skip
LEDGER_ROW = (
    "insert into ingest_files (file_id, source_id, file_path, version, sha256, size_bytes, status, "
    "rows_read, run_period, ingested_at) values (?, ?, ?, 1, 'sha', 1, ?, ?, '2025-06', now())"
)
# LOINC and canonical unit (UCUM) per analyte used here (DEVELOPERS.md, Design notes canonical units)
ANALYTES = {"creatinine": ("2160-0", "mg/dL"), "acr": ("9318-7", "mg/g"), "hba1c": ("4548-4", "%")}


def result(source: str, file_id: int, line_no: int, *, analyte: str = "creatinine", value: float | None = 1.0,
           unit: str | None = None, status: str = "final", person: str | None = "pk-wf-0001",
           sex: str = "F", reason: str | None = None) -> dict[str, Any]:  # fmt: skip
    loinc, canonical = ANALYTES.get(analyte, ("0000-0", "mg/dL"))
    unit = unit or canonical
    return {
        "source_id": source, "file_id": file_id, "line_no": line_no, "raw_text": "[person],...",
        "person_key": person, "specimen_id": f"S{file_id}-{line_no}", "collected_date": "2025-06-02",
        "reported_date": "2025-06-03", "reported_date_basis": "reported_at", "loinc": loinc,
        "analyte": analyte, "status": status, "value_text": None if value is None else f"{value:g}",
        "comparator": None, "reported_value": value, "reported_unit": unit, "height_cm": None,
        "is_fasting": None, "sex": sex, "birth_year": 1960, "district_code": "WF01", "value": value,
        "unit": unit, "age_years": 65, "reason_code": reason, "message": None if reason is None else "x",
    }  # fmt: skip


def clean_rows(source: str, file_id: int) -> list[dict[str, Any]]:
    """Five well-formed rows and one rejected row of one file."""
    return [
        result(source, file_id, 2, value=1.1),
        result(source, file_id, 3, analyte="acr", value=28.0, person="pk-wf-0002", sex="M"),
        result(source, file_id, 4, analyte="hba1c", value=6.1, person="pk-wf-0003", sex="U"),
        # a cancellation carries no result: no value, and its value is never range-checked
        result(source, file_id, 5, value=None, status="cancelled"),
        result(source, file_id, 6, value=85.0, status="entered-in-error"),
        result(source, file_id, 7, value=None, reason="not_numeric"),
    ]


PAIR = "expect_column_pair_values_a_to_be_greater_than_b"
# source -> (rows, the check expected to fail, the row id it names)
CASES: dict[str, tuple[list[dict[str, Any]], str | None, str | None]] = {
    "clean_lab": (clean_rows("clean_lab", 1), None, None),
    # 40 mg/dL is above creatinine's plausible maximum, 25 mg/dL (pipeline.yaml, common practice)
    "range_lab": (clean_rows("range_lab", 2) + [result("range_lab", 2, 8, value=40.0)],
                  f"{PAIR}(range_max, value_max)", "2:8"),
    "low_lab": (clean_rows("low_lab", 3) + [result("low_lab", 3, 8, value=0.01)],
                f"{PAIR}(value_min, range_min)", "3:8"),
    # mg/L is not creatinine's canonical unit (mg/dL)
    "unit_lab": (clean_rows("unit_lab", 4) + [result("unit_lab", 4, 8, unit="mg/L")],
                 "expect_column_values_to_be_in_set(analyte_unit)", "4:8"),
    "person_lab": (clean_rows("person_lab", 5) + [result("person_lab", 5, 8, person=None)],
                   "expect_column_values_to_be_between(null_person_key, 0, 0)", "5:8"),
    "twice_lab": (clean_rows("twice_lab", 6) + [result("twice_lab", 6, 3, analyte="acr", value=28.0)],
                  "expect_column_values_to_be_between(duplicate_row_ids, 0, 0)", "6:3"),
    "analyte_lab": (clean_rows("analyte_lab", 7) + [result("analyte_lab", 7, 8, analyte="lactate")],
                    "expect_column_values_to_be_in_set(analyte)", "7:8"),  # (and its unit check)
    # a final result must carry a value (only cancellations and entered-in-error may not)
    "novalue_lab": (clean_rows("novalue_lab", 8) + [result("novalue_lab", 8, 8, value=None)],
                    "expect_column_values_to_be_between(missing_value, 0, 0)", "8:8"),
    # NaN is not a value either (IEEE 754 not-a-number)
    "nan_lab": (clean_rows("nan_lab", 12) + [result("nan_lab", 12, 8, value=float("nan"))],
                "expect_column_values_to_be_between(missing_value, 0, 0)", "12:8"),
    # 'done' is not an Observation status in FHIR R4
    "status_lab": (clean_rows("status_lab", 9) + [result("status_lab", 9, 8, status="done")],
                   "expect_column_values_to_be_in_set(status)", "9:8"),
    "sex_lab": (clean_rows("sex_lab", 10) + [result("sex_lab", 10, 8, sex="X")],
                "expect_column_values_to_be_in_set(sex)", "10:8"),
    # the ledger says 8 rows were read, 6 are here; and a second file read 3 rows, none here
    "missing_lab": (clean_rows("missing_lab", 11), "row_count_balance", None),
    # every row rejected: an empty batch passes (the rejection-rate gate judges it)
    "rejected_lab": ([result("rejected_lab", 13, 2, value=None, reason="not_numeric")], None, None),
}  # fmt: skip
ROWS_READ = {source: len(rows) for source, (rows, _, _) in CASES.items()}
ROWS_READ["missing_lab"] = 8


def build_warehouse(settings, cases: dict[str, tuple[list[dict[str, Any]], Any, Any]],
                    rows_read: dict[str, int]):  # fmt: skip
    con = connect(":memory:")
    load_reference_tables(con, settings)
    con.execute(STAGING_DDL)
    placeholders = ", ".join("?" for _ in COLUMNS)
    rows = [tuple(r[c] for c in COLUMNS) for rows, _, _ in cases.values() for r in rows]
    if rows:
        con.executemany(f"insert into results_validated values ({placeholders})", rows)
    for source, (source_rows, _, _) in cases.items():
        file_id = source_rows[0]["file_id"]
        con.execute(LEDGER_ROW, [file_id, source, f"{source}/a.csv", "ingested", rows_read[source]])
    return con


@pytest.fixture(scope="module")
def settings(tmp_path_factory):
    return load_settings(make_small_config(tmp_path_factory.mktemp("quality") / "config"))


@pytest.fixture(scope="module")
def gate(settings, tmp_path_factory):
    """One check of every case, with Data Docs."""
    from pipeline.stages.quality_gate import check_batches

    con = build_warehouse(settings, CASES, ROWS_READ)
    # missing_lab: a later file of this run whose 3 rows all went missing
    con.execute(LEDGER_ROW, [90, "missing_lab", "missing_lab/b.csv", "ingested", 3])
    # clean_lab: a resent copy of a file is counted duplicate at ingest, its rows never land
    con.execute(LEDGER_ROW, [91, "clean_lab", "clean_lab/copy.csv", "duplicate_file", 6])
    # an earlier run's file of clean_lab (ids before this run's first file) is not this run's
    con.execute("update ingest_files set file_id = 0 where file_id = 1")
    con.execute(LEDGER_ROW, [1, "clean_lab", "clean_lab/a.csv", "ingested", ROWS_READ["clean_lab"]])
    docs = tmp_path_factory.mktemp("out") / "2025-06" / "quality"
    checks = check_batches(con, settings, docs)
    con.close()
    return checks, docs


def test_every_source_is_checked(gate):
    checks, _ = gate
    assert sorted(checks) == sorted(CASES)


def test_clean_batch_passes(gate):
    from pipeline.stages.quality_gate import KEY_COLUMNS

    check = gate[0]["clean_lab"]
    assert check.success, check.failed
    assert check.failed == [] and check.unexpected_row_ids == []
    assert check.rows == 5  # the rejected row is not in the batch
    # creatinine final F, acr final M, hba1c final U, creatinine cancelled F and entered-in-error F
    assert check.cells == 5
    # the three suites: 2 on the columns, 7 + one per key column on the cells, 2 on the totals
    assert check.evaluated == 2 + 7 + len(KEY_COLUMNS) + 2
    assert check.seconds >= 0


def test_a_batch_of_rejected_rows_only_passes(gate):
    check = gate[0]["rejected_lab"]
    assert check.success, check.failed
    assert check.rows == 0 and check.cells == 0


@pytest.mark.parametrize("source", [s for s, (_, name, _) in CASES.items() if name])
def test_broken_batch_fails_with_named_check_and_row(gate, source):
    _, expected, row_id = CASES[source]
    check = gate[0][source]
    assert not check.success
    names = [f.split(":", 1)[0] for f in check.failed]
    also = {"analyte_lab": ["expect_column_values_to_be_in_set(analyte_unit)"]}.get(source, [])
    assert names == [expected, *also], check.failed
    if row_id is not None:
        assert check.unexpected_row_ids == [row_id]  # exactly the broken row, once


def test_unexpected_rows_are_reported_with_their_cell_and_count(gate):
    failed = gate[0]["range_lab"].failed[0]
    assert "creatinine [mg/dL], final, F" in failed and "value_max 40" in failed
    assert failed.endswith("1 of 6 rows unexpected")
    # both copies of the duplicated row id count, as GX's uniqueness check counts them
    assert gate[0]["twice_lab"].failed[0].endswith("2 of 6 rows unexpected")


def test_row_count_balance_counts_missing_rows_and_files(gate):
    failed = gate[0]["missing_lab"].failed[0]
    # 5 well-formed + 1 rejected here; the ledger read 8 + 3 in this run
    assert "batch 5 + rejected 1 = 6 rows" in failed and "read 11" in failed


def insert_generated_batch(con, source: str, file_id: int, rows: int) -> None:
    """``rows`` well-formed creatinine results (invented), values 1.0-1.6 mg/dL, F and M."""
    con.execute(
        f"""
        insert into results_validated
        select '{source}', {file_id}, i + 2, '[person],...', 'pk-wf-' || (i % 500)::varchar,
               'S' || i::varchar, date '2025-06-02', date '2025-06-03', 'reported_at', '2160-0',
               'creatinine', 'final', null, null, 1.0 + (i % 7) / 10, 'mg/dL', null, null,
               case when i % 2 = 0 then 'F' else 'M' end, 1960, 'WF01', 1.0 + (i % 7) / 10,
               'mg/dL', 65, null, null
        from range({rows}) as t(i)
        """
    )


def test_the_summary_does_not_grow_with_the_rows_and_still_names_every_bad_row(settings):
    """20,000 rows make 2 summary rows; 25 values above the plausible range among them are all
    counted, and the first 20 are named in file and line order."""
    from pipeline.stages.quality_gate import MAX_UNEXPECTED_IDS, check_batches

    con = build_warehouse(settings, {}, {})
    insert_generated_batch(con, "big_lab", 1, 20_000)
    con.execute(LEDGER_ROW, [1, "big_lab", "big_lab/a.csv", "ingested", 20_000])
    clean = check_batches(con, settings, None)["big_lab"]
    assert clean.success, clean.failed
    assert (clean.rows, clean.cells) == (20_000, 2)
    # 30 mg/dL is above creatinine's plausible maximum, 25 mg/dL (pipeline.yaml, common practice)
    con.execute("update results_validated set value = 30 where line_no between 100 and 124")
    check = check_batches(con, settings, None)["big_lab"]
    con.close()
    assert [f.split(":", 1)[0] for f in check.failed] == [f"{PAIR}(range_max, value_max)"]
    assert check.failed[0].endswith("25 of 20000 rows unexpected")
    assert check.unexpected_row_ids == [f"1:{n}" for n in range(100, 100 + MAX_UNEXPECTED_IDS)]


def test_a_broken_table_schema_fails_every_batch(settings):
    from pipeline.stages.quality_gate import check_batches

    cases = {s: CASES[s] for s in ("clean_lab", "low_lab")}
    con = build_warehouse(settings, cases, ROWS_READ)
    con.execute("alter table results_validated drop column district_code")
    con.execute("alter table results_validated alter birth_year type varchar")
    checks = check_batches(con, settings, None)
    con.close()
    schema = ["expect_column_distinct_values_to_equal_set(column_name)",
              "expect_column_values_to_be_in_set(column_type)"]  # fmt: skip
    assert [f.split(":", 1)[0] for f in checks["clean_lab"].failed] == schema
    assert "birth_year VARCHAR" in checks["clean_lab"].failed[1]
    # the other checks still ran on the summary
    assert [f.split(":", 1)[0] for f in checks["low_lab"].failed] == [
        *schema,
        f"{PAIR}(value_min, range_min)",
    ]


# --------------------------------------------------------------------------- Data Docs

LINK_HREF = re.compile(r"<link\b[^>]*?\bhref\s*=\s*[\"']?([^\"'\s>]+)", re.IGNORECASE)
SCRIPT_SRC = re.compile(r"<script\b[^>]*?\bsrc\s*=\s*[\"']?([^\"'\s>]+)", re.IGNORECASE)
CSS_URL = re.compile(r"url\(\s*[\"']?([^\"')\s]+)", re.IGNORECASE)


def asset_references(docs: Path) -> list[tuple[Path, str]]:
    refs = []
    for path in sorted(docs.rglob("*")):
        if path.suffix in (".html", ".css"):
            text = path.read_text(encoding="utf-8")
            patterns = (LINK_HREF, SCRIPT_SRC, CSS_URL) if path.suffix == ".html" else (CSS_URL,)
            refs += [(path, m.group(1)) for p in patterns for m in p.finditer(text)]
    return refs


def test_data_docs_are_written(gate):
    _, docs = gate
    assert (docs / "index.html").is_file()
    pages = list((docs / "validations").rglob("*.html"))
    # one validation page per summary frame: the columns, the cells, the totals
    assert sorted(p.parent.parent.parent.name for p in pages) == ["batch_cells", "batch_totals",
                                                                   "standardised_columns"]  # fmt: skip
    assert any("range_lab" in p.read_text(encoding="utf-8") for p in pages)  # a failing source


def test_data_docs_load_no_stylesheet_script_or_font_from_the_network(gate):
    _, docs = gate
    refs = asset_references(docs)
    assert refs, "expected stylesheet and script references in the pages"
    remote = [(p.name, u) for p, u in refs if u.startswith(("http://", "https://", "//"))]
    assert remote == []


def test_data_docs_local_assets_exist(gate):
    _, docs = gate
    for path, url in asset_references(docs):
        if url.startswith(("data:", "#")):
            continue
        target = (path.parent / url.split("?")[0].split("#")[0]).resolve()
        if "webfonts" in url and url.endswith(".ttf"):
            continue  # woff2 is listed first and vendored; the ttf fallbacks are not
        if "fa-brands" in url:
            continue  # brand icons are not used by the pages and not vendored
        assert target.is_file(), f"{path.relative_to(docs)} -> {url}"


# --------------------------------------------------------------------------- when Data Docs are built


def test_data_docs_only_on_failure_unless_always(settings, tmp_path):
    from pipeline.stages.quality_gate import check_batches

    con = build_warehouse(settings, {"clean_lab": CASES["clean_lab"]}, ROWS_READ)
    docs = tmp_path / "quality"
    assert check_batches(con, settings, docs, quality_pages="always")["clean_lab"].success
    assert (docs / "index.html").is_file()
    # a clean run under on_failure leaves no report, and removes the earlier one
    check_batches(con, settings, docs, quality_pages="on_failure")
    assert not docs.exists()
    check_batches(con, settings, docs, quality_pages="never")
    assert not docs.exists()
    # the default is the setting, on_failure in the shipped config
    assert settings.pipeline.quality_gate.quality_pages == "on_failure"
    check_batches(con, settings, docs)
    con.close()
    assert not docs.exists()


# --------------------------------------------------------------------------- in a month run

STD = ("person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,"
       "status,reported_at\n")  # fmt: skip
SEMI = "PatientRef;YearOfBirth;Gender;AreaCode;SampleNo;SampleDate;TestCode;Result;Units;State;ReportDate\n"
INBOX = {
    "westerfold_general_lab/results_2026-01.csv": STD
    + "WF-q1,1960,F,WF01,S1,2026-01-10,2160-0,1.0,mg/dL,final,2026-01-11\n"
    + "WF-q2,1971,M,WF02,S2,2026-01-12,2160-0,1.3,mg/dL,final,2026-01-13\n",
    "corvale_lab_chain/export_202601.csv": SEMI + "WF-q3;1970;M;WF02;C1;10/01/2026;CREA;80;µmol/l;F;11/01/2026\n",
}  # fmt: skip


@pytest.fixture
def gx_config(tmp_path):
    from tests.conftest import edit_pipeline_yaml

    config = make_small_config(tmp_path / "config")
    edit_pipeline_yaml(config, "quality_gate", "great_expectations", True)
    return config


def test_a_defect_that_slips_past_the_row_rules_holds_its_source_back(
    gx_config, tmp_path, monkeypatch
):
    """A real month run with the real suites: one value far above its plausible range reaches
    the batch (as if a range rule had slipped); the gate fails that source's batch, its files
    are held back and none of its rows stored, the other source publishes, the run exits 1, and
    the Data Docs of the failure are written beside the exports and load nothing from the
    network."""
    import json

    import pipeline.run.flows as flows
    from tests.conftest import rows, run_month, write_inbox

    real = flows._expectations

    def slipped(ctx, con, judged):
        con.execute(f"update {judged.rows} set value = 400 "
                    "where source_id = 'westerfold_general_lab' and specimen_id = 'S2'")  # fmt: skip
        return real(ctx, con, judged)

    monkeypatch.setattr(flows, "_expectations", slipped)
    inbox = write_inbox(tmp_path, INBOX)
    out = tmp_path / "out"
    with run_month(gx_config, inbox, out) as con:
        files = dict(
            rows(con, "select source_id, status || ': ' || coalesce(message, '') from ingest_files")
        )
        stored = rows(con, "select distinct source_id from lab_results")
        exit_code = rows(con, "select exit_code from runs")[0][0]
        s2 = rows(
            con, "select file_id from ingest_files where source_id = 'westerfold_general_lab'"
        )[0][0]
    assert files["westerfold_general_lab"].startswith("held_back: ")
    assert f"expectation suite: {PAIR}(range_max, value_max)" in files["westerfold_general_lab"]
    assert files["corvale_lab_chain"].startswith("ingested")
    assert stored == [("corvale_lab_chain",)]
    assert exit_code == 1
    checks = json.loads((out / "2026-01" / "run_manifest.json").read_text())["quality_gate"][
        "batch_checks"
    ]
    assert checks["corvale_lab_chain"]["success"] is True
    failed = checks["westerfold_general_lab"]
    assert failed["success"] is False and failed["unexpected_row_ids"] == [f"{s2}:3"]
    assert set(failed) == {"success", "evaluated", "failed", "unexpected_row_ids", "seconds"}
    docs = out / "2026-01" / "quality"
    assert (docs / "index.html").is_file()
    remote = [u for _, u in asset_references(docs) if u.startswith(("http://", "https://", "//"))]
    assert remote == []


def test_a_clean_month_run_passes_the_gate_and_writes_no_data_docs(gx_config, tmp_path):
    import json

    from tests.conftest import rows, run_month, write_inbox

    out = tmp_path / "out"
    with run_month(gx_config, write_inbox(tmp_path, INBOX), out) as con:
        assert rows(con, "select exit_code from runs")[0][0] == 0
    checks = json.loads((out / "2026-01" / "run_manifest.json").read_text())["quality_gate"][
        "batch_checks"
    ]
    assert sorted(checks) == ["corvale_lab_chain", "westerfold_general_lab"]
    assert all(c["success"] for c in checks.values())
    assert not (out / "2026-01" / "quality").exists()  # quality_pages: on_failure
