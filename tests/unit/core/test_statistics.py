"""Tests for pipeline.core.statistics against published methods, their worked examples and reference
libraries. Each check names its source: statsmodels (``proportion_confint``), scipy (chi-square
quantiles, an independent route to the gamma quantiles), the papers, or "hand calculation" (the
published formula worked through step by step, independently of the code under test)."""

from __future__ import annotations

import math

import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import chi2
from statsmodels.stats.proportion import proportion_confint

from pipeline.core.statistics import (
    WHO_WORLD_STANDARD_2000_2025,
    collapse_weights,
    direct_standardised_rate,
    standardise_frame,
    wilson_interval,
    with_wilson_interval,
)

# No example database: the run must not write into the working tree.
SETTINGS = settings(max_examples=150, deadline=None, database=None)
BANDS = list(range(0, 90, 5))  # config/pipeline.yaml summaries.age_bands: 0-4 .. 80-84, 85+

# --------------------------------------------------------------------------- Wilson


def test_wilson_worked_example_newcombe_1998():
    # Newcombe, Stat Med 1998;17:857, Table I (method 3, score interval): 81/263 -> 0.2553-0.3662.
    low, high = wilson_interval(81, 263)
    assert (round(float(low), 4), round(float(high), 4)) == (0.2553, 0.3662)


