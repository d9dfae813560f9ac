"""Tests for pipeline.core.landed: the contract between the readers and validation.

Outside facts: the person token is replaced by its keyed hash before anything lands (HMAC,
RFC 2104; "pseudonymisation" in the sense of GDPR Art. 4(5)), so no landed frame has a token
column; line numbers and file ids are whole numbers, dates are calendar dates (ISO 8601).
"""

from __future__ import annotations

import polars as pl

from pipeline.core.landed import LANDED_COLUMNS, empty_landed


def test_the_empty_frame_has_no_rows_and_no_token():
    frame = empty_landed()
    assert frame.height == 0
    assert "person_token" not in frame.columns and "linkage_domain" not in frame.columns
    assert "person_key" in frame.columns


def test_the_columns_are_the_landed_ones_then_the_parsed_dates_and_the_key():
    frame = empty_landed()
    kept = [c for c in LANDED_COLUMNS if c not in ("person_token", "linkage_domain")]
    assert frame.columns == kept + ["collected_date", "reported_date", "reported_date_basis",
                                    "person_key"]  # fmt: skip
    assert len(set(frame.columns)) == len(frame.columns)


def test_the_types_are_whole_numbers_dates_and_text():
    schema = empty_landed().schema
    assert schema["file_id"] == schema["line_no"] == pl.Int64
    assert schema["collected_date"] == schema["reported_date"] == pl.Date
    others = set(schema) - {"file_id", "line_no", "collected_date", "reported_date"}
    assert {schema[c] for c in others} == {pl.String}
