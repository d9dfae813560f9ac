"""Five ordinary situations in which a monthly run used to give wrong or empty indicators
without a word, each run on invented data (the fictional region Westerfold):

1. an extract without report dates and without a month in its name (and a first history load);
2. sex codes the source config does not map;
3. a run with another pseudonymisation key (and the demo key against a real warehouse);
4. a configured source that sent nothing for the period;
5. the per-source table showing the whole warehouse instead of the period.

Facts checked are of the trade's own rules (common practice): an indicator "as of the period
end" counts only results collected and known by that day (DEVELOPERS.md, Design notes, two dates on every result);
every input row has one outcome, and per file the outcomes add up to the rows read.
"""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import duckdb
import pytest
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.core.errors import ConfigError
from pipeline.core.pseudonymise import (
    DEMO_KEY,
    KEY_ENV,
    KEY_FILE_ENV,
    KeyMismatch,
    KeyWeak,
    key_check_value,
    resolve_key,
)
from pipeline.core.settings import load_settings
from pipeline.run.flows import run_month_plain
from pipeline.warehouse.connection import WAREHOUSE_FILE
from tests.conftest import edit_pipeline_yaml, make_small_config, rows, write_inbox

LAB = "westerfold_general_lab"
HEADER = "person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,status\n"
REAL_KEY = "Wf-region-key-3kQ9xZ-invented-for-tests"
OTHER_KEY = "Wf-another-key-8pLm2R-invented-for-tests"


def creatinine_rows(
    month: str, n: int = 30, first: int = 0, sex: str = "FM", offset: int = 0
) -> str:
    """``n`` serum creatinine results (LOINC 2160-0, mg/dL) collected in ``month``, one person each."""
    return "".join(
        f"WF-{p:08x},{1950 + p % 40},{sex[p % len(sex)]},WF0{1 + p % 4},S{month}{p + offset:05d},"
        f"{month}-{1 + p % 27:02d},2160-0,{0.7 + (p % 30) / 50:.2f},mg/dL,final\n"
        for p in range(first, first + n)
    )


@pytest.fixture(autouse=True)
def no_key_in_env(monkeypatch):
    monkeypatch.delenv(KEY_ENV, raising=False)
    monkeypatch.delenv(KEY_FILE_ENV, raising=False)


def lab_results(out: Path) -> list[tuple]:
    with duckdb.connect(str(out / WAREHOUSE_FILE), read_only=True) as con:
        return rows(
            con,
            "select reported_date, reported_date_basis, count(*) from lab_results group by all order by all",
        )


# --------------------------------------------------------------------------- 1. dating


def test_an_undated_extract_is_known_at_the_end_of_the_run_period(tmp_path):
    """A lab sends its January extract as results.csv (no report date, no month in the name),
    after January has ended. Its rows are known on 31 January, not on the day of loading: the
    January run counts them (before, "persons with results up to 2026-01: 0")."""
    config = make_small_config(tmp_path / "config")
    inbox = write_inbox(tmp_path, {f"{LAB}/results.csv": HEADER + creatinine_rows("2026-01", 40)})
    summary = run_month_plain("2026-01", str(config), str(inbox), str(tmp_path / "out"), demo=True)
    assert summary["persons"] == 40
    assert lab_results(tmp_path / "out") == [(dt.date(2026, 1, 31), "run_period", 40)]
    assert summary["rows_outside_period"] == {}


def test_rows_reported_after_the_period_end_are_named_with_counts(tmp_path):
    """Rows reported after the period end wait for their month, and the run says so per source."""
    config = make_small_config(tmp_path / "config")
    late = "".join(
        line.rstrip("\n") + ",2026-02-03\n"
        for line in creatinine_rows("2026-01", 10).splitlines(True)
    )
    on_time = "".join(line.rstrip("\n") + ",2026-01-29\n" for line in creatinine_rows("2026-01", 20, first=10)
                      .splitlines(True))  # fmt: skip
    inbox = write_inbox(
        tmp_path,
        {f"{LAB}/results_2026-01.csv": HEADER.rstrip("\n") + ",reported_at\n" + on_time + late},
    )
    summary = run_month_plain("2026-01", str(config), str(inbox), str(tmp_path / "out"), demo=True)
    assert summary["persons"] == 20
    assert summary["rows_outside_period"] == {
        LAB: {"accepted": 30, "after_period_end": 10, "reported_after": 10, "collected_after": 0}
    }
    (note,) = summary["rows_outside_period_notes"]
    assert note.startswith(f"{LAB}: 10 of 30 accepted rows") and "backfill" in note
    manifest = json.loads((tmp_path / "out" / "2026-01" / "run_manifest.json").read_text())
    assert manifest["period_checks"]["rows_outside_period"][LAB]["after_period_end"] == 10
    report = (tmp_path / "out" / "2026-01" / "report.html").read_text()
    assert "Rows outside the period" in report and "10 of 30 accepted rows" in report


