"""What the report reads: only publishable tables, and a blank count read as blanked only in a
row that suppressed counts.

Outside facts: a published output reads only disclosure-controlled tables (common practice in
official statistics: the report is a publication); a resident population is public already and
is never suppressed (common practice).
"""

from __future__ import annotations

import duckdb
import pytest

from pipeline.report.data import READABLE_TABLES, _is_blanked, _select


def test_the_report_reads_no_table_outside_its_list():
    con = duckdb.connect()
    con.execute("create table result_versions (person_key varchar)")
    assert "result_versions" not in READABLE_TABLES
    with pytest.raises(ValueError):
        _select(con, "result_versions", "select * from {t}")


def test_every_readable_table_is_published_reference_quality_or_the_runs_ledger():
    for name in READABLE_TABLES:
        schema = name.split(".")[0] if "." in name else "main"
        assert schema in ("published", "reference", "main"), name
        if schema == "main":
            assert name in (
                "source_quality",
                "source_rejection_reasons",
                "lab_egfr_agreement",
                "runs",
            )


def test_a_blank_is_blanked_only_where_the_row_suppressed_counts():
    assert _is_blanked({"persons": None, "suppression": "suppressed"}, "persons")
    assert not _is_blanked({"persons": None, "suppression": ""}, "persons")
    assert not _is_blanked({"persons": 12, "suppression": "suppressed"}, "persons")
