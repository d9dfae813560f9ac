"""result_versions_resolved.sql against the version rules written out in plain Python.

The SQL ranks only the rows whose group hash repeats (sql/derived/
result_versions_resolved.sql, "How"). These checks generate small sets of versions crowded
onto few persons, specimens, days, values and sources, so that copies, amendments, cancellations
and the same result from two sources are frequent, and compare every row's outcome with the
rules as DEVELOPERS.md ("Statuses and duplicates") states them, written out below without any
shortcut. The same SQL with every hash set to zero (every group collides, every row is ranked
by its exact columns) must give the same outcomes: a collision costs time, never a wrong
outcome. Status codes: FHIR R4 Observation status value set.
"""

from __future__ import annotations

import datetime as dt

import duckdb
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.warehouse.sql_files import read_sql
from tests.conftest import examples

ACCEPTED = ("final", "amended", "corrected")
WITHDRAWN = ("cancelled", "entered-in-error")
DAY = dt.date(2025, 3, 1)

version = st.fixed_dictionaries({
    "source_id": st.sampled_from(["lab_a", "lab_b"]),
    "person_key": st.sampled_from(["p1", "p2"]),
    "specimen_id": st.sampled_from([None, "S1", "S2"]),
    "analyte": st.sampled_from(["creatinine", "urine_acr"]),
    "collected": st.integers(0, 1),
    "status": st.sampled_from([*ACCEPTED, *WITHDRAWN, "preliminary"]),
    "value": st.sampled_from([None, 1.0, 1.5]),  # halves: Python and DuckDB round them alike
    "reported_unit": st.sampled_from(["mg/dL"]),
    "reported": st.integers(0, 3),
    "comparator": st.sampled_from([None, None, "<"]),
})  # fmt: skip


def as_rows(draws: list[dict]) -> list[dict]:
    out = []
    for i, d in enumerate(draws):
        out.append({
            "file_id": 1 + i // 4, "line_no": 2 + i % 4, "source_id": d["source_id"],
            "person_key": d["person_key"], "specimen_id": d["specimen_id"], "analyte": d["analyte"],
            "collected_date": DAY + dt.timedelta(days=d["collected"]), "status": d["status"],
            "value_text": None if d["value"] is None else f"{d['comparator'] or ''}{d['value']}",
            "reported_unit": d["reported_unit"], "value": d["value"], "comparator": d["comparator"],
            "reported_date": DAY + dt.timedelta(days=d["collected"] + d["reported"]),
        })  # fmt: skip
    return out


def expected_outcomes(rows: list[dict]) -> dict[tuple[int, int], str]:
    """The rules, one after the other, over whole groups."""
    pos = lambda r: (r["file_id"], r["line_no"])  # noqa: E731
    outcome: dict[tuple[int, int], str] = {}
    # 0. a specimen id under two persons: every row of it is rejected and takes no further part
    persons: dict[tuple, set] = {}
    for r in rows:
        if r["specimen_id"] is not None:
            persons.setdefault((r["source_id"], r["specimen_id"], r["analyte"]), set()).add(
                r["person_key"]
            )
    conflict = {k for k, p in persons.items() if len(p) > 1}
    for r in rows:
        if (r["source_id"], r["specimen_id"], r["analyte"]) in conflict:
            outcome[pos(r)] = "rejected"
    rows = [r for r in rows if pos(r) not in outcome]
    # 1. a row identical to an earlier row of the same source is a duplicate
    copies: dict[tuple, list[dict]] = {}
    for r in rows:
        key = tuple(r[c] for c in ("source_id", "person_key", "specimen_id", "analyte", "collected_date",
                                   "status", "value_text", "reported_unit"))  # fmt: skip
        copies.setdefault(key, []).append(r)
    originals = []
    for group in copies.values():
        group.sort(key=pos)
        originals.append(group[0])
        for r in group[1:]:
            outcome[pos(r)] = "duplicate"
    # 2. the versions of one result: the latest report wins (an amended or corrected one over a
    # final one reported the same day), the others are superseded
    results: dict[tuple, list[dict]] = {}
    for r in originals:
        key = ((r["source_id"], "s", r["person_key"], r["specimen_id"], r["analyte"]) if r["specimen_id"] is not None
               else (r["source_id"], "p", r["person_key"], r["collected_date"], r["analyte"]))  # fmt: skip
        results.setdefault(key, []).append(r)
    accepted = []
    for group in results.values():
        group.sort(key=lambda r: (r["reported_date"], r["status"] in ("amended", "corrected"), r["file_id"],
                                  r["line_no"]), reverse=True)  # fmt: skip
        winner = group[0]
        for r in group[1:]:
            outcome[pos(r)] = "superseded"
        if winner["status"] in ACCEPTED:
            outcome[pos(winner)] = "accepted"
            accepted.append(winner)
        elif winner["status"] in WITHDRAWN:
            outcome[pos(winner)] = "withdrawn"
        else:
            outcome[pos(winner)] = "pending"
    # 3. the same accepted value from another source: the one reported first is kept
    same: dict[tuple, list[dict]] = {}
    for r in accepted:
        if r["value"] is not None:
            key = (
                r["person_key"],
                r["analyte"],
                r["collected_date"],
                r["comparator"],
                round(r["value"], 4),
            )
            same.setdefault(key, []).append(r)
    for group in same.values():
        kept = min(
            group, key=lambda r: (r["reported_date"], r["source_id"], r["file_id"], r["line_no"])
        )
        for r in group:
            if r["source_id"] != kept["source_id"]:
                outcome[pos(r)] = "duplicate"
    return outcome


