"""The measure stage's SQL (sql/derived/kidney_measures.sql) against the published worked examples
of tests/unit/core/test_equations.py, same sources and tolerances, each example given to the SQL as a
lab result of the kind that gets that equation; and against the polars rules on many rows, to
the last bit. The coefficients reach the SQL only through reference.equation_coefficients."""

from __future__ import annotations

import datetime as dt
import math

import duckdb
import numpy as np
import polars as pl
import pytest
from polars.testing import assert_frame_equal

from pipeline.core import equations as eq
from pipeline.core.measure_rules import equation_coefficients, measure_frame
from pipeline.core.settings import load_settings
from pipeline.stages.measure import measure_rows
from pipeline.warehouse.reference import load_reference_tables
from tests.conftest import CONFIG_DIR
from tests.unit.core import test_equations as examples

SETTINGS = load_settings(CONFIG_DIR)
DAY = dt.date(2026, 1, 10)
LAB_COLUMNS = {
    "source_id": pl.String, "file_id": pl.Int64, "line_no": pl.Int64, "person_key": pl.String,
    "specimen_id": pl.String, "collected_date": pl.Date, "reported_date": pl.Date,
    "analyte": pl.String, "value_text": pl.String, "comparator": pl.String, "value": pl.Float64,
    "height_cm": pl.Float64, "sex": pl.String, "age_years": pl.Float64, "district_code": pl.String,
}  # fmt: skip


@pytest.fixture(scope="module")
def con():
    connection = duckdb.connect(":memory:")
    connection.execute("create schema reference")
    load_reference_tables(connection, SETTINGS)
    yield connection
    connection.close()


def row(line: int, analyte: str, value: float, age: float, female: bool, **extra) -> dict:
    return {
        "source_id": "lab", "file_id": 1, "line_no": line, "person_key": "p1",
        "specimen_id": f"S{line}", "collected_date": DAY, "reported_date": DAY,
        "analyte": analyte, "value_text": str(value), "comparator": None, "value": value,
        "height_cm": None, "sex": "F" if female else "M", "age_years": age,
        "district_code": "WF01", **extra,
    }  # fmt: skip


def sql_measures(con, rows: list[dict], **measures) -> list[dict]:
    """The SQL's rows for ``rows``, an exact age each (``age_years`` taken as the age), under the
    shipped measure settings changed by ``measures``."""
    changed = SETTINGS.pipeline.measures.model_copy(update=measures)
    settings = SETTINGS.model_copy(
        update={"pipeline": SETTINGS.pipeline.model_copy(update={"measures": changed})}
    )
    frame = pl.DataFrame(rows, schema=LAB_COLUMNS)
    return measure_rows(con, frame, settings).sort("line_no").to_dicts()


# --------------------------------------------------------------------------- eGFR equations


def test_ckd_epi_2021_check_value_through_sql(con):
    # Common practice, widely quoted check value: woman, 50 y, Scr 1.0 mg/dL -> 68.6.
    (got,) = sql_measures(con, [row(1, "creatinine", 1.0, 50, True)])
    assert got["egfr_equation"] == "ckd_epi_2021_creatinine"
    assert got["egfr"] == pytest.approx(68.6, abs=0.1)


@pytest.mark.parametrize(("scr", "age", "female", "expected"), examples.CKD_EPI_2021_HAND)
def test_ckd_epi_2021_hand_calculations_through_sql(con, scr, age, female, expected):
    # Hand calculations from the formula in Inker et al., N Engl J Med 2021;385:1737.
    (got,) = sql_measures(con, [row(1, "creatinine", scr, age, female)])
    assert got["egfr_equation"] == "ckd_epi_2021_creatinine"
    assert got["egfr"] == pytest.approx(expected, abs=1e-3)


@pytest.mark.parametrize(("scr", "age", "female", "expected"), examples.CKD_EPI_2009_HAND)
def test_ckd_epi_2009_hand_calculations_through_sql(con, scr, age, female, expected):
    # Hand calculations from the formula in Levey et al., Ann Intern Med 2009;150:604 (the
    # equation in force when measures.adult_equation names it).
    rows = [row(1, "creatinine", scr, age, female)]
    (got,) = sql_measures(con, rows, adult_equation="ckd_epi_2009_creatinine")
    assert got["egfr_equation"] == "ckd_epi_2009_creatinine"
    assert got["egfr"] == pytest.approx(expected, abs=1e-3)


@pytest.mark.parametrize(("scys", "age", "female", "expected"), examples.CYSTATIN_2012_HAND)
def test_ckd_epi_2012_cystatin_hand_calculations_through_sql(con, scys, age, female, expected):
    # Hand calculations from the formula in Inker et al., N Engl J Med 2012;367:20 (a cystatin C
    # on a day without creatinine).
    (got,) = sql_measures(con, [row(1, "cystatin_c", scys, age, female)])
    assert got["egfr_equation"] == "ckd_epi_2012_cystatin"
    assert got["egfr"] == pytest.approx(expected, abs=1e-3)