def test_a_first_history_load_gives_each_past_month_its_data(tmp_path):
    """A history sent as one undated file, loaded by running the months in order from the first
    (what 'kidneysurv backfill' does): each month counts the results collected by its end."""
    config = make_small_config(tmp_path / "config")
    history = (
        creatinine_rows("2026-01", 20)
        + creatinine_rows("2026-02", 20, first=20)
        + creatinine_rows("2026-03", 20, first=40)
    )
    inbox = write_inbox(tmp_path, {f"{LAB}/history.csv": HEADER + history})
    out = tmp_path / "out"
    first = run_month_plain("2026-01", str(config), str(inbox), str(out), demo=True)
    second = run_month_plain("2026-02", str(config), str(inbox), str(out), demo=True)
    third = run_month_plain("2026-03", str(config), str(inbox), str(out), demo=True)
    assert [first["persons"], second["persons"], third["persons"]] == [20, 40, 60]
    # the first run says that most of what it loaded counts from later months on
    assert first["rows_outside_period"][LAB]["collected_after"] == 40
    assert lab_results(out) == [
        (dt.date(2026, 1, 31), "run_period", 20),
        (dt.date(2026, 2, 28), "collected_month", 20),
        (dt.date(2026, 3, 31), "collected_month", 20),
    ]


# --------------------------------------------------------------------------- 2. unmapped codes


def test_unmapped_sex_codes_are_counted_and_hold_the_source_back(tmp_path):
    """A lab writing sex as W/M: 'W' is not a code of the standard layout. Before, W became
    unknown sex (no eGFR for half the results) without a word; now the run names the value, the
    rows and the key that maps it, and the share above the limit holds the source back."""
    config = make_small_config(tmp_path / "config")
    edit_pipeline_yaml(config, "quality_gate", "max_unmapped_share", 0.01)  # config/pipeline.yaml's
    inbox = write_inbox(
        tmp_path, {f"{LAB}/results_2026-01.csv": HEADER + creatinine_rows("2026-01", 40, sex="WM")}
    )
    summary = run_month_plain("2026-01", str(config), str(inbox), str(tmp_path / "out"), demo=True)
    assert summary["unmapped_codes"] == {
        LAB: {"sex": {"config_key": "sex_codes", "rows": 20, "values": {"W": 20}}}
    }
    assert LAB in summary["held_back_sources"] and "sex_codes" in summary["held_back_sources"][LAB]
    assert summary["exit_code"] == 1
    assert summary["sources"][LAB]["held_back"] == 40 and summary["sources"][LAB]["accepted"] == 0


def test_mapping_the_sex_code_gives_every_result_its_egfr(tmp_path):
    config = make_small_config(tmp_path / "config")
    path = config / "sources" / f"{LAB}.yaml"
    path.write_text(path.read_text() + "sex_codes: {W: F}\n")
    inbox = write_inbox(
        tmp_path, {f"{LAB}/results_2026-01.csv": HEADER + creatinine_rows("2026-01", 40, sex="WM")}
    )
    summary = run_month_plain("2026-01", str(config), str(inbox), str(tmp_path / "out"), demo=True)
    assert summary["unmapped_codes"] == {} and summary["held_back_sources"] == {}
    with duckdb.connect(str(tmp_path / "out" / WAREHOUSE_FILE), read_only=True) as con:
        assert rows(
            con, "select sex, count(*), count(egfr) from kidney_measures group by sex order by sex"
        ) == [("F", 20, 20), ("M", 20, 20)]


