"""Kidney-measure equations and KDIGO categories as vectorised polars expressions.

Every function takes and returns ``pl.Expr`` so that it can sit inside a ``select`` or
``with_columns`` over millions of rows; nothing here loops over rows.

Units throughout: serum creatinine ``scr`` in mg/dL (IDMS-traceable), cystatin C ``scys`` in
mg/L (standardised), ``age`` in years (numeric, fractions allowed), height in cm, ``female`` a
boolean expression. Results are in mL/min/1.73 m².

Null rules, shared by every equation:

* unknown sex (``female`` null) gives null;
* age outside the equation's valid range, or null, gives null (which equation applies to whom is
  the caller's choice, not this module's);
* a concentration or height that is null, not finite, or not positive gives null.

All coefficients live in the constants directly below, each with its publication. A value marked
``"from memory"`` was recalled rather than read in the paper and must be verified before it is
treated as binding.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import polars as pl

CONFIRMED = "confirmed"
FROM_MEMORY = "from memory"

# ---------------------------------------------------------------------------------------------
# Coefficients: the only place a number from a publication appears.
# ---------------------------------------------------------------------------------------------

CREATININE_UMOL_L_PER_MG_DL = 88.4
"""1 mg/dL creatinine = 88.4 µmol/L (molar mass 113.12 g/mol); confirmed."""


@dataclass(frozen=True)
class CkdEpiCreatinine:
    """Coefficients of a CKD-EPI creatinine equation.

    eGFR = multiplier × min(Scr/κ, 1)^α × max(Scr/κ, 1)^β × age_base^age × female_factor[F]
    """

    multiplier: float
    kappa_female: float
    kappa_male: float
    alpha_female: float
    alpha_male: float
    beta: float
    age_base: float
    female_factor: float
    min_age: float
    source: str
    status: str


CKD_EPI_2021_CREATININE = CkdEpiCreatinine(
    multiplier=142.0,
    kappa_female=0.7,
    kappa_male=0.9,
    alpha_female=-0.241,
    alpha_male=-0.302,
    beta=-1.200,
    age_base=0.9938,
    female_factor=1.012,
    min_age=18.0,
    source="Inker et al., N Engl J Med 2021;385:1737 (race-free)",
    status=CONFIRMED,
)

CKD_EPI_2009_CREATININE = CkdEpiCreatinine(
    multiplier=141.0,
    kappa_female=0.7,
    kappa_male=0.9,
    alpha_female=-0.329,
    alpha_male=-0.411,
    beta=-1.209,
    age_base=0.993,
    female_factor=1.018,
    min_age=18.0,
    source="Levey et al., Ann Intern Med 2009;150:604 (race term omitted)",
    status=CONFIRMED,
)


@dataclass(frozen=True)
class CkdEpiCystatin:
    """eGFR = multiplier × min(Scys/κ,1)^α × max(Scys/κ,1)^β × age_base^age × female_factor[F]."""

    multiplier: float
    kappa: float
    alpha: float
    beta: float
    age_base: float
    female_factor: float
    min_age: float
    source: str
    status: str


CKD_EPI_2012_CYSTATIN = CkdEpiCystatin(
    multiplier=133.0,
    kappa=0.8,
    alpha=-0.499,
    beta=-1.328,
    age_base=0.996,
    female_factor=0.932,
    min_age=18.0,
    source="Inker et al., N Engl J Med 2012;367:20",
    status=CONFIRMED,
)


@dataclass(frozen=True)
class CkdEpiCreatinineCystatin:
    """eGFR = multiplier × min(Scr/κ,1)^α × max(Scr/κ,1)^β_cr × min(Scys/κ_cys,1)^α_cys
    × max(Scys/κ_cys,1)^β_cys × age_base^age × female_factor[F].
    """

    multiplier: float
    kappa_female: float
    kappa_male: float
    alpha_female: float
    alpha_male: float
    beta_creatinine: float
    kappa_cystatin: float
    alpha_cystatin: float
    beta_cystatin: float
    age_base: float
    female_factor: float
    min_age: float
    source: str
    status: str


CKD_EPI_2021_CREATININE_CYSTATIN = CkdEpiCreatinineCystatin(
    multiplier=135.0,
    kappa_female=0.7,
    kappa_male=0.9,
    alpha_female=-0.219,
    alpha_male=-0.144,
    beta_creatinine=-0.544,
    kappa_cystatin=0.8,
    alpha_cystatin=-0.323,
    beta_cystatin=-0.778,
    age_base=0.9961,
    female_factor=0.963,
    min_age=18.0,
    source="Inker et al., N Engl J Med 2021;385:1737 (creatinine-cystatin C equation)",
    status=FROM_MEMORY,  # every coefficient of this equation is recalled; verify against the paper
)


@dataclass(frozen=True)
class Ekfc:
    """EKFC: eGFR = multiplier / (Scr/Q)^α × age_base^(age − age_pivot) [age > age_pivot only].

    α = alpha_below if Scr/Q < 1 else alpha_above. Adult Q in mg/dL; the child Q comes from
    ln Q (µmol/L) = c0 + c1·age + c2·ln(age) + c3·age² + c4·age³, converted by 88.4.
    """

    multiplier: float
    alpha_below: float
    alpha_above: float
    age_base: float
    age_pivot: float
    q_adult_female_mg_dl: float
    q_adult_male_mg_dl: float
    adult_from_age: float
    min_age: float
    child_ln_q_male: tuple[float, float, float, float, float]
    child_ln_q_female: tuple[float, float, float, float, float]
    source: str
    status: str
    child_q_status: str


EKFC_CREATININE = Ekfc(
    multiplier=107.3,
    alpha_below=0.322,
    alpha_above=1.132,
    age_base=0.990,
    age_pivot=40.0,
    # The paper gives 80 µmol/L (0.90 mg/dL) for men and 62 µmol/L (0.70 mg/dL) for women; the
    # mg/dL figures are used because inputs arrive in mg/dL.
    q_adult_female_mg_dl=0.70,
    q_adult_male_mg_dl=0.90,
    adult_from_age=18.0,
    min_age=2.0,
    child_ln_q_male=(3.200, 0.259, -0.543, -0.00763, 0.0000790),
    child_ln_q_female=(3.080, 0.177, -0.223, -0.00596, 0.0000686),
    source="Pottel et al., Ann Intern Med 2021;174:183",
    status=CONFIRMED,  # adult equation and adult Q
    # The child ln Q polynomials are recalled. As recalled they give Q(17.99) ≈ 72.3 µmol/L (boys)
    # and ≈ 59.8 µmol/L (girls) against the adult 80 / 62: a step at 18 to verify in the paper.
    child_q_status=FROM_MEMORY,
)


@dataclass(frozen=True)
class CkidU25:
    """CKiD U25: eGFR = K × height (m) / Scr.

    K = k_pivot × growth_child^(age − pivot_age) below pivot_age,
        k_pivot × growth_adolescent^(age − pivot_age) from pivot_age to below adult_from_age,
        k_adult from adult_from_age.
    """

    k_pivot_male: float
    k_pivot_female: float
    growth_child_male: float
    growth_child_female: float
    growth_adolescent_male: float
    growth_adolescent_female: float
    k_adult_male: float
    k_adult_female: float
    pivot_age: float
    adult_from_age: float
    min_age: float
    max_age: float
    source: str
    status: str


CKID_U25_CREATININE = CkidU25(
    k_pivot_male=39.0,
    k_pivot_female=36.1,
    growth_child_male=1.008,
    growth_child_female=1.008,
    growth_adolescent_male=1.045,
    growth_adolescent_female=1.023,
    k_adult_male=50.8,
    k_adult_female=41.4,
    pivot_age=12.0,
    adult_from_age=18.0,
    min_age=1.0,
    max_age=25.0,
    source="Pierce et al., Kidney Int 2021;99:948",
    status=FROM_MEMORY,  # growth factors recalled; the K end-points at 12 and 18 are confirmed
)


@dataclass(frozen=True)
class Mdrd4v:
    """eGFR = multiplier × Scr^scr_exponent × age^age_exponent × female_factor[F]."""

    multiplier: float
    scr_exponent: float
    age_exponent: float
    female_factor: float
    min_age: float
    source: str
    status: str


MDRD_4V_IDMS = Mdrd4v(
    multiplier=175.0,
    scr_exponent=-1.154,
    age_exponent=-0.203,
    female_factor=0.742,
    min_age=18.0,
    source="Levey et al., Clin Chem 2007;53:766 (IDMS-traceable creatinine, race term omitted)",
    status=CONFIRMED,
)

KDIGO_SOURCE = "KDIGO 2012 CKD guideline, Kidney Int Suppl 2013;3:1"

KDIGO_GFR_LOWER_BOUNDS: tuple[tuple[str, float], ...] = (
    ("G1", 90.0),
    ("G2", 60.0),
    ("G3a", 45.0),
    ("G3b", 30.0),
    ("G4", 15.0),
    ("G5", 0.0),  # kidney failure, GFR < 15
)
"""KDIGO 2012 GFR categories by lower bound (inclusive, project decision 1); confirmed."""


@dataclass(frozen=True)
class AlbuminuriaThresholds:
    """A2 starts at ``a2_from``; A3 starts above (or at, if not inclusive) ``a3_above``."""

    a2_from: float
    a3_above: float
    unit: str
    source: str
    status: str


ACR_MG_G = AlbuminuriaThresholds(30.0, 300.0, "mg/g", KDIGO_SOURCE, CONFIRMED)
ACR_MG_MMOL = AlbuminuriaThresholds(3.0, 30.0, "mg/mmol", KDIGO_SOURCE, CONFIRMED)
AER_MG_24H = AlbuminuriaThresholds(30.0, 300.0, "mg/24 h", KDIGO_SOURCE, CONFIRMED)
PCR_MG_G = AlbuminuriaThresholds(150.0, 500.0, "mg/g", KDIGO_SOURCE, CONFIRMED)


@dataclass(frozen=True)
class SumidaPcrToAcr:
    """Crude ACR (mg/g) = exp(intercept + b_low·ln(min(PCR/knot_low, 1))
    + b_mid·ln(max(min(PCR/knot_high, 1), mid_floor)) + b_high·ln(max(PCR/knot_high, 1))).
    """

    intercept: float
    b_low: float
    b_mid: float
    b_high: float
    knot_low: float
    knot_high: float
    mid_floor: float
    source: str
    status: str


SUMIDA_PCR_TO_ACR = SumidaPcrToAcr(
    intercept=5.3920,
    b_low=0.3072,
    b_mid=1.5793,
    b_high=1.1266,
    knot_low=50.0,
    knot_high=500.0,
    mid_floor=0.1,
    source="Sumida et al., Ann Intern Med 2020;173:426 (crude conversion)",
    status=FROM_MEMORY,  # the whole equation is recalled; verify against the paper
)

DIPSTICK_A_CATEGORY: dict[str, str] = {
    "negative": "A1",
    "1+": "A2",
    "+": "A2",
    "2+": "A3",
    "++": "A3",
    "3+": "A3",
    "+++": "A3",
    "4+": "A3",
    "++++": "A3",
}
"""Urine protein dipstick to albuminuria category, an approximate equivalent only (KDIGO 2012
CKD guideline, Kidney Int Suppl 2013;3:1, table of albuminuria categories: negative to trace
~ A1, trace to + ~ A2, + or more ~ A3; Sumida et al., Ann Intern Med 2020;173:426, dipstick
classes against measured ACR): negative -> A1, 1+ -> A2, 2+ or more -> A3. "trace" is listed in
DIPSTICK_SPANNING: KDIGO puts it at the A1/A2 border, so it gets no single category. The KDIGO
strip rows are from memory; verify against the guideline's table."""

