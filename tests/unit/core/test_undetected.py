"""Tests for pipeline.core.undetected: expected undetected albuminuria by indirect standardisation
(Breslow and Day, Statistical Methods in Cancer Research vol. II, IARC 1987, ch. 2, from memory),
its interval from the variance of a weighted sum of independent binomial proportions,
Var(sum w_s p_s) = sum w_s^2 p_s (1 - p_s) / n_s (common practice), and its disclosure control.
The expected values are worked out by hand in the comments; the normal quantile comes from the
standard library (statistics.NormalDist), not from the module's scipy call."""

from __future__ import annotations

import math
from statistics import NormalDist

import polars as pl
import pytest

from pipeline.core.settings import DisclosureSettings
from pipeline.core.undetected import ASSUMPTION, assign_share_strata, estimate_undetected
from pipeline.stages.disclose.suppression import follow_final_blanks, suppress_tables

Z = NormalDist().inv_cdf(0.975)  # 1.959964


def strata_frame() -> pl.DataFrame:
    # (district, age group, sex, GFR, persons with diabetes, with ACR, categorised, A2/A3)
    rows = [
        # stratum 65-74/F/G3a: region n = 20 tested, x = 5 -> p = 0.25; untested 5 + 8
        ("WF01", "65-74", "F", "G3a", 15, 10, 10, 3),
        ("WF02", "65-74", "F", "G3a", 18, 10, 10, 2),
        # stratum 45-64/M/G2: n = 40, x = 4 -> p = 0.10; untested 10 + 6
        ("WF01", "45-64", "M", "G2", 30, 20, 20, 2),
        ("WF02", "45-64", "M", "G2", 26, 20, 20, 2),
        # two sparse strata (3 and 2 tested, below 10): pooled to 75+/F/pooled (n = 5), still
        # sparse, then 75+/pooled/pooled (n = 5), then the region's remainder pooled/pooled/pooled:
        # n = 5, x = 2 + 0 -> p = 0.40; untested 1 (WF01) and 3 (WF02)
        ("WF01", "75+", "F", "G4", 4, 3, 3, 2),
        ("WF02", "75+", "F", "unknown", 5, 2, 2, 0),
    ]
    cols = [
        "district_code",
        "age_group",
        "sex",
        "g_category",
        "persons_with_diabetes",
        "with_acr",
        "with_acr_categorised",
        "with_acr_a2_a3",
    ]
    return pl.DataFrame([dict(zip(cols, r, strict=False)) for r in rows]).with_columns(
        pl.lit("2026-10").alias("period")
    )


def by_district(frame: pl.DataFrame) -> dict[str, dict]:
    return {r["district_code"]: r for r in frame.to_dicts()}


def test_shares_pool_sparse_strata_only_with_each_other():
    shares = {
        (r["age_group"], r["sex"], r["g_category"]): r
        for r in assign_share_strata(strata_frame(), 10).to_dicts()
    }
    assert shares[("65-74", "F", "G3a")]["share_stratum"] == "65-74/F/G3a"
    assert (
        shares[("65-74", "F", "G3a")]["share_tested"],
        shares[("65-74", "F", "G3a")]["share_a2_a3"],
    ) == (20, 5)
    assert shares[("45-64", "M", "G2")]["share_stratum"] == "45-64/M/G2"
    for key in [("75+", "F", "G4"), ("75+", "F", "unknown")]:
        assert shares[key]["share_stratum"] == "pooled/pooled/pooled"
        assert (shares[key]["share_tested"], shares[key]["share_a2_a3"]) == (5, 2)


