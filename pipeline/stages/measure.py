"""Measure: eGFR, albuminuria and their KDIGO categories for every accepted result.

eGFR is recomputed from every accepted serum creatinine with the equation configured for the
person's age (project decision 3); a lab-reported eGFR is kept beside it for comparison only.
Albuminuria is brought onto one scale (``acr_mg_g``) with ``acr_basis`` saying how. Anything not
computable gets a null and a reason. The rules are DuckDB SQL, ``sql/derived/kidney_measures.sql``;
their coefficients are those of :mod:`pipeline.core.equations`, read from
``reference.equation_coefficients`` (:func:`pipeline.core.measure_rules.equation_coefficients`),
and the choices of ``measures`` in config/pipeline.yaml are bound parameters. The link stage
measures the results known at a past period end with the same SQL (``measure_into`` of
:mod:`pipeline.warehouse.measure_sql`). The
same rules as polars expressions (:func:`pipeline.core.measure_rules.measure_frame`) are kept as
a second, independent implementation: both give the same rows, to the last bit
(tests/unit/stages/test_measure_sql.py).
"""

from __future__ import annotations

from dataclasses import dataclass

import duckdb
import polars as pl

from pipeline.core.measure_rules import MEASURE_COLUMNS, MEASURED_ANALYTES
from pipeline.core.settings import Settings
from pipeline.warehouse.connection import fetch_frame, with_frame
from pipeline.warehouse.measure_sql import measure_into, measure_query
from pipeline.warehouse.sql_files import checked_name


@dataclass
class MeasureSummary:
    egfr_rows: int
    egfr_computed: int
    acr_rows: int
    acr_categorised: int


def measure_stage(
    con: duckdb.DuckDBPyConnection,
    settings: Settings,
    touched_only: bool = False,
    changed: str = "changed_versions",
) -> MeasureSummary:
    """Bring ``kidney_measures`` up to date with ``lab_results``.

    Measures depend on one person's results only, so they are computed per chunk of persons,
    and when ``touched_only`` (the validate stage settled a touched scope and named the results
    it changed: ``changed``, its result's ``changed_versions``) only the measures around those
    results are computed again (:func:`update_touched`).
    """
    analytes = list(MEASURED_ANALYTES)
    stored = [c for (c,) in con.execute(
        "select column_name from duckdb_columns() where schema_name = 'main' "
        "and table_name = 'kidney_measures' order by column_index"
    ).fetchall()]  # fmt: skip
    if stored and stored != MEASURE_COLUMNS:
        # a warehouse measured by an earlier version (other columns, other rules): every row is
        # computed again, never mixed with rows made under the old rules
        touched_only = False
    if touched_only:
        update_touched(con, settings, analytes, changed)
        return _summary(con)
    con.execute("drop table if exists kidney_measures")
    measure_into(con, settings, "lab_results", "kidney_measures")
    return _summary(con)