def test_wilson_matches_statsmodels_on_a_grid():
    # Reference library: statsmodels proportion_confint(method="wilson"), every x for n up to 60
    # and a few large n, at three confidence levels.
    n = np.concatenate([np.repeat(np.arange(1, 61), np.arange(2, 62)), [1000] * 3, [250_000] * 3])
    small = np.concatenate([np.arange(k + 1) for k in range(1, 61)])
    x = np.concatenate([small, [0, 17, 1000], [1, 125_000, 249_999]])
    for confidence in (0.90, 0.95, 0.99):
        low, high = wilson_interval(x, n, confidence)
        ref_low, ref_high = proportion_confint(x, n, alpha=1 - confidence, method="wilson")
        np.testing.assert_allclose(low, ref_low, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(high, ref_high, rtol=1e-10, atol=1e-12)


@SETTINGS
@given(st.integers(1, 10**6).flatmap(lambda n: st.tuples(st.integers(0, n), st.just(n))),
       st.floats(0.5, 0.999))  # fmt: skip
def test_wilson_property_matches_statsmodels(xn, confidence):
    x, n = xn
    low, high = wilson_interval(x, n, confidence)
    ref_low, ref_high = proportion_confint(x, n, alpha=1 - confidence, method="wilson")
    assert math.isclose(low, ref_low, rel_tol=1e-9, abs_tol=1e-12)
    assert math.isclose(high, ref_high, rel_tol=1e-9, abs_tol=1e-12)
    # the score interval always holds the estimate and stays in [0, 1] (Wilson 1927)
    assert 0 <= low <= x / n <= high <= 1


def test_wilson_edges():
    low, high = wilson_interval([0, 5, 0], [5, 5, 0])
    assert low[0] == 0.0 and high[1] == 1.0  # x = 0 and x = n: the limits are exact
    assert np.isnan(low[2]) and np.isnan(high[2])  # no trials: no interval
    with pytest.raises(ValueError):
        wilson_interval(6, 5)
    with pytest.raises(ValueError):
        wilson_interval(1, 5, confidence=1.0)


def test_with_wilson_interval_on_a_frame():
    frame = pl.DataFrame({"x": [81, None, 0, 2], "n": [263, 10, 0, 9]})
    out = with_wilson_interval(frame, "x", "n", "share")
    low, high = wilson_interval(81, 263)
    assert out["share_low"].to_list()[0] == pytest.approx(float(low))
    assert out["share_high"].to_list()[0] == pytest.approx(float(high))
    assert out["share_low"].to_list()[1:3] == [None, None]  # null count, no trials
    ref = proportion_confint(2, 9, method="wilson")  # statsmodels
    assert out.row(3)[2:] == pytest.approx(ref)


# --------------------------------------------------------------------------- Fay-Feuer


def garwood(d: int, n: float, confidence: float = 0.95) -> tuple[float, float]:
    """Exact Poisson interval for d events in n person-units (Garwood, Biometrika 1936;28:437),
    via chi-square quantiles: [chi2(a/2; 2d)/2, chi2(1-a/2; 2d+2)/2] / n, lower 0 when d = 0."""
    alpha = 1 - confidence
    lower = chi2.ppf(alpha / 2, 2 * d) / 2 / n if d > 0 else 0.0
    return lower, chi2.ppf(1 - alpha / 2, 2 * d + 2) / 2 / n


def test_fay_feuer_hand_calculation_three_strata():
    # Fay and Feuer, Stat Med 1997;16:791, the method worked by hand (not a table of the paper):
    # weights w = (0.5, 0.3, 0.2), sum 1; population n = (1000, 2000, 500); events d = (5, 20, 10).
    # a_i = w_i / (n_i * sum w)  = (0.0005, 0.00015, 0.0004)
    # y   = sum a_i d_i          = 0.0025 + 0.0030 + 0.0040            = 0.0095
    # v   = sum a_i^2 d_i        = 1.25e-6 + 0.45e-6 + 1.60e-6         = 3.30e-6
    # a_M = max a_i              = 0.0005
    # lower: shape y^2/v = 9.025e-5 / 3.30e-6 = 27.3485, scale v/y = 3.30e-6 / 0.0095 = 3.4737e-4
    # upper: shape (y+a_M)^2/(v+a_M^2) = 1e-4 / 3.55e-6 = 28.1690, scale 3.55e-6 / 0.01 = 3.55e-4
    # A gamma(k, theta) quantile is theta * chi2(2k) / 2 (scipy chi2, an independent route).
    rate, low, high = direct_standardised_rate([5, 20, 10], [1000, 2000, 500], [0.5, 0.3, 0.2])
    assert rate == pytest.approx(0.0095, rel=1e-12)
    assert low == pytest.approx(
        3.30e-6 / 0.0095 * chi2.ppf(0.025, 2 * 9.025e-5 / 3.30e-6) / 2, rel=1e-9
    )
    assert high == pytest.approx(3.55e-4 * chi2.ppf(0.975, 2 * 1e-4 / 3.55e-6) / 2, rel=1e-9)
    # the gamma interval is asymmetric, wider above the estimate (right skew)
    assert high - rate > rate - low > 0


@SETTINGS
@given(st.integers(0, 200), st.integers(1, 10**6), st.floats(0.8, 0.99), st.floats(0.01, 100))
def test_one_stratum_gives_the_exact_poisson_interval(d, n, confidence, weight):
    # Fay and Feuer 1997: with one stratum the gamma interval is the exact (Garwood) Poisson
    # interval, lower chi2(a/2; 2d)/2/n and upper chi2(1-a/2; 2d+2)/2/n.
    rate, low, high = direct_standardised_rate([d], [n], [weight], confidence)
    ref_low, ref_high = garwood(d, n, confidence)
    assert rate == pytest.approx(d / n, rel=1e-12)
    assert low == pytest.approx(ref_low, rel=1e-9, abs=1e-300)
    assert high == pytest.approx(ref_high, rel=1e-9)


strata = st.integers(1, 8).flatmap(lambda k: st.tuples(
    st.lists(st.integers(0, 60), min_size=k, max_size=k),
    st.lists(st.integers(1, 5000), min_size=k, max_size=k),
    st.lists(st.floats(0.001, 10), min_size=k, max_size=k)))  # fmt: skip


@SETTINGS
@given(strata, st.floats(0.001, 1000))
def test_scaling_the_weights_changes_nothing(data, factor):
    # The weights enter only as w_i / sum(w) (Fay and Feuer 1997): any common factor cancels.
    d, n, w = data
    one = direct_standardised_rate(d, n, w)
    scaled = direct_standardised_rate(d, n, [x * factor for x in w])
    for a, b in zip(one, scaled, strict=False):
        assert b == pytest.approx(a, rel=1e-9, abs=1e-300)
    rate, low, high = one
    assert low <= rate <= high  # the interval holds the estimate
    if sum(d) == 0:
        assert low == 0.0 and rate == 0.0  # y = 0: lower limit 0 (Fay and Feuer 1997)


def test_no_events_lower_zero_upper_exponential():
    # y = 0, v = 0: lower 0; the upper gamma has shape a_M^2/a_M^2 = 1 (an exponential with
    # mean a_M), so upper = -a_M * ln(alpha/2) (hand calculation, Fay and Feuer 1997).
    rate, low, high = direct_standardised_rate([0, 0, 0], [100, 400, 50], [1, 2, 3])
    a_m = max(1 / (100 * 6), 2 / (400 * 6), 3 / (50 * 6))
    assert (rate, low) == (0.0, 0.0)
    assert high == pytest.approx(-a_m * math.log(0.025), rel=1e-12)


def test_weights_proportional_to_population_give_the_crude_rate():
    # w_i proportional to n_i makes every a_i = 1/N, so y = D/N, v = D/N^2, a_M = 1/N: the crude
    # rate with the exact Poisson interval of D events in N (hand calculation from the formula).
    d, n = [3, 0, 9, 4], [200, 300, 900, 600]
    rate, low, high = direct_standardised_rate(d, n, n)
    assert rate == pytest.approx(16 / 2000)
    assert (low, high) == pytest.approx(garwood(16, 2000), rel=1e-9)


def test_groups_on_leading_axes_and_empty_groups():
    d = [[5, 20, 10], [0, 0, 0], [0, 0, 0]]
    n = [[1000, 2000, 500], [10, 20, 30], [0, 0, 0]]
    rate, low, high = direct_standardised_rate(d, n, [0.5, 0.3, 0.2])
    for i in range(2):
        assert (rate[i], low[i], high[i]) == pytest.approx(
            direct_standardised_rate(d[i], n[i], [0.5, 0.3, 0.2])
        )
    assert np.isnan(rate[2]) and np.isnan(low[2]) and np.isnan(high[2])  # no population: no rate
    with pytest.raises(ValueError):
        direct_standardised_rate([1, 0], [0, 10], [1, 1])  # events where nobody lives
    with pytest.raises(ValueError):
        direct_standardised_rate([1, 0], [10, 10], [1, 1, 1])


def test_a_m_runs_over_strata_without_events():
    # a_M is the largest a_i over all strata with population, not only those with events
    # (Fay and Feuer 1997): a small empty stratum widens the upper limit.
    _, _, high_small = direct_standardised_rate([10, 0], [1000, 10], [1, 1])
    _, _, high_large = direct_standardised_rate([10, 0], [1000, 1000], [1, 1])
    a_m = 1 / (10 * 2)
    y, v = 10 / 2000, 10 / 2000**2
    expected = (v + a_m**2) / (y + a_m) * chi2.ppf(0.975, 2 * (y + a_m) ** 2 / (v + a_m**2)) / 2
    assert high_small == pytest.approx(expected, rel=1e-9)
    assert high_small > high_large


def test_standardise_frame_matches_the_function():
    weights = dict(zip(["0-39", "40-64", "65+"], [0.5, 0.3, 0.2], strict=False))
    frame = pl.DataFrame({
        "district_code": ["WF01", "WF01", "WF01", "WF02", "WF02"],
        "age_band": ["0-39", "40-64", "65+", "0-39", "65+"],
        "persons_ckd": [5, 20, 10, 1, 2],
        "population": [1000, 2000, 500, 300, 100],
    })  # fmt: skip
    out = standardise_frame(
        frame, ["district_code"], "age_band", "persons_ckd", "population", weights, per=1000
    )
    assert out["district_code"].to_list() == ["WF01", "WF02"]
    first = direct_standardised_rate([5, 20, 10], [1000, 2000, 500], [0.5, 0.3, 0.2])
    second = direct_standardised_rate([1, 0, 2], [300, 0, 100], [0.5, 0.3, 0.2])  # 40-64 absent: 0
    assert out.row(0)[1:] == pytest.approx([1000 * float(x) for x in first])
    assert out.row(1)[1:] == pytest.approx([1000 * float(x) for x in second])
    with pytest.raises(ValueError):
        standardise_frame(
            frame, ["district_code"], "age_band", "persons_ckd", "population", {"0-39": 1.0}
        )


# --------------------------------------------------------------------------- WHO standard


def test_who_world_standard_as_published():
    # Ahmad et al., WHO GPE Discussion Paper 31, 2001: 21 five-year groups 0-4 .. 100+, in per
    # cent, summing to 100.035 because of rounding.
    assert list(WHO_WORLD_STANDARD_2000_2025) == list(range(0, 105, 5))
    assert sum(WHO_WORLD_STANDARD_2000_2025.values()) == pytest.approx(100.035, abs=1e-9)
    assert WHO_WORLD_STANDARD_2000_2025[0] == 8.86 and WHO_WORLD_STANDARD_2000_2025[100] == 0.005


def test_collapsed_onto_the_project_bands():
    # Ahmad et al. 2001 weights; the open band 85+ takes 85-89, 90-94, 95-99 and 100+; all are
    # divided by the sum of the weights used (100.035).
    weights = collapse_weights(BANDS)
    assert len(weights) == 18
    assert weights.sum() == pytest.approx(1.0, abs=1e-12)
    assert weights[0] == pytest.approx(8.86 / 100.035, rel=1e-12)
    assert weights[16] == pytest.approx(0.91 / 100.035, rel=1e-12)  # 80-84
    assert weights[17] == pytest.approx((0.44 + 0.15 + 0.04 + 0.005) / 100.035, rel=1e-12)


def test_collapsed_onto_wider_bands():
    # 0-44, 45-64, 65+ from the same published weights (hand sums).
    weights = collapse_weights([0, 45, 65])
    young = 8.86 + 8.69 + 8.60 + 8.47 + 8.22 + 7.93 + 7.61 + 7.15 + 6.59
    middle = 6.04 + 5.37 + 4.55 + 3.72
    old = 2.96 + 2.21 + 1.52 + 0.91 + 0.44 + 0.15 + 0.04 + 0.005
    assert weights == pytest.approx(np.array([young, middle, old]) / 100.035, rel=1e-12)
    for bad in ([5, 10], [0, 7], [0, 10, 10], []):
        with pytest.raises(ValueError):
            collapse_weights(bad)