DIPSTICK_SPANNING: dict[str, tuple[str, str]] = {"trace": ("A1", "A2")}
"""Dipstick readings that span two albuminuria categories (KDIGO 2012: trace lies on the A1/A2
border): no category, reason ``dipstick_trace_spans_a1_a2``."""

KDIGO_RISK: dict[tuple[str, str], str] = {
    **{(g, "A1"): "low" for g in ("G1", "G2")},
    **{(g, "A2"): "moderately increased" for g in ("G1", "G2")},
    **{(g, "A3"): "high" for g in ("G1", "G2")},
    ("G3a", "A1"): "moderately increased",
    ("G3a", "A2"): "high",
    ("G3a", "A3"): "very high",
    ("G3b", "A1"): "high",
    ("G3b", "A2"): "very high",
    ("G3b", "A3"): "very high",
    **{(g, a): "very high" for g in ("G4", "G5") for a in ("A1", "A2", "A3")},
}
"""KDIGO 2012 prognosis heat map (Kidney Int Suppl 2013;3:1); confirmed."""


@dataclass(frozen=True)
class HbA1cMasterEquation:
    """NGSP % = slope × IFCC (mmol/mol) + intercept."""

    slope: float
    intercept: float
    source: str
    status: str


HBA1C_IFCC_TO_NGSP = HbA1cMasterEquation(
    slope=0.09148,
    intercept=2.152,
    source="Hoelzel et al., Clin Chem 2004",
    status=CONFIRMED,
)