def test_unmapped_unit_and_status_below_the_limit_are_named_but_publish(tmp_path):
    config = make_small_config(tmp_path / "config")
    edit_pipeline_yaml(config, "quality_gate", "max_unmapped_share", 0.2)
    body = creatinine_rows("2026-01", 40)
    lines = body.splitlines(True)
    lines[0] = lines[0].replace("mg/dL", "mgdl")
    lines[1] = lines[1].replace(",final", ",FIN")
    lines[2] = lines[2].replace(",2160-0,", ",CREX,")
    inbox = write_inbox(tmp_path, {f"{LAB}/results_2026-01.csv": HEADER + "".join(lines)})
    summary = run_month_plain("2026-01", str(config), str(inbox), str(tmp_path / "out"), demo=True)
    assert summary["held_back_sources"] == {}
    got = summary["unmapped_codes"][LAB]
    assert got["unit"] == {"config_key": "unit_aliases", "rows": 1, "values": {"mgdl": 1}}
    assert got["status"] == {"config_key": "status_codes", "rows": 1, "values": {"FIN": 1}}
    assert got["test_code"] == {"config_key": "test_codes", "rows": 1, "values": {"CREX": 1}}
    assert set(got) == {"unit", "status", "test_code"}  # the 37 other rows carry nothing unmapped


# --------------------------------------------------------------------------- 3. the key


def test_a_run_with_another_key_refuses_to_start(tmp_path, monkeypatch):
    """One month keyed with another key would split every person from their history (persons
    5,971 -> 6,239, exit 0, before). Now the warehouse keeps a check value of its key."""
    config = make_small_config(tmp_path / "config")
    inbox = write_inbox(
        tmp_path, {f"{LAB}/results_2026-01.csv": HEADER + creatinine_rows("2026-01", 10)}
    )
    out = tmp_path / "out"
    monkeypatch.setenv(KEY_ENV, REAL_KEY)
    run_month_plain("2026-01", str(config), str(inbox), str(out))
    with duckdb.connect(str(out / WAREHOUSE_FILE), read_only=True) as con:
        ((check, demo),) = rows(con, "select check_value, demo_key from key_check")
    assert check == key_check_value(resolve_key(demo=False)) and demo is False
    assert REAL_KEY not in check and REAL_KEY.encode().hex() not in check
    monkeypatch.setenv(KEY_ENV, OTHER_KEY)
    with pytest.raises(KeyMismatch, match="not the one this warehouse was built with"):
        run_month_plain("2026-02", str(config), str(inbox), str(out))
    result = CliRunner().invoke(app, ["run", "--period", "2026-02", "--config", str(config),
                                      "--inbox", str(inbox), "--out", str(out)])  # fmt: skip
    assert result.exit_code == 2, result.output
    assert (
        "backfill" in result.output
        and OTHER_KEY not in result.output
        and REAL_KEY not in result.output
    )
    monkeypatch.setenv(KEY_ENV, REAL_KEY)  # the right key still works
    assert run_month_plain("2026-02", str(config), str(inbox), str(out))["period"] == "2026-02"


def test_the_demo_key_and_a_real_key_never_mix(tmp_path, monkeypatch):
    config = make_small_config(tmp_path / "config")
    inbox = write_inbox(
        tmp_path, {f"{LAB}/results_2026-01.csv": HEADER + creatinine_rows("2026-01", 10)}
    )
    run_month_plain("2026-01", str(config), str(inbox), str(tmp_path / "demo_out"), demo=True)
    monkeypatch.setenv(KEY_ENV, REAL_KEY)
    with pytest.raises(KeyMismatch, match="DEMO key"):
        run_month_plain("2026-01", str(config), str(inbox), str(tmp_path / "demo_out"))
    run_month_plain("2026-01", str(config), str(inbox), str(tmp_path / "real_out"))
    monkeypatch.delenv(KEY_ENV)
    with pytest.raises(KeyMismatch, match="demo key cannot be used"):
        run_month_plain("2026-01", str(config), str(inbox), str(tmp_path / "real_out"), demo=True)


@pytest.mark.parametrize(
    "weak",
    [
        "short-key-19-chars!",
        "a" * 40,
        "abababababababababababababab",
        " " * 30,
        " " + REAL_KEY,
        REAL_KEY + "\t",
    ],
)
def test_weak_keys_are_refused_with_how_to_make_one(monkeypatch, weak):
    monkeypatch.setenv(KEY_ENV, weak)
    with pytest.raises(KeyWeak) as refused:
        resolve_key(demo=False)
    message = str(refused.value)
    assert "secrets.token_urlsafe(32)" in message and (
        weak.strip() == "" or weak.strip() not in message
    )


