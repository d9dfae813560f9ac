"""Hostile input: nothing identifying is kept, parsing is strict, every row is accounted for.

Each test feeds a file the way a lab could send it by mistake (or on purpose) and checks what
the warehouse would keep, through the reader and through ``sources check`` (the same ingest and
validate stages as a run, in a throw-away database).

Outside facts: RFC 4180 (Shafranovich, 2005) for quoting (a field with the delimiter, a quote or
a line break is quoted; a quote inside is doubled); which fields are direct identifiers (names,
phone numbers, e-mail addresses, record numbers, full dates of birth, addresses) is common
practice in health-data de-identification (the HIPAA Safe Harbor list, 45 CFR 164.514(b)(2),
from memory); ISO 8601 for the date form YYYY-MM-DD. Every person, token and number here is
invented.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
from pathlib import Path

import pytest

from pipeline.core import identifiers
from pipeline.core.settings import STANDARD_FIELDS, SourceConfig, load_settings
from pipeline.run.source_checks import check_file
from pipeline.stages.ingest.inbox import FileFault, InboxFile, scan_inbox, sha256_of
from pipeline.stages.ingest.landing import read_inbox_file
from tests.conftest import CONFIG_DIR, write_inbox

TODAY = dt.date.today()
SOURCE = "westerfold_general_lab"
HEADER = list(STANDARD_FIELDS)
TOKEN = "WF-7c1e0a99"


def row(i: int, **fields: str) -> list[str]:
    base = {"person_token": f"WF-{i:08x}", "birth_year": "1961", "sex": "F", "district_code": "WF01",
            "specimen_id": f"WGH{i:06d}", "collected_date": "2026-01-10", "test_code": "2160-0",
            "value": "1.02", "unit": "mg/dL", "status": "final", "height_cm": "", "reported_at": "2026-01-11",
            "fasting": ""}  # fmt: skip
    base.update(fields)
    return [base[f] for f in HEADER]


def csv_text(rows: list[list[str]], header: list[str] | None = None, end: str = "\n") -> str:
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(header or HEADER)
    writer.writerows(rows)
    return out.getvalue().removesuffix("\n") + end


def lines(rows: list[str], header: list[str] | None = None) -> str:
    """Rows written as given (already delimited), one per line, with the header."""
    return "\n".join([",".join(header or HEADER), *rows]) + "\n"


@pytest.fixture(scope="module")
def settings():
    return load_settings(CONFIG_DIR)


def checked(settings, tmp_path: Path, text: str, name: str = "results_2026-01.csv"):
    path = write_inbox(tmp_path, {f"{SOURCE}/{name}": text}) / SOURCE / name
    return check_file(settings, SOURCE, path)


def read_rows(
    settings, tmp_path: Path, text: str, source: SourceConfig | None = None
) -> dict[int, dict]:
    source = source or settings.source(SOURCE)
    path = (
        write_inbox(tmp_path, {f"{SOURCE}/results_2026-01.csv": text})
        / SOURCE
        / "results_2026-01.csv"
    )
    item = InboxFile(
        source.id, path, f"{SOURCE}/results_2026-01.csv", sha256_of(path), 1, file_id=1
    )
    frame = read_inbox_file(source, item, settings, TODAY)
    return {r["line_no"]: r for r in frame.iter_rows(named=True)}


def messages(report) -> list[str]:
    return [m for _, (_, examples) in report.reasons.items() for _, m in examples]


# --------------------------------------------------------------------------- 1. raw text


def test_the_token_never_reaches_the_raw_text_wherever_it_sits(settings, tmp_path: Path):
    bad = row(1, person_token=TOKEN, value="abc")  # rejected: not a number
    quoted_token = "WF-7c1e,0a99"  # a token that needs quoting (RFC 4180)
    escaped_token = 'WF-7c"1e0a99'  # a token with a quote, doubled inside quotes
    text = lines([
        ",".join(bad),                                                         # 2: in its place
        "," + ",".join(bad),                                                   # 3: a leading empty field
        ",".join(bad[:3] + bad[4:]),                                           # 4: a field missing
        ",".join(bad) + "," + TOKEN,                                           # 5: repeated beyond the header
        ",".join(row(5, value="abc", specimen_id=TOKEN, person_token=TOKEN)),  # 6: also in another field
        ",".join(row(6, value="x")[:0] + [f'"{quoted_token}"'] + row(6, value="x")[1:]),      # 7: quoted
        ",".join([f'"{escaped_token.replace(chr(34), chr(34) * 2)}"'] + row(7, value="x")[1:]),  # 8: escaped
        ",".join(row(8, value="x", specimen_id=f'"{quoted_token}"', person_token=f'"{quoted_token}"')),  # 9
    ])  # fmt: skip
    rows = read_rows(settings, tmp_path, text)
    assert sorted(rows) == [2, 3, 4, 5, 6, 7, 8, 9]
    for line, r in rows.items():
        for token in (
            TOKEN,
            quoted_token,
            escaped_token,
            escaped_token.replace('"', '""'),
            "7c1e0a99",
        ):
            assert token not in r["raw_text"], (line, r["raw_text"])
    # fields that cannot be matched to the header: count and lengths only, never the text
    assert (
        rows[3]["raw_text"] == "[text withheld: 14 fields, lengths 0,11,4,1,4,9,10,6,3,5,5,0,10,0]"
    )
    assert rows[4]["raw_text"].startswith("[text withheld: 12 fields, lengths ")
    assert rows[5]["raw_text"].startswith("[text withheld: 14 fields")
    assert (
        rows[2]["raw_text"]
        == "[person],1961,F,WF01,WGH000001,2026-01-10,2160-0,abc,mg/dL,final,,2026-01-11,"
    )
    assert rows[6]["raw_text"].startswith("[person],1961,F,WF01,[person],")
    report = checked(settings, tmp_path / "c", text)
    assert not any(t in m for m in messages(report) for t in (TOKEN, "7c1e", "0a99"))


def test_a_rejected_row_message_quotes_no_identifier(settings, tmp_path: Path):
    # a phone number and a name in the value column, 2 of 30 rows: quarantined, not quoted
    rows = [row(i) for i in range(30)]
    rows[4] = row(4, value="+99 5550 100200")
    rows[17] = row(17, value="HOLLOWAY, Maren")
    report = checked(settings, tmp_path, csv_text(rows))
    n, examples = report.reasons["identifier_in_value"]
    assert n == 2 and [line for line, _ in examples] == [6, 19]
    assert all(
        "5550" not in m and "HOLLOWAY" not in m and "Maren" not in m for m in messages(report)
    )
    assert "field 'value' holds what looks like phone numbers" in examples[0][1]
    assert report.outcomes["accepted"] == 28 and report.rows_read == 30


# --------------------------------------------------------------------------- 2. the screen


def test_an_id_like_specimen_id_on_two_rows_of_thirty_quarantines_them(settings, tmp_path: Path):
    rows = [row(i) for i in range(30)]
    rows[3] = row(3, specimen_id="123-45-6789")
    rows[20] = row(20, specimen_id="850101-1234")
    report = checked(settings, tmp_path, csv_text(rows))
    assert report.reasons["identifier_in_value"][0] == 2
    assert report.outcomes["accepted"] == 28


def test_an_identifier_beyond_the_first_thousand_rows_is_found(settings, tmp_path: Path):
    rows = [row(i) for i in range(3000)]
    rows[2717] = row(2717, value="maren.holloway@example.invalid")
    report = checked(settings, tmp_path, csv_text(rows))
    # one e-mail address is enough for the whole file (an over-broad export)
    assert report.fault and "e-mail addresses" in report.fault and "line 2719" in report.fault
    rows[2717] = row(2717, value="+99 5550 100200")
    report = checked(settings, tmp_path / "b", csv_text(rows))
    assert report.reasons["identifier_in_value"] == (
        1,
        [(2719, report.reasons["identifier_in_value"][1][0][1])],
    )


def test_a_column_of_repeated_names_is_a_column_of_names(settings, tmp_path: Path):
    # three persons with ten results each: only three distinct names, still names
    names = ["Maren Holloway", "Tobin Ashcroft", "Ilse Varnum"]
    rows = [row(i) + [names[i % 3]] for i in range(30)]
    report = checked(settings, tmp_path, csv_text(rows, HEADER + ["requester"]))
    assert report.fault and "column 'requester': person names" in report.fault


@pytest.mark.parametrize("column, pattern", [
    ("MRN", "medical record numbers"), ("HospitalNumber", "medical record numbers"),
    ("given_name", "person names"), ("Vorname", "person names"), ("apellido", "person names"),
    ("telefono", "phone numbers"), ("courriel", "e-mail addresses"), ("Adresse", "street addresses"),
    ("geburtsdatum", "full dates of birth"),
])  # fmt: skip
def test_header_words_for_identifiers_hold_the_file_back(settings, tmp_path: Path, column, pattern):
    rows = [row(i) + ["x"] for i in range(3)]
    report = checked(settings, tmp_path, csv_text(rows, HEADER + [column]))
    assert report.fault and f"column {column!r}: {pattern}" in report.fault


@pytest.mark.parametrize(
    "value", ["(020) 555 0134", "555 013 4567", "HOLLOWAY, Maren", "O'NEILL, Brannock Vey"]
)
def test_local_phone_forms_and_surname_first_names_are_recognised(value):
    assert identifiers.value_patterns(value) & {"phone", "person_name", "national_id"}


def test_an_allowed_column_is_not_quarantined(settings, tmp_path: Path):
    source = settings.source(SOURCE).model_copy(
        update={
            "allowed_identifier_columns": {
                "specimen_id": "this lab's specimen numbers are written in 3-3-4 groups"
            }
        }
    )
    rows = [row(i) for i in range(30)]
    rows[3] = row(3, specimen_id="123 456 7890")
    got = read_rows(settings, tmp_path, csv_text(rows), source)
    assert all(r["row_fault"] is None for r in got.values())


def test_an_identifying_file_name_is_stored_as_its_hash(settings, tmp_path: Path):
    name = "Maren_Holloway_0401555123_2026-01.csv"
    inbox = write_inbox(tmp_path, {f"{SOURCE}/{name}": csv_text([row(1)])})
    [item] = scan_inbox(None, settings, inbox)
    assert item.name_withheld == ["person_name", "phone"]
    assert "Holloway" not in item.rel_path and "0401555123" not in item.rel_path
    assert item.rel_path.startswith(f"{SOURCE}/name-withheld-2026-01-") and item.rel_path.endswith(
        ".csv"
    )
    assert item.path.name == name  # the file itself is read as it is
    held = write_inbox(tmp_path / "h", {f"{SOURCE}/{name}": "not,a,header\n1,2,3\n"})
    [item] = scan_inbox(None, settings, held)
    report_path = held / SOURCE / name
    item.file_id = 1
    with pytest.raises(FileFault) as fault:
        read_inbox_file(settings.source(SOURCE), item, settings, TODAY)
    assert "Holloway" in str(fault.value) and "Holloway" not in item.safe(str(fault.value))
    assert report_path.name not in item.safe(str(fault.value))
    plain = write_inbox(tmp_path / "p", {f"{SOURCE}/results_2026-01.csv": csv_text([row(1)])})
    assert scan_inbox(None, settings, plain)[0].rel_path == f"{SOURCE}/results_2026-01.csv"


# --------------------------------------------------------------------------- 3. strict parsing


def test_a_last_line_without_a_line_end_is_rejected_as_truncated(settings, tmp_path: Path):
    text = csv_text([row(1), row(2, value="2.7")], end="")  # "2.75" cut to "2.7"
    report = checked(settings, tmp_path, text)
    assert (
        report.reasons["truncated_line"][0] == 1 and report.reasons["truncated_line"][1][0][0] == 3
    )
    relaxed = settings.source(SOURCE).model_copy(update={"last_line_end": "optional"})
    assert all(
        r["row_fault"] is None for r in read_rows(settings, tmp_path / "r", text, relaxed).values()
    )


@pytest.mark.parametrize("field, value, reason", [
    ("collected_date", "2026-01-05junk", "invalid_date"),
    ("collected_date", "2026-1-5", "invalid_date"),
    ("reported_at", "2026-01-11junk", "invalid_report_date"),
    ("birth_year", "1950.5", "invalid_birth_year"),
    ("specimen_id", "WGH\x00001", "control_character"),
    ("value", "1.0\x1b", "control_character"),
])  # fmt: skip
def test_malformed_values_are_rejected_not_read_leniently(
    settings, tmp_path: Path, field, value, reason
):
    report = checked(settings, tmp_path, csv_text([row(1), row(2, **{field: value})]))
    assert report.reasons[reason][0] == 1, report.reasons
    assert report.outcomes["accepted"] == 1


def test_a_date_in_the_configured_format_must_match_it_in_full(settings, tmp_path: Path):
    source = SourceConfig.model_validate({"id": SOURCE, "layout": "standard", "folder": SOURCE,
                                          "date_format": "%d/%m/%Y"})  # fmt: skip
    text = csv_text([row(1, collected_date="10/01/2026", reported_at="11/01/2026"),
                     row(2, collected_date="1/1/2026", reported_at="11/01/2026"),
                     row(3, collected_date="10/01/2026x", reported_at="11/01/2026")])  # fmt: skip
    got = read_rows(settings, tmp_path, text, source)
    assert [got[n]["collected_date"] for n in (2, 3, 4)] == [dt.date(2026, 1, 10), None, None]


def test_a_lower_case_district_code_is_matched(settings, tmp_path: Path):
    report = checked(settings, tmp_path, csv_text([row(1, district_code=" wf03 ")]))
    assert report.outcomes["accepted"] == 1


def test_a_collection_date_after_the_run_is_rejected_whatever_the_report_date(
    settings, tmp_path: Path
):
    later = (TODAY + dt.timedelta(days=400)).isoformat()
    report = checked(
        settings, tmp_path, csv_text([row(1), row(2, collected_date=later, reported_at=later)])
    )
    assert report.reasons["collected_after_run"][0] == 1


def test_duplicate_header_names_hold_the_file_back(settings, tmp_path: Path):
    text = csv_text([row(1) + ["9.9"]], HEADER + ["value"])
    report = checked(settings, tmp_path, text)
    assert report.fault and "['value'] more than once" in report.fault
    with pytest.raises(FileFault, match="more than once"):
        read_rows(settings, tmp_path / "r", text)


# --------------------------------------------------------------------------- 4. versions


def test_an_amended_row_before_its_final_of_the_same_report_date_wins(settings, tmp_path: Path):
    # FHIR R4 Observation.status: 'amended' replaces the 'final' it follows up
    text = csv_text([row(1, status="amended", value="1.50"), row(1, status="final", value="1.00")])
    report = checked(settings, tmp_path, text)
    assert report.outcomes == {"accepted": 1, "rejected": 0, "superseded": 1, "duplicate": 0, "withdrawn": 0,
                               "pending": 0}  # fmt: skip


def test_a_specimen_under_two_persons_is_a_conflict_and_both_rows_are_kept_out(
    settings, tmp_path: Path
):
    rows = [
        row(1),
        row(2),
        row(3, specimen_id="WGH000001"),
    ]  # person 3 reuses person 1's specimen id
    report = checked(settings, tmp_path, csv_text(rows))
    assert report.outcomes["accepted"] == 1 and report.outcomes["rejected"] == 2
    n, examples = report.reasons["specimen_conflict"]
    assert n == 2 and [line for line, _ in examples] == [2, 4]
    assert "more than one person" in examples[0][1]
    assert report.rows_read == sum(report.outcomes.values())
