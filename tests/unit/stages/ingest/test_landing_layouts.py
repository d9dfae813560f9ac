"""Tests for pipeline.stages.ingest and pipeline.core.pseudonymise: the three layouts read into landed rows
with line numbers and masked raw text, whole-file faults, and the HMAC person keys.

Inputs are the small named files under tests/fixtures/ingest/ (invented Westerfold data)."""

from __future__ import annotations

import datetime as dt
import hashlib
import hmac
from pathlib import Path

import polars as pl
import pytest

from pipeline.core.landed import LANDED_COLUMNS
from pipeline.core.pseudonymise import (
    DEMO_KEY,
    SHARED_DOMAIN,
    PseudonymKey,
    add_person_keys,
    person_key,
)
from pipeline.core.settings import Settings, SourceConfig, load_settings
from pipeline.stages.ingest.inbox import FileFault, InboxFile, scan_inbox, sha256_of
from pipeline.stages.ingest.landing import read_inbox_file
from tests.conftest import FIXTURES, write_inbox

INGEST = FIXTURES / "ingest"
TODAY = dt.date(2025, 4, 2)
KEY = PseudonymKey(secret=DEMO_KEY.encode(), is_demo=True)

STANDARD = SourceConfig(id="test_standard_lab", layout="standard", folder="test_standard_lab")
SEMICOLON = SourceConfig.model_validate(
    {
        "id": "test_semicolon_lab", "layout": "delimited", "folder": "test_semicolon_lab",
        "delimiter": ";", "decimal_mark": ",", "date_format": "%d/%m/%Y",
        "columns": {
            "person_token": "Ref", "birth_year": "Born", "sex": "Sex", "district_code": "Area",
            "specimen_id": "Sample", "collected_date": "Date", "test_code": "Code",
            "value": "Result", "unit": "Unit", "status": "State",
        },
        "test_codes": {"CREA": "14682-9", "UACR": "9318-7"},
        "status_codes": {"F": "final", "A": "amended"},
    }
)  # fmt: skip
FHIR = SourceConfig.model_validate(
    {
        "id": "test_fhir_lab", "layout": "fhir_ndjson", "folder": "test_fhir_lab",
        "fhir": {"linkage_identifier_system": "urn:westerfold:linkage-token"},
    }
)  # fmt: skip
TOKENS = [
    "WF-tok00001",
    "WF-tok00002",
    "WF-tok00003",
    "WF-tok00004",
    "MRN-77",
    "Patient/p1",
    "Patient/p2",
]


@pytest.fixture
def settings(small_config: Path) -> Settings:
    return load_settings(small_config)


def item_for(source: SourceConfig, path: Path, rel: str | None = None) -> InboxFile:
    return InboxFile(
        source.id, path, rel or path.name, sha256_of(path), path.stat().st_size, file_id=1
    )


def read(
    source: SourceConfig, path: Path, settings: Settings, rel: str | None = None
) -> pl.DataFrame:
    return read_inbox_file(source, item_for(source, path, rel), settings, TODAY)


def by_line(frame: pl.DataFrame) -> dict[int, dict]:
    return {r["line_no"]: r for r in frame.iter_rows(named=True)}


# --------------------------------------------------------------------------- standard layout


def test_standard_layout_line_numbers_and_masked_raw_text(settings: Settings):
    frame = read(STANDARD, INGEST / "standard_basic.csv", settings)
    assert frame.columns[: len(LANDED_COLUMNS)] == LANDED_COLUMNS
    # header is line 1; the blank line 3 is not a row; a quoted field spanning lines 5-6 is one
    # row numbered by its first line (common practice for CSV line reporting)
    rows = by_line(frame)
    assert sorted(rows) == [2, 4, 5, 7]
    assert rows[2]["raw_text"] == "[person],1960,F,WF01,S0001,2025-03-10,2160-0,1.0,mg/dL,final"
    assert (
        rows[5]["raw_text"]
        == '[person],1970,F,WF03,"S0003\ncontinued",2025-03-12,2160-0,0.9,mg/dL,final'
    )
    assert rows[5]["specimen_id"] == "S0003\ncontinued"
    assert rows[2]["person_token"] == "WF-tok00001"
    assert rows[2]["linkage_domain"] == SHARED_DOMAIN
    assert rows[2]["collected_date"] == dt.date(2025, 3, 10)
    assert rows[4]["value_text"] == "<3" and rows[4]["value_clean"] == "<3"
    # optional columns absent from the file are null
    assert rows[2]["height_text"] is None and rows[2]["reported_text"] is None
    # no report date and no month in the file name: the date given for undated rows (in a run,
    # the last day of its period) stands in
    assert rows[2]["reported_date"] == TODAY and rows[2]["reported_date_basis"] == "run_period"


