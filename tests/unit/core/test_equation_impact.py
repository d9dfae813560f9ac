"""Tests for pipeline.core.equation_impact: each adult's latest creatinine eGFR under the equation in
force (CKD-EPI 2021, Inker et al., NEJM 2021;385:1737) against CKD-EPI 2009 (Levey et al., Ann
Intern Med 2009;150:604, race term not used), categorised by KDIGO 2012 GFR category. The eGFRs
below are worked out by hand from the published formulas (shared/REFERENCES.md, confirmed):

2021: 142 x min(Scr/k,1)^a x max(Scr/k,1)^-1.200 x 0.9938^age x 1.012[F]; k 0.7 F / 0.9 M;
      a -0.241 F / -0.302 M.
2009: 141 x min(Scr/k,1)^a x max(Scr/k,1)^-1.209 x 0.993^age x 1.018[F]; a -0.329 F / -0.411 M.
"""

from __future__ import annotations

import polars as pl
import pytest

from pipeline.core.equation_impact import COMBINED, daily_comparison, reclassification, summary


def ckd_epi_2021(scr: float, age: int, female: bool) -> float:
    k, a = (0.7, -0.241) if female else (0.9, -0.302)
    return (
        142
        * min(scr / k, 1) ** a
        * max(scr / k, 1) ** -1.200
        * 0.9938**age
        * (1.012 if female else 1)
    )


def inputs() -> pl.DataFrame:
    # A: woman of 70, Scr 1.0 (= k x 1/0.7 above k): 2021 = 142 x (1/0.7)^-1.2 x 0.9938^70 x 1.012
    #    = 142 x 0.65180 x 0.64704 x 1.012 = 60.6 (G2); 2009 = 141 x (1/0.7)^-1.209 x 0.993^70 x 1.018
    #    = 141 x 0.64972 x 0.61157 x 1.018 = 57.0 (G3a): moved to a lower category, now below 60.
    # B: man of 50, Scr 0.9 (= k): 2021 = 142 x 0.9938^50 = 142 x 0.73274 = 104.0 (G1);
    #    2009 = 141 x 0.993^50 = 141 x 0.70382 = 99.2 (G1): same category.
    # C: man of 60, Scr 1.5, two labs the same day at 1.5 and 1.5: 2021 = 142 x (1.5/0.9)^-1.2 x
    #    0.9938^60 = 142 x 0.54173 x 0.68856 = 53.0 (G3a); 2009 = 141 x (1.5/0.9)^-1.209 x 0.993^60
    #    = 141 x 0.53924 x 0.65608 = 49.9 (G3a): same category.
    rows = [
        ("WF01", "A", "F", 70, 1.0, "ckd_epi_2021_creatinine"),
        ("WF01", "B", "M", 50, 0.9, "ckd_epi_2021_creatinine"),
        ("WF02", "C", "M", 60, 1.5, "ckd_epi_2021_creatinine"),
        ("WF02", "C", "M", 60, 1.5, "ckd_epi_2021_creatinine"),
    ]
    out = []
    for district, person, sex, age, scr, equation in rows:
        e = ckd_epi_2021(scr, age, sex == "F")
        out.append(
            {
                "district_code": district,
                "person_key": person,
                "day": None,
                "sex": sex,
                "age_years": age,
                "egfr": e,
                "egfr_equation": equation,
                "egfr_creatinine": e,
                "creatinine_mg_dl": scr,
            }
        )
    return pl.DataFrame(out)


def test_hand_computed_egfrs_and_categories():
    persons = {
        r["person_key"]: r for r in daily_comparison(inputs(), "ckd_epi_2009_creatinine").to_dicts()
    }
    assert (
        round(persons["A"]["egfr_in_force"], 1) == 60.6
        and round(persons["A"]["egfr_other"], 1) == 57.0
    )
    assert (persons["A"]["g_in_force"], persons["A"]["g_comparison"]) == ("G2", "G3a")
    assert (
        round(persons["B"]["egfr_in_force"], 1) == 104.0
        and round(persons["B"]["egfr_other"], 1) == 99.2
    )
    assert (
        round(persons["C"]["egfr_in_force"], 1) == 53.0
        and round(persons["C"]["egfr_other"], 1) == 49.9
    )
    assert len(persons) == 3  # C's two results of one day count once


