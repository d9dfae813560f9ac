"""A month that touches few persons settles, measures and links only those, and still gives the
tables of one run over all the data (pipeline.stages.validate.settle_scope, pipeline.stages.measure,
pipeline.stages.link.persons.carry_over_events).

The facts checked are the project's own version rules (DEVELOPERS.md, "Statuses and
duplicates": the latest report of a source + person + specimen + analyte wins; a specimen id
under two persons is a conflict that keeps both out) and the sustained-decline
rule (a run of daily eGFRs at or below 60 % of baseline spanning 28 days or more); the
reference is the same pipeline over all files at once, so what is tested is that the monthly
path loses nothing. The values are invented."""

from __future__ import annotations

import shutil

import duckdb
import pytest

from tests.conftest import rows, run_month, write_inbox

LAB = "westerfold_general_lab"
HEADER = "person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,status,reported_at"
CREA = "2160-0"  # LOINC: creatinine [mass/volume] in serum or plasma


def line(token: str, spec: str, collected: str, value: str, status: str = "final",
         reported: str | None = None) -> str:  # fmt: skip
    return f"{token},1960,F,WF01,{spec},{collected},{CREA},{value},mg/dL,{status},{reported or collected}"


def first_month() -> str:
    lines = []
    # forty steady persons: their events and measures must be carried over untouched
    for i in range(40):
        for j, day in enumerate(("2024-01-10", "2024-09-10", "2025-05-10")):
            lines.append(line(f"WF-ms{i:04d}", f"S{i:03d}{j}", day, f"{0.8 + i / 100:.2f}"))
    # a person whose creatinine doubles (eGFR about halves): a decline run that is pending at
    # the end of June (one low value) and confirmed by July's value 30 days later
    lines += [line("WF-msDEC", "D1", "2024-02-01", "0.9"), line("WF-msDEC", "D2", "2024-03-01", "0.9"),
              line("WF-msDEC", "D3", "2025-06-01", "2.0")]  # fmt: skip
    # person A's specimen X1
    lines.append(line("WF-msAAA", "X1", "2025-06-02", "1.0"))
    return "\n".join([HEADER, *lines]) + "\n"


def second_month() -> str:
    lines = [
        line("WF-msDEC", "D4", "2025-07-01", "2.1"),
        # a faulty extract: specimen X1 again, under another person, as an amendment. Which
        # person X1 belongs to is not certain: both versions are kept out (rejected), A's
        # although A has no new row this month
        line("WF-msBBB", "X1", "2025-06-02", "1.4", status="amended", reported="2025-07-03"),
        line("WF-msNEW", "N1", "2025-07-05", "1.1"),
    ]
    return "\n".join([HEADER, *lines]) + "\n"


FILES = {f"{LAB}/results_2025-06.csv": first_month(), f"{LAB}/results_2025-07.csv": second_month()}


def snapshot(con: duckdb.DuckDBPyConnection, period: str) -> dict[str, list[tuple]]:
    by_file = "join ingest_files as f using (file_id)"
    return {
        "result_versions": rows(con, f"select f.file_path, v.line_no, v.outcome from result_versions as v {by_file} "
                                     "order by all"),
        "lab_results": rows(con, f"select f.file_path, r.* exclude (file_id, file_sha256) from lab_results as r "
                                 f"{by_file} order by f.file_path, r.line_no"),
        "kidney_measures": rows(con, f"select f.file_path, m.* exclude (file_id) from kidney_measures as m {by_file} "
                                     "order by f.file_path, m.line_no, m.analyte"),
        "kidney_events": rows(con, "select * from kidney_events where period = ? order by person_key, rule_id", [period]),
        "person_status": rows(con, "select * from person_status where period = ? order by person_key", [period]),
        "ingest_files": rows(con, "select file_path, rows_read, rows_accepted, rows_superseded, rows_duplicate "
                                  "from ingest_files order by file_path"),
    }  # fmt: skip


@pytest.fixture(scope="module")
def month_by_month(tmp_path_factory):
    from tests.conftest import make_small_config

    base = tmp_path_factory.mktemp("monthly_scope")
    config = make_small_config(base / "config")
    inbox = write_inbox(base, {k: v for k, v in FILES.items() if "2025-06" in k})
    with run_month(config, inbox, base / "out", period="2025-06") as con:
        june_events = rows(
            con, "select person_key, rule_id, event_status from kidney_events order by all"
        )
    write_inbox(base, FILES)
    with run_month(config, inbox, base / "out", period="2025-07") as con:
        link = rows(
            con, "select period, persons, persons_recomputed from link_snapshots order by period"
        )
        yield config, base, snapshot(con, "2025-07"), june_events, link


