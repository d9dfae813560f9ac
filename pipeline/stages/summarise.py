"""Summarise: district tables per period (internal, unsuppressed), from sql/reports/."""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from pathlib import Path

import duckdb
import polars as pl

from pipeline.core.equation_impact import (
    COMBINED,
    ckd_counts,
    daily_comparison,
    daily_egfr_under,
    reclassification,
    summary,
)
from pipeline.core.periods import Period
from pipeline.core.pseudonymise import person_range
from pipeline.core.rule_params import event_params
from pipeline.core.settings import Settings
from pipeline.core.statistics import (
    age_labels,
    collapse_weights,
    standardise_frame,
    with_wilson_interval,
)
from pipeline.core.undetected import age_group_labels, estimate_undetected
from pipeline.warehouse.connection import (
    add_missing_columns,
    drop_relation,
    fetch_frame,
    with_frame,
)
from pipeline.warehouse.sql import (
    build_table,
    in_person_range,
    ranges_for,
    replace_period_frame,
    replace_period_rows,
    sql_over,
    used_params,
)
from pipeline.warehouse.sql_files import checked_name, sql_path

#: Internal summary tables, in the order they are built (each is sql/reports/<name>.sql).
SUMMARY_TABLES = (
    "district_ckd_prevalence",
    "district_screening_coverage",
    "diabetes_acr_strata",  # input of district_undetected_albuminuria (pipeline/core/undetected.py)
    "region_coverage_trend",
    "district_estimated_acr_sensitivity",
    "lab_egfr_agreement",
    "source_quality",
    "source_rejection_reasons",
    "district_decline_incidence",
    "district_ckd_categories",
    "source_creatinine_drift",
)
#: Tables of earlier versions, no longer built (dropped so that no undocumented table is left).
RETIRED_TABLES = ("district_ckd_stages",)  # the wide form of district_ckd_categories


#: Tables given interval columns after their SQL: rate -> (successes, trials).
WILSON_RATES = {
    "district_ckd_prevalence": {"ckd_share_of_tested": ("persons_ckd", "persons_tested")},
    "district_screening_coverage": {
        "share_with_both": ("with_egfr_and_acr", "persons_with_diabetes")
    },
    "region_coverage_trend": {"share_with_both": ("with_egfr_and_acr", "persons_with_diabetes")},
    "district_ckd_categories": {"ckd_per_100_tested": ("persons_ckd", "persons_tested")},
}
#: Rates given per 100 (or another base) rather than as a share: their limits are scaled alike.
RATE_BASE = {"ckd_per_100_tested": 100}


def add_intervals(frame: pl.DataFrame, name: str, confidence: float) -> pl.DataFrame:
    """Wilson intervals for the crude proportions (Wilson 1927; Newcombe 1998)."""
    for rate, (x, n) in WILSON_RATES.get(name, {}).items():
        frame = with_wilson_interval(frame, x, n, rate, confidence)
        base = RATE_BASE.get(rate)
        if base is None:
            frame = frame.with_columns(
                pl.col(f"{rate}_low").round(4), pl.col(f"{rate}_high").round(4)
            )
        else:
            frame = frame.with_columns(
                (pl.col(f"{rate}_low") * base).round(2), (pl.col(f"{rate}_high") * base).round(2)
            )
    return frame


