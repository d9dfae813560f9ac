"""Summarise: district tables per period (internal, unsuppressed), from sql/reports/."""

from __future__ import annotations

import duckdb

from pipeline.periods import Period
from pipeline.settings import Settings
from pipeline.warehouse import replace_period_rows

#: Internal summary tables, in the order they are built (each is sql/reports/<name>.sql).
SUMMARY_TABLES = (
    "district_ckd_prevalence",
    "district_screening_coverage",
    "lab_egfr_agreement",
    "source_quality",
    "source_rejection_reasons",
)


def summarise_stage(con: duckdb.DuckDBPyConnection, settings: Settings, period: Period) -> dict[str, int]:
    params = {
        "period": period.label,
        "period_end": period.end,
        "window_months": settings.pipeline.summaries.window_months,
    }
    return {name: replace_period_rows(con, name, period.label, params) for name in SUMMARY_TABLES}
