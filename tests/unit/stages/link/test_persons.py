"""Tests for the link stage's SQL (daily_values_averaged.sql, kidney_events.sql) on crafted
daily eGFR and ACR trajectories inserted straight into the measures table the SQL reads.

Outside references: sustained 30 % / 40 % eGFR decline endpoints (Levey et al., AJKD
2014;64:821); kidney failure = GFR category G5, below 15 (KDIGO 2012); CKD = eGFR below 60 or
ACR at or above 30 mg/g present for more than 3 months (KDIGO 2012). The 28-day and 90-day spans
and the 90-day baseline window are the project's settings (config/pipeline.yaml)."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import pytest

from pipeline.core.periods import Period
from pipeline.core.rule_params import event_params, trajectory_rules
from pipeline.core.settings import load_settings
from pipeline.stages.link.persons import write_trajectory_rules
from pipeline.warehouse.connection import connect
from pipeline.warehouse.reference import load_reference_tables
from pipeline.warehouse.sql import build_table, replace_period_rows_by_range
from tests.conftest import CONFIG_DIR, rows

DAY0 = dt.date(2025, 1, 1)
PERIOD, PERIOD_END = "2025-12", dt.date(2025, 12, 31)
BASELINE_WINDOW = 90


@pytest.fixture(scope="module")
def settings(tmp_path_factory):
    from tests.conftest import make_small_config

    return load_settings(make_small_config(tmp_path_factory.mktemp("link") / "config"))


@pytest.fixture
def warehouse(settings):
    con = connect(":memory:")
    prepare(con, settings)
    yield con
    con.close()


def prepare(con, settings) -> None:
    """The reference tables, the trajectory rules and empty measures_base / results_known."""
    load_reference_tables(con, settings)
    write_trajectory_rules(con, settings)
    con.execute(
        """
        create table measures_base (
            person_key varchar, collected_date date, reported_date date, analyte varchar,
            egfr double, acr_mg_g double, is_acr_estimated boolean, a_category varchar,
            aer_mg_24h double, age_years bigint, acr_basis varchar, acr_comparator varchar,
            is_at_or_above_a2 boolean
        )
        """
    )
    # no results of other analytes: the diabetes rules see an empty results_known
    con.execute(
        "create table results_known (person_key varchar, collected_date date, reported_date date, "
        "analyte varchar, comparator varchar, reported_unit varchar, reported_value double, "
        "is_fasting boolean)"
    )


def day(offset: int) -> dt.date:
    return DAY0 + dt.timedelta(days=offset)


def insert(con, person: str, egfr: list[tuple[int, float]] = (), acr: list[tuple[int, float]] = (),
           estimated_acr: bool = False, reported_lag: int = 1, age: int = 50) -> None:  # fmt: skip
    for offset, value in egfr:
        con.execute(
            "insert into measures_base values (?, ?, ?, 'creatinine', ?, null, null, null, null, ?, "
            "null, null, null)",
            [person, day(offset), day(offset + reported_lag), value, age],
        )
    for offset, value in acr:
        con.execute(
            "insert into measures_base values (?, ?, ?, 'acr', null, ?, ?, ?, null, ?, ?, null, ?)",
            [
                person,
                day(offset),
                day(offset + reported_lag),
                value,
                estimated_acr,
                "A1" if value < 30 else "A2" if value <= 300 else "A3",
                age,
                "estimated_from_pcr" if estimated_acr else "measured_acr",
                value >= 30,
            ],
        )


def build(con, period_end: dt.date = PERIOD_END) -> dict[tuple[str, str], dict]:
    params = {
        **event_params(load_settings(CONFIG_DIR), Period.parse(PERIOD)),
        "period_end": period_end,
    }
    # what results_known / measures_known do upstream: only what is known by the period end
    con.execute(
        "create or replace table measures_known as select * from measures_base "
        "where collected_date <= ? and reported_date <= ?",
        [period_end, period_end],
    )
    build_table(con, "daily_values_averaged", params=params)
    build_table(con, "kidney_events", params=params)
    frame = con.sql("select * from kidney_events").pl()
    return {(r["person_key"], r["rule_id"]): r for r in frame.iter_rows(named=True)}


def status(events: dict, person: str, rule: str) -> str | None:
    event = events.get((person, rule))
    return event["event_status"] if event else None


BASE = [(0, 100.0)]  # one baseline value: baseline eGFR 100


# --------------------------------------------------------------------------- sustained decline


def test_decline_confirmed_at_exactly_28_days(warehouse):
    insert(warehouse, "p", BASE + [(100, 60.0), (128, 60.0)])
    event = build(warehouse)[("p", "sustained_decline_40")]
    assert event["event_status"] == "confirmed"
    assert event["baseline_egfr"] == 100.0
    assert event["event_date"] == day(100)
    assert event["confirmation_date"] == day(128)
    assert event["n_values"] == 2


def test_decline_27_days_is_pending_when_latest(warehouse):
    insert(warehouse, "p", BASE + [(100, 60.0), (127, 60.0)])
    event = build(warehouse)[("p", "sustained_decline_40")]
    assert event["event_status"] == "pending" and event["confirmation_date"] is None


def test_decline_27_days_then_recovered_is_no_event(warehouse):
    insert(warehouse, "p", BASE + [(100, 60.0), (127, 60.0), (140, 95.0)])
    assert status(build(warehouse), "p", "sustained_decline_40") is None


def test_exactly_at_fraction_of_baseline_counts_just_above_does_not(warehouse):
    insert(warehouse, "at", BASE + [(100, 60.0), (128, 60.0)])  # (1 - 0.40) x 100
    insert(warehouse, "above", BASE + [(100, 60.1), (128, 60.1)])
    events = build(warehouse)
    assert status(events, "at", "sustained_decline_40") == "confirmed"
    assert status(events, "above", "sustained_decline_40") is None
    assert status(events, "above", "sustained_decline_30") == "confirmed"  # 60.1 <= 70


@pytest.mark.parametrize(("baseline", "at_threshold", "rule"), [
    (90.0, 63.0, "sustained_decline_30"),
    (101.0, 60.6, "sustained_decline_40"),
])  # fmt: skip
def test_exactly_at_fraction_of_other_baselines_counts(warehouse, baseline, at_threshold, rule):
    insert(warehouse, "p", [(0, baseline), (100, at_threshold), (128, at_threshold)])
    assert status(build(warehouse), "p", rule) == "confirmed"


def test_recovery_between_low_values_breaks_the_run(warehouse):
    insert(warehouse, "broken", BASE + [(100, 55.0), (115, 80.0), (130, 55.0)])
    insert(warehouse, "unbroken", BASE + [(100, 55.0), (130, 55.0)])
    events = build(warehouse)
    assert status(events, "unbroken", "sustained_decline_40") == "confirmed"
    # neither low run spans 28 days; the last one is the latest value, so it may still confirm
    assert status(events, "broken", "sustained_decline_40") == "pending"
    assert events[("broken", "sustained_decline_40")]["event_date"] == day(130)


def test_low_values_inside_baseline_window_do_not_count(warehouse):
    # ten values of 100 then two of 50 within the 90-day window: baseline (1000 + 100) / 12 = 91.7;
    # 50 is below 0.6 x 91.7 = 55 and the two span 29 days, but they are baseline, not decline
    insert(warehouse, "p", [(d, 100.0) for d in range(10)] + [(60, 50.0), (89, 50.0), (120, 95.0)])
    events = build(warehouse)
    assert status(events, "p", "sustained_decline_40") is None
    assert status(events, "p", "sustained_decline_30") is None


def test_baseline_is_the_mean_of_the_window(warehouse):
    insert(warehouse, "p", [(0, 100.0), (90, 80.0), (91, 40.0), (120, 40.0)])  # day 90 is inside
    event = build(warehouse)[("p", "sustained_decline_40")]
    assert event["baseline_egfr"] == 90.0 and event["event_status"] == "confirmed"


def test_several_results_on_one_day_are_averaged(warehouse):
    insert(warehouse, "p", BASE + [(100, 50.0), (100, 70.0), (128, 60.0)])
    events = build(warehouse)
    daily = rows(warehouse, "select day, value, n_results from daily_values_averaged "
                            "where person_key = 'p' and measure = 'egfr' order by day")  # fmt: skip
    assert daily == [(day(0), 100.0, 1), (day(100), 60.0, 2), (day(128), 60.0, 1)]
    # the day's mean (60), not its lowest value (50), meets the 40 % rule
    event = events[("p", "sustained_decline_40")]
    assert event["event_status"] == "confirmed" and event["run_values"] == [60.0, 60.0]


# --------------------------------------------------------------------------- kidney failure, CKD


def test_kidney_failure_below_15_for_28_days(warehouse):
    insert(warehouse, "g5", [(0, 14.0), (28, 14.0)])
    insert(warehouse, "at15", [(0, 15.0), (28, 15.0)])  # 15 is G4, not G5 (KDIGO 2012)
    insert(warehouse, "short", [(0, 14.0), (27, 14.0)])
    events = build(warehouse)
    assert status(events, "g5", "kidney_failure") == "confirmed"
    assert events[("g5", "kidney_failure")]["confirmation_date"] == day(28)
    assert status(events, "at15", "kidney_failure") is None
    assert status(events, "short", "kidney_failure") == "pending"


def test_ckd_egfr_below_60_for_90_days(warehouse):
    insert(warehouse, "ckd", [(0, 59.0), (45, 58.0), (90, 59.0)])
    insert(warehouse, "at60", [(0, 60.0), (90, 60.0)])  # 60 is G2 (KDIGO 2012)
    insert(warehouse, "short", [(0, 59.0), (89, 59.0)])
    events = build(warehouse)
    event = events[("ckd", "ckd_egfr")]
    assert event["event_status"] == "confirmed"
    assert (event["event_date"], event["confirmation_date"]) == (day(0), day(90))
    assert status(events, "at60", "ckd_egfr") is None
    assert status(events, "short", "ckd_egfr") == "pending"


def test_ckd_acr_at_or_above_30_for_90_days(warehouse):
    insert(warehouse, "a2", acr=[(0, 30.0), (90, 45.0)])  # 30 mg/g is A2 (KDIGO 2012)
    insert(warehouse, "a1", acr=[(0, 29.9), (90, 29.9)])
    insert(warehouse, "estimated", acr=[(0, 300.0), (90, 300.0)], estimated_acr=True)
    events = build(warehouse)
    assert status(events, "a2", "ckd_acr") == "confirmed"
    assert status(events, "a1", "ckd_acr") is None
    # ACR estimated from a protein ratio stays out (project decision 4)
    assert not any(p == "estimated" for p, _ in events)


def test_single_value_has_no_confirmed_event(warehouse):
    insert(warehouse, "p", [(0, 10.0)])
    events = build(warehouse)
    assert all(e["event_status"] != "confirmed" for e in events.values())
    assert status(events, "p", "kidney_failure") == "pending"


def test_values_after_the_period_end_wait(warehouse):
    insert(warehouse, "late_collected", [(0, 14.0), (40, 14.0)])
    insert(warehouse, "late_reported", [(0, 14.0)])
    insert(warehouse, "late_reported", [(30, 14.0)], reported_lag=20)
    events = build(warehouse, period_end=day(35))
    assert status(events, "late_collected", "kidney_failure") == "pending"
    assert status(events, "late_reported", "kidney_failure") == "pending"
    events = build(warehouse, period_end=day(60))
    assert status(events, "late_collected", "kidney_failure") == "confirmed"
    assert status(events, "late_reported", "kidney_failure") == "confirmed"


def test_rules_follow_the_settings(settings):
    rules = trajectory_rules(settings)
    by_id = {r["rule_id"]: r for r in rules.iter_rows(named=True)}
    assert set(by_id) == {"sustained_decline_30", "sustained_decline_40", "sustained_decline_57",
                          "kidney_failure", "ckd_egfr", "ckd_acr", "progression"}  # fmt: skip
    assert by_id["progression"]["min_span_days"] == 90 and by_id["progression"]["threshold"] == 0.25
    assert by_id["sustained_decline_40"]["threshold"] == 0.40
    assert by_id["sustained_decline_40"]["after_baseline"] is True
    assert by_id["ckd_egfr"]["min_span_days"] == 90


def linked_tables(con, settings) -> dict[str, list[tuple]]:
    """Person-level tables built from a few trajectories of every kind of event, row by row."""
    prepare(con, settings)
    insert(con, "decline", BASE + [(100, 60.0), (128, 60.0)])
    insert(con, "failure", [(0, 14.0), (30, 14.0)])
    insert(con, "progression", [(0, 62.0), (200, 46.0)])
    insert(con, "slope", [(0, 70.0), (120, 66.0), (250, 61.5), (360, 58.0)])
    insert(con, "albuminuria", [(0, 80.0)], acr=[(0, 45.0), (120, 50.0)])
    insert(con, "pending", [(0, 100.0), (300, 55.0)], age=17)
    # person_status takes demographics and glycaemia from results_known: one row per person
    # (two HbA1c of 7.0 % for one of them: diabetes by ADA Standards of Care, 6.5 % or more)
    con.execute(
        "create or replace table results_known as select person_key, ?::date as collected_date, "
        "?::date as reported_date, analyte, null::varchar as comparator, reported_unit, "
        "reported_value, false as is_fasting, sex, 1970::bigint as birth_year, district_code, "
        "'lab' as source_id, 1::bigint as file_id, line_no::bigint as line_no from (values "
        "('decline', 'creatinine', 'mg/dL', 1.0, 'F', 'WF01', 1), "
        "('failure', 'creatinine', 'mg/dL', 4.0, 'M', 'WF02', 2), "
        "('progression', 'creatinine', 'mg/dL', 1.3, 'F', 'WF03', 3), "
        "('slope', 'creatinine', 'mg/dL', 1.2, 'M', 'WF04', 4), "
        "('albuminuria', 'hba1c', '%', 7.0, 'F', 'WF01', 5), "
        "('albuminuria', 'hba1c', '%', 7.0, 'F', 'WF01', 6), "
        "('pending', 'creatinine', 'mg/dL', 1.0, 'M', 'WF02', 7)) "
        "as t(person_key, analyte, reported_unit, reported_value, sex, district_code, line_no)",
        [day(0), day(1)],
    )
    events = build(con)
    assert {rule for _, rule in events} >= {"sustained_decline_40", "kidney_failure", "progression",
                                            "ckd_acr"}  # fmt: skip
    params = {**event_params(settings, Period.parse(PERIOD)), "period_end": PERIOD_END}
    # person_status orders results by their source line as well
    con.execute(
        "create or replace table measures_known as select *, 'lab' as source_id, "
        "1::bigint as file_id, row_number() over (order by person_key, collected_date, analyte) "
        "as line_no from measures_known"
    )
    build_table(con, "person_status", params=params)
    return {
        table: sorted(con.table(table).fetchall(), key=repr)
        for table in ("kidney_events", "person_status")
    }


def test_file_warehouse_works_too(settings, tmp_path: Path):
    # The same person-level tables, row for row, whether the warehouse is a file or in memory
    # (DuckDB documents both as the same database engine; a file adds only storage).
    memory, on_disk = connect(":memory:"), connect(tmp_path / "w.duckdb")
    try:
        expected, got = linked_tables(memory, settings), linked_tables(on_disk, settings)
    finally:
        memory.close()
        on_disk.close()
    assert len(expected["person_status"]) == 6 and len(expected["kidney_events"]) >= 4
    assert got == expected


@pytest.mark.parametrize("chunks", [1, 3, 7])
def test_built_by_person_key_range_equals_one_build(settings, chunks):
    # A person's events and status depend on that person's rows only (kidney_events.sql,
    # person_status.sql), so person-key ranges taken in order give the rows of one whole build,
    # in the same order, and the other periods' rows stay.
    con = connect(":memory:")
    con.execute("set threads = 1")  # rows read back in the order they were written
    try:
        linked_tables(con, settings)
        for table in ("measures_known", "results_known"):  # hex keys, as the pseudonymiser's
            con.execute(f"update {table} set person_key = sha256(person_key)")
        params = {**event_params(settings, Period.parse(PERIOD)), "period_end": PERIOD_END}
        build_table(con, "daily_values_averaged", params=params)
        build_table(con, "kidney_events", params=params)
        build_table(con, "person_status", params=params)
        whole = {t: con.table(t).fetchall() for t in ("kidney_events", "person_status")}
        for table in whole:  # an earlier period's rows, to be kept
            con.execute(f"update {table} set period = '2025-11'")
        inputs = {
            "kidney_events": ("daily_values_averaged", "measures_known", "results_known"),
            "person_status": ("daily_values_averaged", "results_known", "kidney_events"),
        }
        for table, relations in inputs.items():
            replace_period_rows_by_range(con, table, PERIOD, params, relations, chunks)
        for table, rows in whole.items():
            got = con.execute(f"select * from {table} where period = ?", [PERIOD]).fetchall()
            assert got == rows
            kept = con.execute(f"select count(*) from {table} where period = '2025-11'")
            assert kept.fetchall()[0][0] == len(rows)
        assert len({r[1][:8] for r in whole["person_status"]}) == 6
    finally:
        con.close()


# --------------------------------------------------------------------------- KDIGO slope and progression


def test_rapid_decline_slope_matches_scipy_least_squares(warehouse):
    """KDIGO 2012: rapid progression = a sustained decline of more than 5 mL/min/1.73 m2 per
    year. The slope is the least-squares slope; checked against scipy.stats.linregress."""
    from scipy.stats import linregress

    points = [(0, 70.0), (120, 66.0), (250, 61.5), (400, 58.0)]
    insert(warehouse, "fast", points)
    insert(warehouse, "slow", [(0, 70.0), (200, 68.5), (400, 67.0)])  # about -2.7 per year
    insert(warehouse, "short", [(0, 70.0), (100, 60.0), (200, 50.0)])  # steep, but under a year
    events = build(warehouse, period_end=day(420))
    expected = linregress([d / 365.25 for d, _ in points], [v for _, v in points]).slope
    assert events[("fast", "rapid_decline")]["slope_ml_min_per_year"] == pytest.approx(
        expected, abs=0.01
    )
    assert ("slow", "rapid_decline") not in events
    assert ("short", "rapid_decline") not in events


def test_progression_needs_a_worse_category_and_a_25_percent_fall(warehouse):
    # KDIGO 2012: progression = a drop in GFR category with >= 25 % decline from baseline
    insert(warehouse, "prog", [(0, 62.0), (200, 46.0)])  # G2 -> G3a, 25.8 % below 62
    insert(warehouse, "same_g", [(0, 58.0), (200, 46.0)])  # G3a -> G3a: no category drop
    insert(warehouse, "small", [(0, 62.0), (200, 55.0)])  # G2 -> G3a but only 11 %
    events = build(warehouse)
    assert events[("prog", "progression")]["event_date"] == day(200)
    assert ("same_g", "progression") not in events
    assert ("small", "progression") not in events


def test_new_onset_albuminuria_after_diabetes(warehouse):
    # ADA: HbA1c >= 6.5 % on two days evidences diabetes (on the second); new-onset = first
    # A2/A3 after that, none before
    for person, hba1c_day in (("onset", 10), ("before", 100)):
        for d in (hba1c_day - 7, hba1c_day):
            warehouse.execute(
                "insert into results_known values (?, ?, ?, 'hba1c', null, '%', 7.2, null)",
                [person, day(d), day(d + 1)],
            )
    insert(warehouse, "onset", acr=[(5, 12.0), (60, 45.0)])
    insert(warehouse, "before", acr=[(50, 45.0), (150, 60.0)])  # albuminuric before diabetes
    events = build(warehouse)
    assert events[("onset", "new_onset_albuminuria")]["days_since_diabetes"] == 50
    assert ("before", "new_onset_albuminuria") not in events


# --------------------------------------------------------------------------- clinical rules


def insert_acr(con, person: str, offset: int, *, acr_mg_g: float | None, above_a2: bool | None,
               comparator: str | None = None, basis: str = "measured_acr", aer: float | None = None) -> None:  # fmt: skip
    """One albuminuria measure as pipeline/stages/measure.py leaves it (its A2 status in the unit
    reported already taken; tests/unit/test_measures.py checks that against KDIGO 2012)."""
    con.execute(
        "insert into measures_base values (?, ?, ?, 'acr', null, ?, false, null, ?, 50, ?, ?, ?)",
        [person, day(offset), day(offset + 1), acr_mg_g, aer, basis, comparator, above_a2],
    )


def test_censored_acrs_below_a2_are_not_ckd(warehouse):
    # two "<30 mg/g" 100 days apart: every value below the KDIGO A2 threshold, so no CKD by ACR
    # (KDIGO 2012: CKD by albuminuria = ACR >= 30 mg/g for more than 3 months)
    for offset in (0, 100):
        insert_acr(warehouse, "p", offset, acr_mg_g=None, above_a2=False, comparator="<")
    events = build(warehouse)
    assert status(events, "p", "ckd_acr") is None
    daily = rows(
        warehouse,
        "select value, is_at_or_above_a2 from daily_values_averaged where measure = 'acr'",
    )
    assert daily == [(None, False), (None, False)]  # the bound is not averaged as a value


def test_a_censored_acr_spanning_a2_neither_counts_nor_breaks_a_run(warehouse):
    # "<5 mg/mmol" could be A1 or A2 (KDIGO 2012: A2 from 3 mg/mmol): unknown for the rule
    insert_acr(warehouse, "p", 0, acr_mg_g=50.0, above_a2=True)
    insert_acr(warehouse, "p", 50, acr_mg_g=None, above_a2=None, comparator="<")
    insert_acr(warehouse, "p", 95, acr_mg_g=60.0, above_a2=True)
    event = build(warehouse)[("p", "ckd_acr")]
    assert event["event_status"] == "confirmed" and event["n_values"] == 2


def test_ckd_by_acr_follows_the_category_in_the_unit_reported(warehouse):
    # 3.2 mg/mmol is A2 (KDIGO 2012), although 3.2 x 8.84 = 28.3 mg/g is below 30 mg/g
    for offset in (0, 100):
        insert_acr(warehouse, "p", offset, acr_mg_g=28.3, above_a2=True)
    assert status(build(warehouse), "p", "ckd_acr") == "confirmed"


def test_timed_albumin_excretion_counts_for_ckd(warehouse):
    # KDIGO 2012: AER >= 30 mg/24 h is A2 or above
    for offset in (0, 100):
        insert_acr(
            warehouse,
            "p",
            offset,
            acr_mg_g=None,
            above_a2=True,
            basis="timed_albumin_excretion",
            aer=45.0,
        )
    assert status(build(warehouse), "p", "ckd_acr") == "confirmed"


# progression (KDIGO 2012): a drop in G category with a fall of 25 % or more from the baseline;
# CKD is defined over more than 3 months and a fluctuation or AKI is not progression, so the
# fall must hold over consecutive values spanning 90 days (project setting)


def test_one_low_egfr_then_recovery_is_not_progression(warehouse):
    # baseline 70 (G2), then 40 (G3b, 43 % lower) and four weeks later 68 again
    insert(warehouse, "p", [(0, 70.0), (100, 40.0), (128, 68.0)])
    assert status(build(warehouse), "p", "progression") is None


def test_progression_pending_then_confirmed_after_90_days(warehouse):
    insert(warehouse, "p", [(0, 70.0), (100, 40.0), (150, 41.0)])
    insert(warehouse, "q", [(0, 70.0), (100, 40.0), (150, 41.0), (190, 42.0)])
    events = build(warehouse)
    assert status(events, "p", "progression") == "pending"
    event = events[("q", "progression")]
    assert event["event_status"] == "confirmed" and event["confirmation_date"] == day(190)
    assert event["baseline_egfr"] == 70.0


def test_a_fall_within_the_same_category_is_not_progression(warehouse):
    # baseline 58 (G3a), 44 is G3b but only 24 % lower: both conditions are needed
    insert(warehouse, "p", [(0, 58.0), (100, 44.0), (200, 44.0)])
    assert status(build(warehouse), "p", "progression") is None


# equation family: CKD-EPI 2021 from 18, EKFC below (config/pipeline.yaml); for the same
# creatinine the adult equation gives a different eGFR, so a child baseline is not compared
# with adult values (project rule, from the equations' published forms)


def test_decline_does_not_cross_from_the_child_to_the_adult_equation(warehouse):
    # child baseline 120 at 17, adult values 80 from 18: 33 % lower but not a decline
    insert(warehouse, "p", [(0, 120.0), (30, 120.0)], age=17)
    insert(warehouse, "p", [(200, 80.0), (240, 80.0), (420, 80.0)], age=18)
    events = build(warehouse, period_end=dt.date(2026, 12, 31))  # rapid decline needs a year
    assert status(events, "p", "sustained_decline_30") is None
    assert status(events, "p", "rapid_decline") is None
    families = rows(warehouse, "select equation_family, count(*) from daily_values_averaged "
                               "where measure = 'egfr' group by all order by 1")  # fmt: skip
    assert families == [("adult", 3), ("child", 2)]


def test_a_day_with_both_equation_families_gives_the_same_events_in_any_row_order(settings):
    """Labs sending other birth years for one person give a day a value under each equation
    family. A rule not judged against the baseline (CKD by eGFR below 60) then runs over both,
    and what it reports must not depend on the order the rows arrive in (common practice: a
    rerun gives the same tables): the run is ended by a day's non-qualifying value, and the
    event carries the baseline of the run's first value, the adult one on a day with both; the
    person's latest eGFR is the adult one too."""
    adult = [(0, 95.0), (30, 55.0), (60, 50.0), (100, 52.0), (130, 51.0), (200, 50.0)]
    child = [(0, 110.0), (30, 58.0), (60, 65.0), (100, 54.0), (130, 53.0), (200, 52.0)]
    rows_in = [("p", "adult", d, v) for d, v in adult] + [("p", "child", d, v) for d, v in child]
    # q: both families below 60 on the run's first day (30) and after it; adult baseline
    # (95 + 55) / 2 = 75, child (110 + 58) / 2 = 84
    rows_in += [("q", "adult", d, v) for d, v in ((0, 95.0), (30, 55.0), (130, 50.0))]
    rows_in += [("q", "child", d, v) for d, v in ((0, 110.0), (30, 58.0), (130, 52.0))]
    seen = []
    for order in (rows_in, rows_in[::-1], rows_in[1::2] + rows_in[::2], sorted(rows_in, key=str)):
        con = connect(":memory:")
        prepare(con, settings)
        for person, family, offset, value in order:
            insert(con, person, [(offset, value)], age=18 if family == "adult" else 17)
        events = build(con)
        # person_status's demographics come from results_known: one creatinine row
        con.execute(
            "create or replace table results_known as select 'p' as person_key, "
            "?::date as collected_date, ?::date as reported_date, 'creatinine' as analyte, "
            "null::varchar as comparator, 'mg/dL' as reported_unit, 1.4 as reported_value, "
            "false as is_fasting, 'F' as sex, 2007::bigint as birth_year, "
            "'WF01' as district_code, 'lab' as source_id, 1::bigint as file_id, "
            "1::bigint as line_no",
            [day(200), day(201)],
        )
        con.execute(  # source lines numbered by content: the same in every order
            "create or replace table measures_known as select *, 'lab' as source_id, "
            "1::bigint as file_id, row_number() over (order by collected_date, age_years) "
            "as line_no from measures_known"
        )
        params = {**event_params(settings, Period.parse(PERIOD)), "period_end": PERIOD_END}
        build_table(con, "person_status", params=params)
        person = (
            con.sql("select * from person_status where person_key = 'p'").pl().row(0, named=True)
        )
        seen.append(({k: dict(e) for k, e in events.items()}, person))
        con.close()
    assert all(s == seen[0] for s in seen[1:])
    # the latest day (200) has adult 50 and child 52: the latest eGFR is the adult one
    assert seen[0][1]["egfr"] == 50.0
    ckd = seen[0][0][("p", "ckd_egfr")]
    # day 60's child value (65) is not below 60: the run that counts starts on day 60 with the
    # adult 50 and runs to day 200 (140 days >= 90: confirmed, KDIGO 2012's eGFR below 60 for
    # more than 3 months), its first value an adult one
    assert ckd["event_status"] == "confirmed" and ckd["event_date"] == day(60)
    assert ckd["baseline_egfr"] == round((95.0 + 55.0 + 50.0) / 3, 2)  # the adult baseline
    # q's run starts on a day with a value of each family: it carries the adult baseline
    both = seen[0][0][("q", "ckd_egfr")]
    assert both["event_date"] == day(30) and both["baseline_egfr"] == 75.0


