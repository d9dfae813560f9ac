"""Tests for pipeline.stages.disclose.suppression: small counts (1-10, common practice in official statistics)
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

from pipeline.core.periods import Period
from pipeline.core.settings import DisclosureSettings
from pipeline.stages.disclose.suppression import (
    DisclosureError,
    PublishedTable,
    disclose_stage,
    suppress,
    suppress_tables,
)
from pipeline.warehouse.catalog import PUBLISHED_TABLES
from tests.conftest import examples, rows, run_month, write_inbox

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
        row["ckd_share_of_tested"] = (
            round(row["persons_ckd"] / row["persons_tested"], 4) if row["persons_tested"] else None
        )
        row["ckd_per_1000_residents"] = round(1000 * row["persons_ckd"] / row["population"], 2)
        out.append(row)
    return pl.DataFrame(out)


@pytest.mark.parametrize(
    ("count", "blanked"), [(0, False), (1, True), (5, True), (10, True), (11, False), (250, False)]
)
def test_counts_1_to_10_are_blanked_0_and_11_kept(count, blanked):
    out = suppress(prevalence_frame([{"persons_ckd_g3_g5": count}]), PREVALENCE, RULES)
    value = out["persons_ckd_g3_g5"].item()
    assert (value is None) == blanked
    if not blanked:
        assert value == count
    assert out["n_suppressed"].item() == int(blanked)


def test_rate_on_a_suppressed_count_is_blanked():
    out = suppress(
        prevalence_frame([{"persons_ckd": 4}, {"persons_tested": 9, "persons_ckd": 0}]),
        PREVALENCE,
        RULES,
    )
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
    out = suppress(
        prevalence_frame([{"persons_ckd_g3_g5": 6}]), PREVALENCE, DisclosureSettings(suppress_max=5)
    )
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
    small = frame.select(
        pl.any_horizontal(pl.col(c).is_between(1, 10) for c in COVERAGE.rates["share_with_both"])
    )
    assert out.filter(small.to_series())["share_with_both"].null_count() == int(
        small.to_series().sum()
    )


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
    groups = [
        (
            index[("ALL", "ALL", "ALL")],
            [i for i, k in enumerate(keyed) if k[0] != "ALL" and k[1] == "ALL"],
        )
    ]
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
    return _pinned_by_linprog(unknown, a_eq, b_eq, bounds)


def table_frame(table, cells: dict[tuple, tuple[int, ...]]) -> pl.DataFrame:
    """A table as the SQL builds it: the given cells, every total, and the rates."""
    rows = []
    if table is COVERAGE:
        totals = {("ALL",): tuple(map(sum, zip(*cells.values(), strict=False)))}
    else:
        totals = {}
        for (district, _, _), counts in cells.items():
            key = (district, "ALL", "ALL")
            totals[key] = tuple(
                map(sum, zip(totals.get(key, (0,) * len(counts)), counts, strict=False))
            )
        totals[("ALL", "ALL", "ALL")] = tuple(map(sum, zip(*cells.values(), strict=False)))
    for key, counts in {**cells, **totals}.items():
        row = {
            "period": "2025-06",
            **dict(zip(table.keys[1:], key, strict=False)),
            **dict(zip(table.counts, counts, strict=False)),
        }
        if table is COVERAGE:
            row["share_with_both"] = round(counts[3] / counts[0], 4) if counts[0] else None
        else:
            # 100 residents per cell; a total has those of the cells under it
            population = (
                100 * sum(1 for k in cells if key[0] in ("ALL", k[0])) if key[1] == "ALL" else 100
            )
            row["population"] = population
            row["ckd_share_of_tested"] = round(counts[1] / counts[0], 4) if counts[0] else None
            row["ckd_per_1000_residents"] = round(1000 * counts[1] / population, 2)
        rows.append(row)
    return pl.DataFrame(
        rows, schema_overrides={"share_with_both": pl.Float64, "ckd_share_of_tested": pl.Float64}
    )


COUNT_VALUES = st.integers(0, 60)


def prevalence_cells(draw_counts=COUNT_VALUES):
    cell_keys = [(s, b) for s in ("F", "M") for b in BANDS]
    district = st.lists(st.sampled_from(cell_keys), min_size=1, max_size=8, unique=True)
    return st.lists(district, min_size=1, max_size=4).flatmap(lambda districts: st.fixed_dictionaries({
        (f"WF{d + 1:02d}", s, b): st.tuples(draw_counts, draw_counts, draw_counts)
        for d, keys in enumerate(districts) for s, b in keys}))  # fmt: skip


def coverage_cells(draw_counts=COUNT_VALUES):
    four = st.tuples(draw_counts, draw_counts, draw_counts, draw_counts)
    return st.integers(1, 12).flatmap(
        lambda n: st.fixed_dictionaries({(f"WF{d + 1:02d}",): four for d in range(n)})
    )


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
    n_blank = out.select(
        pl.sum_horizontal(pl.col(c).is_null().cast(pl.Int32) for c in table.counts)
    ).to_series()
    assert out["n_suppressed"].to_list() == n_blank.to_list()
    small = frame.select(
        pl.any_horizontal(pl.col(c).is_in(list(SMALL)) for c in table.counts)
    ).to_series()
    expected_flag = [
        ("primary" if s else "secondary" if b else "")
        for s, b in zip(small, blanked_any, strict=False)
    ]
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
@given(
    st.one_of(prevalence_cells(st.integers(0, 14)), prevalence_cells()),
    st.randoms(use_true_random=False),
)
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
    cells = {
        k: tuple(v if i == position else 100 for i in range(width))
        for k, v in column_values.items()
    }
    return table_frame(table, cells)


def test_two_ones_are_pinned_by_the_total_so_a_third_cell_goes():
    # cells 1, 1, 30 under a published total 32: the two blanked cells add up to 2 and each is at
    # least 1, so both are 1 (hand calculation); one more cell must go.
    frame = one_column(PREVALENCE, {("WF01", "F", "0-4"): 1, ("WF01", "F", "20-24"): 1, ("WF01", "M", "0-4"): 30,
                                    ("WF02", "F", "0-4"): 40})  # fmt: skip
    out = suppress(frame, PREVALENCE, RULES)
    got = dict(
        zip(
            out.select(["district_code", "sex", "age_band"]).iter_rows(),
            out["persons_ckd"],
            strict=False,
        )
    )
    assert got[("WF01", "F", "0-4")] is None and got[("WF01", "F", "20-24")] is None
    assert got[("WF01", "M", "0-4")] is None  # the third cell
    assert got[("WF01", "ALL", "ALL")] == 32 and got[("ALL", "ALL", "ALL")] == 72
    assert (
        out.filter(pl.col("age_band") == "0-4", pl.col("sex") == "M")["suppression"].item()
        == "secondary"
    )


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
    got = dict(
        zip(
            out.select(["district_code", "sex", "age_band"]).iter_rows(),
            out["persons_ckd"],
            strict=False,
        )
    )
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
    out = suppress(
        one_column(PREVALENCE, {("WF01", "F", "0-4"): 4, ("WF01", "M", "0-4"): 30}),
        PREVALENCE,
        RULES,
    )
    second = out.row(1, named=True)
    assert second["persons_ckd"] is None and second["suppression"] == "secondary"
    # persons_ckd = rate x population / 1000 would give it back
    assert second["ckd_share_of_tested"] is None and second["ckd_per_1000_residents"] is None


def test_a_table_without_totals_gets_primary_suppression_only():
    frame = one_column(COVERAGE, {("WF01",): 7, ("WF02",): 25}).filter(
        pl.col("district_code") != "ALL"
    )
    out = suppress(frame, COVERAGE, RULES)
    assert out["with_acr"].to_list() == [None, 25]


def test_a_row_outside_the_hierarchy_is_refused():
    frame = prevalence_frame(
        [{"sex": "ALL", "age_band": "50-54"}]
    )  # a sex total of one band: unknown
    with pytest.raises(DisclosureError):
        suppress(frame, PREVALENCE, RULES)


def test_a_pin_that_blanking_cannot_remove_blanks_the_column_whole():
    # Counts 1-2 suppressed: a district total of 2 (marked primary, the row's only blanked count,
    # so 1 or 2) over two blanked cells of at least 1 each is 2 = 1 + 1 whatever else is blanked
    # (hand calculation). No crash: every non-zero count of the column is blanked, and the joint
    # audit (which publishes one mark, not primary/secondary) decides what is published.
    frame = one_column(
        PREVALENCE, {("WF01", "F", "0-4"): 1, ("WF01", "M", "0-4"): 1, ("WF02", "F", "0-4"): 50}
    )
    out = suppress(frame, PREVALENCE, DisclosureSettings(suppress_max=2))
    assert out["persons_ckd"].drop_nulls().to_list() == [0] * out["persons_ckd"].drop_nulls().len()


def test_counts_below_the_band_are_published_but_never_hide_a_cell():
    # suppress_min 3: 1 and 2 are published; a secondary is always above the band (so the
    # 'secondary' mark means "above 10"), hence 30 goes, not 2.
    frame = one_column(
        PREVALENCE, {("WF01", "F", "0-4"): 4, ("WF01", "F", "20-24"): 2, ("WF01", "M", "0-4"): 30}
    )
    out = suppress(frame, PREVALENCE, DisclosureSettings(suppress_min=3))
    assert out["persons_ckd"].to_list()[:3] == [None, 2, None]


def test_disclose_stage_adds_new_columns_to_an_older_published_table():
    con = duckdb.connect()
    frame = one_column(COVERAGE, {("WF01",): 7, ("WF02",): 25, ("WF03",): 19})
    con.register("_older", frame.to_arrow())
    con.execute("create table district_screening_coverage as select * from _older")
    con.register("_empty", one_column(PREVALENCE, {("WF01", "F", "0-4"): 4}).clear().to_arrow())
    con.execute("create table district_ckd_prevalence as select * from _empty")  # an empty period
    for table in PUBLISHED_TABLES[2:]:  # the other published tables: empty too
        con.register(
            "_none",
            pl.DataFrame(
                {"period": [], "district_code": []},
                schema={"period": pl.String, "district_code": pl.String},
            ).to_arrow(),
        )
        con.execute(f"create table {table.name} as select * from _none")
    con.execute("create schema published")
    con.execute("create table published.district_screening_coverage as "
                "select * replace ('2025-05' as period), 0::integer as n_suppressed from _older")  # fmt: skip
    disclose_stage(con, RULES, Period.parse("2025-06"))
    got = con.execute("select period, district_code, with_acr, suppression from published.district_screening_coverage "
                      "order by period, district_code").fetchall()  # fmt: skip
    assert got[:4] == [("2025-05", "ALL", 51, None), ("2025-05", "WF01", 7, None),
                       ("2025-05", "WF02", 25, None), ("2025-05", "WF03", 19, None)]  # fmt: skip
    # one mark for every blank in the published table (which one is primary stays internal)
    assert got[4:] == [("2025-06", "ALL", 51, ""), ("2025-06", "WF01", None, "suppressed"),
                       ("2025-06", "WF02", 25, ""), ("2025-06", "WF03", None, "suppressed")]  # fmt: skip


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
    got = dict(
        zip(
            out.select(["district_code", "sex"]).iter_rows(),
            out["ckd_standardised_per_1000"],
            strict=False,
        )
    )
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
    inbox = write_inbox(
        tmp_path, {"westerfold_general_lab/results_2025-06.csv": "\n".join([header, *lines]) + "\n"}
    )
    with run_month(small_config, inbox, tmp_path / "out", period="2025-06") as con:
        for table in PUBLISHED_TABLES:
            internal = con.sql(f"select * from main.{table.name}").pl()
            published = con.sql(f"select * from published.{table.name}").pl()
            assert published.height == internal.height
            for column in table.counts:
                assert not published[column].drop_nulls().is_between(1, 10).any(), (
                    table.name,
                    column,
                )
        # the check means something: the internal table has small counts to hide, and a
        # count above 10 (14 persons tested in all) is published
        assert (
            rows(
                con,
                "select count(*) from main.district_ckd_prevalence where persons_tested between 1 and 10",
            )[0][0]
            > 0
        )
        assert rows(
            con,
            "select persons_tested from published.district_ckd_prevalence where district_code = 'ALL'",
        ) == [(14,)]


# --------------------------------------------------------------------------- CKD by category
# district_ckd_categories: per district, persons with confirmed CKD by KDIGO GFR category and,
# again, by albuminuria category (KDIGO 2012). The categories of one axis add up to the district's
# persons_ckd of district_ckd_prevalence, G3a..G5 to its persons_ckd_g3_g5, the districts to ALL.
# The audit below is written independently of the module: one integer program (scipy's milp,
# HiGHS) over both published tables, every sum a reader knows, and what the flags say.

CATEGORIES = TABLES["district_ckd_categories"]
G_CATEGORIES = ("G1", "G2", "G3a", "G3b", "G4", "G5", "unknown")
A_CATEGORIES = ("A1", "A2", "A3", "unknown")
G3_G5 = ("G3a", "G3b", "G4", "G5")
AXES = {"gfr": G_CATEGORIES, "albuminuria": A_CATEGORIES}


def person_frames(persons: dict[str, list[tuple]]) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Both internal tables from the same invented persons: (sex, age band, has CKD, GFR
    category, albuminuria category) per person tested, by district."""
    cells: dict[tuple, tuple[int, int, int]] = {}
    tally: dict[tuple, int] = {}
    tested: dict[str, int] = {}
    for district, people in persons.items():
        for sex, band, ckd, g, a in people:
            t, c, g35 = cells.get((district, sex, band), (0, 0, 0))
            cells[(district, sex, band)] = (t + 1, c + ckd, g35 + (ckd and g in G3_G5))
            for d in (district, "ALL"):
                tested[d] = tested.get(d, 0) + 1
                if ckd:
                    tally[(d, "gfr", g)] = tally.get((d, "gfr", g), 0) + 1
                    tally[(d, "albuminuria", a)] = tally.get((d, "albuminuria", a), 0) + 1
    prevalence = table_frame(PREVALENCE, cells)
    districts = sorted({d for d, _, _ in cells}) + ["ALL"]
    rows_ = []
    for d in districts:
        for axis, categories in AXES.items():
            for category in categories:
                x, n = tally.get((d, axis, category), 0), tested[d]
                rows_.append(
                    {
                        "period": "2025-06",
                        "district_code": d,
                        "category_axis": axis,
                        "category": category,
                        "persons_ckd": x,
                        "persons_tested": n,
                        "ckd_per_100_tested": round(100 * x / n, 2),
                    }
                )
    return prevalence, pl.DataFrame(rows_)


