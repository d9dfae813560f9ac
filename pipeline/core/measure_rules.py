"""Measure rules: eGFR and albuminuria categories of each result, as polars expressions over the
coefficients of :mod:`pipeline.core.equations` (no warehouse).
"""

from __future__ import annotations

from dataclasses import fields

import polars as pl

from pipeline.core import equations as eq
from pipeline.core.settings import MeasureSettings, Settings

EQUATIONS = {
    "ckd_epi_2021_creatinine": lambda scr, age, female, height: eq.ckd_epi_2021_creatinine(
        scr, age, female
    ),
    "ckd_epi_2009_creatinine": lambda scr, age, female, height: eq.ckd_epi_2009_creatinine(
        scr, age, female
    ),
    "ekfc_creatinine": lambda scr, age, female, height: eq.ekfc_creatinine(scr, age, female),
    "ckid_u25_creatinine": lambda scr, age, female, height: eq.ckid_u25_creatinine(
        scr, height, age, female
    ),
}


MEASURE_COLUMNS = [
    "source_id", "file_id", "line_no", "person_key", "specimen_id", "collected_date",
    "reported_date", "analyte", "sex", "age_years", "district_code",
    "egfr", "egfr_equation", "g_category", "egfr_reason", "is_hyperfiltration",
    "egfr_creatinine", "lab_reported_egfr", "lab_reported_egfr_comparator",
    "acr_mg_g", "acr_comparator", "aer_mg_24h", "acr_basis", "is_acr_estimated", "a_category",
    "acr_reason", "is_at_or_above_a2",
]  # fmt: skip


#: Analytes read from lab_results by this stage.
MEASURED_ANALYTES = (
    "creatinine", "cystatin_c", "acr", "pcr", "urine_albumin", "urine_creatinine",
    "urine_albumin_24h", "urine_protein_dipstick", "egfr_reported",
)  # fmt: skip


#: Day of the year a birth is assumed on when only the birth year is known: 1 July, about the
#: middle of the year, so the estimated age is off by at most about half a year either way (a
#: person born on 1 January is up to 0.5 years older, one born on 31 December up to 0.5 years
#: younger). Common practice for birth-year-only data.
MID_YEAR = (7, 1)
#: Days in a mean calendar year (Julian year), to turn days of age into years.
DAYS_PER_YEAR = 365.25


def age_at_collection(columns: list[str]) -> pl.Expr:
    """Age in years (fractional) at collection, estimated from the birth year at mid-year
    (:data:`MID_YEAR`); ``age_years`` where the birth year is not among the columns. Never
    below 0 (a result collected in the birth year before 1 July).
    """
    if "birth_year" not in columns:
        return pl.col("age_years").cast(pl.Float64)
    born = pl.date(pl.col("birth_year"), MID_YEAR[0], MID_YEAR[1])
    days = (pl.col("collected_date") - born).dt.total_days()
    return (days / DAYS_PER_YEAR).clip(lower_bound=0.0).cast(pl.Float64)


def equation_for(m: MeasureSettings) -> pl.Expr:
    """Which equation applies to a creatinine row, or null (with a reason set elsewhere)."""
    age = pl.col("age_exact")
    child = (age >= m.min_age_years) & (age < m.adult_min_age_years)
    with_height = pl.col("height_cm").is_not_null() & pl.lit(m.use_height_for_children)
    return (
        pl.when(
            pl.col("comparator").is_not_null() | (pl.col("sex") == "U") | (age < m.min_age_years)
        )
        .then(None)
        .when(age >= m.adult_min_age_years)
        .then(pl.lit(m.adult_equation))
        .when(child & with_height)
        .then(pl.lit(m.child_equation_with_height))
        .when(child)
        .then(pl.lit(m.child_equation))
        .cast(pl.String)
    )


def egfr_reason(m: MeasureSettings) -> pl.Expr:
    age = pl.col("age_exact")
    return (
        pl.when(pl.col("comparator").is_not_null())
        .then(pl.lit("censored_creatinine"))
        .when(age < m.min_age_years)
        .then(pl.lit("age_under_minimum"))
        .when(pl.col("sex") == "U")
        .then(pl.lit("sex_unknown"))
        .when(pl.col("egfr").is_null())
        .then(pl.lit("outside_equation_range"))
    )


