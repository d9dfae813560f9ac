"""Tests for pipeline.stages.disclose.audit: everything a period publishes, read together, must not
confine a blanked count to 1-10 nor to an interval narrower than the protection width.

The reader here is written independently of the module: the sums and orders a reader of the
published prevalence table knows (cells add up to their district, districts to the region;
persons_ckd_g3_g5 <= persons_ckd <= persons_tested, which holds by definition), each blanked
count at least 1 (zeros are published), and the least and greatest value of each blanked count
by linear programming (scipy.optimize.linprog, HiGHS). That is the usual audit of a suppressed
table (common practice in statistical disclosure control; a minimum "protection interval" is
the usual criterion, common practice)."""

from __future__ import annotations

from pathlib import Path

import duckdb
import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.optimize import linprog

from pipeline.core.periods import Period
from pipeline.core.settings import DisclosureSettings
from pipeline.core.statistics import collapse_weights
from pipeline.stages.disclose.audit import MARK, AuditTable, _changes, rate_splits
from pipeline.stages.disclose.suppression import audit_frames, disclose_stage, suppress_tables
from pipeline.warehouse.catalog import PUBLISHED_TABLES
from tests.conftest import examples, rows, run_month, write_inbox
from tests.unit.stages.disclose.test_suppression import (
    AXES,
    G3_G5,
    people,
    person_frames,
    sum_groups,
)

RULES = DisclosureSettings()  # 1..10, protection width 10 (config/pipeline.yaml)
TABLES = {t.name: t for t in PUBLISHED_TABLES}
PREVALENCE = TABLES["district_ckd_prevalence"]
COUNTS = ("persons_tested", "persons_ckd", "persons_ckd_g3_g5")
ORDER = (("persons_ckd_g3_g5", "persons_ckd"), ("persons_ckd", "persons_tested"))
PROPERTY = settings(max_examples=examples(25, 10), deadline=None, database=None)


def prevalence(cells: dict[tuple[str, str, str], tuple[int, int, int]]) -> pl.DataFrame:
    """Internal prevalence rows: the given cells (district, sex, age band) -> (tested, ckd,
    g3_g5), their district totals and the region total."""
    totals: dict[tuple[str, str, str], list[int]] = {}
    for (district, _, _), counts in cells.items():
        for key in ((district, "ALL", "ALL"), ("ALL", "ALL", "ALL")):
            acc = totals.setdefault(key, [0, 0, 0])
            for i, c in enumerate(counts):
                acc[i] += c
    out = []
    for (district, sex, band), counts in list(cells.items()) + [
        (k, tuple(v)) for k, v in totals.items()
    ]:
        out.append({"period": "2025-06", "district_code": district, "sex": sex, "age_band": band,
                    **dict(zip(COUNTS, counts, strict=False)), "population": 1000})  # fmt: skip
    return pl.DataFrame(out)