def test_good_keys_and_the_demo_key_pass(monkeypatch):
    import secrets

    monkeypatch.setenv(KEY_ENV, secrets.token_urlsafe(32))  # the way the message says to make one
    assert not resolve_key(demo=False).is_demo
    monkeypatch.setenv(KEY_ENV, DEMO_KEY)
    assert resolve_key(demo=False).is_demo


# --------------------------------------------------------------------------- 4. missing deliveries


def test_a_source_with_no_extract_for_the_period_is_named(tmp_path):
    """One lab's January file is missing and another lab's folder does not exist: both are
    named (before, the run exited 0 and said nothing)."""
    config = make_small_config(tmp_path / "config")
    inbox = write_inbox(tmp_path, {
        f"{LAB}/results_2026-01.csv": HEADER + creatinine_rows("2026-01", 10),
        "corvale_lab_chain/export_202512.csv": "PatientRef;YearOfBirth\n",   # last month's, not January's
    })  # fmt: skip
    (inbox / "corvale_lab_chain" / "export_202512.csv").unlink()
    summary = run_month_plain("2026-01", str(config), str(inbox), str(tmp_path / "out"), demo=True)
    missing = summary["missing_sources"]
    assert set(missing) == {"corvale_lab_chain", "fallowmere_reference_lab"}
    assert missing["corvale_lab_chain"].startswith("no new extract for 2026-01")
    assert missing["fallowmere_reference_lab"].startswith("no inbox folder")
    assert summary["indicators_lack"] == ["corvale_lab_chain", "fallowmere_reference_lab"]
    assert summary["exit_code"] == 0  # default: warn
    manifest = json.loads((tmp_path / "out" / "2026-01" / "run_manifest.json").read_text())
    assert set(manifest["period_checks"]["missing_sources"]) == set(missing)
    report = (tmp_path / "out" / "2026-01" / "report.html").read_text()
    assert "Missing source" in report and "These indicators lack" in report


def test_a_missing_source_holds_the_period_when_configured(tmp_path):
    config = make_small_config(tmp_path / "config")
    edit_pipeline_yaml(config, "completeness", "missing_source", "hold")
    for other in ("corvale_lab_chain", "fallowmere_reference_lab"):
        path = config / "sources" / f"{other}.yaml"
        path.write_text(path.read_text() + "cadence: none\n")
    inbox = write_inbox(
        tmp_path, {f"{LAB}/results_2026-01.csv": HEADER + creatinine_rows("2026-01", 10)}
    )
    out = str(tmp_path / "out")
    assert run_month_plain("2026-01", str(config), str(inbox), out, demo=True)["exit_code"] == 0
    second = run_month_plain("2026-02", str(config), str(inbox), out, demo=True)
    assert set(second["missing_sources"]) == {LAB} and second["exit_code"] == 1


# --------------------------------------------------------------------------- 5. the period's counts


def test_the_per_source_table_is_the_periods_own(tmp_path):
    """A month that loaded no file shows no rows for the period (before: the warehouse's totals,
    identical from month to month), with the warehouse's totals apart."""
    config = make_small_config(tmp_path / "config")
    inbox = write_inbox(
        tmp_path, {f"{LAB}/results_2026-01.csv": HEADER + creatinine_rows("2026-01", 10)}
    )
    out = str(tmp_path / "out")
    first = run_month_plain("2026-01", str(config), str(inbox), out, demo=True)
    second = run_month_plain("2026-02", str(config), str(inbox), out, demo=True)
    assert first["sources"][LAB] == {
        "files": 1,
        "read": 10,
        "accepted": 10,
        "rejected": 0,
        "superseded": 0,
        "duplicate": 0,
        "withdrawn": 0,
        "pending": 0,
        "held_back": 0,
    }
    assert second["sources"] == {}
    assert second["warehouse_sources"][LAB]["read"] == 10


def test_a_held_back_file_balances_as_held_back_rows(tmp_path):
    """A held-back run read 1,001 rows and showed 0 accepted, 0 rejected; now its rows are
    counted as held back, so read = the sum of the outcomes for every file."""
    config = make_small_config(tmp_path / "config", max_rejection_rate=0.05)
    body = creatinine_rows("2026-01", 20)
    bad = "".join(
        line.replace(",mg/dL,", ",,")
        for line in creatinine_rows("2026-01", 5, first=20).splitlines(True)
    )
    inbox = write_inbox(tmp_path, {f"{LAB}/results_2026-01.csv": HEADER + body + bad})
    summary = run_month_plain("2026-01", str(config), str(inbox), str(tmp_path / "out"), demo=True)
    counts = summary["sources"][LAB]
    assert counts["read"] == 25 and counts["held_back"] == 25
    assert counts["read"] == sum(
        counts[k]
        for k in (
            "accepted",
            "rejected",
            "superseded",
            "duplicate",
            "withdrawn",
            "pending",
            "held_back",
        )
    )


