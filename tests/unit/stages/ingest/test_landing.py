"""``land_inbox`` hands each file's keyed rows to its sink as soon as the file is read: every
frame has the same columns and types (those the staging SQL reads, whether a run lands files
or none), and the frames are each file's rows in inbox order, keyed as ``add_person_keys``
keys them. The stage's result (a frozen ``Landed``) names the table of the files that gave rows
(``landed_files``, the name other SQL reads) and the counts.

Outside reference: DuckDB's own description of the table (``describe``) for the column types.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
from pathlib import Path

import polars as pl
import pytest

from pipeline.core.landed import empty_landed
from pipeline.core.pseudonymise import DEMO_KEY, PseudonymKey, add_person_keys
from pipeline.core.settings import load_settings
from pipeline.stages import validate
from pipeline.stages.ingest.inbox import scan_inbox
from pipeline.stages.ingest.landing import land_inbox, read_inbox_file
from pipeline.warehouse import connection as warehouse
from pipeline.warehouse import reference
from tests.conftest import ROOT, rows, write_inbox

TODAY = dt.date(2025, 7, 1)
KEY = PseudonymKey(secret=DEMO_KEY.encode(), is_demo=True)
SAMPLES = ROOT / "sample_extracts"
#: a landed frame as DuckDB describes it (the schema the staging SQL reads)
LANDED_TABLE = [
    ("source_id", "VARCHAR"), ("file_id", "BIGINT"), ("line_no", "BIGINT"), ("raw_text", "VARCHAR"),
    ("row_fault", "VARCHAR"), ("birth_year_text", "VARCHAR"), ("sex_text", "VARCHAR"),
    ("district_code", "VARCHAR"), ("specimen_id", "VARCHAR"), ("collected_text", "VARCHAR"),
    ("test_code", "VARCHAR"), ("test_code_text", "VARCHAR"), ("value_text", "VARCHAR"),
    ("value_clean", "VARCHAR"), ("unit_text", "VARCHAR"), ("status", "VARCHAR"), ("status_text", "VARCHAR"),
    ("height_text", "VARCHAR"), ("reported_text", "VARCHAR"), ("fasting_text", "VARCHAR"),
    ("collected_date", "DATE"), ("reported_date", "DATE"), ("reported_date_basis", "VARCHAR"),
    ("person_key", "VARCHAR"),
]  # fmt: skip


#: sample files of three sources and three layouts (four landed files: NDJSON is one)
SAMPLE_FILES = [
    "westerfold_general_lab/results_2025-05.csv", "westerfold_general_lab/results_2025-06.csv",
    "corvale_lab_chain/export_202506.csv", "fallowmere_reference_lab/2025-06/Patient.ndjson",
    "fallowmere_reference_lab/2025-06/Observation.ndjson",
]  # fmt: skip


def sample_inbox(tmp_path: Path, names: list[str]) -> Path:
    return write_inbox(tmp_path, {name: (SAMPLES / name).read_bytes() for name in names})


def described(con, frame: pl.DataFrame) -> list[tuple[str, str]]:
    relation = con.from_arrow(frame.to_arrow())
    return [
        (name, str(dtype)) for name, dtype in zip(relation.columns, relation.types, strict=False)
    ]


class Collect:
    """A sink that keeps what it is handed."""

    def __init__(self) -> None:
        self.frames: list[pl.DataFrame] = []

    def __call__(self, con, frame: pl.DataFrame) -> None:
        self.frames.append(frame)


def test_each_file_is_landed_as_read_and_the_table_keeps_its_schema(
    small_config: Path, tmp_path: Path
):
    settings = load_settings(small_config)
    inbox = sample_inbox(tmp_path, SAMPLE_FILES)
    items = scan_inbox(None, settings, inbox)
    con = warehouse.connect(tmp_path / "w.duckdb")
    try:
        sink, told = Collect(), []
        summary = land_inbox(con, settings, inbox, KEY, "2025-06", TODAY, sink=sink,
                             on_file=lambda *progress: told.append(progress))  # fmt: skip
        assert len(sink.frames) == 4
        # the progress display is told after each file: files done of those to take, rows so far
        assert [(done, total) for done, total, _ in told] == [(1, 4), (2, 4), (3, 4), (4, 4)]
        assert [r for *_, r in told] == sorted(r for *_, r in told)
        assert told[-1][2] == summary.rows_landed == sum(f.height for f in sink.frames)
        assert all(described(con, f) == LANDED_TABLE for f in [*sink.frames, empty_landed()])
        landed = pl.concat(sink.frames)
        # what each file reads as, keyed one file at a time without the run's cache
        expected = []
        for file_id, item in enumerate(items, start=1):
            item.file_id = file_id
            frame = read_inbox_file(
                settings.source(item.source_id), item, settings, TODAY, run_day=TODAY
            )
            expected.append(add_person_keys(frame, KEY))
        assert summary.files_new == len(items) == 4
        assert landed.equals(pl.concat(expected))
        assert landed["person_key"].null_count() < landed.height
        # a second run finds nothing new: the table is there, empty, with the same columns
        assert summary.files == "landed_files"
        with pytest.raises(dataclasses.FrozenInstanceError):
            summary.files = "other"  # type: ignore[misc]
        assert rows(con, f"select file_id from {summary.files} order by 1") == [
            (1,),
            (2,),
            (3,),
            (4,),
        ]
        # a second run finds nothing new: nothing is handed over, and no file is named
        again_sink = Collect()
        again = land_inbox(con, settings, inbox, KEY, "2025-06", TODAY, sink=again_sink)
        assert again.files_skipped == 4
        assert again_sink.frames == []
        assert rows(con, f"select count(*) from {again.files}") == [(0,)]
    finally:
        con.close()


def test_judging_file_by_file_equals_judging_the_run_at_once(small_config: Path, tmp_path: Path):
    """The validate rules read one row and the reference tables only (common practice for
    row-level rules; the reason the run judges each file as it lands): the judged rows of three
    files (two CSV layouts and a FHIR export) handed over one by one equal those of the same
    rows judged in one statement."""
    settings = load_settings(small_config)
    inbox = sample_inbox(
        tmp_path, [f for f in SAMPLE_FILES if not f.endswith("results_2025-06.csv")]
    )
    con = warehouse.connect(tmp_path / "w.duckdb")
    try:
        reference.load_reference_tables(con, settings)
        validate.begin_judging(con)
        sink = Collect()

        def judge_and_keep(con_, frame: pl.DataFrame) -> None:
            sink(con_, frame)
            validate.judge_file(con_, frame)

        land_inbox(con, settings, inbox, KEY, "2025-06", TODAY, sink=judge_and_keep)
        by_file = con.sql("select * from results_validated").pl()
        validate.begin_judging(con)
        validate.judge_file(con, pl.concat(sink.frames))
        at_once = con.sql("select * from results_validated").pl()
    finally:
        con.close()
    assert by_file.height == sum(f.height for f in sink.frames) > 0
    # the same rows, put in line order: the judging joins the reference tables, and a JOIN does
    # not keep row order (DuckDB 2.0 documentation, "Order preservation")
    assert by_file.sort("file_id", "line_no").equals(at_once.sort("file_id", "line_no"))
    # rejected rows keep their raw line; well-formed rows do not carry it
    assert by_file.filter(pl.col("reason_code").is_not_null())["raw_text"].null_count() == 0
    assert (
        by_file.filter(pl.col("reason_code").is_null())["raw_text"].null_count()
        == by_file.filter(pl.col("reason_code").is_null()).height
    )
    assert by_file["reason_code"].null_count() < by_file.height
