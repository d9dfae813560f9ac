"""The Parquet input layout (``layout: parquet``): the same landed rows as the same content sent
as CSV, and a truncated or corrupt file held back naming the file and the reason while the
other files go on (DEVELOPERS.md: whole-file faults).

Outside facts (Apache Parquet format specification, from memory): a file starts and ends with
the magic bytes ``PAR1``, the footer (file metadata, then its length and the magic) is at the
end, so a file cut short has no readable footer; a data page may carry a CRC-32 of its bytes,
which a reader checks when asked (pyarrow's ``page_checksum_verification``). The data are
invented (fictional region Westerfold), taken from the shipped sample extract.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import json
from pathlib import Path

import polars as pl
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from pydantic import ValidationError

from pipeline.core.pseudonymise import DEMO_KEY, PseudonymKey
from pipeline.core.settings import STANDARD_FIELDS, SourceConfig, load_settings
from pipeline.stages.ingest.inbox import InboxFile, sha256_of
from pipeline.stages.ingest.landing import land_inbox, read_inbox_file
from pipeline.warehouse import connection as warehouse
from tests.conftest import ROOT, make_small_config, rows, run_month, write_inbox

TODAY = dt.date(2025, 7, 1)
KEY = PseudonymKey(secret=DEMO_KEY.encode(), is_demo=True)
STANDARD = "westerfold_general_lab"
PARQUET = "westerfold_parquet_lab"
SAMPLE_CSV = ROOT / "sample_extracts" / STANDARD / "results_2025-06.csv"
#: the source config of a lab sending Parquet with the standard column names
SOURCE_YAML = f"id: {PARQUET}\nlayout: parquet\nfolder: {PARQUET}\ncolumns:\n" + "".join(
    f"  {f}: {f}\n" for f in STANDARD_FIELDS
)
GOOD_CSV = (
    "person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,status,reported_at\n"
    "WF-pq000001,1960,F,WF01,P1,2025-06-02,2160-0,1.0,mg/dL,final,2025-06-03\n"
)


def sample_table(n: int | None = None) -> pa.Table:
    """The sample extract's rows as a Parquet table of text columns (what the CSV holds)."""
    records = list(csv.reader(io.StringIO(SAMPLE_CSV.read_text(encoding="utf-8"), newline="")))
    header, data = records[0], records[1 : None if n is None else n + 1]
    return pa.table({h: [r[i] for r in data] for i, h in enumerate(header)})


def parquet_bytes(table: pa.Table, **options) -> bytes:
    out = io.BytesIO()
    pq.write_table(table, out, **options)
    return out.getvalue()


@pytest.fixture
def config(tmp_path: Path) -> Path:
    config = make_small_config(tmp_path / "config")
    (config / "sources" / f"{PARQUET}.yaml").write_text(SOURCE_YAML, encoding="utf-8")
    return config


def read(settings, source_id: str, path: Path, rel: str) -> pl.DataFrame:
    source = settings.source(source_id)
    item = InboxFile(source.id, path, rel, sha256_of(path), path.stat().st_size, file_id=1)
    return read_inbox_file(source, item, settings, TODAY)


# --------------------------------------------------------------------------- config


def test_layout_parquet_maps_columns_like_the_delimited_layout():
    source = SourceConfig.model_validate({"id": "p_lab", "layout": "parquet", "folder": "p_lab",
                                          "columns": {f: f for f in STANDARD_FIELDS}})  # fmt: skip
    assert source.file_glob == "*.parquet"
    with pytest.raises(ValidationError, match="layout 'parquet' needs a 'columns' entry"):
        SourceConfig.model_validate({"id": "p_lab", "layout": "parquet", "folder": "p_lab"})


# --------------------------------------------------------------------------- same rows as CSV


def test_parquet_with_the_content_of_a_csv_lands_the_same_rows(config: Path, tmp_path: Path):
    settings = load_settings(config)
    inbox = write_inbox(
        tmp_path, {f"{PARQUET}/results_2025-06.parquet": parquet_bytes(sample_table())}
    )
    from_csv = read(settings, STANDARD, SAMPLE_CSV, f"{STANDARD}/results_2025-06.csv")
    from_parquet = read(settings, PARQUET, inbox / PARQUET / "results_2025-06.parquet",
                        f"{PARQUET}/results_2025-06.parquet")  # fmt: skip
    assert from_csv.height == from_parquet.height > 100
    same = [c for c in from_csv.columns if c not in ("source_id", "raw_text", "line_no")]
    assert from_parquet.select(same).equals(from_csv.select(same))
    assert from_parquet.schema == from_csv.schema
    # a CSV row's line is its row number + 1 (the header is line 1); a Parquet row's is its row number
    assert (from_parquet["line_no"] == from_csv["line_no"] - 1).all()


