"""Tests for pipeline.core.identifiers and its use in pipeline.stages.ingest: a file whose columns or values
look like direct identifiers is refused before anything is stored, unless its source config
allows the column with a written reason (then recorded in the ledger and the run manifest).

Which fields are direct identifiers (names, full dates of birth, phone numbers, e-mail
addresses, national ID numbers, street addresses) is common practice in health-data
de-identification (the HIPAA Safe Harbor list of 45 CFR 164.514(b)(2) names them all, from
memory); the shapes below (e-mail per RFC 5322's local@domain, phone numbers with a + and a
country code per ITU-T E.164) are common practice. Every value here is invented.
"""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import pytest
import yaml
from pydantic import ValidationError

from pipeline.core import identifiers
from pipeline.core.settings import STANDARD_FIELDS, SourceConfig, load_settings
from pipeline.run.flows import run_month_plain
from pipeline.stages.ingest.inbox import FileFault, InboxFile, scan_inbox, sha256_of
from pipeline.stages.ingest.landing import read_inbox_file
from tests.conftest import CONFIG_DIR, ROOT, make_small_config, write_inbox

TODAY = dt.date(2026, 2, 2)
STANDARD = SourceConfig(id="test_standard_lab", layout="standard", folder="test_standard_lab")
FHIR = SourceConfig.model_validate({"id": "test_fhir_lab", "layout": "fhir_ndjson", "folder": "test_fhir_lab",
                                    "fhir": {"linkage_identifier_system": "urn:westerfold:linkage-token"}})  # fmt: skip
HEADER = list(STANDARD_FIELDS)
NAMES = ["Maren Holloway", "Tobin Ashcroft", "Ilse Varnum", "Corwin Pell", "Odile Marsh", "Brannock Vey",
         "Sela Quillan", "Aldous Fenn"]  # fmt: skip


def row(i: int, **fields: str) -> list[str]:
    base = {"person_token": f"WF-{i:08x}", "birth_year": "1961", "sex": "F", "district_code": "WF01",
            "specimen_id": f"WGH2601{i:05d}", "collected_date": "2026-01-10", "test_code": "2160-0",
            "value": "1.02", "unit": "mg/dL", "status": "final", "height_cm": "", "reported_at": "2026-01-11",
            "fasting": ""}  # fmt: skip
    base.update(fields)
    return [base[f] for f in HEADER]


def findings_of(header: list[str], data: list[list[str]], births=("birth_year",)) -> dict[str, str]:
    found = identifiers.screen_table(header, [(n + 2, r) for n, r in enumerate(data)], births)
    return {f.column: f.pattern for f in found}


# --------------------------------------------------------------------------- column names


@pytest.mark.parametrize(("column", "pattern"), [
    ("PatientName", "person_name"), ("first_name", "person_name"), ("Surname", "person_name"),
    ("name", "person_name"), ("Given Name", "person_name"), ("DOB", "birth_date"),
    ("DateOfBirth", "birth_date"), ("birth_date", "birth_date"), ("Phone", "phone"),
    ("MobileNo", "phone"), ("telephone_number", "phone"), ("Email", "email"), ("e-mail", "email"),
    ("SSN", "national_id"), ("NationalID", "national_id"), ("passport_no", "national_id"),
    ("Address", "street_address"), ("StreetAddress", "street_address"), ("Postcode", "street_address"),
])  # fmt: skip
def test_identifier_column_names_are_flagged(column, pattern):
    assert identifiers.column_name_pattern(column) == pattern


@pytest.mark.parametrize("column", [
    *STANDARD_FIELDS, "PatientRef", "YearOfBirth", "Gender", "AreaCode", "SampleNo", "SampleDate",
    "TestCode", "Result", "Units", "State", "ReportDate", "district_name", "test_name", "patient_id",
    "person_key", "lab_name", "cell_count",
])  # fmt: skip
def test_lab_extract_column_names_are_not_flagged(column):
    assert identifiers.column_name_pattern(column) is None


# --------------------------------------------------------------------------- values


def test_values_that_look_like_identifiers_are_flagged():
    header = [*HEADER, "note", "contact", "ref2", "who"]
    data = [row(i) + ["", f"+99 5550 {100200 + i}", f"904-1{i}-345{i}", NAMES[i]] for i in range(8)]
    data[3][-4] = "call m.holloway@example.invalid"
    data[5][-4] = "lives at 12 Mill Lane"
    data[6][HEADER.index("birth_year")] = "1961-03-14"
    patterns = {(f.column, f.pattern) for f in identifiers.screen_table(header, [(n, r) for n, r in enumerate(data)],
                                                                     ["birth_year"])}  # fmt: skip
    assert {
        ("note", "email"),
        ("note", "street_address"),
        ("contact", "phone"),
        ("ref2", "national_id"),
        ("who", "person_name"),
        ("birth_year", "birth_date"),
    } == patterns


