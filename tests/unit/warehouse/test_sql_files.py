"""Tests for pipeline.warehouse.sql_files: every relation's SQL is found by its name, and a name
that is not a plain identifier is refused before it could reach a query.

Outside facts: a name longer than 63 characters is cut by PostgreSQL (NAMEDATALEN 64; common
practice to keep to it); quotes, semicolons, spaces and dots in a name formatted into SQL are
the classic injection route (OWASP SQL Injection Prevention Cheat Sheet, allow-list input).
Every file parses as SQL in DuckDB's own parser (``extract_statements``).
"""

from __future__ import annotations

import duckdb
import pytest

from pipeline.warehouse.sql_files import SQL_DIR, read_sql, sql_path

FILES = sorted(SQL_DIR.glob("*/*.sql"))


def test_every_file_is_found_by_its_name_and_parses():
    assert FILES
    con = duckdb.connect()
    for path in FILES:
        assert sql_path(path.stem) == path
        statements = con.extract_statements(read_sql(path.stem))
        assert statements, path


@pytest.mark.parametrize(
    "name",
    ["runs; drop table runs", "runs'", 'runs"', "main.runs", "Runs", "1runs", "run s", "",
     "a" * 64, "runs\n"],
)  # fmt: skip
def test_a_name_that_is_not_a_plain_identifier_is_refused(name):
    with pytest.raises(ValueError, match="not a plain table name"):
        sql_path(name)


def test_a_name_of_63_characters_is_plain_but_must_exist():
    with pytest.raises(FileNotFoundError, match="found 0"):
        sql_path("a" * 63)
