"""Tests for pipeline.warehouse.reference: the reference tables hold the guideline tables.

KDIGO 2012 (Kidney Int Suppl 2013;3:1): GFR categories G1 >= 90, G2 60-89, G3a 45-59, G3b
30-44, G4 15-29, G5 < 15 (mL/min/1.73 m2); the prognosis heat map of G by A category (low,
moderately increased, high, very high). Five-year age bands 0-4 .. 85+ (common practice for
population tables).
"""

from __future__ import annotations

import pytest

from pipeline.core.settings import load_settings
from pipeline.warehouse.connection import connect
from pipeline.warehouse.reference import load_reference_tables
from tests.conftest import AGE_BANDS, SMALL_DISTRICTS, make_small_config, rows


@pytest.fixture(scope="module")
def con(tmp_path_factory):
    settings = load_settings(make_small_config(tmp_path_factory.mktemp("ref") / "config"))
    connection = connect(":memory:")
    load_reference_tables(connection, settings)
    yield connection
    connection.close()


def test_gfr_categories_are_kdigo_2012(con):
    got = rows(con, "select g_category, lower_bound, upper_bound from reference.gfr_categories "
                    "order by lower_bound desc")  # fmt: skip
    inf = float("inf")
    assert got == [("G1", 90, inf), ("G2", 60, 90), ("G3a", 45, 60), ("G3b", 30, 45),
                   ("G4", 15, 30), ("G5", 0, 15)]  # fmt: skip


@pytest.mark.parametrize(
    ("g", "a", "risk"),
    [("G1", "A1", "low"), ("G2", "A2", "moderately increased"), ("G1", "A3", "high"),
     ("G3a", "A1", "moderately increased"), ("G3a", "A2", "high"), ("G3a", "A3", "very high"),
     ("G3b", "A1", "high"), ("G3b", "A2", "very high"), ("G4", "A1", "very high"),
     ("G5", "A3", "very high")],
)  # fmt: skip
def test_the_risk_grid_is_the_kdigo_heat_map(con, g, a, risk):
    got = rows(con, "select risk_category from reference.kdigo_risk where g_category = ? "
                    "and a_category = ?", [g, a])  # fmt: skip
    assert got == [(risk,)]


def test_the_grid_has_every_cell_once(con):
    assert rows(con, "select count(*), count(distinct (g_category, a_category)) "
                     "from reference.kdigo_risk") == [(18, 18)]  # fmt: skip


def test_the_age_bands_and_districts_are_those_of_the_config(con):
    got = rows(
        con, "select age_band, age_min, age_max from reference.age_bands order by band_order"
    )
    assert [b for b, _, _ in got] == AGE_BANDS
    assert got[0] == ("0-4", 0, 4) and got[-1][:2] == ("85+", 85)
    assert all(high - low == 4 for band, low, high in got[:-1])
    districts = rows(con, "select district_code, district_name from reference.districts order by 1")
    assert districts == sorted(SMALL_DISTRICTS.items())
