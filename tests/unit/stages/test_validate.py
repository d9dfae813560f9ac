"""Tests for the validate stage (pipeline.stages.validate and its SQL), through run_month_plain on tiny
invented inboxes: one reason code per broken rule, comparators, versions and duplicates, the
per-file balance, re-running a month, and the quality gate.

Row-level expectations rest on the FHIR R4 Observation status value set (final, amended,
corrected, cancelled, entered-in-error, preliminary), on unit facts listed beside each check,
and on the plausible ranges of config/pipeline.yaml ("common practice")."""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.conftest import make_small_config, rows, run_month, write_inbox

LAB = "westerfold_general_lab"  # the shipped standard-layout source (three-key config)
HEADER = "person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,status,reported_at"
CREA, ACR = (
    "2160-0",
    "9318-7",
)  # LOINC: creatinine serum/plasma mass/volume; albumin/creatinine urine


def row(spec: str, value: str, *, unit: str = "mg/dL", code: str = CREA, status: str = "final",
        token: str = "WF-val0001", born: str = "1960", collected: str = "2025-06-02",
        reported: str = "2025-06-03") -> str:  # fmt: skip
    return f"{token},{born},F,WF01,{spec},{collected},{code},{value},{unit},{status},{reported}"


def csv_text(lines: list[str]) -> str:
    return "\n".join([HEADER, *lines]) + "\n"


# Each rule broken once; the line number of a row is its index + 2 (header is line 1).
RULE_ROWS = {
    "see_note": (row("R01", "see note"), "not_numeric"),
    "blank": (row("R02", ""), "not_numeric"),
    "nan": (row("R03", "NaN"), "not_numeric"),
    # mmol/L is a unit of urine creatinine and glucose, never of serum creatinine (analytes.yaml)
    "crea_mmol": (row("R04", "0.09", unit="mmol/L"), "unit_incompatible"),
    # mg/L is a concentration (urine albumin), not a ratio
    "acr_mg_l": (row("R05", "30", unit="mg/L", code=ACR), "unit_incompatible"),
    # 85 mg/dL is far outside creatinine's range; as 85 umol/L (0.96 mg/dL) it is ordinary
    "crea_85": (row("R06", "85"), "implausible_for_unit"),
    "crea_zero": (row("R07", "0"), "out_of_range"),
    "crea_negative": (row("R08", "-1"), "out_of_range"),
    "unknown_code": (row("R09", "1.0", code="9999-9"), "unknown_test_code"),
    # 2025 is not a leap year
    "feb_29": (row("R10", "1.0", collected="2025-02-29"), "invalid_date"),
    "future": (row("R11", "1.0", collected="2025-06-20", reported="2025-06-10"), "future_date"),
    "before_birth": (row("R12", "1.0", born="2030"), "collected_before_birth"),
    "age_125": (row("R13", "1.0", born="1900"), "age_over_120"),
    # a birth year no calendar date can hold (found by the reader property test): rejected, and
    # the mid-year age estimate never builds a date from it (which aborted the run's transaction)
    "born_absurd": (row("R13b", "1.0", born="-175532933"), "invalid_birth_year"),
    "short_row": (
        "WF-val0001,1960,F,WF01,R14,2025-06-02,2160-0,1.0,mg/dL,final",
        "wrong_field_count",
    ),
    "bad_status": (row("R15", "1.0", status="done"), "unknown_status"),
    "no_token": (row("R16", "1.0", token=""), "missing_person"),
}
ACCEPTED_ROWS = {
    "lt": row("A01", "<0.2"),
    "ge": row("A02", ">=300", unit="mg/g", code=ACR),
    "le_unicode": row("A03", "≤3", unit="mg/mmol", code=ACR),
    "umol": row("A04", "88.4", unit="umol/L"),
    "alias": row("A05", "1.2", unit="mg/dl"),
}
# Versions of one result: same source + specimen + analyte (without specimen: same person,
# collection date and analyte); the latest report wins.
VERSION_ROWS = [
    ("amend_old", row("V01", "1.0", status="final", reported="2025-06-03"), "superseded"),
    ("amend_new", row("V01", "1.1", status="amended", reported="2025-06-05"), "accepted"),
    ("cancel_old", row("V02", "1.0", status="final", reported="2025-06-03"), "superseded"),
    ("cancel_new", row("V02", "", status="cancelled", unit="", reported="2025-06-06"), "withdrawn"),
    ("prelim_old", row("V03", "1.3", status="preliminary", reported="2025-06-02"), "superseded"),
    ("prelim_final", row("V03", "1.4", status="final", reported="2025-06-04"), "accepted"),
    ("prelim_alone", row("V04", "1.5", status="preliminary"), "pending"),
    ("twice_first", row("V05", "0.9"), "accepted"),
    ("twice_second", row("V05", "0.9"), "duplicate"),
    ("nospec_old", row("", "2.0", token="WF-val0002", reported="2025-06-03"), "superseded"),
    (
        "nospec_new",
        row("", "2.1", token="WF-val0002", status="corrected", reported="2025-06-07"),
        "accepted",
    ),
]