def test_a_new_adult_baseline_starts_at_18(warehouse):
    # adult baseline 100 (first adult value and those within 90 days), then 60: a 40 % decline
    insert(warehouse, "p", [(0, 130.0)], age=17)
    insert(warehouse, "p", [(100, 100.0), (250, 60.0), (280, 60.0)], age=18)
    event = build(warehouse)[("p", "sustained_decline_40")]
    assert event["event_status"] == "confirmed" and event["baseline_egfr"] == 100.0


# diabetes by labs (ADA Standards of Care, diagnosis: HbA1c >= 6.5 %, fasting glucose >= 126
# mg/dL; a second abnormal result, from the same sample or a second one, confirms it)


def hba1c(con, person: str, offset: int, value: float = 7.0, analyte: str = "hba1c",
          unit: str = "%", fasting: bool | None = None, comparator: str | None = None) -> None:  # fmt: skip
    con.execute(
        "insert into results_known values (?, ?, ?, ?, ?, ?, ?, ?)",
        [person, day(offset), day(offset + 1), analyte, comparator, unit, value, fasting],
    )


def diabetic_onsets(con, params_override: dict | None = None) -> dict[str, int]:
    events = build_with(con, params_override or {})
    return {
        p: e["days_since_diabetes"]
        for (p, rule), e in events.items()
        if rule == "new_onset_albuminuria"
    }