def test_standard_layout_short_row_is_flagged(settings: Settings):
    rows = by_line(read(STANDARD, INGEST / "standard_basic.csv", settings))
    assert rows[7]["row_fault"].startswith("wrong_field_count:9 fields")
    assert all(rows[n]["row_fault"] is None for n in (2, 4, 5))


def test_report_date_from_file_name_month(settings: Settings, tmp_path: Path):
    inbox = write_inbox(
        tmp_path, {"lab/results_2025-03.csv": (INGEST / "standard_basic.csv").read_text()}
    )
    frame = read(
        STANDARD, inbox / "lab/results_2025-03.csv", settings, rel="lab/results_2025-03.csv"
    )
    assert set(frame["reported_date"]) == {dt.date(2025, 3, 31)}
    assert set(frame["reported_date_basis"]) == {"file_name"}


# --------------------------------------------------------------------------- delimited layout


def test_semicolon_decimal_comma_day_month_year(settings: Settings):
    rows = by_line(read(SEMICOLON, INGEST / "semicolon_decimal_comma.csv", settings))
    first = rows[2]
    assert first["test_code"] == "14682-9" and first["test_code_text"] == "CREA"
    assert first["value_text"] == "88,4" and first["value_clean"] == "88.4"
    assert first["unit_text"] == "µmol/l"
    assert first["status"] == "final" and first["status_text"] == "F"
    assert first["collected_date"] == dt.date(2025, 3, 10)
    assert first["raw_text"] == "[person];1960;F;WF01;C0001;10/03/2025;CREA;88,4;µmol/l;F"
    second = rows[3]
    assert second["test_code"] == "9318-7" and second["status"] == "amended"
    assert second["value_clean"] == "3.5"
    # 31 February does not exist: the date is null, the text kept for the rejection message
    assert second["collected_date"] is None and second["collected_text"] == "31/02/2025"
    # a local code the config does not map stays as it was (rejected later as unknown_test_code)
    assert rows[4]["test_code"] == "XYZ"


def test_thousands_separator_comma(settings: Settings, tmp_path: Path):
    source = SEMICOLON.model_copy(update={"thousands_separator": ",", "decimal_mark": "."})
    text = (
        (INGEST / "semicolon_decimal_comma.csv")
        .read_text(encoding="utf-8")
        .replace("88,4", "1,234.5")
    )
    inbox = write_inbox(tmp_path, {"x.csv": text})
    assert by_line(read(source, inbox / "x.csv", settings))[2]["value_clean"] == "1234.5"


@pytest.mark.parametrize("separator", [".", " "])
def test_thousands_separator_dot_or_space(settings: Settings, tmp_path: Path, separator: str):
    source = SEMICOLON.model_copy(update={"thousands_separator": separator})
    text = (INGEST / "semicolon_decimal_comma.csv").read_text(encoding="utf-8")
    inbox = write_inbox(tmp_path, {"x.csv": text.replace("88,4", f"1{separator}234,5")})
    assert by_line(read(source, inbox / "x.csv", settings))[2]["value_clean"] == "1234.5"


# --------------------------------------------------------------------------- FHIR bulk export


@pytest.fixture
def fhir_rows(settings: Settings) -> dict[int, dict]:
    path = INGEST / "fhir_export" / "2025-03" / "Observation.ndjson"
    return by_line(read(FHIR, path, settings, rel="test_fhir_lab/2025-03/Observation.ndjson"))


def test_fhir_patient_identifier_is_the_token(fhir_rows):
    row = fhir_rows[1]
    assert row["person_token"] == "WF-tok00001" and row["linkage_domain"] == SHARED_DOMAIN
    assert row["sex_text"] == "female" and row["birth_year_text"] == "1960"
    assert (
        row["test_code"] == "2160-0" and row["value_text"] == "1.1" and row["unit_text"] == "mg/dL"
    )
    assert row["specimen_id"] == "F0001"
    assert row["collected_date"] == dt.date(2025, 3, 10)
    assert row["reported_date"] == dt.date(2025, 3, 11) and row["reported_date_basis"] == "reported"
    assert "[person]" in row["raw_text"] and "Patient/p1" not in row["raw_text"]