def people(max_size: int = 40):
    person = st.tuples(st.sampled_from(("F", "M")), st.sampled_from(BANDS[:3]), st.booleans(),
                       st.sampled_from(G_CATEGORIES), st.sampled_from(A_CATEGORIES))  # fmt: skip
    district = st.lists(person, min_size=1, max_size=max_size)
    return st.lists(district, min_size=1, max_size=3).map(
        lambda ds: {f"WF{i + 1:02d}": d for i, d in enumerate(ds)}
    )


def jointly_pinned(prevalence: pl.DataFrame, categories: pl.DataFrame) -> list[tuple]:
    """Blanked counts of either published table whose least and greatest integer values coincide,
    given every published count of persons_ckd and persons_ckd_g3_g5 (prevalence) and persons_ckd
    (categories), every sum between them, and the flags: prevalence as in
    pinned_by_linear_programming; categories primary 1..10, secondary 11 or more, withheld 0 or
    more. A withheld zero may be pinned (a zero is published anyway)."""
    from scipy.optimize import Bounds, LinearConstraint, milp

    names, lows, highs, known = [], [], [], {}
    ref: dict[tuple, object] = {}

    def add(name: tuple, value, low, high):
        if value is None:
            ref[name] = len(names)
            names.append(name)
            lows.append(low)
            highs.append(high)
        else:
            ref[name] = None
            known[name] = value

    for column in ("persons_ckd", "persons_ckd_g3_g5"):
        for i, value in enumerate(prevalence[column].to_list()):
            flag, n_blank = prevalence["suppression"][i], prevalence["n_suppressed"][i]
            low, high = ((RULES.suppress_max + 1, np.inf) if flag == "secondary" else
                         (RULES.suppress_min, RULES.suppress_max) if flag == "primary" and n_blank == 1
                         else (1, np.inf))  # fmt: skip
            add(("prevalence", column, i), value, low, high)
    for r in categories.iter_rows(named=True):
        flag = r["suppression"]
        low, high = {"primary": (1, 10), "secondary": (11, np.inf), "withheld": (0, np.inf)}.get(
            flag, (0, np.inf)
        )
        add(
            ("categories", r["district_code"], r["category_axis"], r["category"]),
            r["persons_ckd"],
            low,
            high,
        )
    equations: list[list[tuple[tuple, float]]] = []
    for column in ("persons_ckd", "persons_ckd_g3_g5"):
        for total, cells in sum_groups(prevalence, PREVALENCE):
            equations.append(
                [(("prevalence", column, total), -1.0)]
                + [(("prevalence", column, c), 1.0) for c in cells]
            )
    total_row = {k[0]: i for i, k in enumerate(prevalence.select(["district_code", "sex", "age_band"]).iter_rows())
                 if k[1] == "ALL" and k[2] == "ALL"}  # fmt: skip
    districts = sorted(set(categories["district_code"]))
    for d in districts:
        for axis, categories_ in AXES.items():
            equations.append(
                [(("prevalence", "persons_ckd", total_row[d]), -1.0)]
                + [(("categories", d, axis, c), 1.0) for c in categories_]
            )
        equations.append(
            [(("prevalence", "persons_ckd_g3_g5", total_row[d]), -1.0)]
            + [(("categories", d, "gfr", c), 1.0) for c in G3_G5]
        )
    for axis, categories_ in AXES.items():
        for c in categories_:
            equations.append(
                [(("categories", "ALL", axis, c), -1.0)]
                + [(("categories", d, axis, c), 1.0) for d in districts if d != "ALL"]
            )
    a_eq, b_eq = [], []
    for equation in equations:
        row, rhs = np.zeros(len(names)), 0.0
        for name, sign in equation:
            if ref[name] is None:
                rhs -= sign * known[name]
            else:
                row[ref[name]] += sign
        if row.any():
            a_eq.append(row)
            b_eq.append(rhs)
        else:
            assert abs(rhs) < 1e-9, equation  # the published sums hold
    if not names:
        return []
    constraints = [LinearConstraint(np.array(a_eq), b_eq, b_eq)] if a_eq else []
    box = Bounds(np.array(lows, dtype=float), np.array(highs, dtype=float))
    pinned = []
    for j, name in enumerate(names):
        c = np.zeros(len(names))
        c[j] = 1.0
        low = milp(c, constraints=constraints, integrality=np.ones(len(names)), bounds=box)
        high = milp(-c, constraints=constraints, integrality=np.ones(len(names)), bounds=box)
        # feasible (the actual counts are a solution); 3, or 4 (infeasible or unbounded) after a
        # feasible least value: unbounded above
        assert low.status == 0 and high.status in (0, 3, 4), (low.message, high.message)
        if high.status == 0 and round(-high.fun) == round(low.fun):
            withheld_zero = name[0] == "categories" and round(low.fun) == 0 and categories.filter(
                (pl.col("district_code") == name[1]) & (pl.col("category_axis") == name[2])
                & (pl.col("category") == name[3]))["suppression"].item() == "withheld"  # fmt: skip
            if not withheld_zero:
                pinned.append(name)
    return pinned


