"""Tests for pipeline.disclosure: small counts (1-10, common practice in official statistics)
and the rates built on them are blanked before anything is published."""

from __future__ import annotations

from pathlib import Path

import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.disclosure import PUBLISHED_TABLES, suppress
from pipeline.settings import DisclosureSettings
from tests.conftest import rows, run_month, write_inbox

# No example database: the run must not write into the working tree.
SETTINGS = settings(max_examples=200, deadline=None, database=None)
RULES = DisclosureSettings()  # 1..10, config/pipeline.yaml default
TABLES = {t.name: t for t in PUBLISHED_TABLES}
PREVALENCE = TABLES["district_ckd_prevalence"]
COVERAGE = TABLES["district_screening_coverage"]


def prevalence_frame(cells: list[dict]) -> pl.DataFrame:
    base = {"period": "2025-06", "district_code": "WF01", "sex": "F", "age_band": "50-54",
            "persons_tested": 100, "persons_ckd": 20, "persons_ckd_g3_g5": 12, "population": 500}  # fmt: skip
    out = []
    for cell in cells:
        row = {**base, **cell}
        row["ckd_share_of_tested"] = round(row["persons_ckd"] / row["persons_tested"], 4) if row["persons_tested"] else None
        row["ckd_per_1000_residents"] = round(1000 * row["persons_ckd"] / row["population"], 2)
        out.append(row)
    return pl.DataFrame(out)


@pytest.mark.parametrize(("count", "blanked"), [(0, False), (1, True), (5, True), (10, True), (11, False), (250, False)])
def test_counts_1_to_10_are_blanked_0_and_11_kept(count, blanked):
    out = suppress(prevalence_frame([{"persons_ckd_g3_g5": count}]), PREVALENCE, RULES)
    value = out["persons_ckd_g3_g5"].item()
    assert (value is None) == blanked
    if not blanked:
        assert value == count
    assert out["n_suppressed"].item() == int(blanked)


def test_rate_on_a_suppressed_count_is_blanked():
    out = suppress(prevalence_frame([{"persons_ckd": 4}, {"persons_tested": 9, "persons_ckd": 0}]), PREVALENCE, RULES)
    first, second = out.iter_rows(named=True)
    # numerator small: both rates built on it go
    assert first["persons_ckd"] is None
    assert first["ckd_share_of_tested"] is None and first["ckd_per_1000_residents"] is None
    # denominator small: the share goes, the per-resident rate (public population) stays
    assert second["persons_tested"] is None and second["ckd_share_of_tested"] is None
    assert second["persons_ckd"] == 0 and second["ckd_per_1000_residents"] == 0.0
    # the resident population is public and never blanked
    assert out["population"].to_list() == [500, 500]


def test_nothing_small_nothing_blanked():
    frame = prevalence_frame([{}])
    out = suppress(frame, PREVALENCE, RULES)
    assert out.drop("n_suppressed").equals(frame)
    assert out["n_suppressed"].item() == 0


def test_configured_band_is_used():
    out = suppress(prevalence_frame([{"persons_ckd_g3_g5": 6}]), PREVALENCE, DisclosureSettings(suppress_max=5))
    assert out["persons_ckd_g3_g5"].item() == 6


counts = st.integers(min_value=0, max_value=2000)


@SETTINGS
@given(st.lists(st.tuples(counts, counts, counts, counts), min_size=1, max_size=30))
def test_property_no_published_count_in_1_to_10(cells):
    frame = pl.DataFrame(
        [{"period": "2025-06", "district_code": f"WF0{i % 4 + 1}", "persons_with_diabetes": d,
          "with_egfr": e, "with_egfr_and_acr": b, "with_acr": a,
          "share_with_both": b / d if d else None}
         for i, (d, e, a, b) in enumerate(cells)],
        schema_overrides={"share_with_both": pl.Float64},
    )  # fmt: skip
    out = suppress(frame, COVERAGE, RULES)
    for column in COVERAGE.counts:
        published = out[column].drop_nulls()
        assert not published.is_between(1, 10).any(), column
        # a count outside 1..10 is published unchanged
        kept = frame[column].filter(~frame[column].is_between(1, 10))
        assert published.to_list() == kept.to_list()
    small = frame.select(pl.any_horizontal(pl.col(c).is_between(1, 10) for c in COVERAGE.rates["share_with_both"]))
    assert out.filter(small.to_series())["share_with_both"].null_count() == int(small.to_series().sum())


@pytest.mark.xfail(
    strict=True,
    reason="complementary suppression is not built yet (open issue: district tables and disclosure "
    "control); a lone small cell can still be recovered as the total minus the other cells",
)
def test_suppressed_cell_cannot_be_recovered_from_the_total():
    cells = prevalence_frame([
        {"age_band": "50-54", "persons_ckd": 4},
        {"age_band": "55-59", "persons_ckd": 30},
        {"age_band": "ALL", "sex": "ALL", "persons_ckd": 34},
    ])  # fmt: skip
    out = suppress(cells, PREVALENCE, RULES)
    published = out["persons_ckd"].to_list()
    assert published[0] is None
    recoverable = published[2] is not None and published[1] is not None
    assert not recoverable, f"blanked cell = {published[2]} - {published[1]}"


# --------------------------------------------------------------------------- after a whole run


def test_published_tables_of_a_run_hold_no_small_count(tmp_path: Path, small_config: Path):
    header = "person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,status"
    lines = [f"WF-dis{i:04d},1960,F,WF0{i % 2 + 1},D{i:04d},2025-06-0{i % 9 + 1},2160-0,1.{i % 9},mg/dL,final"
             for i in range(14)]  # fmt: skip
    inbox = write_inbox(tmp_path, {"westerfold_general_lab/results_2025-06.csv": "\n".join([header, *lines]) + "\n"})
    with run_month(small_config, inbox, tmp_path / "out", period="2025-06") as con:
        for table in PUBLISHED_TABLES:
            internal = con.sql(f"select * from main.{table.name}").pl()
            published = con.sql(f"select * from published.{table.name}").pl()
            assert published.height == internal.height
            for column in table.counts:
                assert not published[column].drop_nulls().is_between(1, 10).any(), (table.name, column)
        # the check means something: the internal table has small counts to hide, and a
        # count above 10 (14 persons tested in all) is published
        assert rows(con, "select count(*) from main.district_ckd_prevalence where persons_tested between 1 and 10")[0][0] > 0
        assert rows(con, "select persons_tested from published.district_ckd_prevalence where district_code = 'ALL'") == [(14,)]