def line_of(keys: list[str], key: str) -> int:
    return keys.index(key) + 2


@pytest.fixture(scope="module")
def rules_run(tmp_path_factory):
    """One run over a rules file, a versions file and a copy of the versions file."""
    base = tmp_path_factory.mktemp("validate")
    config = make_small_config(base / "config")
    versions = csv_text([r for _, r, _ in VERSION_ROWS])
    inbox = write_inbox(base, {
        f"{LAB}/results_2025-06.csv": csv_text([r for r, _ in RULE_ROWS.values()] + list(ACCEPTED_ROWS.values())),
        f"{LAB}/versions_2025-06.csv": versions,
        f"{LAB}/versions_2025-06_copy.csv": versions,
    })  # fmt: skip
    con = run_month(config, inbox, base / "out", period="2025-06")
    yield con
    con.close()


def file_id(con, name: str) -> int:
    return rows(con, "select file_id from ingest_files where file_path = ?", [f"{LAB}/{name}"])[0][
        0
    ]


@pytest.mark.parametrize("case", list(RULE_ROWS))
def test_reason_code(rules_run, case):
    keys = list(RULE_ROWS)
    found = rows(
        rules_run,
        "select reason_code, message, raw_text from rejected_rows where file_id = ? and line_no = ?",
        [file_id(rules_run, "results_2025-06.csv"), line_of(keys, case)],
    )
    assert len(found) == 1, f"{case}: not rejected"
    reason, message, raw = found[0]
    assert reason == RULE_ROWS[case][1]
    assert message
    assert "WF-val0001" not in (raw or "")


def test_rejected_rows_are_not_results(rules_run):
    fid = file_id(rules_run, "results_2025-06.csv")
    [(n_rejected,)] = rows(rules_run, "select count(*) from rejected_rows where file_id = ?", [fid])
    [(n_versions,)] = rows(
        rules_run, "select count(*) from result_versions where file_id = ?", [fid]
    )
    assert n_rejected == len(RULE_ROWS)
    assert n_versions == len(ACCEPTED_ROWS)


def accepted(con, key: str) -> tuple:
    line = len(RULE_ROWS) + list(ACCEPTED_ROWS).index(key) + 2
    found = rows(
        con,
        "select comparator, value, unit, value_text from lab_results where file_id = ? and line_no = ?",
        [file_id(con, "results_2025-06.csv"), line],
    )
    assert len(found) == 1, f"{key} not in lab_results"
    return found[0]