def check_categories(
    prevalence: pl.DataFrame, categories: pl.DataFrame, out: dict[str, pl.DataFrame]
) -> None:
    """Every property the published categories table must have, checked from the outside."""
    prev, cat = out["district_ckd_prevalence"], out["district_ckd_categories"]
    # the categories table changes nothing in the prevalence table
    assert prev.equals(suppress(prevalence, PREVALENCE, RULES))
    assert cat.height == categories.height
    before, after, flag = categories["persons_ckd"], cat["persons_ckd"], cat["suppression"]
    assert not after.drop_nulls().is_in(list(SMALL)).any()  # no count from 1 to 10
    assert (after.is_null() | (after == before)).all()  # a published count is the count
    assert (after.is_not_null() | flag.is_in(["primary", "secondary", "withheld"])).all()
    assert ((flag == "primary") == (before.is_in(list(SMALL)) & (flag != "withheld"))).all()
    assert (after.is_null() == flag.is_in(["primary", "secondary", "withheld"])).all()
    assert (
        before.filter(flag == "secondary") > RULES.suppress_max
    ).all()  # 'secondary' means above 10
    assert not (
        after.is_null() & (before == 0) & (flag != "withheld")
    ).any()  # zeros shown unless withheld
    assert cat["n_suppressed"].to_list() == after.is_null().cast(pl.Int32).to_list()
    # withheld is all or nothing per district and axis, and follows a blank total of the other table
    shown_total = {
        r["district_code"]: r for r in prev.filter(pl.col("sex") == "ALL").iter_rows(named=True)
    }
    for (district, axis), rows_ in cat.group_by(["district_code", "category_axis"]):
        flags = set(rows_["suppression"])
        assert "withheld" not in flags or flags == {"withheld"}, (district, axis, flags)
        total = shown_total[district]
        if total["persons_ckd"] is None or (axis == "gfr" and total["persons_ckd_g3_g5"] is None):
            assert flags == {"withheld"}, (district, axis)
    # persons_tested as published in the prevalence table; a rate on a blank count is blank
    tested = {d: r["persons_tested"] for d, r in shown_total.items()}
    assert cat["persons_tested"].to_list() == [tested[d] for d in cat["district_code"]]
    hidden = cat["persons_ckd"].is_null() | cat["persons_tested"].is_null()
    assert (cat["ckd_per_100_tested"].is_null() == hidden).all()
    # no blanked count of either table can be worked out from both together
    assert jointly_pinned(prev, cat) == []


