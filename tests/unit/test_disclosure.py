"""Tests for pipeline.disclosure: small counts (1-10, common practice in official statistics)
and the rates built on them are blanked before anything is published, and so are the counts that
would give a blanked one away through a published total (complementary suppression, common
practice in statistical disclosure control). The recovery checks are written here independently
of the module: subtraction from the totals, and a linear-programming audit of every blanked cell
with scipy.optimize.linprog (the usual audit of suppressed tables, common practice)."""

from __future__ import annotations

import random
import time
from pathlib import Path

import duckdb
import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.optimize import linprog

from pipeline.disclosure import PUBLISHED_TABLES, DisclosureError, PublishedTable, disclose_stage, suppress
from pipeline.periods import Period
from pipeline.settings import DisclosureSettings
from tests.conftest import rows, run_month, write_inbox

# No example database: the run must not write into the working tree.
SETTINGS = settings(max_examples=200, deadline=None, database=None)
RULES = DisclosureSettings()  # 1..10, config/pipeline.yaml default
TABLES = {t.name: t for t in PUBLISHED_TABLES}
PREVALENCE = TABLES["district_ckd_prevalence"]
COVERAGE = TABLES["district_screening_coverage"]


def prevalence_frame(cells: list[dict]) -> pl.DataFrame:
    base = {"period": "2025-06", "district_code": "WF01", "sex": "F", "age_band": "50-54",
            "persons_tested": 100, "persons_ckd": 20, "persons_ckd_g3_g5": 12, "population": 500}  # fmt: skip
    out = []
    for cell in cells:
        row = {**base, **cell}
        row["ckd_share_of_tested"] = round(row["persons_ckd"] / row["persons_tested"], 4) if row["persons_tested"] else None
        row["ckd_per_1000_residents"] = round(1000 * row["persons_ckd"] / row["population"], 2)
        out.append(row)
    return pl.DataFrame(out)


@pytest.mark.parametrize(("count", "blanked"), [(0, False), (1, True), (5, True), (10, True), (11, False), (250, False)])
def test_counts_1_to_10_are_blanked_0_and_11_kept(count, blanked):
    out = suppress(prevalence_frame([{"persons_ckd_g3_g5": count}]), PREVALENCE, RULES)
    value = out["persons_ckd_g3_g5"].item()
    assert (value is None) == blanked
    if not blanked:
        assert value == count
    assert out["n_suppressed"].item() == int(blanked)


def test_rate_on_a_suppressed_count_is_blanked():
    out = suppress(prevalence_frame([{"persons_ckd": 4}, {"persons_tested": 9, "persons_ckd": 0}]), PREVALENCE, RULES)
    first, second = out.iter_rows(named=True)
    # numerator small: both rates built on it go
    assert first["persons_ckd"] is None
    assert first["ckd_share_of_tested"] is None and first["ckd_per_1000_residents"] is None
    # denominator small: the share goes, the per-resident rate (public population) stays
    assert second["persons_tested"] is None and second["ckd_share_of_tested"] is None
    assert second["persons_ckd"] == 0 and second["ckd_per_1000_residents"] == 0.0
    # the resident population is public and never blanked
    assert out["population"].to_list() == [500, 500]


def test_nothing_small_nothing_blanked():
    frame = prevalence_frame([{}])
    out = suppress(frame, PREVALENCE, RULES)
    assert out.drop("n_suppressed", "suppression").equals(frame)
    assert out["n_suppressed"].item() == 0
    assert out["suppression"].item() == ""


def test_configured_band_is_used():
    out = suppress(prevalence_frame([{"persons_ckd_g3_g5": 6}]), PREVALENCE, DisclosureSettings(suppress_max=5))
    assert out["persons_ckd_g3_g5"].item() == 6


counts = st.integers(min_value=0, max_value=2000)