# ---------------------------------------------------------------------------------------------
# Helpers
# ---------------------------------------------------------------------------------------------


def _expr(value: pl.Expr | float | int) -> pl.Expr:
    """Accept an expression or a numeric literal; strings are refused to avoid the column-name
    ambiguity of polars' own APIs.
    """
    if isinstance(value, pl.Expr):
        return value
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return pl.lit(float(value), dtype=pl.Float64)
    raise TypeError(f"expected a polars expression or a number, got {type(value).__name__}")


def _float(value: pl.Expr | float | int) -> pl.Expr:
    return _expr(value).cast(pl.Float64)


def _positive(x: pl.Expr) -> pl.Expr:
    """True where x is finite and > 0; null where x is null (so pl.when treats it as false)."""
    return x.is_finite() & (x > 0)


def _age_between(age: pl.Expr, low: float, high: float = math.inf) -> pl.Expr:
    return age.is_finite() & (age >= low) & (age <= high)


def _by_sex(female: pl.Expr, if_female: float | pl.Expr, if_male: float | pl.Expr) -> pl.Expr:
    """Pick a value by sex; null sex gives null."""
    if_female = if_female if isinstance(if_female, pl.Expr) else pl.lit(float(if_female))
    if_male = if_male if isinstance(if_male, pl.Expr) else pl.lit(float(if_male))
    return pl.when(female).then(if_female).when(female.not_()).then(if_male)


