"""A corpus of defective inputs: one small file per defect under tests/fixtures/defects/, each
run as a tiny inbox through a whole month (``run_month``) on the small config, with the outcome
every line must get and the row accounting of every file.

Expected outcomes are the rules of DEVELOPERS.md (row accounting, rejection reason codes) and
these outside facts, named beside each case:

* FHIR R4 Observation status value set (final, amended, corrected, cancelled, entered-in-error,
  preliminary) and the Observation/Patient/Reference data types (HL7 FHIR R4, from memory);
* RFC 4180 CSV: CRLF line ends, quoted fields may hold the delimiter and line breaks;
* Unicode/UTF-8 (RFC 3629): a byte order mark is not data; 0xB5 alone is not UTF-8;
* NDJSON: one JSON value per line, lines separated by LF only (ndjson spec 1.0, from memory);
  JSON (RFC 8259) allows U+2028 unescaped inside a string;
* the Gregorian calendar (2025 is not a leap year);
* units: 1 mg/dL creatinine = 88.4 umol/L; 1 mg/mmol ACR = 8.84 mg/g (KDIGO 2012, confirmed);
* KDIGO 2012 albuminuria categories (A1 < 3 mg/mmol or < 30 mg/g; 300 mg/g is the A2/A3
  boundary, project decision 2);
* CKD-EPI 2021 (Inker et al., NEJM 2021) needs the sex (kappa and alpha differ) and an exact
  creatinine, so no eGFR for sex U or a censored creatinine.

A case that shows a bug keeps the correct expectation and is marked ``xfail(strict=True)``.
"""

from __future__ import annotations

import datetime as dt
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import duckdb
import pytest

from tests.conftest import FIXTURES, make_small_config, rows, run_month, write_inbox

DEFECTS = FIXTURES / "defects"
LAB = "westerfold_general_lab"  # standard layout (three-key config)
CORVALE = "corvale_lab_chain"  # delimited: ';', decimal comma, dd/mm/yyyy, local codes
FHIR = "fallowmere_reference_lab"  # FHIR R4 bulk NDJSON
OUTCOMES = ("accepted", "superseded", "duplicate", "withdrawn", "pending")
HEADER = "person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,status,reported_at"

#: A good file put beside every whole-file fault: it must still be ingested.
COMPANION = f"{LAB}/companion_2025-06.csv"
COMPANION_TEXT = (
    HEADER + "\nWF-def00009,1970,M,WF02,C1,2025-06-02,2160-0,1.1,mg/dL,final,2025-06-03\n"
)
#: A field over the csv module's default limit of 131072 characters (Python docs, csv.field_size_limit).
OVERSIZED = (HEADER + "\nWF-def00001,1960,F,WF01,OK1,2025-06-02,2160-0,1.0,mg/dL,final,2025-06-03\n"
             + "WF-def00002,1960,F,WF01,D1,2025-06-02,2160-0,1.0,mg/dL,final,\"" + "x" * 140_000 + "\"\n")  # fmt: skip

Check = Callable[[duckdb.DuckDBPyConnection], None]


@dataclass(frozen=True)
class Case:
    id: str
    #: (period, {inbox path: fixture path under defects/ or literal content}) per monthly run
    runs: tuple[tuple[str, dict[str, str | bytes]], ...]
    #: inbox path -> {line: outcome, or the reason code of a rejected row}
    lines: dict[str, dict[int, str]] = field(default_factory=dict)
    #: inbox path held back -> (words its message must hold, path the message must name)
    faults: dict[str, tuple[tuple[str, ...], str]] = field(default_factory=dict)
    #: inbox path recorded as duplicate_file -> the path of its original
    duplicate_of: dict[str, str] = field(default_factory=dict)
    config: str = "small"
    check: Check | None = None
    bug: str | None = None  # an xfail reason when the case shows a bug


def fixture(rel: str) -> bytes:
    return (DEFECTS / rel).read_bytes()


def row_case(name: str, lines: dict[int, str], *, check: Check | None = None, bug: str | None = None,
             folder: str = LAB, config: str = "small") -> Case:  # fmt: skip
    """One standard-layout (or delimited) file; line 2 is a clean control row."""
    path = f"{folder}/{name}.csv"
    return Case(
        name,
        (("2025-06", {path: f"{name}.csv"}),),
        {path: lines},
        config=config,
        check=check,
        bug=bug,
    )


