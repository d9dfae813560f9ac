"""Summarise: district tables per period (internal, unsuppressed), from sql/reports/."""

from __future__ import annotations

from dataclasses import dataclass

import duckdb
import polars as pl

from pipeline.core.equation_impact import (
    COMBINED,
    ckd_counts,
    daily_comparison,
    daily_egfr_under,
    reclassification,
    summary,
)
from pipeline.core.periods import Period
from pipeline.core.rule_params import event_params
from pipeline.core.settings import Settings
from pipeline.core.statistics import (
    age_labels,
    collapse_weights,
    standardise_frame,
    with_wilson_interval,
)
from pipeline.core.undetected import age_group_labels, estimate_undetected
from pipeline.warehouse.connection import (
    add_missing_columns,
    drop_relation,
    fetch_frame,
    with_frame,
)
from pipeline.warehouse.sql import build_table, replace_period_frame, replace_period_rows, sql_over
from pipeline.warehouse.sql_files import checked_name, read_sql

#: Internal summary tables, in the order they are built (each is sql/reports/<name>.sql).
SUMMARY_TABLES = (
    "district_ckd_prevalence",
    "district_screening_coverage",
    "diabetes_acr_strata",  # input of district_undetected_albuminuria (pipeline/core/undetected.py)
    "region_coverage_trend",
    "district_estimated_acr_sensitivity",
    "lab_egfr_agreement",
    "source_quality",
    "source_rejection_reasons",
    "district_decline_incidence",
    "district_ckd_categories",
    "source_creatinine_drift",
)
#: Tables of earlier versions, no longer built (dropped so that no undocumented table is left).
RETIRED_TABLES = ("district_ckd_stages",)  # the wide form of district_ckd_categories


#: Tables given interval columns after their SQL: rate -> (successes, trials).
WILSON_RATES = {
    "district_ckd_prevalence": {"ckd_share_of_tested": ("persons_ckd", "persons_tested")},
    "district_screening_coverage": {
        "share_with_both": ("with_egfr_and_acr", "persons_with_diabetes")
    },
    "region_coverage_trend": {"share_with_both": ("with_egfr_and_acr", "persons_with_diabetes")},
    "district_ckd_categories": {"ckd_per_100_tested": ("persons_ckd", "persons_tested")},
}
#: Rates given per 100 (or another base) rather than as a share: their limits are scaled alike.
RATE_BASE = {"ckd_per_100_tested": 100}


def add_intervals(frame: pl.DataFrame, name: str, confidence: float) -> pl.DataFrame:
    """Wilson intervals for the crude proportions (Wilson 1927; Newcombe 1998)."""
    for rate, (x, n) in WILSON_RATES.get(name, {}).items():
        frame = with_wilson_interval(frame, x, n, rate, confidence)
        base = RATE_BASE.get(rate)
        if base is None:
            frame = frame.with_columns(
                pl.col(f"{rate}_low").round(4), pl.col(f"{rate}_high").round(4)
            )
        else:
            frame = frame.with_columns(
                (pl.col(f"{rate}_low") * base).round(2), (pl.col(f"{rate}_high") * base).round(2)
            )
    return frame


