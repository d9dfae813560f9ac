"""The quality report tables agree with the ledger and with rejected_rows (no row lost)."""

from __future__ import annotations

from tests.conftest import make_small_config, rows, run_month, write_inbox

STD = "person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,status,reported_at\n"


def test_source_quality_and_reasons_balance(tmp_path):
    config = make_small_config(tmp_path / "config")
    inbox = write_inbox(tmp_path, {
        "westerfold_general_lab/results_2026-01.csv": STD
        + "WF-q1,1960,F,WF01,S1,2026-01-10,2160-0,1.0,mg/dL,final,2026-01-11\n"
        + "WF-q1,1960,F,WF01,S2,2026-01-10,2160-0,ND,mg/dL,final,2026-01-11\n"
        + "WF-q1,1960,F,WF01,S3,2026-01-10,2160-0,1.0,mmol/L,final,2026-01-11\n",
        "westerfold_general_lab/results_2026-02.csv": STD
        + "WF-q1,1960,F,WF01,S4,2026-02-10,2160-0,see note,mg/dL,final,2026-02-11\n",
    })  # fmt: skip
    with run_month(config, inbox, tmp_path / "out", period="2026-02") as con:
        quality = rows(con, "select extract_month, files, rows_read, rows_accepted, rows_rejected, "
                            "rejected_share from source_quality order by extract_month")  # fmt: skip
        reasons = rows(con, "select extract_month, reason_code, rows, example_line "
                            "from source_rejection_reasons order by all")  # fmt: skip
    assert quality == [("2026-01", 1, 3, 1, 2, round(2 / 3, 4)), ("2026-02", 1, 1, 0, 1, 1.0)]
    assert reasons == [
        ("2026-01", "not_numeric", 1, "westerfold_general_lab/results_2026-01.csv:3"),
        ("2026-01", "unit_incompatible", 1, "westerfold_general_lab/results_2026-01.csv:4"),
        ("2026-02", "not_numeric", 1, "westerfold_general_lab/results_2026-02.csv:2"),
    ]


def test_a_failed_batch_is_held_back_and_the_others_publish(tmp_path, monkeypatch):
    """The gate's wiring: a source whose batch fails its expectation suite is held back
    (its files marked, none of its rows stored), another source publishes, exit code 1."""
    import pipeline.run.flows as flows

    monkeypatch.setattr(
        flows, "_expectations", lambda ctx, con, judged: {"westerfold_general_lab": "suite failed"}
    )
    config = make_small_config(tmp_path / "config")
    semi = "PatientRef;YearOfBirth;Gender;AreaCode;SampleNo;SampleDate;TestCode;Result;Units;State;ReportDate\n"
    inbox = write_inbox(tmp_path, {
        "westerfold_general_lab/results_2026-01.csv": STD
        + "WF-q1,1960,F,WF01,S1,2026-01-10,2160-0,1.0,mg/dL,final,2026-01-11\n",
        "corvale_lab_chain/export_202601.csv": semi + "WF-q2;1970;M;WF02;C1;10/01/2026;CREA;80;µmol/l;F;11/01/2026\n",
    })  # fmt: skip
    with run_month(config, inbox, tmp_path / "out") as con:
        files = rows(con, "select source_id, status, message from ingest_files order by source_id")
        results = rows(con, "select source_id from lab_results")
        exit_code = rows(con, "select exit_code from runs")[0][0]
    assert files[0][:2] == ("corvale_lab_chain", "ingested")
    assert files[1][:2] == ("westerfold_general_lab", "held_back")
    assert "expectation suite" in files[1][2]
    assert results == [("corvale_lab_chain",)]
    assert exit_code == 1


def test_a_calibration_shift_at_one_lab_is_flagged(tmp_path):
    """A 20 % jump of one lab's median creatinine in one month (an assay or calibration change,
    common practice to watch for) is flagged; steady months are not."""
    config = make_small_config(tmp_path / "config")
    lines = []
    for month in range(1, 9):
        value = 1.00 if month == 8 else 0.80
        for n in range(30):  # 30 women of 50 a month: the minimum for a comparison
            lines.append(
                f"WF-c{month}{n:02d},1976,F,WF01,S{month}{n:02d},2025-{month:02d}-10,2160-0,"
                f"{value + (n % 5) * 0.01:.2f},mg/dL,final,2025-{month:02d}-11"
            )
    inbox = write_inbox(
        tmp_path, {"westerfold_general_lab/results_2025-08.csv": STD + "\n".join(lines) + "\n"}
    )
    with run_month(config, inbox, tmp_path / "out", period="2025-08") as con:
        flagged = rows(con, "select month, round(relative_change, 3) from source_creatinine_drift "
                            "where is_drift_flagged order by month")  # fmt: skip
    assert flagged == [("2025-08", 0.244)]  # median 1.02 against 0.82
