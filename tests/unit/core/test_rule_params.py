"""Tests for pipeline.core.rule_params: the shipped settings give the published thresholds.

Sources: sustained 30 % and 40 % eGFR decline (Levey et al., AJKD 2014;64:821), 57 % (a doubling
of serum creatinine, common practice); kidney failure = G5, eGFR below 15, and CKD = eGFR below
60 or ACR 30 mg/g or more for more than 3 months (KDIGO 2012, Kidney Int Suppl 2013;3:1);
progression = a worse G category with a 25 % fall (KDIGO 2012); diabetes HbA1c 6.5 % (48
mmol/mol) or fasting glucose 126 mg/dL (7.0 mmol/L) (ADA Standards of Care). Unit conversions:
IFCC = 10.929 x (NGSP - 2.15) (Hoelzel et al., Clin Chem 2004); glucose 1 mmol/L = 18.016 mg/dL
(molar mass 180.16 g/mol, common practice).
"""

from __future__ import annotations

import pytest

from pipeline.core.periods import Period
from pipeline.core.rule_params import event_params, trajectory_rules
from pipeline.core.settings import load_settings
from tests.conftest import CONFIG_DIR

SETTINGS = load_settings(CONFIG_DIR)


def test_the_event_rules_carry_the_published_thresholds():
    rules = {r["rule_id"]: r for r in trajectory_rules(SETTINGS).iter_rows(named=True)}
    assert rules["sustained_decline_30"]["threshold"] == 0.30
    assert rules["sustained_decline_40"]["threshold"] == 0.40
    assert rules["sustained_decline_57"]["threshold"] == 0.57
    assert (
        rules["kidney_failure"]["threshold"] == 15
        and rules["kidney_failure"]["comparison"] == "below"
    )
    assert rules["ckd_egfr"]["threshold"] == 60
    assert rules["ckd_acr"]["threshold"] == 30
    assert rules["ckd_egfr"]["min_span_days"] > 89  # more than 3 months
    assert rules["progression"]["threshold"] == 0.25
    assert {r["event_type"] for r in rules.values()} == {
        "sustained_decline", "kidney_failure", "ckd", "progression"
    }  # fmt: skip


def test_the_diabetes_thresholds_agree_across_units():
    params = event_params(SETTINGS, Period.parse("2026-02"))
    assert params["hba1c_percent"] == 6.5 and params["glucose_mg_dl"] == 126
    assert params["hba1c_mmol_mol"] == pytest.approx(10.929 * (6.5 - 2.15), abs=0.6)
    assert params["glucose_mmol_l"] == pytest.approx(126 / 18.016, abs=0.05)


def test_the_period_parameters_are_its_label_and_last_day():
    params = event_params(SETTINGS, Period.parse("2024-02"))
    assert params["period"] == "2024-02"
    assert params["period_end"].isoformat() == "2024-02-29"  # a Gregorian leap year
    assert params["diabetes_min_results"] in (1, 2)