def _spline(ratio: pl.Expr, below: float | pl.Expr, above: float | pl.Expr) -> pl.Expr:
    """min(ratio, 1)^below × max(ratio, 1)^above (the CKD-EPI two-slope term)."""
    return ratio.clip(upper_bound=1.0).pow(below) * ratio.clip(lower_bound=1.0).pow(above)


def _ckd_epi_creatinine(c: CkdEpiCreatinine, scr, age, female) -> pl.Expr:
    scr, age, female = _float(scr), _float(age), _expr(female)
    kappa = _by_sex(female, c.kappa_female, c.kappa_male)
    alpha = _by_sex(female, c.alpha_female, c.alpha_male)
    egfr = (
        c.multiplier
        * _spline(scr / kappa, alpha, c.beta)
        * pl.lit(c.age_base).pow(age)
        * _by_sex(female, c.female_factor, 1.0)
    )
    return pl.when(_positive(scr) & _age_between(age, c.min_age)).then(egfr)


# ---------------------------------------------------------------------------------------------
# eGFR equations
# ---------------------------------------------------------------------------------------------


def ckd_epi_2021_creatinine(scr: pl.Expr, age: pl.Expr, female: pl.Expr) -> pl.Expr:
    """CKD-EPI 2021 race-free creatinine equation (Inker et al., N Engl J Med 2021;385:1737).

    Valid from age 18 (no upper limit); null below 18, for unknown sex and for non-positive
    creatinine. ``scr`` in mg/dL.
    """
    return _ckd_epi_creatinine(CKD_EPI_2021_CREATININE, scr, age, female)


def ckd_epi_2009_creatinine(scr: pl.Expr, age: pl.Expr, female: pl.Expr) -> pl.Expr:
    """CKD-EPI 2009 creatinine equation without its race term (Levey et al., Ann Intern Med
    2009;150:604).

    Valid from age 18; null below 18, for unknown sex and for non-positive creatinine.
    """
    return _ckd_epi_creatinine(CKD_EPI_2009_CREATININE, scr, age, female)


def ckd_epi_2012_cystatin(scys: pl.Expr, age: pl.Expr, female: pl.Expr) -> pl.Expr:
    """CKD-EPI 2012 cystatin C equation (Inker et al., N Engl J Med 2012;367:20).

    Valid from age 18; null below 18, for unknown sex and for non-positive cystatin C.
    ``scys`` in mg/L, standardised.
    """
    c = CKD_EPI_2012_CYSTATIN
    scys, age, female = _float(scys), _float(age), _expr(female)
    egfr = (
        c.multiplier
        * _spline(scys / c.kappa, c.alpha, c.beta)
        * pl.lit(c.age_base).pow(age)
        * _by_sex(female, c.female_factor, 1.0)
    )
    return pl.when(_positive(scys) & _age_between(age, c.min_age)).then(egfr)


