"""Expected undetected albuminuria: among persons with lab-evidenced diabetes and no urine ACR in
the window, the expected number with moderately or severely increased albuminuria (KDIGO A2 or
A3), per district and for the region.

Method: indirect standardisation (the reference rates applied to a group's own counts; Breslow
and Day, Statistical Methods in Cancer Research vol. II, IARC 1987, ch. 2, from memory). The
reference rates are the region's shares of A2 or A3 among the persons with diabetes who *were*
tested, per stratum of age group, sex and KDIGO GFR category of the latest eGFR ('unknown' where
there is none); each district's untested persons are multiplied by their stratum's share and
summed::

    E_d = sum_s u_ds * p_s,          p_s = x_s / n_s  (region, tested with a categorised ACR)

Interval: the shares are independent binomial proportions from disjoint strata, so
Var(E_d) = sum_s u_ds^2 * p_s (1 - p_s) / n_s (the variance of a weighted sum of independent
binomial proportions; common practice), and E_d +- z * sqrt(Var) is the normal (Wald) interval,
cut to [0, u_d]. It carries the uncertainty of the shares only: it is an interval for the
expected number, not for the number that a test of every untested person would find (that adds
sum_s u_ds p_s (1 - p_s)). A share of 0 or 1 adds no width (a limit of the Wald form), which is
one reason a share is used only when it rests on at least ``min_tested`` persons.

Sparse strata: a stratum with fewer than ``min_tested`` tested persons is pooled with the other
sparse strata of its age group and sex (GFR category 'pooled'), then of its age group (sex
'pooled'), then of the region (age group 'pooled'); each pooled stratum takes only the strata
that fell back into it, so the strata stay disjoint and the variance formula stays exact under
its model. The last, region-wide remainder is used whatever its size; if no one in it was tested
while some in it were not, the estimate is null (never a share of zero made up).
``without_acr_pooled_stratum`` counts the untested persons whose share came from a pooled stratum.

Assumption (said in the table's COMMENT, every exported row and the report): within a stratum,
persons not tested have albuminuria as often as those tested. Testing is usually aimed at
persons at higher risk (longer diabetes, hypertension, known kidney disease), so the tested are
likely sicker than the untested and the estimate is more likely too high than too low; persons
tested elsewhere (outside the region's labs) count as untested here, which also pushes it up.
"""

from __future__ import annotations

import itertools

import polars as pl
from scipy.stats import norm

POOLED = "pooled"
#: The assumption travels with every row of the table and of its exports.
ASSUMPTION = (
    "Indirect standardisation: untested persons with diabetes are assumed to have A2 or A3 as often as "
    "tested persons of the same age group, sex and GFR category in the region; testing favours "
    "higher-risk persons, so the estimate more likely errs high than low."
)
#: Stratum keys, finest first; each fallback level pools the next key.
STRATUM_KEYS = ("age_group", "sex", "g_category")


def age_group_labels(lower_bounds: list[int]) -> dict[int, str]:
    """Lower bound -> label ([0, 45, 65] -> 0-44, 45-64, 65+); -1 (age unknown) -> unknown."""
    labels = {lo: f"{lo}-{hi - 1}" for lo, hi in itertools.pairwise(lower_bounds)}
    labels[lower_bounds[-1]] = f"{lower_bounds[-1]}+"
    labels[-1] = "unknown"
    return labels


def assign_share_strata(strata: pl.DataFrame, min_tested: int) -> pl.DataFrame:
    """Give every fine stratum (age_group, sex, g_category) the stratum whose share it uses.

    ``strata``: region-wide rows with ``with_acr_categorised`` (n) and ``with_acr_a2_a3`` (x).
    Returns the fine keys with ``share_stratum`` (a label such as ``65-74/F/G3a`` or
    ``65-74/F/pooled``), ``share_tested`` (n of that stratum) and ``share_a2_a3`` (x of it).
    """
    fine = strata.group_by(STRATUM_KEYS).agg(
        pl.col("with_acr_categorised").sum().alias("n"), pl.col("with_acr_a2_a3").sum().alias("x")
    )
    fine = fine.sort(STRATUM_KEYS)
    current = fine.with_columns(*(pl.col(k).alias(f"use_{k}") for k in STRATUM_KEYS))
    done = []
    for level in range(len(STRATUM_KEYS) + 1):
        use = [f"use_{k}" for k in STRATUM_KEYS]
        sums = current.group_by(use).agg(
            pl.col("n").sum().alias("group_n"), pl.col("x").sum().alias("group_x")
        )
        current = current.join(sums, on=use, how="left")
        last = level == len(STRATUM_KEYS)
        settled = current.filter((pl.col("group_n") >= min_tested) | pl.lit(last))
        done.append(settled)
        current = current.filter(~((pl.col("group_n") >= min_tested) | pl.lit(last))).drop(
            "group_n", "group_x"
        )
        if not last:  # pool the next key, from the finest
            key = STRATUM_KEYS[len(STRATUM_KEYS) - 1 - level]
            current = current.with_columns(pl.lit(POOLED).alias(f"use_{key}"))
    out = pl.concat(done)
    return out.select(
        *STRATUM_KEYS,
        pl.concat_str([pl.col(f"use_{k}") for k in STRATUM_KEYS], separator="/").alias(
            "share_stratum"
        ),
        pl.col("group_n").alias("share_tested"),
        pl.col("group_x").alias("share_a2_a3"),
    ).sort(STRATUM_KEYS)