def compute_egfr(creatinine: pl.DataFrame, m: MeasureSettings) -> pl.DataFrame:
    """EGFR per creatinine row: equation chosen by age, G category, hyperfiltration flag."""
    female = pl.when(pl.col("sex") == "F").then(True).when(pl.col("sex") == "M").then(False)
    scr, age, height = pl.col("value"), pl.col("age_exact"), pl.col("height_cm")
    frame = creatinine.with_columns(equation_for(m).alias("egfr_equation"))
    egfr = pl.lit(None, dtype=pl.Float64)
    for name in dict.fromkeys([m.adult_equation, m.child_equation, m.child_equation_with_height]):
        egfr = (
            pl.when(pl.col("egfr_equation") == name)
            .then(EQUATIONS[name](scr, age, female, height))
            .otherwise(egfr)
        )
    frame = frame.with_columns(egfr.alias("egfr"))
    return frame.with_columns(
        pl.when(pl.col("egfr").is_null())
        .then(None)
        .otherwise(pl.col("egfr_equation"))
        .alias("egfr_equation"),
        egfr_reason(m).alias("egfr_reason"),
        pl.col("egfr").alias("egfr_creatinine"),
    )


def _female() -> pl.Expr:
    return pl.when(pl.col("sex") == "F").then(True).when(pl.col("sex") == "M").then(False)


