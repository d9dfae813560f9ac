"""Summarise: district tables per period (internal, unsuppressed), from sql/reports/."""

from __future__ import annotations

import duckdb
import polars as pl

from pipeline.periods import Period
from pipeline.settings import Settings
from pipeline.statistics import collapse_weights, standardise_frame, with_wilson_interval
from pipeline.warehouse import build_table, fetch_frame, replace_period_frame, replace_period_rows

#: Internal summary tables, in the order they are built (each is sql/reports/<name>.sql).
SUMMARY_TABLES = (
    "district_ckd_prevalence",
    "district_screening_coverage",
    "lab_egfr_agreement",
    "source_quality",
    "source_rejection_reasons",
    "district_decline_incidence",
    "district_ckd_stages",
    "source_creatinine_drift",
)


#: Tables given interval columns after their SQL: rate -> (successes, trials).
WILSON_RATES = {
    "district_ckd_prevalence": {"ckd_share_of_tested": ("persons_ckd", "persons_tested")},
    "district_screening_coverage": {"share_with_both": ("with_egfr_and_acr", "persons_with_diabetes")},
}


def add_intervals(frame: pl.DataFrame, name: str, confidence: float) -> pl.DataFrame:
    """Wilson intervals for the crude proportions (Wilson 1927; Newcombe 1998)."""
    for rate, (x, n) in WILSON_RATES.get(name, {}).items():
        frame = with_wilson_interval(frame, x, n, rate, confidence)
        frame = frame.with_columns(pl.col(f"{rate}_low").round(4), pl.col(f"{rate}_high").round(4))
    return frame


def add_standardised_rates(frame: pl.DataFrame, settings: Settings) -> pl.DataFrame:
    """Age-standardised confirmed-CKD rate per 1,000 residents on the district and region total
    rows: direct method to the WHO World Standard Population 2000-2025 (Ahmad et al. 2001),
    sexes pooled, Fay-Feuer gamma interval (Fay and Feuer 1997)."""
    s = settings.pipeline.summaries
    bands = s.age_bands
    labels = [f"{lo}-{hi - 1}" for lo, hi in zip(bands, bands[1:])] + [f"{bands[-1]}+"]
    weights = dict(zip(labels, collapse_weights(bands)))
    cells = frame.filter(
        (pl.col("district_code") != "ALL") & (pl.col("sex") != "ALL") & (pl.col("age_band") != "ALL")
        & pl.col("population").is_not_null() & (pl.col("population") > 0)
    )  # fmt: skip
    by_district = standardise_frame(cells, ["district_code"], "age_band", "persons_ckd", "population",
                                    weights, s.confidence, per=1000)  # fmt: skip
    region = standardise_frame(cells.with_columns(pl.lit("ALL").alias("district_code")), ["district_code"],
                               "age_band", "persons_ckd", "population", weights, s.confidence, per=1000)  # fmt: skip
    rates = pl.concat([by_district, region]).select(
        "district_code",
        pl.lit("ALL").alias("sex"),
        pl.lit("ALL").alias("age_band"),
        pl.col("rate").round(2).alias("ckd_per_1000_standardised"),
        pl.col("rate_low").round(2).alias("ckd_per_1000_standardised_low"),
        pl.col("rate_high").round(2).alias("ckd_per_1000_standardised_high"),
    )
    return frame.join(rates, on=["district_code", "sex", "age_band"], how="left", maintain_order="left")


def summarise_stage(con: duckdb.DuckDBPyConnection, settings: Settings, period: Period) -> dict[str, int]:
    params = {
        "period": period.label,
        "period_end": period.end,
        "window_months": settings.pipeline.summaries.window_months,
        "drift_months": settings.pipeline.summaries.drift_months,
        "drift_threshold": settings.pipeline.summaries.drift_threshold,
        "drift_min_results": settings.pipeline.summaries.drift_min_results,
    }
    confidence = settings.pipeline.summaries.confidence
    counts = {}
    for name in SUMMARY_TABLES:
        if name not in WILSON_RATES:
            counts[name] = replace_period_rows(con, name, period.label, params)
            continue
        build_table(con, name, f"staging.{name}_sql", params)
        frame = add_intervals(fetch_frame(con, f"select * from staging.{name}_sql"), name, confidence)
        con.execute(f"drop table staging.{name}_sql")
        if name == "district_ckd_prevalence":
            frame = add_standardised_rates(frame, settings)
        counts[name] = replace_period_frame(con, name, period.label, frame)
    return counts