def test_raw_text_is_the_record_as_json_with_the_token_masked(config: Path, tmp_path: Path):
    table = sample_table(3)
    inbox = write_inbox(tmp_path, {f"{PARQUET}/x.parquet": parquet_bytes(table)})
    frame = read(
        load_settings(config), PARQUET, inbox / PARQUET / "x.parquet", f"{PARQUET}/x.parquet"
    )
    first = json.loads(frame["raw_text"][0])
    assert first["person_token"] == "[person]"
    assert list(first) == table.column_names
    assert {k: v for k, v in first.items() if k != "person_token"} == {
        k: table.column(k)[0].as_py() for k in table.column_names if k != "person_token"
    }
    for token in table.column("person_token").to_pylist():
        assert not frame["raw_text"].str.contains(token, literal=True).any()


def test_a_token_inside_another_column_is_masked_in_its_value_too(config: Path, tmp_path: Path):
    """As the delimited readers (test_delimited.py): a person token sent again in the specimen id
    or the value is masked in the landed values, not only in the raw text; a token too short to
    identify anyone is left where it happens to sit (a regression: the Parquet reader kept it)."""
    text = GOOD_CSV + "F,1961,F,WF02,F-S2,2025-06-02,2160-0,1.0,mg/dL,final,2025-06-03\n"
    text = text.replace(",P1,", ",WF-pq000001-S1,").replace(
        ",1.0,mg/dL,final,2025-06-03\n", ",WF-pq000001,mg/dL,final,2025-06-03\n", 1
    )
    records = list(csv.reader(io.StringIO(text)))
    table = pa.table({h: [r[i] for r in records[1:]] for i, h in enumerate(records[0])})
    inbox = write_inbox(tmp_path, {f"{PARQUET}/x.parquet": parquet_bytes(table)})
    frame = read(
        load_settings(config), PARQUET, inbox / PARQUET / "x.parquet", f"{PARQUET}/x.parquet"
    )
    first, second = frame.iter_rows(named=True)
    assert (first["specimen_id"], first["value_text"]) == ("[person]-S1", "[person]")
    assert "pq000001" not in " ".join(str(v) for k, v in first.items() if k != "person_token")
    assert (second["specimen_id"], second["value_text"]) == ("F-S2", "1.0")


def test_typed_columns_are_read_as_text_as_reported(config: Path, tmp_path: Path):
    table = pa.table({
        "person_token": ["WF-t1", None], "birth_year": pa.array([1960, 1971], pa.int32()), "sex": ["F", "M"],
        "district_code": ["WF01", "WF02"], "specimen_id": ["T1", "T2"],
        "collected_date": pa.array([dt.date(2025, 6, 2), dt.date(2025, 6, 3)]), "test_code": ["2160-0", "2160-0"],
        "value": pa.array([1.02, None]), "unit": ["mg/dL", "mg/dL"], "status": ["final", "final"],
        "fasting": pa.array([True, False]),
    })  # fmt: skip
    inbox = write_inbox(tmp_path, {f"{PARQUET}/t.parquet": parquet_bytes(table)})
    frame = read(
        load_settings(config), PARQUET, inbox / PARQUET / "t.parquet", f"{PARQUET}/t.parquet"
    )
    got = frame.select("line_no", "person_token", "birth_year_text", "collected_text", "collected_date",
                       "value_text", "fasting_text").rows()  # fmt: skip
    assert got == [
        (1, "WF-t1", "1960", "2025-06-02", dt.date(2025, 6, 2), "1.02", "true"),
        (
            2,
            None,
            "1971",
            "2025-06-03",
            dt.date(2025, 6, 3),
            "",
            "false",
        ),  # a null is an empty field
    ]


# --------------------------------------------------------------------------- broken files


def _flipped_in_a_data_page(table: pa.Table) -> bytes:
    """A file with page checksums, one byte of the first column's data page inverted."""
    data = bytearray(parquet_bytes(table, write_page_checksum=True, use_dictionary=False))
    chunk = pq.ParquetFile(pa.BufferReader(bytes(data))).metadata.row_group(0).column(0)
    last = chunk.data_page_offset + chunk.total_compressed_size - 1  # inside the page's values
    data[last] ^= 0xFF
    return bytes(data)