def test_july_took_the_monthly_path(month_by_month):
    _, _, _, _, link = month_by_month
    # June: every person computed; July: only the persons with changed results (the declining
    # person, A and B through the shared specimen, and the new person). A's and B's only
    # results are the conflicting X1, so July has 42 - 1 + 1 persons with an accepted result
    assert link[0] == ("2025-06", 42, 42)
    assert link[1] == ("2025-07", 42, 4)


def test_july_equals_one_run_over_both_months(month_by_month, tmp_path):
    config, _, july, _, _ = month_by_month
    inbox = write_inbox(tmp_path, FILES)
    with run_month(config, inbox, tmp_path / "out", period="2025-07") as con:
        once = snapshot(con, "2025-07")
    for table, got in july.items():
        assert got == once[table], table


def test_the_shared_specimen_is_a_conflict_that_keeps_both_versions_out(month_by_month):
    _, _, july, _, _ = month_by_month
    outcomes = {(path.rsplit("_", 1)[-1], n): o for path, n, o in july["result_versions"]}
    june_x1 = 40 * 3 + 3 + 1 + 1  # line of A's X1 in June's file (header is line 1)
    assert outcomes[("2025-06.csv", june_x1)] == "rejected"
    assert outcomes[("2025-07.csv", 3)] == "rejected"


def test_a_pending_decline_is_confirmed_by_the_next_month(month_by_month):
    _, _, july, june_events, _ = month_by_month
    june = {(r, s) for _, r, s in june_events if r == "sustained_decline_40"}
    assert june == {("sustained_decline_40", "pending")}
    # columns: period, person_key, event_type, rule_id, threshold, event_status, ...
    july_decline = [e for e in july["kidney_events"] if e[3] == "sustained_decline_40"]
    assert [e[5] for e in july_decline] == ["confirmed"]


def test_measures_in_person_chunks_equal_one_pass(tmp_path, monkeypatch):
    # a full rebuild measures person-key ranges one at a time (pipeline.core.pseudonymise.person_range);
    # with chunks of 10 results, these 42 persons span a dozen chunks and nothing may differ
    from pipeline.stages import measure as measures
    from pipeline.warehouse import measure_sql
    from pipeline.warehouse.connection import connect
    from tests.conftest import make_small_config

    config = make_small_config(tmp_path / "config")
    inbox = write_inbox(tmp_path, FILES)
    with run_month(config, inbox, tmp_path / "out", period="2025-07") as con:
        once = snapshot(con, "2025-07")["kidney_measures"]
    monkeypatch.setattr(measure_sql, "CHUNK_RESULTS", 10)
    con = connect(tmp_path / "out" / "surveillance.duckdb")
    try:
        from pipeline.core.settings import load_settings

        con.execute("begin")
        summary = measures.measure_stage(con, load_settings(config))
        chunked = snapshot(con, "2025-07")["kidney_measures"]
        con.execute("rollback")
    finally:
        con.close()
    assert summary.egfr_rows == len(once) and chunked == once


# A measure row reads results besides its own: a same-day cystatin C (the combined equation), the
# lab's reported eGFR of the same specimen, a urine creatinine of the same specimen (computed
# ACR). The monthly path recomputes only the rows sharing a day or a specimen with a changed
# version (pipeline.stages.measure.update_touched); each case below adds the other half in the second
# month, so a June measure row must change, appear or go in July. Codes are LOINC (common practice).
CYS, UALB, UCREA, EGFR_LAB = "33863-2", "14957-5", "2161-8", "98979-8"


def coded(token: str, spec: str, collected: str, code: str, value: str, unit: str,
          status: str = "final", reported: str | None = None) -> str:  # fmt: skip
    return f"{token},1960,F,WF01,{spec},{collected},{code},{value},{unit},{status},{reported or collected}"