def reader_intervals(
    published: pl.DataFrame, internal: pl.DataFrame
) -> dict[tuple[int, str], tuple[float, float]]:
    """[least, greatest] of every blanked count with a non-zero value, from the published table
    alone (module docstring)."""
    keys = published.select("district_code", "sex", "age_band").rows()
    var: dict[tuple[int, str], int] = {}
    for column in COUNTS:
        for r, value in enumerate(published[column].to_list()):
            if value is None:
                var[(r, column)] = len(var)
    n = len(var)
    if n == 0:
        return {}
    value = {(r, c): published[c][r] for r in range(published.height) for c in COUNTS}
    truth = {(r, c): internal[c][r] for r in range(internal.height) for c in COUNTS}
    a_eq, b_eq, a_ub, b_ub = [], [], [], []

    def add(terms: list[tuple[tuple[int, str], float]], target: list, rhs: list) -> None:
        row, const = np.zeros(n), 0.0
        for cell, coef in terms:
            if cell in var:
                row[var[cell]] += coef
            else:
                const -= coef * value[cell]
        if row.any():
            target.append(row)
            rhs.append(const)

    index = {k: r for r, k in enumerate(keys)}
    for column in COUNTS:
        for r, (district, sex, _band) in enumerate(keys):
            if district != "ALL" and sex == "ALL":  # a district: the sum of its cells
                cells = [i for i, k in enumerate(keys) if k[0] == district and k[1] != "ALL"]
                if cells:
                    add([((r, column), -1.0)] + [((i, column), 1.0) for i in cells], a_eq, b_eq)
        region = index[("ALL", "ALL", "ALL")]
        districts = [i for i, k in enumerate(keys) if k[0] != "ALL" and k[1] == "ALL"]
        add([((region, column), -1.0)] + [((i, column), 1.0) for i in districts], a_eq, b_eq)
    for r in range(published.height):
        for small, large in ORDER:
            add([((r, small), 1.0), ((r, large), -1.0)], a_ub, b_ub)
    bounds = [(1.0 if truth[cell] > 0 else 0.0, None) for cell in var]
    out = {}
    for cell, j in var.items():
        if truth[cell] == 0:
            continue
        c = np.zeros(n)
        c[j] = 1.0
        kwargs = {"A_eq": np.array(a_eq) if a_eq else None, "b_eq": b_eq or None,
                  "A_ub": np.array(a_ub) if a_ub else None, "b_ub": b_ub or None}  # fmt: skip
        low = linprog(c, bounds=bounds, method="highs", **kwargs)
        high = linprog(-c, bounds=bounds, method="highs", **kwargs)
        assert low.status == 0, low.message
        out[cell] = (low.fun, np.inf if high.status == 3 else -high.fun)
    return out


def exposed(
    published: pl.DataFrame, internal: pl.DataFrame, rules: DisclosureSettings = RULES
) -> list:
    """Blanked counts a reader confines to 1-10 or to an interval narrower than the width."""
    bad = []
    for cell, (low, high) in reader_intervals(published, internal).items():
        low_i, high_i = np.ceil(low - 1e-6), np.floor(high + 1e-6)
        if (
            low_i >= rules.suppress_min and high_i <= rules.suppress_max
        ) or high_i - low_i < rules.protection_width:
            bad.append((cell, low_i, high_i))
    return bad


# --------------------------------------------------------------------------- cases of the issue


def test_a_published_subtotal_no_longer_narrows_a_blank():
    # Per table and column, the unknown district's persons_ckd (1) is blanked and WF02's (12) with
    # it; but persons_ckd_g3_g5 = 11 is published for WF02 and persons_ckd >= persons_ckd_g3_g5,
    # so unknown = 53 - 40 - WF02 <= 2 (hand calculation): "CKD G3a-G5" gave the blank away.
    internal = pl.DataFrame([
        {"period": "2025-06", "district_code": d, "sex": "ALL", "age_band": "ALL", "persons_tested": t,
         "persons_ckd": c, "persons_ckd_g3_g5": g, "population": 1000}
        for d, t, c, g in (("WF01", 300, 40, 30), ("WF02", 100, 12, 11), ("unknown", 20, 1, 0), ("ALL", 420, 53, 41))
    ])  # fmt: skip
    per_table = suppress_tables({PREVALENCE.name: internal}, RULES)[PREVALENCE.name]
    assert exposed(per_table, internal), "the per-table check alone leaves a narrowed blank"
    result = audit_frames({PREVALENCE.name: internal}, RULES)
    published = result.frames[PREVALENCE.name]
    assert exposed(published, internal) == []
    assert published.filter(pl.col("district_code") == "unknown")["persons_ckd"].item() is None
    assert set(published["suppression"].to_list()) <= {"", MARK}