GOOD = parquet_bytes(sample_table(20))
BROKEN = {
    "truncated": (GOOD[:-100], "magic bytes not found in footer"),
    "cut_in_half": (GOOD[: len(GOOD) // 2], "magic bytes not found in footer"),
    "garbage": (b"this is not a parquet file, whatever its name says\n" * 20, "magic bytes not found"),
    "flipped_byte": (_flipped_in_a_data_page(sample_table(20)), "CRC checksum verification failed"),
    "empty": (b"", "the file is empty"),
    "missing_column": (parquet_bytes(sample_table(5).drop_columns(["unit"])), "missing required column(s) 'unit'"),
    "nested": (parquet_bytes(sample_table(2).append_column("notes", pa.array([["a"], ["b"]]))),
               "column 'notes' holds List"),
}  # fmt: skip


@pytest.mark.parametrize("case", sorted(BROKEN))
def test_a_broken_parquet_file_is_held_back_and_the_others_go_on(
    config: Path, tmp_path: Path, case: str
):
    content, reason = BROKEN[case]
    inbox = write_inbox(tmp_path, {
        f"{PARQUET}/a_{case}.parquet": content,
        f"{PARQUET}/b_good.parquet": GOOD,
        f"{STANDARD}/results_2025-06.csv": GOOD_CSV,
    })  # fmt: skip
    con = warehouse.connect(tmp_path / "w.duckdb")
    try:
        frames: list[pl.DataFrame] = []
        summary = land_inbox(
            con,
            load_settings(config),
            inbox,
            KEY,
            "2025-06",
            TODAY,
            sink=lambda _con, frame: frames.append(frame),
        )
        ledger = {
            p: (s, m, n)
            for p, s, m, n in rows(
                con, "select file_path, status, message, rows_read from ingest_files"
            )
        }
        landed = dict(pl.concat(frames).group_by("source_id").len().iter_rows())
    finally:
        con.close()
    status, message, read_ = ledger[f"{PARQUET}/a_{case}.parquet"]
    assert (status, read_) == ("held_back", 0)
    assert str(inbox / PARQUET / f"a_{case}.parquet") in message and reason in message, message
    assert ledger[f"{PARQUET}/b_good.parquet"][:1] == ("ingested",)
    assert ledger[f"{STANDARD}/results_2025-06.csv"][:1] == ("ingested",)
    assert landed == {PARQUET: 20, STANDARD: 1}
    assert summary.files_held_back == 1 and summary.files_new == 2


def test_a_parquet_extract_with_identifier_columns_is_refused(config: Path, tmp_path: Path):
    table = sample_table(10).append_column("patient_name", pa.array(["Maren Holloway"] * 10))
    inbox = write_inbox(tmp_path, {f"{PARQUET}/n.parquet": parquet_bytes(table)})
    con = warehouse.connect(tmp_path / "w.duckdb")
    try:
        land_inbox(
            con, load_settings(config), inbox, KEY, "2025-06", TODAY, sink=lambda _con, _frame: None
        )
        [(status, message)] = rows(con, "select status, message from ingest_files")
    finally:
        con.close()
    assert status == "held_back"
    assert (
        "refused by the identifier screen" in message
        and "column 'patient_name': person names" in message
    )
    assert "Maren" not in message


# --------------------------------------------------------------------------- a whole month


def test_a_parquet_file_runs_through_the_whole_month(config: Path, tmp_path: Path):
    inbox = write_inbox(tmp_path, {
        f"{PARQUET}/results_2025-06.parquet": parquet_bytes(sample_table()),
        f"{PARQUET}/results_2025-06_broken.parquet": GOOD[:-10],
        f"{STANDARD}/results_2025-06.csv": GOOD_CSV,
    })  # fmt: skip
    with run_month(config, inbox, tmp_path / "out", period="2025-06") as con:
        ledger = {r[0]: r[1:] for r in rows(con, """
            select file_path, status, rows_read, rows_accepted + rows_rejected + rows_superseded
                   + rows_duplicate + rows_withdrawn + rows_pending
            from ingest_files""")}  # fmt: skip
        accepted = dict(rows(con, "select source_id, count(*) from lab_results group by all"))
    status, read_, accounted = ledger[f"{PARQUET}/results_2025-06.parquet"]
    assert (
        status == "ingested" and read_ == accounted == sample_table().num_rows
    )  # every row accounted for
    assert ledger[f"{PARQUET}/results_2025-06_broken.parquet"][0] == "held_back"
    assert ledger[f"{STANDARD}/results_2025-06.csv"][:1] == ("ingested",)
    assert accepted[PARQUET] > 0.9 * read_ and accepted[STANDARD] == 1
