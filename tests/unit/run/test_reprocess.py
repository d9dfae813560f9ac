"""Reprocessing a source under a corrected config (pipeline/run/reprocess.py) and the config-drift
check of every run.

The reference for "correct" is a clean run of the same files under the corrected config: a
source mapped wrongly, then fixed and reprocessed, must give exactly its tables. The fact the
scenario rests on: the CKD-EPI 2021 equation needs the person's sex (Inker et al., NEJM 2021),
so rows whose sex code is not mapped (``W`` for female, a lab's own code) get no eGFR. The lab,
persons and values are invented (the fictional region Westerfold)."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import duckdb
import pytest
import yaml

from pipeline.run.flows import run_month_plain
from pipeline.run.reprocess import ReprocessRefused, reprocess_source
from tests.conftest import ROOT, make_small_config, rows, write_inbox

LAB = "corvale_lab_chain"
HEADER = "PatientRef;YearOfBirth;Gender;AreaCode;SampleNo;SampleDate;TestCode;Result;Units;State;ReportDate"


def extract(month: str, persons: int, offset: int = 0) -> str:
    """A delimited extract in the lab's own layout: creatinine in µmol/L, women coded W."""
    lines = [HEADER]
    for i in range(offset, offset + persons):
        sex = "W" if i % 3 else "M"
        for j, day in enumerate(("03", "20")):
            value = f"{80 + (i * 7) % 90},{j}"
            lines.append(
                f"WF-rp{i:04d};{1940 + i % 50};{sex};WF01;RP{month}{i:03d}{j};"
                f"{day}/{month[5:]}/{month[:4]};CREA;{value};µmol/l;F;{day}/{month[5:]}/{month[:4]}"
            )
    return "\n".join(lines) + "\n"


FILES = {
    f"{LAB}/export_202505.csv": extract("2025-05", 30),
    f"{LAB}/export_202506.csv": extract("2025-06", 30, 10),
}


def fix_sex_codes(config: Path) -> None:
    path = config / "sources" / f"{LAB}.yaml"
    data = yaml.safe_load(path.read_text(encoding="utf-8"))
    data["sex_codes"] = {"W": "F", "M": "M"}
    path.write_text(yaml.safe_dump(data, sort_keys=False, allow_unicode=True), encoding="utf-8")


def tables(out: Path, period: str) -> dict[str, list[tuple]]:
    con = duckdb.connect(str(out / "surveillance.duckdb"), read_only=True)
    try:
        got = {
            "lab_results": rows(con, "select * from lab_results order by file_id, line_no"),
            "result_versions": rows(con, "select * from result_versions order by file_id, line_no"),
            "rejected_rows": rows(con, "select * from rejected_rows order by file_id, line_no"),
            "kidney_measures": rows(con, "select * from kidney_measures order by all"),
            "kidney_events": rows(
                con, "select * from kidney_events where period = ? order by all", [period]
            ),
            "person_status": rows(
                con, "select * from person_status where period = ? order by all", [period]
            ),
            "ingest_files": rows(
                con, "select * exclude (ingested_at, file_stat) from ingest_files order by file_id"
            ),
        }
        for (name,) in rows(
            con, "select table_name from duckdb_tables() where schema_name = 'published' order by 1"
        ):
            got[f"published.{name}"] = rows(
                con, f"select * exclude (revision) from published.{name} order by all"
            )
        return got
    finally:
        con.close()


def count(out: Path, query: str) -> int:
    con = duckdb.connect(str(out / "surveillance.duckdb"), read_only=True)
    try:
        return rows(con, query)[0][0]
    finally:
        con.close()


@pytest.fixture
def wrongly_mapped(tmp_path):
    """Two months published under a config that leaves the lab's sex code W unmapped; the
    config is then corrected (the wrong one is kept for the drift test)."""
    wrong = make_small_config(tmp_path / "wrong")
    fixed = make_small_config(tmp_path / "fixed")
    fix_sex_codes(fixed)
    inbox = write_inbox(tmp_path, FILES)
    out = tmp_path / "out"
    run_month_plain("2025-05", str(wrong), str(inbox), str(out), demo=True)
    run_month_plain("2025-06", str(wrong), str(inbox), str(out), demo=True)
    return wrong, fixed, inbox, out