@SETTINGS
@given(st.lists(st.tuples(counts, counts, counts, counts), min_size=1, max_size=30))
def test_property_no_published_count_in_1_to_10(cells):
    frame = pl.DataFrame(
        [{"period": "2025-06", "district_code": f"WF0{i % 4 + 1}", "persons_with_diabetes": d,
          "with_egfr": e, "with_egfr_and_acr": b, "with_acr": a,
          "share_with_both": b / d if d else None}
         for i, (d, e, a, b) in enumerate(cells)],
        schema_overrides={"share_with_both": pl.Float64},
    )  # fmt: skip
    out = suppress(frame, COVERAGE, RULES)
    for column in COVERAGE.counts:
        published = out[column].drop_nulls()
        assert not published.is_between(1, 10).any(), column
        # a count outside 1..10 is published unchanged
        kept = frame[column].filter(~frame[column].is_between(1, 10))
        assert published.to_list() == kept.to_list()
    small = frame.select(pl.any_horizontal(pl.col(c).is_between(1, 10) for c in COVERAGE.rates["share_with_both"]))
    assert out.filter(small.to_series())["share_with_both"].null_count() == int(small.to_series().sum())


def test_suppressed_cell_cannot_be_recovered_from_the_total():
    cells = prevalence_frame([
        {"age_band": "50-54", "persons_ckd": 4},
        {"age_band": "55-59", "persons_ckd": 30},
        {"age_band": "ALL", "sex": "ALL", "persons_ckd": 34},
    ])  # fmt: skip
    out = suppress(cells, PREVALENCE, RULES)
    published = out["persons_ckd"].to_list()
    assert published[0] is None
    recoverable = published[2] is not None and published[1] is not None
    assert not recoverable, f"blanked cell = {published[2]} - {published[1]}"


# --------------------------------------------------------------------------- complementary suppression
# Independent checkers: which rows add up to which (from the keys, as the SQL builds them), what
# a reader can subtract, and what a linear program can pin down.

SMALL = range(RULES.suppress_min, RULES.suppress_max + 1)
BANDS = ["0-4", "20-24", "50-54", "65-69", "80-84", "85+"]


def sum_groups(frame: pl.DataFrame, table) -> list[tuple[int, list[int]]]:
    """(total row, cell rows) per group: a district's cells under its total, districts under ALL."""
    keyed = list(frame.select(table.keys[1:]).iter_rows())
    index = {k: i for i, k in enumerate(keyed)}
    if table is COVERAGE:
        return [(index[("ALL",)], [i for i, k in enumerate(keyed) if k != ("ALL",)])]
    groups = [(index[("ALL", "ALL", "ALL")], [i for i, k in enumerate(keyed) if k[0] != "ALL" and k[1] == "ALL"])]
    for district in sorted({k[0] for k in keyed} - {"ALL"}):
        cells = [i for i, k in enumerate(keyed) if k[0] == district and k[1] != "ALL"]
        groups.append((index[(district, "ALL", "ALL")], cells))
    return groups


def recovered_by_subtraction(out: pl.DataFrame, table, column: str) -> list[int]:
    """Blanked cells a reader gets back by adding and subtracting published rows (both levels)."""
    known = dict(enumerate(out[column].to_list()))
    blanked = {i for i, v in known.items() if v is None}
    groups = sum_groups(out, table)
    changed = True
    while changed:
        changed = False
        for total, cells in groups:
            unknown = [c for c in [total, *cells] if known[c] is None]
            if len(unknown) == 1:
                (u,) = unknown
                rest = sum(known[c] for c in cells if c != u)
                known[u] = known[total] - rest if u != total else rest
                changed = True
    return sorted(i for i in blanked if known[i] is not None)