def fault_case(
    name: str, words: tuple[str, ...], *, content: bytes | None = None, bug: str | None = None
) -> Case:
    """One standard-layout file with a whole-file fault, beside a good companion file."""
    path = f"{LAB}/{name}.csv"
    files = {
        path: content if content is not None else f"{name}.csv",
        COMPANION: COMPANION_TEXT.encode(),
    }
    return Case(
        name, (("2025-06", files),), {COMPANION: {2: "accepted"}}, {path: (words, path)}, bug=bug
    )


def fhir_case(name: str, lines: dict[int, str] | None = None, *, fault: tuple[tuple[str, ...], str] | None = None,
              bug: str | None = None) -> Case:  # fmt: skip
    """One bulk-export folder (Observation.ndjson with its Patient.ndjson, if the fixture has one)."""
    obs = f"{FHIR}/2025-06/Observation.ndjson"
    files: dict[str, str | bytes] = {obs: f"{name}/Observation.ndjson"}
    if (DEFECTS / name / "Patient.ndjson").is_file():
        files[f"{FHIR}/2025-06/Patient.ndjson"] = f"{name}/Patient.ndjson"
    if fault is not None:
        files[COMPANION] = COMPANION_TEXT.encode()
        return Case(
            name, (("2025-06", files),), {COMPANION: {2: "accepted"}}, {obs: fault}, bug=bug
        )
    return Case(name, (("2025-06", files),), {obs: lines or {}}, bug=bug)


# --------------------------------------------------------------------------- checks of values


def measure(con, path: str, line: int) -> dict:
    """The kidney_measures row of one input line."""
    found = con.execute(
        "select m.* from kidney_measures m join ingest_files f using (file_id) where f.file_path = ? and m.line_no = ?",
        [path, line],
    )
    names = [d[0] for d in found.description]
    got = found.fetchall()
    assert len(got) == 1, f"{path}:{line}: {len(got)} kidney_measures rows"
    return dict(zip(names, got[0], strict=False))


def result(con, path: str, line: int, table: str = "lab_results") -> dict:
    """The lab_results (or result_versions) row of one input line."""
    found = con.execute(
        f"select r.* from {table} r join ingest_files f using (file_id) where f.file_path = ? and r.line_no = ?",
        [path, line],
    )
    names = [d[0] for d in found.description]
    got = found.fetchall()
    assert len(got) == 1, f"{path}:{line}: {len(got)} {table} rows"
    return dict(zip(names, got[0], strict=False))


def std(name: str) -> str:
    return f"{LAB}/{name}.csv"


def check_ge300_mg_mmol(con):
    r = result(con, std("acr_ge300_mg_mmol"), 3)
    assert (r["comparator"], r["value_text"], r["unit"]) == (">=", ">=300", "mg/g")
    assert r["value"] == pytest.approx(300 * 8.84)  # 1 mg/mmol = 8.84 mg/g (KDIGO 2012)
    # every value >= 2652 mg/g is above 300 mg/g: A3 (KDIGO 2012)
    assert measure(con, std("acr_ge300_mg_mmol"), 3)["a_category"] == "A3"


def check_thousands(con):
    r = result(con, f"{CORVALE}/decimal_comma_thousands_dot.csv", 3)
    assert (r["reported_value"], r["reported_unit"], r["comparator"]) == (1234.5, "umol/L", None)
    assert r["value"] == pytest.approx(1234.5 / 88.4, rel=1e-6)  # 1 mg/dL = 88.4 umol/L


def check_unknown_district(con):
    assert result(con, std("unknown_district"), 3)["district_code"] == "WF99"  # kept as reported
    status = dict(rows(con, "select district_code, count(*) from person_status group by all"))
    # the person is counted once, under the code as reported or as unknown (sql/catalog.yaml)
    assert status.get("WF99", 0) + status.get("unknown", 0) == 1 and status["WF01"] == 1


def check_unknown_district_summary(con):
    prevalence = dict(rows(con, "select district_code, persons_tested from district_ckd_prevalence "
                                "where sex = 'ALL' and age_band = 'ALL'"))  # fmt: skip
    # a code that is no district of the region (districts.csv) is summarised as unknown, not
    # published as a district of its own with no population
    assert "WF99" not in prevalence
    assert prevalence.get("unknown") == 1 and prevalence["ALL"] == 2