def resolved(rows: list[dict], sql: str) -> dict[tuple[int, int], str]:
    con = duckdb.connect()
    con.execute(
        "create table v (file_id bigint, line_no bigint, source_id varchar, person_key varchar, "
        "specimen_id varchar, analyte varchar, collected_date date, status varchar, value_text varchar, "
        "reported_unit varchar, value double, comparator varchar, reported_date date)"
    )
    con.executemany("insert into v values (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                    [list(r.values()) for r in rows])  # fmt: skip
    con.execute("create temp view versions_in_scope as select * from v")
    got = con.execute(sql, {"as_of": dt.date(2099, 1, 1)}).fetchall()
    con.close()
    return {(f, line): o for f, line, o in got}


SQL = read_sql("result_versions_resolved")
#: every group hash the same: each row goes through the exact ranking
ALL_COLLIDE = SQL.replace("hash(", "0::ubigint * hash(")


def test_all_collide_variant_does_replace_the_hashes():
    assert SQL.count("hash(") == 3 and ALL_COLLIDE.count("0::ubigint * hash(") == 3


@settings(
    max_examples=examples(100, 40), deadline=None, suppress_health_check=[HealthCheck.too_slow]
)
@given(st.lists(version, min_size=1, max_size=14))
def test_outcomes_follow_the_rules(draws):
    rows = as_rows(draws)
    want = expected_outcomes(rows)
    assert resolved(rows, SQL) == want
    assert resolved(rows, ALL_COLLIDE) == want


@pytest.mark.parametrize("sql", [SQL, ALL_COLLIDE], ids=["hashed", "all_collide"])
def test_worked_example(sql):
    # lab_a reports S1 final, then amended; lab_b forwards the amended value; a copy of the
    # first line arrives again; S2 is cancelled.
    base = {"person_key": "p1", "analyte": "creatinine", "collected_date": DAY, "reported_unit": "mg/dL",
            "comparator": None}  # fmt: skip
    rows = [
        {"file_id": 1, "line_no": 2, "source_id": "lab_a", "specimen_id": "S1", "status": "final",
         "value_text": "1.0", "value": 1.0, "reported_date": DAY},
        {"file_id": 2, "line_no": 2, "source_id": "lab_a", "specimen_id": "S1", "status": "amended",
         "value_text": "1.5", "value": 1.5, "reported_date": DAY + dt.timedelta(days=2)},
        {"file_id": 2, "line_no": 3, "source_id": "lab_b", "specimen_id": "X9", "status": "final",
         "value_text": "1.5", "value": 1.5, "reported_date": DAY + dt.timedelta(days=3)},
        {"file_id": 3, "line_no": 2, "source_id": "lab_a", "specimen_id": "S1", "status": "final",
         "value_text": "1.0", "value": 1.0, "reported_date": DAY},
        {"file_id": 3, "line_no": 3, "source_id": "lab_a", "specimen_id": "S2", "status": "cancelled",
         "value_text": None, "value": None, "reported_date": DAY},
    ]  # fmt: skip
    order = ("file_id", "line_no", "source_id", "person_key", "specimen_id", "analyte", "collected_date",
             "status", "value_text", "reported_unit", "value", "comparator", "reported_date")  # fmt: skip
    rows = [{c: {**base, **r}[c] for c in order} for r in rows]
    assert resolved(rows, sql) == {(1, 2): "superseded", (2, 2): "accepted", (2, 3): "duplicate",
                                   (3, 2): "duplicate", (3, 3): "withdrawn"}  # fmt: skip
    assert expected_outcomes(rows) == resolved(rows, sql)


@pytest.mark.parametrize("sql", [SQL, ALL_COLLIDE], ids=["hashed", "all_collide"])
def test_amended_wins_over_final_of_the_same_report_date_and_a_shared_specimen_is_a_conflict(sql):
    # FHIR R4 Observation.status: 'amended' / 'corrected' replace an earlier 'final'; here the
    # amended row comes first in the file and both carry the same report date
    base = {"source_id": "lab_a", "analyte": "creatinine", "collected_date": DAY, "reported_unit": "mg/dL",
            "comparator": None, "reported_date": DAY, "person_key": "p1"}  # fmt: skip
    rows = [
        {"file_id": 1, "line_no": 2, "specimen_id": "S1", "status": "amended", "value_text": "1.5", "value": 1.5},
        {"file_id": 1, "line_no": 3, "specimen_id": "S1", "status": "final", "value_text": "1.0", "value": 1.0},
        # S2 arrives under two persons: neither row is counted
        {"file_id": 1, "line_no": 4, "specimen_id": "S2", "status": "final", "value_text": "1.1", "value": 1.1},
        {"file_id": 2, "line_no": 2, "specimen_id": "S2", "status": "final", "value_text": "0.9", "value": 0.9,
         "person_key": "p2"},
    ]  # fmt: skip
    order = ("file_id", "line_no", "source_id", "person_key", "specimen_id", "analyte", "collected_date",
             "status", "value_text", "reported_unit", "value", "comparator", "reported_date")  # fmt: skip
    rows = [{c: {**base, **r}[c] for c in order} for r in rows]
    assert resolved(rows, sql) == {
        (1, 2): "accepted",
        (1, 3): "superseded",
        (1, 4): "rejected",
        (2, 2): "rejected",
    }
    assert expected_outcomes(rows) == resolved(rows, sql)