def pinned_by_linear_programming(out: pl.DataFrame, table, column: str) -> list[int]:
    """Blanked cells whose least and greatest feasible values coincide, given every published
    count, the sums, a blanked count being at least 1 (zeros are published), and what the
    ``suppression`` column says: a row marked secondary holds no small count, a row marked primary
    with one blanked count holds a small one there. Hierarchical sums form a network matrix, so
    the LP bounds are the integer bounds (common practice in disclosure auditing)."""
    values = out[column].to_list()
    unknown = [i for i, v in enumerate(values) if v is None]
    if not unknown:
        return []
    var = {row: j for j, row in enumerate(unknown)}
    bounds = []
    for row in unknown:
        flag, n_blanked = out["suppression"][row], out["n_suppressed"][row]
        if flag == "secondary":
            bounds.append((RULES.suppress_max + 1, None))
        elif flag == "primary" and n_blanked == 1:
            bounds.append((RULES.suppress_min, RULES.suppress_max))
        else:
            bounds.append((1, None))
    a_eq, b_eq = [], []
    for total, cells in sum_groups(out, table):
        coefficient = np.zeros(len(unknown))
        rhs = 0.0
        for row, sign in [(total, -1.0)] + [(c, 1.0) for c in cells]:
            if row in var:
                coefficient[var[row]] += sign
            else:
                rhs -= sign * values[row]
        if coefficient.any():
            a_eq.append(coefficient)
            b_eq.append(rhs)
    pinned = []
    for j, row in enumerate(unknown):
        c = np.zeros(len(unknown))
        c[j] = 1.0
        low = linprog(c, A_eq=a_eq or None, b_eq=b_eq or None, bounds=bounds, method="highs")
        high = linprog(-c, A_eq=a_eq or None, b_eq=b_eq or None, bounds=bounds, method="highs")
        assert low.status == 0 and high.status in (0, 3), (low.message, high.message)  # 3: unbounded above
        if high.status == 0 and -high.fun - low.fun < 0.5:
            pinned.append(row)
    return pinned


def table_frame(table, cells: dict[tuple, tuple[int, ...]]) -> pl.DataFrame:
    """A table as the SQL builds it: the given cells, every total, and the rates."""
    rows = []
    if table is COVERAGE:
        totals = {("ALL",): tuple(map(sum, zip(*cells.values())))}
    else:
        totals = {}
        for (district, _, _), counts in cells.items():
            key = (district, "ALL", "ALL")
            totals[key] = tuple(map(sum, zip(totals.get(key, (0,) * len(counts)), counts)))
        totals[("ALL", "ALL", "ALL")] = tuple(map(sum, zip(*cells.values())))
    for key, counts in {**cells, **totals}.items():
        row = {"period": "2025-06", **dict(zip(table.keys[1:], key)), **dict(zip(table.counts, counts))}
        if table is COVERAGE:
            row["share_with_both"] = round(counts[3] / counts[0], 4) if counts[0] else None
        else:
            # 100 residents per cell; a total has those of the cells under it
            population = 100 * sum(1 for k in cells if key[0] in ("ALL", k[0])) if key[1] == "ALL" else 100
            row["population"] = population
            row["ckd_share_of_tested"] = round(counts[1] / counts[0], 4) if counts[0] else None
            row["ckd_per_1000_residents"] = round(1000 * counts[1] / population, 2)
        rows.append(row)
    return pl.DataFrame(rows, schema_overrides={"share_with_both": pl.Float64, "ckd_share_of_tested": pl.Float64})


def prevalence_cells(draw_counts=st.integers(0, 60)):
    cell_keys = [(s, b) for s in ("F", "M") for b in BANDS]
    district = st.lists(st.sampled_from(cell_keys), min_size=1, max_size=8, unique=True)
    return st.lists(district, min_size=1, max_size=4).flatmap(lambda districts: st.fixed_dictionaries({
        (f"WF{d + 1:02d}", s, b): st.tuples(draw_counts, draw_counts, draw_counts)
        for d, keys in enumerate(districts) for s, b in keys}))  # fmt: skip


def coverage_cells(draw_counts=st.integers(0, 60)):
    four = st.tuples(draw_counts, draw_counts, draw_counts, draw_counts)
    return st.integers(1, 12).flatmap(lambda n: st.fixed_dictionaries({(f"WF{d + 1:02d}",): four for d in range(n)}))