def test_comparators_are_kept(rules_run):
    assert accepted(rules_run, "lt")[:3] == ("<", 0.2, "mg/dL")
    assert accepted(rules_run, "ge")[:3] == (">=", 300.0, "mg/g")
    cmp, value, unit, text = accepted(rules_run, "le_unicode")
    assert (cmp, unit, text) == ("<=", "mg/g", "≤3")
    # 1 mg/mmol = 8.84 mg/g (DEVELOPERS.md, Methods and sources, KDIGO 2012, confirmed)
    assert value == pytest.approx(3 * 8.84)


def test_canonical_units(rules_run):
    # 1 mg/dL = 88.4 umol/L (DEVELOPERS.md, Methods and sources, confirmed)
    assert accepted(rules_run, "umol")[1] == pytest.approx(1.0, rel=1e-9)
    assert accepted(rules_run, "alias")[1:3] == (1.2, "mg/dL")


@pytest.mark.parametrize("case", [name for name, _, _ in VERSION_ROWS])
def test_version_outcome(rules_run, case):
    names = [name for name, _, _ in VERSION_ROWS]
    expected = dict((n, o) for n, _, o in VERSION_ROWS)[case]
    [(outcome,)] = rows(
        rules_run,
        "select outcome from result_versions where file_id = ? and line_no = ?",
        [file_id(rules_run, "versions_2025-06.csv"), line_of(names, case)],
    )
    assert outcome == expected


def test_only_accepted_versions_in_lab_results(rules_run):
    fid = file_id(rules_run, "versions_2025-06.csv")
    got = rows(
        rules_run,
        "select specimen_id, status, value from lab_results where file_id = ? order by line_no",
        [fid],
    )
    assert got == [
        ("V01", "amended", 1.1),
        ("V03", "final", 1.4),
        ("V05", "final", 0.9),
        (None, "corrected", 2.1),
    ]


def test_same_file_under_two_names_is_duplicate_file(rules_run):
    [(status, read, dup, acc, message)] = rows(
        rules_run,
        "select status, rows_read, rows_duplicate, rows_accepted, message from ingest_files where file_path = ?",
        [f"{LAB}/versions_2025-06_copy.csv"],
    )
    assert status == "duplicate_file"
    assert read == dup == len(VERSION_ROWS) and acc == 0
    assert "versions_2025-06.csv" in message
    # none of its rows reached result_versions
    [(n,)] = rows(rules_run, "select count(*) from result_versions where file_id = ?",
                  [file_id(rules_run, "versions_2025-06_copy.csv")])  # fmt: skip
    assert n == 0


def test_every_file_balances(rules_run):
    ledger = rows(
        rules_run,
        "select file_path, rows_read, rows_accepted + rows_rejected + rows_superseded + rows_duplicate "
        "+ rows_withdrawn + rows_pending from ingest_files order by file_id",
    )
    assert len(ledger) == 3
    for path, read, accounted in ledger:
        assert read == accounted, path
    by_path = {p: r for p, r, _ in ledger}
    assert by_path[f"{LAB}/results_2025-06.csv"] == len(RULE_ROWS) + len(ACCEPTED_ROWS)


def test_ledger_counts_match_outcomes(rules_run):
    [counts] = rows(
        rules_run,
        "select rows_accepted, rows_rejected, rows_superseded, rows_duplicate, rows_withdrawn, rows_pending "
        "from ingest_files where file_path = ?",
        [f"{LAB}/versions_2025-06.csv"],
    )
    outcomes = [o for _, _, o in VERSION_ROWS]
    assert counts == tuple(outcomes.count(o) for o in
                           ("accepted", "rejected", "superseded", "duplicate", "withdrawn", "pending"))  # fmt: skip


# --------------------------------------------------------------------------- across runs