def test_full_birth_date_in_a_mapped_birth_column_whatever_its_name():
    header = [*HEADER[:1], "Born", *HEADER[2:]]
    data = [row(0, birth_year="14/03/1961")]
    assert findings_of(header, data, births=("Born",)) == {"Born": "birth_date"}


def test_ordinary_lab_values_are_not_flagged():
    data = [row(i, test_code=code, value=value, unit=unit)
            for i, (code, value, unit) in enumerate([("2160-0", "1.02", "mg/dL"), ("9318-7", "<3", "mg/g"),
                                                     ("4548-4", "6.9", "%"), ("14682-9", "1 234", "umol/L")] * 30)]  # fmt: skip
    header = [*HEADER, "test_name", "area"]
    data = [r + [["Serum Creatinine", "Urine Albumin", "Glycated Haemoglobin"][i % 3], "Alderbank"]
            for i, r in enumerate(data)]  # fmt: skip
    assert findings_of(header, data) == {}


def test_a_few_name_like_values_are_flagged_and_their_rows_quarantined():
    # two-word capitalised values look like names, a few as much as many: the column is
    # flagged and the rows that hold one are listed for quarantine (not the whole file)
    data = [row(i) + [v] for i, v in enumerate(["Alder Bank", "7", "Alder Bank"] + ["7"] * 7)]
    [found] = identifiers.screen_table([*HEADER, "area"], [(n + 2, r) for n, r in enumerate(data)])
    assert (found.column, found.pattern, found.whole_column, found.lines) == (
        "area",
        "person_name",
        False,
        (2, 4),
    )


def test_a_district_name_of_the_region_is_a_place_not_a_name():
    data = [row(i) + ["Fenwick Cross"] for i in range(3)]
    rows = [(n + 2, r) for n, r in enumerate(data)]
    assert identifiers.screen_table([*HEADER, "area"], rows, places=("Fenwick Cross",)) == []


def test_message_names_file_column_and_pattern_but_never_the_value(tmp_path: Path):
    lines = [",".join([*HEADER, "email"])] + [
        ",".join(row(i) + [f"p{i}@example.invalid"]) for i in range(3)
    ]
    path = write_inbox(tmp_path, {"test_standard_lab/results_2026-01.csv": "\n".join(lines) + "\n"}) / \
        "test_standard_lab" / "results_2026-01.csv"  # fmt: skip
    item = InboxFile(
        STANDARD.id, path, "test_standard_lab/results_2026-01.csv", sha256_of(path), 1, file_id=1
    )
    with pytest.raises(FileFault) as refused:
        read_inbox_file(STANDARD, item, load_settings(CONFIG_DIR), TODAY)
    message = str(refused.value)
    assert str(path) in message and "column 'email': e-mail addresses" in message
    assert "allowed_identifier_columns" in message
    assert "@example.invalid" not in message


def test_values_beyond_the_header_are_screened(tmp_path: Path):
    data = [
        row(0) + ["p0@example.invalid"]
    ]  # one field too many: kept in the rejected row's raw text
    found = identifiers.screen_table(HEADER, [(2, data[0])])
    assert [(f.column, f.pattern) for f in found] == [("(field 14, beyond the header)", "email")]


# --------------------------------------------------------------------------- FHIR


def _patient(i: int, **extra) -> dict:
    return {"resourceType": "Patient", "id": f"fr-{i}", "gender": "female", "birthDate": "1961",
            "identifier": [{"system": "urn:westerfold:linkage-token", "value": f"WF-{i:08x}"}],
            "address": [{"district": "Alderbank"}], **extra}  # fmt: skip


@pytest.mark.parametrize(("extra", "path", "pattern"), [
    ({"name": [{"family": "Holloway", "given": ["Maren"]}]}, "Patient.name.family", "person_name"),
    ({"telecom": [{"system": "phone", "value": "+99 5550 100200"}]}, "Patient.telecom.value", "phone"),
    ({"address": [{"line": ["12 Mill Lane"], "district": "Alderbank"}]}, "Patient.address.line", "street_address"),
])  # fmt: skip
def test_fhir_patient_identifier_elements_are_flagged(extra, path, pattern):
    found = identifiers.screen_resources("Patient", [(1, _patient(1, **extra))])
    assert (path, pattern) in {(f.column, f.pattern) for f in found}


