"""Parameters of the person-level rules (events, status, trajectories), taken from the settings."""

from __future__ import annotations

import polars as pl

from pipeline.core.periods import Period
from pipeline.core.settings import Settings


def trajectory_rules(settings: Settings) -> pl.DataFrame:
    """One row per event rule, from the trajectories settings."""
    t = settings.pipeline.trajectories
    rows = [
        {
            "rule_id": f"sustained_decline_{round(x * 100)}",
            "event_type": "sustained_decline",
            "measure": "egfr",
            "comparison": "at_or_below_fraction_of_baseline",
            "threshold": x,
            "min_span_days": t.decline_min_span_days,
            "after_baseline": True,
        }
        for x in t.decline_thresholds
    ]
    rows += [
        {"rule_id": "kidney_failure", "event_type": "kidney_failure", "measure": "egfr",
         "comparison": "below", "threshold": t.kidney_failure_egfr,
         "min_span_days": t.kidney_failure_min_span_days, "after_baseline": False},
        {"rule_id": "ckd_egfr", "event_type": "ckd", "measure": "egfr", "comparison": "below",
         "threshold": t.ckd_egfr_below, "min_span_days": t.ckd_min_span_days, "after_baseline": False},
        # the KDIGO A2 category in the unit reported (kidney_measures.is_at_or_above_a2), not a
        # converted number; the threshold column shows the mg/g equivalent
        {"rule_id": "ckd_acr", "event_type": "ckd", "measure": "acr", "comparison": "at_or_above_a2",
         "threshold": t.ckd_acr_at_or_above_mg_g, "min_span_days": t.ckd_min_span_days,
         "after_baseline": False},
        # KDIGO 2012: a worse G category with a fall of 25 % or more from the baseline, held over
        # consecutive values spanning progression_min_span_days
        {"rule_id": "progression", "event_type": "progression", "measure": "egfr",
         "comparison": "worse_category_and_fraction_of_baseline", "threshold": t.progression_decline,
         "min_span_days": t.progression_min_span_days, "after_baseline": True},
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
        "adult_min_age": m.adult_min_age_years,
        "diabetes_min_results": 2 if m.diabetes_rule == "confirmed" else 1,
    }  # fmt: skip