def ckd_epi_2021_creatinine_cystatin(
    scr: pl.Expr, scys: pl.Expr, age: pl.Expr, female: pl.Expr
) -> pl.Expr:
    """CKD-EPI 2021 creatinine-cystatin C equation (Inker et al., N Engl J Med 2021;385:1737).

    Valid from age 18; null below 18, for unknown sex and if either marker is non-positive.
    Coefficients are from memory (see ``CKD_EPI_2021_CREATININE_CYSTATIN``).
    """
    c = CKD_EPI_2021_CREATININE_CYSTATIN
    scr, scys, age, female = _float(scr), _float(scys), _float(age), _expr(female)
    kappa = _by_sex(female, c.kappa_female, c.kappa_male)
    alpha = _by_sex(female, c.alpha_female, c.alpha_male)
    egfr = (
        c.multiplier
        * _spline(scr / kappa, alpha, c.beta_creatinine)
        * _spline(scys / c.kappa_cystatin, c.alpha_cystatin, c.beta_cystatin)
        * pl.lit(c.age_base).pow(age)
        * _by_sex(female, c.female_factor, 1.0)
    )
    valid = _positive(scr) & _positive(scys) & _age_between(age, c.min_age)
    return pl.when(valid).then(egfr)


def _ekfc_child_q_mg_dl(age: pl.Expr, coefficients: tuple[float, ...]) -> pl.Expr:
    c0, c1, c2, c3, c4 = coefficients
    ln_q = c0 + c1 * age + c2 * age.log() + c3 * age.pow(2) + c4 * age.pow(3)
    return ln_q.exp() / CREATININE_UMOL_L_PER_MG_DL


def ekfc_q_creatinine(age: pl.Expr, female: pl.Expr) -> pl.Expr:
    """EKFC Q, the median creatinine of healthy people (mg/dL), by age and sex (Pottel et al.,
    Ann Intern Med 2021;174:183).

    Child polynomials for 2 ≤ age < 18 (from memory), adult constants from 18; null below 2 or
    for unknown sex.
    """
    c = EKFC_CREATININE
    age, female = _float(age), _expr(female)
    child = _by_sex(
        female,
        _ekfc_child_q_mg_dl(age, c.child_ln_q_female),
        _ekfc_child_q_mg_dl(age, c.child_ln_q_male),
    )
    adult = _by_sex(female, c.q_adult_female_mg_dl, c.q_adult_male_mg_dl)
    q = pl.when(age >= c.adult_from_age).then(adult).otherwise(child)
    return pl.when(_age_between(age, c.min_age)).then(q)


def ekfc_creatinine(scr: pl.Expr, age: pl.Expr, female: pl.Expr) -> pl.Expr:
    """EKFC creatinine equation (Pottel et al., Ann Intern Med 2021;174:183).

    Valid from age 2 (no upper limit): Q from the child equations for 2 ≤ age < 18, adult Q from
    18; the 0.990^(age − 40) term applies above 40 only. Null below 2, for unknown sex and for
    non-positive creatinine.
    """
    c = EKFC_CREATININE
    scr, age, female = _float(scr), _float(age), _expr(female)
    ratio = scr / ekfc_q_creatinine(age, female)
    alpha = pl.when(ratio < 1.0).then(pl.lit(c.alpha_below)).otherwise(pl.lit(c.alpha_above))
    age_term = (
        pl.when(age > c.age_pivot)
        .then(pl.lit(c.age_base).pow(age - c.age_pivot))
        .otherwise(pl.lit(1.0))
    )
    egfr = c.multiplier / ratio.pow(alpha) * age_term
    return pl.when(_positive(scr) & _age_between(age, c.min_age)).then(egfr)


