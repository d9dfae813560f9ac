"""Month by month equals all at once, and a past period rebuilt later equals what was published
then (the as-of principle of DEVELOPERS.md, Design notes). Runs without Prefect on the first months of the
shipped samples."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import duckdb
import pytest

from pipeline.core.periods import Period, months_between
from pipeline.run.flows import run_month_plain

REPO = Path(__file__).resolve().parents[2]
SAMPLES = REPO / "sample_extracts"
MONTHS = [p.label for p in months_between(Period.parse("2024-11"), Period.parse("2025-03"))]
SOURCES = ("westerfold_general_lab", "corvale_lab_chain", "fallowmere_reference_lab")

#: Per-period tables compared, keyed without file ids (they follow ingestion order).
PERIOD_TABLES = {
    "person_status": "person_key",
    "kidney_events": "person_key, rule_id",
    "published.district_ckd_prevalence": "district_code, sex, age_band",
    "published.district_screening_coverage": "district_code",
    "lab_egfr_agreement": "source_id, month",
    # the comparison's confirmed CKD, carried over for unchanged persons like kidney_events
    "equation_comparison_ckd": "person_key",
    "district_equation_change": "district_code, comparison",
}


def _files_of(month: str) -> list[Path]:
    compact = month.replace("-", "")
    return sorted(
        p for s in SOURCES for p in (SAMPLES / s).rglob("*")
        if p.is_file() and (month in p.as_posix() or compact in p.name)
    )  # fmt: skip


def _add_month(inbox: Path, month: str) -> None:
    for path in _files_of(month):
        target = inbox / path.relative_to(SAMPLES)
        target.parent.mkdir(parents=True, exist_ok=True)
        shutil.copy2(path, target)


def _snapshot(out: Path, period: str) -> dict[str, list[tuple]]:
    con = duckdb.connect(str(out / "surveillance.duckdb"), read_only=True)
    try:
        snap = {
            table: con.execute(
                f"select * from {table} where period = ? order by {order}", [period]
            ).fetchall()
            for table, order in PERIOD_TABLES.items()
        }
        snap["lab_results"] = con.execute(
            "select f.file_path, r.* exclude (file_id, file_sha256) from lab_results as r "
            "join ingest_files as f using (file_id) order by f.file_path, r.line_no"
        ).fetchall()
        snap["kidney_measures"] = con.execute(
            "select f.file_path, m.* exclude (file_id) from kidney_measures as m "
            "join ingest_files as f using (file_id) order by f.file_path, m.line_no, m.analyte"
        ).fetchall()
        snap["result_versions"] = con.execute(
            "select f.file_path, v.line_no, v.outcome from result_versions as v "
            "join ingest_files as f using (file_id) order by f.file_path, v.line_no"
        ).fetchall()
        snap["ingest_files"] = con.execute(
            "select file_path, sha256, status, rows_read, rows_accepted, rows_rejected, rows_superseded, "
            "rows_duplicate, rows_withdrawn, rows_pending from ingest_files order by file_path"
        ).fetchall()
    finally:
        con.close()
    return snap


@pytest.fixture(scope="module")
def month_by_month(tmp_path_factory):
    base = tmp_path_factory.mktemp("monthly")
    inbox, out = base / "inbox", base / "out"
    snapshots = {}
    for month in MONTHS:
        _add_month(inbox, month)
        run_month_plain(month, str(REPO / "config"), str(inbox), str(out), demo=True)
        snapshots[month] = _snapshot(out, month)
        con = duckdb.connect(str(out / "surveillance.duckdb"), read_only=True)
        try:
            snapshots[month]["_link"] = con.execute(
                "select persons, persons_recomputed from link_snapshots where period = ?", [month]
            ).fetchall()[0]
            snapshots[month]["_comparison"] = con.execute(
                "select persons_recomputed from equation_comparison_builds where period = ?",
                [month],
            ).fetchall()[0][0]
        finally:
            con.close()
        manifest = json.loads((out / month / "run_manifest.json").read_text(encoding="utf-8"))
        snapshots[month]["_settled"] = manifest["stages"]["validate"]["versions settled"]
    return snapshots


def test_later_months_settle_and_recompute_only_what_changed(month_by_month):
    """The equality below is only worth something if the monthly path was taken: from the
    fourth month on, new rows are under 30 % of the warehouse, so only the versions they touch
    are settled, and events are recomputed only for persons with changed results."""
    last = month_by_month[MONTHS[-1]]
    assert last["_settled"].endswith("(touched)"), last["_settled"]
    persons, recomputed = last["_link"]
    assert 0 < recomputed < persons, last["_link"]
    # the equation comparison too: only persons the link stage computed anew (those with an eGFR)
    assert 0 < last["_comparison"] <= recomputed, (last["_comparison"], recomputed)


def _all_at_once(tmp_path: Path, period: str) -> dict[str, list[tuple]]:
    inbox, out = tmp_path / "inbox", tmp_path / "out"
    for month in MONTHS:
        _add_month(inbox, month)
    run_month_plain(period, str(REPO / "config"), str(inbox), str(out), demo=True)
    return _snapshot(out, period)


def test_month_by_month_equals_one_run_over_all_months(month_by_month, tmp_path):
    once = _all_at_once(tmp_path, MONTHS[-1])
    for table, rows in month_by_month[MONTHS[-1]].items():
        if not table.startswith("_"):
            assert once[table] == rows, table


def test_a_past_period_rebuilt_later_is_what_was_known_then(month_by_month, tmp_path):
    """All five months are in the inbox, but the period is the second: results reported later,
    amendments and cancellations reported later included, must not reach back."""
    period = MONTHS[1]
    later = _all_at_once(tmp_path, period)
    for table in PERIOD_TABLES:
        assert later[table] == month_by_month[period][table], table
