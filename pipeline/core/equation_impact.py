"""Equation-change impact: how the published picture would move if the region used another eGFR
equation, before anyone switches.

For each adult (from ``measures.adult_min_age_years``) with a creatinine eGFR in the window, the
latest such day is taken (the day's results averaged across labs, as the daily values are). Two
comparisons are made on that day:

* ``<comparison equation>`` (``summaries.equation_comparison``, default CKD-EPI 2009 creatinine,
  Levey et al., Ann Intern Med 2009): the same creatinine under the comparison equation, against
  the creatinine eGFR under the equation in force (``measures.adult_equation``, default CKD-EPI
  2021, Inker et al., NEJM 2021);
* ``ckd_epi_2021_creatinine_cystatin`` (Inker et al., NEJM 2021), only for persons whose latest
  day had a cystatin C as well: the combined eGFR the pipeline computed that day, against the
  creatinine eGFR alone.

Both sides are categorised by KDIGO 2012 GFR category (G1..G5, unrounded, lower bound inclusive).
The internal table ``equation_reclassification`` is the reclassification matrix (in force x
comparison) per district; the published ``district_equation_change`` gives, per district and
comparison, the counts by G category under each side, persons below 60 under each, and the
persons moved to a higher or lower category.

Confirmed CKD under the creatinine comparison: every known eGFR the adult equation in force made
is recomputed (:func:`daily_egfr_under`) and sql/analysis/kidney_events.sql runs again on those
daily values (the ACRs as they are); counted among the adults compared (:func:`ckd_counts`).
Not covered: children (the CKD-EPI equations are for adults); confirmed CKD for the
creatinine-cystatin C comparison. Equation change is an artefact of estimation, not of disease: this table says how much
of a change in prevalence a switch would cause by itself.
"""

from __future__ import annotations

import polars as pl

from pipeline.core import equations as eq
from pipeline.core.measure_rules import EQUATIONS, age_at_collection

G_CATEGORIES = ("G1", "G2", "G3a", "G3b", "G4", "G5")
COMBINED = "ckd_epi_2021_creatinine_cystatin"
IN_FORCE = "in_force"


def daily_comparison(inputs: pl.DataFrame, comparison: str) -> pl.DataFrame:
    """One row per person and comparison: district, in-force eGFR and comparison eGFR on the
    person's latest creatinine day (means of the day's results).
    """
    if comparison not in EQUATIONS or comparison == "ckid_u25_creatinine":
        raise ValueError(
            f"summaries.equation_comparison: {comparison!r} is not an adult creatinine equation "
            f"(one of {sorted(k for k in EQUATIONS if k != 'ckid_u25_creatinine')})"
        )
    female = pl.when(pl.col("sex") == "F").then(True).when(pl.col("sex") == "M").then(False)
    # the age the equation in force was given (pipeline/stages/measure.py), so that only the equation differs
    scr, age = pl.col("creatinine_mg_dl"), age_at_collection(inputs.columns)
    rows = inputs.with_columns(
        EQUATIONS[comparison](scr, age, female, None).alias("egfr_comparison")
    )
    keys = ["district_code", "person_key"]
    creatinine = (
        rows.group_by(keys)
        .agg(
            pl.col("egfr_creatinine").mean().alias("egfr_in_force"),
            pl.col("egfr_comparison").mean().alias("egfr_other"),
        )
        .with_columns(pl.lit(comparison).alias("comparison"))
    )
    combined = (
        rows.filter(pl.col("egfr_equation") == COMBINED)
        .group_by(keys)
        .agg(
            pl.col("egfr_creatinine").mean().alias("egfr_in_force"),
            pl.col("egfr").mean().alias("egfr_other"),
        )
        .with_columns(pl.lit(COMBINED).alias("comparison"))
    )
    both = pl.concat([creatinine, combined]).filter(pl.col("egfr_other").is_not_null())
    return both.with_columns(
        eq.gfr_category(pl.col("egfr_in_force")).alias("g_in_force"),
        eq.gfr_category(pl.col("egfr_other")).alias("g_comparison"),
    )


def reclassification(
    persons: pl.DataFrame, period: str, in_force: str, comparisons: list[str]
) -> pl.DataFrame:
    """Reclassification matrix per district (and 'ALL'), every cell present (zeros included)."""
    region = persons.with_columns(pl.lit("ALL").alias("district_code"))
    counts = (
        pl.concat([persons, region])
        .group_by("district_code", "comparison", "g_in_force", "g_comparison")
        .len("persons")
    )
    districts = sorted(set(persons["district_code"].to_list()) - {"ALL"}) + ["ALL"]
    grid = pl.DataFrame(
        [
            {"district_code": d, "comparison": c, "g_in_force": a, "g_comparison": b}
            for d in districts
            for c in comparisons
            for a in G_CATEGORIES
            for b in G_CATEGORIES
        ]
    )
    out = grid.join(
        counts, on=["district_code", "comparison", "g_in_force", "g_comparison"], how="left"
    )
    return out.select(
        pl.lit(period).alias("period"),
        "district_code",
        pl.lit(in_force).alias("in_force_equation"),
        "comparison",
        "g_in_force",
        "g_comparison",
        pl.col("persons").fill_null(0).cast(pl.Int64),
    )