def test_matrix_and_summary_by_hand():
    persons = daily_comparison(inputs(), "ckd_epi_2009_creatinine")
    matrix = reclassification(
        persons, "2026-10", "ckd_epi_2021_creatinine", ["ckd_epi_2009_creatinine", COMBINED]
    )
    cells = {
        (r["district_code"], r["comparison"], r["g_in_force"], r["g_comparison"]): r["persons"]
        for r in matrix.to_dicts()
        if r["persons"]
    }
    assert cells == {
        ("WF01", "ckd_epi_2009_creatinine", "G2", "G3a"): 1,
        ("WF01", "ckd_epi_2009_creatinine", "G1", "G1"): 1,
        ("WF02", "ckd_epi_2009_creatinine", "G3a", "G3a"): 1,
        ("ALL", "ckd_epi_2009_creatinine", "G2", "G3a"): 1,
        ("ALL", "ckd_epi_2009_creatinine", "G1", "G1"): 1,
        ("ALL", "ckd_epi_2009_creatinine", "G3a", "G3a"): 1,
    }
    # every cell of the 6 x 6 grid, per district (WF01, WF02, ALL) and comparison (2)
    assert matrix.height == 3 * 2 * 36
    totals, categories = summary(matrix)
    s = {(r["district_code"], r["comparison"], r["g_category"]): r for r in categories.to_dicts()}
    t = {(r["district_code"], r["comparison"]): r for r in totals.to_dicts()}
    region = t[("ALL", "ckd_epi_2009_creatinine")]
    assert region["persons_compared"] == 3
    assert (region["moved_to_lower_gfr_category"], region["moved_to_higher_gfr_category"]) == (1, 0)
    # below 60: in force G3a..G5 = C only (1); under 2009: A and C (2)
    below = ("G3a", "G3b", "G4", "G5")
    assert sum(s[("ALL", "ckd_epi_2009_creatinine", g)]["persons_in_force"] for g in below) == 1
    assert sum(s[("ALL", "ckd_epi_2009_creatinine", g)]["persons_comparison"] for g in below) == 2
    assert s[("WF01", "ckd_epi_2009_creatinine", "G2")]["moved_to_lower_gfr_category"] == 1
    # no cystatin C that day: the creatinine-cystatin C comparison compares no one
    assert t[("ALL", COMBINED)]["persons_compared"] == 0
    # the categories add up to the totals, column by column
    for (district, comparison), row in t.items():
        mine = [r for k, r in s.items() if k[:2] == (district, comparison)]
        assert (
            sum(r["persons_in_force"] for r in mine)
            == sum(r["persons_comparison"] for r in mine)
            == row["persons_compared"]
        )
        assert (
            sum(r["moved_to_lower_gfr_category"] for r in mine)
            == row["moved_to_lower_gfr_category"]
        )


def test_cystatin_days_compare_the_combined_equation():
    frame = inputs().with_columns(
        pl.when(pl.col("person_key") == "B")
        .then(pl.lit(COMBINED))
        .otherwise(pl.col("egfr_equation"))
        .alias("egfr_equation"),
        pl.when(pl.col("person_key") == "B").then(85.0).otherwise(pl.col("egfr")).alias("egfr"),
    )
    persons = daily_comparison(frame, "ckd_epi_2009_creatinine").filter(
        pl.col("comparison") == COMBINED
    )
    assert persons.select("person_key", "g_in_force", "g_comparison").rows() == [("B", "G1", "G2")]