def check_unknown_sex(con):
    assert result(con, std("unknown_sex"), 3)["sex"] == "U"
    m = measure(con, std("unknown_sex"), 3)
    assert (m["egfr"], m["egfr_reason"]) == (None, "sex_unknown")  # CKD-EPI 2021 needs the sex
    assert measure(con, std("unknown_sex"), 2)["egfr"] is not None  # the control row gets one


def check_censored_creatinine(con):
    r = result(con, std("censored_creatinine"), 3)
    assert (r["comparator"], r["value"]) == ("<", 0.2)
    m = measure(con, std("censored_creatinine"), 3)
    assert (m["egfr"], m["egfr_reason"]) == (None, "censored_creatinine")


def check_acr_lt3(con):
    m = measure(con, std("acr_lt3_mg_mmol"), 3)
    assert (m["acr_comparator"], m["a_category"]) == ("<", "A1")  # KDIGO 2012: A1 < 3 mg/mmol


def check_acr_ge300_mg_g(con):
    m = measure(con, std("acr_ge300_mg_g"), 3)
    # >= 300 mg/g admits 300 (A2) and above (A3): no single category
    assert (m["acr_comparator"], m["a_category"], m["acr_reason"]) == (
        ">=",
        None,
        "censored_ambiguous",
    )


def check_comparator_with_space(con):
    r = result(con, std("comparator_with_space"), 3)
    assert (r["comparator"], r["value"]) == ("<", 0.2)


def check_collected_with_time(con):
    assert result(con, std("collected_with_time"), 3)["collected_date"] == dt.date(2025, 6, 2)


def specimens_by_line(path: str, expected: dict[int, str]) -> Check:
    def check(con):
        got = dict(rows(con, "select v.line_no, v.specimen_id from result_versions v join ingest_files f "
                             "using (file_id) where f.file_path = ?", [path]))  # fmt: skip
        assert got == expected

    return check


def check_amended_then_cancelled(con):
    assert rows(con, "select count(*) from lab_results where specimen_id = 'D1'") == [(0,)]


# --------------------------------------------------------------------------- the corpus

A = "accepted"
FHIR_OBS = f"{FHIR}/2025-06/Observation.ndjson"
RESENT = "resent_row_next_month"