def test_primary_and_secondary_are_not_published_but_kept_internally():
    internal = pl.DataFrame([
        {"period": "2025-06", "district_code": d, "sex": "ALL", "age_band": "ALL", "persons_tested": t,
         "persons_ckd": c, "persons_ckd_g3_g5": g, "population": 1000}
        for d, t, c, g in (("WF01", 300, 40, 30), ("WF02", 100, 12, 11), ("WF03", 90, 30, 20),
                           ("unknown", 20, 1, 0), ("ALL", 510, 83, 61))
    ])  # fmt: skip
    con = duckdb.connect()
    con.execute("create schema published")
    con.register("_internal", internal.to_arrow())
    con.execute("create table district_ckd_prevalence as select * from _internal")
    for table in PUBLISHED_TABLES[1:]:  # nothing this period in the other tables
        con.execute(f"create table {table.name} (period varchar)")
    disclose_stage(con, RULES, Period.parse("2025-06"))
    marks = {
        r[0]
        for r in con.execute(
            "select distinct suppression from published.district_ckd_prevalence"
        ).fetchall()
    }
    assert marks == {"", MARK}  # one mark: a reader cannot tell which blanks are 1-10
    reasons = {r[0] for r in con.execute("select distinct reason from disclosure_cells").fetchall()}
    assert "primary" in reasons


def test_the_issue_rate_gives_its_age_group_counts_back():
    # The issue's district: 37 persons with confirmed CKD, rate 21.31 per 1,000, interval
    # 13.63-32.41, populations 692 / 125 / 101 in 0-64 / 65-74 / 75+, WHO World Standard 2000-2025
    # weights (Ahmad et al. 2001) and the Fay-Feuer interval (Fay and Feuer 1997): only 9 / 8 / 20
    # gives the three figures back at two decimals, so 9 and 8 were published in effect.
    weights = collapse_weights([0, 65, 75])
    splits = rate_splits(37, [692, 125, 101], weights, 0.95, (21.31, 13.63, 32.41), 2)
    assert splits.tolist() == [[9, 8, 20]]
    # at whole numbers many splits fit: the rate no longer pins a group to one count
    assert rate_splits(37, [692, 125, 101], weights, 0.95, (21.0, 14.0, 32.0), 0).shape[0] > 5


def test_a_published_change_does_not_give_a_blank_back():
    # this month's count blanked, last month's published: a published change would give it back
    now = pl.DataFrame({"period": ["2025-06"], "district_code": ["WF01"], "persons_ckd": [None],
                        "persons_ckd_change": [3]})  # fmt: skip
    truth = now.with_columns(pl.lit(7).alias("persons_ckd"))
    before = pl.DataFrame({"period": ["2025-05"], "district_code": ["WF01"], "persons_ckd": [4]})
    table = AuditTable("x", now, truth, ["period", "district_code"], ["persons_ckd"], [])
    notes = _changes({"x": table}, {"x": before})
    assert table.published["persons_ckd_change"].to_list() == [None] and notes


# --------------------------------------------------------------------------- property


@st.composite
def regions(draw):
    districts = draw(st.integers(2, 3))
    cells = {}
    for d in range(districts):
        for sex in ("F", "M"):
            for band in ("40-44", "70-74"):
                tested = draw(st.integers(0, 40))
                ckd = draw(st.integers(0, tested))
                g3 = draw(st.integers(0, ckd))
                cells[(f"WF0{d + 1}", sex, band)] = (tested, ckd, g3)
    return cells


@PROPERTY
@given(regions())
def test_no_blank_is_narrowed_by_the_table_read_whole(cells):
    internal = prevalence(cells)
    result = audit_frames({PREVALENCE.name: internal}, RULES)
    published = result.frames[PREVALENCE.name]
    # blanks the audit added: a count, never below 0 (a withheld table too)
    assert result.added >= 0
    if PREVALENCE.name in result.withheld:
        assert published.height == 0 and result.withheld[PREVALENCE.name]
        return
    assert exposed(published, internal) == []
    for column in COUNTS:  # and every published count is 0 or above 10
        assert not published[column].drop_nulls().is_between(1, 10).any()