def test_confirmed_ckd_under_the_comparison_by_hand(tmp_path, small_config):
    """A woman of 70 (born 1955, tested in 2025) with creatinine 1.0 mg/dL on three days spanning
    111 days: CKD-EPI 2021 gives 60.6 each time (not below 60: no CKD); CKD-EPI 2009 gives 57.0
    (worked out in inputs() above), below 60 for more than 90 days: confirmed CKD (KDIGO 2012)."""
    from tests.conftest import rows, run_month, write_inbox

    header = "person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,status"
    lines = [
        f"TOKQ1,1955,F,WF01,S{i},{day},2160-0,1.0,mg/dL,final"
        for i, day in enumerate(["2025-03-01", "2025-04-15", "2025-06-20"])
    ]
    inbox = write_inbox(
        tmp_path, {"westerfold_general_lab/results_2026-01.csv": "\n".join([header, *lines]) + "\n"}
    )
    with run_month(small_config, inbox, tmp_path / "out", period="2026-01") as con:
        got = rows(
            con,
            "select persons_compared, persons_ckd_in_force, persons_ckd_comparison, "
            "moved_to_lower_gfr_category from main.district_equation_change "
            "where district_code = 'ALL' and comparison = 'ckd_epi_2009_creatinine'",
        )
        assert got == [(1, 0, 1, 1)]
        matrix = rows(
            con,
            "select g_in_force, g_comparison from main.equation_reclassification "
            "where district_code = 'ALL' and comparison = 'ckd_epi_2009_creatinine' and persons = 1",
        )
        assert matrix == [("G2", "G3a")]
        # the creatinine-cystatin C comparison compares no one here and counts no CKD
        assert rows(
            con,
            "select persons_compared, persons_ckd_comparison from main.district_equation_change "
            f"where district_code = 'ALL' and comparison = '{COMBINED}'",
        ) == [(0, None)]


@pytest.mark.parametrize("per_range", [None, 2], ids=["one_pass", "ranges_of_2_daily_values"])
def test_the_same_equation_on_both_sides_changes_nothing(
    tmp_path, small_config, monkeypatch, per_range
):
    """Identity: compared with itself, the equation in force moves no one and the confirmed CKD
    recomputed through the rules equals person_status's (the same rules on the same values),
    also when both run in person-key ranges of two daily values (as a large warehouse does)."""
    from pipeline.warehouse import sql
    from tests.conftest import edit_pipeline_yaml, rows, run_month, write_inbox

    if per_range:
        monkeypatch.setattr(sql, "DAILY_VALUES_PER_RANGE", per_range)

    edit_pipeline_yaml(small_config, "summaries", "equation_comparison", "ckd_epi_2021_creatinine")
    header = "person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,status"
    days = ["2025-03-01", "2025-04-15", "2025-06-20"]
    lines = [
        f"TOK{p},{1950 + i},{'FM'[i % 2]},WF0{i % 4 + 1},S{p}{j},{day},2160-0,{scr},mg/dL,final"
        for i, (p, scr) in enumerate([("A", 1.0), ("B", 1.6), ("C", 2.4), ("D", 0.8)])
        for j, day in enumerate(days)
    ]
    inbox = write_inbox(
        tmp_path, {"westerfold_general_lab/results_2026-01.csv": "\n".join([header, *lines]) + "\n"}
    )
    with run_month(small_config, inbox, tmp_path / "out", period="2026-01") as con:
        got = rows(
            con,
            "select persons_compared, moved_to_lower_gfr_category, moved_to_higher_gfr_category, "
            "persons_ckd_in_force, persons_ckd_comparison from main.district_equation_change "
            "where district_code = 'ALL' and comparison = 'ckd_epi_2021_creatinine'",
        )
        ckd = rows(
            con, "select count(*) from person_status where period = '2026-01' and has_confirmed_ckd"
        )[0][0]
        assert ckd >= 2  # the check has something to compare (B and C stay below 60 for 111 days)
        assert got == [(4, 0, 0, ckd, ckd)]
