"""Tests for the Great Expectations quality gate per source batch (pipeline.quality).

One in-memory warehouse holds a hand-made ``staging.int_results_validated`` with one source per
case: a clean batch, and batches that each break one expectation once. All of them are checked
in a single ``check_batches`` call (Great Expectations is imported once for the module; the
import alone takes several seconds), which also writes the Data Docs; one more call checks the
chunked path.

Outside references: the FHIR R4 Observation status value set (final, amended, corrected,
cancelled, entered-in-error, preliminary; HL7 FHIR R4, ValueSet observation-status); canonical
units creatinine mg/dL, ACR mg/g, HbA1c % (NGSP) are UCUM codes of the project's contract
(DESIGN.md); the plausible range of serum creatinine 0.1-25 mg/dL is config/pipeline.yaml's
("common practice": wide physiological limits). Row values are invented (region Westerfold).
"""

from __future__ import annotations

import importlib.util
import re
from pathlib import Path
from typing import Any

import pytest

from pipeline.settings import load_settings
from pipeline.warehouse import connect, load_reference_tables
from tests.conftest import make_small_config

pytestmark = pytest.mark.skipif(
    importlib.util.find_spec("great_expectations") is None,
    reason="great_expectations not installed",
)

STAGING_DDL = """
create table staging.int_results_validated (
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
# LOINC and canonical unit (UCUM) per analyte used here (DESIGN.md canonical units)
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


# source -> (rows, the check expected to fail, the row id it names)
CASES: dict[str, tuple[list[dict[str, Any]], str | None, str | None]] = {
    "clean_lab": (clean_rows("clean_lab", 1), None, None),
    # 40 mg/dL is above creatinine's plausible maximum, 25 mg/dL (pipeline.yaml, common practice)
    "range_lab": (clean_rows("range_lab", 2) + [result("range_lab", 2, 8, value=40.0)],
                  "expect_column_pair_values_a_to_be_greater_than_b(value_max, value)", "2:8"),
    "low_lab": (clean_rows("low_lab", 3) + [result("low_lab", 3, 8, value=0.01)],
                "expect_column_pair_values_a_to_be_greater_than_b(value, value_min)", "3:8"),
    # mg/L is not creatinine's canonical unit (mg/dL)
    "unit_lab": (clean_rows("unit_lab", 4) + [result("unit_lab", 4, 8, unit="mg/L")],
                 "expect_column_values_to_be_in_set(analyte_unit)", "4:8"),
    "person_lab": (clean_rows("person_lab", 5) + [result("person_lab", 5, 8, person=None)],
                   "expect_column_values_to_not_be_null(person_key)", "5:8"),
    "twice_lab": (clean_rows("twice_lab", 6) + [result("twice_lab", 6, 3, analyte="acr", value=28.0)],
                  "expect_column_values_to_be_unique(row_id)", "6:3"),
    "analyte_lab": (clean_rows("analyte_lab", 7) + [result("analyte_lab", 7, 8, analyte="lactate")],
                    "expect_column_values_to_be_in_set(analyte)", "7:8"),  # (and its unit check)
    # a final result must carry a value (only cancellations and entered-in-error may not)
    "novalue_lab": (clean_rows("novalue_lab", 8) + [result("novalue_lab", 8, 8, value=None)],
                    "expect_column_values_to_not_be_null(value, status not withdrawn)", "8:8"),
    # 'done' is not an Observation status in FHIR R4
    "status_lab": (clean_rows("status_lab", 9) + [result("status_lab", 9, 8, status="done")],
                   "expect_column_values_to_be_in_set(status)", "9:8"),
    "sex_lab": (clean_rows("sex_lab", 10) + [result("sex_lab", 10, 8, sex="X")],
                "expect_column_values_to_be_in_set(sex)", "10:8"),
    # the ledger says 8 rows were read, 6 are here; and a second file read 3 rows, none here
    "missing_lab": (clean_rows("missing_lab", 11), "row_count_balance", None),
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
    con.executemany(f"insert into staging.int_results_validated values ({placeholders})", rows)
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
    from pipeline.quality import check_batches

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
    check = gate[0]["clean_lab"]
    assert check.success, check.failed
    assert check.failed == [] and check.unexpected_row_ids == []
    assert check.rows == 5  # the rejected row is not in the batch
    assert check.evaluated > 30  # the whole suite ran, plus the row-count balance
    assert check.seconds >= 0


@pytest.mark.parametrize("source", [s for s, (_, name, _) in CASES.items() if name])
def test_broken_batch_fails_with_named_check_and_row(gate, source):
    _, expected, row_id = CASES[source]
    check = gate[0][source]
    assert not check.success
    names = [f.split(":", 1)[0] for f in check.failed]
    also = {"analyte_lab": ["expect_column_values_to_be_in_set(analyte_unit)"]}.get(source, [])
    assert names == [expected, *also], check.failed
    if row_id is not None:
        assert row_id in check.unexpected_row_ids


def test_unexpected_rows_are_reported_with_a_reason(gate):
    failed = gate[0]["range_lab"].failed[0]
    assert failed.endswith("1 of 6 rows unexpected")


def test_row_count_balance_counts_missing_rows_and_files(gate):
    failed = gate[0]["missing_lab"].failed[0]
    # 5 well-formed + 1 rejected here; the ledger read 8 + 3 in this run
    assert "batch 5 + rejected 1 = 6 rows" in failed and "read 11" in failed


def test_chunked_batch_merges_results_and_keeps_duplicates_together(settings):
    from pipeline.quality import check_batches

    rows = clean_rows("chunk_lab", 1) + [
        result("chunk_lab", 1, 8, value=40.0),
        result("chunk_lab", 1, 9),
        result("chunk_lab", 1, 9),  # a duplicated (file, line): both copies land in one chunk
        result("chunk_lab", 1, 10),
    ]
    con = build_warehouse(settings, {"chunk_lab": (rows, None, None)}, {"chunk_lab": len(rows)})
    check = check_batches(con, settings, None, chunk_rows=2)["chunk_lab"]
    con.close()
    assert check.chunks >= 4 and check.rows == 9
    names = sorted(f.split(":", 1)[0] for f in check.failed)
    assert names == ["expect_column_pair_values_a_to_be_greater_than_b(value_max, value)",
                     "expect_column_values_to_be_unique(row_id)"]  # fmt: skip
    assert {"1:8", "1:9"} <= set(check.unexpected_row_ids)


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
    assert len(pages) == len(CASES)  # one validation page per source batch
    assert any("clean_lab" in p.read_text(encoding="utf-8") for p in pages)


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
