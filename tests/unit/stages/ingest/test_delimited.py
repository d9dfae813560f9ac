"""The two readers of delimited files land the same rows: the bulk reader (every line split at
once in polars, for a file without quotes) and the csv-module reader (any file).

Outside facts the comparison rests on:

* RFC 4180 CSV: without the quote character a record is one line and a field is what lies
  between two delimiters; a line ends at CRLF (and, as Python's csv module reads, at LF or CR);
* Python's csv module (Python docs, ``csv``): ``field_size_limit`` (131072 by default) is a
  fault, a NUL byte is data (Python 3.11);
* Python's ``str.isspace``/``str.strip`` (Python docs): the white space stripped from a token
  and a blank line includes U+001C..U+001F, unlike Rust's ``char::is_whitespace`` (Unicode
  White_Space; Rust std docs, from memory).

The same comparison over every file of the defect corpus is in test_defect_corpus.py
(``test_both_readers_land_the_same_rows``).
"""

from __future__ import annotations

import itertools
import sys
from pathlib import Path

import polars as pl
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.core.settings import STANDARD_FIELDS, Settings, SourceConfig, load_settings
from pipeline.stages.ingest import delimited
from pipeline.stages.ingest.delimited import read_delimited
from pipeline.stages.ingest.inbox import FileFault, InboxFile
from pipeline.stages.ingest.rows import PY_WHITESPACE
from tests.conftest import ROOT, make_small_config

SAMPLES = ROOT / "sample_extracts"
_counter = itertools.count()


def read_with(source: SourceConfig, path: Path, reader: str):
    """("rows", frame, notes, allowed) or ("fault", message, notes); None when ``bulk`` does not apply."""
    item = InboxFile(source.id, path, f"{source.folder}/{path.name}", "", 0, file_id=1)
    try:
        frame = read_delimited(source, item, reader=reader)
    except FileFault as fault:
        return ("fault", str(fault), item.notes)
    except ValueError:
        assert reader == "bulk"
        return None
    return ("rows", frame, item.notes, item.allowed_identifiers)


def assert_same(a, b) -> None:
    assert a[0] == b[0], (a[:2], b[:2])
    if a[0] == "fault":
        assert a == b
    else:
        assert a[1].schema == b[1].schema
        assert a[1].equals(b[1]), (a[1], b[1])
        assert a[2:] == b[2:]


def compare_paths(source: SourceConfig, path: Path) -> bool:
    """Read ``path`` both ways; True when the bulk reader applied (and gave the same)."""
    by_csv = read_with(source, path, "csv")
    bulk = read_with(source, path, "bulk")
    if bulk is not None:
        assert_same(by_csv, bulk)
    assert_same(by_csv, read_with(source, path, "auto"))
    return bulk is not None


@pytest.fixture(scope="module")
def small_settings(tmp_path_factory) -> Settings:
    return load_settings(make_small_config(tmp_path_factory.mktemp("paths") / "config"))


def test_the_whitespace_stripped_is_what_str_strip_strips():
    # Python docs: str.strip() with no argument removes the characters for which isspace() holds
    python = {chr(c) for c in range(sys.maxunicode + 1) if chr(c).isspace()}
    assert set(PY_WHITESPACE) == python
    assert len(PY_WHITESPACE) == len(python)


@pytest.mark.parametrize("folder", ["westerfold_general_lab", "corvale_lab_chain"])
def test_every_sample_extract_reads_the_same_both_ways(small_settings, folder):
    source = next(s for s in small_settings.sources if s.folder == folder)
    files = sorted((SAMPLES / folder).glob("*.csv"))
    assert files
    assert all(compare_paths(source, f) for f in files)  # the samples have no quotes: all in bulk


def test_a_quoted_file_goes_through_the_csv_module(small_settings, tmp_path):
    source = small_settings.source("westerfold_general_lab")
    header = ",".join(STANDARD_FIELDS[:11])
    path = tmp_path / "q.csv"
    path.write_text(
        header + '\nWF-a,1960,F,WF01,"S,1",2025-06-02,2160-0,1.0,mg/dL,final,\n', encoding="utf-8"
    )
    assert not compare_paths(source, path)
    assert read_with(source, path, "auto")[1]["specimen_id"].to_list() == ["S,1"]  # RFC 4180


def test_a_line_over_the_field_limit_is_left_to_the_csv_module(small_settings, tmp_path):
    source = small_settings.source("westerfold_general_lab")
    header = ",".join(STANDARD_FIELDS[:11])
    path = tmp_path / "long.csv"
    path.write_text(
        header + "\nWF-a,1960,F,WF01,S1,2025-06-02,2160-0,1.0,mg/dL,final," + "x" * 140_000 + "\n"
    )
    assert not compare_paths(source, path)
    kind, message, _ = read_with(source, path, "auto")
    assert kind == "fault" and "line 2" in message and "field larger than field limit" in message


