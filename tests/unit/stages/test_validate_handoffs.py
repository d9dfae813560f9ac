"""The stages hand work on by name: each returns a small frozen result naming the relations it
leaves, and the next takes the names from it. None of them looks in DuckDB's catalogue to find
out whether another left a relation (a probe of ``duckdb_tables()`` / ``duckdb_views()``), and no
date is written into SQL text (values are bound parameters; project rule, DEVELOPERS.md).
"""

from __future__ import annotations

import dataclasses
import re
from pathlib import Path

import duckdb
import pytest

from pipeline.stages import quality_gate, validate
from pipeline.stages.link import persons, stage
from pipeline.warehouse.sql_files import checked_name

PACKAGE = Path(__file__).resolve().parents[3] / "pipeline"

#: The modules of the validate, link and quality-gate stages and the version closure.
HANDOFF_MODULES = [
    "stages/validate.py",
    "stages/quality_gate.py",
    "stages/link/persons.py",
    "stages/link/stage.py",
    "warehouse/versions.py",
]

PROBE = re.compile(r"duckdb_(tables|views)\s*\(", re.IGNORECASE)
DATE_IN_TEXT = re.compile(r"date\s+'\{|\.isoformat\(\)\}")


@pytest.mark.parametrize("module", HANDOFF_MODULES)
def test_no_stage_probes_the_catalogue_for_a_hand_off(module):
    source = (PACKAGE / module).read_text(encoding="utf-8")
    found = [n for n, line in enumerate(source.splitlines(), 1) if PROBE.search(line)]
    assert found == [], f"{module} probes duckdb_tables()/duckdb_views() on lines {found}"


@pytest.mark.parametrize("module", HANDOFF_MODULES)
def test_no_date_is_formatted_into_sql(module):
    source = (PACKAGE / module).read_text(encoding="utf-8")
    found = [n for n, line in enumerate(source.splitlines(), 1) if DATE_IN_TEXT.search(line)]
    assert found == [], f"{module} formats a date into SQL text on lines {found}"


@pytest.mark.parametrize(
    "result",
    [validate.Judged, validate.Settled, validate.Resolved, validate.Scope,
     validate.ValidateSummary, quality_gate.Batch, persons.ValidatedScope, stage.LinkSummary],
)  # fmt: skip
def test_hand_off_results_are_frozen(result):
    assert dataclasses.is_dataclass(result) and result.__dataclass_params__.frozen


def test_a_relation_name_outside_the_allow_list_is_refused():
    assert checked_name("results_validated") == "results_validated"
    for bad in ("results; drop table x", "Results", "1table", "a.b.c", "runs\n", ""):
        with pytest.raises(ValueError, match="not a plain relation name"):
            checked_name(bad)


def test_judging_leaves_the_relations_its_result_names(tmp_path):
    """begin_judging's result names the tables it made; validate_landed's names the view of the
    run's versions, which resolve_versions drops once it has stored them."""
    from pipeline.core.settings import load_settings
    from pipeline.warehouse.connection import connect
    from pipeline.warehouse.reference import load_reference_tables
    from tests.conftest import make_small_config

    settings = load_settings(make_small_config(tmp_path / "config"))
    con = connect(tmp_path / "w.duckdb")
    try:
        load_reference_tables(con, settings)
        con.execute("create temp table landed_files (file_id bigint)")
        judged = validate.begin_judging(con, files="landed_files")
        for name in (judged.rows, judged.unmapped):
            assert con.execute(f"select count(*) from {name}").fetchall() == [(0,)]
        settled = validate.validate_landed(con, judged, {})
        assert (settled.valid, settled.rejected, settled.held) == (0, 0, {})
        assert con.execute(f"select count(*) from {settled.versions}").fetchall() == [(0,)]
        resolved = validate.resolve_versions(con, settled)
        assert resolved.lab_results == 0 and resolved.scope.kind == "all"
        assert resolved.changed is None and resolved.scope.person_table is None
        with pytest.raises(duckdb.CatalogException):
            con.execute(f"select * from {settled.versions}")
    finally:
        con.close()