def check_published(frame: pl.DataFrame, out: pl.DataFrame, table) -> None:
    """Every property a published table must have, checked from the outside."""
    assert out.height == frame.height
    blanked_any = pl.Series([False] * frame.height)
    for column in table.counts:
        before, after = frame[column], out[column]
        # no small count is published; what is published is the count unchanged; zeros stay
        assert not after.drop_nulls().is_in(list(SMALL)).any(), column
        assert (after.is_null() | (after == before)).all(), column
        assert not (after.is_null() & (before == 0)).any(), column
        assert (after.is_null() | ~before.is_in(list(SMALL))).all(), column
        # nothing a reader can subtract or solve for
        assert recovered_by_subtraction(out, table, column) == [], column
        # per group with a published total: no blanked cell, or at least two
        for total, cells in sum_groups(out, table):
            if after[total] is not None:
                assert sum(after[c] is None for c in cells) != 1, (column, total)
            if after[total] is not None and all(after[c] is not None for c in cells):
                assert after[total] == sum(after[c] for c in cells)
        blanked_any = blanked_any | after.is_null()
    # n_suppressed and the flag say what happened to the row
    n_blank = out.select(pl.sum_horizontal(pl.col(c).is_null().cast(pl.Int32) for c in table.counts)).to_series()
    assert out["n_suppressed"].to_list() == n_blank.to_list()
    small = frame.select(pl.any_horizontal(pl.col(c).is_in(list(SMALL)) for c in table.counts)).to_series()
    expected_flag = [("primary" if s else "secondary" if b else "") for s, b in zip(small, blanked_any)]
    assert out["suppression"].to_list() == expected_flag
    # a rate is blanked exactly when a count it is built on is blanked
    for rate, sources in ((r, s) for r, s in table.rates.items() if r in frame.columns):
        hidden = out.select(pl.any_horizontal(pl.col(s).is_null() for s in sources)).to_series()
        assert (out[rate].is_null() == (hidden | frame[rate].is_null())).all(), rate
        assert (hidden | (out[rate] == frame[rate]) | frame[rate].is_null()).all(), rate


@settings(max_examples=100, deadline=None, database=None)
@given(prevalence_cells())
def test_property_prevalence_published_safely(cells):
    frame = table_frame(PREVALENCE, cells)
    out = suppress(frame, PREVALENCE, RULES)
    check_published(frame, out, PREVALENCE)


@settings(max_examples=100, deadline=None, database=None)
@given(coverage_cells())
def test_property_coverage_published_safely(cells):
    frame = table_frame(COVERAGE, cells)
    out = suppress(frame, COVERAGE, RULES)
    check_published(frame, out, COVERAGE)


@settings(max_examples=20, deadline=None, database=None)
@given(st.one_of(prevalence_cells(st.integers(0, 14)), prevalence_cells()), st.randoms(use_true_random=False))
def test_property_no_blanked_cell_pinned_by_linear_programming(cells, rnd):
    # small counts (0..14) make ones, twos and elevens common: the cases subtraction misses
    frame = table_frame(PREVALENCE, cells)
    out = suppress(frame, PREVALENCE, RULES)
    for column in PREVALENCE.counts:
        assert pinned_by_linear_programming(out, PREVALENCE, column) == [], column
    # deterministic, and the row order does not matter
    assert suppress(frame, PREVALENCE, RULES).equals(out)
    order = list(range(frame.height))
    rnd.shuffle(order)
    shuffled = suppress(frame[order], PREVALENCE, RULES)
    assert shuffled.sort(PREVALENCE.keys).equals(out.sort(PREVALENCE.keys))


@settings(max_examples=15, deadline=None, database=None)
@given(coverage_cells(st.integers(0, 14)))
def test_property_coverage_no_blanked_cell_pinned_by_linear_programming(cells):
    frame = table_frame(COVERAGE, cells)
    out = suppress(frame, COVERAGE, RULES)
    for column in COVERAGE.counts:
        assert pinned_by_linear_programming(out, COVERAGE, column) == [], column