# --------------------------------------------------------------------------- properties

LINE_ENDS = st.sampled_from(["\n", "\r\n", "\r"])
#: anything but the quote and line breaks: delimiters, white space of every kind, NUL, U+2028
FIELD_CHARS = st.sampled_from(list("abcWF-0123456789 .,;|\t@/µ") + ["\x00", "\x0b", "\x0c", "\x1c", "\x1f", "\x85",
                                                                    "\u2028", "\u3000", "\xa0"])  # fmt: skip
plain = st.sampled_from(
    ["WF-p1", " WF-p1 ", "\x1fWF-p1", "1", "F", "WF01", "1.0", "mg/dL", "final", ""]
)
#: values the identifier screen flags (a full date is one in the birth-year column): now and then
flagged = st.sampled_from(
    ["2025-06-02", "a.b@example.invalid", "Maren Holloway", "+99 5550 100200"]
)
field = st.one_of(st.text(FIELD_CHARS, max_size=8), plain)
BLANK = st.sampled_from(["", " ", "\t", "\x1c", "\u3000 ", "\x0c"])


@st.composite
def unquoted_file(draw, delimiter: str, header: list[str]) -> str:
    lines = [delimiter.join(header)]
    # one file in four carries identifier-like values (then the screen decides the same both ways)
    values = st.one_of(field, field, flagged) if draw(st.integers(0, 3)) == 0 else field
    for _ in range(draw(st.integers(0, 10))):
        if draw(st.integers(0, 5)) == 0:
            lines.append(draw(BLANK))
            continue
        width = draw(st.sampled_from([len(header)] * 6 + [1, 2, len(header) + 1]))
        lines.append(delimiter.join(draw(st.lists(values, min_size=width, max_size=width))))
    ends = [draw(LINE_ENDS) for _ in lines]
    return "".join(line + end for line, end in zip(lines, ends, strict=False))[
        : None if draw(st.booleans()) else -1
    ]


PROPERTY = settings(max_examples=120, deadline=None, database=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                           HealthCheck.function_scoped_fixture])  # fmt: skip


def _write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / f"f{next(_counter)}.csv"
    path.write_bytes(text.encode("utf-8"))
    return path


@PROPERTY
@given(data=st.data(), delimiter=st.sampled_from([",", ";", "\t", "|"]))
def test_standard_layout_without_quotes_reads_the_same_both_ways(
    small_settings, tmp_path, data, delimiter
):
    source = small_settings.source("westerfold_general_lab").model_copy(
        update={"delimiter": delimiter}
    )
    header = list(STANDARD_FIELDS[:11]) + data.draw(st.sampled_from([[], ["ward"], ["e_mail"]]))
    path = _write(tmp_path, data.draw(unquoted_file(delimiter, header)))
    assert compare_paths(source, path)


@PROPERTY
@given(data=st.data())
def test_mapped_layout_without_quotes_reads_the_same_both_ways(small_settings, tmp_path, data):
    source = small_settings.source("corvale_lab_chain")  # ';', decimal comma, local codes
    header = list(source.columns.values())
    path = _write(tmp_path, data.draw(unquoted_file(";", header)))
    assert compare_paths(source, path)


@PROPERTY
@given(text=st.text(st.sampled_from(list('ab,;"\n\r \t1') + ["\x1f", "\u2028"]), max_size=120))
def test_any_text_after_a_header_reads_the_same_whichever_reader(small_settings, tmp_path, text):
    # quotes or not: the automatic choice gives what the csv module gives
    source = small_settings.source("westerfold_general_lab")
    path = _write(tmp_path, ",".join(STANDARD_FIELDS[:11]) + "\n" + text)
    compare_paths(source, path)


def test_bulk_rows_keep_line_numbers_and_mask_every_occurrence_of_the_token(
    small_settings, tmp_path
):
    source = small_settings.source("westerfold_general_lab")
    header = ",".join(STANDARD_FIELDS[:11])
    text = (header + "\r\n\r\n" + "WF-p1,1960,F,WF01,WF-p1x,2025-06-02,2160-0,1.0,mg/dL,final,\r"
            + "  \n" + "WF-p2,1961,M,WF02,S2,2025-06-02,2160-0,0.9\n")  # fmt: skip
    kind, frame, *_ = read_with(source, _write(tmp_path, text), "bulk")
    assert kind == "rows"
    rows = {r["line_no"]: r for r in frame.iter_rows(named=True)}
    assert sorted(rows) == [3, 5]  # line 2 and line 4 are blank: not rows, still counted
    assert (
        rows[3]["raw_text"] == "[person],1960,F,WF01,[person]x,2025-06-02,2160-0,1.0,mg/dL,final,"
    )
    assert rows[5]["row_fault"] == "wrong_field_count:8 fields, the header has 11"
    assert rows[5]["unit_text"] == "" and rows[5]["specimen_id"] == "S2"
    assert frame.schema == read_with(source, _write(tmp_path, text), "csv")[1].schema
    assert frame["line_no"].dtype == pl.Int64