# --------------------------------------------------------------------------- a small region


def test_a_small_region_gets_its_run(tmp_path: Path, small_config: Path):
    # One source, 60 persons with three creatinine results each, one month: the per-table check
    # used to stop the run (a blanked count it could not protect); now it publishes, blanking
    # what cannot be protected.
    header = "person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,status"
    lines = []
    for i in range(60):
        for k, day in enumerate((3, 13, 23)):
            lines.append(f"WF-small{i:03d},{1935 + i % 50},{'FM'[i % 2]},WF0{i % 4 + 1},S{i:03d}{k},2025-06-{day:02d},"
                         f"2160-0,{0.8 + (i % 9) * 0.35:.2f},mg/dL,final")  # fmt: skip
    inbox = write_inbox(
        tmp_path, {"westerfold_general_lab/results_2025-06.csv": "\n".join([header, *lines]) + "\n"}
    )
    with run_month(small_config, inbox, tmp_path / "out", period="2025-06") as con:
        published = con.sql("select * from published.district_ckd_prevalence").pl()
        internal = con.sql("select * from main.district_ckd_prevalence").pl()
        if published.height:
            order = ["district_code", "sex", "age_band"]
            published, internal = published.sort(order), internal.sort(order)
            assert exposed(published, internal) == []
        for table in PUBLISHED_TABLES:
            for column in table.counts:
                got = rows(
                    con,
                    f"select count(*) from published.{table.name} where {column} between 1 and 10",
                )
                assert got == [(0,)], (table.name, column)
        assert rows(con, "select count(*) from main.district_ckd_prevalence")[0][0] > 0


@pytest.mark.parametrize("width", [0, 10, 20])
def test_the_protection_width_is_honoured(width):
    cells = {("WF01", "F", "40-44"): (30, 5, 2), ("WF01", "M", "40-44"): (25, 12, 4),
             ("WF02", "F", "40-44"): (40, 22, 11), ("WF02", "M", "40-44"): (33, 3, 0)}  # fmt: skip
    internal = prevalence(cells)
    rules = DisclosureSettings(protection_width=width)
    result = audit_frames({PREVALENCE.name: internal}, rules)
    if PREVALENCE.name not in result.withheld:
        assert exposed(result.frames[PREVALENCE.name], internal, rules) == []


def test_a_rate_that_pins_an_age_group_is_rounded_coarser_or_blanked():
    # The issue's district again, as rows: at two decimals the rate, its interval and the total
    # give 9 / 8 / 20 back (rate_splits above), so the rate must not go out as it is.
    from pipeline.stages.disclose.audit import RateBasis, protect_rates, table_from_frames

    weights = collapse_weights([0, 65, 75])
    cells = [
        ("F", "40-44", "0-64", 692, 9),
        ("F", "70-74", "65-74", 125, 8),
        ("F", "80-84", "75+", 101, 20),
    ]
    frame = pl.DataFrame([
        {"period": "2025-06", "district_code": "WF02", "sex": s, "age_band": b, "persons_tested": 100 + i,
         "persons_ckd": c, "persons_ckd_g3_g5": 0, "population": p, "standardisation_age_group": g,
         "ckd_per_1000_standardised": None, "ckd_per_1000_standardised_low": None,
         "ckd_per_1000_standardised_high": None, "ckd_per_1000_standardised_flag": None}
        for i, (s, b, g, p, c) in enumerate(cells)
    ] + [{"period": "2025-06", "district_code": "WF02", "sex": "ALL", "age_band": "ALL", "persons_tested": 303,
          "persons_ckd": 37, "persons_ckd_g3_g5": 0, "population": 918, "standardisation_age_group": None,
          "ckd_per_1000_standardised": 21.31, "ckd_per_1000_standardised_low": 13.63,
          "ckd_per_1000_standardised_high": 32.41, "ckd_per_1000_standardised_flag": ""}])  # fmt: skip
    published = frame.with_columns(pl.when(pl.col("persons_ckd") <= 10).then(None).otherwise(pl.col("persons_ckd"))
                                   .alias("persons_ckd"))  # fmt: skip
    table = table_from_frames(PREVALENCE.name, published, frame, PREVALENCE)
    bounds, notes = protect_rates(
        table, RateBasis(("0-64", "65-74", "75+"), tuple(weights), 0.95), RULES
    )
    flag = table.published["ckd_per_1000_standardised_flag"][3]
    assert flag in ("rounded", "suppressed") and notes
    if flag == "rounded":
        rate = table.published["ckd_per_1000_standardised"][3]
        assert rate != 21.31 and all(not (1 <= lo and hi <= 10) for lo, hi in bounds[3].values())
    else:
        assert table.published["ckd_per_1000_standardised"][3] is None


