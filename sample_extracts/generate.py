"""Generate the shipped sample lab extracts for kidneysurv.

Everything this script writes is invented. Westerfold is a fictional region; its twelve
districts, its population, its three laboratories and every person, specimen and result
are made up. No real person, place, laboratory or data set was used.

How the data are made
---------------------
1. A population table (district x sex x 5-year age band, about 25,000 residents on
   2025-11-01) with an ageing pyramid and districts of very different size.
2. About 6,000 tested persons are drawn from that population (older people more often).
   Each gets a region-wide linkage token, a hidden exact birth date, and a kidney course:
   normal, stable low eGFR, sustained decline of 40 % or more, or kidney failure; some
   have albuminuria, diabetes or a short acute kidney injury.
3. A true eGFR trajectory per adult is turned into serum creatinine by inverting the
   CKD-EPI 2021 creatinine equation (Inker et al., NEJM 2021;385:1737), cystatin C by
   inverting the CKD-EPI 2012 cystatin C equation (Inker et al., NEJM 2012;367:20), each
   with small multiplicative measurement noise. Children get plausible creatinine values
   directly. ACR is lognormal around a person-level level; HbA1c and glucose follow
   diabetes status.
4. Results are sent to three laboratories, each writing its own layout (see README.md and
   config/sources/*.yaml). Files are cut by report month, 2024-11 to 2026-10.
5. Realistic defects and reporting events are then mixed into about 1-2 % of the rows,
   spread over labs and months, drawn at random from eligible rows: blank or text values,
   mislabelled and unexpected units, unknown test codes, unparsable and future dates,
   impossible birth years, out-of-range values, extra censored values, an unknown
   district, duplicate and resent rows, amended, cancelled and preliminary results.
   Every planted row is listed, with file and line number, in answer_key/defects.csv;
   answer_key/persons.csv holds the simulated truth per person. The answer key is not a
   lab extract and the pipeline must never read it.

The output is deterministic: the same --seed gives byte-identical files (all randomness
comes from random.Random instances seeded with fixed strings; no clock is read).

Usage: python sample_extracts/generate.py [--out DIR] [--seed N] [--regions-out DIR]
"""

from __future__ import annotations

import argparse
import csv
import json
import math
import random
from dataclasses import dataclass, field
from datetime import date, timedelta
from pathlib import Path

DEFAULT_SEED = 20241101
PERIOD_START = date(2024, 11, 1)
PERIOD_END = date(2026, 10, 31)
PERIOD_DAYS = (PERIOD_END - PERIOD_START).days + 1  # 730
REFERENCE_DATE = date(2025, 11, 1)  # population and ages are stated on this day
LAST_YEAR_START = (date(2025, 11, 1) - PERIOD_START).days  # day index of 2025-11-01

W_LAB = "westerfold_general_lab"
C_LAB = "corvale_lab_chain"
F_LAB = "fallowmere_reference_lab"
LABS = (W_LAB, C_LAB, F_LAB)

# code, name, residents, age tilt (> 0 older than the region, < 0 younger)
DISTRICTS = [
    ("WF01", "Alderbank", 4200, -0.05),
    ("WF02", "Brimcote", 900, 0.25),
    ("WF03", "Corvale", 5200, -0.15),
    ("WF04", "Dunfarrow", 1500, 0.15),
    ("WF05", "Elmhythe", 2600, 0.0),
    ("WF06", "Fallowmere", 4100, -0.10),
    ("WF07", "Greyling", 650, 0.35),
    ("WF08", "Hartsmoor", 1800, 0.10),
    ("WF09", "Ivelden", 1100, 0.20),
    ("WF10", "Juniper Cross", 420, 0.40),
    ("WF11", "Kestwick", 2000, 0.0),
    ("WF12", "Lornhaven", 530, 0.30),
]
DISTRICT_NAME = {code: name for code, name, _, _ in DISTRICTS}
AGE_BANDS = [f"{5 * i}-{5 * i + 4}" for i in range(17)] + ["85+"]
# share of residents per band (percent, an ageing rural region) and male share per band
BAND_SHARE = [
    4.6,
    5.0,
    5.3,
    5.4,
    5.5,
    5.8,
    6.2,
    6.3,
    6.2,
    6.4,
    7.0,
    7.2,
    6.8,
    6.0,
    5.4,
    4.2,
    2.6,
    2.1,
]
MALE_SHARE = [
    0.513,
    0.513,
    0.512,
    0.512,
    0.51,
    0.505,
    0.5,
    0.5,
    0.5,
    0.495,
    0.49,
    0.49,
    0.485,
    0.48,
    0.47,
    0.45,
    0.41,
    0.34,
]
# share of a district's testing done by (general, Corvale chain, Fallowmere reference)
LAB_WEIGHTS = {
    "WF01": (0.74, 0.20, 0.06),
    "WF02": (0.62, 0.32, 0.06),
    "WF03": (0.36, 0.58, 0.06),
    "WF04": (0.44, 0.50, 0.06),
    "WF05": (0.70, 0.18, 0.12),
    "WF06": (0.55, 0.15, 0.30),
    "WF07": (0.70, 0.18, 0.12),
    "WF08": (0.44, 0.50, 0.06),
    "WF09": (0.60, 0.15, 0.25),
    "WF10": (0.74, 0.20, 0.06),
    "WF11": (0.70, 0.24, 0.06),
    "WF12": (0.62, 0.18, 0.20),
}

N_ADULTS = 5700
N_CHILDREN = 300

W_HEADER = [
    "person_token",
    "birth_year",
    "sex",
    "district_code",
    "specimen_id",
    "collected_date",
    "test_code",
    "value",
    "unit",
    "status",
    "height_cm",
    "reported_at",
    "fasting",
]
C_HEADER = [
    "PatientRef",
    "YearOfBirth",
    "Gender",
    "AreaCode",
    "SampleNo",
    "SampleDate",
    "TestCode",
    "Result",
    "Units",
    "State",
    "ReportDate",
]
# semantic field -> column, for the two delimited labs
W_COLS = dict(
    zip(
        [
            "token",
            "birth_year",
            "sex",
            "district",
            "specimen",
            "collected",
            "code",
            "value",
            "unit",
            "status",
            "height",
            "reported",
            "fasting",
        ],
        W_HEADER,
        strict=False,
    )
)
C_COLS = dict(
    zip(
        [
            "token",
            "birth_year",
            "sex",
            "district",
            "specimen",
            "collected",
            "code",
            "value",
            "unit",
            "status",
            "reported",
        ],
        C_HEADER,
        strict=False,
    )
)

W_CODES = {
    "creatinine": "2160-0",
    "egfr": "98979-8",
    "acr": "9318-7",
    "hba1c": "4548-4",
    "glucose": "2345-7",
    "cystatin_c": "33863-2",
    "u_albumin": "14957-5",
    "u_creatinine": "2161-8",
}
C_CODES = {
    "creatinine": "CREA",
    "egfr": "EGFR",
    "acr": "UACR",
    "hba1c": "HBA1C",
    "glucose": "GLUF",
    "cystatin_c": "CYSC",
}
W_STATUS = {
    "final": "final",
    "amended": "amended",
    "cancelled": "cancelled",
    "preliminary": "preliminary",
}
C_STATUS = {
    "final": "F",
    "amended": "A",
    "cancelled": "C",
    "preliminary": "P",
    "entered-in-error": "E",
}
TEST_ORDER = {
    "creatinine": 0,
    "egfr": 1,
    "cystatin_c": 2,
    "hba1c": 3,
    "glucose": 4,
    "acr": 5,
    "u_albumin": 6,
    "u_creatinine": 7,
}
LOINC_DISPLAY = {
    "2160-0": "Creatinine [Mass/volume] in Serum or Plasma",
    "14682-9": "Creatinine [Moles/volume] in Serum or Plasma",
    "9318-7": "Albumin/Creatinine [Mass Ratio] in Urine",
    "4548-4": "Hemoglobin A1c/Hemoglobin.total in Blood",
}
UCUM = "http://unitsofmeasure.org"
LOINC = "http://loinc.org"


