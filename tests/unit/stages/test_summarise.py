"""Tests for pipeline.stages.summarise: the standardised rates on broad age groups and the intervals
added after the SQL.

Outside references: the WHO World Standard Population 2000-2025 (Ahmad et al., WHO GPE Discussion
Paper 31, 2001: five-year weights in per cent, summing to 100.035); the direct method (a weighted
sum of age-specific rates, weights summing to 1: Ahmad et al. 2001) written out by hand here; the
Fay-Feuer limits through pipeline.core.statistics, itself checked against Fay and Feuer (1997) in
test_statistics.py; Wilson intervals against statsmodels' ``proportion_confint``.
"""

from __future__ import annotations

from types import SimpleNamespace

import polars as pl
import pytest
from pydantic import ValidationError
from statsmodels.stats.proportion import proportion_confint

from pipeline.core.settings import SummarySettings
from pipeline.core.statistics import age_labels, collapse_weights, direct_standardised_rate
from pipeline.stages.summarise import add_intervals, add_standardised_rates

BANDS = [f"{low}-{low + 4}" for low in range(0, 85, 5)] + ["85+"]  # config/pipeline.yaml age_bands


def settings(broad: list[int]) -> SimpleNamespace:
    return SimpleNamespace(
        pipeline=SimpleNamespace(summaries=SummarySettings(standardisation_age_bands=broad))
    )


def prevalence(cells: dict[tuple[str, str, str], tuple[int, int | None]]) -> pl.DataFrame:
    """(district, sex, band) -> (persons_ckd, population), with the district and region totals."""
    rows = [{"district_code": d, "sex": s, "age_band": b, "persons_ckd": c, "population": p}
            for (d, s, b), (c, p) in cells.items()]  # fmt: skip
    frame = pl.DataFrame(rows, schema_overrides={"population": pl.Int64})
    totals = [frame.group_by("district_code").agg(pl.col("persons_ckd").sum(), pl.col("population").sum()),
              frame.select(pl.lit("ALL").alias("district_code"), pl.col("persons_ckd").sum(),
                           pl.col("population").sum())]  # fmt: skip
    totals = [
        t.with_columns(pl.lit("ALL").alias("sex"), pl.lit("ALL").alias("age_band")) for t in totals
    ]
    out = pl.concat([frame, *[t.select(frame.columns) for t in totals]])
    return out.with_columns(pl.lit("2025-06").alias("period"))


def total_row(frame: pl.DataFrame, district: str) -> dict:
    return frame.filter((pl.col("district_code") == district) & (pl.col("sex") == "ALL")).row(
        0, named=True
    )


def test_broad_group_weights_are_sums_of_the_who_weights():
    # Ahmad et al. 2001 (per cent): 0-64 = 0-4 .. 60-64, 65-74 = 65-69 + 70-74, 75+ = the rest;
    # each divided by 100.035, the sum of all the published figures (hand sums).
    young = 8.86 + 8.69 + 8.60 + 8.47 + 8.22 + 7.93 + 7.61 + 7.15 + 6.59 + 6.04 + 5.37 + 4.55 + 3.72
    middle = 2.96 + 2.21
    old = 1.52 + 0.91 + 0.44 + 0.15 + 0.04 + 0.005
    assert collapse_weights([0, 65, 75]) == pytest.approx(
        [young / 100.035, middle / 100.035, old / 100.035], rel=1e-12
    )
    assert age_labels([0, 65, 75]) == ["0-64", "65-74", "75+"]


