"""Link: person trajectories across labs and months, events and person status at the period end.

The rules are in ``sql/marts/kidney_events.sql`` and ``sql/marts/person_status.sql``; their
numbers come from config/pipeline.yaml ("trajectories") through ``reference.trajectory_rules``
and bound parameters.
"""

from __future__ import annotations

import shutil
from dataclasses import dataclass
from pathlib import Path

import duckdb
import polars as pl

from pipeline.periods import Period
from pipeline.settings import Settings
from pipeline.measures import MEASURED_ANALYTES, measure_frame
from pipeline.warehouse import build_table, fetch_frame, replace_period_frame, replace_period_rows


@dataclass
class LinkSummary:
    persons: int
    events_confirmed: int
    events_pending: int


def trajectory_rules(settings: Settings) -> pl.DataFrame:
    """One row per event rule, from the trajectories settings."""
    t = settings.pipeline.trajectories
    rows = [
        {"rule_id": f"sustained_decline_{round(x * 100)}", "event_type": "sustained_decline",
         "measure": "egfr", "comparison": "at_or_below_fraction_of_baseline", "threshold": x,
         "min_span_days": t.decline_min_span_days, "after_baseline": True}
        for x in t.decline_thresholds
    ]
    rows += [
        {"rule_id": "kidney_failure", "event_type": "kidney_failure", "measure": "egfr",
         "comparison": "below", "threshold": t.kidney_failure_egfr,
         "min_span_days": t.kidney_failure_min_span_days, "after_baseline": False},
        {"rule_id": "ckd_egfr", "event_type": "ckd", "measure": "egfr", "comparison": "below",
         "threshold": t.ckd_egfr_below, "min_span_days": t.ckd_min_span_days, "after_baseline": False},
        {"rule_id": "ckd_acr", "event_type": "ckd", "measure": "acr", "comparison": "at_or_above",
         "threshold": t.ckd_acr_at_or_above_mg_g, "min_span_days": t.ckd_min_span_days,
         "after_baseline": False},
    ]  # fmt: skip
    return pl.DataFrame(rows)


def event_params(settings: Settings, period: Period) -> dict:
    """Bound parameters of kidney_events.sql and person_status.sql, from the settings."""
    m, t = settings.pipeline.measures, settings.pipeline.trajectories
    return {
        "period": period.label, "period_end": period.end,
        "baseline_window_days": t.baseline_window_days,
        "rapid_slope": t.rapid_decline_ml_min_per_year, "rapid_min_values": t.rapid_decline_min_values,
        "rapid_min_span_days": t.rapid_decline_min_span_days,
        "progression_fraction": t.progression_decline,
        "hba1c_percent": m.diabetes_hba1c_percent, "hba1c_mmol_mol": m.diabetes_hba1c_mmol_mol,
        "glucose_mg_dl": m.diabetes_fasting_glucose_mg_dl,
        "glucose_mmol_l": m.diabetes_fasting_glucose_mmol_l,
        "risk_window_days": m.risk_pairing_window_days,
    }  # fmt: skip


def write_trajectory_rules(con: duckdb.DuckDBPyConnection, settings: Settings) -> None:
    con.register("_rules", trajectory_rules(settings).to_arrow())
    con.execute("create or replace table reference.trajectory_rules as select * from _rules")
    con.unregister("_rules")


def build_known_at_period_end(con: duckdb.DuckDBPyConnection, period: Period) -> int:
    """The results as known at the period end (``int_results_known``): versions reported later
    do not count, so a past period is rebuilt as it was known then."""
    build_table(con, "int_result_versions_resolved", "staging.int_versions_as_of", {"as_of": period.end})
    n = build_table(con, "int_results_known", params={"period_end": period.end})
    con.execute("drop table staging.int_versions_as_of")
    return n


def build_person_tables(con: duckdb.DuckDBPyConnection, settings: Settings, period: Period,
                        sharded: bool = False) -> None:
    """From ``int_results_known``: the measures known at the period end, daily values, events
    and person status. ``sharded``: a shard's own throw-away database (plain tables, no other
    periods to keep)."""
    params = event_params(settings, period)
    results = fetch_frame(
        con, "select * from int_results_known where list_contains($analytes, analyte)",
        {"analytes": list(MEASURED_ANALYTES)},
    )
    con.register("_known", measure_frame(results, settings).to_arrow())
    con.execute("create or replace table int_measures_known as select * from _known")
    con.unregister("_known")
    build_table(con, "int_daily_values_averaged", params=params)
    if sharded:
        build_table(con, "kidney_events", params=params)
        build_table(con, "person_status", params=params)
    else:
        replace_period_rows(con, "kidney_events", period.label, params)
        replace_period_rows(con, "person_status", period.label, params)


#: Row order of the person-level tables (as their SQL orders them), for putting shards together.
PERSON_TABLE_ORDER = {
    "int_measures_known": ["person_key", "collected_date", "analyte", "file_id", "line_no"],
    "int_daily_values_averaged": ["person_key", "measure", "day"],
    "kidney_events": ["person_key", "rule_id"],
    "person_status": ["person_key"],
}


def build_person_tables_sharded(con: duckdb.DuckDBPyConnection, settings: Settings, period: Period,
                                work: Path) -> int:
    """The same tables through person-hash shards (executor ``shards`` or ``dask``)."""
    from pipeline.shards import export_shard_inputs, load_shard_outputs, run_shards

    folders = export_shard_inputs(con, work, settings.pipeline.execution.shards)
    done = run_shards(folders, settings, period)
    for table, order in PERSON_TABLE_ORDER.items():
        frame = load_shard_outputs(done, table).sort(order, nulls_last=False, maintain_order=True)
        if table in ("kidney_events", "person_status"):
            replace_period_frame(con, table, period.label, frame)
        else:
            con.register("_shards", frame.to_arrow())
            con.execute(f"create or replace table {table} as select * from _shards")
            con.unregister("_shards")
    shutil.rmtree(work, ignore_errors=True)
    return len(done)


def link_stage(con: duckdb.DuckDBPyConnection, settings: Settings, period: Period,
               work: Path | None = None) -> LinkSummary:
    """The link stage; with executor ``shards`` or ``dask`` the person-level tables are built
    per person-hash shard in ``work`` (pipeline/shards.py)."""
    write_trajectory_rules(con, settings)
    build_known_at_period_end(con, period)
    if settings.pipeline.execution.executor == "local" or work is None:
        build_person_tables(con, settings, period)
    else:
        build_person_tables_sharded(con, settings, period, work)
    persons = con.execute("select count(*) from person_status where period = ?", [period.label]).fetchall()[0][0]
    confirmed, pending = con.execute(
        "select count(*) filter (where event_status = 'confirmed'), "
        "count(*) filter (where event_status = 'pending') from kidney_events where period = ?",
        [period.label],
    ).fetchall()[0]
    return LinkSummary(persons, confirmed, pending)