# --------------------------------------------------------------------------- equations
def egfr_ckd_epi_2021(scr: float, age: float, female: bool) -> float:
    """CKD-EPI 2021 creatinine equation, Inker et al., NEJM 2021;385:1737."""
    k, a = (0.7, -0.241) if female else (0.9, -0.302)
    r = scr / k
    return 142 * min(r, 1) ** a * max(r, 1) ** -1.200 * 0.9938**age * (1.012 if female else 1)


def creatinine_from_egfr_2021(egfr: float, age: float, female: bool) -> float:
    """Invert the CKD-EPI 2021 creatinine equation for serum creatinine in mg/dL."""
    k, a = (0.7, -0.241) if female else (0.9, -0.302)
    at_kappa = 142 * 0.9938**age * (1.012 if female else 1)  # eGFR when Scr equals kappa
    r = egfr / at_kappa
    return k * (r ** (1 / a) if r >= 1 else r ** (1 / -1.200))


def egfr_ckd_epi_2009(scr: float, age: float, female: bool) -> float:
    """CKD-EPI 2009 creatinine equation without race term, Levey et al., Ann Intern Med 2009."""
    k, a = (0.7, -0.329) if female else (0.9, -0.411)
    r = scr / k
    return 141 * min(r, 1) ** a * max(r, 1) ** -1.209 * 0.993**age * (1.018 if female else 1)


def cystatin_from_egfr_2012(egfr: float, age: float, female: bool) -> float:
    """Invert the CKD-EPI 2012 cystatin C equation (Inker et al., NEJM 2012) for mg/L."""
    at_knot = 133 * 0.996**age * (0.932 if female else 1)
    r = egfr / at_knot
    return 0.8 * (r ** (1 / -0.499) if r >= 1 else r ** (1 / -1.328))


# --------------------------------------------------------------------------- helpers
def weighted_pick(rng: random.Random, items: list, weights: list[float], n: int) -> list:
    """Draw n items without replacement, chance proportional to weight (Efraimidis-Spirakis)."""
    keyed = []
    for i, (item, w) in enumerate(zip(items, weights, strict=False)):
        u = 1.0 - rng.random()
        keyed.append((math.log(u) / w if w > 0 else -math.inf, i, item))
    keyed.sort(key=lambda t: (-t[0], t[1]))
    return [item for _, _, item in keyed[:n]]


def day_to_date(day: int) -> date:
    return PERIOD_START + timedelta(days=day)


def month_of(d: date) -> tuple[int, int]:
    return (d.year, d.month)


def next_month(ym: tuple[int, int]) -> tuple[int, int]:
    y, m = ym
    return (y + 1, 1) if m == 12 else (y, m + 1)


def all_months() -> list[tuple[int, int]]:
    out, ym = [], month_of(PERIOD_START)
    while ym <= month_of(PERIOD_END):
        out.append(ym)
        ym = next_month(ym)
    return out


def clamp(x: float, lo: float, hi: float) -> float:
    return max(lo, min(hi, x))


def comma(text: str) -> str:
    return text.replace(".", ",")


def dmy(d: date) -> str:
    return d.strftime("%d/%m/%Y")


# --------------------------------------------------------------------------- model
@dataclass
class Person:
    idx: int
    token: str
    district: str
    sex: str  # true sex, F or M
    sex_reported: str  # F, M or U
    birth_date: date
    age_ref: float
    is_child: bool
    diabetes: bool = False
    group: str = "normal"  # normal, stable_low, decline, kidney_failure
    albuminuric: bool = False
    aki_day: int | None = None
    aki_dip: float = 1.0
    acr_screened: bool = False
    base_egfr: float = 100.0
    slope: float = -1.0  # per year
    t1: int = 0
    t2: int = 0
    end_egfr: float = 100.0
    child_factor: float = 1.0
    acr_logmed: float = 2.0
    hba1c_mean: float = 5.4
    labs: list[str] = field(default_factory=list)
    fr_id: str = ""
    fr_has_token: bool = True

    @property
    def female(self) -> bool:
        return self.sex == "F"

    def age_on(self, d: date) -> float:
        return (d - self.birth_date).days / 365.25

    def true_egfr(self, day: int) -> float:
        if self.group == "kidney_failure":
            e = self.base_egfr + (self.end_egfr - self.base_egfr) * day / (PERIOD_DAYS - 1)
        elif self.group == "decline":
            if day <= self.t1:
                e = self.base_egfr
            elif day < self.t2:
                frac = (day - self.t1) / (self.t2 - self.t1)
                e = self.base_egfr + (self.end_egfr - self.base_egfr) * frac
            else:
                e = self.end_egfr - 1.0 * (day - self.t2) / 365.25
        else:
            e = self.base_egfr + self.slope * day / 365.25
        if self.aki_day is not None and 0 <= day - self.aki_day <= 10:
            e *= self.aki_dip + (1 - self.aki_dip) * (day - self.aki_day) / 10
        return e

    def true_creatinine(self, day: int) -> float:
        d = day_to_date(day)
        age = self.age_on(d)
        if self.is_child:
            if age < 1:
                c = 0.22
            elif age < 2:
                c = 0.25
            else:
                puberty = 0.02 * (age - 12) if self.sex == "M" and age > 12 else 0
                c = 0.25 + 0.023 * (age - 2) + puberty
            return c * self.child_factor
        return creatinine_from_egfr_2021(self.true_egfr(day), age, self.female)


@dataclass
class Specimen:
    lab: str
    kind: str  # serum or urine
    day: int
    person: Person
    seq: int
    sid: str = ""


@dataclass
class Result:
    specimen: Specimen
    analyte: str
    value: float  # canonical unit (see DEVELOPERS.md, Design notes)
    report_day: int
    fasting: str = ""
    height: float | None = None
    fr_umol: bool = False  # Fallowmere sends this creatinine in umol/L


@dataclass
class Rec:
    """One row of a delimited extract, or one Observation of the FHIR export."""

    lab: str
    person: Person
    analyte: str
    value: float
    collected: date
    report: date
    spec_sid: str
    seq: int
    f: dict = field(default_factory=dict)  # delimited labs: semantic field -> text
    obs: dict = field(default_factory=dict)  # Fallowmere: Observation parts
    issued: str = ""
    file_month: tuple[int, int] | None = None
    status: str = "final"
    defects: list[tuple[str, str]] = field(default_factory=list)
    deleted: bool = False
    locked: bool = False  # the original of a planted copy: keep it as it is
    sibling: Rec | None = None  # the lab-reported eGFR row of a creatinine row

    def month(self) -> tuple[int, int]:
        return self.file_month or month_of(self.report)


# --------------------------------------------------------------------------- population
def build_population(seed: int) -> list[tuple[str, str, int, int]]:
    rng = random.Random(f"{seed}:population")
    rows = []
    for code, _name, size, tilt in DISTRICTS:
        shares = [BAND_SHARE[i] * math.exp(tilt * (i - 8.5) / 8.5) for i in range(18)]
        total = sum(shares)
        for sex in ("F", "M"):
            for i in range(18):
                p = MALE_SHARE[i] if sex == "M" else 1 - MALE_SHARE[i]
                expected = size * shares[i] / total * p
                rows.append((code, sex, i, max(0, round(expected * math.exp(rng.gauss(0, 0.06))))))
    return rows


def test_weight(age: float) -> float:
    if age < 2:
        return 0.03
    if age < 18:
        return 0.10 + 0.01 * age
    return 0.08 + 0.45 / (1 + math.exp(-(age - 55) / 9))