CASES = [
    # ---- values
    row_case("leap_day_non_leap_year", {2: A, 3: "invalid_date"}),  # 2025-02-29 does not exist
    row_case("acr_ge300_mg_mmol", {2: A, 3: A}, check=check_ge300_mg_mmol),
    row_case(
        "decimal_comma_thousands_dot",
        {2: A, 3: A},
        folder=CORVALE,
        config="thousands",
        check=check_thousands,
    ),
    row_case("value_zero", {2: A, 3: "out_of_range"}),  # creatinine 0.1-25 mg/dL (pipeline.yaml)
    row_case("value_negative", {2: A, 3: "out_of_range"}),
    row_case("value_nan", {2: A, 3: "not_numeric"}),
    row_case("value_inf", {2: A, 3: "not_numeric"}),
    row_case(
        "decimal_comma_in_dot_source", {2: A, 3: "not_numeric"}
    ),  # "1,5" where '.' is the mark
    row_case("comparator_with_space", {2: A, 3: A}, check=check_comparator_with_space),
    row_case("censored_creatinine", {2: A, 3: A}, check=check_censored_creatinine),
    row_case("acr_lt3_mg_mmol", {2: A, 3: A}, check=check_acr_lt3),
    row_case("acr_ge300_mg_g", {2: A, 3: A}, check=check_acr_ge300_mg_g),
    # ---- units
    row_case("creatinine_mmol_l", {2: A, 3: "unit_incompatible"}),
    row_case("acr_mg_l", {2: A, 3: "unit_incompatible"}),  # mg/L is a concentration, not a ratio
    row_case("creatinine_85_mg_dl", {2: A, 3: "implausible_for_unit"}),  # 85 umol/L = 0.96 mg/dL
    row_case("unit_unknown_spelling", {2: A, 3: "unit_unknown"}),
    row_case("unit_blank", {2: A, 3: "unit_missing"}),
    # ---- codes, persons, dates
    row_case("unknown_test_code", {2: A, 3: "unknown_test_code"}),
    row_case("unknown_status", {2: A, 3: "unknown_status"}),  # "done" is no FHIR status
    row_case("status_upper_case", {2: A, 3: A}),  # FHIR codes compared without case by the reader
    row_case("person_token_blank", {2: A, 3: "missing_person"}),
    row_case("birth_year_after_collection", {2: A, 3: "collected_before_birth"}),
    row_case("birth_year_1890", {2: A, 3: "age_over_120"}),  # 2025 - 1890 = 135
    row_case("birth_year_blank", {2: A, 3: "invalid_birth_year"}),
    row_case("future_date", {2: A, 3: "future_date"}),
    row_case("date_unparsable_text", {2: A, 3: "invalid_date"}),
    row_case(
        "date_wrong_format_for_source", {2: A, 3: "invalid_date"}
    ),  # dd/mm/yyyy, source is ISO
    row_case(
        "collected_with_time", {2: A, 3: A}, check=check_collected_with_time
    ),  # ISO 8601 date-time
    row_case("unknown_district", {2: A, 3: A}, check=check_unknown_district),
    Case(
        "unknown_district_summary",
        (("2025-06", {std("unknown_district"): "unknown_district.csv"}),),
        {std("unknown_district"): {2: A, 3: A}},
        check=check_unknown_district_summary,
    ),
    row_case("unknown_sex", {2: A, 3: A}, check=check_unknown_sex),
    row_case(
        "repeated_header_row", {2: A, 3: "invalid_report_date", 4: A}
    ),  # "reported_at" is no date
    # ---- fields and lines
    row_case("too_many_fields", {2: A, 3: "wrong_field_count"}),
    row_case("too_few_fields", {2: A, 3: "wrong_field_count"}),
    row_case("truncated_last_line", {2: A, 3: A, 4: "wrong_field_count"}),
    row_case("extra_unknown_column", {2: A, 3: A}),
    row_case(
        "crlf_line_ends",
        {2: A, 3: A, 4: A},  # RFC 4180 line ends
        check=specimens_by_line(std("crlf_line_ends"), {2: "OK1", 3: "D1", 4: "D2"}),
    ),
    row_case(
        "cr_only_line_ends",
        {2: A, 3: A, 4: A},
        check=specimens_by_line(std("cr_only_line_ends"), {2: "OK1", 3: "D1", 4: "D2"}),
    ),
    row_case("blank_line_between_rows", {2: A, 4: A}),  # a blank line is not a row
    row_case(
        "quoted_field_with_delimiter",
        {2: A, 3: A},  # RFC 4180
        check=specimens_by_line(std("quoted_field_with_delimiter"), {2: "OK1", 3: "D1,a"}),
    ),
    row_case(
        "quoted_newline_in_field",
        {2: A, 3: A, 5: A},  # RFC 4180; a row is numbered by its first line
        check=specimens_by_line(
            std("quoted_newline_in_field"), {2: "OK1", 3: "D1\nsecond line", 5: "D2"}
        ),
    ),
    row_case("bom_header", {2: A, 3: A}),  # the BOM is not part of the first column name
    # ---- versions and copies
    row_case(
        "amended_then_cancelled",
        {2: A, 3: "superseded", 4: "superseded", 5: "withdrawn"},
        check=check_amended_then_cancelled,
    ),
    row_case("entered_in_error_after_final", {2: A, 3: "superseded", 4: "withdrawn"}),
    row_case("same_row_twice", {2: A, 3: A, 4: "duplicate"}),
    row_case("preliminary_never_final", {2: A, 3: "pending"}),
    Case(
        "same_file_two_names",
        (
            (
                "2025-06",
                {
                    std("same_file_two_names"): "same_file_two_names.csv",
                    f"{LAB}/same_file_two_names_copy.csv": "same_file_two_names.csv",
                },
            ),
        ),
        {std("same_file_two_names"): {2: A, 3: A}},
        duplicate_of={f"{LAB}/same_file_two_names_copy.csv": std("same_file_two_names")},
    ),
    Case(
        RESENT,
        (
            ("2025-06", {f"{LAB}/results_2025-06.csv": f"{RESENT}/results_2025-06.csv"}),
            ("2025-07", {f"{LAB}/results_2025-07.csv": f"{RESENT}/results_2025-07.csv"}),
        ),
        {
            f"{LAB}/results_2025-06.csv": {2: A, 3: A},
            f"{LAB}/results_2025-07.csv": {2: A, 3: "duplicate"},
        },
    ),
    # ---- whole-file faults
    fault_case("latin1_bytes", ("line 3", "not utf-8")),
    fault_case("utf16_file", ("line 1", "not utf-8")),
    fault_case("wrong_delimiter", ("delimiter ','",)),
    fault_case(
        "header_typo_collected_dat",
        ("missing required column", "'collected_date'", "'collected_dat'", "typo"),
    ),
    fault_case("missing_required_column", ("missing required column", "'unit'")),
    fault_case("header_only", ("header but no rows",)),
    fault_case("empty_file", ("empty",)),
    fault_case("oversized_field", ("line",), content=OVERSIZED.encode()),
    Case(
        "same_faulty_file_two_names",
        (
            (
                "2025-06",
                {
                    std("latin1_bytes"): "latin1_bytes.csv",
                    f"{LAB}/latin1_bytes_copy.csv": "latin1_bytes.csv",
                    COMPANION: COMPANION_TEXT.encode(),
                },
            ),
        ),
        {COMPANION: {2: A}},
        {
            std("latin1_bytes"): (("not utf-8",), std("latin1_bytes")),
            f"{LAB}/latin1_bytes_copy.csv": (("not utf-8",), f"{LAB}/latin1_bytes_copy.csv"),
        },
    ),
    # ---- FHIR R4 bulk export
    fhir_case("fhir_truncated_last_line", {1: A, 2: A, 3: "malformed_record"}),
    fhir_case("fhir_missing_patient_file", fault=(("Patient.ndjson is missing",), FHIR_OBS)),
    fhir_case("fhir_no_value", {1: A, 2: "not_numeric"}),
    fhir_case("fhir_subject_not_in_patients", {1: A, 2: "unknown_patient"}),
    fhir_case("fhir_subject_not_a_reference", {1: A, 2: "malformed_record"}),
    fhir_case("fhir_status_not_text", {1: A, 2: "malformed_record"}),
    fhir_case("fhir_effective_date_not_text", {1: A, 2: "malformed_record"}),
    fhir_case("fhir_line_separator_in_text", {1: A, 2: A, 3: A}),
    fhir_case(
        "fhir_patient_line_not_an_object", fault=(("line 2",), f"{FHIR}/2025-06/Patient.ndjson")
    ),
]