def add_standardised_rates(frame: pl.DataFrame, settings: Settings) -> pl.DataFrame:
    """Age-standardised confirmed-CKD rate per 1,000 residents on the district and region total
    rows: direct method to the WHO World Standard Population 2000-2025 (Ahmad et al. 2001), on the
    broad age groups of ``summaries.standardisation_age_bands`` (the standard weights summed within
    each group), sexes pooled, Fay-Feuer gamma interval (Fay and Feuer 1997).

    Every cell row (a district, sex and age band) gets its broad group in
    ``standardisation_age_group``: a district's rate is a function of its counts per broad group
    (and the public population) alone, which is what the disclosure step checks before publishing
    it. The region's rate takes every cell, those of persons whose district is not known too (the
    region's population is the sum of its districts'), so that its counts add up to the published
    region total. A district without residents in a broad group that has cases gets no rate.
    """
    s = settings.pipeline.summaries
    broad = s.standardisation_age_bands
    groups = age_labels(broad)
    group_of = {label: groups[max(i for i, b in enumerate(broad) if b <= low)]
                for label, low in zip(age_labels(s.age_bands), s.age_bands, strict=False)}  # fmt: skip
    weights = dict(zip(groups, collapse_weights(broad), strict=False))
    column = "standardisation_age_group"
    is_cell = (
        (pl.col("district_code") != "ALL")
        & (pl.col("sex") != "ALL")
        & (pl.col("age_band") != "ALL")
    )
    group = pl.when(is_cell).then(
        pl.col("age_band").replace_strict(group_of, default=None, return_dtype=pl.String)
    )
    cells = (frame.with_columns(group.alias(column), pl.col("population").fill_null(0))
             .filter(pl.col(column).is_not_null()))  # fmt: skip
    per_group = cells.group_by("district_code", column).agg(
        pl.col("persons_ckd").sum(), pl.col("population").sum()
    )
    unrated = per_group.filter((pl.col("persons_ckd") > 0) & (pl.col("population") <= 0))[
        "district_code"
    ]
    by_district = standardise_frame(per_group.filter(~pl.col("district_code").is_in(unrated.implode())),
                                    ["district_code"], column, "persons_ckd", "population", weights,
                                    s.confidence, per=1000)  # fmt: skip
    region = standardise_frame(per_group.with_columns(pl.lit("ALL").alias("district_code")), ["district_code"],
                               column, "persons_ckd", "population", weights, s.confidence, per=1000)  # fmt: skip
    rates = pl.concat([by_district, region]).select(
        "district_code",
        pl.lit("ALL").alias("sex"),
        pl.lit("ALL").alias("age_band"),
        pl.col("rate").round(2).alias("ckd_per_1000_standardised"),
        pl.col("rate_low").round(2).alias("ckd_per_1000_standardised_low"),
        pl.col("rate_high").round(2).alias("ckd_per_1000_standardised_high"),
    )
    out = frame.join(
        rates, on=["district_code", "sex", "age_band"], how="left", maintain_order="left"
    )
    return out.with_columns(group.alias(column))  # last, so that older warehouses can add it


def build_undetected_albuminuria(
    con: duckdb.DuckDBPyConnection, settings: Settings, period: Period
) -> int:
    """district_undetected_albuminuria for the period, from its rows of diabetes_acr_strata."""
    s = settings.pipeline.summaries
    labels = age_group_labels(s.albuminuria_age_bands)
    strata = fetch_frame(con, "select * from diabetes_acr_strata where period = ?", [period.label])
    strata = strata.with_columns(
        pl.col("age_group_min").replace_strict(labels, return_dtype=pl.String).alias("age_group")
    )
    frame = estimate_undetected(strata, s.albuminuria_min_tested, s.confidence, period.label)
    add_missing_columns(con, "main", "district_undetected_albuminuria", frame)
    return replace_period_frame(con, "district_undetected_albuminuria", period.label, frame)


#: eGFRs recomputed under the comparison equation per pass: the persons are taken in person-key
#: ranges, so that no pass holds more than about this many rows in memory at any warehouse size.
#: At 10M results the whole comparison peaked at 2.36 GB in 14.6 s with 1.5M a pass and at
#: 2.18 GB in 13.9 s with 750k.
COMPARISON_CHUNK_ROWS = 750_000

#: The code and SQL behind equation_comparison_ckd besides the link stage's (its fingerprint).
_COMPARISON_FILES = (
    Path(__file__).resolve().parents[1] / "core" / "equation_impact.py",
    *(sql_path(n) for n in ("equation_comparison_history", "equation_acr_days",
                            "equation_confirmed_ckd")),
)  # fmt: skip


@dataclass(frozen=True)
class PersonScope:
    """What the link stage hands on to the summarise stage: the fingerprint of the rules and code
    that made the period's person tables and, when the rows of unchanged persons were carried over
    from an earlier period (``carried_from``), the temporary table of the persons computed anew
    (``changed``, one column ``person_key``). The default: every person computed.
    """

    fingerprint: str = ""
    carried_from: str | None = None
    changed: str | None = None


def comparison_fingerprint(scope: PersonScope, comparison: str) -> str:
    """What equation_comparison_ckd depends on: the link stage's fingerprint, the comparison and
    the code and SQL of the comparison.
    """
    digest = hashlib.sha256(f"{scope.fingerprint}\x1f{comparison}".encode())
    for path in _COMPARISON_FILES:
        digest.update(path.read_bytes())
    return digest.hexdigest()