def build_persons(seed: int, population) -> list[Person]:
    rng = random.Random(f"{seed}:persons")
    slots = []
    for code, sex, band, n in population:
        for _ in range(n):
            if band < 17:
                age = 5 * band + rng.random() * 5
            else:
                age = 85 + min(rng.expovariate(1 / 4.5), 14.9)
            slots.append((code, sex, age))
    adults = [s for s in slots if s[2] >= 18]
    children = [s for s in slots if s[2] < 18]
    chosen = weighted_pick(rng, adults, [test_weight(s[2]) for s in adults], N_ADULTS)
    chosen += weighted_pick(rng, children, [test_weight(s[2]) for s in children], N_CHILDREN)
    chosen.sort(key=lambda s: (s[0], s[1], s[2]))
    rng.shuffle(chosen)
    persons, tokens = [], set()
    for i, (code, sex, age) in enumerate(chosen):
        while True:
            token = f"WF-{rng.getrandbits(32):08x}"
            if token not in tokens:
                tokens.add(token)
                break
        birth = REFERENCE_DATE - timedelta(days=int(age * 365.25))
        reported = "U" if rng.random() < 0.005 else sex
        persons.append(Person(i, token, code, sex, reported, birth, age, age < 18))
    return persons


# --------------------------------------------------------------------------- clinical
def assign_clinical(seed: int, persons: list[Person]) -> None:
    rng = random.Random(f"{seed}:clinical")
    adults = [p for p in persons if not p.is_child]
    kids = [p for p in persons if p.is_child and p.age_ref >= 5]
    n = len(persons)

    def logistic(x):
        return 1 / (1 + math.exp(-x))

    for p in weighted_pick(rng, kids, [1.0] * len(kids), 3):
        p.diabetes = True
    n_dm_adult = round(0.12 * n) - 3
    dm_weights = [logistic((p.age_ref - 52) / 9) + 0.04 for p in adults]
    for p in weighted_pick(rng, adults, dm_weights, n_dm_adult):
        p.diabetes = True

    def pick_group(count, weight_fn, group):
        pool = [p for p in adults if p.group == "normal"]
        for p in weighted_pick(rng, pool, [weight_fn(p) for p in pool], count):
            p.group = group

    pick_group(
        round(0.005 * n),
        lambda p: logistic((p.age_ref - 62) / 8) * (2.5 if p.diabetes else 1),
        "kidney_failure",
    )
    pick_group(
        round(0.03 * n),
        lambda p: logistic((p.age_ref - 60) / 9) * (2.0 if p.diabetes else 1),
        "decline",
    )
    pick_group(
        round(0.062 * len(adults)),
        lambda p: logistic((p.age_ref - 70) / 6) * (1.8 if p.diabetes else 1),
        "stable_low",
    )
    normal = [p for p in adults if p.group == "normal"]
    alb_weights = [
        (4.0 if p.diabetes else 1.0) * (0.3 + logistic((p.age_ref - 60) / 10)) for p in normal
    ]
    for p in weighted_pick(rng, normal, alb_weights, round(0.042 * len(adults))):
        p.albuminuric = True
    normal = [p for p in adults if p.group == "normal"]
    aki_weights = [0.2 + logistic((p.age_ref - 65) / 8) for p in normal]
    for p in weighted_pick(rng, normal, aki_weights, round(0.02 * len(adults))):
        p.aki_day = rng.randint(30, PERIOD_DAYS - 60)
        p.aki_dip = rng.uniform(0.35, 0.6)

    for p in persons:
        if p.is_child:
            p.child_factor = math.exp(rng.gauss(0, 0.08))
        age = p.age_ref
        mu = 118 - 0.9 * max(0.0, age - 25)
        if p.group == "normal":
            p.base_egfr = clamp(rng.gauss(mu, 11), 64, 132)
            p.slope = clamp(rng.gauss(-1.0, 0.7), -3.0, 1.0)
            if p.base_egfr + 2 * p.slope < 61.5:
                p.slope = (61.5 - p.base_egfr) / 2
        elif p.group == "stable_low":
            u = rng.random()
            if u < 0.65:
                p.base_egfr = rng.uniform(45, 57)
            elif u < 0.93:
                p.base_egfr = rng.uniform(30, 45)
            else:
                p.base_egfr = rng.uniform(17, 30)
            p.slope = clamp(rng.gauss(-1.5, 1.5), -5.0, 1.0)
            if p.base_egfr + 2 * p.slope < 16:
                p.slope = (16 - p.base_egfr) / 2
            p.albuminuric = rng.random() < 0.35
        elif p.group == "decline":
            p.base_egfr = clamp(rng.gauss(mu, 12), 50, min(110, mu + 10) if mu + 10 > 50 else 55)
            p.end_egfr = p.base_egfr * (1 - rng.uniform(0.42, 0.68))
            if rng.random() < 0.5:  # gradual decline
                p.t1 = rng.randint(0, 60)
                p.t2 = rng.randint(400, 600)
            else:  # step after an injury that does not recover
                p.t1 = rng.randint(90, 520)
                p.t2 = p.t1 + rng.randint(0, 30)
            p.albuminuric = rng.random() < 0.4
        elif p.group == "kidney_failure":
            p.base_egfr = rng.uniform(13.5, 22)
            p.end_egfr = rng.uniform(6, 11)
            p.albuminuric = rng.random() < 0.75
        # urine albumin-to-creatinine ratio, mg/g: person-level median
        if p.albuminuric:
            if rng.random() < 0.85:
                p.acr_logmed = math.log(rng.uniform(35, 280))
            else:
                p.acr_logmed = math.log(rng.uniform(320, 2000))
        elif p.diabetes:
            p.acr_logmed = min(rng.gauss(math.log(10), 0.7), math.log(24))
        else:
            p.acr_logmed = min(rng.gauss(math.log(7), 0.6), math.log(22))
        if p.diabetes:
            p.hba1c_mean = min(6.9 + rng.expovariate(1 / 0.9), 12.0)
            p.acr_screened = rng.random() < 0.6
        else:
            p.hba1c_mean = clamp(rng.gauss(5.45, 0.3), 4.6, 6.2)


# --------------------------------------------------------------------------- encounters
def shift_weekend(rng: random.Random, day: int) -> int:
    wd = day_to_date(day).weekday()
    if wd >= 5 and rng.random() < 0.75:
        forward = day + (7 - wd)
        return forward if forward < PERIOD_DAYS else day - (wd - 4)
    return day


def encounter_days(rng: random.Random, p: Person) -> list[int]:
    def uniform_days(k, lo=0, hi=PERIOD_DAYS - 1):
        return [shift_weekend(rng, rng.randint(lo, hi)) for _ in range(k)]

    if p.group == "kidney_failure":
        k = rng.randint(7, 10)
        step = PERIOD_DAYS / k
        return sorted(
            min(PERIOD_DAYS - 1, int(i * step + rng.random() * step * 0.8)) for i in range(k)
        )
    if p.group == "decline":
        post_lo = p.t2 + 7
        days = uniform_days(rng.randint(2, 3), 0, max(p.t1, 20))
        if p.t2 - p.t1 > 30:
            days += uniform_days(rng.randint(1, 2), p.t1 + 1, p.t2 - 1)
        post = uniform_days(rng.randint(3, 5), min(post_lo, PERIOD_DAYS - 60), PERIOD_DAYS - 5)
        post.sort()
        if post[-1] - post[0] <= 28:
            post[-1] = min(PERIOD_DAYS - 1, post[0] + 35 + rng.randint(0, 20))
        return sorted(days + post)
    if p.is_child:
        weights = [55, 25, 10, 5, 3, 2]
    elif p.group == "stable_low":
        weights = [0, 0, 22, 24, 20, 13, 9, 6, 4, 2]
    elif p.diabetes:
        weights = [10, 17, 20, 17, 13, 9, 6, 4, 2, 2]
    else:
        weights = [40, 26, 14, 8, 4, 3, 2, 1, 1, 1]
    k = rng.choices(range(1, len(weights) + 1), weights)[0]
    if p.albuminuric:
        k = max(k, 3)
    days = sorted(uniform_days(k))
    if (p.group == "stable_low" or p.albuminuric) and days[-1] - days[0] <= 120:
        days[-1] = min(PERIOD_DAYS - 1, days[0] + 150 + rng.randint(0, 200))
        if days[-1] - days[0] <= 120:
            days[0] = max(0, days[-1] - 150 - rng.randint(0, 200))
        days.sort()
    if p.aki_day is not None:
        days += [p.aki_day] + ([p.aki_day + rng.randint(1, 3)] if rng.random() < 0.5 else [])
        if max(days) <= p.aki_day + 10:
            days.append(min(PERIOD_DAYS - 1, p.aki_day + rng.randint(40, 200)))
        days.sort()
    return days