@pytest.mark.parametrize(("scr", "scys", "age", "female", "expected"), examples.COMBINED_HAND)
def test_ckd_epi_2021_combined_hand_calculations_through_sql_from_memory(
    con, scr, scys, age, female, expected
):
    # Hand calculations from the formula of Inker et al. 2021 with coefficients from memory (a
    # creatinine and a cystatin C of the same day).
    rows = [row(1, "creatinine", scr, age, female), row(2, "cystatin_c", scys, age, female)]
    creatinine, cystatin = sql_measures(con, rows)
    assert creatinine["egfr_equation"] == "ckd_epi_2021_creatinine_cystatin"
    assert creatinine["egfr"] == pytest.approx(expected, abs=1e-3)
    assert (cystatin["egfr"], cystatin["egfr_reason"]) == (None, "combined_with_creatinine")


@pytest.mark.parametrize(("scr", "age", "female", "expected"), examples.EKFC_ADULT_HAND)
def test_ekfc_adult_hand_calculations_through_sql(con, scr, age, female, expected):
    # Hand calculations from the formula in Pottel et al., Ann Intern Med 2021;174:183.
    rows = [row(1, "creatinine", scr, age, female)]
    (got,) = sql_measures(con, rows, adult_equation="ekfc_creatinine")
    assert got["egfr"] == pytest.approx(expected, abs=1e-3)


@pytest.mark.parametrize(("scr", "age", "female", "expected"), examples.EKFC_CHILD_HAND)
def test_ekfc_child_hand_calculations_through_sql_from_memory(con, scr, age, female, expected):
    # Hand calculations from Pottel et al. 2021 with the child Q from memory (a child without
    # height gets measures.child_equation).
    (got,) = sql_measures(con, [row(1, "creatinine", scr, age, female)])
    assert got["egfr_equation"] == "ekfc_creatinine"
    assert got["egfr"] == pytest.approx(expected, abs=1e-3)


@pytest.mark.parametrize("age", [2, 5, 10, 14, 17.5])
@pytest.mark.parametrize("female", [True, False])
def test_ekfc_child_at_q_through_sql_from_memory(con, age, female):
    # Pottel et al. 2021, child Q from memory: Scr = Q (µmol/L ÷ 88.4) gives 107.3.
    q_mg_dl = examples._child_q_umol_from_memory(age, female) / 88.4
    (got,) = sql_measures(con, [row(1, "creatinine", q_mg_dl, age, female)])
    assert got["egfr"] == pytest.approx(107.3, rel=1e-12)


@pytest.mark.parametrize(
    ("scr", "height_cm", "age", "female", "expected"),
    examples.CKID_U25_END_POINTS + examples.CKID_U25_HAND,
)
def test_ckid_u25_through_sql_from_memory(con, scr, height_cm, age, female, expected):
    # Pierce et al., Kidney Int 2021;99:948: K end-points (confirmed) and hand calculations with
    # growth factors from memory. A child with a height gets it; the adults of the end-points
    # (20 and 22) only when CKiD U25 covers them (measures.adult_min_age_years up to 25).
    rows = [row(1, "creatinine", scr, age, female, height_cm=float(height_cm))]
    (got,) = sql_measures(con, rows, adult_min_age_years=25)
    assert got["egfr_equation"] == "ckid_u25_creatinine"
    assert got["egfr"] == pytest.approx(expected, abs=1e-3)


# --------------------------------------------------------------------------- albuminuria


@pytest.mark.parametrize(("pcr", "expected"), examples.SUMIDA_HAND)
def test_acr_from_pcr_sumida_through_sql_from_memory(con, pcr, expected):
    # Hand calculations from the Sumida et al. 2020 crude equation as recalled FROM MEMORY.
    (got,) = sql_measures(con, [row(1, "pcr", pcr, 50, True)])
    assert (got["acr_basis"], got["is_acr_estimated"]) == ("estimated_from_pcr", True)
    assert got["acr_mg_g"] == pytest.approx(expected, abs=1e-3)


@pytest.mark.parametrize(
    ("acr", "inclusive", "category"),
    [(29.99, True, "A1"), (30.0, True, "A2"), (300.0, True, "A2"), (300.01, True, "A3"),
     (300.0, False, "A3"), (299.99, False, "A2")],
)  # fmt: skip
def test_acr_categories_through_sql(con, acr, inclusive, category):
    # KDIGO 2012 (Kidney Int Suppl 2013;3:1): A1 < 30 mg/g, A2 30-300, A3 > 300; whether 300 is
    # A2 is measures.acr_300_is_a2 (project decision 2)
    (got,) = sql_measures(con, [row(1, "acr", acr, 50, True)], acr_300_is_a2=inclusive)
    assert got["a_category"] == category