def test_the_case_that_used_to_stop_the_run_is_published_safely():
    # Counts 1-2 suppressed: a district total of 2 over two cells of 1 (hand calculation). The
    # per-table check used to raise ("cannot be protected by blanking more"); now the run goes on.
    rules = DisclosureSettings(suppress_max=2)
    internal = prevalence({("WF01", "F", "40-44"): (30, 1, 0), ("WF01", "M", "40-44"): (30, 1, 0),
                           ("WF02", "F", "40-44"): (80, 50, 20)})  # fmt: skip
    result = audit_frames({PREVALENCE.name: internal}, rules)
    if PREVALENCE.name in result.withheld:
        assert result.frames[PREVALENCE.name].height == 0
    else:
        assert exposed(result.frames[PREVALENCE.name], internal, rules) == []


def test_a_table_another_step_publishes_is_audited_with_the_rest():
    # A new published table, declared nowhere in the disclosure module (as another engineer's new
    # indicator would be): its district rows add up to its 'ALL' row, which the audit finds from
    # the rows alone. WF01 = 35 - 30 = 5 (hand calculation) unless one more count is blanked.
    con = duckdb.connect()
    con.execute("create schema published")
    for table in PUBLISHED_TABLES:
        con.execute(f"create table {table.name} (period varchar)")
    con.execute(
        "create table district_new_counts (period varchar, district_code varchar, persons bigint)"
    )
    con.execute("insert into district_new_counts values ('2025-06', 'WF01', 5), ('2025-06', 'WF02', 30), "
                "('2025-06', 'WF03', 0), ('2025-06', 'ALL', 35)")  # fmt: skip
    con.execute("create table published.district_new_counts as select *, 1 as n_suppressed, 'x' as suppression "
                "from district_new_counts")  # fmt: skip
    con.execute(
        "update published.district_new_counts set persons = null where district_code = 'WF01'"
    )
    disclose_stage(con, RULES, Period.parse("2025-06"))
    got = dict(
        con.execute("select district_code, persons from published.district_new_counts").fetchall()
    )
    assert got["WF01"] is None
    assert got["WF02"] is None or got["ALL"] is None  # 5 can no longer be worked out
    assert got["WF03"] == 0  # a zero is published


# --------------------------------------------------------------------------- both tables together


