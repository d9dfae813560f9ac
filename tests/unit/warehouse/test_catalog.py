"""Tests for sql/catalog.yaml against a real warehouse: after a run on a tiny three-lab inbox, every
table the pipeline leaves behind is documented (description, grain, every column) and carries
its DuckDB COMMENT."""

from __future__ import annotations

import pytest

from pipeline.warehouse.catalog import load_catalog
from tests.conftest import FIXTURES, make_small_config, rows, run_month, write_inbox

STANDARD = """person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,status,reported_at
WF-cat0001,1960,F,WF01,C0001,2025-06-02,2160-0,1.0,mg/dL,final,2025-06-03
WF-cat0001,1960,F,WF01,C0002,2025-06-02,9318-7,45,mg/g,final,2025-06-03
WF-cat0001,1960,F,WF01,C0003,2025-06-02,4548-4,7.1,%,final,2025-06-03
WF-cat0002,1950,M,WF02,C0004,2025-06-04,2160-0,see note,mg/dL,final,2025-06-05
WF-cat0002,1950,M,WF02,C0005,2025-06-04,2160-0,1.3,mg/dL,preliminary,2025-06-05
"""
DELIMITED = """PatientRef;YearOfBirth;Gender;AreaCode;SampleNo;SampleDate;TestCode;Result;Units;State;ReportDate
WF-cat0001;1960;F;WF01;CV0001;10/06/2025;CREA;97,2;µmol/l;F;11/06/2025
WF-cat0003;1980;M;WF03;CV0002;31/02/2025;CREA;70;µmol/l;F;11/06/2025
"""


@pytest.fixture(scope="module")
def warehouse(tmp_path_factory):
    base = tmp_path_factory.mktemp("catalog")
    config = make_small_config(base / "config")
    fhir = FIXTURES / "ingest" / "fhir_export" / "2025-03"
    inbox = write_inbox(base, {
        "westerfold_general_lab/results_2025-06.csv": STANDARD,
        "corvale_lab_chain/export_202506.csv": DELIMITED,
        "fallowmere_reference_lab/2025-06/Observation.ndjson": (fhir / "Observation.ndjson").read_text(),
        "fallowmere_reference_lab/2025-06/Patient.ndjson": (fhir / "Patient.ndjson").read_text(),
    })  # fmt: skip
    con = run_month(config, inbox, base / "out", period="2025-06")
    yield con
    con.close()


def qualified(schema: str, table: str) -> str:
    return table if schema == "main" else f"{schema}.{table}"


def tables(con, where: str = "true") -> list[tuple[str, str, str | None]]:
    """Tables and views (an intermediate table is a view in a usual monthly run)."""
    return rows(
        con,
        "select * from (select schema_name, table_name, comment from duckdb_tables() "
        "where database_name = current_database() and not temporary "
        "union all select schema_name, view_name, comment from duckdb_views() "
        "where database_name = current_database() and not temporary and not internal) "
        f"where {where} order by all",
    )


def columns(con, schema: str, table: str) -> list[tuple[str, str | None]]:
    return rows(
        con,
        "select column_name, comment from duckdb_columns() where database_name = current_database() "
        "and schema_name = ? and table_name = ? order by column_index",
        [schema, table],
    )


def test_the_run_used_all_three_labs(warehouse):
    got = dict(rows(warehouse, "select source_id, count(*) from lab_results group by all"))
    assert set(got) == {"westerfold_general_lab", "corvale_lab_chain", "fallowmere_reference_lab"}


def test_every_kept_table_is_in_the_catalog(warehouse):
    catalog = load_catalog()
    for schema, table, _ in tables(warehouse, "schema_name <> 'staging'"):
        name = qualified(schema, table)
        assert name in catalog, f"{name} is not in sql/catalog.yaml"
        entry = catalog[name]
        assert str(entry.get("description") or "").strip(), name
        assert str(entry.get("grain") or "").strip(), name
        documented = entry.get("columns") or {}
        for column, _ in columns(warehouse, schema, table):
            assert str(documented.get(column) or "").strip(), f"{name}.{column} is not documented"


def test_every_catalog_table_exists_after_a_run(warehouse):
    present = {qualified(s, t) for s, t, _ in tables(warehouse)}
    assert set(load_catalog()) <= present


def test_every_kept_table_and_column_has_a_comment(warehouse):
    for schema, table, comment in tables(warehouse, "schema_name <> 'staging'"):
        assert (comment or "").strip(), f"{schema}.{table} has no COMMENT"
        assert "Grain:" in comment
        for column, column_comment in columns(warehouse, schema, table):
            assert (column_comment or "").strip(), f"{schema}.{table}.{column} has no COMMENT"


def test_no_undocumented_table_left_in_staging(warehouse):
    catalog = load_catalog()
    leftovers = [f"{s}.{t}" for s, t, c in tables(warehouse, "schema_name = 'staging'")
                 if qualified(s, t) not in catalog or not (c or "").strip()]  # fmt: skip
    assert leftovers == []


def test_every_documented_column_exists(warehouse):
    """No drift the other way: the catalog documents no column a table does not have."""
    catalog = load_catalog()
    for schema, table, _ in tables(warehouse):
        entry = catalog.get(qualified(schema, table))
        if entry is None:
            continue
        present = {name for name, _ in columns(warehouse, schema, table)}
        extra = sorted(set(entry.get("columns") or {}) - present)
        assert not extra, f"{qualified(schema, table)}: catalog documents missing columns {extra}"


def test_a_comment_that_differs_from_the_catalog_is_written_again(tmp_path):
    # apply_comments skips a comment already stored as the catalog has it; one that differs
    # (an older catalog, a hand edit) is written again
    import duckdb

    from pipeline.warehouse.catalog import apply_comments

    entry = load_catalog()["ingest_files"]
    column, description = next(iter(entry["columns"].items()))
    with duckdb.connect(str(tmp_path / "w.duckdb")) as con:
        con.execute(f'create table ingest_files ("{column}" varchar, other varchar)')
        apply_comments(con)
        expected = f"{entry['description'].strip()} Grain: {entry['grain'].strip()}"
        assert rows(con, "select comment from duckdb_tables() where not temporary") == [(expected,)]
        con.execute("comment on table ingest_files is 'stale'")
        con.execute(f"comment on column ingest_files.\"{column}\" is 'stale'")
        apply_comments(con)
        assert rows(con, "select comment from duckdb_tables() where not temporary") == [(expected,)]
        got = rows(
            con,
            "select column_name, comment from duckdb_columns() "
            "where table_name = 'ingest_files' order by column_index",
        )
        assert got == [(column, str(description)), ("other", None)]