def test_fixed_and_reprocessed_equals_a_clean_run_under_the_fixed_config(wrongly_mapped, tmp_path):
    _, fixed, inbox, out = wrongly_mapped
    unmapped = count(out, "select count(*) from lab_results where sex = 'U'")
    assert unmapped == 80  # 20 of 30 persons per file are W, two results each, two files
    assert count(out, "select count(*) from kidney_measures where egfr is null") >= unmapped

    # the dry run shows the difference and changes nothing
    before = tables(out, "2025-06")
    dry = reprocess_source(fixed, inbox, out, LAB, demo=True)
    assert not dry.applied and dry.files == sorted(FILES)
    assert dry.outcomes["accepted"] == (120, 120)  # the same rows, now with their sex
    assert dry.periods == ["2025-05", "2025-06"]
    assert tables(out, "2025-06") == before
    assert count(out, "select count(*) from reprocess_log") == 0

    applied = reprocess_source(fixed, inbox, out, LAB, apply=True, demo=True)
    assert applied.applied
    assert count(out, "select count(*) from lab_results where sex = 'U'") == 0
    # nothing deleted: the rows made under the wrong config are kept as superseded versions
    assert (
        count(out, "select count(*) from result_versions_replaced where outcome = 'superseded'")
        == 120
    )
    assert count(out, "select count(*) from result_versions_replaced where sex = 'U'") == unmapped
    assert count(out, "select count(distinct config_sha256) from ingest_files") == 1
    # applying it again is a no-op: every file is already made under the current config
    again = reprocess_source(fixed, inbox, out, LAB, apply=True, demo=True)
    assert again.files == [] and again.skipped_current == sorted(FILES)

    # the reference: a clean run of the same months under the fixed config
    clean = tmp_path / "clean"
    for period in ("2025-05", "2025-06", "2025-07"):
        run_month_plain(period, str(fixed), str(inbox), str(clean), demo=True)
    # the next month straight after the reprocess: no new file, so without the reprocess's
    # reset of the link snapshots it would carry June's events over from the wrong rows
    run_month_plain("2025-07", str(fixed), str(inbox), str(out), demo=True)
    got, want = tables(out, "2025-07"), tables(clean, "2025-07")
    for name in ("lab_results", "kidney_measures", "kidney_events", "person_status"):
        assert got[name] == want[name], name
    # the periods it reaches are then published again, as revisions
    for period in applied.periods:
        run_month_plain(
            period, str(fixed), str(inbox), str(out), demo=True, revise="sex code W mapped to F"
        )
    for period in ("2025-06", "2025-07"):
        got, want = tables(out, period), tables(clean, period)
        assert got.keys() == want.keys()
        for name in want:
            assert got[name] == want[name], (period, name)


def test_a_run_after_a_config_change_says_so_and_holds_the_new_files_back(wrongly_mapped):
    _, fixed, inbox, out = wrongly_mapped
    write_inbox(
        inbox.parent, {f"{LAB}/export_202507.csv": extract("2025-07", 5, 50)}, name=inbox.name
    )
    summary = run_month_plain("2025-07", str(fixed), str(inbox), str(out), demo=True)
    assert LAB in summary["config_drift"]
    assert "kidneysurv reprocess corvale_lab_chain" in summary["config_drift"][LAB]
    assert list(summary["held_back_files"]) == [f"{LAB}/export_202507.csv"]
    assert count(out, "select count(*) from result_versions where file_id = 3") == 0
    assert 'id="config-drift"' in (out / "2025-07" / "report.html").read_text(encoding="utf-8")
    assert count(out, "select exit_code from runs where period = '2025-07'") == 1