def add_standardised_rates(frame: pl.DataFrame, settings: Settings) -> pl.DataFrame:
    """Age-standardised confirmed-CKD rate per 1,000 residents on the district and region total
    rows: direct method to the WHO World Standard Population 2000-2025 (Ahmad et al. 2001), on the
    broad age groups of ``summaries.standardisation_age_bands`` (the standard weights summed within
    each group), sexes pooled, Fay-Feuer gamma interval (Fay and Feuer 1997).

    Every cell row (a district, sex and age band) gets its broad group in
    ``standardisation_age_group``: a district's rate is a function of its counts per broad group
    (and the public population) alone, which is what the disclosure step checks before publishing
    it. The region's rate takes every cell, those of persons whose district is not known too (the
    region's population is the sum of its districts'), so that its counts add up to the published
    region total. A district without residents in a broad group that has cases gets no rate.
    """
    s = settings.pipeline.summaries
    broad = s.standardisation_age_bands
    groups = age_labels(broad)
    group_of = {label: groups[max(i for i, b in enumerate(broad) if b <= low)]
                for label, low in zip(age_labels(s.age_bands), s.age_bands, strict=False)}  # fmt: skip
    weights = dict(zip(groups, collapse_weights(broad), strict=False))
    column = "standardisation_age_group"
    is_cell = (
        (pl.col("district_code") != "ALL")
        & (pl.col("sex") != "ALL")
        & (pl.col("age_band") != "ALL")
    )
    group = pl.when(is_cell).then(
        pl.col("age_band").replace_strict(group_of, default=None, return_dtype=pl.String)
    )
    cells = (frame.with_columns(group.alias(column), pl.col("population").fill_null(0))
             .filter(pl.col(column).is_not_null()))  # fmt: skip
    per_group = cells.group_by("district_code", column).agg(
        pl.col("persons_ckd").sum(), pl.col("population").sum()
    )
    unrated = per_group.filter((pl.col("persons_ckd") > 0) & (pl.col("population") <= 0))[
        "district_code"
    ]
    by_district = standardise_frame(per_group.filter(~pl.col("district_code").is_in(unrated.implode())),
                                    ["district_code"], column, "persons_ckd", "population", weights,
                                    s.confidence, per=1000)  # fmt: skip
    region = standardise_frame(per_group.with_columns(pl.lit("ALL").alias("district_code")), ["district_code"],
                               column, "persons_ckd", "population", weights, s.confidence, per=1000)  # fmt: skip
    rates = pl.concat([by_district, region]).select(
        "district_code",
        pl.lit("ALL").alias("sex"),
        pl.lit("ALL").alias("age_band"),
        pl.col("rate").round(2).alias("ckd_per_1000_standardised"),
        pl.col("rate_low").round(2).alias("ckd_per_1000_standardised_low"),
        pl.col("rate_high").round(2).alias("ckd_per_1000_standardised_high"),
    )
    out = frame.join(
        rates, on=["district_code", "sex", "age_band"], how="left", maintain_order="left"
    )
    return out.with_columns(group.alias(column))  # last, so that older warehouses can add it


def build_undetected_albuminuria(
    con: duckdb.DuckDBPyConnection, settings: Settings, period: Period
) -> int:
    """district_undetected_albuminuria for the period, from its rows of diabetes_acr_strata."""
    s = settings.pipeline.summaries
    labels = age_group_labels(s.albuminuria_age_bands)
    strata = fetch_frame(con, "select * from diabetes_acr_strata where period = ?", [period.label])
    strata = strata.with_columns(
        pl.col("age_group_min").replace_strict(labels, return_dtype=pl.String).alias("age_group")
    )
    frame = estimate_undetected(strata, s.albuminuria_min_tested, s.confidence, period.label)
    add_missing_columns(con, "main", "district_undetected_albuminuria", frame)
    return replace_period_frame(con, "district_undetected_albuminuria", period.label, frame)