def _param(case: Case):
    marks = [pytest.mark.xfail(strict=True, reason=case.bug)] if case.bug else []
    return pytest.param(case, id=case.id, marks=marks)


def test_corpus_is_large_and_has_unique_ids():
    assert len(CASES) >= 40
    assert len({c.id for c in CASES}) == len(CASES)


def test_every_fixture_is_used():
    used = {
        str(v) for c in CASES for _, files in c.runs for v in files.values() if isinstance(v, str)
    }
    used_top = {u.split("/")[0] for u in used}
    on_disk = {p.name for p in DEFECTS.iterdir()}
    assert on_disk == used_top


# --------------------------------------------------------------------------- the run


@pytest.fixture(scope="module")
def configs(tmp_path_factory) -> dict[str, Path]:
    base = tmp_path_factory.mktemp("defect_configs")
    small = make_small_config(base / "small")
    thousands = make_small_config(base / "thousands")
    source = thousands / "sources" / f"{CORVALE}.yaml"
    source.write_text(
        source.read_text(encoding="utf-8") + 'thousands_separator: "."\n', encoding="utf-8"
    )
    return {"small": small, "thousands": thousands}


def outcomes_by_line(con, path: str) -> dict[int, str]:
    """Every stored line of a file with its outcome (or reason code); no line may appear twice."""
    got = rows(con, """
        select r.line_no, r.reason_code from rejected_rows r join ingest_files f using (file_id) where f.file_path = ?
        union all
        select v.line_no, v.outcome from result_versions v join ingest_files f using (file_id) where f.file_path = ?
    """, [path, path])  # fmt: skip
    lines = [line for line, _ in got]
    assert len(lines) == len(set(lines)), f"{path}: a line is both rejected and a result version"
    return dict(got)