def ckid_u25_creatinine(scr: pl.Expr, height_cm: pl.Expr, age: pl.Expr, female: pl.Expr) -> pl.Expr:
    """CKiD U25 creatinine equation (Pierce et al., Kidney Int 2021;99:948).

    eGFR = K × height (m) / Scr, K by sex and age band (< 12, 12 to < 18, ≥ 18). Valid for
    1 ≤ age ≤ 25 (a fractional age above 25.0 is outside); null outside, for unknown sex and for
    non-positive creatinine or height. Growth factors from memory.
    """
    c = CKID_U25_CREATININE
    scr, height_cm, age = _float(scr), _float(height_cm), _float(age)
    female = _expr(female)
    years_from_pivot = age - c.pivot_age
    k_male = (
        pl.when(age < c.pivot_age)
        .then(c.k_pivot_male * pl.lit(c.growth_child_male).pow(years_from_pivot))
        .when(age < c.adult_from_age)
        .then(c.k_pivot_male * pl.lit(c.growth_adolescent_male).pow(years_from_pivot))
        .otherwise(pl.lit(c.k_adult_male))
    )
    k_female = (
        pl.when(age < c.pivot_age)
        .then(c.k_pivot_female * pl.lit(c.growth_child_female).pow(years_from_pivot))
        .when(age < c.adult_from_age)
        .then(c.k_pivot_female * pl.lit(c.growth_adolescent_female).pow(years_from_pivot))
        .otherwise(pl.lit(c.k_adult_female))
    )
    egfr = _by_sex(female, k_female, k_male) * (height_cm / 100.0) / scr
    valid = _positive(scr) & _positive(height_cm) & _age_between(age, c.min_age, c.max_age)
    return pl.when(valid).then(egfr)


def mdrd_4v_idms(scr: pl.Expr, age: pl.Expr, female: pl.Expr) -> pl.Expr:
    """MDRD 4-variable equation for IDMS-traceable creatinine, race term omitted (Levey et al.,
    Clin Chem 2007;53:766). For comparison only.

    Valid from age 18; null below 18, for unknown sex and for non-positive creatinine.
    """
    c = MDRD_4V_IDMS
    scr, age, female = _float(scr), _float(age), _expr(female)
    egfr = (
        c.multiplier
        * scr.pow(c.scr_exponent)
        * age.pow(c.age_exponent)
        * _by_sex(female, c.female_factor, 1.0)
    )
    return pl.when(_positive(scr) & _age_between(age, c.min_age)).then(egfr)


# ---------------------------------------------------------------------------------------------
# Categories
# ---------------------------------------------------------------------------------------------


def gfr_category(egfr: pl.Expr) -> pl.Expr:
    """KDIGO 2012 GFR category (Kidney Int Suppl 2013;3:1) as "G1" … "G5".

    Taken on the unrounded value, lower bound inclusive (90 → G1, 60 → G2, 45 → G3a, 30 → G3b,
    15 → G4, below 15 → G5). Null, NaN, infinite or negative input gives null.
    """
    egfr = _float(egfr)
    chain = None
    for category, lower in KDIGO_GFR_LOWER_BOUNDS:
        condition = egfr >= lower
        chain = (pl.when(condition) if chain is None else chain.when(condition)).then(
            pl.lit(category, dtype=pl.Utf8)
        )
    return pl.when(egfr.is_finite()).then(chain)


def _albuminuria_category(
    value: pl.Expr, thresholds: AlbuminuriaThresholds, upper_a2_inclusive: bool
) -> pl.Expr:
    value = _float(value)
    in_a2 = value <= thresholds.a3_above if upper_a2_inclusive else value < thresholds.a3_above
    category = (
        pl.when(value < thresholds.a2_from)
        .then(pl.lit("A1", dtype=pl.Utf8))
        .when(in_a2)
        .then(pl.lit("A2", dtype=pl.Utf8))
        .otherwise(pl.lit("A3", dtype=pl.Utf8))
    )
    return pl.when(value.is_finite() & (value >= 0)).then(category)


def albuminuria_category_acr(acr_mg_g: pl.Expr, upper_a2_inclusive: bool = True) -> pl.Expr:
    """KDIGO 2012 albuminuria category from ACR in mg/g: A1 < 30, A2 30–300, A3 > 300.

    300 mg/g is A2 unless ``upper_a2_inclusive`` is False (project decision 2). Null, NaN,
    infinite or negative input gives null. Source: Kidney Int Suppl 2013;3:1.
    """
    return _albuminuria_category(acr_mg_g, ACR_MG_G, upper_a2_inclusive)


def albuminuria_category_acr_mg_mmol(acr: pl.Expr, upper_a2_inclusive: bool = True) -> pl.Expr:
    """KDIGO 2012 albuminuria category from ACR in mg/mmol: A1 < 3, A2 3–30, A3 > 30.

    KDIGO's own mg/mmol thresholds are applied in the unit reported, not after conversion to
    mg/g (project decision 2). Source: Kidney Int Suppl 2013;3:1.
    """
    return _albuminuria_category(acr, ACR_MG_MMOL, upper_a2_inclusive)


