"""source_creatinine_drift.sql against Python's statistics.median (the reference library).

The table compares each cell (source, month, sex, adult age group) with the pooled values of
the same cell's previous ``drift_months`` months. Its median is taken from counts of distinct
values (sql/reports/source_creatinine_drift.sql), so these checks build months with repeated
values, odd and even pooled counts and empty windows, and compare every cell's count and median
with ``statistics.median`` over the raw values. The values are invented.
"""

from __future__ import annotations

import datetime as dt
import random
import statistics

import duckdb
import pytest

from pipeline.warehouse.sql import build_table

MONTHS = [dt.date(2025, m, 15) for m in range(1, 13)]
PARAMS = {"period": "2025-12", "drift_months": 6, "drift_threshold": 0.05, "drift_min_results": 3}


def make_rows(seed: int) -> list[tuple]:
    rnd = random.Random(seed)
    rows = []
    for month in MONTHS:
        for source in ("lab_a", "lab_b"):
            for _ in range(rnd.randint(0, 7)):  # some months empty: windows of 0, odd, even counts
                value = rnd.choice([0.7, 0.8, 0.85, 0.9, 1.0, 1.1, 1.25]) + rnd.choice(
                    [0.0, 0.0, 0.013]
                )
                rows.append((source, month, "F", 50, value))
    return rows


def drift_table(rows: list[tuple]) -> dict[tuple, tuple]:
    con = duckdb.connect()
    con.execute("create table results_known (source_id varchar, collected_date date, sex varchar, "
                "age_years integer, value double, analyte varchar, comparator varchar)")  # fmt: skip
    con.executemany("insert into results_known values (?, ?, ?, ?, ?, 'creatinine', null)", rows)
    build_table(con, "source_creatinine_drift", params=PARAMS)
    got = con.execute("select source_id, month, previous_results, previous_median_mg_dl "
                      "from source_creatinine_drift").fetchall()  # fmt: skip
    con.close()
    return {(s, m): (n, med) for s, m, n, med in got}


def expected(rows: list[tuple]) -> dict[tuple, tuple]:
    out = {}
    for source in ("lab_a", "lab_b"):
        for i, month in enumerate(MONTHS):
            if not any(r[0] == source and r[1] == month for r in rows):
                continue  # a cell exists only for a month with results
            window = MONTHS[max(0, i - 6) : i]
            values = [r[4] for r in rows if r[0] == source and r[1] in window]
            median = round(statistics.median(values), 3) if values else None
            out[(source, month.strftime("%Y-%m"))] = (len(values), median)
    return out


@pytest.mark.parametrize("seed", range(8))
def test_previous_months_count_and_median(seed):
    rows = make_rows(seed)
    assert drift_table(rows) == expected(rows)


def test_worked_example():
    # January: 1.0, 1.0, 2.0; February: 1.2. March's previous months pool 1.0, 1.0, 1.2, 2.0:
    # an even count, median (1.0 + 1.2) / 2 = 1.1. February's pool is January's: median 1.0.
    rows = [("lab_a", MONTHS[0], "F", 50, v) for v in (1.0, 1.0, 2.0)]
    rows += [("lab_a", MONTHS[1], "F", 50, 1.2), ("lab_a", MONTHS[2], "F", 50, 1.0)]
    got = drift_table(rows)
    assert got[("lab_a", "2025-01")] == (0, None)
    assert got[("lab_a", "2025-02")] == (3, 1.0)
    assert got[("lab_a", "2025-03")] == (4, 1.1)


@pytest.mark.parametrize("chunks", [1, 2, 5])
def test_person_key_ranges_take_every_row_once(chunks):
    # keys of the pseudonymiser's form, of any other form and none: every row in exactly one
    # range, so a build in ranges reads what one whole pass reads
    from pipeline.warehouse.sql import in_person_range

    con = duckdb.connect()
    keys = ["00000000aa", "3fffffff", "40000000", "a1b2c3", "ffffffff", "p1", "", None]
    con.execute("create table t as select unnest($k) as person_key", {"k": keys})
    seen = []
    for chunk in range(chunks):
        ranged, bound = in_person_range({"t": "t"}, {}, chunk, chunks)
        query = f"with t as ({ranged['t']}) select person_key from t"
        used = {k: v for k, v in bound.items() if f"${k}" in query}
        seen += [k for (k,) in con.execute(query, used).fetchall()]
    assert sorted(seen, key=repr) == sorted(keys, key=repr)
