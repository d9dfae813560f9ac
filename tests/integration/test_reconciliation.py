"""The same result arriving from two sources is counted once (DEVELOPERS.md, "The same result
from two sources"); different values, or two results of one source, are kept."""

from __future__ import annotations

from pathlib import Path

from tests.conftest import make_small_config, rows, run_month, write_inbox

STD = "person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,status,reported_at\n"
SEMI = "PatientRef;YearOfBirth;Gender;AreaCode;SampleNo;SampleDate;TestCode;Result;Units;State;ReportDate\n"


def _outcomes(tmp_path: Path, standard: str, semicolon: str) -> list[tuple]:
    config = make_small_config(tmp_path / "config")
    inbox = write_inbox(tmp_path, {
        "westerfold_general_lab/results_2026-01.csv": STD + standard,
        "corvale_lab_chain/export_202601.csv": SEMI + semicolon,
    })  # fmt: skip
    with run_month(config, inbox, tmp_path / "out") as con:
        return rows(
            con,
            "select source_id, line_no, outcome from result_versions order by source_id, line_no",
        )


def test_same_value_from_two_sources_is_one_result(tmp_path):
    # 97.24 umol/L / 88.4 = 1.10 mg/dL (1 mg/dL = 88.4 umol/L, DEVELOPERS.md, Methods and sources)
    got = _outcomes(
        tmp_path,
        "WF-r1,1960,F,WF01,G1,2026-01-10,2160-0,1.10,mg/dL,final,2026-01-12\n",
        "WF-r1;1960;F;WF01;C1;10/01/2026;CREA;97,24;µmol/l;F;11/01/2026\n",
    )
    # the one reported first (Corvale, 11 January) is kept
    assert got == [("corvale_lab_chain", 2, "accepted"), ("westerfold_general_lab", 2, "duplicate")]


def test_different_values_from_two_sources_are_two_results(tmp_path):
    got = _outcomes(
        tmp_path,
        "WF-r1,1960,F,WF01,G1,2026-01-10,2160-0,1.20,mg/dL,final,2026-01-12\n",
        "WF-r1;1960;F;WF01;C1;10/01/2026;CREA;97,24;µmol/l;F;11/01/2026\n",
    )
    assert [o for _, _, o in got] == ["accepted", "accepted"]


def test_two_equal_results_of_one_source_are_both_kept(tmp_path):
    got = _outcomes(
        tmp_path,
        "WF-r1,1960,F,WF01,G1,2026-01-10,2160-0,1.10,mg/dL,final,2026-01-12\n"
        "WF-r1,1960,F,WF01,G2,2026-01-10,2160-0,1.10,mg/dL,final,2026-01-12\n",
        "WF-r2;1970;M;WF02;C1;10/01/2026;CREA;80;µmol/l;F;11/01/2026\n",
    )
    assert [o for _, _, o in got] == ["accepted", "accepted", "accepted"]