def one_column(table, column_values: dict[tuple, int]) -> pl.DataFrame:
    """A frame where only persons_ckd / with_acr varies; the other counts are large (no blanks)."""
    position = 1 if table is PREVALENCE else 2
    width = len(table.counts)
    cells = {k: tuple(v if i == position else 100 for i in range(width)) for k, v in column_values.items()}
    return table_frame(table, cells)


def test_two_ones_are_pinned_by_the_total_so_a_third_cell_goes():
    # cells 1, 1, 30 under a published total 32: the two blanked cells add up to 2 and each is at
    # least 1, so both are 1 (hand calculation); one more cell must go.
    frame = one_column(PREVALENCE, {("WF01", "F", "0-4"): 1, ("WF01", "F", "20-24"): 1, ("WF01", "M", "0-4"): 30,
                                    ("WF02", "F", "0-4"): 40})  # fmt: skip
    out = suppress(frame, PREVALENCE, RULES)
    got = dict(zip(out.select(["district_code", "sex", "age_band"]).iter_rows(), out["persons_ckd"]))
    assert got[("WF01", "F", "0-4")] is None and got[("WF01", "F", "20-24")] is None
    assert got[("WF01", "M", "0-4")] is None  # the third cell
    assert got[("WF01", "ALL", "ALL")] == 32 and got[("ALL", "ALL", "ALL")] == 72
    assert out.filter(pl.col("age_band") == "0-4", pl.col("sex") == "M")["suppression"].item() == "secondary"


def test_the_smallest_cell_that_protects_is_chosen():
    # primary 4 beside 30, 45 and 60: blanking 30 (the smallest) leaves 4 + 30 = 34 with the
    # small one in 1..10 and the other above 10: not pinned. 45 and 60 stay published.
    frame = one_column(PREVALENCE, {("WF01", "F", "0-4"): 4, ("WF01", "F", "20-24"): 45,
                                    ("WF01", "M", "0-4"): 30, ("WF01", "M", "20-24"): 60})  # fmt: skip
    out = suppress(frame, PREVALENCE, RULES)
    assert out["persons_ckd"].to_list()[:4] == [None, 45, None, 60]
    assert out["suppression"].to_list()[:4] == ["primary", "", "secondary", ""]


def test_a_secondary_of_eleven_beside_a_one_is_not_enough():
    # 1 and 11 blanked under a published total 52 - 40 = 12: the row marks say one is in 1..10 and
    # the other above 10, so they are 1 and 11 (hand calculation); 40 goes instead of 11.
    frame = one_column(PREVALENCE, {("WF01", "F", "0-4"): 1, ("WF01", "F", "20-24"): 11,
                                    ("WF01", "M", "0-4"): 40})  # fmt: skip
    out = suppress(frame, PREVALENCE, RULES)
    assert out["persons_ckd"].to_list()[:3] == [None, 11, None]


def test_a_lone_small_district_blanks_another_district_and_its_cell():
    # WF01 has only a 4: its total is 4 too (primary). Among the district totals under the
    # published ALL, it is alone, so the smallest other district total goes (WF03, 50), and then
    # WF03's total would be the sum of its published cells, so its smallest cell goes too.
    frame = one_column(PREVALENCE, {("WF01", "F", "0-4"): 4, ("WF01", "M", "0-4"): 0,
                                    ("WF02", "F", "0-4"): 70, ("WF02", "M", "0-4"): 40,
                                    ("WF03", "F", "0-4"): 20, ("WF03", "M", "0-4"): 30})  # fmt: skip
    out = suppress(frame, PREVALENCE, RULES)
    got = dict(zip(out.select(["district_code", "sex", "age_band"]).iter_rows(), out["persons_ckd"]))
    assert got[("WF01", "F", "0-4")] is None and got[("WF01", "ALL", "ALL")] is None
    assert got[("WF01", "M", "0-4")] == 0  # a zero is published as zero
    assert got[("WF03", "ALL", "ALL")] is None and got[("WF02", "ALL", "ALL")] == 110
    assert got[("WF03", "F", "0-4")] is None and got[("WF03", "M", "0-4")] == 30
    assert got[("ALL", "ALL", "ALL")] == 164
    assert recovered_by_subtraction(out, PREVALENCE, "persons_ckd") == []