NEIGHBOURS = {
    f"{LAB}/results_2025-06.csv": "\n".join([
        HEADER,
        *[line(f"WF-nb{i:04d}", f"B{i:03d}", "2025-03-03", "0.9") for i in range(5)],  # untouched
        line("WF-nbCYS", "C1", "2025-06-03", "1.1"),                     # cystatin C comes in July
        line("WF-nbCYS", "C0", "2025-02-03", "1.0"),                     # another day: unchanged
        line("WF-nbLAB", "R1", "2025-06-04", "1.2"),                     # lab eGFR comes in July
        coded("WF-nbACR", "U1", "2025-06-05", UALB, "45", "mg/L"),       # urine creatinine in July
        line("WF-nbAMD", "M1", "2025-06-06", "1.3"),                     # amended to another day
    ]) + "\n",
    f"{LAB}/results_2025-07.csv": "\n".join([
        HEADER,
        coded("WF-nbCYS", "C2", "2025-06-03", CYS, "1.4", "mg/L", reported="2025-07-01"),
        # the reported eGFR under the same specimen, dated a day later (a faulty extract): it
        # still belongs to the specimen
        coded("WF-nbLAB", "R1", "2025-06-05", EGFR_LAB, "55", "mL/min/{1.73_m2}", reported="2025-07-01"),
        coded("WF-nbACR", "U1", "2025-06-05", UCREA, "90", "mg/dL", reported="2025-07-01"),
        line("WF-nbAMD", "M1", "2025-06-07", "1.5", status="amended", reported="2025-07-02"),
    ]) + "\n",
}  # fmt: skip


def test_measures_reading_other_results_are_recomputed_in_the_month(tmp_path):
    from tests.conftest import make_small_config

    config = make_small_config(tmp_path / "config")
    inbox = write_inbox(
        tmp_path / "monthly", {k: v for k, v in NEIGHBOURS.items() if "2025-06" in k}
    )
    with run_month(config, inbox, tmp_path / "monthly" / "out", period="2025-06") as con:
        june = snapshot(con, "2025-06")["kidney_measures"]
    write_inbox(tmp_path / "monthly", NEIGHBOURS)
    with run_month(config, inbox, tmp_path / "monthly" / "out", period="2025-07") as con:
        link = rows(con, "select persons_recomputed from link_snapshots where period = '2025-07'")
        july = snapshot(con, "2025-07")
    once_inbox = write_inbox(tmp_path / "once", NEIGHBOURS)
    with run_month(config, once_inbox, tmp_path / "once" / "out", period="2025-07") as con:
        once = snapshot(con, "2025-07")
    assert link == [(4,)]  # the monthly path was taken: four persons changed
    for table, got in july.items():
        assert got == once[table], table
    # and each June row read something new in July: its stored measure changed
    # (rows: file path, source, line, ...)
    june_rows = {(r[0], r[2]): r for r in june}
    july_rows = {(r[0], r[2]): r for r in july["kidney_measures"]}
    differs = {k for k in june_rows.keys() & july_rows.keys() if june_rows[k] != july_rows[k]}
    june_file = next(k[0] for k in june_rows)
    assert differs == {(june_file, 7), (june_file, 9)}  # creatinine C1, creatinine R1
    # the albumin U1 gets a measure row (a computed ACR) only once its urine creatinine is in
    assert (june_file, 10) in july_rows.keys() - june_rows.keys()
    # the amendment moved M1 to another day: June's row is gone, July's is the amended one
    assert (june_file, 11) in june_rows.keys() - july_rows.keys()


def test_a_month_without_new_results_computes_no_person_and_sends_no_bucket(
    month_by_month, tmp_path, monkeypatch
):
    # August, nothing new in the inbox: on the bucket path (executor: shards) no bucket is sent
    # (on Dask no cluster would be started); every person's rows are July's
    config, base, july, _, _ = month_by_month
    shards_config = tmp_path / "config"
    shutil.copytree(config, shards_config)
    pipeline_yaml = shards_config / "pipeline.yaml"
    text = pipeline_yaml.read_text()
    assert "  executor: local\n" in text
    pipeline_yaml.write_text(text.replace("  executor: local\n", "  executor: shards\n"))
    out = tmp_path / "out"
    shutil.copytree(base / "out", out)

    def no_buckets(*args, **kwargs):
        raise AssertionError("a bucket was sent for a month without changed persons")

    monkeypatch.setattr("pipeline.stages.link.shards.run_shards", no_buckets)
    with run_month(shards_config, base / "inbox", out, period="2025-08") as con:
        assert rows(con, "select persons, persons_recomputed from link_snapshots "
                         "where period = '2025-08'") == [(42, 0)]  # fmt: skip
        august = rows(con, "select * exclude (period, age_years, age_band) from person_status "
                           "where period = '2025-08' order by person_key")  # fmt: skip
    assert august == [row[1:4] + row[6:] for row in july["person_status"]]
