"""Tests for sql/reports/district_estimated_acr_sensitivity.sql on a real run: what counting
estimated albuminuria adds to the default counts. The rules checked, with their sources:
CKD confirmed by albuminuria at or above 30 mg/g lasting more than 3 months (KDIGO 2012, Kidney
Int Suppl 2013;3:1; this project's run of consecutive daily values spanning 90 days); a dipstick
of trace or 1+ stands for A2, 2+ or more for A3 (Sumida et al., Ann Intern Med 2020;173:426);
diabetes by HbA1c of 6.5 % or more, confirmed by a second test (ADA Standards of Care). Each person's expected effect is
worked out in the comments."""

from __future__ import annotations

from pathlib import Path

from tests.conftest import rows, run_month, write_inbox

HEADER = "person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,status"
LINES = [
    # P1 (WF01): only dipsticks, 2+ (A3) on 06-01 and 1+ (A2) on 09-15, 106 days apart: tested only
    # when estimates count (+1 tested), a run of 106 >= 90 days (+1 CKD); HbA1c 7.0 %: diabetes with
    # an estimated ACR only (+1 with ACR), no eGFR (+0 with both).
    "TOKP1,1960,F,WF01,S101,2025-06-01,5804-0,2+,,final",
    "TOKP1,1960,F,WF01,S102,2025-09-15,5804-0,1+,,final",
    "TOKP1,1960,F,WF01,S103,2025-06-01,4548-4,7.0,%,final",
    "TOKP1,1960,F,WF01,S104,2025-06-20,4548-4,7.2,%,final",  # a second test confirms diabetes (ADA)
    # P2 (WF01): creatinine (tested by default), dipsticks 61 days apart (no run of 90 days), HbA1c
    # 7.0 %: +1 with ACR, +1 with both (it has an eGFR).
    "TOKP2,1950,M,WF01,S201,2025-06-01,2160-0,1.0,mg/dL,final",
    "TOKP2,1950,M,WF01,S202,2025-06-01,5804-0,2+,,final",
    "TOKP2,1950,M,WF01,S203,2025-08-01,5804-0,1+,,final",
    "TOKP2,1950,M,WF01,S204,2025-06-01,4548-4,7.0,%,final",
    "TOKP2,1950,M,WF01,S205,2025-06-20,4548-4,7.2,%,final",
    # P3 (WF02): measured ACR 50 (05-01), dipstick 2+ (07-01), measured ACR 10 (08-15): the measured
    # A1 day breaks the run, which spans 61 days: nothing added.
    "TOKP3,1970,F,WF02,S301,2025-05-01,9318-7,50,mg/g,final",
    "TOKP3,1970,F,WF02,S302,2025-07-01,5804-0,2+,,final",
    "TOKP3,1970,F,WF02,S303,2025-08-15,9318-7,10,mg/g,final",
    # P4 (WF02): one measured ACR 40 (04-01, not confirmed by default: one day), dipstick 1+ on
    # 07-20, 110 days later: with the estimate the run spans 110 >= 90 days: +1 CKD.
    "TOKP4,1965,M,WF02,S401,2025-04-01,9318-7,40,mg/g,final",
    "TOKP4,1965,M,WF02,S402,2025-07-20,5804-0,1+,,final",
]


def test_added_counts_by_hand(tmp_path: Path, small_config: Path):
    inbox = write_inbox(
        tmp_path, {"westerfold_general_lab/results_2026-01.csv": "\n".join([HEADER, *LINES]) + "\n"}
    )
    with run_month(small_config, inbox, tmp_path / "out", period="2026-01") as con:
        got = {
            r[0]: r[1:]
            for r in rows(
                con,
                "select district_code, persons_tested_added, persons_ckd_added, "
                "with_acr_added, with_egfr_and_acr_added from "
                "main.district_estimated_acr_sensitivity where period = '2026-01'",
            )
        }
        assert got["WF01"] == (1, 1, 2, 1)
        assert got["WF02"] == (0, 1, 0, 0)
        assert got["ALL"] == (1, 2, 2, 1)
        # the default leaves them out: nobody here has confirmed CKD by default
        assert rows(
            con,
            "select persons_ckd from main.district_ckd_prevalence where district_code = 'ALL' "
            "and sex = 'ALL' and age_band = 'ALL'",
        ) == [(0,)]
        # every published count here is from 1 to 10: blank
        published = rows(
            con,
            "select persons_ckd_added from published.district_estimated_acr_sensitivity "
            "where district_code = 'ALL'",
        )
        assert published == [(None,)]