@settings(max_examples=examples(25, 10), deadline=None, database=None)
@given(people())
def test_property_categories_published_safely(persons):
    prevalence, categories = person_frames(persons)
    out = suppress_tables(
        {"district_ckd_prevalence": prevalence, "district_ckd_categories": categories}, RULES
    )
    check_categories(prevalence, categories, out)


@settings(max_examples=10, deadline=None, database=None)
@given(people(max_size=120), st.randoms(use_true_random=False))
def test_property_categories_larger_counts_deterministic_and_order_free(persons, rnd):
    prevalence, categories = person_frames(persons)
    frames = {"district_ckd_prevalence": prevalence, "district_ckd_categories": categories}
    out = suppress_tables(frames, RULES)
    check_categories(prevalence, categories, out)
    order = list(range(categories.height))
    rnd.shuffle(order)
    shuffled = suppress(
        categories[order], CATEGORIES, RULES, {"district_ckd_prevalence": prevalence}
    )
    keys = list(CATEGORIES.keys)
    assert shuffled.sort(keys).equals(out["district_ckd_categories"].sort(keys))


def categories_case(gfr: dict[str, tuple[int, ...]], albuminuria: dict[str, tuple[int, ...]]):
    """Hand cases: per district the 7 GFR and 4 albuminuria counts; each person tested has CKD
    (persons_tested = persons_ckd), sex F, age band 50-54 for the GFR category's count."""
    persons = {}
    for d in gfr:
        g_list = [g for g, n in zip(G_CATEGORIES, gfr[d], strict=False) for _ in range(n)]
        a_list = [a for a, n in zip(A_CATEGORIES, albuminuria[d], strict=False) for _ in range(n)]
        assert len(g_list) == len(a_list), d
        persons[d] = [("F", "50-54", True, g, a) for g, a in zip(g_list, a_list, strict=False)]
    prevalence, categories = person_frames(persons)
    out = suppress_tables(
        {"district_ckd_prevalence": prevalence, "district_ckd_categories": categories}, RULES
    )
    return out["district_ckd_prevalence"], out["district_ckd_categories"]