def test_the_rate_is_the_direct_method_on_the_broad_groups():
    cells = {("WF01", "F", "50-54"): (3, 400), ("WF01", "M", "60-64"): (7, 350), ("WF01", "F", "70-74"): (12, 200),
             ("WF01", "M", "65-69"): (9, 150), ("WF01", "F", "85+"): (15, 60), ("WF01", "M", "80-84"): (11, 40),
             ("WF02", "F", "50-54"): (5, 500), ("WF02", "F", "70-74"): (20, 300), ("WF02", "M", "85+"): (9, 80)}  # fmt: skip
    out = add_standardised_rates(prevalence(cells), settings([0, 65, 75]))
    w = collapse_weights([0, 65, 75])
    # by hand: per group, cases / residents (sexes pooled), times the weight, summed, per 1,000
    by_hand = 1000 * (
        w[0] * (3 + 7) / (400 + 350) + w[1] * (12 + 9) / (200 + 150) + w[2] * (15 + 11) / (60 + 40)
    )
    wf01 = total_row(out, "WF01")
    assert wf01["ckd_per_1000_standardised"] == pytest.approx(round(by_hand, 2), abs=1e-9)
    rate, low, high = direct_standardised_rate([10, 21, 26], [750, 350, 100], w)
    assert (wf01["ckd_per_1000_standardised_low"], wf01["ckd_per_1000_standardised_high"]) == pytest.approx(
        (round(1000 * float(low), 2), round(1000 * float(high), 2)), abs=1e-9)  # fmt: skip
    assert 1000 * float(rate) == pytest.approx(by_hand, rel=1e-12)
    # the region: every district's cells, the populations summed
    region = direct_standardised_rate([15, 41, 35], [1250, 650, 180], w)[0]
    assert total_row(out, "ALL")["ckd_per_1000_standardised"] == pytest.approx(
        round(1000 * float(region), 2)
    )


def test_each_cell_carries_its_broad_group_and_totals_none():
    cells = {("WF01", "F", b): (1, 100) for b in BANDS}
    out = add_standardised_rates(prevalence(cells), settings([0, 65, 75]))
    groups = dict(zip(out["age_band"], out["standardisation_age_group"], strict=False))
    assert groups["0-4"] == groups["60-64"] == "0-64"
    assert groups["65-69"] == groups["70-74"] == "65-74"
    assert groups["75-79"] == groups["85+"] == "75+"
    assert out.filter(pl.col("sex") == "ALL")["standardisation_age_group"].null_count() == 2
    assert out.columns[-1] == "standardisation_age_group"  # last: an older warehouse can add it


def test_the_region_rate_counts_persons_of_unknown_district():
    # persons whose district is not known have no population of their own, so no district rate;
    # the region's rate counts them (its counts add up to the region total, 4 + 6 = 10).
    cells = {("WF01", "F", "70-74"): (4, 200), ("unknown", "F", "70-74"): (6, None)}
    out = add_standardised_rates(prevalence(cells), settings([0, 65, 75]))
    assert total_row(out, "unknown")["ckd_per_1000_standardised"] is None
    w = collapse_weights([0, 65, 75])
    expected = direct_standardised_rate([0, 10, 0], [0, 200, 0], w)[0]
    assert total_row(out, "ALL")["ckd_per_1000_standardised"] == pytest.approx(
        round(1000 * float(expected), 2)
    )
    assert total_row(out, "WF01")["ckd_per_1000_standardised"] is not None


def test_per_100_tested_limits_are_100_times_wilson():
    frame = pl.DataFrame({"persons_ckd": [0, 3, 81, 40], "persons_tested": [10, 12, 263, 40]})
    out = add_intervals(
        frame.with_columns(ckd_per_100_tested=pl.lit(0.0)), "district_ckd_categories", 0.95
    )
    for row in out.iter_rows(named=True):
        low, high = proportion_confint(
            row["persons_ckd"], row["persons_tested"], alpha=0.05, method="wilson"
        )
        assert row["ckd_per_100_tested_low"] == pytest.approx(round(100 * low, 2), abs=1e-9)
        assert row["ckd_per_100_tested_high"] == pytest.approx(round(100 * high, 2), abs=1e-9)
    # Newcombe 1998, method 3: 81/263 -> 0.2553-0.3662, i.e. 25.53-36.62 per 100
    assert out.row(2, named=True)["ckd_per_100_tested_low"] == pytest.approx(25.53, abs=0.006)
    assert out.row(2, named=True)["ckd_per_100_tested_high"] == pytest.approx(36.62, abs=0.006)


@pytest.mark.parametrize("broad", [[0, 67], [5, 65], [0, 65, 65], []])
def test_broad_groups_must_be_unions_of_age_bands(broad):
    with pytest.raises(ValidationError):
        SummarySettings(standardisation_age_bands=broad)