def test_expected_and_interval_by_hand():
    out = by_district(estimate_undetected(strata_frame(), 10, 0.95))
    # WF01: E = 5 x 0.25 + 10 x 0.10 + 1 x 0.40 = 1.25 + 1.00 + 0.40 = 2.65
    # Var = 5^2 x 0.25 x 0.75 / 20 + 10^2 x 0.1 x 0.9 / 40 + 1^2 x 0.4 x 0.6 / 5
    #     = 0.234375 + 0.225 + 0.048 = 0.507375
    wf01 = out["WF01"]
    assert wf01["persons_without_acr"] == 16
    assert wf01["expected_a2_a3_without_acr"] == pytest.approx(
        2.6, abs=0.051
    )  # 2.65 rounded to 0.1
    half = Z * math.sqrt(0.507375)  # 1.39608
    assert wf01["expected_a2_a3_without_acr_low"] == round(2.65 - half, 1) == 1.3
    assert wf01["expected_a2_a3_without_acr_high"] == round(2.65 + half, 1) == 4.0
    assert wf01["expected_share_without_acr"] == round(2.65 / 16, 4)
    assert wf01["with_acr_a2_a3"] == 7 and wf01["share_a2_a3_of_tested"] == round(7 / 33, 4)
    assert wf01["without_acr_pooled_stratum"] == 1
    # Region (ALL): untested 13, 16 and 4 in the three share strata
    # E = 13 x 0.25 + 16 x 0.10 + 4 x 0.40 = 3.25 + 1.60 + 1.60 = 6.45
    # Var = 169 x 0.1875 / 20 + 256 x 0.09 / 40 + 16 x 0.24 / 5 = 1.584375 + 0.576 + 0.768 = 2.928375
    region = out["ALL"]
    assert region["persons_with_diabetes"] == 98 and region["persons_without_acr"] == 33
    assert region["expected_a2_a3_without_acr"] == pytest.approx(6.45, abs=0.051)
    half = Z * math.sqrt(2.928375)  # 3.35398
    assert region["expected_a2_a3_without_acr_low"] == round(6.45 - half, 1) == 3.1
    assert region["expected_a2_a3_without_acr_high"] == round(6.45 + half, 1) == 9.8
    assert region["without_acr_pooled_stratum"] == 4
    assert region["estimate_assumption"] == ASSUMPTION


def test_the_interval_stays_within_zero_and_the_untested():
    # one stratum, 10 tested, 9 with A2/A3 (p = 0.9), 2 untested: E = 1.8, half = z x 2 x 0.3 / sqrt(10)
    # = 0.372; the high limit 2.17 is cut to the 2 untested
    frame = pl.DataFrame(
        [
            {
                "period": "2026-10",
                "district_code": "WF01",
                "age_group": "65-74",
                "sex": "F",
                "g_category": "G2",
                "persons_with_diabetes": 12,
                "with_acr": 10,
                "with_acr_categorised": 10,
                "with_acr_a2_a3": 9,
            }
        ]
    )
    wf01 = by_district(estimate_undetected(frame, 10, 0.95))["WF01"]
    assert wf01["expected_a2_a3_without_acr"] == 1.8
    assert (
        wf01["expected_a2_a3_without_acr_low"]
        == round(1.8 - Z * 2 * math.sqrt(0.09 / 10), 1)
        == 1.4
    )
    assert wf01["expected_a2_a3_without_acr_high"] == 2.0


def test_no_tested_person_gives_no_estimate_not_zero():
    frame = pl.DataFrame(
        [
            {
                "period": "2026-10",
                "district_code": "WF01",
                "age_group": "65-74",
                "sex": "F",
                "g_category": "G2",
                "persons_with_diabetes": 12,
                "with_acr": 0,
                "with_acr_categorised": 0,
                "with_acr_a2_a3": 0,
            }
        ]
    )
    wf01 = by_district(estimate_undetected(frame, 10, 0.95))["WF01"]
    assert wf01["persons_without_acr"] == 12
    assert (
        wf01["expected_a2_a3_without_acr"] is None
        and wf01["expected_a2_a3_without_acr_high"] is None
    )


