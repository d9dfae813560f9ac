"""Tests for pipeline.run.source_checks: ``sources check`` judges one file as a run would and
accounts for every row.

Outside facts: 30 February does not exist (Gregorian calendar; Python's ``datetime`` refuses it);
LOINC 2160-0 is creatinine in serum or plasma, mass per volume (LOINC, from memory); per file,
rows read = accepted + rejected + superseded + duplicate + withdrawn + pending (row accounting,
common practice of reconciliation).
"""

from __future__ import annotations

import datetime as dt

import pytest

from pipeline.core.settings import load_settings
from pipeline.run.source_checks import check_file
from tests.conftest import make_small_config

SOURCE = "westerfold_general_lab"
HEADER = "person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,status"
LINES = [
    "WF-a,1960,F,WF01,S1,2025-03-10,2160-0,1.0,mg/dL,final",  # line 2
    "WF-b,1955,M,WF02,S2,2025-03-11,2160-0,1.2,mg/dL,final",  # line 3
    "WF-c,1970,F,WF03,S3,2025-02-30,2160-0,0.9,mg/dL,final",  # line 4: no such day
    "WF-b,1955,M,WF02,S2,2025-03-11,2160-0,1.2,mg/dL,final",  # line 5: line 3 again
]


def test_every_row_is_judged_and_the_bad_date_is_named_by_line(tmp_path):
    with pytest.raises(ValueError):
        dt.date(2025, 2, 30)  # the outside fact the rejection rests on
    settings = load_settings(make_small_config(tmp_path / "config"))
    path = tmp_path / "results_2025-03.csv"
    path.write_text("\n".join([HEADER, *LINES]) + "\n", encoding="utf-8")
    report = check_file(settings, SOURCE, path)
    assert report.fault is None and report.period == "2025-03"
    assert report.rows_read == 4 == sum(report.outcomes.values())
    assert report.outcomes["accepted"] == 2 and report.outcomes["rejected"] == 1
    assert report.outcomes["duplicate"] == 1
    [(reason, (count, lines))] = report.reasons.items()
    assert count == 1 and lines[0][0] == 4


def test_a_file_that_is_not_text_is_a_whole_file_fault(tmp_path):
    settings = load_settings(make_small_config(tmp_path / "config"))
    path = tmp_path / "results_2025-03.csv"
    path.write_bytes(HEADER.encode("utf-16"))  # UTF-16 with its byte order mark: not UTF-8
    report = check_file(settings, SOURCE, path)
    assert report.fault and report.rows_read == 0