def test_same_row_resent_in_later_file_is_duplicate(tmp_path: Path, small_config: Path):
    first = row("D01", "1.0")
    inbox = write_inbox(tmp_path, {f"{LAB}/results_2025-06.csv": csv_text([first])})
    run_month(small_config, inbox, tmp_path / "out", period="2025-06").close()
    write_inbox(tmp_path, {f"{LAB}/results_2025-07.csv": csv_text([row("D02", "1.1", collected="2025-07-01",
                                                                       reported="2025-07-02"), first])})  # fmt: skip
    with run_month(small_config, inbox, tmp_path / "out", period="2025-07") as con:
        got = rows(con, "select f.file_path, v.line_no, v.outcome from result_versions v "
                        "join ingest_files f using (file_id) order by v.file_id, v.line_no")  # fmt: skip
        assert got == [
            (f"{LAB}/results_2025-06.csv", 2, "accepted"),
            (f"{LAB}/results_2025-07.csv", 2, "accepted"),
            (f"{LAB}/results_2025-07.csv", 3, "duplicate"),
        ]
        assert rows(con, "select count(*) from lab_results where specimen_id = 'D01'") == [(1,)]


def test_amendment_in_later_month_supersedes_earlier_file(tmp_path: Path, small_config: Path):
    inbox = write_inbox(tmp_path, {f"{LAB}/results_2025-06.csv": csv_text([row("M01", "1.0")])})
    run_month(small_config, inbox, tmp_path / "out", period="2025-06").close()
    write_inbox(tmp_path, {f"{LAB}/results_2025-07.csv": csv_text(
        [row("M01", "1.6", status="amended", reported="2025-07-03")])})  # fmt: skip
    with run_month(small_config, inbox, tmp_path / "out", period="2025-07") as con:
        assert rows(con, "select value, status from lab_results where specimen_id = 'M01'") == [
            (1.6, "amended")
        ]
        # the earlier file's ledger counts are brought up to date and still balance
        assert rows(con, "select rows_read, rows_accepted, rows_superseded from ingest_files order by file_id") == [
            (1, 0, 1), (1, 1, 0)
        ]  # fmt: skip


# every table but the log of runs, which records each run by design
TABLES_QUERY = """
    select * from (select schema_name, table_name from duckdb_tables() where not temporary
                   union all select schema_name, view_name from duckdb_views()
                   where not internal and not temporary)
    where schema_name in ('main', 'published') and table_name <> 'runs' order by all
"""


def snapshot(con) -> dict[str, list[tuple]]:
    return {
        f"{s}.{t}": rows(con, f'select * from "{s}"."{t}" order by all')
        for s, t in rows(con, TABLES_QUERY)
    }


def test_rerunning_a_month_changes_no_table(tmp_path: Path, small_config: Path):
    inbox = write_inbox(tmp_path, {
        f"{LAB}/results_2025-06.csv": csv_text([r for r, _ in RULE_ROWS.values()] + list(ACCEPTED_ROWS.values())),
        f"{LAB}/versions_2025-06.csv": csv_text([r for _, r, _ in VERSION_ROWS]),
    })  # fmt: skip
    with run_month(small_config, inbox, tmp_path / "out", period="2025-06") as con:
        before = snapshot(con)
    with run_month(small_config, inbox, tmp_path / "out", period="2025-06") as con:
        after = snapshot(con)
    assert {"main.lab_results", "main.rejected_rows", "main.ingest_files"} <= set(before)
    assert before["main.lab_results"] and before["main.rejected_rows"]
    assert after == before


def test_rerunning_with_a_copied_file_changes_no_table(tmp_path: Path, small_config: Path):
    text = csv_text([row("C01", "1.0")])
    inbox = write_inbox(tmp_path, {f"{LAB}/a_2025-06.csv": text, f"{LAB}/b_2025-06.csv": text})
    with run_month(small_config, inbox, tmp_path / "out", period="2025-06") as con:
        before = snapshot(con)
    with run_month(small_config, inbox, tmp_path / "out", period="2025-06") as con:
        after = snapshot(con)
    assert after["main.ingest_files"] == before["main.ingest_files"]