def test_fhir_lab_local_fallback_without_linkage_identifier(fhir_rows):
    row = fhir_rows[3]
    assert row["person_token"] == "Patient/p2"
    assert row["linkage_domain"] == "test_fhir_lab"  # linkable only within this lab


def test_fhir_district_name_mapped_to_code(fhir_rows):
    assert fhir_rows[1]["district_code"] == "WF01"  # "Alderbank"
    assert fhir_rows[3]["district_code"] == "WF02"  # "brimcote": matched ignoring case


def test_fhir_comparator_and_value_string(fhir_rows):
    assert fhir_rows[2]["value_text"] == "<3" and fhir_rows[2]["value_clean"] == "<3"
    assert fhir_rows[3]["value_text"] == "see note" and fhir_rows[3]["unit_text"] is None


def test_fhir_malformed_and_unknown_records_become_rows(fhir_rows):
    # line 5 is blank (not a record); every other line is a row
    assert sorted(fhir_rows) == [1, 2, 3, 4, 6, 7]
    assert fhir_rows[4]["row_fault"].startswith("malformed_record")
    # not readable: which part is what is not certain, so its text is not kept
    assert (
        fhir_rows[4]["raw_text"]
        == "[text withheld: a record of 15 characters that is not a readable Observation]"
    )
    assert fhir_rows[6]["row_fault"].startswith("malformed_record")  # a Patient, not an Observation
    assert fhir_rows[7]["row_fault"].startswith("unknown_patient")
    assert fhir_rows[7]["status"] == "amended" and fhir_rows[7]["status_text"] == "Amended"
    assert fhir_rows[1]["row_fault"] is None


def test_fhir_malformed_record_masks_the_subject(settings: Settings, tmp_path: Path):
    fhir = INGEST / "fhir_export" / "2025-03"
    truncated = (
        '{"resourceType":"Observation","id":"o9","subject":{"reference":"Patient/p2"},"status":"fin'
    )
    inbox = write_inbox(tmp_path, {
        "2025-03/Patient.ndjson": (fhir / "Patient.ndjson").read_text(encoding="utf-8"),
        "2025-03/Observation.ndjson": truncated + "\n",
    })  # fmt: skip
    [raw] = read(FHIR, inbox / "2025-03" / "Observation.ndjson", settings)["raw_text"].to_list()
    assert "Patient/p2" not in raw


def test_fhir_identifiers_repeated_in_an_observation_are_masked(settings: Settings, tmp_path: Path):
    """A Patient's id or identifier (of any system, six characters or more) that an Observation
    repeats, here in the specimen reference and a value string, is masked in the landed fields and
    the raw text; the reference of a subject missing from Patient.ndjson is not quoted in the
    row's fault, which becomes a rejection's message (a regression: both were kept in clear)."""
    patients = (
        '{"resourceType":"Patient","id":"srv-000123","identifier":[{"system":"urn:westerfold:linkage-token",'
        '"value":"WF-tok00009"},{"system":"urn:fallowmere:mrn","value":"MRN-445566"}],"gender":"female",'
        '"birthDate":"1960","address":[{"district":"Alderbank"}]}\n'
    )
    observation = (
        '{"resourceType":"Observation","id":"o1","status":"final","code":{"coding":[{"system":'
        '"http://loinc.org","code":"2160-0"}]},"subject":{"reference":"Patient/srv-000123"},'
        '"specimen":{"reference":"Specimen/srv-000123-1"},"effectiveDateTime":"2025-03-10",'
        '"valueString":"see WF-tok00009 and MRN-445566"}\n'
        '{"resourceType":"Observation","id":"o2","status":"final","code":{"coding":[{"system":'
        '"http://loinc.org","code":"2160-0"}]},"subject":{"reference":"Patient/srv-999999"},'
        '"specimen":{"reference":"Specimen/srv-999999-1"},"effectiveDateTime":"2025-03-10",'
        '"valueQuantity":{"value":1.0,"code":"mg/dL"}}\n'
    )
    inbox = write_inbox(tmp_path, {"2025-03/Patient.ndjson": patients,
                                   "2025-03/Observation.ndjson": observation})  # fmt: skip
    frame = read(FHIR, inbox / "2025-03" / "Observation.ndjson", settings)
    first, second = frame.iter_rows(named=True)
    assert first["person_token"] == "WF-tok00009"
    assert (first["specimen_id"], first["value_text"]) == (
        "[person]-1",
        "see [person] and [person]",
    )
    for row, hidden in ((first, ("srv-000123", "tok00009", "445566")), (second, ("srv-999999",))):
        kept = " ".join(str(v) for k, v in row.items() if k != "person_token")
        assert not any(h in kept for h in hidden), kept
    assert second["row_fault"] == "unknown_patient:[person] is not in Patient.ndjson"


