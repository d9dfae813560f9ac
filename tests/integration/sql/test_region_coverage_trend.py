"""Tests for sql/reports/region_coverage_trend.sql on a real run: coverage among persons with
lab-evidenced diabetes (HbA1c 6.5 % or more, ADA Standards of Care) as it stood at each month end,
counting only results reported by then. Each month's expected counts are worked out below."""

from __future__ import annotations

from pathlib import Path

from tests.conftest import rows, run_month, write_inbox

HEADER = (
    "person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,status,"
    "reported_at"
)
LINES = [
    # HbA1c 7.0 % on 2025-06-01 confirmed by a second on 06-15 (ADA: a second abnormal test),
    # reported the next day: diabetes from June
    "TOKT1,1960,F,WF01,S1,2025-06-01,4548-4,7.0,%,final,2025-06-02",
    "TOKT1,1960,F,WF01,S1B,2025-06-15,4548-4,7.2,%,final,2025-06-16",
    # ACR collected 07-10, reported 07-12: counts from the July month end
    "TOKT1,1960,F,WF01,S2,2025-07-10,9318-7,12,mg/g,final,2025-07-12",
    # creatinine collected 07-10 but reported 09-05: its eGFR counts only from the September month end
    "TOKT1,1960,F,WF01,S3,2025-07-10,2160-0,0.9,mg/dL,final,2025-09-05",
]


def test_each_month_end_counts_what_was_reported_by_then(tmp_path: Path, small_config: Path):
    inbox = write_inbox(
        tmp_path, {"westerfold_general_lab/results_2026-01.csv": "\n".join([HEADER, *LINES]) + "\n"}
    )
    with run_month(small_config, inbox, tmp_path / "out", period="2026-01") as con:
        got = {
            m: rest
            for m, *rest in rows(
                con,
                "select as_of_month, persons_with_diabetes, with_egfr, with_acr, "
                "with_egfr_and_acr from main.region_coverage_trend "
                "where period = '2026-01' order by as_of_month",
            )
        }
    assert list(got) == [f"2025-{m:02d}" for m in range(2, 13)] + ["2026-01"]
    assert got["2025-05"] == [0, 0, 0, 0]  # no diabetes evidence yet
    assert got["2025-06"] == [1, 0, 0, 0]  # diabetes, nothing else reported
    assert got["2025-07"] == [1, 0, 1, 0]  # the ACR reported 07-12; the eGFR not yet
    assert got["2025-08"] == [1, 0, 1, 0]
    assert got["2025-09"] == [1, 1, 1, 1]  # the creatinine reported 09-05
    assert got["2026-01"] == [1, 1, 1, 1]