def build_equation_change(
    con: duckdb.DuckDBPyConnection, settings: Settings, period: Period
) -> dict[str, int]:
    """equation_reclassification and district_equation_change for the period
    (pipeline/core/equation_impact.py), from a transient person-level input never kept.
    """
    params = {
        "period": period.label,
        "period_end": period.end,
        "window_months": settings.pipeline.summaries.window_months,
        "adult_min_age": settings.pipeline.measures.adult_min_age_years,
    }
    build_table(
        con, "equation_comparison_inputs", "equation_comparison_inputs", params, temporary=True
    )
    inputs = fetch_frame(con, "select * from equation_comparison_inputs")
    con.execute("drop table equation_comparison_inputs")
    comparison = settings.pipeline.summaries.equation_comparison
    persons = daily_comparison(inputs, comparison)
    matrix = reclassification(
        persons, period.label, settings.pipeline.measures.adult_equation, [comparison, COMBINED]
    )
    totals, categories = summary(matrix)
    # confirmed CKD under the comparison: every known eGFR recomputed, the event rules run again
    build_table(
        con, "equation_comparison_history", "equation_comparison_history", params, temporary=True
    )
    history = fetch_frame(con, "select * from equation_comparison_history")
    con.execute("drop table equation_comparison_history")
    m = settings.pipeline.measures
    daily = pl.concat(
        [
            daily_egfr_under(history, m.adult_equation, comparison, m.adult_min_age_years),
            fetch_frame(con, read_sql("equation_acr_days")),
        ],
        how="vertical_relaxed",
    )
    del history
    with_frame(
        con, daily, "create or replace temp table equation_daily_values as select * from _frame"
    )
    rules = event_params(settings, period)
    query = sql_over(
        "kidney_events", {"daily_values_averaged": "select * from equation_daily_values"}
    )
    used = {k: v for k, v in rules.items() if f"${k}" in query}
    confirmed = sql_over("equation_confirmed_ckd", {"comparison_events": query})
    other = {k for (k,) in con.execute(confirmed, used).fetchall()}
    con.execute("drop table equation_daily_values")
    in_force = {
        k
        for (k,) in con.execute(
            "select person_key from person_status where period = ? and has_confirmed_ckd",
            [period.label],
        ).fetchall()
    }
    ckd = ckd_counts(persons, in_force, other, comparison)
    totals = totals.join(
        ckd, on=["district_code", "comparison"], how="left", maintain_order="left"
    ).with_columns(
        pl.when(pl.col("comparison") == comparison).then(pl.col(c).fill_null(0)).alias(c)
        for c in ("persons_ckd_in_force", "persons_ckd_comparison")
    )
    counts = {}
    for name, frame in (
        ("equation_reclassification", matrix),
        ("district_equation_change", totals),
        ("district_equation_change_categories", categories),
    ):
        add_missing_columns(con, "main", name, frame)
        counts[name] = replace_period_frame(con, name, period.label, frame)
    return counts


@dataclass(frozen=True)
class Summarised:
    """What :func:`summarise_stage` leaves: the internal tables (schema main) holding the period's
    rows, each with its row count for the period. The disclose stage reads these and no others.
    """

    period: str
    tables: dict[str, int]


def summarise_stage(
    con: duckdb.DuckDBPyConnection, settings: Settings, period: Period
) -> Summarised:
    params = {
        "period": period.label,
        "period_end": period.end,
        "window_months": settings.pipeline.summaries.window_months,
        "drift_months": settings.pipeline.summaries.drift_months,
        "drift_threshold": settings.pipeline.summaries.drift_threshold,
        "drift_min_results": settings.pipeline.summaries.drift_min_results,
        "albuminuria_age_bands": settings.pipeline.summaries.albuminuria_age_bands,
    }
    confidence = settings.pipeline.summaries.confidence
    counts = {}
    for name in SUMMARY_TABLES:
        if name not in WILSON_RATES:
            counts[name] = replace_period_rows(con, name, period.label, params)
            continue
        build_table(con, name, f"staging.{checked_name(name)}_sql", params)
        frame = add_intervals(
            fetch_frame(con, f"select * from staging.{checked_name(name)}_sql"), name, confidence
        )
        con.execute(f"drop table staging.{checked_name(name)}_sql")
        if name == "district_ckd_prevalence":
            frame = add_standardised_rates(frame, settings)
        add_missing_columns(con, "main", name, frame)
        counts[name] = replace_period_frame(con, name, period.label, frame)
    counts["district_undetected_albuminuria"] = build_undetected_albuminuria(con, settings, period)
    counts.update(build_equation_change(con, settings, period))
    for name in RETIRED_TABLES:
        drop_relation(con, name)
    return Summarised(period.label, counts)