@pytest.mark.parametrize(
    ("egfr_scr", "category"), [(0.5, "G1"), (1.0, "G2"), (1.5, "G3a"), (2.2, "G3b"), (3.5, "G4")]
)
def test_g_categories_through_sql(con, egfr_scr, category):
    # KDIGO 2012 GFR categories on the unrounded eGFR, lower bound inclusive (G1 >= 90, G2 60-89,
    # G3a 45-59, G3b 30-44, G4 15-29; Kidney Int Suppl 2013;3:1), for a man of 60
    (got,) = sql_measures(con, [row(1, "creatinine", egfr_scr, 60, False)])
    bounds = dict(eq.KDIGO_GFR_LOWER_BOUNDS)
    assert got["egfr"] >= bounds[category]
    assert got["g_category"] == category


# --------------------------------------------------------------------------- one place, same bits


def test_the_sql_takes_every_coefficient_from_equations_py(con):
    # The coefficients in the warehouse are those of pipeline/core/equations.py, nothing else
    stored = pl.from_arrow(
        con.sql("select * from reference.equation_coefficients").to_arrow_table()
    )
    assert_frame_equal(stored, equation_coefficients(), check_dtypes=False)
    row_2021 = stored.filter(pl.col("equation") == "ckd_epi_2021_creatinine").to_dicts()[0]
    assert row_2021["multiplier"] == eq.CKD_EPI_2021_CREATININE.multiplier
    assert row_2021["source"] == eq.CKD_EPI_2021_CREATININE.source


def test_sql_and_polars_rules_give_the_same_bits_on_many_rows(con):
    # Many invented results of every kind measured (every age band and equation, censored
    # values, same-day cystatin C, albumin with urine creatinine, dipsticks): the SQL and the
    # polars rules give the same rows, every float to the last bit
    rng = np.random.default_rng(20261205)
    n = 3000
    analytes = ["creatinine", "creatinine", "creatinine", "cystatin_c", "acr", "pcr",
                "urine_albumin", "urine_creatinine", "urine_albumin_24h",
                "urine_protein_dipstick", "egfr_reported"]  # fmt: skip
    analyte = rng.choice(analytes, n)
    value = np.round(rng.lognormal(0.0, 0.8, n), 2)
    value = np.where(np.isin(analyte, ["acr", "pcr", "urine_albumin_24h"]), value * 60, value)
    value = np.where(analyte == "urine_albumin", value * 20, value)
    value = np.where(analyte == "urine_creatinine", value * 80, value)
    value = np.where(analyte == "egfr_reported", np.round(value * 60), value)
    readings = np.array(["negative", "trace", "1+", "2+", "3+"])
    frame = pl.DataFrame(
        {
            "source_id": "lab",
            "file_id": 1,
            "line_no": np.arange(1, n + 1),
            "person_key": [f"p{i:04d}" for i in rng.integers(0, 400, n)],
            "specimen_id": [f"S{i}" if i % 5 else None for i in rng.integers(0, 900, n)],
            "collected_date": [DAY + dt.timedelta(days=int(d)) for d in rng.integers(0, 6, n)],
            "reported_date": DAY + dt.timedelta(days=10),
            "analyte": analyte,
            "value_text": np.where(
                analyte == "urine_protein_dipstick", rng.choice(readings, n), value.astype(str)
            ),
            "comparator": rng.choice([None, None, None, None, None, None, "<", ">", ">="], n),
            "value": np.where(analyte == "urine_protein_dipstick", np.nan, value),
            "height_cm": np.where(rng.random(n) < 0.5, np.round(rng.uniform(80, 190, n)), np.nan),
            "sex": rng.choice(["F", "M", "M", "F", "U"], n),
            "birth_year": rng.integers(1925, 2025, n),
            "district_code": "WF01",
            "reported_value": value,
            "reported_unit": rng.choice(["mg/g", "mg/mmol", None], n),
        }  # fmt: skip
    ).with_columns(
        pl.col("value").fill_nan(None),
        pl.col("height_cm").fill_nan(None),
        pl.lit(0).cast(pl.Int32).alias("age_years"),
    )
    frame = frame.with_columns(pl.col("birth_year").cast(pl.Int32))
    sql_rows = measure_rows(con, frame, SETTINGS).sort("file_id", "line_no")
    polars_rows = measure_frame(frame, SETTINGS).sort("file_id", "line_no")
    assert sql_rows.height == polars_rows.height > n // 2
    assert_frame_equal(sql_rows, polars_rows, check_exact=True, check_dtypes=False)
    assert sql_rows["egfr_equation"].n_unique() >= 4  # 2021, EKFC, CKiD, combined, cystatin
    assert math.isfinite(sql_rows["egfr"].drop_nulls().sum())