def report_delay(rng: random.Random, lab: str, analyte: str) -> int:
    if analyte in ("acr", "u_albumin", "u_creatinine"):
        d = rng.choice([0, 1, 1, 2, 2, 3, 4, 5])
    elif analyte == "hba1c":
        d = rng.choice([0, 1, 1, 2, 3])
    else:
        d = rng.choice([0, 0, 0, 0, 0, 0, 1, 1, 1, 2])
    if lab == C_LAB:
        d += rng.choice([0, 0, 1])
    if lab == F_LAB:
        d = max(1, d + rng.choice([0, 1, 2]))
    return min(d, 5)


def child_height(rng: random.Random, p: Person, age: float) -> float:
    if age < 1:
        h = 50 + 25 * age
    elif age < 2:
        h = 75 + 12 * (age - 1)
    else:
        h = 87 + 6.2 * (age - 2)
    h = min(h, 176 if p.sex == "M" else 164)
    return round(h + rng.gauss(0, 3.5), 1)


def simulate_results(seed: int, persons: list[Person]) -> list[Result]:
    rng = random.Random(f"{seed}:results")
    results: list[Result] = []
    spec_seq = [0]

    def new_specimen(lab, kind, day, p):
        spec_seq[0] += 1
        return Specimen(lab, kind, day, p, spec_seq[0])

    for p in persons:
        days = encounter_days(rng, p)
        # laboratories: a primary one by district, a second (and third) for some
        lw = LAB_WEIGHTS[p.district]
        primary = rng.choices(LABS, lw)[0]
        p.labs = [primary]
        if len(days) >= 2 and rng.random() < 0.36:
            others = [lab for lab in LABS if lab != primary]
            p.labs.append(rng.choices(others, [lw[LABS.index(x)] for x in others])[0])
            if len(days) >= 4 and rng.random() < 0.15:
                p.labs.append([lab for lab in others if lab not in p.labs][0])
        enc_lab = [primary] * len(days)
        if len(p.labs) > 1:
            slots = rng.sample(range(len(days)), len(p.labs) - 1)
            for lab, s in zip(p.labs[1:], slots, strict=False):
                enc_lab[s] = lab
            for i in range(len(days)):
                if i not in slots and rng.random() < 0.3:
                    enc_lab[i] = rng.choice(p.labs[1:])
        encounters = list(zip(days, enc_lab, strict=False))
        # same-day repeats (a second specimen, at another lab when the person uses one)
        for day, lab in list(encounters):
            if rng.random() < 0.015:
                other = [x for x in p.labs if x != lab]
                encounters.append((day, rng.choice(other) if other else lab))
        # diabetes check-ups with HbA1c but no creatinine
        extra_hba1c = []
        if p.diabetes:
            for _ in range(rng.choice([0, 0, 1, 1, 2, 3])):
                day = shift_weekend(rng, rng.randint(0, PERIOD_DAYS - 1))
                extra_hba1c.append((day, rng.choice(p.labs)))
        # screened people with diabetes: at least one ACR in the last year
        urine_days = []
        for day, lab in encounters:
            if p.is_child:
                q = 0.01
            elif p.diabetes:
                q = 0.55 if p.acr_screened else 0.06
            elif p.albuminuric or p.group != "normal":
                q = 0.4
            else:
                q = 0.05
            if rng.random() < q:
                urine_days.append((day, lab))
        if p.diabetes and p.acr_screened and not any(d >= LAST_YEAR_START for d, _ in urine_days):
            late = [(d, lab) for d, lab in encounters if d >= LAST_YEAR_START]
            if late:
                urine_days.append(rng.choice(late))
            else:
                day = shift_weekend(rng, rng.randint(LAST_YEAR_START, PERIOD_DAYS - 8))
                lab = rng.choice(p.labs)
                encounters.append((day, lab))
                urine_days.append((day, lab))
        seen_creatinine_for_repeat = set()
        hba1c_done = False
        for n_enc, (day, lab) in enumerate(sorted(encounters)):
            d = day_to_date(day)
            age = p.age_on(d)
            spec = new_specimen(lab, "serum", day, p)
            repeat = (day, lab) in seen_creatinine_for_repeat
            seen_creatinine_for_repeat.add((day, lab))
            cr = p.true_creatinine(day) * math.exp(rng.gauss(0, 0.045))
            height = None
            if p.is_child and lab == W_LAB and rng.random() < 0.85:
                height = child_height(rng, p, age)
            rd = day + report_delay(rng, lab, "creatinine")
            results.append(
                Result(
                    spec,
                    "creatinine",
                    cr,
                    rd,
                    height=height,
                    fr_umol=(lab == F_LAB and rng.random() < 0.15),
                )
            )
            if repeat:
                continue
            q_cys = 0.15 if p.group != "normal" else 0.04
            if not p.is_child and lab != F_LAB and rng.random() < q_cys:
                cys = cystatin_from_egfr_2012(p.true_egfr(day), age, p.female)
                cys *= math.exp(rng.gauss(0, 0.06))
                rd = day + report_delay(rng, lab, "cystatin_c")
                results.append(Result(spec, "cystatin_c", cys, rd))
            q_a1c = 0.75 if p.diabetes else (0.02 if p.is_child else 0.12)
            last_chance = p.diabetes and not hba1c_done and n_enc == len(encounters) - 1
            if rng.random() < q_a1c or last_chance:
                value = hba1c_value(rng, p)
                results.append(Result(spec, "hba1c", value, day + report_delay(rng, lab, "hba1c")))
                hba1c_done = True
            if not p.is_child and lab != F_LAB and rng.random() < (0.35 if p.diabetes else 0.11):
                fasting = rng.random() < 0.6
                if fasting or lab == W_LAB:
                    value = glucose_value(rng, p, fasting)
                    rd = day + report_delay(rng, lab, "glucose")
                    flag = "Y" if fasting else "N"
                    results.append(Result(spec, "glucose", value, rd, fasting=flag))
        for day, lab in sorted(extra_hba1c):
            spec = new_specimen(lab, "serum", day, p)
            value = hba1c_value(rng, p)
            results.append(Result(spec, "hba1c", value, day + report_delay(rng, lab, "hba1c")))
        for day, lab in sorted(urine_days):
            spec = new_specimen(lab, "urine", day, p)
            acr = math.exp(p.acr_logmed + rng.gauss(0, 0.3))
            if p.aki_day is not None and 0 <= day - p.aki_day <= 10:
                acr *= 3
            if lab == W_LAB and rng.random() < 0.12:
                ucr = math.exp(rng.gauss(math.log(110), 0.45))  # mg/dL
                alb = acr * ucr / 100  # mg/L, so that 100 * alb / ucr = ACR mg/g
                rd = day + report_delay(rng, lab, "u_albumin")
                results.append(Result(spec, "u_albumin", alb, rd))
                results.append(Result(spec, "u_creatinine", ucr, rd))
            else:
                results.append(Result(spec, "acr", acr, day + report_delay(rng, lab, "acr")))
    return results


def hba1c_value(rng: random.Random, p: Person) -> float:
    if p.diabetes:
        return clamp(p.hba1c_mean + rng.gauss(0, 0.35), 5.6, 14.5)
    return clamp(p.hba1c_mean + rng.gauss(0, 0.12), 4.4, 6.4)