def shown(cat: pl.DataFrame, district: str, axis: str) -> list:
    rows_ = cat.filter((pl.col("district_code") == district) & (pl.col("category_axis") == axis))
    return rows_["persons_ckd"].to_list()


def test_a_lone_small_category_takes_a_second_one_with_it():
    # G3a = 4 beside G1 40, G2 60, G3b 30 under a published total 134 (and G3a..G5 = 34 published):
    # 34 - 30 = 4 would give it back, so G3b goes too (hand calculation); A: all above 10.
    prev, cat = categories_case({"WF01": (40, 60, 4, 30, 0, 0, 0), "WF02": (50, 50, 30, 30, 0, 0, 0)},
                                {"WF01": (60, 40, 20, 14), "WF02": (60, 40, 30, 30)})  # fmt: skip
    assert shown(cat, "WF01", "gfr") == [40, 60, None, None, 0, 0, 0]
    # across districts: ALL's G3a (34) - WF02's 30 = 4, so WF02's G3a goes, then its G3b, or ALL's
    all_g3a = shown(cat, "ALL", "gfr")[2]
    assert all_g3a is None or shown(cat, "WF02", "gfr")[2] is None
    assert shown(cat, "WF01", "albuminuria") == [60, 40, 20, 14]
    assert jointly_pinned(prev, cat) == []