# --------------------------------------------------------------------------- config


def test_an_invalid_date_format_is_refused_at_config_load(tmp_path):
    config = make_small_config(tmp_path / "config")
    path = config / "sources" / "corvale_lab_chain.yaml"
    path.write_text(
        path.read_text().replace('date_format: "%d/%m/%Y"', 'date_format: "dd/mm/yyyy"')
    )
    with pytest.raises(ConfigError, match="date_format.*does not read a whole date"):
        load_settings(config)
    path.write_text(
        path.read_text().replace('date_format: "dd/mm/yyyy"', 'date_format: "%d/%m/%Y%"')
    )
    with pytest.raises(ConfigError, match="lone '%'"):
        load_settings(config)


# --------------------------------------------------------------------------- sources check


def check(tmp_path: Path, name: str, body: str, *extra: str):
    path = tmp_path / name
    path.write_text(HEADER + body, encoding="utf-8")
    config = make_small_config(tmp_path / "config")
    edit_pipeline_yaml(config, "quality_gate", "max_unmapped_share", 0.01)  # config/pipeline.yaml's
    return path, CliRunner().invoke(
        app, ["sources", "check", LAB, str(path), "--config", str(config), *extra]
    )


def test_sources_check_names_unmapped_codes_and_exits_non_zero(tmp_path):
    """Before: "492 accepted" and exit 0 for a file whose 'W' sex code nothing maps."""
    _, result = check(tmp_path, "results_2026-01.csv", creatinine_rows("2026-01", 40, sex="WM"))
    assert result.exit_code == 1, result.output
    assert "unmapped sex: 20 rows ('W' x20); map them under 'sex_codes'" in result.output
    assert "would be held back" in result.output


def test_sources_check_shows_the_date_format_and_the_rows_outside_the_period(tmp_path):
    body = (
        creatinine_rows("2026-01", 30)
        + creatinine_rows("2026-02", 1, first=30)
        + creatinine_rows("2026-01", 1, first=31).replace("2026-01-05", "05/01/2026")
    )
    path, result = check(tmp_path, "results.csv", body, "--period", "2026-01")
    assert result.exit_code == 0, (
        result.output
    )  # 1 of 32 rejected: under the limit, nothing unmapped
    assert "no date_format in config/sources/westerfold_general_lab.yaml: ISO 8601" in result.output
    assert f"{path}:33:" in result.output
    assert (
        "outside 2026-01: 1 accepted rows collected or reported after 2026-01-31" in result.output
    )
    assert "(lines 32)" in result.output


def test_sources_check_of_a_clean_file_exits_zero(tmp_path):
    _, result = check(tmp_path, "results_2026-01.csv", creatinine_rows("2026-01", 30))
    assert result.exit_code == 0, result.output
    assert "outside 2026-01" not in result.output and "unmapped" not in result.output


def test_fasting_flags_are_mapped_by_fasting_codes_or_named(tmp_path):
    """A fasting flag 'J' is named until fasting_codes maps it; the usual Y/N spellings need none."""
    config = make_small_config(tmp_path / "config")
    header = HEADER.rstrip("\n") + ",fasting\n"
    body = "".join(
        line.rstrip("\n") + f",{'JNY'[i % 3]}\n"
        for i, line in enumerate(creatinine_rows("2026-01", 9).splitlines(True))
    )
    inbox = write_inbox(tmp_path, {f"{LAB}/results_2026-01.csv": header + body})
    summary = run_month_plain("2026-01", str(config), str(inbox), str(tmp_path / "out"), demo=True)
    assert summary["unmapped_codes"] == {
        LAB: {"fasting": {"config_key": "fasting_codes", "rows": 3, "values": {"J": 3}}}
    }
    path = config / "sources" / f"{LAB}.yaml"
    path.write_text(path.read_text() + "fasting_codes: {J: Y}\n")
    again = run_month_plain("2026-01", str(config), str(inbox), str(tmp_path / "out2"), demo=True)
    assert again["unmapped_codes"] == {}