def glucose_value(rng: random.Random, p: Person, fasting: bool) -> float:
    if p.diabetes:
        g = rng.gauss(150, 30)
    else:
        g = clamp(rng.gauss(92, 8), 68, 124)
    if not fasting:
        g += abs(rng.gauss(25, 15))
    return max(60.0, g)


# --------------------------------------------------------------------------- specimen ids
def assign_specimen_ids(seed: int, results: list[Result], persons: list[Person]) -> None:
    rng = random.Random(f"{seed}:specimens")
    specs: dict[int, Specimen] = {}
    for r in results:
        specs.setdefault(r.specimen.seq, r.specimen)
    by_lab: dict[str, list[Specimen]] = {lab: [] for lab in LABS}
    for s in specs.values():
        by_lab[s.lab].append(s)
    starts = {W_LAB: 241100000, C_LAB: 3100000, F_LAB: 24110000}
    for lab in LABS:
        n = starts[lab]
        for s in sorted(by_lab[lab], key=lambda s: (s.day, s.seq)):
            n += rng.randint(1, 6)
            s.sid = {W_LAB: f"WGH{n:09d}", C_LAB: f"CV-{n:07d}", F_LAB: f"FR{n:08d}"}[lab]
    # Fallowmere's own patient ids, numbered in order of first contact
    first: dict[int, int] = {}
    for s in by_lab[F_LAB]:
        first[s.person.idx] = min(first.get(s.person.idx, 10**6), s.day)
    n = 100
    for idx in sorted(first, key=lambda i: (first[i], i)):
        n += rng.randint(1, 3)
        persons[idx].fr_id = f"fr-{n:06d}"
        persons[idx].fr_has_token = rng.random() >= 0.03


# --------------------------------------------------------------------------- formatting
def w_value(analyte: str, v: float) -> tuple[str, str]:
    if analyte == "creatinine":
        return ("<0.2" if v < 0.195 else f"{v:.2f}", "mg/dL")
    if analyte == "acr":
        return ("<3" if v < 3 else f"{v:.1f}", "mg/g")
    if analyte == "hba1c":
        return (f"{v:.1f}", "%")
    if analyte == "glucose":
        return (f"{round(v)}", "mg/dL")
    if analyte == "cystatin_c":
        return (f"{v:.2f}", "mg/L")
    if analyte == "u_albumin":
        return ("<3" if v < 3 else f"{v:.1f}", "mg/L")
    if analyte == "u_creatinine":
        return (f"{v:.1f}", "mg/dL")
    raise ValueError(analyte)


def c_value(analyte: str, v: float) -> tuple[str, str]:
    if analyte == "creatinine":
        return (f"{round(v * 88.4)}", "µmol/l")
    if analyte == "acr":
        m = v / 8.84
        return ("<0,3" if m < 0.3 else comma(f"{m:.1f}"), "mg/mmol")
    if analyte == "hba1c":
        return (f"{round((v - 2.152) / 0.09148)}", "mmol/mol")
    if analyte == "glucose":
        return (comma(f"{v / 18.016:.1f}"), "mmol/l")
    if analyte == "cystatin_c":
        return (comma(f"{v:.2f}"), "mg/l")
    raise ValueError(analyte)


def f_quantity(analyte: str, v: float, umol: bool) -> dict:
    if analyte == "creatinine":
        if umol:
            return {
                "code": "14682-9",
                "value": round(v * 88.4),
                "comparator": None,
                "unit": "umol/L",
            }
        return {"code": "2160-0", "value": round(v, 2), "comparator": None, "unit": "mg/dL"}
    if analyte == "acr":
        if v < 3:
            return {"code": "9318-7", "value": 3, "comparator": "<", "unit": "mg/g"}
        return {"code": "9318-7", "value": round(v, 1), "comparator": None, "unit": "mg/g"}
    if analyte == "hba1c":
        return {"code": "4548-4", "value": round(v, 1), "comparator": None, "unit": "%"}
    raise ValueError(analyte)


def build_records(seed: int, results: list[Result]) -> dict[str, list[Rec]]:
    rng = random.Random(f"{seed}:records")
    recs: dict[str, list[Rec]] = {lab: [] for lab in LABS}
    seq = 0
    end_day = PERIOD_DAYS - 1
    by_spec_cr: dict[str, Rec] = {}
    ordered = sorted(results, key=lambda r: (r.specimen.sid, TEST_ORDER[r.analyte]))
    for r in ordered:
        if r.report_day > end_day:
            continue  # reported after the last extract was cut
        s, p = r.specimen, r.specimen.person
        lab = s.lab
        if lab == F_LAB and r.analyte not in ("creatinine", "acr", "hba1c"):
            continue
        seq += 1
        collected = day_to_date(s.day)
        report = day_to_date(r.report_day)
        rec = Rec(lab, p, r.analyte, r.value, collected, report, s.sid, seq)
        if lab == W_LAB:
            val, unit = w_value(r.analyte, r.value)
            rec.f = {
                "token": p.token,
                "birth_year": str(p.birth_date.year),
                "sex": p.sex_reported,
                "district": p.district,
                "specimen": s.sid,
                "collected": collected.isoformat(),
                "code": W_CODES[r.analyte],
                "value": val,
                "unit": unit,
                "status": "final",
                "height": "" if r.height is None else f"{r.height:.1f}",
                "reported": report.isoformat(),
                "fasting": r.fasting if r.analyte == "glucose" else "",
            }
        elif lab == C_LAB:
            val, unit = c_value(r.analyte, r.value)
            rec.f = {
                "token": p.token,
                "birth_year": str(p.birth_date.year),
                "sex": p.sex_reported,
                "district": p.district,
                "specimen": s.sid,
                "collected": dmy(collected),
                "code": C_CODES[r.analyte],
                "value": val,
                "unit": unit,
                "status": "F",
                "reported": dmy(report),
            }
        else:
            q = f_quantity(r.analyte, r.value, r.fr_umol)
            rec.obs = {
                "code_system": LOINC,
                "code": q.pop("code"),
                "effective": collected.isoformat(),
                "quantity": q,
                "string": None,
            }
            hh, mm = rng.randint(6, 19), rng.randint(0, 59)
            rec.issued = f"{report.isoformat()}T{hh:02d}:{mm:02d}:00Z"
        recs[lab].append(rec)
        if r.analyte == "creatinine":
            by_spec_cr[s.sid] = rec
        # lab-reported eGFR on most adult creatinine specimens
        if r.analyte == "creatinine" and lab in (W_LAB, C_LAB) and not p.is_child:
            age = p.age_on(collected)
            if age >= 18 and rng.random() < 0.9:
                seq += 1
                e = Rec(lab, p, "egfr", 0.0, collected, report, s.sid, seq)
                e.f = dict(rec.f)
                if lab == W_LAB:
                    scr = float(rec.f["value"])
                    g = egfr_ckd_epi_2021(scr, age, p.female)
                    e.f.update(
                        code=W_CODES["egfr"],
                        value=">90" if g > 90 else f"{round(g)}",
                        unit="mL/min/{1.73_m2}",
                        height="",
                    )
                else:  # the chain still reports with the 2009 equation, unrounded at 90
                    scr = int(rec.f["value"]) / 88.4
                    g = egfr_ckd_epi_2009(scr, age, p.female)
                    e.f.update(code=C_CODES["egfr"], value=f"{round(g)}", unit="ml/min/1.73m2")
                e.value = g
                rec.sibling = e
                recs[lab].append(e)
    return recs