def test_coverage_lone_small_district_blanks_the_next_smallest():
    frame = one_column(COVERAGE, {("WF01",): 7, ("WF02",): 25, ("WF03",): 19, ("WF04",): 0})
    out = suppress(frame, COVERAGE, RULES)
    assert out["with_acr"].to_list() == [None, 25, None, 0, 51]
    # the rates built on with_acr: none in this table (share_with_both uses other counts)
    assert out["share_with_both"].null_count() == 0


def test_rate_on_a_secondary_count_is_blanked():
    out = suppress(one_column(PREVALENCE, {("WF01", "F", "0-4"): 4, ("WF01", "M", "0-4"): 30}), PREVALENCE, RULES)
    second = out.row(1, named=True)
    assert second["persons_ckd"] is None and second["suppression"] == "secondary"
    # persons_ckd = rate x population / 1000 would give it back
    assert second["ckd_share_of_tested"] is None and second["ckd_per_1000_residents"] is None


def test_a_table_without_totals_gets_primary_suppression_only():
    frame = one_column(COVERAGE, {("WF01",): 7, ("WF02",): 25}).filter(pl.col("district_code") != "ALL")
    out = suppress(frame, COVERAGE, RULES)
    assert out["with_acr"].to_list() == [None, 25]


def test_a_row_outside_the_hierarchy_is_refused():
    frame = prevalence_frame([{"sex": "ALL", "age_band": "50-54"}])  # a sex total of one band: unknown
    with pytest.raises(DisclosureError):
        suppress(frame, PREVALENCE, RULES)


def test_a_pin_that_blanking_cannot_remove_stops_the_run():
    # Counts 1-2 suppressed: a district total of 2 (marked primary, the row's only blanked count,
    # so 1 or 2) over two blanked cells of at least 1 each is 2 = 1 + 1 whatever else is blanked
    # (hand calculation). Publishing nothing beats publishing that.
    frame = one_column(PREVALENCE, {("WF01", "F", "0-4"): 1, ("WF01", "M", "0-4"): 1, ("WF02", "F", "0-4"): 50})
    with pytest.raises(DisclosureError, match="cannot be protected"):
        suppress(frame, PREVALENCE, DisclosureSettings(suppress_max=2))


def test_counts_below_the_band_are_published_but_never_hide_a_cell():
    # suppress_min 3: 1 and 2 are published; a secondary is always above the band (so the
    # 'secondary' mark means "above 10"), hence 30 goes, not 2.
    frame = one_column(PREVALENCE, {("WF01", "F", "0-4"): 4, ("WF01", "F", "20-24"): 2, ("WF01", "M", "0-4"): 30})
    out = suppress(frame, PREVALENCE, DisclosureSettings(suppress_min=3))
    assert out["persons_ckd"].to_list()[:3] == [None, 2, None]


def test_disclose_stage_adds_new_columns_to_an_older_published_table():
    con = duckdb.connect()
    frame = one_column(COVERAGE, {("WF01",): 7, ("WF02",): 25, ("WF03",): 19})
    con.register("_frame", frame.to_arrow())
    con.execute("create table district_screening_coverage as select * from _frame")
    con.register("_empty", one_column(PREVALENCE, {("WF01", "F", "0-4"): 4}).clear().to_arrow())
    con.execute("create table district_ckd_prevalence as select * from _empty")  # an empty period
    for table in PUBLISHED_TABLES[2:]:  # the other published tables: empty too
        con.register("_none", pl.DataFrame({"period": [], "district_code": []},
                                            schema={"period": pl.String, "district_code": pl.String}).to_arrow())
        con.execute(f"create table {table.name} as select * from _none")
    con.execute("create schema published")
    con.execute("create table published.district_screening_coverage as "
                "select * replace ('2025-05' as period), 0::integer as n_suppressed from _frame")  # fmt: skip
    disclose_stage(con, RULES, Period.parse("2025-06"))
    got = con.execute("select period, district_code, with_acr, suppression from published.district_screening_coverage "
                      "order by period, district_code").fetchall()  # fmt: skip
    assert got[:4] == [("2025-05", "ALL", 51, None), ("2025-05", "WF01", 7, None),
                       ("2025-05", "WF02", 25, None), ("2025-05", "WF03", 19, None)]  # fmt: skip
    assert got[4:] == [("2025-06", "ALL", 51, ""), ("2025-06", "WF01", None, "primary"),
                       ("2025-06", "WF02", 25, ""), ("2025-06", "WF03", None, "secondary")]  # fmt: skip