def albuminuria_category_aer(mg_per_24h: pl.Expr, upper_a2_inclusive: bool = True) -> pl.Expr:
    """KDIGO 2012 albuminuria category from albumin excretion rate (mg/24 h): A1 < 30,
    A2 30–300, A3 > 300. Source: Kidney Int Suppl 2013;3:1.
    """
    return _albuminuria_category(mg_per_24h, AER_MG_24H, upper_a2_inclusive)


def albuminuria_category_pcr(pcr_mg_g: pl.Expr, upper_a2_inclusive: bool = True) -> pl.Expr:
    """KDIGO 2012 category from protein-to-creatinine ratio (mg/g): A1 < 150, A2 150–500,
    A3 > 500. Source: Kidney Int Suppl 2013;3:1.
    """
    return _albuminuria_category(pcr_mg_g, PCR_MG_G, upper_a2_inclusive)


def acr_from_pcr_sumida(pcr_mg_g: pl.Expr) -> pl.Expr:
    """Crude estimated ACR (mg/g) from PCR (mg/g) (Sumida et al., Ann Intern Med 2020;173:426).

    The equation is FROM MEMORY and must be verified against the paper. The paper notes that
    PCR below 50 mg/g relates poorly to ACR; the value is still computed, and callers flag
    estimated ACR (project decision 4). Null for null or non-positive PCR. Any age.
    """
    c = SUMIDA_PCR_TO_ACR
    pcr = _float(pcr_mg_g)
    low = (pcr / c.knot_low).clip(upper_bound=1.0).log()
    mid = (pcr / c.knot_high).clip(lower_bound=c.mid_floor, upper_bound=1.0).log()
    high = (pcr / c.knot_high).clip(lower_bound=1.0).log()
    acr = (c.intercept + c.b_low * low + c.b_mid * mid + c.b_high * high).exp()
    return pl.when(_positive(pcr)).then(acr)


def albuminuria_category_dipstick(reading: pl.Expr) -> pl.Expr:
    """Approximate albuminuria category from a urine protein dipstick reading (KDIGO 2012;
    Sumida et al., Ann Intern Med 2020;173:426): negative → A1, 1+ → A2, 2+ or more → A3;
    trace spans A1–A2 and gives null (``DIPSTICK_SPANNING``).

    Accepts "negative", "trace", "1+" … "4+" and "+" … "++++", ignoring case and surrounding
    spaces; any other text, or null, gives null.
    """
    normalised = _expr(reading).cast(pl.Utf8).str.strip_chars().str.to_lowercase()
    return normalised.replace_strict(DIPSTICK_A_CATEGORY, default=None, return_dtype=pl.Utf8)


def kdigo_risk(g_category: pl.Expr, a_category: pl.Expr) -> pl.Expr:
    """KDIGO 2012 prognosis of CKD by GFR and albuminuria category (Kidney Int Suppl 2013;3:1):
    "low", "moderately increased", "high" or "very high".

    Null if either category is null or not one of G1…G5 / A1…A3.
    """
    grid = {f"{g}|{a}": risk for (g, a), risk in KDIGO_RISK.items()}
    key = pl.concat_str([_expr(g_category), _expr(a_category)], separator="|")
    return key.replace_strict(grid, default=None, return_dtype=pl.Utf8)


def hba1c_ifcc_to_ngsp(mmol_mol: pl.Expr) -> pl.Expr:
    """HbA1c from IFCC (mmol/mol) to NGSP (%) by the master equation NGSP = 0.09148 × IFCC +
    2.152 (Hoelzel et al., Clin Chem 2004). Null for null, non-finite or negative input.
    """
    c = HBA1C_IFCC_TO_NGSP
    x = _float(mmol_mol)
    return pl.when(x.is_finite() & (x >= 0)).then(c.slope * x + c.intercept)


def hyperfiltration(egfr: pl.Expr, threshold: pl.Expr | float) -> pl.Expr:
    """True where eGFR is above ``threshold`` (strictly). There is no single guideline
    cut-off; the threshold comes from configuration. Null where eGFR is null.
    """
    return _float(egfr) > _float(threshold)