# --------------------------------------------------------------------------- defects
class Planter:
    """Mixes realistic defects and reporting events into one lab's records."""

    def __init__(self, rng: random.Random, lab: str, recs: list[Rec]):
        self.rng, self.lab, self.recs = rng, lab, recs
        self.seq = max(r.seq for r in recs) + 1
        self.last_month = month_of(PERIOD_END)

    def candidates(self, analytes=None, where=None) -> list[Rec]:
        out = []
        for r in self.recs:
            if r.deleted or r.locked or r.defects or r.status != "final":
                continue
            if r.file_month is not None:  # a planted copy
                continue
            if r.sibling is not None and (r.sibling.locked or r.sibling.defects):
                continue
            if analytes and r.analyte not in analytes:
                continue
            if where and not where(r):
                continue
            out.append(r)
        return out

    def pick(self, n, analytes=None, where=None) -> list[Rec]:
        pool = self.candidates(analytes, where)
        return self.rng.sample(pool, min(n, len(pool)))

    def copy(self, r: Rec, **changes) -> Rec:
        self.seq += 1
        c = Rec(
            r.lab,
            r.person,
            r.analyte,
            r.value,
            r.collected,
            r.report,
            r.spec_sid,
            self.seq,
            f=dict(r.f),
            obs={k: (dict(v) if isinstance(v, dict) else v) for k, v in r.obs.items()},
            issued=r.issued,
            file_month=r.file_month,
            status=r.status,
        )
        for k, v in changes.items():
            setattr(c, k, v)
        r.locked = True
        self.recs.append(c)
        return c

    def later(self, r: Rec, lo: int, hi: int) -> date | None:
        d = r.report + timedelta(days=self.rng.randint(lo, hi))
        return d if d <= PERIOD_END else None

    def drop_sibling(self, r: Rec) -> None:
        if r.sibling is not None:
            r.sibling.deleted = True

    def mark(self, r: Rec, kind: str, detail: str = "") -> None:
        r.defects.append((kind, detail))


def set_report(r: Rec, d: date, rng: random.Random) -> None:
    r.report = d
    if r.lab == W_LAB:
        r.f["reported"] = d.isoformat()
    elif r.lab == C_LAB:
        r.f["reported"] = dmy(d)
    else:
        r.issued = f"{d.isoformat()}T{rng.randint(6, 19):02d}:{rng.randint(0, 59):02d}:00Z"


def set_status(r: Rec, status: str) -> None:
    r.status = status
    if r.lab == W_LAB:
        r.f["status"] = W_STATUS[status]
    elif r.lab == C_LAB:
        r.f["status"] = C_STATUS[status]


def revalue(r: Rec, v: float) -> None:
    r.value = v
    if r.lab == W_LAB:
        r.f["value"], r.f["unit"] = w_value(r.analyte, v)
    elif r.lab == C_LAB:
        r.f["value"], r.f["unit"] = c_value(r.analyte, v)
    else:
        umol = r.obs["code"] == "14682-9"
        q = f_quantity(r.analyte, v, umol)
        r.obs["code"] = q.pop("code")
        r.obs["quantity"] = q


def plant_events(pl: Planter, scale: float) -> None:
    """Reporting events of every lab: duplicates, resends, amendments, cancels, preliminaries."""
    rng = pl.rng

    def n(x):
        return max(1, round(x * scale))

    def changed_value(r):
        for _ in range(20):
            f = rng.choice([rng.uniform(0.8, 0.93), rng.uniform(1.07, 1.25)])
            v = r.value * f
            old = (r.f.get("value"), r.obs.get("quantity", {}).get("value") if r.obs else None)
            probe = Rec(
                r.lab,
                r.person,
                r.analyte,
                v,
                r.collected,
                r.report,
                r.spec_sid,
                0,
                f=dict(r.f),
                obs=dict(r.obs),
            )
            revalue(probe, v)
            new_q = probe.obs.get("quantity", {}).get("value") if probe.obs else None
            new = (probe.f.get("value"), new_q)
            if new != old:
                return v
        return r.value * 1.3

    amendable = ("creatinine", "acr", "hba1c")

    def numeric(r):
        if r.lab == F_LAB:
            return r.obs["quantity"] is not None and r.obs["quantity"]["comparator"] is None
        return r.f["value"][:1].isdigit()

    for r in pl.pick(n(30), amendable, numeric):
        d = pl.later(r, 1, 20)
        if d is None:
            continue
        c = pl.copy(r)
        set_status(c, "amended")
        set_report(c, d, rng)
        revalue(c, changed_value(r))
        pl.mark(c, "amended", f"amends {r.spec_sid} {r.analyte}")
    for r in pl.pick(n(10), amendable):
        d = pl.later(r, 1, 15)
        if d is None:
            continue
        c = pl.copy(r)
        set_status(c, "cancelled")
        set_report(c, d, rng)
        if pl.lab == W_LAB:
            c.f["value"] = ""
        elif pl.lab == F_LAB:
            c.obs["quantity"] = None
        pl.mark(c, "cancelled", f"cancels {r.spec_sid} {r.analyte}")
    for r in pl.pick(n(15), amendable, numeric):
        d = pl.later(r, 1, 4)
        if d is None:
            continue
        c = pl.copy(r)
        set_report(c, d, rng)
        set_status(r, "preliminary")
        if r.analyte == "acr" and rng.random() < 0.5:
            revalue(c, changed_value(r))
        pl.mark(r, "preliminary_then_final", f"final follows for {r.spec_sid} {r.analyte}")
        pl.mark(c, "final_after_preliminary", f"finalises {r.spec_sid} {r.analyte}")
    for r in pl.pick(2, amendable):
        set_status(r, "preliminary")
        pl.mark(r, "preliminary_never_final", f"{r.spec_sid} {r.analyte}")
    if pl.lab == C_LAB:
        for r in pl.pick(2, amendable):
            d = pl.later(r, 1, 10)
            if d is None:
                continue
            c = pl.copy(r)
            set_status(c, "entered-in-error")
            set_report(c, d, rng)
            pl.mark(c, "entered_in_error", f"withdraws {r.spec_sid} {r.analyte}")
    for r in pl.pick(n(8)):
        c = pl.copy(r, file_month=r.month())
        pl.mark(c, "duplicate_in_file", f"copy of {r.spec_sid} {r.analyte}")
    for r in pl.pick(n(15), where=lambda r: r.month() < pl.last_month):
        c = pl.copy(r, file_month=next_month(r.month()))
        pl.mark(c, "resent_next_file", f"resent {r.spec_sid} {r.analyte}")