def test_a_total_blanked_in_prevalence_withholds_both_axes():
    # WF03 has 7 persons with CKD: persons_ckd 7 is blanked in district_ckd_prevalence, so every
    # category of both axes of WF03 is withheld, zeros too (one total, shared by the two axes).
    prev, cat = categories_case({"WF01": (20, 30, 25, 0, 0, 0, 0), "WF02": (25, 25, 25, 0, 0, 0, 0),
                                 "WF03": (0, 0, 7, 0, 0, 0, 0)},
                                {"WF01": (40, 35, 0, 0), "WF02": (40, 35, 0, 0), "WF03": (7, 0, 0, 0)})  # fmt: skip
    wf03 = cat.filter(pl.col("district_code") == "WF03")
    assert wf03["persons_ckd"].null_count() == wf03.height == 11
    assert set(wf03["suppression"]) == {"withheld"}
    assert jointly_pinned(prev, cat) == []


def test_a_blank_g3_g5_total_withholds_the_gfr_axis_only():
    # WF01: persons_ckd 60 published, persons_ckd_g3_g5 = 5 blanked in district_ckd_prevalence:
    # G1 + G2 + unknown = 60 - 5 would give it back, so the whole GFR axis is withheld.
    prev, cat = categories_case({"WF01": (25, 30, 5, 0, 0, 0, 0), "WF02": (25, 25, 25, 0, 0, 0, 0)},
                                {"WF01": (30, 30, 0, 0), "WF02": (40, 35, 0, 0)})  # fmt: skip
    total = prev.filter((pl.col("district_code") == "WF01") & (pl.col("sex") == "ALL")).row(
        0, named=True
    )
    assert total["persons_ckd"] == 60 and total["persons_ckd_g3_g5"] is None
    assert shown(cat, "WF01", "gfr") == [None] * 7
    assert shown(cat, "WF01", "albuminuria") == [30, 30, 0, 0]
    assert jointly_pinned(prev, cat) == []


def test_two_ones_next_to_a_published_zero_are_withheld():
    # G1 = 1, G2 = 1, unknown = 0: G1 + G2 + unknown = persons_ckd - persons_ckd_g3_g5 = 2 is
    # known from district_ckd_prevalence, so both are 1 whatever else is blanked (hand
    # calculation): a zero is never blanked, so the axis is withheld.
    prev, cat = categories_case({"WF01": (1, 1, 20, 20, 0, 0, 0), "WF02": (25, 25, 25, 0, 0, 0, 0)},
                                {"WF01": (22, 20, 0, 0), "WF02": (40, 35, 0, 0)})  # fmt: skip
    assert shown(cat, "WF01", "gfr") == [None] * 7
    assert jointly_pinned(prev, cat) == []


def test_categories_that_do_not_add_up_are_refused():
    prevalence, categories = person_frames({"WF01": [("F", "50-54", True, "G2", "A1")] * 12})
    broken = categories.with_columns(pl.when(pl.col("category") == "G2").then(13).otherwise(pl.col("persons_ckd"))
                                     .alias("persons_ckd"))  # fmt: skip
    with pytest.raises(DisclosureError, match="add up"):
        suppress(broken, CATEGORIES, RULES, {"district_ckd_prevalence": prevalence})
    with pytest.raises(DisclosureError, match="district_ckd_prevalence"):
        suppress(categories, CATEGORIES, RULES)