def test_crlf_line_endings(settings: Settings, tmp_path: Path):
    text = (INGEST / "standard_basic.csv").read_text(encoding="utf-8").replace("\n", "\r\n")
    inbox = write_inbox(tmp_path, {"crlf.csv": text})
    assert (
        read(STANDARD, inbox / "crlf.csv", settings)
        .select("line_no", "raw_text")
        .equals(
            read(STANDARD, INGEST / "standard_basic.csv", settings).select("line_no", "raw_text")
        )
    )


def test_fhir_missing_patient_file_is_a_file_fault(settings: Settings, tmp_path: Path):
    text = (INGEST / "fhir_export" / "2025-03" / "Observation.ndjson").read_text(encoding="utf-8")
    inbox = write_inbox(tmp_path, {"2025-03/Observation.ndjson": text})
    with pytest.raises(FileFault, match="Patient.ndjson is missing"):
        read(FHIR, inbox / "2025-03" / "Observation.ndjson", settings)


# --------------------------------------------------------------------------- whole-file faults

HEADER = "person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,status"
ROW = "WF-tok00001,1960,F,WF01,S0001,2025-03-10,2160-0,1.0,mg/dL,final"


@pytest.mark.parametrize(
    ("content", "expected"),
    [
        pytest.param((HEADER + "\n" + ROW + "\n").encode() + b"WF-x,1960,F,WF01,S2,2025-03-10,2160-0,1\xff,mg/dL,final\n",
                     "line 3: bytes that are not utf-8", id="not-utf-8"),
        pytest.param(HEADER.replace("birth_year", "birth_yr") + "\n" + ROW + "\n",
                     "missing required column(s) 'birth_year' (found 'birth_yr': a typo?)", id="typo-column"),
        pytest.param(HEADER.replace(",", ";") + "\n" + ROW.replace(",", ";") + "\n",
                     "does not seem to use the delimiter ','", id="wrong-delimiter"),
        pytest.param("", "the file is empty", id="empty"),
        pytest.param("\n\n", "the file is empty", id="blank-lines"),
        pytest.param(HEADER + "\n", "has a header but no rows", id="header-only"),
    ],
)  # fmt: skip
def test_whole_file_faults_name_the_file(settings: Settings, tmp_path: Path, content, expected):
    inbox = write_inbox(tmp_path, {"test_standard_lab/bad.csv": content})
    path = inbox / "test_standard_lab" / "bad.csv"
    with pytest.raises(FileFault) as info:
        read(STANDARD, path, settings)
    assert str(path) in str(info.value)
    assert expected in str(info.value)


# --------------------------------------------------------------------------- inbox scan


def test_scan_marks_a_copy_under_another_name(settings: Settings, tmp_path: Path):
    text = (INGEST / "standard_basic.csv").read_text(encoding="utf-8")
    folder = settings.source("westerfold_general_lab").folder
    inbox = write_inbox(tmp_path, {f"{folder}/a.csv": text, f"{folder}/b.csv": text})
    items = [
        i for i in scan_inbox(None, settings, inbox) if i.source_id == "westerfold_general_lab"
    ]
    assert [(i.rel_path, i.status, i.same_as) for i in items] == [
        (f"{folder}/a.csv", "new", None),
        (f"{folder}/b.csv", "duplicate_file", f"{folder}/a.csv"),
    ]
    # outside reference for the content hash: hashlib on the bytes
    assert items[0].sha256 == hashlib.sha256(text.encode()).hexdigest()


# --------------------------------------------------------------------------- pseudonymisation


@pytest.mark.parametrize(
    ("source", "path"),
    [
        (STANDARD, INGEST / "standard_basic.csv"),
        (SEMICOLON, INGEST / "semicolon_decimal_comma.csv"),
        (FHIR, INGEST / "fhir_export" / "2025-03" / "Observation.ndjson"),
    ],
    ids=["standard", "delimited", "fhir"],
)
def test_person_token_never_in_keyed_frame(settings: Settings, source, path):
    keyed = add_person_keys(read(source, path, settings), KEY)
    assert "person_token" not in keyed.columns and "linkage_domain" not in keyed.columns
    text = keyed.select(pl.col(pl.String)).rows()
    for token in TOKENS:
        assert not any(token in (v or "") for row in text for v in row), token
    # rows without a person (malformed record, unknown patient) have no key; all others do
    unkeyed = keyed.filter(pl.col("person_key").is_null())
    assert unkeyed["row_fault"].null_count() == 0
    assert keyed["person_key"].drop_nulls().str.len_chars().unique().to_list() == [32]


