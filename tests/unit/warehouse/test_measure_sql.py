"""pipeline/warehouse/measure_sql.py: a table of measures made in person-key ranges holds the
same rows as the measure SQL over all the results at once (the measure stage's kidney_measures
and the link stage's measures known at a past period end are both made so). The rules
themselves are checked against the published worked examples in
tests/unit/stages/test_measure_sql.py; person keys here are hex digests, as the HMAC keys are
(pipeline/core/pseudonymise.py). The results are invented."""

from __future__ import annotations

import datetime as dt
import hashlib

import duckdb
import numpy as np
import polars as pl
import pytest

from pipeline.core.settings import load_settings
from pipeline.stages.measure import measure_rows
from pipeline.warehouse import measure_sql
from pipeline.warehouse.connection import with_frame
from pipeline.warehouse.reference import load_reference_tables
from tests.conftest import CONFIG_DIR

SETTINGS = load_settings(CONFIG_DIR)


def results(n: int = 600) -> pl.DataFrame:
    """Results of 40 persons, several kinds, same-day markers, some of an analyte not measured."""
    rng = np.random.default_rng(20261205)
    analyte = rng.choice(["creatinine", "creatinine", "cystatin_c", "acr", "urine_albumin",
                          "urine_creatinine", "hba1c"], n)  # fmt: skip
    value = np.round(rng.lognormal(0.0, 0.6, n), 2) * np.where(analyte == "acr", 50, 1)
    day = dt.date(2026, 1, 10)
    return pl.DataFrame(
        {
            "source_id": "lab", "file_id": 1, "line_no": np.arange(1, n + 1),
            "person_key": [hashlib.sha256(str(i).encode()).hexdigest()[:32]
                           for i in rng.integers(0, 40, n)],
            "specimen_id": [f"S{i}" for i in rng.integers(0, 300, n)],
            "collected_date": [day + dt.timedelta(days=int(d)) for d in rng.integers(0, 4, n)],
            "reported_date": day + dt.timedelta(days=9), "analyte": analyte,
            "value_text": value.astype(str), "comparator": None, "value": value,
            "height_cm": None, "sex": rng.choice(["F", "M"], n),
            "birth_year": rng.integers(1930, 2000, n).astype(np.int32), "age_years": 0,
            "district_code": "WF01", "reported_value": value, "reported_unit": None,
        }  # fmt: skip
    ).with_columns(pl.col("height_cm").cast(pl.Float64), pl.col("comparator").cast(pl.String),
                   pl.col("reported_unit").cast(pl.String))  # fmt: skip


@pytest.fixture
def con():
    connection = duckdb.connect(":memory:")
    connection.execute("create schema reference")
    load_reference_tables(connection, SETTINGS)
    with_frame(connection, results(), "create table results_in as select * from _frame")
    yield connection
    connection.close()


def test_measures_made_in_person_key_ranges_equal_one_pass(con, monkeypatch):
    measure_sql.measure_into(con, SETTINGS, "results_in", "one_pass")
    monkeypatch.setattr(measure_sql, "CHUNK_RESULTS", 25)  # about twenty ranges
    measure_sql.measure_into(con, SETTINGS, "results_in", "ranged")
    query = "select * from {} order by file_id, line_no"
    one, ranged = (con.sql(query.format(t)).pl() for t in ("one_pass", "ranged"))
    assert one.height > 300 and one.equals(ranged)
    whole = measure_rows(con, con.sql("select * from results_in").pl(), SETTINGS)
    assert whole.sort("file_id", "line_no").equals(one)
    assert "hba1c" not in set(one["analyte"])  # only the analytes measured
