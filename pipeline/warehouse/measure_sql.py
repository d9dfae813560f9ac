"""The measure SQL (``sql/derived/kidney_measures.sql``, ages from
``sql/derived/measure_ages.sql``) over a relation of results: the query with its parameters, and
a table of measures made from a relation in person-key ranges. Used by the measure stage for
``kidney_measures``, and by the link stage (in process and in every bucket) for the results known
at a past period end.
"""

from __future__ import annotations

from typing import Any

import duckdb

from pipeline.core.measure_rules import MEASURED_ANALYTES, measure_params
from pipeline.core.pseudonymise import person_range
from pipeline.core.settings import Settings
from pipeline.warehouse.sql import sql_over, used_params
from pipeline.warehouse.sql_files import checked_name

#: Results measured per pass: a large warehouse is measured in person-key ranges, so that one
#: statement's joins and sort stay within the memory limit.
CHUNK_RESULTS = 400_000


def measure_into(
    con: duckdb.DuckDBPyConnection, settings: Settings, results: str, table: str
) -> None:
    """Create ``table`` with the measures of every result of the relation ``results`` (columns
    of ``lab_results``) of an analyte measured, by the SQL rules, :data:`CHUNK_RESULTS` results
    per person-key range: the measure stage's ``kidney_measures`` from ``lab_results``, and the
    link stage's ``measures_known`` from the results known at a past period end. Nothing is
    gathered into Python (the polars rules of a past period end took 12.7 GB at 10M results).
    """
    analytes = list(MEASURED_ANALYTES)
    total = con.execute(
        f"select count(*) from {checked_name(results)} where list_contains($a, analyte)",
        {"a": analytes},
    ).fetchall()[0][0]
    chunks = max(1, -(-total // CHUNK_RESULTS))
    for chunk in range(chunks):
        lower, upper = person_range(chunk, chunks)
        sql, params = measure_query(
            settings,
            f"select * from {checked_name(results)} where list_contains($analytes, analyte) "
            "and person_key >= $lower and person_key < $upper",
            {"analytes": analytes, "lower": lower, "upper": upper},
        )
        verb = (
            f"insert into {checked_name(table)}"
            if chunk
            else f"create table {checked_name(table)} as"
        )
        con.execute(f"{verb}\n{sql}", params)


def measure_query(
    settings: Settings, input_query: str, input_params: dict[str, Any], with_ages: bool = False
) -> tuple[str, dict[str, Any]]:
    """``sql/derived/kidney_measures.sql`` over the rows of ``input_query`` (the relation
    ``measure_input`` of ``sql/derived/measure_ages.sql``, inlined as ``measure_ages``), and the
    parameters it uses: ``input_params`` and the measure settings. ``with_ages``: the rows of
    ``input_query`` carry ``age_exact`` and ``female`` already (the equation tests give exact ages).
    """
    inputs = {"measure_input": input_query, "measure_ages": "sql:measure_ages"}
    if with_ages:
        inputs = {"measure_ages": input_query}
    sql = sql_over("kidney_measures", inputs)
    return sql, used_params(sql, {**measure_params(settings.pipeline.measures), **input_params})
