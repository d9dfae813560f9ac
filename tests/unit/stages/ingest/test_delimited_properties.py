"""Property tests (Hypothesis) of the readers and of the row accounting.

(a) Whatever bytes a standard-layout file holds, reading it gives landed rows or a
    :class:`pipeline.stages.ingest.inbox.FileFault`, never another exception (DEVELOPERS.md: a whole-file
    fault holds the file back, the other files go on).
(b) For a file with a valid header and arbitrary row contents, a whole month accounts for every
    data row exactly once: rows read = non-blank data lines = the sum of the outcomes, and no
    line is both rejected and a result version (DEVELOPERS.md, "Row accounting").

Lines are counted as RFC 4180 and Python's csv module count them: a line ends at CRLF, LF or CR.
The readers' own faults found by the corpus (oversized CSV fields, non-text FHIR fields) are
kept out of (a) and (b) and tested in test_defect_corpus.py; (c) states the FHIR one as a
property: an Observation with any JSON types in its fields gives a row or a file fault.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import itertools
import json
import re
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.core.settings import Settings, load_settings
from pipeline.stages.ingest import delimited
from pipeline.stages.ingest.inbox import FileFault, InboxFile, sha256_of
from pipeline.stages.ingest.landing import read_inbox_file
from tests.conftest import examples, make_small_config, rows, run_month, write_inbox
from tests.unit.stages.ingest.test_delimited import compare_paths

LAB = "westerfold_general_lab"
FHIR = "fallowmere_reference_lab"
FIELDS = ["person_token", "birth_year", "sex", "district_code", "specimen_id", "collected_date",
          "test_code", "value", "unit", "status", "reported_at"]  # fmt: skip
HEADER = ",".join(FIELDS)
TODAY = dt.date(2025, 7, 1)
LINE_END = re.compile(r"\r\n|\n|\r")
#: Python's csv module refuses longer fields (csv.field_size_limit, default 131072): that fault
#: is a corpus case (oversized_field); generated fields stay far below it.
MAX_FIELD = 200

# Hypothesis warns when the global random state moves while a strategy draws; these strategies
# use only Hypothesis's own draws, and what moves it is a background thread of an earlier test
# (Prefect's, Dask's), so that warning is a false alarm here.
pytestmark = pytest.mark.filterwarnings("ignore:Do not use the `random` module inside strategies")

FAST = settings(max_examples=150, deadline=None, database=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])  # fmt: skip
SLOW = settings(max_examples=examples(25, 10), deadline=None, database=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])  # fmt: skip


@pytest.fixture(scope="module")
def config(tmp_path_factory) -> Path:
    return make_small_config(tmp_path_factory.mktemp("properties") / "config")


@pytest.fixture(scope="module")
def small_settings(config: Path) -> Settings:
    return load_settings(config)


@pytest.fixture(scope="module")
def workdir(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("property_files")


@pytest.fixture(scope="module", autouse=True)
def small_bulk_slices():
    """The bulk reader splits its lines a few at a time here, so that the comparisons below
    also cross its slice boundaries (blank lines, faults and screened values on either side)."""
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(delimited, "BULK_SLICE_LINES", 3)
        yield


_counter = itertools.count()


def read_bytes_as(
    settings_: Settings, workdir: Path, data: bytes, delimiter: str = ",", source_id: str = LAB
):
    """Write ``data`` to a fresh file and read it with the source (its delimiter replaced)."""
    source = settings_.source(source_id)
    if delimiter != source.delimiter:
        source = source.model_copy(update={"delimiter": delimiter})
    path = workdir / f"f{next(_counter)}" / "results_2025-06.csv"
    path.parent.mkdir()
    path.write_bytes(data)
    item = InboxFile(
        source.id,
        path,
        f"{source.folder}/results_2025-06.csv",
        sha256_of(path),
        len(data),
        file_id=1,
    )
    try:
        return read_inbox_file(source, item, settings_, TODAY)
    except FileFault as fault:
        assert str(path) in str(fault)  # a whole-file fault names the file
        return None


# --------------------------------------------------------------------------- strategies

DELIMITERS = st.sampled_from([",", ";", "\t", "|"])
LINE_ENDS = st.sampled_from(["\n", "\r\n", "\r"])
short_text = st.text(max_size=12)
#: text without line breaks (so that one record is one line) but with quotes, delimiters and
#: any other character, NUL and U+2028 included
field_text = st.text(
    st.characters(exclude_characters="\r\n", exclude_categories=("Cs",)), max_size=MAX_FIELD // 10
)


@st.composite
def ragged_csv(draw) -> bytes:
    """A header (valid or not) and rows with random field counts, quotes and line ends."""
    delim = draw(DELIMITERS)
    eol = draw(LINE_ENDS)
    header = draw(
        st.one_of(st.just(FIELDS), st.lists(st.sampled_from(FIELDS + ["x", ""]), max_size=14))
    )
    lines = [delim.join(header)]
    for _ in range(draw(st.integers(0, 8))):
        fields = draw(st.lists(st.one_of(short_text, st.sampled_from(['"', '""', '"a,b"', '"x\ny"', ",", ";"])),
                               max_size=14))  # fmt: skip
        lines.append(delim.join(fields))
    text = eol.join(lines) + draw(st.sampled_from(["", eol]))
    prefix = draw(st.sampled_from([b"", b"\xef\xbb\xbf", b"\xff"]))
    return prefix + text.encode(
        draw(st.sampled_from(["utf-8", "utf-8", "latin-1", "utf-16"])), errors="replace"
    )


# --------------------------------------------------------------------------- (a) readers


@FAST
@given(data=st.binary(max_size=600), delimiter=DELIMITERS)
def test_random_bytes_give_rows_or_a_file_fault(small_settings, workdir, data, delimiter):
    read_bytes_as(small_settings, workdir, data, delimiter)


@FAST
@given(text=st.text(max_size=400), delimiter=DELIMITERS)
def test_random_text_gives_rows_or_a_file_fault(small_settings, workdir, text, delimiter):
    read_bytes_as(small_settings, workdir, text.encode("utf-8"), delimiter)


@FAST
@given(text=st.text(max_size=300))
def test_random_text_after_a_valid_header_gives_rows_or_a_file_fault(small_settings, workdir, text):
    frame = read_bytes_as(small_settings, workdir, (HEADER + "\n" + text).encode("utf-8"))
    if frame is not None:
        assert frame["line_no"].is_unique().all() and (frame["line_no"] >= 2).all()


@FAST
@given(data=ragged_csv(), delimiter=DELIMITERS)
def test_ragged_rows_give_rows_or_a_file_fault(small_settings, workdir, data, delimiter):
    frame = read_bytes_as(small_settings, workdir, data, delimiter)
    if frame is not None:
        # every row keeps the raw text it came from, and a row of the wrong width says so (a last
        # line without its line end is reported as possibly cut short, whatever its width); the
        # reader's other row faults (an unreadable report date, a control character) name
        # themselves the same way
        assert frame["raw_text"].null_count() == 0
        faults = frame.filter(frame["row_fault"].is_not_null())["row_fault"]
        kinds = faults.str.extract(r"^([a-z_]+):", 1)
        assert kinds.is_in(
            ["wrong_field_count", "truncated_line", "invalid_report_date", "control_character"]
        ).all(), faults.to_list()


@FAST
@given(data=ragged_csv())
def test_ragged_rows_of_a_mapped_source_give_rows_or_a_file_fault(small_settings, workdir, data):
    # the delimited source (';', decimal comma, dd/mm/yyyy, local codes) reads the same bytes
    read_bytes_as(small_settings, workdir, data, source_id="corvale_lab_chain")


# --------------------------------------------------------------------------- (b) accounting

VALUES = st.sampled_from(["1.0", "0.9", "<0.2", "1,5", "", "ND", "NaN", "inf", "-inf", "1e400", "0", "-1",
                          ">=300", "≤3", " 1.0 ", "1.", ".5", "+2", "85", "88.4", "< 0.2", "<", "see note"])  # fmt: skip
UNITS = st.sampled_from(
    ["mg/dL", "mg/dl", "umol/L", "µmol/l", "mg/g", "mg/mmol", "mmol/L", "mg/L", "", "%", "xyz"]
)
CODES = st.sampled_from(
    ["2160-0", "14682-9", "9318-7", "4548-4", "2345-7", "1558-6", "62238-1", "9999-9", ""]
)
STATUSES = st.sampled_from(["final", "amended", "corrected", "cancelled", "entered-in-error", "preliminary",
                            "FINAL", "done", ""])  # fmt: skip
DATES = st.one_of(
    st.dates(dt.date(2024, 1, 1), dt.date(2025, 7, 31)).map(dt.date.isoformat),
    st.dates().map(dt.date.isoformat),
    st.sampled_from(["2025-02-29", "02/06/2025", "2025-13-01", "", "soon", "2025-06-02T08:30:00"]),
)
YEARS = st.one_of(st.integers(1880, 2030).map(str), st.integers(-10**9, 10**9).map(str),
                  st.sampled_from(["", "19x0", " 1960 ", "1960.0"]))  # fmt: skip


#: Valid values from small sets, so that rows collide: versions, duplicates and copies occur.
CLEAN = {
    "person_token": st.sampled_from(["WF-p0001", "WF-p0002"]),
    "birth_year": st.sampled_from(["1950", "1960", "2010"]),
    "sex": st.sampled_from(["F", "M"]),
    "district_code": st.sampled_from(["WF01", "WF02"]),
    "specimen_id": st.sampled_from(["S1", "S2", ""]),
    "collected_date": st.sampled_from(["2025-06-02", "2025-06-03"]),
    "status": st.sampled_from(["final", "final", "amended", "cancelled", "preliminary"]),
    "reported_at": st.sampled_from(["2025-06-04", "2025-06-05", ""]),
}
#: What a field may hold instead: odd values of its kind, or any text at all.
WILD = {
    "person_token": st.just(""), "birth_year": YEARS,
    "sex": st.sampled_from(["U", "female", "other", "x", ""]), "district_code": st.sampled_from(["WF99", ""]),
    "specimen_id": st.just(""), "collected_date": DATES, "test_code": CODES, "value": VALUES,
    "unit": UNITS, "status": STATUSES, "reported_at": DATES,
}  # fmt: skip


@st.composite
def row_values(draw) -> dict[str, str]:
    """A clean row with none, one or a few fields replaced by odd values or arbitrary text."""
    record = {f: draw(CLEAN[f]) for f in FIELDS if f in CLEAN}
    # a creatinine or an ACR, in a unit of its own (analytes.yaml)
    record["test_code"], record["unit"], record["value"] = draw(st.sampled_from([
        ("2160-0", "mg/dL", "1.0"), ("2160-0", "mg/dL", "1.2"), ("2160-0", "umol/L", "88.4"),
        ("9318-7", "mg/mmol", "<3"), ("9318-7", "mg/g", "45"),
    ]))  # fmt: skip
    n_odd = draw(st.sampled_from([0, 0, 0, 1, 1, 2, 3]))
    for f in draw(st.lists(st.sampled_from(FIELDS), min_size=n_odd, max_size=n_odd, unique=True)):
        record[f] = draw(st.one_of(WILD[f], field_text))
    return record


ROW = row_values()


@st.composite
def generated_file(draw) -> tuple[str, int]:
    """A valid header, then rows (some of the wrong width) and blank lines; the row count."""
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(FIELDS)
    n_rows = 0
    for record in draw(st.lists(ROW, min_size=1, max_size=12)):
        fields = [record[f] for f in FIELDS]
        width = draw(st.sampled_from([len(FIELDS)] * 12 + [2, 10, 12]))
        fields = (fields + ["extra"] * width)[:width]
        if draw(st.booleans()) and draw(st.booleans()):
            out.write(draw(st.sampled_from(["\n", " \n", "\t\n"])))  # a blank line is not a row
        writer.writerow(fields)
        n_rows += 1
    eol = draw(LINE_ENDS)
    return out.getvalue().replace("\n", eol), n_rows


def data_lines(text: str) -> list[int]:
    """Line numbers (header = 1) of the non-blank lines after the header."""
    lines = LINE_END.split(text)
    return [i for i, line in enumerate(lines[1:], start=2) if line.strip()]


@SLOW
@given(generated=generated_file())
def test_every_row_is_accounted_for_once(config, workdir, generated):
    text, n_rows = generated
    base = workdir / f"run{next(_counter)}"
    inbox = write_inbox(base, {f"{LAB}/results_2025-06.csv": text})
    expected_lines = data_lines(text)
    assert len(expected_lines) == n_rows  # no field holds a line break
    with run_month(config, inbox, base / "out", period="2025-06") as con:
        [(status, read, accounted)] = rows(con, """
            select status, rows_read, rows_accepted + rows_rejected + rows_superseded + rows_duplicate
                   + rows_withdrawn + rows_pending
            from ingest_files""")  # fmt: skip
        assert status == "ingested"
        assert read == accounted == n_rows
        rejected = [r[0] for r in rows(con, "select line_no from rejected_rows")]
        # a specimen id under two persons: the version stays in result_versions with outcome
        # 'rejected' and its reason is in rejected_rows, where the ledger counts it once
        versions = [
            r[0]
            for r in rows(con, "select line_no from result_versions where outcome <> 'rejected'")
        ]
        assert not set(rejected) & set(versions)
        assert sorted(rejected + versions) == expected_lines
        outcomes = dict(rows(con, "select outcome, count(*) from result_versions group by all"))
        assert None not in outcomes
        [ledger] = rows(con, "select rows_accepted, rows_superseded, rows_duplicate, rows_withdrawn, "
                             "rows_pending, rows_rejected from ingest_files")  # fmt: skip
        names = ("accepted", "superseded", "duplicate", "withdrawn", "pending")
        assert ledger == (*(outcomes.get(n, 0) for n in names), len(rejected))
        # lab_results holds exactly the accepted versions
        assert rows(con, "select count(*) from lab_results") == [(outcomes.get("accepted", 0),)]


# --------------------------------------------------------------------------- (c) FHIR, known bug

JSON_VALUES = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats(allow_nan=False) | short_text,
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(short_text, inner, max_size=3),
    max_leaves=6,
)
OBSERVATION_KEYS = ["subject", "status", "code", "specimen", "effectiveDateTime", "issued",
                    "valueQuantity", "valueString"]  # fmt: skip


@settings(
    max_examples=60, deadline=None, database=None, suppress_health_check=[HealthCheck.too_slow]
)
@given(fields=st.dictionaries(st.sampled_from(OBSERVATION_KEYS), JSON_VALUES, min_size=1))
def test_fhir_observation_with_any_json_types_is_a_row_or_a_file_fault(
    small_settings, workdir, fields
):
    folder = workdir / f"fhir{next(_counter)}" / "2025-06"
    folder.mkdir(parents=True)
    (folder / "Patient.ndjson").write_text(
        '{"resourceType":"Patient","id":"p1","gender":"female","birthDate":"1960"}\n'
    )
    path = folder / "Observation.ndjson"
    path.write_text(json.dumps({"resourceType": "Observation", **fields}) + "\n", encoding="utf-8")
    source = small_settings.source(FHIR)
    item = InboxFile(
        source.id, path, f"{FHIR}/2025-06/Observation.ndjson", sha256_of(path), 1, file_id=1
    )
    try:
        frame = read_inbox_file(source, item, small_settings, TODAY)
    except FileFault:
        return
    assert frame.height == 1


# --------------------------------------------------------------------------- (d) both readers


def _both_readers_agree(
    settings_: Settings, workdir: Path, data: bytes, delimiter: str, source_id: str = LAB
):
    source = settings_.source(source_id)
    if delimiter != source.delimiter:
        source = source.model_copy(update={"delimiter": delimiter})
    path = workdir / f"both{next(_counter)}.csv"
    path.write_bytes(data)
    compare_paths(source, path)


@FAST
@given(data=ragged_csv(), delimiter=DELIMITERS)
def test_ragged_files_land_the_same_rows_through_either_reader(
    small_settings, workdir, data, delimiter
):
    # a file without quotes is split in bulk, any other goes through the csv module: same rows
    _both_readers_agree(
        small_settings, workdir, data.replace(b'"', b"") if delimiter == "," else data, delimiter
    )


@settings(FAST, max_examples=examples(150, 50))
@given(generated=generated_file())
def test_generated_files_land_the_same_rows_through_either_reader(
    small_settings, workdir, generated
):
    text, _ = generated
    _both_readers_agree(small_settings, workdir, text.encode("utf-8"), ",")