def test_person_key_is_hmac_sha256_of_domain_and_token():
    # outside reference: Python's hmac module (RFC 2104 HMAC with SHA-256), truncated to 128 bits
    secret = b"westerfold-test-secret"
    expected = hmac.new(secret, b"shared\x1fWF-tok00001", hashlib.sha256).hexdigest()[:32]
    assert person_key(PseudonymKey(secret, False), "shared", "WF-tok00001") == expected


def test_person_key_same_token_same_key_different_secret_or_domain_differs():
    a, b = PseudonymKey(b"secret-a", False), PseudonymKey(b"secret-b", False)
    assert person_key(a, "shared", "WF-tok00001") == person_key(a, "shared", "WF-tok00001")
    assert person_key(a, "shared", "WF-tok00001") != person_key(b, "shared", "WF-tok00001")
    assert person_key(a, "shared", "WF-tok00001") != person_key(a, "test_fhir_lab", "WF-tok00001")
    assert person_key(a, "shared", "WF-tok00001") != person_key(a, "shared", "WF-tok00002")


def test_add_person_keys_same_token_across_labs_links(settings: Settings):
    standard = add_person_keys(read(STANDARD, INGEST / "standard_basic.csv", settings), KEY)
    fhir = add_person_keys(
        read(FHIR, INGEST / "fhir_export/2025-03/Observation.ndjson", settings), KEY
    )
    expected = person_key(KEY, SHARED_DOMAIN, "WF-tok00001")
    assert standard.filter(pl.col("line_no") == 2)["person_key"].item() == expected
    assert fhir.filter(pl.col("line_no") == 1)["person_key"].item() == expected
    # the lab-local fallback is keyed in the lab's own domain
    assert fhir.filter(pl.col("line_no") == 3)["person_key"].item() == person_key(
        KEY, "test_fhir_lab", "Patient/p2"
    )


def test_blank_token_gives_null_key(settings: Settings, tmp_path: Path):
    inbox = write_inbox(tmp_path, {"x.csv": HEADER + "\n" + ROW.replace("WF-tok00001", "") + "\n"})
    keyed = add_person_keys(read(STANDARD, inbox / "x.csv", settings), KEY)
    assert keyed["person_key"].to_list() == [None]


def test_extra_columns_are_ignored_and_named_in_the_ledger(tmp_path):
    from tests.conftest import make_small_config, rows, run_month, write_inbox

    config = make_small_config(tmp_path / "config")
    text = (
        "person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,"
        "status,ward\nWF-x1,1960,F,WF01,S1,2026-01-10,2160-0,1.0,mg/dL,final,B4\n"
    )
    inbox = write_inbox(tmp_path, {"westerfold_general_lab/results_2026-01.csv": text})
    with run_month(config, inbox, tmp_path / "out") as con:
        status, message, accepted = rows(
            con, "select status, message, rows_accepted from ingest_files"
        )[0]
    assert (status, accepted) == ("ingested", 1)
    assert "ignored: ward" in message


def test_a_masked_token_in_two_persons_specimen_ids_keeps_them_two_specimens():
    """A lab that builds specimen ids from the person's token ("<token>-1") has the token masked
    by the reader; after keying, each person's mask carries the start of their own key, so two
    persons' first specimens are not one specimen id under two persons (which the version rules
    reject from both as specimen_conflict). Nothing of the token is kept (a regression: the two
    became the same "[person]-1")."""
    frame = pl.DataFrame({"linkage_domain": [SHARED_DOMAIN] * 3,
                          "person_token": ["WF-tok00001", "WF-tok00002", "WF-tok00001"],
                          "specimen_id": ["[person]-1", "[person]-1", "[person]-1"]})  # fmt: skip
    keyed = add_person_keys(frame, KEY)
    first, second, again = keyed["specimen_id"].to_list()
    assert first != second and first == again  # two persons, two specimens; one person, one
    assert first == f"[person:{keyed['person_key'][0][:12]}]-1"
    assert "tok" not in " ".join(keyed["specimen_id"].to_list())
