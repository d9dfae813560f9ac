"""The landed rows: the columns a reader hands to validation (the contract between the two)."""

from __future__ import annotations

import polars as pl

#: Columns of the landed frame, all text except where typed.
LANDED_COLUMNS = [
    "source_id", "file_id", "line_no", "raw_text", "row_fault",
    "linkage_domain", "person_token", "birth_year_text", "sex_text", "district_code",
    "specimen_id", "collected_text", "test_code", "test_code_text", "value_text", "value_clean",
    "unit_text", "status", "status_text", "height_text", "reported_text", "fasting_text",
]  # fmt: skip


def empty_landed() -> pl.DataFrame:
    """The landed rows of a file as the sink receives them, without rows: the landed columns
    without the token, the parsed dates, then the person key (the order a read and keyed file
    has).
    """
    schema = {c: pl.Int64 if c in ("file_id", "line_no") else pl.String
              for c in LANDED_COLUMNS if c not in ("person_token", "linkage_domain")}  # fmt: skip
    schema.update(
        collected_date=pl.Date,
        reported_date=pl.Date,
        reported_date_basis=pl.String,
        person_key=pl.String,
    )
    return pl.DataFrame(schema=schema)


_LANDED_SCHEMA = empty_landed().schema
