"""Seeded generator of large standard-layout extracts for the benchmark (invented data only).

Everything written here is made up: Westerfold is a fictional region, and every person token,
specimen and value comes from a seeded random generator. No real person, place or lab is used.

What it writes, for N result rows, under ``<dir>/inbox/westerfold_general_lab/``: one file per
report month, ``results_YYYY-MM.csv``, in the standard extract layout (README, "Standard extract
layout"), over ``--months`` months ending with ``--end-month``. With ``--extra-rows`` it also
writes the following month (``<dir>/extra/westerfold_general_lab/results_YYYY-MM.csv``), for the
incremental measurement; it is kept out of the inbox so that the full run does not see it.

The mix (shares of base rows; amended and cancelled copies come on top, inside N):
- serum creatinine, about 52 %: mg/dL (LOINC 2160-0) or umol/L (14682-9); made by inverting
  the CKD-EPI 2021 creatinine equation (Inker et al., NEJM 2021;385:1737) on a per-person true
  eGFR trajectory with small measurement noise;
- urine ACR (9318-7, mg/g) about 17 %, HbA1c (4548-4, %) about 17 %, cystatin C (33863-2, mg/L,
  from the CKD-EPI 2012 cystatin C equation inverted) about 7 %, protein/creatinine ratio
  (2890-2, mg/g) about 7 %;
- persons with several results over several years (activity varies by person); about 4 % of
  persons lose 40-65 % of their eGFR over a year or two; eGFR also falls with age;
- about 1 % amended copies (later report, same specimen, slightly different value) and 0.3 %
  cancellations (same specimen, no value), and a few censored values (``<3`` mg/g ACR);
- about 0.5 % defective rows: text values, wrong or unknown units, impossible or non-ISO dates.

Everything is vectorised (numpy for the draws, polars for formatting and writing): 10M rows take
well under a minute on 2 cores. The same arguments give byte-identical files.

Usage: python bench/generate.py --rows N --dir DIR [--seed S] [--months M] [--end-month YYYY-MM]
       [--extra-rows K]
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import time
from pathlib import Path

import numpy as np
import polars as pl

SOURCE = "westerfold_general_lab"
HEADER = ["person_token", "birth_year", "sex", "district_code", "specimen_id", "collected_date",
          "test_code", "value", "unit", "status", "height_cm", "reported_at", "fasting"]  # fmt: skip
DISTRICTS = [f"WF{i:02d}" for i in range(1, 13)]
# relative district sizes (invented)
DISTRICT_WEIGHTS = np.array(
    [4200, 900, 5200, 1500, 2600, 4100, 650, 1800, 1100, 420, 2000, 530], float
)
DEFAULT_SEED = 20261031
DEFAULT_END_MONTH = "2026-10"
DEFAULT_MONTHS = 60
#: results per person on average (activity is lognormal, so some persons have many)
RESULTS_PER_PERSON = 14
GENERATOR_VERSION = 1

# test kinds: index -> (LOINC, unit); creatinine comes in two units
KINDS = {
    0: ("2160-0", "mg/dL"),   # creatinine, mass
    1: ("14682-9", "umol/L"),  # creatinine, molar
    2: ("9318-7", "mg/g"),    # urine ACR
    3: ("4548-4", "%"),       # HbA1c
    4: ("33863-2", "mg/L"),   # cystatin C
    5: ("2890-2", "mg/g"),    # urine protein/creatinine ratio
}  # fmt: skip
#: chance that a visit includes the test: creatinine, ACR, HbA1c, cystatin C, PCR
P_CREAT, P_ACR, P_HBA1C, P_CYS, P_PCR = 0.92, 0.30, 0.30, 0.12, 0.12
P_CREAT_MOLAR = 0.35  # share of creatinine reported in umol/L
SHARE_AMENDED, SHARE_CANCELLED, SHARE_DEFECT = 0.010, 0.003, 0.005
SHARE_DECLINING = 0.04
UMOL_PER_MG_DL = 88.4  # creatinine 113.12 g/mol: 1 mg/dL = 88.4 umol/L (config/analytes.yaml)


def _month_start(label: str) -> dt.date:
    y, m = (int(p) for p in label.split("-"))
    return dt.date(y, m, 1)


def _add_months(d: dt.date, n: int) -> dt.date:
    k = d.year * 12 + d.month - 1 + n
    return dt.date(k // 12, k % 12 + 1, 1)


def _epoch_day(d: dt.date) -> int:
    return (d - dt.date(1970, 1, 1)).days


def month_range(end_month: str, months: int) -> tuple[int, int]:
    """First and last epoch day of the ``months`` months ending with ``end_month``."""
    end = _month_start(end_month)
    first = _add_months(end, -(months - 1))
    last = _add_months(end, 1) - dt.timedelta(days=1)
    return _epoch_day(first), _epoch_day(last)


def next_month(label: str) -> str:
    d = _add_months(_month_start(label), 1)
    return f"{d.year:04d}-{d.month:02d}"


# --------------------------------------------------------------------------- equations (inverted)


def creatinine_from_egfr(egfr: np.ndarray, age: np.ndarray, female: np.ndarray) -> np.ndarray:
    """Serum creatinine (mg/dL) giving ``egfr`` by CKD-EPI 2021 (Inker et al., NEJM 2021)."""
    kappa = np.where(female, 0.7, 0.9)
    alpha = np.where(female, -0.241, -0.302)
    at_kappa = 142 * 0.9938**age * np.where(female, 1.012, 1.0)
    r = egfr / at_kappa
    return kappa * np.where(r >= 1, r ** (1 / alpha), r ** (1 / -1.200))


def cystatin_from_egfr(egfr: np.ndarray, age: np.ndarray, female: np.ndarray) -> np.ndarray:
    """Cystatin C (mg/L) giving ``egfr`` by CKD-EPI 2012 cystatin C (Inker et al., NEJM 2012)."""
    at_knot = 133 * 0.996**age * np.where(female, 0.932, 1.0)
    r = egfr / at_knot
    return 0.8 * np.where(r >= 1, r ** (1 / -0.499), r ** (1 / -1.328))


# --------------------------------------------------------------------------- persons


def _hex_tokens(values: np.ndarray) -> np.ndarray:
    """'WF-' + 8 lower-case hex digits of each uint32, vectorised."""
    digits = (values[:, None] >> np.arange(28, -4, -4, dtype=np.uint32)) & 0xF
    chars = np.array(list("0123456789abcdef"))[digits]
    return np.char.add("WF-", np.ascontiguousarray(chars).view("<U8").ravel())


def make_persons(n_persons: int, seed: int, first_day: int, last_day: int) -> pl.DataFrame:
    """The tested population: token, birth year, sex, district, kidney course, activity."""
    rng = np.random.default_rng([seed, 1])
    idx = np.arange(n_persons, dtype=np.uint64)
    # an odd multiplier is a bijection mod 2^32: distinct persons get distinct tokens
    scrambled = ((idx * np.uint64(2654435761) + np.uint64(seed)) % np.uint64(2**32)).astype(
        np.uint32
    )
    ref_year = dt.date(1970, 1, 1).year + int(round((first_day + last_day) / 2 / 365.25))
    age_ref = np.clip(rng.normal(58, 18, n_persons), 3, 98)
    birth_year = (ref_year - age_ref).round().astype(np.int32)
    female_true = rng.random(n_persons) < 0.52
    sex = np.where(female_true, "F", "M").astype(object)
    sex[rng.random(n_persons) < 0.01] = "U"
    district = rng.choice(len(DISTRICTS), n_persons, p=DISTRICT_WEIGHTS / DISTRICT_WEIGHTS.sum())
    base = np.clip(
        118 - 0.85 * np.clip(age_ref - 20, 0, None) + rng.normal(0, 13, n_persons), 9, 140
    )
    slope = rng.normal(-1.0, 1.2, n_persons)  # mL/min/1.73 m2 per year
    declining = rng.random(n_persons) < SHARE_DECLINING
    span = last_day - first_day
    t1 = first_day + (rng.uniform(0.15, 0.6, n_persons) * span).astype(np.int64)
    t2 = t1 + rng.integers(200, 700, n_persons)
    drop = rng.uniform(0.40, 0.65, n_persons)
    albuminuric = rng.random(n_persons) < 0.12
    diabetic = rng.random(n_persons) < 0.13
    activity = rng.lognormal(0.0, 0.8, n_persons)
    return pl.DataFrame({
        "person_token": _hex_tokens(scrambled),
        "birth_year": birth_year,
        "sex": sex.astype(str),
        "female": female_true,
        "district_code": np.array(DISTRICTS)[district],
        "base_egfr": base,
        "slope": slope,
        "declining": declining,
        "t1": t1,
        "t2": t2,
        "drop": drop,
        "albuminuric": albuminuric,
        "diabetic": diabetic,
        "activity": activity,
    })  # fmt: skip


# --------------------------------------------------------------------------- results


def _true_egfr(p: dict[str, np.ndarray], day: np.ndarray, first_day: int) -> np.ndarray:
    years = (day - first_day) / 365.25
    e = p["base_egfr"] + p["slope"] * years
    frac = np.clip((day - p["t1"]) / (p["t2"] - p["t1"]), 0, 1)
    e = np.where(p["declining"], e * (1 - p["drop"] * frac), e)
    return np.clip(e, 4, 160)


def make_results(
    persons: pl.DataFrame,
    n_rows: int,
    seed: int,
    first_day: int,
    last_day: int,
    stream: int = 2,
    visit_offset: int = 0,
) -> pl.DataFrame:
    """``n_rows`` result rows collected between first_day and last_day (epoch days), as codes
    (numbers and small integer codes; :func:`format_rows` writes them out)."""
    rng = np.random.default_rng([seed, stream])
    n_extra = int(round(n_rows * (SHARE_AMENDED + SHARE_CANCELLED)))
    n_base = n_rows - n_extra
    tests_per_visit = P_CREAT + P_ACR + P_HBA1C + P_CYS + P_PCR
    n_visits = int(n_base / tests_per_visit * 1.08) + 16
    weights = persons["activity"].to_numpy()
    who = rng.choice(persons.height, n_visits, p=weights / weights.sum())
    visit_day = rng.integers(first_day, last_day + 1, n_visits)
    # which tests each visit has (at least one: a creatinine)
    has = np.stack(
        [rng.random(n_visits) < p for p in (P_CREAT, P_ACR, P_HBA1C, P_CYS, P_PCR)], axis=1
    )
    has[~has.any(axis=1), 0] = True
    visit_of_row, test_of_row = np.nonzero(has)  # row-major: a visit's tests stay together
    visit_of_row, test_of_row = visit_of_row[:n_base], test_of_row[:n_base]
    molar = rng.random(n_base) < P_CREAT_MOLAR
    kind = np.select([test_of_row == 0, test_of_row == 1, test_of_row == 2, test_of_row == 3],
                     [np.where(molar, 1, 0), 2, 3, 4], 5)  # fmt: skip
    pid = who[visit_of_row]
    day = visit_day[visit_of_row]
    cols = {c: persons[c].to_numpy()[pid] for c in
            ("base_egfr", "slope", "declining", "t1", "t2", "drop", "albuminuric", "diabetic",
             "female", "birth_year")}  # fmt: skip
    collected_year = (np.datetime64("1970-01-01") + day.astype("timedelta64[D]")).astype(
        "datetime64[Y]"
    )
    age = np.clip(collected_year.astype(np.int64) + 1970 - cols["birth_year"], 1, 120).astype(float)
    egfr = _true_egfr(cols, day, first_day)
    female = cols["female"]
    noise = rng.lognormal(0, 0.05, n_base)
    scr = np.clip(creatinine_from_egfr(egfr, age, female) * noise, 0.15, 20)
    cys = np.clip(cystatin_from_egfr(egfr, age, female) * noise, 0.3, 8)
    acr = np.clip(rng.lognormal(np.where(cols["albuminuric"], 4.6, 2.0), 0.9), 0.5, 5000)
    pcr = np.clip(acr * 1.6 + rng.lognormal(4.0, 0.4, n_base), 20, 20000)
    hba1c = np.clip(
        np.where(cols["diabetic"], rng.normal(7.6, 1.2, n_base), rng.normal(5.5, 0.4, n_base)),
        4,
        16,
    )
    number = np.select([kind == 0, kind == 1, kind == 2, kind == 3, kind == 4],
                       [np.round(scr, 2), np.round(scr * UMOL_PER_MG_DL), np.round(acr, 1),
                        np.round(hba1c, 1), np.round(cys, 2)], np.round(pcr))  # fmt: skip
    delay = np.minimum(rng.geometric(0.55, n_base) - 1, 6)
    reported = np.minimum(day + delay, last_day)
    blood = kind != 2
    blood &= kind != 5
    specimen = (np.int64(visit_offset) + visit_of_row) * 2 + np.where(blood, 0, 1)

    frame = pl.DataFrame({
        "pid": pid.astype(np.int32),
        "specimen_no": specimen.astype(np.int64),
        "collected": day.astype(np.int32),
        "reported": reported.astype(np.int32),
        "kind": kind.astype(np.int8),
        "number": number,
        # how the value is written: 0 the number, 1 censored '<3' (ACR only), 2 blank
        "value_code": np.where((rng.random(n_base) < 0.004) & (kind == 2), 1, 0).astype(np.int8),
        "status": np.zeros(n_base, np.int8),  # index into STATUSES
    })  # fmt: skip
    # amended copies: a later report of the same specimen and test with a corrected value;
    # cancellations: a later report of the same specimen and test with no value
    n_amend = int(round(n_rows * SHARE_AMENDED))
    n_cancel = n_extra - n_amend
    pick = rng.choice(n_base, n_amend + n_cancel, replace=False)
    later = pl.Series(rng.integers(1, 15, n_amend + n_cancel))
    copies = frame[pick].with_columns(
        pl.min_horizontal(pl.col("reported") + later, pl.lit(last_day))
        .cast(pl.Int32)
        .alias("reported"),
        (
            pl.col("number") * pl.Series(np.r_[rng.uniform(0.9, 1.1, n_amend), np.ones(n_cancel)])
        ).alias("number"),
        pl.Series(np.r_[np.zeros(n_amend), np.full(n_cancel, 2)].astype(np.int8)).alias(
            "value_code"
        ),
        pl.Series(np.r_[np.ones(n_amend), np.full(n_cancel, 2)].astype(np.int8)).alias("status"),
    )
    frame = pl.concat([frame, copies])
    return _add_defects(frame, rng)


STATUSES = {0: "final", 1: "amended", 2: "cancelled"}
DEFECT_TEXTS = ["haemolysed", "see note", "ND", "pending review"]
DEFECT_DATES = ["2025-02-30", "31/12/2025", "2025-13-01", "unknown"]


def _add_defects(frame: pl.DataFrame, rng: np.random.Generator) -> pl.DataFrame:
    """About SHARE_DEFECT of the rows get one defect each: text value, bad unit or bad date.

    Codes (formatted in :func:`format_rows`): value_code 3-6 a text where a number should be;
    unit_code 1 creatinine in mmol/L (cannot be) or an unknown spelling, 2 unit left blank;
    date_code 1-4 a collection date that is not a valid ISO date.
    """
    n = frame.height
    defect = np.where(rng.random(n) < SHARE_DEFECT, rng.integers(1, 7, n), 0)
    which = rng.integers(0, 4, n)
    value_code = frame["value_code"].to_numpy()
    value_code = np.where(np.isin(defect, [1, 2]) & (value_code != 2), 3 + which, value_code)
    return frame.with_columns(
        pl.Series("value_code", value_code.astype(np.int8)),
        pl.Series("unit_code", np.select([defect == 3, defect == 4], [1, 2], 0).astype(np.int8)),
        pl.Series("date_code", np.where(np.isin(defect, [5, 6]), 1 + which, 0).astype(np.int8)),
    )


def format_rows(part: pl.DataFrame, persons: pl.DataFrame) -> pl.DataFrame:
    """The standard-layout text columns of some generated rows."""
    kind = pl.col("kind")
    number = (
        pl.when(kind.is_in([1, 5])).then(pl.col("number").round(0).cast(pl.Int64).cast(pl.String))
        .when(kind.is_in([0, 4])).then(pl.col("number").round(2).cast(pl.String))
        .otherwise(pl.col("number").round(1).cast(pl.String))
    )  # fmt: skip
    texts = {3 + i: t for i, t in enumerate(DEFECT_TEXTS)} | {1: "<3"}
    value = (
        pl.when(pl.col("value_code") == 0).then(number)
        .when(pl.col("value_code") == 2).then(pl.lit(None, dtype=pl.String))
        .otherwise(pl.col("value_code").replace_strict(texts, default=None, return_dtype=pl.String))
    )  # fmt: skip
    unit = (
        pl.when(pl.col("unit_code") == 0)
        .then(kind.replace_strict({k: u for k, (_, u) in KINDS.items()}, return_dtype=pl.String))
        .when((pl.col("unit_code") == 1) & kind.is_in([0, 1])).then(pl.lit("mmol/L"))
        .when(pl.col("unit_code") == 1).then(pl.lit("mg/xx"))
    )  # fmt: skip
    collected = (
        pl.when(pl.col("date_code") == 0).then(pl.col("collected").cast(pl.Date).cast(pl.String))
        .otherwise(pl.col("date_code").replace_strict(
            {1 + i: d for i, d in enumerate(DEFECT_DATES)}, default=None, return_dtype=pl.String))
    )  # fmt: skip
    people = persons.select(pl.int_range(pl.len(), dtype=pl.Int32).alias("pid"), "person_token",
                            pl.col("birth_year").cast(pl.String), "sex", "district_code")  # fmt: skip
    return part.join(people, on="pid", how="left", maintain_order="left").select(
        "person_token",
        "birth_year",
        "sex",
        "district_code",
        pl.format("WGH{}", pl.col("specimen_no").cast(pl.String).str.zfill(10)).alias(
            "specimen_id"
        ),
        collected.alias("collected_date"),
        kind.replace_strict({k: c for k, (c, _) in KINDS.items()}, return_dtype=pl.String).alias(
            "test_code"
        ),
        value.alias("value"),
        unit.alias("unit"),
        pl.col("status").replace_strict(STATUSES, return_dtype=pl.String).alias("status"),
        pl.lit(None, dtype=pl.String).alias("height_cm"),
        pl.col("reported").cast(pl.Date).cast(pl.String).alias("reported_at"),
        pl.lit(None, dtype=pl.String).alias("fasting"),
    )


def write_months(frame: pl.DataFrame, persons: pl.DataFrame, folder: Path) -> dict[str, int]:
    """One CSV per report month, rows in report order; returns rows per file.

    Text is made one month at a time, so memory stays near the size of the numeric frame.
    """
    folder.mkdir(parents=True, exist_ok=True)
    frame = frame.with_columns(
        pl.col("reported").cast(pl.Date).dt.strftime("%Y-%m").alias("_month")
    ).sort("reported", "specimen_no", "kind", "status", maintain_order=True)
    counts = {}
    for (month,), part in frame.partition_by("_month", as_dict=True, maintain_order=True).items():
        path = folder / f"results_{month}.csv"
        format_rows(part, persons).write_csv(path, include_header=True, line_terminator="\n")
        counts[path.name] = part.height
    return counts


def generate(
    rows: int,
    target: Path,
    seed: int = DEFAULT_SEED,
    months: int = DEFAULT_MONTHS,
    end_month: str = DEFAULT_END_MONTH,
    extra_rows: int = 0,
) -> dict:
    """Write the inbox (and the extra month) under ``target``; return what was written."""
    started = time.perf_counter()
    first_day, last_day = month_range(end_month, months)
    n_persons = max(50, rows // RESULTS_PER_PERSON)
    persons = make_persons(n_persons, seed, first_day, last_day)
    results = make_results(persons, rows, seed, first_day, last_day)
    files = write_months(results, persons, target / "inbox" / SOURCE)
    del results
    info = {"generator_version": GENERATOR_VERSION, "rows": rows, "seed": seed, "months": months,
            "end_month": end_month, "persons": n_persons, "files": files}  # fmt: skip
    if extra_rows:
        month = next_month(end_month)
        e_first, e_last = month_range(month, 1)
        extra = make_results(
            persons, extra_rows, seed, e_first, e_last, stream=3, visit_offset=10**9
        )
        info["extra_month"] = month
        info["extra_files"] = write_months(extra, persons, target / "extra" / SOURCE)
        info["extra_rows"] = extra_rows
    info["seconds"] = round(time.perf_counter() - started, 2)
    (target / "manifest.json").write_text(json.dumps(info, indent=2) + "\n", encoding="utf-8")
    return info


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--rows", type=int, required=True)
    ap.add_argument(
        "--dir", type=Path, required=True, help="target folder (inbox/ and extra/ below it)"
    )
    ap.add_argument("--seed", type=int, default=DEFAULT_SEED)
    ap.add_argument("--months", type=int, default=DEFAULT_MONTHS)
    ap.add_argument("--end-month", default=DEFAULT_END_MONTH)
    ap.add_argument(
        "--extra-rows", type=int, default=0, help="rows of the following month (incremental)"
    )
    args = ap.parse_args()
    info = generate(args.rows, args.dir, args.seed, args.months, args.end_month, args.extra_rows)
    print(f"wrote {args.rows} rows in {len(info['files'])} files under {args.dir / 'inbox'} "
          f"in {info['seconds']} s")  # fmt: skip


if __name__ == "__main__":
    main()