@pytest.mark.parametrize("token", ["[", "person", "]", "n]", "p"])
def test_a_token_inside_the_mask_is_masked_once(small_settings, tmp_path, token):
    """A token that is part of the mask text itself ("[person]") is masked once, in its field
    and wherever it occurs in the other fields, by both readers alike (a regression: the bulk
    reader masked the joined text again and wrote "[person]person]" for the token "[")."""
    source = small_settings.source("westerfold_general_lab")
    header = ",".join(STANDARD_FIELDS[:11])
    line = f"{token},1950,F,WF01,S{token}1,2025-06-02,2160-0,1.0,mg/dL,final,2025-06-04"
    path = _write(tmp_path, header + "\n" + line + "\n")
    bulk, by_csv = read_with(source, path, "bulk"), read_with(source, path, "csv")
    assert_same(by_csv, bulk)
    expected = "[person],1950,F,WF01,S[person]1,2025-06-02,2160-0,1.0,mg/dL,final,2025-06-04"
    assert bulk[1]["raw_text"].to_list() == [expected]


def test_a_token_inside_another_field_is_masked_in_its_value_too(small_settings, tmp_path):
    """A person token sent again in the value or the specimen id is masked in the landed values,
    not only in the raw text, by both readers alike: it would otherwise be kept with an accepted
    row, or quoted in a rejection's message. A token too short to identify anyone ("F") is left
    in the values it happens to sit in (a regression: the value held the token in clear)."""
    source = small_settings.source("westerfold_general_lab")
    header = ",".join(STANDARD_FIELDS[:11])
    lines = ["WF-tok0001,1960,F,WF01,WF-tok0001-S1,2025-06-02,2160-0,WF-tok0001,mg/dL,final,",
             "F,1961,F,WF02,S2,2025-06-02,2160-0,1.0,mg/dL,final,"]  # fmt: skip
    path = _write(tmp_path, header + "\n" + "\n".join(lines) + "\n")
    bulk, by_csv = read_with(source, path, "bulk"), read_with(source, path, "csv")
    assert_same(by_csv, bulk)
    first, second = bulk[1].iter_rows(named=True)
    assert (first["specimen_id"], first["value_text"]) == ("[person]-S1", "[person]")
    assert "tok0001" not in " ".join(str(v) for v in first.values() if v != first["person_token"])
    assert (second["sex_text"], second["value_text"]) == ("F", "1.0")


@pytest.mark.parametrize("slice_lines", [1, 2, 3, 100_000])
def test_the_bulk_reader_gives_the_same_rows_a_slice_at_a_time(small_settings, tmp_path, monkeypatch,
                                                               slice_lines):  # fmt: skip
    """The bulk reader splits its lines BULK_SLICE_LINES at a time (to bound its memory): the rows,
    line numbers, blank lines skipped, faults, masks and the identifier screen's quarantine are
    those of the csv-module reader whatever the slice (a blank line and a flagged value fall on
    slice boundaries here)."""
    monkeypatch.setattr(delimited, "BULK_SLICE_LINES", slice_lines)
    source = small_settings.source("westerfold_general_lab")
    header = ",".join(STANDARD_FIELDS[:11])
    lines = ["WF-tok0001,1960,F,WF01,S1,2025-06-02,2160-0,1.0,mg/dL,final,",
             "",
             "WF-tok0002,1961,F,WF02,S2,2025-06-02,2160-0,1.1,mg/dL,final",
             "WF-tok0003,1962,M,WF01,S3,2025-06-02,2160-0,555-867-5309,mg/dL,final,",
             "WF-tok0004,1963,M,WF02,WF-tok0004-S4,2025-06-02,2160-0,1.3,mg/dL,final,"]  # fmt: skip
    path = _write(tmp_path, header + "\n" + "\n".join(lines) + "\n")
    bulk, by_csv = read_with(source, path, "bulk"), read_with(source, path, "csv")
    assert_same(by_csv, bulk)
    frame = bulk[1]
    assert frame["line_no"].to_list() == [2, 4, 5, 6]
    faults = dict(zip(frame["line_no"], frame["row_fault"], strict=True))
    assert faults[4].startswith("wrong_field_count") and faults[5] is not None and faults[2] is None