def test_group_rates_are_blanked_when_a_cell_below_is_blanked():
    # A directly standardised rate on a total row is a weighted sum of the cells below it: with
    # the total it would give two blanked cells back (two equations, two unknowns).
    table = PublishedTable("district_ckd_prevalence", keys=PREVALENCE.keys, counts=PREVALENCE.counts,
                           rates=PREVALENCE.rates, public=PREVALENCE.public, levels=PREVALENCE.levels,
                           group_rates={"ckd_standardised_per_1000": ("persons_ckd",)})  # fmt: skip
    frame = one_column(PREVALENCE, {("WF01", "F", "0-4"): 4, ("WF01", "M", "0-4"): 30,
                                    ("WF02", "F", "0-4"): 50, ("WF02", "M", "0-4"): 60})  # fmt: skip
    frame = frame.with_columns(pl.lit(1.5).alias("ckd_standardised_per_1000"))
    out = suppress(frame, table, RULES)
    got = dict(zip(out.select(["district_code", "sex"]).iter_rows(), out["ckd_standardised_per_1000"]))
    assert got[("WF01", "ALL")] is None and got[("ALL", "ALL")] is None  # a blanked cell below
    assert got[("WF02", "ALL")] == 1.5


def test_real_sized_table_is_quick():
    # 15 districts x 2 sexes x 18 bands with many small counts, like the demo region
    rnd = random.Random(7)
    bands = [f"{low}-{low + 4}" for low in range(0, 85, 5)] + ["85+"]
    cells = {(f"WF{d:02d}", s, b): tuple(rnd.choice([0, 0, 1, 2, 3, 5, 8, 11, 12, 15, 25, 40, 80]) for _ in range(3))
             for d in range(1, 16) for s in ("F", "M") for b in bands}  # fmt: skip
    frame = table_frame(PREVALENCE, cells)
    started = time.perf_counter()
    out = suppress(frame, PREVALENCE, RULES)
    assert time.perf_counter() - started < 5
    for column in PREVALENCE.counts:
        assert recovered_by_subtraction(out, PREVALENCE, column) == []


# --------------------------------------------------------------------------- after a whole run


def test_published_tables_of_a_run_hold_no_small_count(tmp_path: Path, small_config: Path):
    header = "person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,status"
    lines = [f"WF-dis{i:04d},1960,F,WF0{i % 2 + 1},D{i:04d},2025-06-0{i % 9 + 1},2160-0,1.{i % 9},mg/dL,final"
             for i in range(14)]  # fmt: skip
    inbox = write_inbox(tmp_path, {"westerfold_general_lab/results_2025-06.csv": "\n".join([header, *lines]) + "\n"})
    with run_month(small_config, inbox, tmp_path / "out", period="2025-06") as con:
        for table in PUBLISHED_TABLES:
            internal = con.sql(f"select * from main.{table.name}").pl()
            published = con.sql(f"select * from published.{table.name}").pl()
            assert published.height == internal.height
            for column in table.counts:
                assert not published[column].drop_nulls().is_between(1, 10).any(), (table.name, column)
        # the check means something: the internal table has small counts to hide, and a
        # count above 10 (14 persons tested in all) is published
        assert rows(con, "select count(*) from main.district_ckd_prevalence where persons_tested between 1 and 10")[0][0] > 0
        assert rows(con, "select persons_tested from published.district_ckd_prevalence where district_code = 'ALL'") == [(14,)]