def test_published_table_leaves_coverage_counts_to_coverage():
    undetected = estimate_undetected(strata_frame(), 10, 0.95)
    coverage = undetected.select(
        "period", "district_code", "persons_with_diabetes", "with_acr"
    ).with_columns(
        pl.col("with_acr").alias("with_egfr"),
        pl.col("with_acr").alias("with_egfr_and_acr"),
        (pl.col("with_acr") / pl.col("persons_with_diabetes")).alias("share_with_both"),
    )
    # WF01 with_acr_a2_a3 = 3 + 2 + 2 = 7 (1 to 10): blanked, WF02 2 + 2 + 0 = 4 too; the region 11 is not
    out = suppress_tables(
        {"district_screening_coverage": coverage, "district_undetected_albuminuria": undetected},
        DisclosureSettings(),
    )
    published = out["district_undetected_albuminuria"]
    # coverage's counts (and their difference) are published once, in coverage: a second copy
    # here is one cell to the joint audit and could lag coverage's blanks
    assert not {"persons_with_diabetes", "with_acr", "persons_without_acr"} & set(published.columns)
    pub = by_district(published)
    assert pub["WF01"]["with_acr_a2_a3"] is None and pub["WF01"]["share_a2_a3_of_tested"] is None
    assert pub["ALL"]["with_acr_a2_a3"] == 11
    # persons_with_diabetes 49 and with_acr 33 are published in coverage, so the estimate is too
    assert (
        pub["WF01"]["expected_a2_a3_without_acr"]
        == undetected.filter(pl.col("district_code") == "WF01")["expected_a2_a3_without_acr"][0]
    )
    # blank with_acr in coverage -> every figure built on it is blank here. Before, the untested
    # count 44 was published beside coverage's 49 persons with diabetes: 49 - 44 gave back the
    # blanked with_acr of 5.
    small = coverage.with_columns(
        pl.when(pl.col("district_code") == "WF02")
        .then(5)
        .otherwise(pl.col("with_acr"))
        .alias("with_acr")
    )
    changed = undetected.with_columns(
        pl.when(pl.col("district_code") == "WF02")
        .then(5)
        .otherwise(pl.col("with_acr"))
        .alias("with_acr")
    )
    changed = changed.with_columns(
        (pl.col("persons_with_diabetes") - pl.col("with_acr")).alias("persons_without_acr")
    )
    out = suppress_tables(
        {"district_screening_coverage": small, "district_undetected_albuminuria": changed},
        DisclosureSettings(),
    )
    assert by_district(out["district_screening_coverage"])["WF02"]["with_acr"] is None
    pub = by_district(out["district_undetected_albuminuria"])
    for column in (
        "expected_a2_a3_without_acr",
        "expected_a2_a3_without_acr_low",
        "expected_a2_a3_without_acr_high",
        "expected_share_without_acr",
        "share_a2_a3_of_tested",
    ):
        assert pub["WF02"][column] is None, column


def test_estimates_follow_blanks_the_joint_audit_adds_to_coverage():
    undetected = estimate_undetected(strata_frame(), 10, 0.95)
    coverage = undetected.select("period", "district_code", "persons_with_diabetes", "with_acr")
    # as if the joint audit had blanked WF01's with_acr in coverage after the per-table step
    final = {
        "district_screening_coverage": coverage.with_columns(
            pl.when(pl.col("district_code") == "WF01")
            .then(None)
            .otherwise(pl.col("with_acr"))
            .alias("with_acr")
        ),
        "district_undetected_albuminuria": undetected.drop(
            "persons_with_diabetes", "with_acr", "persons_without_acr"
        ),
    }
    pub = by_district(follow_final_blanks(final)["district_undetected_albuminuria"])
    assert pub["WF01"]["expected_a2_a3_without_acr"] is None
    assert pub["WF02"]["expected_a2_a3_without_acr"] is not None


def test_a_period_without_persons_with_diabetes_still_has_its_region_row():
    empty = strata_frame().head(0)
    out = estimate_undetected(empty, 10, 0.95, "2026-10").to_dicts()
    assert [
        (r["district_code"], r["persons_with_diabetes"], r["persons_without_acr"]) for r in out
    ] == [("ALL", 0, 0)]
    assert out[0]["expected_a2_a3_without_acr"] == 0.0 and out[0]["period"] == "2026-10"
