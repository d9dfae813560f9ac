"""``land_inbox`` inserts each file's keyed rows into ``landed_rows`` as soon as the file
is read: the table has the same columns and types whether a run lands files or none, and its
rows are each file's rows in inbox order, keyed as ``add_person_keys`` keys them.

Outside reference: DuckDB's own description of the table (``describe``) for the column types.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import polars as pl

from pipeline import warehouse
from pipeline.ingest import land_inbox, read_inbox_file, scan_inbox
from pipeline.pseudonymise import DEMO_KEY, PseudonymKey, add_person_keys
from pipeline.settings import load_settings
from tests.conftest import ROOT, rows, write_inbox

TODAY = dt.date(2025, 7, 1)
KEY = PseudonymKey(secret=DEMO_KEY.encode(), is_demo=True)
SAMPLES = ROOT / "sample_extracts"
#: landed_rows as DuckDB describes it (the schema the staging SQL reads)
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


def described(con) -> list[tuple[str, str]]:
    return [(r[0], r[1]) for r in rows(con, "describe landed_rows")]


def test_each_file_is_landed_as_read_and_the_table_keeps_its_schema(small_config: Path, tmp_path: Path):
    settings = load_settings(small_config)
    inbox = write_inbox(tmp_path, {
        "westerfold_general_lab/results_2025-05.csv": (SAMPLES / "westerfold_general_lab/results_2025-05.csv").read_bytes(),
        "westerfold_general_lab/results_2025-06.csv": (SAMPLES / "westerfold_general_lab/results_2025-06.csv").read_bytes(),
        "corvale_lab_chain/export_202506.csv": (SAMPLES / "corvale_lab_chain/export_202506.csv").read_bytes(),
        "fallowmere_reference_lab/2025-06/Patient.ndjson": (SAMPLES / "fallowmere_reference_lab/2025-06/Patient.ndjson").read_bytes(),
        "fallowmere_reference_lab/2025-06/Observation.ndjson": (SAMPLES / "fallowmere_reference_lab/2025-06/Observation.ndjson").read_bytes(),
    })  # fmt: skip
    items = scan_inbox(None, settings, inbox)
    con = warehouse.connect(tmp_path / "w.duckdb")
    try:
        summary = land_inbox(con, settings, inbox, KEY, "2025-06", TODAY)
        assert described(con) == LANDED_TABLE
        landed = con.sql("select * from landed_rows").pl()
        # what each file reads as, keyed one file at a time without the run's cache
        expected = []
        for file_id, item in enumerate(items, start=1):
            item.file_id = file_id
            frame = read_inbox_file(settings.source(item.source_id), item, settings, TODAY)
            expected.append(add_person_keys(frame, KEY))
        assert summary.files_new == len(items) == 4
        assert landed.equals(pl.concat(expected))
        assert landed["person_key"].null_count() < landed.height
        # a second run finds nothing new: the table is there, empty, with the same columns
        again = land_inbox(con, settings, inbox, KEY, "2025-06", TODAY)
        assert again.files_skipped == 4
        assert described(con) == LANDED_TABLE
        assert rows(con, "select count(*) from landed_rows") == [(0,)]
    finally:
        con.close()