def test_real_sized_categories_table_is_quick():
    # 15 districts of a few hundred persons, like the demo region
    rnd = random.Random(11)
    persons = {f"WF{d:02d}": [(rnd.choice("FM"), rnd.choice(BANDS), rnd.random() < 0.2,
                               rnd.choices(G_CATEGORIES, [3, 8, 25, 20, 10, 3, 1])[0],
                               rnd.choices(A_CATEGORIES, [40, 30, 8, 15])[0]) for _ in range(rnd.randint(80, 900))]
               for d in range(1, 16)}  # fmt: skip
    prevalence, categories = person_frames(persons)
    started = time.perf_counter()
    out = suppress_tables(
        {"district_ckd_prevalence": prevalence, "district_ckd_categories": categories}, RULES
    )
    assert time.perf_counter() - started < 10
    cat = out["district_ckd_categories"]
    assert not cat["persons_ckd"].drop_nulls().is_in(list(SMALL)).any()
    assert cat["persons_ckd"].drop_nulls().len() > 20  # not everything blanked


# --------------------------------------------------------------------------- standardised rates
# A district's directly standardised rate is a function of its counts per broad age group (sexes
# pooled) and the public population (Ahmad et al. 2001 method; Fay and Feuer 1997 limits). The
# audit: the LP of pinned_by_linear_programming with every broad-group count of every published
# rate added as a known sum (a reader who backs them out of the rates knows at most that).

STANDARDISED = (
    "ckd_per_1000_standardised",
    "ckd_per_1000_standardised_low",
    "ckd_per_1000_standardised_high",
)
BROAD = {
    "0-4": "0-64",
    "20-24": "0-64",
    "50-54": "0-64",
    "65-69": "65-74",
    "80-84": "75+",
    "85+": "75+",
}


def with_standardised(frame: pl.DataFrame) -> pl.DataFrame:
    """A prevalence frame with the columns add_standardised_rates writes (the rate's value does
    not matter to the disclosure rule, only where it is)."""
    is_cell = (pl.col("sex") != "ALL") & (pl.col("age_band") != "ALL")
    total = pl.col("sex") == "ALL"
    return frame.with_columns(
        *[pl.when(total).then(pl.lit(12.5)).otherwise(None).alias(c) for c in STANDARDISED],
        pl.when(is_cell)
        .then(pl.col("age_band").replace_strict(BROAD, default=None))
        .otherwise(None)
        .alias("standardisation_age_group"),
    )


def pinned_with_rates(frame: pl.DataFrame, out: pl.DataFrame) -> list[int]:
    """pinned_by_linear_programming for persons_ckd, with each published rate's broad-group
    counts (from the internal frame) as further published sums."""
    values = out["persons_ckd"].to_list()
    unknown = [i for i, v in enumerate(values) if v is None]
    if not unknown:
        return []
    var = {row: j for j, row in enumerate(unknown)}
    bounds = []
    for row in unknown:
        flag, n_blanked = out["suppression"][row], out["n_suppressed"][row]
        bounds.append(
            (RULES.suppress_max + 1, None)
            if flag == "secondary"
            else (RULES.suppress_min, RULES.suppress_max)
            if flag == "primary" and n_blanked == 1
            else (1, None)
        )
    sums = [(total, cells, None) for total, cells in sum_groups(out, PREVALENCE)]
    keyed = list(out.select(["district_code", "sex", "age_band"]).iter_rows())
    group = frame["standardisation_age_group"].to_list()
    truth = frame["persons_ckd"].to_list()
    for t, (district, sex, _) in enumerate(keyed):
        if sex == "ALL" and out["ckd_per_1000_standardised"][t] is not None:
            for label in sorted({g for g in group if g is not None}):
                cells = [
                    i
                    for i, k in enumerate(keyed)
                    if group[i] == label and district in ("ALL", k[0])
                ]
                sums.append((None, cells, sum(truth[i] for i in cells)))
    a_eq, b_eq = [], []
    for total, cells, value in sums:
        coefficient, rhs = np.zeros(len(unknown)), 0.0 if value is None else float(value)
        for row, sign in ([(total, -1.0)] if total is not None else []) + [(c, 1.0) for c in cells]:
            if row in var:
                coefficient[var[row]] += sign
            else:
                rhs -= sign * values[row]
        if coefficient.any():
            a_eq.append(coefficient)
            b_eq.append(rhs)
    return _pinned_by_linprog(unknown, a_eq, b_eq, bounds)