def build_comparison_ckd(con: duckdb.DuckDBPyConnection, settings: Settings, period: Period,
                         scope: PersonScope) -> tuple[set[str], int]:  # fmt: skip
    """``equation_comparison_ckd`` for the period: the persons with confirmed CKD when every known
    adult creatinine eGFR made by the equation in force is recomputed under the comparison and the
    CKD rules (sql/analysis/kidney_events.sql) are run again, other eGFRs and ACRs as they are.
    Returns those persons and how many persons were computed anew.

    Incremental as the link stage: when it carried the unchanged persons' rows over from an earlier
    period whose comparison rows were built with the same fingerprint, only its changed persons
    are computed again and the others' rows are that period's (a person's events depend on their
    own values only). The persons computed are taken in person-key ranges, each pass holding at
    most about :data:`COMPARISON_CHUNK_ROWS` eGFRs.
    """
    m = settings.pipeline.measures
    comparison = settings.pipeline.summaries.equation_comparison
    fingerprint = comparison_fingerprint(scope, comparison)
    carry = bool(scope.changed and scope.carried_from) and con.execute(
        "select count(*) from equation_comparison_builds where period = ? and comparison = ? "
        "and fingerprint = ?",
        [scope.carried_from, comparison, fingerprint],
    ).fetchall()[0][0] == 1  # fmt: skip
    persons_sql = (
        f"select person_key from {checked_name(scope.changed or '')}"
        if carry
        else "select null::varchar as person_key where false"
    )
    inputs = {"comparison_persons": persons_sql}
    history_sql = sql_over("equation_comparison_history", inputs)
    acr_sql = sql_over("equation_acr_days", inputs)
    total, persons = con.execute(
        sql_over("equation_comparison_size", inputs), {"all_persons": not carry}
    ).fetchall()[0]
    chunks = max(1, -(-total // COMPARISON_CHUNK_ROWS))
    con.execute(
        "create or replace temp table equation_daily_values as "
        "select * from daily_values_averaged limit 0"
    )
    for chunk in range(chunks):
        lower, upper = person_range(chunk, chunks)
        params = {"lower": lower, "upper": upper, "all_persons": not carry}
        history = fetch_frame(con, history_sql, params)
        daily = pl.concat(
            [
                daily_egfr_under(history, m.adult_equation, comparison, m.adult_min_age_years),
                fetch_frame(con, acr_sql, params),
            ],
            how="vertical_relaxed",
        )
        del history
        with_frame(con, daily, "insert into equation_daily_values by name select * from _frame")
        del daily
    # the event rules, one person-key range at a time (at 30M results one pass ran DuckDB out
    # of memory at its 2 GB limit)
    rules = event_params(settings, period)
    sources = {"daily_values_averaged": "equation_daily_values",
               "measures_known": "measures_known", "results_known": "results_known"}  # fmt: skip
    if carry:
        # only the changed persons' rows: the rules read a person's own rows, and the others'
        # (the glycaemia of every person, at 10M results) were read for nothing
        for name in ("measures_known", "results_known"):
            con.execute(
                f"create or replace temp view {checked_name('comparison_' + name)} as "
                f"select * from {checked_name(name)} where person_key in "
                f"(select person_key from {checked_name(scope.changed or '')})"
            )
            sources[name] = f"comparison_{name}"
    ranges = ranges_for(con.execute("select count(*) from equation_daily_values").fetchall()[0][0])
    keys: list[str] = []
    for chunk in range(ranges):
        ranged, bound = in_person_range(sources, rules, chunk, ranges)
        confirmed = sql_over(
            "equation_confirmed_ckd", {"comparison_events": sql_over("kidney_events", ranged)}
        )
        keys += [k for (k,) in con.execute(confirmed, used_params(confirmed, bound)).fetchall()]
    fresh = pl.DataFrame({"person_key": keys}, schema={"person_key": pl.String})
    con.execute("drop table equation_daily_values")
    for name in ("measures_known", "results_known"):
        con.execute(f"drop view if exists {checked_name('comparison_' + name)}")
    con.execute("delete from equation_comparison_ckd where period = ?", [period.label])
    if carry:
        con.execute(
            "insert into equation_comparison_ckd select $period, comparison, person_key "
            "from equation_comparison_ckd where period = $carried and comparison = $comparison "
            f"and person_key not in (select person_key from {checked_name(scope.changed or '')})",
            {"period": period.label, "carried": scope.carried_from, "comparison": comparison},
        )
    with_frame(
        con,
        fresh.sort("person_key").with_columns(
            pl.lit(period.label).alias("period"), pl.lit(comparison).alias("comparison")
        ),
        "insert into equation_comparison_ckd by name select * from _frame",
    )
    con.execute("delete from equation_comparison_builds where period = ?", [period.label])
    con.execute(
        "insert into equation_comparison_builds values (?, ?, ?, ?)",
        [period.label, comparison, fingerprint, persons],
    )
    other = {k for (k,) in con.execute(
        "select person_key from equation_comparison_ckd where period = ? and comparison = ?",
        [period.label, comparison],
    ).fetchall()}  # fmt: skip
    return other, persons


def build_equation_change(
    con: duckdb.DuckDBPyConnection,
    settings: Settings,
    period: Period,
    scope: PersonScope | None = None,
) -> dict[str, int]:
    """equation_reclassification and district_equation_change for the period
    (pipeline/core/equation_impact.py), from a transient person-level input never kept, and
    equation_comparison_ckd (:func:`build_comparison_ckd`).
    """
    params = {
        "period": period.label,
        "period_end": period.end,
        "window_months": settings.pipeline.summaries.window_months,
        "adult_min_age": settings.pipeline.measures.adult_min_age_years,
    }
    build_table(
        con, "equation_comparison_inputs", "equation_comparison_inputs", params, temporary=True
    )
    inputs = fetch_frame(con, "select * from equation_comparison_inputs")
    con.execute("drop table equation_comparison_inputs")
    comparison = settings.pipeline.summaries.equation_comparison
    persons = daily_comparison(inputs, comparison)
    del inputs  # the frames of this function are freed as soon as they are used: at 30M
    # results they stood beside the comparison below and took the stage's peak to 3 GB
    matrix = reclassification(
        persons, period.label, settings.pipeline.measures.adult_equation, [comparison, COMBINED]
    )
    totals, categories = summary(matrix)
    persons = persons.select("district_code", "person_key", "comparison")  # what ckd_counts reads
    # confirmed CKD under the comparison: every known eGFR recomputed, the event rules run again
    other, _ = build_comparison_ckd(con, settings, period, scope or PersonScope())
    in_force = {
        k
        for (k,) in con.execute(
            "select person_key from person_status where period = ? and has_confirmed_ckd",
            [period.label],
        ).fetchall()
    }
    ckd = ckd_counts(persons, in_force, other, comparison)
    totals = totals.join(
        ckd, on=["district_code", "comparison"], how="left", maintain_order="left"
    ).with_columns(
        pl.when(pl.col("comparison") == comparison).then(pl.col(c).fill_null(0)).alias(c)
        for c in ("persons_ckd_in_force", "persons_ckd_comparison")
    )
    counts = {}
    for name, frame in (
        ("equation_reclassification", matrix),
        ("district_equation_change", totals),
        ("district_equation_change_categories", categories),
    ):
        add_missing_columns(con, "main", name, frame)
        counts[name] = replace_period_frame(con, name, period.label, frame)
    return counts


@dataclass(frozen=True)
class Summarised:
    """What :func:`summarise_stage` leaves: the internal tables (schema main) holding the period's
    rows, each with its row count for the period. The disclose stage reads these and no others.
    """

    period: str
    tables: dict[str, int]


def summarise_stage(
    con: duckdb.DuckDBPyConnection,
    settings: Settings,
    period: Period,
    scope: PersonScope | None = None,
) -> Summarised:
    """The internal district tables of the period; ``scope``: what the link stage handed on
    (its fingerprint and the persons it computed anew), so that the equation comparison is
    recomputed for those persons only (:func:`build_comparison_ckd`).
    """
    params = {
        "period": period.label,
        "period_end": period.end,
        "window_months": settings.pipeline.summaries.window_months,
        "drift_months": settings.pipeline.summaries.drift_months,
        "drift_threshold": settings.pipeline.summaries.drift_threshold,
        "drift_min_results": settings.pipeline.summaries.drift_min_results,
        "albuminuria_age_bands": settings.pipeline.summaries.albuminuria_age_bands,
    }
    confidence = settings.pipeline.summaries.confidence
    counts = {}
    for name in SUMMARY_TABLES:
        if name not in WILSON_RATES:
            counts[name] = replace_period_rows(con, name, period.label, params)
            continue
        build_table(con, name, f"staging.{checked_name(name)}_sql", params)
        frame = add_intervals(
            fetch_frame(con, f"select * from staging.{checked_name(name)}_sql"), name, confidence
        )
        con.execute(f"drop table staging.{checked_name(name)}_sql")
        if name == "district_ckd_prevalence":
            frame = add_standardised_rates(frame, settings)
        add_missing_columns(con, "main", name, frame)
        counts[name] = replace_period_frame(con, name, period.label, frame)
    counts["district_undetected_albuminuria"] = build_undetected_albuminuria(con, settings, period)
    counts.update(build_equation_change(con, settings, period, scope))
    for name in RETIRED_TABLES:
        drop_relation(con, name)
    return Summarised(period.label, counts)