def summary(matrix: pl.DataFrame) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Two tables from the matrix, per district and comparison.

    * totals (``district_equation_change``): persons compared, and how many the comparison moves
      to a lower or a higher GFR category;
    * categories (``district_equation_change_categories``), per GFR category G1..G5: persons in
      it under the equation in force, persons in it under the comparison, and of the former those
      moved lower or higher. Each column adds up over the categories to a total of the first
      table, against which disclosure control protects it (as district_ckd_categories against
      district_ckd_prevalence).
    """
    order = {g: i for i, g in enumerate(G_CATEGORIES)}
    m = matrix.with_columns(
        pl.col("g_in_force").replace_strict(order).alias("_a"),
        pl.col("g_comparison").replace_strict(order).alias("_b"),
    )
    keys = ["period", "district_code", "in_force_equation", "comparison"]
    moved = [
        pl.col("persons")
        .filter(pl.col("_b") > pl.col("_a"))
        .sum()
        .alias("moved_to_lower_gfr_category"),
        pl.col("persons")
        .filter(pl.col("_b") < pl.col("_a"))
        .sum()
        .alias("moved_to_higher_gfr_category"),
    ]
    in_force = m.group_by(*keys, pl.col("g_in_force").alias("g_category")).agg(
        pl.col("persons").sum().alias("persons_in_force"), *moved
    )
    other = m.group_by(*keys, pl.col("g_comparison").alias("g_category")).agg(
        pl.col("persons").sum().alias("persons_comparison")
    )
    cells = in_force.join(other, on=[*keys, "g_category"], how="full", coalesce=True)
    totals = m.group_by(keys).agg(pl.col("persons").sum().alias("persons_compared"), *moved)
    rank = {g: i for i, g in enumerate(G_CATEGORIES)}
    first = pl.col("district_code") == "ALL"
    totals = totals.sort(first, "district_code", "comparison")
    cells = cells.select(
        *keys,
        "g_category",
        "persons_in_force",
        "persons_comparison",
        "moved_to_lower_gfr_category",
        "moved_to_higher_gfr_category",
    )
    cells = cells.sort(
        first, "district_code", "comparison", pl.col("g_category").replace_strict(rank)
    )
    return totals, cells


def daily_egfr_under(
    history: pl.DataFrame, in_force: str, comparison: str, adult_min_age: int
) -> pl.DataFrame:
    """Daily eGFRs (person, day, mean) with every creatinine eGFR made by the adult equation in
    force recomputed under ``comparison``; other eGFRs (children's equations, cystatin C, the
    creatinine-cystatin C equation on days with both markers) are kept as they are: a switch of
    the adult creatinine equation does not change them. Shaped as the egfr rows of
    daily_values_averaged (one row per person, day and equation family).
    """
    female = pl.when(pl.col("sex") == "F").then(True).when(pl.col("sex") == "M").then(False)
    scr, age = pl.col("creatinine_mg_dl"), age_at_collection(history.columns)
    switched = (pl.col("analyte") == "creatinine") & (pl.col("egfr_equation") == in_force)
    rows = history.with_columns(
        pl.when(switched)
        .then(EQUATIONS[comparison](scr, age, female, None))
        .otherwise(pl.col("egfr"))
        .alias("egfr_other")
    )
    family = (
        pl.when(pl.col("age_years") >= adult_min_age)
        .then(pl.lit("adult"))
        .otherwise(pl.lit("child"))
    )
    return (
        rows.filter(pl.col("egfr_other").is_not_null())
        .with_columns(family.alias("equation_family"))
        .group_by("person_key", "collected_date", "equation_family")
        .agg(pl.col("egfr_other").mean().alias("value"), pl.len().cast(pl.Int64).alias("n_results"))
        .select(
            "person_key",
            pl.lit("egfr").alias("measure"),
            pl.col("collected_date").alias("day"),
            "value",
            "n_results",
            "equation_family",
            pl.lit(None, dtype=pl.Boolean).alias("is_at_or_above_a2"),
        )
    )


def ckd_counts(
    persons: pl.DataFrame, ckd_in_force: set[str], ckd_other: set[str], comparison: str
) -> pl.DataFrame:
    """Per district and 'ALL': of the adults compared under ``comparison``, persons with
    confirmed CKD under the equation in force and under the comparison.
    """
    mine = persons.filter(pl.col("comparison") == comparison).select(
        "district_code",
        pl.col("person_key").is_in(list(ckd_in_force)).alias("ckd_in_force"),
        pl.col("person_key").is_in(list(ckd_other)).alias("ckd_other"),
    )
    both = pl.concat([mine, mine.with_columns(pl.lit("ALL").alias("district_code"))])
    return (
        both.group_by("district_code")
        .agg(
            pl.col("ckd_in_force").sum().cast(pl.Int64).alias("persons_ckd_in_force"),
            pl.col("ckd_other").sum().cast(pl.Int64).alias("persons_ckd_comparison"),
        )
        .with_columns(pl.lit(comparison).alias("comparison"))
    )