def joint_exposed(
    prev: pl.DataFrame, cat: pl.DataFrame, prev_in: pl.DataFrame, cat_in: pl.DataFrame
) -> list:
    """Blanked counts of the prevalence and categories tables, read together, that a reader
    confines to 1-10 or to less than the width: the sums of each table, the categories of each
    axis adding up to the district's persons_ckd (KDIGO 2012 GFR and albuminuria categories), G3a
    to G5 to its persons_ckd_g3_g5, the districts of a category to 'ALL', and the orders of
    ORDER; least and greatest values by linear programming (scipy.optimize.linprog)."""
    cells: dict[tuple, tuple] = {}  # name -> (published, internal)
    for i in range(prev.height):
        for column in COUNTS:
            cells[("p", column, i)] = (prev[column][i], prev_in[column][i])
    cat_keys = cat.select("district_code", "category_axis", "category").rows()
    for i, key in enumerate(cat_keys):
        cells[("c", *key)] = (cat["persons_ckd"][i], cat_in["persons_ckd"][i])
    unknown = [n for n, (shown, _) in cells.items() if shown is None]
    index = {n: j for j, n in enumerate(unknown)}
    equations, orders = [], []
    for column in COUNTS:
        for total, rows_ in sum_groups(prev, PREVALENCE):
            equations.append(
                [(("p", column, total), -1.0)] + [(("p", column, r), 1.0) for r in rows_]
            )
    for i in range(prev.height):
        for small, large in ORDER:
            orders.append([(("p", small, i), 1.0), (("p", large, i), -1.0)])
    total_row = {k[0]: i for i, k in enumerate(prev.select("district_code", "sex", "age_band").rows())
                 if k[1] == "ALL"}  # fmt: skip
    districts = sorted({k[0] for k in cat_keys})
    for d in districts:
        for axis, categories in AXES.items():
            equations.append(
                [(("p", "persons_ckd", total_row[d]), -1.0)]
                + [(("c", d, axis, c), 1.0) for c in categories]
            )
        equations.append(
            [(("p", "persons_ckd_g3_g5", total_row[d]), -1.0)]
            + [(("c", d, "gfr", c), 1.0) for c in G3_G5]
        )
    for axis, categories in AXES.items():
        for c in categories:
            equations.append(
                [(("c", "ALL", axis, c), -1.0)]
                + [(("c", d, axis, c), 1.0) for d in districts if d != "ALL"]
            )

    def matrix(rows_: list) -> tuple[list, list]:
        a, b = [], []
        for equation in rows_:
            row, rhs = np.zeros(len(unknown)), 0.0
            for name, sign in equation:
                if name in index:
                    row[index[name]] += sign
                else:
                    rhs -= sign * cells[name][0]
            if row.any():
                a.append(row)
                b.append(rhs)
        return a, b

    if not unknown:
        return []
    a_eq, b_eq = matrix(equations)
    a_ub, b_ub = matrix(orders)
    kwargs = {"A_eq": np.array(a_eq) if a_eq else None, "b_eq": b_eq or None,
              "A_ub": np.array(a_ub) if a_ub else None, "b_ub": b_ub or None}  # fmt: skip
    bounds = [(1.0 if cells[n][1] > 0 else 0.0, None) for n in unknown]
    bad = []
    for n, j in index.items():
        if cells[n][1] == 0:
            continue
        c = np.zeros(len(unknown))
        c[j] = 1.0
        low = linprog(c, bounds=bounds, method="highs", **kwargs)
        high = linprog(-c, bounds=bounds, method="highs", **kwargs)
        assert low.status == 0, low.message
        lo, hi = (
            np.ceil(low.fun - 1e-6),
            (np.inf if high.status == 3 else np.floor(-high.fun + 1e-6)),
        )
        if (
            lo >= RULES.suppress_min and hi <= RULES.suppress_max
        ) or hi - lo < RULES.protection_width:
            bad.append((n, lo, hi))
    return bad


@settings(max_examples=examples(15, 6), deadline=None, database=None)
@given(people())
def test_prevalence_and_categories_read_together_give_no_blank_away(persons):
    prevalence_in, categories_in = person_frames(persons)
    frames = {"district_ckd_prevalence": prevalence_in, "district_ckd_categories": categories_in}
    result = audit_frames(frames, RULES)
    assert result.added >= 0  # a count of blanks added (a withheld table's own are not subtracted)
    if result.withheld:
        for name in result.withheld:
            assert result.frames[name].height == 0
        return
    prev, cat = result.frames["district_ckd_prevalence"], result.frames["district_ckd_categories"]
    assert joint_exposed(prev, cat, prevalence_in, categories_in) == []
