"""Tests for pipeline.core.measure_rules: the eGFR of a creatinine row and the age it is
computed at, against the published equation written out here in plain Python.

CKD-EPI 2021 race-free creatinine equation (Inker et al., N Engl J Med 2021;385:1737):
eGFR = 142 x min(Scr/k, 1)^a x max(Scr/k, 1)^-1.200 x 0.9938^age x 1.012 [female],
k = 0.7 (female) / 0.9 (male), a = -0.241 (female) / -0.302 (male), Scr in mg/dL.
KDIGO 2012 G categories: G1 >= 90, G2 60-89, G3a 45-59, G3b 30-44, G4 15-29, G5 < 15.
Age from a birth year at 1 July: off by at most half a year (common practice).
"""

from __future__ import annotations

import datetime as dt

import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.core.measure_rules import age_at_collection, compute_egfr
from pipeline.core.settings import MeasureSettings


def ckd_epi_2021(scr: float, age: float, female: bool) -> float:
    k, a = (0.7, -0.241) if female else (0.9, -0.302)
    return (
        142
        * min(scr / k, 1) ** a
        * max(scr / k, 1) ** -1.200
        * 0.9938**age
        * (1.012 if female else 1)
    )


def creatinine(rows: list[tuple[float, float, str]]) -> pl.DataFrame:
    return pl.DataFrame(
        {"value": [r[0] for r in rows], "age_exact": [r[1] for r in rows], "sex": [r[2] for r in rows],
         "height_cm": [None] * len(rows), "comparator": [None] * len(rows)},
        schema={"value": pl.Float64, "age_exact": pl.Float64, "sex": pl.String,
                "height_cm": pl.Float64, "comparator": pl.String},
    )  # fmt: skip


@settings(max_examples=60, deadline=None, database=None)
@given(
    st.lists(
        st.tuples(st.floats(0.2, 15.0), st.floats(18.0, 100.0), st.sampled_from(["F", "M"])),
        min_size=1, max_size=20,
    )
)  # fmt: skip
def test_adults_get_ckd_epi_2021(rows):
    got = compute_egfr(creatinine(rows), MeasureSettings())
    for (scr, age, sex), egfr, equation in zip(
        rows, got["egfr"], got["egfr_equation"], strict=True
    ):
        assert equation == "ckd_epi_2021_creatinine"
        assert egfr == pytest.approx(ckd_epi_2021(scr, age, sex == "F"), rel=1e-9)


def test_no_egfr_for_unknown_sex_or_a_censored_value():
    frame = creatinine([(1.0, 50.0, "U"), (1.0, 50.0, "F")]).with_columns(
        pl.Series("comparator", [None, "<"])
    )
    got = compute_egfr(frame, MeasureSettings())
    assert got["egfr"].to_list() == [None, None]
    assert got["egfr_reason"].to_list() == ["sex_unknown", "censored_creatinine"]


@settings(max_examples=100, deadline=None, database=None)
@given(st.dates(dt.date(1920, 1, 1), dt.date(2005, 12, 31)), st.integers(0, 20 * 365))
def test_the_age_from_the_birth_year_is_within_half_a_year(born, days_later):
    collected = born + dt.timedelta(days=days_later + 366)
    frame = pl.DataFrame({"birth_year": [born.year], "collected_date": [collected]})
    age = frame.select(age_at_collection(frame.columns)).item()
    true_age = (collected - born).days / 365.25
    assert abs(age - true_age) <= 0.5 + 1 / 365.25