def plant_csv_defects(pl: Planter, scale: float) -> None:
    """Value, unit, code, date and demographic defects of the two delimited labs."""
    rng, lab = pl.rng, pl.lab
    is_w = lab == W_LAB

    def n(x):
        return max(1, round(x * scale))

    for r in pl.pick(n(25), ("creatinine", "acr", "hba1c", "glucose")):
        r.f["value"] = ""
        pl.drop_sibling(r)
        pl.mark(r, "value_blank")
    for text, analytes, k in (
        ("see note", ("creatinine", "hba1c", "acr"), 12),
        ("haemolysed", ("creatinine",), 20),
        ("ND", ("acr",), 8),
    ):
        for r in pl.pick(n(k), analytes):
            r.f["value"] = text
            pl.drop_sibling(r)
            pl.mark(r, "value_text", text)
    adult = lambda r: not r.person.is_child  # noqa: E731
    if is_w:
        for r in pl.pick(n(12), ("creatinine",), adult):
            r.f["value"] = f"{round(r.value * 88.4)}"  # umol/L number under a mg/dL label
            pl.mark(r, "unit_mislabel", "umol/L value labelled mg/dL")
        for r in pl.pick(n(8), ("creatinine",), adult):
            r.f["value"], r.f["unit"] = f"{r.value * 0.0884:.3f}", "mmol/L"
            pl.mark(r, "unexpected_unit", "creatinine in mmol/L")
        for r in pl.pick(n(8), ("acr",), lambda r: r.f["value"][0].isdigit()):
            r.f["unit"] = "mg/L"
            pl.mark(r, "unexpected_unit", "ACR labelled mg/L")
        codes = ["CREAT", "2160-O"]
    else:
        for r in pl.pick(n(8), ("creatinine",), adult):
            r.f["value"] = comma(f"{r.value:.2f}")  # a mg/dL number under the umol/L label
            pl.mark(r, "unit_mislabel", "mg/dL value labelled µmol/l")
        for r in pl.pick(n(6), ("acr",), lambda r: r.f["value"][0].isdigit()):
            r.f["unit"] = "mg/l"
            pl.mark(r, "unexpected_unit", "ACR labelled mg/l")
        for r in pl.pick(n(5), ("acr", "cystatin_c", "glucose"), lambda r: "," in r.f["value"]):
            r.f["value"] = r.f["value"].replace(",", ".")
            pl.mark(r, "decimal_point", "decimal point in a decimal-comma file")
        codes = ["KREA", "CRE2"]
    for i, r in enumerate(pl.pick(n(10), ("creatinine",))):
        r.f["code"] = codes[i % 2]
        pl.drop_sibling(r)
        pl.mark(r, "unknown_test_code", codes[i % 2])
    for i, r in enumerate(pl.pick(n(5))):
        y = r.collected.year
        if is_w:
            r.f["collected"] = f"{y}-02-{30 + i % 2}" if i % 3 else r.collected.strftime("%d/%m/%Y")
        else:
            r.f["collected"] = f"{30 + i % 2}/02/{y}" if i % 3 else r.collected.isoformat()
        pl.mark(r, "date_unparsable", r.f["collected"])
    for r in pl.pick(n(4)):
        fut = r.collected.replace(year=r.collected.year + 1)
        r.f["collected"] = fut.isoformat() if is_w else dmy(fut)
        pl.mark(r, "date_future", "collected a year after the file was cut")
    for r in pl.pick(n(4)):
        r.f["birth_year"] = str(r.collected.year + rng.randint(1, 3))
        pl.mark(r, "birth_year_after_collection")
    for r in pl.pick(n(3)):
        r.f["birth_year"] = "1890"
        pl.mark(r, "birth_year_implausible")
    for r in pl.pick(n(3), ("creatinine",), adult):
        r.f["value"] = "45.00" if is_w else "3978"  # 45 mg/dL
        pl.drop_sibling(r)
        pl.mark(r, "value_out_of_range", "creatinine 45 mg/dL")
    if is_w:
        for r in pl.pick(4, ("creatinine",), lambda r: r.person.is_child):
            r.f["value"] = "<0.2"
            pl.mark(r, "censored_value", "<0.2")
        for r in pl.pick(8, ("acr",), lambda r: r.value >= 300):
            r.f["value"] = ">=300"
            pl.mark(r, "censored_value", ">=300")
    for r in pl.pick(n(5)):
        r.f["district"] = "WF99"
        pl.mark(r, "unknown_district", "WF99")


def plant_fhir_defects(pl: Planter, scale: float, patient_overrides: dict) -> None:
    rng = pl.rng

    def n(x):
        return max(1, round(x * scale))

    def numeric(r):
        return r.obs["quantity"] is not None and r.obs["quantity"]["comparator"] is None

    for text, k in (("haemolysed", 8), ("see note", 3)):
        for r in pl.pick(n(k), ("creatinine",), numeric):
            r.obs["quantity"], r.obs["string"] = None, text
            pl.mark(r, "value_text", text)
    for r in pl.pick(n(5), ("creatinine", "acr", "hba1c"), numeric):
        r.obs["quantity"] = None
        pl.mark(r, "value_blank", "no value[x]")
    mg = lambda r: numeric(r) and r.obs["code"] == "2160-0" and not r.person.is_child  # noqa: E731
    for r in pl.pick(n(4), ("creatinine",), mg):
        r.obs["quantity"]["value"] = round(r.value * 88.4)
        pl.mark(r, "unit_mislabel", "umol/L value labelled mg/dL")
    for r in pl.pick(n(3), ("creatinine",), mg):
        r.obs["quantity"].update(value=round(r.value * 88.4), unit="umol/L")
        pl.mark(r, "unit_code_mismatch", "2160-0 (mass) with umol/L")
    for r in pl.pick(n(3), ("acr",), numeric):
        r.obs["quantity"]["unit"] = "mg/L"
        pl.mark(r, "unexpected_unit", "ACR in mg/L")
    for r in pl.pick(n(4), ("creatinine",), mg):
        r.obs["code_system"], r.obs["code"] = "urn:fallowmere:local-test-code", "CREA-S"
        pl.mark(r, "unknown_test_code", "local code CREA-S")
    for r in pl.pick(n(3)):
        r.obs["effective"] = f"{r.collected.year}-02-31"
        pl.mark(r, "date_unparsable", r.obs["effective"])
    for r in pl.pick(n(2)):
        r.obs["effective"] = r.collected.replace(year=r.collected.year + 1).isoformat()
        pl.mark(r, "date_future", "collected a year after the export")
    for r in pl.pick(n(2), ("creatinine",), mg):
        r.obs["quantity"]["value"] = 45.0
        pl.mark(r, "value_out_of_range", "creatinine 45 mg/dL")
    for r in pl.pick(3, ("acr",), lambda r: numeric(r) and r.value >= 300):
        r.obs["quantity"].update(value=300, comparator=">=")
        pl.mark(r, "censored_value", ">=300")
    # patient-level defects, one export each
    kinds = (
        ("birth_year_after_collection", 2),
        ("birth_year_implausible", 2),
        ("unknown_district", 2),
    )
    for kind, k in kinds:
        for r in pl.pick(k):
            key = (r.month(), r.person.fr_id)
            if key in patient_overrides:
                continue
            if kind == "birth_year_after_collection":
                later_year = str(r.collected.year + rng.randint(1, 2))
                patient_overrides[key] = (kind, {"birthDate": later_year})
            elif kind == "birth_year_implausible":
                patient_overrides[key] = (kind, {"birthDate": "1890"})
            else:
                patient_overrides[key] = (kind, {"address": [{"district": "Marrowby"}]})


# --------------------------------------------------------------------------- writing
def month_label(ym: tuple[int, int], sep: str = "-") -> str:
    return f"{ym[0]:04d}{sep}{ym[1]:02d}"


def sort_key(r: Rec):
    return (r.report, r.issued, r.spec_sid, TEST_ORDER[r.analyte], r.seq)


def write_delimited(out: Path, lab: str, recs: list[Rec], manifest: list) -> tuple[int, list[Path]]:
    folder = out / lab
    folder.mkdir(parents=True, exist_ok=True)
    cols = W_COLS if lab == W_LAB else C_COLS
    header = W_HEADER if lab == W_LAB else C_HEADER
    by_month: dict[tuple[int, int], list[Rec]] = {ym: [] for ym in all_months()}
    for r in recs:
        if not r.deleted:
            by_month[r.month()].append(r)
    total, paths = 0, []
    for ym, rows in by_month.items():
        if lab == W_LAB:
            name = f"results_{month_label(ym)}.csv"
        else:
            name = f"export_{month_label(ym, '')}.csv"
        path = folder / name
        rows.sort(key=sort_key)
        with path.open("w", encoding="utf-8", newline="") as fh:
            w = csv.writer(
                fh,
                delimiter="," if lab == W_LAB else ";",
                lineterminator="\n" if lab == W_LAB else "\r\n",
            )
            w.writerow(header)
            for line, r in enumerate(rows, start=2):
                w.writerow([r.f.get(sem, "") for sem in cols])
                for kind, detail in r.defects:
                    manifest.append((lab, f"{lab}/{name}", line, kind, detail))
        total += len(rows)
        paths.append(path)
    return total, paths


def fhir_patient(p: Person, override: dict | None) -> dict:
    pat = {"resourceType": "Patient", "id": p.fr_id}
    if p.fr_has_token:
        pat["identifier"] = [{"system": "urn:westerfold:linkage-token", "value": p.token}]
    pat["gender"] = {"F": "female", "M": "male", "U": "unknown"}[p.sex_reported]
    pat["birthDate"] = str(p.birth_date.year)
    pat["address"] = [{"district": DISTRICT_NAME[p.district]}]
    if override:
        pat.update(override)
    return pat