def assert_ledger_balances(con) -> dict[str, dict]:
    cols = ["file_path", "status", "message", "rows_read", "rows_accepted", "rows_rejected",
            "rows_superseded", "rows_duplicate", "rows_withdrawn", "rows_pending"]  # fmt: skip
    ledger = {
        r[0]: dict(zip(cols, r, strict=False))
        for r in rows(con, f"select {', '.join(cols)} from ingest_files")
    }
    for path, f in ledger.items():
        accounted = sum(f[c] for c in cols[4:])
        assert f["rows_read"] == accounted, f"{path}: read {f['rows_read']}, accounted {accounted}"
    return ledger


@pytest.mark.parametrize("case", [_param(c) for c in CASES])
def test_defect(case: Case, configs: dict[str, Path], tmp_path: Path):
    out = tmp_path / "out"
    for period, files in case.runs:
        content = {
            rel: src if isinstance(src, bytes) else fixture(src) for rel, src in files.items()
        }
        inbox = write_inbox(tmp_path, content)
        run_month(configs[case.config], inbox, out, period=period).close()
    with duckdb.connect(str(out / "surveillance.duckdb"), read_only=True) as con:
        ledger = assert_ledger_balances(con)
        assert set(ledger) == set(case.lines) | set(case.faults) | set(case.duplicate_of)
        for path, expected in case.lines.items():
            f = ledger[path]
            assert f["status"] == "ingested", f"{path}: {f['message']}"
            assert outcomes_by_line(con, path) == expected
            assert f["rows_read"] == len(expected)
            counts = Counter(o if o in OUTCOMES else "rejected" for o in expected.values())
            assert {o: f[f"rows_{o}"] for o in (*OUTCOMES, "rejected")} == {
                o: counts.get(o, 0) for o in (*OUTCOMES, "rejected")
            }
        for path, (words, named) in case.faults.items():
            f = ledger[path]
            assert f["status"] == "held_back"
            assert named in f["message"], f["message"]
            for word in words:
                assert word in f["message"], (word, f["message"])
            assert f["rows_read"] == 0
            assert outcomes_by_line(con, path) == {}
        for path, original in case.duplicate_of.items():
            f = ledger[path]
            assert f["status"] == "duplicate_file"
            assert original in f["message"]
            assert f["rows_read"] == f["rows_duplicate"] == ledger[original]["rows_read"]
            assert outcomes_by_line(con, path) == {}
        if case.check is not None:
            case.check(con)


# --------------------------------------------------------------------------- both readers

#: (case id, inbox path, config) of every delimited file of the corpus
CSV_FILES = [
    (c.id, rel, c.config)
    for c in CASES
    for _, files in c.runs
    for rel in files
    if rel.endswith(".csv")
]


def _content(case_id: str, rel: str) -> bytes:
    case = next(c for c in CASES if c.id == case_id)
    src = next(files[rel] for _, files in case.runs if rel in files)
    return src if isinstance(src, bytes) else fixture(src)


@pytest.mark.parametrize(
    ("case_id", "rel", "config"),
    CSV_FILES,
    ids=[f"{c}:{r.split('/')[-1]}" for c, r, _ in CSV_FILES],
)
def test_both_readers_land_the_same_rows(case_id, rel, config, configs, tmp_path):
    """The bulk reader (a file without quotes split in polars) and the csv module give the same
    landed rows, notes and faults for every file of the corpus (DEVELOPERS.md: row accounting
    does not depend on which reader ran)."""
    from pipeline.core.settings import load_settings
    from tests.unit.stages.ingest.test_delimited import compare_paths

    settings = load_settings(configs[config])
    source = next(s for s in settings.sources if s.folder == rel.split("/")[0])
    path = tmp_path / rel.split("/")[-1]
    content = _content(case_id, rel)
    path.write_bytes(content)
    bulk = compare_paths(source, path)
    try:
        quoted = '"' in content.decode("utf-8")
    except UnicodeDecodeError:  # a whole-file fault before any reader: either way the same
        return
    # every file without the quote character is read in bulk (RFC 4180: then a record is a line)
    assert bulk == (not quoted)


def test_the_bulk_reader_covers_most_of_the_corpus():
    readable = [c for c, r, _ in CSV_FILES]
    quoted = [(c, r) for c, r, _ in CSV_FILES if b'"' in _content(c, r)]
    assert {c for c, _ in quoted} == {"quoted_field_with_delimiter", "quoted_newline_in_field", "oversized_field",
                                      "decimal_comma_in_dot_source"}  # fmt: skip
    assert len(readable) - len(quoted) >= 50