def test_duplicate_file_counts_the_rows_of_its_original(tmp_path: Path, small_config: Path):
    text = csv_text(
        [row("Q01", "1.0"), row('"Q02\ncontinued"', "1.1")]
    )  # a quoted field over two lines
    inbox = write_inbox(tmp_path, {f"{LAB}/a_2025-06.csv": text, f"{LAB}/b_2025-06.csv": text})
    with run_month(small_config, inbox, tmp_path / "out", period="2025-06") as con:
        got = rows(con, "select status, rows_read from ingest_files order by file_id")
    assert got == [("ingested", 2), ("duplicate_file", 2)]


# --------------------------------------------------------------------------- quality gate


def test_quality_gate_holds_back_a_bad_source_only(tmp_path: Path):
    config = make_small_config(tmp_path / "config", max_rejection_rate=0.05)
    (config / "sources" / "test_second_lab.yaml").write_text(
        "id: test_second_lab\nlayout: standard\nfolder: test_second_lab\n", encoding="utf-8"
    )
    good = [row(f"G{i:02d}", "1.0", token=f"WF-good{i:03d}") for i in range(10)]
    bad = [
        row(f"B{i:02d}", "1.0" if i % 2 else "see note", token=f"WF-bad{i:03d}") for i in range(10)
    ]
    inbox = write_inbox(tmp_path, {
        f"{LAB}/results_2025-06.csv": csv_text(bad),
        "test_second_lab/results_2025-06.csv": csv_text(good),
    })  # fmt: skip
    with run_month(config, inbox, tmp_path / "out", period="2025-06") as con:
        files = dict(rows(con, "select source_id, status from ingest_files"))
        assert files == {LAB: "held_back", "test_second_lab": "ingested"}
        [(message,)] = rows(con, "select message from ingest_files where source_id = ?", [LAB])
        assert "5 of 10 rows rejected" in message
        assert rows(con, "select source_id, count(*) from lab_results group by all") == [
            ("test_second_lab", 10)
        ]
        assert rows(con, "select count(*) from rejected_rows where source_id = ?", [LAB]) == [(0,)]
        assert rows(con, "select count(*) from result_versions where source_id = ?", [LAB]) == [
            (0,)
        ]


def test_quality_gate_per_source_limit_overrides_default(tmp_path: Path):
    config = make_small_config(tmp_path / "config", max_rejection_rate=0.05)
    path = config / "sources" / f"{LAB}.yaml"
    path.write_text(
        path.read_text(encoding="utf-8") + "max_rejection_rate: 0.6\n", encoding="utf-8"
    )
    bad = [
        row(f"B{i:02d}", "1.0" if i % 2 else "see note", token=f"WF-bad{i:03d}") for i in range(10)
    ]
    inbox = write_inbox(tmp_path, {f"{LAB}/results_2025-06.csv": csv_text(bad)})
    with run_month(config, inbox, tmp_path / "out", period="2025-06") as con:
        assert rows(con, "select status, rows_accepted, rows_rejected from ingest_files") == [
            ("ingested", 5, 5)
        ]


@pytest.mark.parametrize("limit", [1, 10, 30, 1000])
def test_the_versions_are_stored_in_batches_of_whole_files_covering_every_row(limit):
    """file_batches: ranges of file ids, in order, that together take every row once, each of
    whole files and within the limit unless one file alone is over it (the insert of a run's
    versions is made one batch at a time)."""
    import duckdb

    from pipeline.stages.validate import file_batches

    con = duckdb.connect()
    con.execute("create table v as select (i * 7919) % 9 * 3 + 1 as file_id from range(200) t(i)")
    sizes = dict(con.execute("select file_id, count(*) from v group by file_id").fetchall())
    batches = file_batches(con, "v", limit)
    taken = [f for first, last in batches for f in sorted(sizes) if first <= f <= last]
    assert taken == sorted(sizes)  # every file once, in order
    for first, last in batches:
        files = [f for f in sizes if first <= f <= last]
        assert sum(sizes[f] for f in files) <= limit or len(files) == 1
    con.execute("create table none as select * from v where false")
    assert file_batches(con, "none", limit) == []