def add_cystatin(
    creatinine: pl.DataFrame, cystatin: pl.DataFrame, m: MeasureSettings
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Cystatin C eGFR, and the combined equation on creatinine rows with a same-day cystatin C.

    CKD-EPI 2012 cystatin C (Inker et al., NEJM 2012) for each uncensored cystatin C from 18; on a
    day with both markers the creatinine row carries CKD-EPI 2021 creatinine-cystatin C (Inker
    et al., NEJM 2021) and the cystatin row no eGFR of its own (reason ``combined_with_creatinine``),
    so the day is counted once.
    """
    age = pl.col("age_exact")
    adult = age >= m.adult_min_age_years
    cystatin = cystatin.with_columns(
        pl.when(pl.col("comparator").is_null() & adult)
        .then(eq.ckd_epi_2012_cystatin(pl.col("value"), age, _female()))
        .alias("egfr_cys_only")
    )
    if not m.combine_same_day_cystatin:
        same_day = cystatin.head(0).select(
            "person_key", "collected_date", pl.col("value").alias("scys")
        )
    else:
        same_day = (
            cystatin.filter(pl.col("comparator").is_null())
            .group_by("person_key", "collected_date")
            .agg(pl.col("value").mean().alias("scys"))
        )
    creatinine = creatinine.join(
        same_day, on=["person_key", "collected_date"], how="left", maintain_order="left"
    )
    combined = eq.ckd_epi_2021_creatinine_cystatin(pl.col("value"), pl.col("scys"), age, _female())
    use_combined = pl.col("scys").is_not_null() & pl.col("egfr").is_not_null() & adult
    creatinine = creatinine.with_columns(
        pl.when(use_combined).then(combined).otherwise(pl.col("egfr")).alias("egfr"),
        pl.when(use_combined)
        .then(pl.lit("ckd_epi_2021_creatinine_cystatin"))
        .otherwise(pl.col("egfr_equation"))
        .alias("egfr_equation"),
    ).drop("scys")
    paired_days = (
        creatinine.filter(pl.col("egfr_equation") == "ckd_epi_2021_creatinine_cystatin")
        .select("person_key", "collected_date", pl.lit(True).alias("has_combined"))
        .unique()
    )
    cystatin = cystatin.join(
        paired_days, on=["person_key", "collected_date"], how="left", maintain_order="left"
    )
    cystatin = (
        cystatin.with_columns(
            pl.when(pl.col("has_combined").is_null()).then(pl.col("egfr_cys_only")).alias("egfr"),
        )
        .with_columns(
            pl.when(pl.col("egfr").is_not_null())
            .then(pl.lit("ckd_epi_2012_cystatin"))
            .alias("egfr_equation"),
            pl.when(pl.col("has_combined").is_not_null())
            .then(pl.lit("combined_with_creatinine"))
            .when(pl.col("comparator").is_not_null())
            .then(pl.lit("censored_cystatin"))
            .when(pl.col("egfr").is_null())
            .then(pl.lit("outside_equation_range"))
            .alias("egfr_reason"),
        )
        .drop("egfr_cys_only", "has_combined")
    )
    return creatinine, cystatin


def _categorise_egfr(frame: pl.DataFrame, m: MeasureSettings) -> pl.DataFrame:
    return frame.with_columns(
        eq.gfr_category(pl.col("egfr")).alias("g_category"),
        (pl.col("egfr") > m.hyperfiltration_ml_min_1_73m2).alias("is_hyperfiltration"),
    )


def _category_from_bounds(m: MeasureSettings) -> pl.Expr:
    """A category from ``cat_value`` against the row's own ``a2_from`` / ``a3_above`` (the KDIGO
    thresholds of the unit the value is compared in), counting a censored value only as far as
    it is certain.

    Uncensored: A1 below a2_from, A2 up to a3_above (inclusive unless ``acr_300_is_a2`` is
    false), A3 above. Censored: "<X" with X <= a2_from and "<=X" with X < a2_from are A1; ">X"
    with X >= a3_above is A3, and ">=X" when every value it admits is above A2; anything else
    spans two categories and stays null.
    """
    v, a2, a3, cmp = (
        pl.col("cat_value"),
        pl.col("a2_from"),
        pl.col("a3_above"),
        pl.col("acr_comparator"),
    )
    inclusive = m.acr_300_is_a2
    in_a2 = (v <= a3) if inclusive else (v < a3)
    uncensored = (
        pl.when(v < a2).then(pl.lit("A1")).when(in_a2).then(pl.lit("A2")).otherwise(pl.lit("A3"))
    )
    ge_is_a3 = (v > a3) if inclusive else (v >= a3)
    censored = (
        pl.when((cmp == "<") & (v <= a2)).then(pl.lit("A1"))
        .when((cmp == "<=") & (v < a2)).then(pl.lit("A1"))
        .when((cmp == ">") & (v >= a3)).then(pl.lit("A3"))
        .when((cmp == ">=") & ge_is_a3).then(pl.lit("A3"))
    )  # fmt: skip
    valid = v.is_finite() & (v >= 0)
    return (
        pl.when(valid & cmp.is_null()).then(uncensored).when(valid).then(censored).cast(pl.String)
    )


def _at_or_above_a2() -> pl.Expr:
    """Whether the value is certainly at or above the A2 threshold (the CKD-by-albuminuria rule),
    in the unit it is compared in; null when a censored bound leaves it open (KDIGO 2012: A2 from
    30 mg/g, 3 mg/mmol, 30 mg/24 h). "<X" with X <= a2_from is below; ">X" or ">=X" with
    X >= a2_from is above; "<X" above it, or ">X" below it, is unknown.
    """
    v, a2, cmp = pl.col("cat_value"), pl.col("a2_from"), pl.col("acr_comparator")
    return (
        pl.when(~(v.is_finite() & (v >= 0))).then(None)
        .when(cmp.is_null()).then(v >= a2)
        .when((cmp == "<") & (v <= a2)).then(False)
        .when((cmp == "<=") & (v < a2)).then(False)
        .when(cmp.is_in([">", ">="]) & (v >= a2)).then(True)
        .cast(pl.Boolean)
    )  # fmt: skip


def _thresholds(basis: str, unit_col: str) -> tuple[pl.Expr, pl.Expr, pl.Expr]:
    """(value compared, A2 threshold, A3 threshold) of each albuminuria row, in the unit KDIGO
    gives thresholds for: a measured ACR reported in mg/mmol against 3 / 30 mg/mmol on the
    reported number, any other ACR against 30 / 300 mg/g, a timed excretion against 30 / 300
    mg/24 h (KDIGO 2012, Kidney Int Suppl 2013;3:1, albuminuria category table).
    """
    mmol = (pl.col(basis) == "measured_acr") & (pl.col(unit_col) == eq.ACR_MG_MMOL.unit)
    timed = pl.col(basis) == "timed_albumin_excretion"
    value = (
        pl.when(mmol).then(pl.col("reported_value"))
        .when(timed).then(pl.col("aer_mg_24h"))
        .otherwise(pl.col("acr_mg_g"))
    )  # fmt: skip
    a2 = (
        pl.when(mmol)
        .then(eq.ACR_MG_MMOL.a2_from)
        .when(timed)
        .then(eq.AER_MG_24H.a2_from)
        .otherwise(eq.ACR_MG_G.a2_from)
    )
    a3 = (
        pl.when(mmol)
        .then(eq.ACR_MG_MMOL.a3_above)
        .when(timed)
        .then(eq.AER_MG_24H.a3_above)
        .otherwise(eq.ACR_MG_G.a3_above)
    )
    return value.cast(pl.Float64), a2.cast(pl.Float64), a3.cast(pl.Float64)


def compute_albuminuria(
    results: pl.DataFrame, m: MeasureSettings, readings_map: dict[str, str]
) -> pl.DataFrame:
    """Albuminuria on one scale with its basis, and its KDIGO category in the unit reported.

    ACR in mg/g from a measured ACR, from urine albumin and creatinine on the same specimen, or
    estimated from a protein ratio (Sumida et al. 2020, flagged). A timed 24-hour albumin
    excretion keeps its own scale (``aer_mg_24h``) and thresholds; a dipstick reading gives an
    estimated category only (``readings_map``: spelling -> reading, from analytes.yaml).

    The category and ``is_at_or_above_a2`` are taken in the unit KDIGO gives thresholds for
    (:func:`_thresholds`), not after conversion: 3.2 mg/mmol is A2 although 3.2 x 8.84 = 28.3
    mg/g. A censored value counts only as far as it is certain (:func:`_category_from_bounds`,
    :func:`_at_or_above_a2`); its bound is not a measured value, so ``acr_mg_g`` and
    ``aer_mg_24h`` are null on it (the bound stays in lab_results).
    """
    keys = ["source_id", "file_id", "line_no", "person_key", "specimen_id", "collected_date",
            "reported_date", "analyte", "sex", "age_years", "district_code"]  # fmt: skip
    if "reported_unit" not in results.columns:
        results = results.with_columns(pl.lit(None, dtype=pl.String).alias("reported_unit"))
    if "reported_value" not in results.columns:
        results = results.with_columns(pl.col("value").alias("reported_value"))
    measured = results.filter(pl.col("analyte") == "acr").select(
        *keys,
        pl.col("value").alias("acr_mg_g"),
        pl.col("comparator").alias("acr_comparator"),
        pl.lit("measured_acr").alias("acr_basis"),
        pl.col("reported_value").cast(pl.Float64),
        pl.col("reported_unit"),
    )
    pcr = results.filter(pl.col("analyte") == "pcr").select(
        *keys,
        pl.when(pl.col("comparator").is_null())
        .then(eq.acr_from_pcr_sumida(pl.col("value")))
        .alias("acr_mg_g"),
        pl.lit(None, dtype=pl.String).alias("acr_comparator"),
        pl.lit("estimated_from_pcr").alias("acr_basis"),
    )
    albumin = results.filter(pl.col("analyte") == "urine_albumin")
    ucreat = results.filter(pl.col("analyte") == "urine_creatinine").select(
        "source_id", "person_key", "specimen_id", "collected_date",
        pl.col("value").alias("ucreat_mg_dl"), pl.col("comparator").alias("ucreat_cmp"),
    )  # fmt: skip
    # Same specimen; without a specimen id, same person and day (issue: albumin and creatinine
    # reported separately). 100 x albumin (mg/L) / creatinine (mg/dL) = mg/g.
    with_id = albumin.filter(pl.col("specimen_id").is_not_null()).join(
        ucreat.filter(pl.col("specimen_id").is_not_null()).drop("collected_date"),
        on=["source_id", "person_key", "specimen_id"],
        how="inner",
        maintain_order="left",
    )
    without_id = albumin.filter(pl.col("specimen_id").is_null()).join(
        ucreat.filter(pl.col("specimen_id").is_null())
        .drop("specimen_id")
        .unique(["source_id", "person_key", "collected_date"], keep="first", maintain_order=True),
        on=["source_id", "person_key", "collected_date"],
        how="inner",
        maintain_order="left",
    )
    paired = pl.concat(
        [with_id.select(sorted(with_id.columns)), without_id.select(sorted(with_id.columns))]
    )
    computed = paired.select(
        *keys,
        pl.when(
            pl.col("comparator").is_null()
            & pl.col("ucreat_cmp").is_null()
            & (pl.col("ucreat_mg_dl") > 0)
        )
        .then(100 * pl.col("value") / pl.col("ucreat_mg_dl"))
        .alias("acr_mg_g"),
        pl.lit(None, dtype=pl.String).alias("acr_comparator"),
        pl.lit("computed_from_albumin_and_creatinine").alias("acr_basis"),
    )
    timed = results.filter(pl.col("analyte") == "urine_albumin_24h").select(
        *keys,
        pl.col("value").alias("aer_mg_24h"),
        pl.col("comparator").alias("acr_comparator"),
        pl.lit("timed_albumin_excretion").alias("acr_basis"),
    )
    readings = {k.strip().lower(): v for k, v in readings_map.items()}
    dipstick = results.filter(pl.col("analyte") == "urine_protein_dipstick").select(
        *keys,
        pl.lit(None, dtype=pl.String).alias("acr_comparator"),
        pl.lit("estimated_from_dipstick").alias("acr_basis"),
        pl.col("value_text")
        .str.strip_chars()
        .str.to_lowercase()
        .replace_strict(readings, default=None, return_dtype=pl.String)
        .alias("reading"),
    )
    frame = pl.concat([measured, computed, pcr, timed, dipstick], how="diagonal_relaxed")
    for name, dtype in (("aer_mg_24h", pl.Float64), ("reading", pl.String), ("acr_mg_g", pl.Float64),
                        ("reported_value", pl.Float64), ("reported_unit", pl.String)):  # fmt: skip
        if name not in frame.columns:
            frame = frame.with_columns(pl.lit(None, dtype=dtype).alias(name))
    value, a2, a3 = _thresholds("acr_basis", "reported_unit")
    frame = frame.with_columns(value.alias("cat_value"), a2.alias("a2_from"), a3.alias("a3_above"))
    dipstick_category = eq.albuminuria_category_dipstick(pl.col("reading"))
    is_dipstick = pl.col("acr_basis") == "estimated_from_dipstick"
    spanning = pl.col("reading").is_in(list(eq.DIPSTICK_SPANNING))
    frame = (
        frame.with_columns(
            pl.col("acr_basis")
            .is_in(["estimated_from_pcr", "estimated_from_dipstick"])
            .alias("is_acr_estimated"),
            pl.when(is_dipstick)
            .then(dipstick_category)
            .otherwise(_category_from_bounds(m))
            .alias("a_category"),
        )
        .with_columns(
            pl.when(is_dipstick & pl.col("a_category").is_not_null())
            .then(pl.col("a_category").is_in(["A2", "A3"]))
            .when(is_dipstick)
            .then(None)
            .otherwise(_at_or_above_a2())
            .alias("is_at_or_above_a2"),
        )
        .with_columns(
            pl.when(pl.col("acr_comparator").is_null()).then(pl.col("acr_mg_g")).alias("acr_mg_g"),
            pl.when(pl.col("acr_comparator").is_null())
            .then(pl.col("aer_mg_24h"))
            .alias("aer_mg_24h"),
            pl.when(pl.col("a_category").is_not_null())
            .then(None)
            .when(is_dipstick & spanning)
            .then(pl.lit("dipstick_trace_spans_a1_a2"))
            .when(pl.col("acr_comparator").is_not_null() & pl.col("is_at_or_above_a2").is_null())
            .then(pl.lit("censored_spans_a2_threshold"))
            .when(pl.col("acr_comparator").is_not_null())
            .then(pl.lit("censored_ambiguous"))
            .otherwise(pl.lit("not_computable"))
            .alias("acr_reason"),
        )
        .drop("reading", "cat_value", "a2_from", "a3_above", "reported_value", "reported_unit")
    )
    return frame  # fmt: skip


def measure_frame(results: pl.DataFrame, settings: Settings) -> pl.DataFrame:
    """kidney_measures rows from lab_results rows (plain function, no database)."""
    m = settings.pipeline.measures
    results = results.with_columns(age_at_collection(results.columns).alias("age_exact"))
    if "birth_year" in results.columns:
        # the completed years of the same estimate (as results_validated.sql computes them),
        # so that a measure's age and the equation it got always agree, also on rows stored by
        # an earlier version that took collection year - birth year
        results = results.with_columns(
            pl.col("age_exact").floor().cast(pl.Int64).alias("age_years")
        )
    creatinine = compute_egfr(results.filter(pl.col("analyte") == "creatinine"), m)
    frames = []
    if m.use_cystatin:
        creatinine, cystatin = add_cystatin(
            creatinine, results.filter(pl.col("analyte") == "cystatin_c"), m
        )
        frames.append(_categorise_egfr(cystatin, m))
    reported = (
        results.filter((pl.col("analyte") == "egfr_reported") & pl.col("specimen_id").is_not_null())
        .sort("file_id", "line_no")
        .group_by("source_id", "person_key", "specimen_id", maintain_order=True)
        .agg(pl.col("value").first().alias("lab_reported_egfr"),
             pl.col("comparator").first().alias("lab_reported_egfr_comparator"))
    )  # fmt: skip
    # the person is part of the key: a specimen id that a faulty extract gives to two persons
    # does not lend one person's reported eGFR to the other (and measures stay per person)
    creatinine = creatinine.join(
        reported, on=["source_id", "person_key", "specimen_id"], how="left", maintain_order="left"
    )
    frames.insert(0, _categorise_egfr(creatinine, m))
    readings = settings.analytes.analytes.get("urine_protein_dipstick")
    frames.append(compute_albuminuria(results, m, readings.readings if readings else {}))
    out = pl.concat(
        [f.select([c for c in MEASURE_COLUMNS if c in f.columns]) for f in frames],
        how="diagonal_relaxed",
    )
    return out.select(MEASURE_COLUMNS).sort(
        "person_key", "collected_date", "analyte", "file_id", "line_no"
    )


# ---------------------------------------------------------------------------------------------
# The same coefficients as rows, for the SQL of the measure stage (sql/derived/kidney_measures.sql)
# ---------------------------------------------------------------------------------------------

#: Every coefficient set of :mod:`pipeline.core.equations` the measure SQL reads, by the name the
#: SQL (and ``measures.*_equation`` in config/pipeline.yaml) knows it by, with its form: which
#: formula of the SQL its numbers go into.
COEFFICIENT_SETS: dict[str, tuple[str, object]] = {
    "ckd_epi_2021_creatinine": ("ckd_epi_creatinine", eq.CKD_EPI_2021_CREATININE),
    "ckd_epi_2009_creatinine": ("ckd_epi_creatinine", eq.CKD_EPI_2009_CREATININE),
    "ckd_epi_2012_cystatin": ("ckd_epi_cystatin", eq.CKD_EPI_2012_CYSTATIN),
    "ckd_epi_2021_creatinine_cystatin": (
        "ckd_epi_creatinine_cystatin",
        eq.CKD_EPI_2021_CREATININE_CYSTATIN,
    ),
    "ekfc_creatinine": ("ekfc", eq.EKFC_CREATININE),
    "ckid_u25_creatinine": ("ckid_u25", eq.CKID_U25_CREATININE),
    "mdrd_4v_idms": ("mdrd_4v", eq.MDRD_4V_IDMS),
    "sumida_pcr_to_acr": ("pcr_to_acr", eq.SUMIDA_PCR_TO_ACR),
    "acr_mg_g": ("albuminuria_thresholds", eq.ACR_MG_G),
    "acr_mg_mmol": ("albuminuria_thresholds", eq.ACR_MG_MMOL),
    "aer_mg_24h": ("albuminuria_thresholds", eq.AER_MG_24H),
    "pcr_mg_g": ("albuminuria_thresholds", eq.PCR_MG_G),
}


def equation_coefficients() -> pl.DataFrame:
    """``reference.equation_coefficients``: one row per coefficient set of
    :mod:`pipeline.core.equations` (:data:`COEFFICIENT_SETS`), one column per coefficient (null
    where a set has no such coefficient), with its form, source and status. The numbers are read
    from the dataclasses, never written twice: the EKFC child polynomials become
    ``child_ln_q_male_c0`` ... ``_c4``, and the EKFC row carries the creatinine unit factor
    (``creatinine_umol_l_per_mg_dl``) its child Q is converted by.
    """
    rows = []
    for name, (form, coefficients) in COEFFICIENT_SETS.items():
        row: dict[str, object] = {"equation": name, "form": form}
        for field in fields(coefficients):  # type: ignore[arg-type]
            value = getattr(coefficients, field.name)
            if isinstance(value, tuple):
                row.update({f"{field.name}_c{i}": float(v) for i, v in enumerate(value)})
            elif isinstance(value, (int, float)) and not isinstance(value, bool):
                row[field.name] = float(value)
            elif field.name not in ("source", "status"):
                row[field.name] = value
        if form == "ekfc":
            row["creatinine_umol_l_per_mg_dl"] = eq.CREATININE_UMOL_L_PER_MG_DL
        row["source"], row["status"] = coefficients.source, coefficients.status  # type: ignore[attr-defined]
        rows.append(row)
    frame = pl.concat([pl.DataFrame([r]) for r in rows], how="diagonal_relaxed")
    first = ["equation", "form"]
    last = ["source", "status"]
    middle = [c for c in frame.columns if c not in first + last]
    return frame.select(*first, *middle, *last)


def dipstick_categories() -> pl.DataFrame:
    """``reference.dipstick_categories``: a dipstick reading's approximate albuminuria category
    (``DIPSTICK_A_CATEGORY``), or null with ``spans_a1_a2`` for a reading on the A1/A2 border
    (``DIPSTICK_SPANNING``), as in :func:`pipeline.core.equations.albuminuria_category_dipstick`.
    """
    rows = [{"reading": r, "a_category": a, "is_spanning": False}
            for r, a in eq.DIPSTICK_A_CATEGORY.items()]  # fmt: skip
    rows += [{"reading": r, "a_category": None, "is_spanning": True} for r in eq.DIPSTICK_SPANNING]
    return pl.DataFrame(
        rows, schema={"reading": pl.String, "a_category": pl.String, "is_spanning": pl.Boolean}
    )


def measure_params(m: MeasureSettings) -> dict[str, object]:
    """The settings the measure SQL binds (``$name``), from ``measures`` in config/pipeline.yaml."""
    return {
        "adult_equation": m.adult_equation,
        "child_equation": m.child_equation,
        "child_equation_with_height": m.child_equation_with_height,
        "use_height_for_children": m.use_height_for_children,
        "adult_min_age_years": float(m.adult_min_age_years),
        "min_age_years": float(m.min_age_years),
        "hyperfiltration_ml_min_1_73m2": float(m.hyperfiltration_ml_min_1_73m2),
        "use_cystatin": m.use_cystatin,
        "combine_same_day_cystatin": m.combine_same_day_cystatin,
        "acr_300_is_a2": m.acr_300_is_a2,
        "mid_year_month": MID_YEAR[0],
        "mid_year_day": MID_YEAR[1],
        "days_per_year": DAYS_PER_YEAR,
    }