def test_fhir_patient_with_district_and_birth_date_passes():
    # only the year of birthDate is read, and Patient records are never stored (threat model)
    assert (
        identifiers.screen_resources(
            "Patient", [(i, _patient(i, birthDate="1961-03-14")) for i in range(5)]
        )
        == []
    )


def test_fhir_observation_subject_display_is_a_name():
    obs = {
        "resourceType": "Observation",
        "subject": {"reference": "Patient/fr-1", "display": "Maren Holloway"},
    }
    assert [
        (f.column, f.pattern) for f in identifiers.screen_resources("Observation", [(1, obs)])
    ] == [("Observation.subject.display", "person_name")]


def test_fhir_export_with_patient_names_is_refused(tmp_path: Path):
    folder = tmp_path / "test_fhir_lab" / "2026-01"
    folder.mkdir(parents=True)
    (folder / "Patient.ndjson").write_text(
        json.dumps(_patient(1, name=[{"text": "Maren Holloway"}])) + "\n"
    )
    obs = folder / "Observation.ndjson"
    obs.write_text(
        '{"resourceType":"Observation","status":"final","subject":{"reference":"Patient/fr-1"}}\n'
    )
    item = InboxFile(
        FHIR.id, obs, "test_fhir_lab/2026-01/Observation.ndjson", sha256_of(obs), 1, file_id=1
    )
    with pytest.raises(FileFault) as refused:
        read_inbox_file(FHIR, item, load_settings(CONFIG_DIR), TODAY)
    assert str(folder / "Patient.ndjson") in str(refused.value)
    assert "column 'Patient.name.text': person names" in str(refused.value)


# --------------------------------------------------------------------------- allowed with a reason


REASON = (
    "national number used as the linkage token; re-keyed by HMAC before storage (reviewed 2026-01)"
)


def test_allowed_column_needs_a_written_reason():
    with pytest.raises(ValidationError):
        SourceConfig(
            id="x_lab", layout="standard", folder="x", allowed_identifier_columns={"email": "ok"}
        )


def test_allowed_column_by_name_or_standard_field():
    found = [identifiers.Finding("PatientRef", "national_id", "column name")]
    for allowed in ({"PatientRef": REASON}, {"person_token": REASON}):
        refused, kept = identifiers.split_allowed(found, allowed, {"PatientRef": "person_token"})
        assert refused == [] and kept[0].allowed_reason == REASON
    refused, kept = identifiers.split_allowed(
        found, {"other": REASON}, {"PatientRef": "person_token"}
    )
    assert refused == found and kept == []


def test_allowed_column_is_ingested_and_its_reason_reaches_the_run_manifest(tmp_path: Path):
    config = make_small_config(tmp_path / "config")
    path = config / "sources" / "westerfold_general_lab.yaml"
    data = yaml.safe_load(path.read_text(encoding="utf-8"))
    data["allowed_identifier_columns"] = {"person_token": REASON}
    path.write_text(yaml.safe_dump(data), encoding="utf-8")
    lines = [",".join(HEADER)] + [
        ",".join(row(i, person_token=f"904-1{i}-345{i}")) for i in range(6)
    ]
    rel = "westerfold_general_lab/results_2026-01.csv"
    inbox = write_inbox(tmp_path, {rel: "\n".join(lines) + "\n"})
    summary = run_month_plain("2026-01", str(config), str(inbox), str(tmp_path / "out"), demo=True)
    assert summary["held_back_files"] == {}
    manifest = json.loads(
        (tmp_path / "out" / "2026-01" / "run_manifest.json").read_text(encoding="utf-8")
    )
    [entry] = [f for f in manifest["input_files"] if f["file_path"] == rel]
    assert entry["status"] == "ingested" and entry["rows_read"] == 6
    assert (
        "column 'person_token': national-ID-like numbers" in entry["message"]
        and REASON in entry["message"]
    )
    text = json.dumps(manifest)
    assert "904-10-3450" not in text  # the value itself is in no output


# --------------------------------------------------------------------------- the shipped samples


def test_every_shipped_sample_file_passes_the_screen():
    settings = load_settings(CONFIG_DIR)
    items = [i for i in scan_inbox(None, settings, ROOT / "sample_extracts")]
    assert {i.source_id for i in items} == {s.id for s in settings.sources}
    for item in items:
        read_inbox_file(settings.source(item.source_id), item, settings, TODAY)  # no FileFault
        assert item.allowed_identifiers == []