def estimate_undetected(
    strata: pl.DataFrame, min_tested: int, confidence: float, period: str | None = None
) -> pl.DataFrame:
    """Per district and 'ALL' (every district, 'unknown' too): the expected number of persons with
    A2 or A3 among the persons with diabetes without an ACR in the window, with its interval.

    ``strata``: one period's rows of ``diabetes_acr_strata`` with ``age_group`` labelled. With no
    rows, the 'ALL' row of ``period`` alone, with zero counts (as district_screening_coverage has).
    """
    if strata.height == 0 and period is not None:
        empty = {
            "period": period,
            "district_code": "ALL",
            "age_group": "unknown",
            "sex": "U",
            "g_category": "unknown",
            "persons_with_diabetes": 0,
            "with_acr": 0,
            "with_acr_categorised": 0,
            "with_acr_a2_a3": 0,
        }
        strata = pl.DataFrame([empty], schema_overrides={k: pl.Int64 for k in list(empty)[5:]})
        return estimate_undetected(strata, min_tested, confidence).filter(
            pl.col("district_code") == "ALL"
        )
    shares = assign_share_strata(strata, min_tested)
    z = float(norm.ppf(0.5 + confidence / 2))
    rows = strata.join(shares, on=list(STRATUM_KEYS), how="left").with_columns(
        (pl.col("persons_with_diabetes") - pl.col("with_acr")).alias("untested")
    )
    region = rows.with_columns(pl.lit("ALL").alias("district_code"))
    both = pl.concat([rows, region])
    per_stratum = both.group_by("period", "district_code", "share_stratum").agg(
        pl.col("untested").sum(),
        pl.col("share_tested").first(),
        pl.col("share_a2_a3").first(),
        pl.col("persons_with_diabetes").sum(),
        pl.col("with_acr").sum(),
        pl.col("with_acr_a2_a3").sum(),
        pl.col("share_stratum").str.contains(POOLED, literal=True).first().alias("is_pooled"),
    )
    p = pl.col("share_a2_a3") / pl.col("share_tested")
    known = pl.col("share_tested") > 0
    per_stratum = per_stratum.with_columns(
        pl.when(known).then(pl.col("untested") * p).alias("expected"),
        pl.when(known)
        .then(pl.col("untested") ** 2 * p * (1 - p) / pl.col("share_tested"))
        .alias("variance"),
        (known | (pl.col("untested") == 0)).alias("estimable"),
    )
    out = per_stratum.group_by("period", "district_code").agg(
        pl.col("persons_with_diabetes").sum(),
        pl.col("with_acr").sum(),
        pl.col("untested").sum().alias("persons_without_acr"),
        pl.col("with_acr_a2_a3").sum(),
        pl.col("expected").sum(),
        pl.col("variance").sum(),
        pl.col("estimable").all(),
        (pl.col("untested") * pl.col("is_pooled")).sum().alias("without_acr_pooled_stratum"),
    )
    half = z * pl.col("variance").sqrt()
    estimate = pl.when(pl.col("estimable"))
    out = out.with_columns(
        (pl.col("with_acr_a2_a3") / pl.col("with_acr")).round(4).alias("share_a2_a3_of_tested"),
        estimate.then(pl.col("expected").round(1)).alias("expected_a2_a3_without_acr"),
        estimate.then((pl.col("expected") - half).clip(lower_bound=0).round(1)).alias(
            "expected_a2_a3_without_acr_low"
        ),
        estimate.then(
            pl.min_horizontal(pl.col("expected") + half, pl.col("persons_without_acr")).round(1)
        ).alias("expected_a2_a3_without_acr_high"),
        pl.when(pl.col("estimable") & (pl.col("persons_without_acr") > 0))
        .then((pl.col("expected") / pl.col("persons_without_acr")).round(4))
        .alias("expected_share_without_acr"),
    )
    out = out.with_columns(
        pl.when(pl.col("with_acr") == 0)
        .then(None)
        .otherwise(pl.col("share_a2_a3_of_tested"))
        .alias("share_a2_a3_of_tested")
    )
    return out.select(
        "period",
        "district_code",
        "persons_with_diabetes",
        "with_acr",
        "persons_without_acr",
        "with_acr_a2_a3",
        "share_a2_a3_of_tested",
        "expected_a2_a3_without_acr",
        "expected_a2_a3_without_acr_low",
        "expected_a2_a3_without_acr_high",
        "expected_share_without_acr",
        "without_acr_pooled_stratum",
        pl.lit(ASSUMPTION).alias("estimate_assumption"),
    ).sort(pl.col("district_code") == "ALL", "district_code")