def build_with(con, override: dict) -> dict:
    params = {**event_params(load_settings(CONFIG_DIR), Period.parse(PERIOD)), **override}
    con.execute("create or replace table measures_known as select * from measures_base")
    build_table(con, "daily_values_averaged", params=params)
    build_table(con, "kidney_events", params=params)
    frame = con.sql("select * from kidney_events").pl()
    return {(r["person_key"], r["rule_id"]): r for r in frame.iter_rows(named=True)}


def test_diabetes_needs_a_second_abnormal_result(warehouse):
    hba1c(warehouse, "one", 10)  # a single HbA1c of 7.0 %: not confirmed
    hba1c(warehouse, "two_days", 10)
    hba1c(warehouse, "two_days", 40)  # confirmed on day 40
    hba1c(warehouse, "two_tests", 10)
    hba1c(
        warehouse, "two_tests", 10, 130.0, "glucose", "mg/dL", fasting=True
    )  # same day, two tests
    hba1c(warehouse, "censored", 10, 6.0, comparator="<")  # "<6.0 %" is below 6.5 %: never abnormal
    hba1c(warehouse, "censored", 40, 7.0)
    for d in (10, 40):
        hba1c(warehouse, "above_low_bound", d, 6.0, comparator=">")  # ">6.0 %": maybe below 6.5 %
        hba1c(warehouse, "above_high_bound", d, 14.0, comparator=">")  # ">14 %": certainly >= 6.5 %
    for person in (
        "one",
        "two_days",
        "two_tests",
        "censored",
        "above_low_bound",
        "above_high_bound",
    ):
        insert_acr(warehouse, person, 100, acr_mg_g=50.0, above_a2=True)
    assert diabetic_onsets(warehouse) == {"two_days": 60, "two_tests": 90, "above_high_bound": 60}
    # diabetes_rule: single (one abnormal result)
    got = diabetic_onsets(warehouse, {"diabetes_min_results": 1})
    assert got == {
        "one": 90,
        "two_days": 90,
        "two_tests": 90,
        "censored": 60,
        "above_high_bound": 90,
    }


def test_diabetes_rule_setting_reaches_the_sql(settings):
    # ADA Standards of Care: a second abnormal result confirms (the default); single = one
    assert event_params(settings, Period.parse(PERIOD))["diabetes_min_results"] == 2
    measures = settings.pipeline.measures.model_copy(update={"diabetes_rule": "single"})
    single = settings.model_copy(
        update={"pipeline": settings.pipeline.model_copy(update={"measures": measures})}
    )
    assert event_params(single, Period.parse(PERIOD))["diabetes_min_results"] == 1