def test_a_missing_or_changed_file_is_refused_by_name(wrongly_mapped):
    _, fixed, inbox, out = wrongly_mapped
    before = tables(out, "2025-06")
    moved = inbox / LAB / "export_202506.csv"
    content = moved.read_bytes()
    moved.unlink()
    with pytest.raises(
        ReprocessRefused, match="export_202506.csv: ingested earlier but no longer in the inbox"
    ):
        reprocess_source(fixed, inbox, out, LAB, apply=True, demo=True)
    moved.write_bytes(content.replace(b"WF-rp0010", b"WF-rp9999"))
    with pytest.raises(ReprocessRefused, match="export_202506.csv: its content differs"):
        reprocess_source(fixed, inbox, out, LAB, apply=True, demo=True)
    # one file only: the unchanged one
    only = reprocess_source(fixed, inbox, out, LAB, file=f"{LAB}/export_202505.csv", demo=True)
    assert only.files == [f"{LAB}/export_202505.csv"]
    assert tables(out, "2025-06") == before


KILLED = """
import sys
sys.path.insert(0, sys.argv[1])
from pipeline.run.reprocess import reprocess_source
reprocess_source(sys.argv[2], sys.argv[3], sys.argv[4], "corvale_lab_chain", apply=True, demo=True)
"""


@pytest.mark.parametrize("point", ["reprocess:replaced", "reprocess:before_commit"])
def test_a_reprocess_killed_midway_leaves_the_previous_state(wrongly_mapped, point):
    _, fixed, inbox, out = wrongly_mapped
    before = tables(out, "2025-06")
    env = {**os.environ, "KIDNEYSURV_FAULT_AT": point}
    done = subprocess.run([sys.executable, "-c", KILLED, str(ROOT), str(fixed), str(inbox), str(out)],
                          env=env, capture_output=True, text=True, timeout=300, check=False)  # fmt: skip
    assert done.returncode == -9, done.stderr  # SIGKILL
    assert tables(out, "2025-06") == before
    assert count(out, "select count(*) from result_versions_replaced") == 0
    # and the next reprocess does it whole
    assert reprocess_source(fixed, inbox, out, LAB, apply=True, demo=True).applied


def test_one_earlier_file_passes_the_expectation_suites(wrongly_mapped):
    """With Great Expectations on, the batch of a reprocess is one earlier file: the suites'
    row balance counts that file, not every later one of the source."""
    from tests.conftest import edit_pipeline_yaml

    _, fixed, inbox, out = wrongly_mapped
    edit_pipeline_yaml(fixed, "quality_gate", "great_expectations", True)
    edit_pipeline_yaml(fixed, "quality_gate", "quality_pages", "never")
    done = reprocess_source(
        fixed, inbox, out, LAB, file=f"{LAB}/export_202505.csv", apply=True, demo=True
    )
    assert done.applied and done.files == [f"{LAB}/export_202505.csv"]
    assert done.outcomes["accepted"] == (60, 60)


def test_rows_without_a_report_date_keep_the_one_they_were_first_given(tmp_path):
    """A file with no month in its name and no report dates: its rows are known at the end of
    the period of the run that first ingested it (README, "two dates on every result"), and a
    reprocess months later must not move them to another date."""
    config = make_small_config(tmp_path / "config")
    text = ("person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,status\n"
            + "".join(f"WF-nd{i:04d},1950,W,WF01,ND{i:03d},2025-06-1{i % 10},2160-0,1.2,mg/dL,final\n"
                      for i in range(15)))  # fmt: skip
    inbox = write_inbox(tmp_path, {"westerfold_general_lab/undated_extract.csv": text})
    out = tmp_path / "out"
    run_month_plain("2025-06", str(config), str(inbox), str(out), demo=True)
    before = count(out, "select count(distinct reported_date::varchar) || ' ' || max(reported_date)::varchar "
                        "from result_versions")  # fmt: skip
    path = config / "sources" / "westerfold_general_lab.yaml"
    data = yaml.safe_load(path.read_text(encoding="utf-8"))
    data["sex_codes"] = {"W": "F"}
    path.write_text(yaml.safe_dump(data, sort_keys=False), encoding="utf-8")
    assert reprocess_source(
        config, inbox, out, "westerfold_general_lab", apply=True, demo=True
    ).applied
    assert count(out, "select count(*) from lab_results where sex = 'F'") == 15
    after = count(out, "select count(distinct reported_date::varchar) || ' ' || max(reported_date)::varchar "
                       "from result_versions")  # fmt: skip
    assert after == before == "1 2025-06-30"