def update_touched(
    con: duckdb.DuckDBPyConnection,
    settings: Settings,
    analytes: list[str],
    changed: str = "changed_versions",
) -> None:
    """Compute again the measures this run's versions can change, and store only the rows that
    changed.

    Which rows can change: a measure row reads its own result and, besides it, only results of
    the same person on the same day (a cystatin C or creatinine of that day; a urine creatinine
    without specimen id) or of the same person, source and specimen (the lab's reported eGFR; a
    urine creatinine with a specimen id) (sql/derived/kidney_measures.sql). So only the rows sharing a day
    or a specimen with a version that this run added, or whose outcome it changed
    (``changed``, named by the validate stage), are computed again, from every result that
    shares a day or a specimen with one of those rows. (Before, every row of every touched
    person was computed again: a 10M-result month's measure stage took 5.7 s, now 2.5 s.)

    Replacing all those rows would be simpler, but rows deleted all over a large table make
    DuckDB rewrite the whole table at its next checkpoint (deleting 9 % of ``kidney_measures``
    cost 6.5 s at the commit, against 0.03 s for a few hundred rows), and most come out the
    same. So only the results whose rows differ are replaced: those with a stored row not
    computed now (superseded, withdrawn) or a row computed now that is not stored (new). A
    result has one measure row (file_id, line_no), so rows are paired on it and compared on
    every column, nulls equal (an EXCEPT ALL of the two sets gave the same and took 6.3 s
    instead of 0.8 s).
    """
    changed = checked_name(changed)

    def near_changed(rows: str) -> str:
        """Rows sharing a person and day, or a source, person and specimen, with ``rows``."""
        rows = checked_name(rows)
        return (f"((person_key, collected_date) in (select person_key, collected_date from {rows}) "
                "or (source_id, person_key, specimen_id) in "
                f"(select source_id, person_key, specimen_id from {rows} where specimen_id is not null))")  # fmt: skip

    # the rows whose measures can change, then every result they read
    con.execute(
        "create or replace temp table measure_rows as "
        "select file_id, line_no, person_key, collected_date, source_id, specimen_id from lab_results "
        "where list_contains($analytes, analyte) "
        f"and person_key in (select person_key from {changed}) "
        f"and {near_changed(changed)}",
        {"analytes": analytes},
    )
    sql, params = measure_query(
        settings,
        "select * from lab_results where list_contains($analytes, analyte) "
        "and person_key in (select person_key from measure_rows) "
        f"and {near_changed('measure_rows')}",
        {"analytes": analytes},
    )
    con.execute(
        f"create or replace temp table measures_touched as select * from (\n{sql}\n) as t "
        "semi join measure_rows as r on r.file_id = t.file_id and r.line_no = t.line_no",
        params,
    )
    differs = " or ".join(
        f"s.{checked_name(c)} is distinct from t.{checked_name(c)}" for c in MEASURE_COLUMNS
    )
    stored = (
        f"select * from kidney_measures where person_key in (select person_key from {changed}) "
        f"and {near_changed(changed)}"
    )
    con.execute(
        f"""
        create or replace temp table measures_changed as
        with stored as ({stored})
        select distinct coalesce(s.file_id, t.file_id) as file_id, coalesce(s.line_no, t.line_no) as line_no
        from stored as s
        full join measures_touched as t on t.file_id = s.file_id and t.line_no = s.line_no
        where s.file_id is null or t.file_id is null or {differs}
        """
    )
    con.execute(
        f"delete from kidney_measures where person_key in (select person_key from {changed}) "
        "and (file_id, line_no) in (select file_id, line_no from measures_changed)"
    )
    con.execute(
        "insert into kidney_measures select t.* from measures_touched as t "
        "semi join measures_changed as c on c.file_id = t.file_id and c.line_no = t.line_no"
    )
    for table in ("measure_rows", "measures_touched", "measures_changed", changed):
        con.execute(f"drop table {checked_name(table)}")


def measure_rows(
    con: duckdb.DuckDBPyConnection, results: pl.DataFrame, settings: Settings
) -> pl.DataFrame:
    """``kidney_measures`` rows of a frame of lab_results rows, by the SQL rules (the tables of
    schema ``reference`` must be loaded in ``con``). Without ``birth_year`` the frame's
    ``age_years`` is taken as the exact age, as :func:`pipeline.core.measure_rules.measure_frame`
    takes it.
    """
    if "reported_unit" not in results.columns:
        results = results.with_columns(pl.lit(None, dtype=pl.String).alias("reported_unit"))
    if "reported_value" not in results.columns:
        results = results.with_columns(pl.col("value").cast(pl.Float64).alias("reported_value"))
    with_ages = "birth_year" not in results.columns
    if with_ages:
        results = results.with_columns(
            pl.col("age_years").cast(pl.Float64).alias("age_exact"),
            pl.when(pl.col("sex") == "F").then(True).when(pl.col("sex") == "M").then(False)
            .alias("female"),
        )  # fmt: skip
    with_frame(con, results, "create or replace temp table measure_rows_in as select * from _frame")
    sql, params = measure_query(settings, "select * from measure_rows_in", {}, with_ages)
    try:
        return fetch_frame(con, sql, params)
    finally:
        con.execute("drop table measure_rows_in")


def _summary(con: duckdb.DuckDBPyConnection) -> MeasureSummary:
    counts = con.execute(
        """
        select count(*) filter (where analyte in ('creatinine', 'cystatin_c')),
               count(egfr) filter (where analyte in ('creatinine', 'cystatin_c')),
               count(*) filter (where acr_basis is not null),
               count(a_category) filter (where acr_basis is not null)
        from kidney_measures
        """
    ).fetchall()[0]
    return MeasureSummary(*counts)