def fhir_observation(r: Rec, obs_id: str) -> dict:
    o = r.obs
    coding = {"system": o["code_system"], "code": o["code"]}
    if o["code"] in LOINC_DISPLAY and o["code_system"] == LOINC:
        coding["display"] = LOINC_DISPLAY[o["code"]]
    obs = {
        "resourceType": "Observation",
        "id": obs_id,
        "status": r.status,
        "code": {"coding": [coding]},
        "subject": {"reference": f"Patient/{r.person.fr_id}"},
        "specimen": {"reference": f"Specimen/{r.spec_sid}"},
        "effectiveDateTime": o["effective"],
        "issued": r.issued,
    }
    q = o["quantity"]
    if q is not None:
        vq = {"value": q["value"]}
        if q["comparator"]:
            vq["comparator"] = q["comparator"]
        vq.update(unit=q["unit"], system=UCUM, code=q["unit"])
        obs["valueQuantity"] = vq
    elif o["string"] is not None:
        obs["valueString"] = o["string"]
    return obs


def write_fhir(
    out: Path, recs: list[Rec], overrides: dict, manifest: list
) -> tuple[int, list[Path]]:
    folder = out / F_LAB
    # observation ids: one per original result, kept by amendments, cancels and resends
    ids: dict[tuple[str, str], str] = {}
    n = 0
    for r in sorted((r for r in recs if not r.deleted), key=lambda r: (r.report, r.issued, r.seq)):
        key = (r.spec_sid, r.analyte)
        if key not in ids:
            n += 1
            ids[key] = f"fro-{n:08d}"
    by_month: dict[tuple[int, int], list[Rec]] = {ym: [] for ym in all_months()}
    for r in recs:
        if not r.deleted:
            by_month[r.month()].append(r)
    total, paths = 0, []
    for ym, rows in by_month.items():
        d = folder / month_label(ym)
        d.mkdir(parents=True, exist_ok=True)
        rows.sort(key=sort_key)
        patients: dict[str, Person] = {}
        for r in rows:
            patients[r.person.fr_id] = r.person
        with (d / "Patient.ndjson").open("w", encoding="utf-8", newline="") as fh:
            for line, pid in enumerate(sorted(patients), start=1):
                kind_over = overrides.get((ym, pid))
                pat = fhir_patient(patients[pid], kind_over[1] if kind_over else None)
                fh.write(json.dumps(pat, ensure_ascii=False, separators=(",", ":")) + "\n")
                if kind_over:
                    manifest.append(
                        (
                            F_LAB,
                            f"{F_LAB}/{month_label(ym)}/Patient.ndjson",
                            line,
                            kind_over[0],
                            json.dumps(kind_over[1], ensure_ascii=False),
                        )
                    )
        with (d / "Observation.ndjson").open("w", encoding="utf-8", newline="") as fh:
            for line, r in enumerate(rows, start=1):
                obs = fhir_observation(r, ids[(r.spec_sid, r.analyte)])
                fh.write(json.dumps(obs, ensure_ascii=False, separators=(",", ":")) + "\n")
                for kind, detail in r.defects:
                    name = f"{F_LAB}/{month_label(ym)}/Observation.ndjson"
                    manifest.append((F_LAB, name, line, kind, detail))
        total += len(rows)
        paths += [d / "Patient.ndjson", d / "Observation.ndjson"]
    return total, paths


def write_regions(regions_out: Path, population) -> None:
    regions_out.mkdir(parents=True, exist_ok=True)
    with (regions_out / "districts.csv").open("w", encoding="utf-8", newline="") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(["district_code", "district_name"])
        for code, name, _, _ in DISTRICTS:
            w.writerow([code, name])
    with (regions_out / "population.csv").open("w", encoding="utf-8", newline="") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(["district_code", "sex", "age_band", "population"])
        for code, sex, band, n in population:
            w.writerow([code, sex, AGE_BANDS[band], n])


def true_ckd_egfr(p: Person) -> bool:
    """True eGFR below 60 for more than 90 days (KDIGO 2012: more than 3 months)."""
    if p.is_child:
        return False
    run = best = 0
    for day in range(0, PERIOD_DAYS, 7):
        run = run + 7 if p.true_egfr(day) < 60 else 0
        best = max(best, run)
    return best > 90


def write_answer_key(out: Path, persons: list[Person], manifest: list) -> None:
    key = out / "answer_key"
    key.mkdir(parents=True, exist_ok=True)
    short = {W_LAB: "W", C_LAB: "C", F_LAB: "F"}
    with (key / "persons.csv").open("w", encoding="utf-8", newline="") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(
            [
                "person_token",
                "birth_year",
                "sex",
                "district_code",
                "age_on_2025_11_01",
                "kidney_course",
                "ckd_egfr",
                "albuminuria",
                "diabetes",
                "acr_screened",
                "aki",
                "labs",
                "fallowmere_id",
                "fallowmere_linkable",
            ]
        )
        for p in sorted(persons, key=lambda p: p.token):
            w.writerow(
                [
                    p.token,
                    p.birth_date.year,
                    p.sex_reported,
                    p.district,
                    int(p.age_ref),
                    p.group,
                    int(true_ckd_egfr(p)),
                    int(p.albuminuric),
                    int(p.diabetes),
                    int(p.acr_screened),
                    int(p.aki_day is not None),
                    "".join(short[lab] for lab in LABS if lab in p.labs),
                    p.fr_id,
                    "" if not p.fr_id else int(p.fr_has_token),
                ]
            )
    with (key / "defects.csv").open("w", encoding="utf-8", newline="") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(["source", "file", "line", "kind", "detail"])
        for row in sorted(manifest, key=lambda t: (t[1], t[2], t[3])):
            w.writerow(row)


# --------------------------------------------------------------------------- main
def generate(out: Path, seed: int, regions_out: Path) -> str:
    population = build_population(seed)
    persons = build_persons(seed, population)
    assign_clinical(seed, persons)
    results = simulate_results(seed, persons)
    assign_specimen_ids(seed, results, persons)
    recs = build_records(seed, results)
    overrides: dict = {}
    for lab in LABS:
        rng = random.Random(f"{seed}:defects:{lab}")
        pl = Planter(rng, lab, recs[lab])
        scale = len(recs[lab]) / (8000 if lab == F_LAB else 16000)
        plant_events(pl, scale)
        if lab == F_LAB:
            plant_fhir_defects(pl, scale, overrides)
        else:
            plant_csv_defects(pl, scale)
    manifest: list = []
    write_regions(regions_out, population)
    n_w, p_w = write_delimited(out, W_LAB, recs[W_LAB], manifest)
    n_c, p_c = write_delimited(out, C_LAB, recs[C_LAB], manifest)
    n_f, p_f = write_fhir(out, recs[F_LAB], overrides, manifest)
    write_answer_key(out, persons, manifest)
    seen = {lab: {r.person.idx for r in recs[lab] if not r.deleted} for lab in LABS}
    in_any = set().union(*seen.values())
    multi = sum(1 for i in in_any if sum(i in s for s in seen.values()) > 1)
    return (
        f"{len(p_w) + len(p_c) + len(p_f)} extract files; rows: {W_LAB} {n_w}, {C_LAB} {n_c}, "
        f"{F_LAB} {n_f} observations; {len(in_any)} persons ({multi} in more than one lab); "
        f"{len(manifest)} planted rows listed in answer_key/defects.csv"
    )


def main(argv: list[str] | None = None) -> int:
    here = Path(__file__).resolve().parent
    ap = argparse.ArgumentParser(description="Write the invented Westerfold sample lab extracts.")
    ap.add_argument(
        "--out", type=Path, default=here, help="output folder (default: this script's folder)"
    )
    ap.add_argument(
        "--seed", type=int, default=DEFAULT_SEED, help=f"random seed (default {DEFAULT_SEED})"
    )
    ap.add_argument(
        "--regions-out",
        type=Path,
        default=here.parent / "config" / "regions",
        help="folder for districts.csv and population.csv (default: <repo>/config/regions)",
    )
    args = ap.parse_args(argv)
    print(generate(args.out, args.seed, args.regions_out))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