@settings(max_examples=examples(40, 15), deadline=None, database=None)
@given(st.one_of(prevalence_cells(st.integers(0, 14)), prevalence_cells()))
def test_property_published_standardised_rates_give_no_blank_away(cells):
    frame = with_standardised(table_frame(PREVALENCE, cells))
    out = suppress(frame, PREVALENCE, RULES)
    # the counts are those of the table without rates: a rate gives way to the counts
    plain = suppress(table_frame(PREVALENCE, cells), PREVALENCE, RULES)
    assert out.select(plain.columns).equals(plain)
    flag = out["ckd_per_1000_standardised_flag"]
    totals = out["sex"] == "ALL"
    assert (flag.is_null() == ~totals).all()
    for rate in STANDARDISED:
        assert (out[rate].is_null() == (flag != "")).filter(totals).all()
    # a rate on a blank total, or on fewer than 20 persons with CKD, is not published
    ckd = frame["persons_ckd"]
    assert (flag.filter(totals & out["persons_ckd"].is_null()) == "suppressed").all()
    few = totals & out["persons_ckd"].is_not_null() & (ckd < RULES.standardised_min_events)
    assert (flag.filter(few) == "few_events").all()
    assert pinned_with_rates(frame, out) == []


def one_district(counts: dict[str, int]) -> pl.DataFrame:
    cells = {("WF01", "F", band): (100, n, 0) for band, n in counts.items()}
    cells[("WF02", "F", "50-54")] = (100, 60, 0)
    return with_standardised(table_frame(PREVALENCE, cells))


def test_two_blanks_in_two_broad_groups_would_be_solved_from_the_rate():
    # WF01: 4 (50-54, group 0-64, primary) and 30 (65-69, group 65-74, secondary to protect it)
    # beside 40 (80-84) under a published total 74. The rate is a weighted sum of the group
    # counts: with the total that is two equations in two unknowns (4 + 30 = 34 and w1 * 4 + w2 *
    # 30 = rate), so a large numerator alone is no protection (hand calculation): not published.
    frame = one_district({"50-54": 4, "65-69": 30, "80-84": 40})
    out = suppress(frame, PREVALENCE, RULES)
    wf01 = out.filter((pl.col("district_code") == "WF01") & (pl.col("sex") == "ALL")).row(
        0, named=True
    )
    assert wf01["persons_ckd"] == 74
    assert (
        wf01["ckd_per_1000_standardised"] is None
        and wf01["ckd_per_1000_standardised_flag"] == "suppressed"
    )
    assert pinned_with_rates(frame, out) == []


def test_two_blanks_in_one_broad_group_leave_the_rate_published():
    # 4 (0-4) and 30 (20-24) are both in 0-64: the group count 34 is the total minus 40, known
    # already, so the rate tells nothing new (hand calculation): published.
    frame = one_district({"0-4": 4, "20-24": 30, "80-84": 40})
    out = suppress(frame, PREVALENCE, RULES)
    wf01 = out.filter((pl.col("district_code") == "WF01") & (pl.col("sex") == "ALL")).row(
        0, named=True
    )
    assert (
        wf01["ckd_per_1000_standardised"] == 12.5 and wf01["ckd_per_1000_standardised_flag"] == ""
    )
    region = out.filter(pl.col("district_code") == "ALL").row(0, named=True)
    assert region["ckd_per_1000_standardised_flag"] == ""
    assert pinned_with_rates(frame, out) == []


def test_a_rate_from_fewer_than_20_persons_is_flagged_not_published():
    # 11 + 8 = 19 persons with CKD in WF01 (common practice: fewer than about 20 events is unreliable)
    frame = one_district({"0-4": 11, "80-84": 8})
    out = suppress(frame, PREVALENCE, RULES)
    wf01 = out.filter((pl.col("district_code") == "WF01") & (pl.col("sex") == "ALL")).row(
        0, named=True
    )
    assert wf01["persons_ckd"] == 19
    assert (
        wf01["ckd_per_1000_standardised_flag"] == "few_events"
        and wf01["ckd_per_1000_standardised"] is None
    )
    out = suppress(frame, PREVALENCE, DisclosureSettings(standardised_min_events=15))
    flag = out.filter((pl.col("district_code") == "WF01") & (pl.col("sex") == "ALL"))[
        "ckd_per_1000_standardised_flag"
    ]
    assert flag.item() in ("", "suppressed")


def _pinned_by_linprog(unknown: list, a_eq: list, b_eq: list, bounds: list) -> list:
    """The unknown cells whose least and greatest feasible values coincide (scipy.optimize.linprog,
    HiGHS): those a reader can work out exactly."""
    pinned = []
    for j, row in enumerate(unknown):
        c = np.zeros(len(unknown))
        c[j] = 1.0
        low = linprog(c, A_eq=a_eq or None, b_eq=b_eq or None, bounds=bounds, method="highs")
        high = linprog(-c, A_eq=a_eq or None, b_eq=b_eq or None, bounds=bounds, method="highs")
        assert low.status == 0 and high.status in (0, 3), (
            low.message,
            high.message,
        )  # 3: unbounded above
        if high.status == 0 and -high.fun - low.fun < 0.5:
            pinned.append(row)
    return pinned
