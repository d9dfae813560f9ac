"""Publishing a period again: the same figures are the same release; changed figures are a
revision only with a reason, and the earlier release stays readable (pipeline/run/revisions.py).

The rule checked is the project's own (README, "Revisions"); the persons and values are invented
(the fictional region Westerfold). Creatinine is LOINC 2160-0 in mg/dL (LOINC, common practice)."""

from __future__ import annotations

import csv
import json
from pathlib import Path

import duckdb
import pytest

from pipeline.run.flows import run_month_plain
from pipeline.run.revisions import RevisionNeeded
from tests.conftest import rows, write_inbox

LAB = "westerfold_general_lab"
HEADER = "person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,status,reported_at"
PERIOD = "2025-06"


def extract(prefix: str, persons: int) -> str:
    lines = [HEADER]
    for i in range(persons):
        for j, day in enumerate(("2025-01-10", "2025-05-20")):
            lines.append(
                f"WF-{prefix}{i:04d},1955,F,WF01,{prefix}{i:03d}{j},{day},2160-0,1.4,mg/dL,final,{day}"
            )
    return "\n".join(lines) + "\n"


def published(out: Path, query: str, params: list | None = None) -> list[tuple]:
    con = duckdb.connect(str(out / "surveillance.duckdb"), read_only=True)
    try:
        return rows(con, query, params)
    finally:
        con.close()


@pytest.fixture
def first_release(tmp_path, small_config):
    inbox = write_inbox(tmp_path, {f"{LAB}/results_2025-06.csv": extract("rv", 30)})
    out = tmp_path / "out"
    run_month_plain(PERIOD, str(small_config), str(inbox), str(out), demo=True)
    return small_config, inbox, out


def test_same_figures_again_is_the_same_release(first_release):
    config, inbox, out = first_release
    summary = run_month_plain(PERIOD, str(config), str(inbox), str(out), demo=True)
    assert summary["revision"]["number"] == 1 and "reason" not in summary["revision"]
    assert published(out, "select distinct revision from published.district_ckd_prevalence") == [
        (1,)
    ]
    assert not (out / PERIOD / "revisions").exists()


def test_changed_figures_without_a_reason_are_refused_and_change_nothing(first_release):
    config, inbox, out = first_release
    before = published(out, "select * from published.district_ckd_prevalence order by all")
    runs_before = published(out, "select run_id, revision from runs order by all")
    exports_before = (out / PERIOD / "district_ckd_prevalence.csv").read_bytes()
    # a lab resends June with results it had left out, reported within June
    write_inbox(
        inbox.parent, {f"{LAB}/results_2025-06_resent.csv": extract("lt", 20)}, name=inbox.name
    )
    with pytest.raises(RevisionNeeded, match="already published.*--revise"):
        run_month_plain(PERIOD, str(config), str(inbox), str(out), demo=True)
    assert published(out, "select * from published.district_ckd_prevalence order by all") == before
    assert published(out, "select run_id, revision from runs order by all") == runs_before
    assert (out / PERIOD / "district_ckd_prevalence.csv").read_bytes() == exports_before


def test_a_revision_keeps_the_earlier_release_readable(first_release):
    config, inbox, out = first_release
    old_csv = (out / PERIOD / "district_ckd_prevalence.csv").read_bytes()
    old_rows = published(
        out, "select * exclude (revision) from published.district_ckd_prevalence order by all"
    )
    write_inbox(
        inbox.parent, {f"{LAB}/results_2025-06_resent.csv": extract("lt", 20)}, name=inbox.name
    )
    summary = run_month_plain(PERIOD, str(config), str(inbox), str(out), demo=True,
                              revise="the lab resent June with 40 missing results")  # fmt: skip
    rev = summary["revision"]
    assert (rev["number"], rev["previous"]) == (2, 1)
    assert rev["reason"] == "the lab resent June with 40 missing results"
    assert (
        rev["headline_before"]["persons_tested_12m"] == 30
    )  # the invented extracts: 30 then 50 persons
    assert rev["headline_after"]["persons_tested_12m"] == 50
    # the warehouse: current release in published.*, the earlier one in published_history.*
    assert published(out, "select distinct revision from published.district_ckd_prevalence") == [
        (2,)
    ]
    assert published(out, "select * exclude (revision) from published_history.district_ckd_prevalence "
                          "where period = ? and revision = 1 order by all", [PERIOD]) == old_rows  # fmt: skip
    assert published(out, "select revision, revision_reason from runs order by revision") == [
        (1, None),
        (2, "the lab resent June with 40 missing results"),
    ]
    # the exports side by side
    assert (
        out / PERIOD / "revisions" / "1" / "district_ckd_prevalence.csv"
    ).read_bytes() == old_csv
    with (out / PERIOD / "district_ckd_prevalence.csv").open(encoding="utf-8") as fh:
        total = next(r for r in csv.DictReader(fh)
                     if r["district_code"] == "ALL" and r["sex"] == "ALL" and r["age_band"] == "ALL")  # fmt: skip
    assert total["persons_tested"] == "50" and total["revision"] == "2"
    # the report says so first
    report = (out / PERIOD / "report.html").read_text(encoding="utf-8")
    assert (
        'id="revision-banner"' in report and "the lab resent June with 40 missing results" in report
    )
    assert report.index("revision-banner") < report.index('id="headline"')
    manifest = json.loads((out / PERIOD / "run_manifest.json").read_text(encoding="utf-8"))
    assert manifest["revision"]["number"] == 2
    # running it again changes nothing: still revision 2, revision 1's exports still there
    again = run_month_plain(PERIOD, str(config), str(inbox), str(out), demo=True)
    assert again["revision"]["number"] == 2
    assert (
        out / PERIOD / "revisions" / "1" / "district_ckd_prevalence.csv"
    ).read_bytes() == old_csv


def test_a_run_lists_late_results_per_earlier_published_period(first_release):
    """June is published; July's run receives a resent June file (reported in June: it would
    change June) and July's own extract with results collected in June but reported in July
    (June is rebuilt as known at its end, so these can never change it)."""
    config, inbox, out = first_release
    july = [HEADER] + [f"WF-jl{i:04d},1955,F,WF01,jl{i:03d},2025-06-28,2160-0,1.1,mg/dL,final,2025-07-02"
                       for i in range(12)]  # fmt: skip
    write_inbox(inbox.parent, {f"{LAB}/results_2025-06_resent.csv": extract("lt", 20),
                               f"{LAB}/results_2025-07.csv": "\n".join(july) + "\n"}, name=inbox.name)  # fmt: skip
    summary = run_month_plain("2025-07", str(config), str(inbox), str(out), demo=True)
    assert summary["late_results"] == {"2025-06": 40}  # 20 persons, two results each
    assert summary["revision"]["number"] == 1  # July's first release; June untouched
    assert published(out, "select distinct revision from published.district_ckd_prevalence where period = ?",
                     [PERIOD]) == [(1,)]  # fmt: skip
