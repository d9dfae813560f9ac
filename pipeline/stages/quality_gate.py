"""Quality gate per source batch: Great Expectations suites on a summary of the run's batches.

Runs inside the validate stage after this run's rows were judged
(``results_validated``). A source's batch is its well-formed rows of this run
(``reason_code`` null). The row-level rules in SQL already judge every row; this gate is the
batch-level check that the standardised table is what the marts expect, so that a rule that
slips (a join that fans out, a unit factor or range left out, a mapping gone wrong) shows up
as a failed batch, not as a wrong indicator.

Its cost hardly grows with the rows: DuckDB summarises the batches (three aggregations over the
table, about 0.2 s per million rows on 2 cores) into three small frames, and Great Expectations validates those, one validation call per frame
for every source at once (a validation definition in an ephemeral context: no files, no
network, progress bars off):

- ``standardised_columns``, one row per standard column of the table (``duckdb_columns()``):
  every column of the standardised table present, each with its DuckDB type;
- ``batch_cells``, one row per source x analyte x unit x status x sex code among the batch's
  rows, with the row count, the least and greatest value (over result-bearing rows; withdrawn
  results, cancelled and entered-in-error, carry none and are not range-checked), the plausible
  range of the analyte in its canonical unit (``reference.ranges``), the rows of a result-bearing
  status without a value, and the null count of each key column. Expectations: analyte among
  ``reference.analytes``; "analyte [unit]" among each analyte in its canonical unit; status in
  the FHIR Observation status value set; sex in F, M, U; least value >= range minimum and
  greatest value <= range maximum; no result-bearing row without a value; no null key;
- ``batch_totals``, one row per source: well-formed and rejected rows, rows whose row id
  (``"<file_id>:<line_no>"``) occurs more than once, and the rows read by this run's files in
  ``ingest_files`` (every file from the run's first file id on, except ``duplicate_file`` rows,
  whose rows are never landed). Expectations: no duplicated row id; well-formed + rejected =
  rows read (``row_count_balance``).

Each failing summary row names its source (the frames' index columns), so each source gets its
own verdict; a failed column check fails every source (they share the table). For a failed
row-level check the exact failing rows are then counted in DuckDB (the predicate beside each
expectation in :func:`_checks`), and the first MAX_UNEXPECTED_IDS row ids are reported, to join
back to the rows. Those look-ups run only for a failed check.

Great Expectations is imported inside :func:`check_batches`, and only when there is a batch to
check: the import (2-4 s warm on 2 cores) is most of the gate's time in a monthly run. Importing
it in a background thread was measured twice and left out: at run start (over ingest) and
while the scan stage hashes the inbox. On 2 cores the import's CPU is taken from the stages it
overlaps: in a 10M month the scan and ingest slowed by 0.8-2.6 s and the gate gained 1.0-3.5 s,
about nothing on balance.

Data Docs: with ``docs_dir`` given, the HTML report is built there (the caller passes
``out/<period>/quality/``) when a batch failed, or on every run with ``quality_pages="always"``
(setting ``quality_gate.quality_pages``). Pages load their stylesheets, scripts and fonts from CDNs
by default; the copies vendored in ``pipeline/stages/quality_assets/`` are put beside the pages
(``static/vendor/``) and every such link is rewritten to a relative path, so the report renders
offline.

**The quality folder is restricted output**: Data Docs show failing values and source ids,
and the gate's verdicts row ids of failing rows. Keep it with the other restricted outputs;
never publish it.
"""

from __future__ import annotations

import logging
import os
import re
import shutil
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import duckdb

from pipeline.core.settings import FHIR_STATUSES, Settings
from pipeline.warehouse.sql import sql_over
from pipeline.warehouse.sql_files import checked_name

log = logging.getLogger(__name__)

#: How many failing row ids a BatchCheck carries.
MAX_UNEXPECTED_IDS = 20
#: Statuses that withdraw a result: no value is expected and none is range-checked.
WITHDRAWN_STATUSES = ("cancelled", "entered-in-error")
#: Sex codes after staging (DEVELOPERS.md, Design notes: F, M, U; FHIR female/male mapped, anything else U).
SEX_CODES = ("F", "M", "U")
#: Columns that must never be null on a well-formed row.
KEY_COLUMNS = (
    "person_key",
    "collected_date",
    "analyte",
    "source_id",
    "file_id",
    "line_no",
)  # (sql/checks/batch_cells.sql counts the nulls of each)
#: When the Data Docs are built (setting ``quality_gate.quality_pages``).
QUALITY_PAGES_CHOICES = ("on_failure", "always", "never")

#: The standardised table (the columns of result_versions, before the outcome is settled) and
#: the DuckDB type of each.
STANDARD_COLUMNS: dict[str, str] = {
    "source_id": "VARCHAR",
    "file_id": "BIGINT",
    "line_no": "BIGINT",
    "person_key": "VARCHAR",
    "specimen_id": "VARCHAR",
    "collected_date": "DATE",
    "reported_date": "DATE",
    "reported_date_basis": "VARCHAR",
    "analyte": "VARCHAR",
    "loinc": "VARCHAR",
    "status": "VARCHAR",
    "value_text": "VARCHAR",
    "comparator": "VARCHAR",
    "reported_value": "DOUBLE",
    "reported_unit": "VARCHAR",
    "value": "DOUBLE",
    "unit": "VARCHAR",
    "is_fasting": "BOOLEAN",
    "height_cm": "DOUBLE",
    "sex": "VARCHAR",
    "birth_year": "INTEGER",
    "age_years": "BIGINT",
    "district_code": "VARCHAR",
}
#: The three frames and the columns that name a row of each in a GX result.
FRAMES: dict[str, tuple[str, ...]] = {
    "standardised_columns": ("column_name",),
    "batch_cells": ("source_id", "analyte_unit", "status", "sex"),
    "batch_totals": ("source_id",),
}
_WITHDRAWN = "coalesce(v.status, '') in ('cancelled', 'entered-in-error')"
_NUMBER = "v.value is not null and not isnan(v.value)"

ROW_COUNT_CHECK = "row_count_balance"
_SITE = "quality"
_DATASOURCE = "kidneysurv"
ASSETS_DIR = Path(__file__).resolve().parent / "quality_assets"
_VENDOR_DIR = ("static", "vendor")  # inside docs_dir

#: CDN links in the Data Docs templates of great_expectations 1.24 -> vendored copy (relative to
#: quality_assets/). The 1.19.0 filter-control stylesheet is served by the 1.19.1 file (identical
#: rules; only the version banner differs); bootstrap-dark by its minified build.
CDN_ASSETS: dict[str, str] = {
    "https://maxcdn.bootstrapcdn.com/bootstrap/4.3.1/css/bootstrap.min.css": "css/bootstrap.min.css",
    "https://unpkg.com/bootstrap-table@1.19.1/dist/bootstrap-table.min.css": "css/bootstrap-table.min.css",
    "https://unpkg.com/bootstrap-table@1.19.0/dist/extensions/filter-control/bootstrap-table-filter-control.css":
        "css/bootstrap-table-filter-control.min.css",
    "https://unpkg.com/bootstrap-table@1.19.0/dist/extensions/filter-control/bootstrap-table-filter-control.min.css":
        "css/bootstrap-table-filter-control.min.css",
    "https://cdnjs.cloudflare.com/ajax/libs/bootstrap-datepicker/1.9.0/css/bootstrap-datepicker.min.css":
        "css/bootstrap-datepicker.min.css",
    "https://cdn.jsdelivr.net/npm/@forevolve/bootstrap-dark@1.1.0/dist/css/bootstrap-prefers-dark.css":
        "css/bootstrap-prefers-dark.min.css",
    "https://cdnjs.cloudflare.com/ajax/libs/font-awesome/6.6.0/css/all.min.css": "fontawesome/css/all.min.css",
    "https://code.jquery.com/jquery-3.7.1.min.js": "js/jquery.min.js",
    "https://cdnjs.cloudflare.com/ajax/libs/popper.js/1.12.9/umd/popper.min.js": "js/popper.min.js",
    "https://stackpath.bootstrapcdn.com/bootstrap/4.3.1/js/bootstrap.min.js": "js/bootstrap.min.js",
    "https://unpkg.com/bootstrap-table@1.19.1/dist/bootstrap-table.min.js": "js/bootstrap-table.min.js",
    "https://unpkg.com/bootstrap-table@1.19.1/dist/extensions/filter-control/bootstrap-table-filter-control.min.js":
        "js/bootstrap-table-filter-control.min.js",
    "https://cdnjs.cloudflare.com/ajax/libs/bootstrap-datepicker/1.9.0/js/bootstrap-datepicker.min.js":
        "js/bootstrap-datepicker.min.js",
}  # fmt: skip
#: Chart libraries, used only by graph blocks (profiling, KL-divergence expectations), none of
#: which this suite renders: their script tags are removed rather than vendored (about 830 kB).
DROPPED_SCRIPTS = (
    "https://cdn.jsdelivr.net/npm/vega@5",
    "https://cdn.jsdelivr.net/npm/vega-lite@5",
    "https://cdn.jsdelivr.net/npm/vega-embed@6",
)
#: GX's logo host; the same images ship in the site's static/images/ (the dark logo does not:
#: the light one stands in).
_GX_IMAGE_HOST = "https://great-expectations-web-assets.s3.us-east-2.amazonaws.com/"
_GX_IMAGE_FALLBACK = "logo-long.png"

_TAG = re.compile(r"<(link|script)\b[^>]*>", re.IGNORECASE)
_TAG_URL = re.compile(r"""\b(href|src)\s*=\s*(["'])(.*?)\2""", re.IGNORECASE)
_SRI = re.compile(r"""\s+(integrity|crossorigin)(\s*=\s*(["']).*?\3)?""", re.IGNORECASE)
_SITE_STATIC = re.compile(r"^(\./|(\.\./)+)static/")
_GX_IMAGE = re.compile(re.escape(_GX_IMAGE_HOST) + r"([A-Za-z0-9_.-]+)(\?[^\"')\s]*)?")
#: External stylesheet / script / font references left in a page or stylesheet.
EXTERNAL_ASSET = re.compile(
    r"""<link\b[^>]*\bhref\s*=\s*["']?(https?:)?//[^"'\s>]+"""
    r"""|<script\b[^>]*\bsrc\s*=\s*["']?(https?:)?//[^"'\s>]+"""
    r"""|url\(\s*["']?(https?:)?//[^)"'\s]+"""
    r"""|@import\s+["'](https?:)?//[^"']+""",
    re.IGNORECASE,
)


@dataclass(frozen=True)
class Batch:
    """What the gate checks, as the validate stage hands it over: the run's judged rows (a
    temporary table of the run's connection) and the relation of the ids of the files the run
    landed (None: every file from the batch's first on).
    """

    rows: str = "results_validated"
    files: str | None = None


@dataclass
class BatchCheck:
    """The quality gate's verdict on one source's batch of this run.

    ``evaluated`` counts the checks run on the batch (every expectation of the three suites);
    ``failed`` names each failing check with a short reason; ``unexpected_row_ids`` lists up to
    MAX_UNEXPECTED_IDS failing ``row_id`` values (``"<file_id>:<line_no>"``), to join back to
    the rows; ``rows`` is the size of the batch, ``cells`` its rows in ``batch_cells``.
    ``seconds`` is the source's share of the gate's time: the shared work (GX import,
    summaries, validation, Data Docs) split evenly over the sources plus its own row-id
    look-ups, so that the seconds of all sources add up to the gate's wall time.
    """

    source_id: str
    success: bool
    evaluated: int
    failed: list[str]
    unexpected_row_ids: list[str]
    seconds: float
    rows: int = 0
    cells: int = 0


@dataclass(frozen=True)
class _Check:
    """One expectation, the frame it runs on, and the rows of a batch that break it.

    ``rows`` is a SQL predicate over the batch's rows ``v`` (left-joined to
    ``reference.ranges as r``) that holds exactly on the well-formed rows behind a failing
    summary row; None for a check that is not about rows (columns, row-count balance).
    """

    name: str
    frame: str
    expectation: Any
    rows: str | None = None


def check_batches(
    con: duckdb.DuckDBPyConnection,
    settings: Settings,
    docs_dir: Path | None,
    *,
    quality_pages: str | None = None,
    batch: Batch = Batch(),
) -> dict[str, BatchCheck]:
    """Validate the summary of every source's batch of this run; build Data Docs if asked.

    Returns one :class:`BatchCheck` per source with rows in ``batch.rows``.
    ``docs_dir`` (restricted output: see the module docstring) receives the Data Docs; None
    skips them. ``quality_pages`` (default: the setting ``quality_gate.quality_pages``): on_failure
    builds them only when some batch failed (a clean run leaves no report there), always on
    every call, never not at all.
    """
    started = time.perf_counter()
    mode = quality_pages or getattr(settings.pipeline.quality_gate, "quality_pages", "on_failure")
    if mode not in QUALITY_PAGES_CHOICES:
        raise ValueError(
            f"quality_pages must be one of {', '.join(QUALITY_PAGES_CHOICES)}, not {mode!r}"
        )
    table = checked_name(batch.rows)
    present = _present_columns(con, table)
    frames = {
        "standardised_columns": _schema_frame(con, table),
        "batch_cells": _cells_frame(con, present, table),
        "batch_totals": _totals_frame(con, batch),
    }
    totals = {r["source_id"]: r for r in frames["batch_totals"].to_dict("records")
              if isinstance(r["source_id"], str)}  # fmt: skip
    if not totals:
        return {}
    spec = _SuiteSpec.from_reference(con)
    checks = _checks(spec, table)
    context = _ephemeral_context(docs_dir)
    datasource = context.data_sources.add_pandas(_DATASOURCE)
    outcomes: dict[str, Any] = {}
    for frame_name, index in FRAMES.items():
        suite = context.suites.add(_suite(frame_name, [c for c in checks if c.frame == frame_name]))
        definition = _validation_definition(context, datasource, frame_name, suite)
        result = definition.run(
            batch_parameters={"dataframe": frames[frame_name]},
            result_format={
                "result_format": "COMPLETE",
                "unexpected_index_column_names": list(index),
            },
            run_id=_run_id(),
        )
        for item in result.results:
            outcomes[(item.expectation_config.meta or {}).get("check")] = item

    sources = sorted(totals)
    failures: dict[str, dict[str, str]] = {s: {} for s in sources}
    row_ids: dict[str, list[str]] = {s: [] for s in sources}
    own_seconds = dict.fromkeys(sources, 0.0)
    for check in checks:
        item = outcomes.get(check.name)
        if item is None or item.success:
            continue
        for source_id, cells in _failing_sources(item, check, sources).items():
            began = time.perf_counter()
            reason, ids = _reason(con, check, item, cells, totals[source_id], present, table)
            own_seconds[source_id] += time.perf_counter() - began
            failures[source_id][check.name] = reason
            row_ids[source_id] += [i for i in dict.fromkeys(ids) if i not in row_ids[source_id]]

    any_failed = any(failures.values())
    if docs_dir is not None and (mode == "always" or (mode == "on_failure" and any_failed)):
        build_docs(context, Path(docs_dir))
    elif docs_dir is not None:
        clear_docs(Path(docs_dir))
    shared = time.perf_counter() - started - sum(own_seconds.values())
    cells_per_source = frames["batch_cells"]["source_id"].value_counts().to_dict()
    return {
        s: BatchCheck(
            source_id=s,
            success=not failures[s],
            evaluated=len(checks),
            failed=[f"{name}: {reason}" for name, reason in failures[s].items()],
            unexpected_row_ids=row_ids[s][:MAX_UNEXPECTED_IDS],
            seconds=round(shared / len(sources) + own_seconds[s], 3),
            rows=int(totals[s]["rows"]),
            cells=int(cells_per_source.get(s, 0)),
        )
        for s in sources
    }


# --------------------------------------------------------------------------- the summaries


def _present_columns(con: duckdb.DuckDBPyConnection, table: str) -> dict[str, str]:
    """Columns of the table and their DuckDB types."""
    return dict(con.execute(
        "select column_name, data_type from duckdb_columns() "
        "where database_name = 'temp' and schema_name = 'main' and table_name = ?", [table]
    ).fetchall())  # fmt: skip


def _col(present: dict[str, str], name: str) -> str:
    """``v.<name>``; a typed null where the column is missing, a TRY_CAST where its type is
    wrong (the column checks fail then, and the other checks still run).
    """
    want = STANDARD_COLUMNS[name]
    if name not in present:
        return f"null::{want}"
    return f"v.{name}" if present[name] == want else f"try_cast(v.{name} as {want})"


def _frame(con: duckdb.DuckDBPyConnection, query: str, params: dict[str, Any] | None = None) -> Any:
    """A small query result as a pandas frame (through polars' Arrow path)."""
    return con.sql(query, params=params or None).pl().to_pandas()


def _schema_frame(con: duckdb.DuckDBPyConnection, table: str) -> Any:
    return _frame(con, """
        select column_name, data_type, column_name || ' ' || data_type as column_type
        from duckdb_columns()
        where database_name = 'temp' and schema_name = 'main' and table_name = $table
          and column_name in (select unnest($names::varchar[]))
        order by column_index
    """, {"table": table, "names": list(STANDARD_COLUMNS)})  # fmt: skip


def _cells_frame(con: duckdb.DuckDBPyConnection, present: dict[str, str], table: str) -> Any:
    """One row per source x analyte x unit x status x sex of the well-formed rows, in one scan
    (``sql/checks/batch_cells.sql``, over the standard columns in their types).
    """
    needed = ("source_id", "analyte", "unit", "status", "sex", "value", *KEY_COLUMNS)
    columns = ", ".join(f"{_col(present, n)} as {n}" for n in dict.fromkeys(needed))
    rows = f"select {columns} from {checked_name(table)} as v where v.reason_code is null"
    query = sql_over("batch_cells", {"batch_rows": rows})
    return _frame(con, query, {"withdrawn": list(WITHDRAWN_STATUSES)})


def _totals_frame(con: duckdb.DuckDBPyConnection, batch: Batch) -> Any:
    """One row per source with rows in the run: batch, rejected, duplicated ids, rows read
    (``sql/checks/batch_totals.sql``).
    """
    table = checked_name(batch.rows)
    # this run's files: those it landed (a reprocess lands earlier files again), else every file
    # from the batch's first on
    files = (
        f"select file_id from {checked_name(batch.files)}"
        if batch.files
        else f"select file_id from ingest_files where file_id >= (select min(file_id) from {table})"
    )
    query = sql_over("batch_totals", {"batch_rows": f"select * from {table}", "batch_files": files})
    return _frame(con, query)


# --------------------------------------------------------------------------- the suites


@dataclass
class _SuiteSpec:
    """What the suites need from the reference tables."""

    canonical_units: dict[str, str]  # analyte -> canonical unit
    ranges: dict[str, tuple[float, float]]  # analyte -> (min, max) in the canonical unit

    @classmethod
    def from_reference(cls, con: duckdb.DuckDBPyConnection) -> _SuiteSpec:
        units = con.execute(
            "select analyte, canonical_unit from reference.analytes order by analyte"
        ).fetchall()
        ranges = con.execute(
            "select analyte, min_value, max_value from reference.ranges order by analyte"
        ).fetchall()
        return cls(dict(units), {a: (float(lo), float(hi)) for a, lo, hi in ranges})


def _checks(spec: _SuiteSpec, table: str) -> list[_Check]:
    """Every expectation of the three suites, each with the rows that break it."""
    import great_expectations as gx

    e = gx.expectations
    ranges = "; ".join(f"{a} {lo:g}-{hi:g} {spec.canonical_units.get(a, '')}".rstrip()
                       for a, (lo, hi) in sorted(spec.ranges.items()))  # fmt: skip
    range_note = ("range_min and range_max are the plausible range of the cell's analyte in its "
                  f"canonical unit (reference.ranges), null on withdrawn results: {ranges}")  # fmt: skip
    checks = [
        _Check("expect_column_distinct_values_to_equal_set(column_name)", "standardised_columns",
               e.ExpectColumnDistinctValuesToEqualSet(
                   column="column_name", value_set=list(STANDARD_COLUMNS),
                   notes="every column of the standardised table is present")),
        _Check("expect_column_values_to_be_in_set(column_type)", "standardised_columns",
               e.ExpectColumnValuesToBeInSet(
                   column="column_type", value_set=[f"{c} {t}" for c, t in STANDARD_COLUMNS.items()],
                   notes="each column of the standardised table has its DuckDB type")),
        _Check("expect_column_values_to_be_in_set(analyte)", "batch_cells",
               e.ExpectColumnValuesToBeInSet(column="analyte", value_set=sorted(spec.canonical_units)),
               "v.analyte not in (select analyte from reference.analytes)"),
        _Check("expect_column_values_to_be_in_set(analyte_unit)", "batch_cells",
               e.ExpectColumnValuesToBeInSet(
                   column="analyte_unit",
                   value_set=[f"{a} [{u if u is not None else '(none)'}]"
                              for a, u in sorted(spec.canonical_units.items())],
                   notes="each analyte in its canonical unit (reference.analytes); an ordinal "
                         "analyte (dipstick) without one"),
               "not exists (select 1 from reference.analytes as a "
               "where a.analyte = v.analyte and a.canonical_unit is not distinct from v.unit)"),
        _Check("expect_column_values_to_be_in_set(status)", "batch_cells",
               e.ExpectColumnValuesToBeInSet(column="status", value_set=list(FHIR_STATUSES)),
               "v.status not in (select unnest($statuses::varchar[]))"),
        _Check("expect_column_values_to_be_in_set(sex)", "batch_cells",
               e.ExpectColumnValuesToBeInSet(column="sex", value_set=list(SEX_CODES)),
               "v.sex not in (select unnest($sexes::varchar[]))"),
        # a null value is allowed only on a withdrawn result
        _Check("expect_column_values_to_be_between(missing_value, 0, 0)", "batch_cells",
               e.ExpectColumnValuesToBeBetween(
                   column="missing_value", min_value=0, max_value=0,
                   notes="rows of a result-bearing status without a (finite) value; an ordinal "
                         "result (dipstick reading) has none"),
               f"not {_WITHDRAWN} and not ({_NUMBER}) and v.analyte not in "
               "(select analyte from reference.analytes where result_type = 'ordinal')"),
        _Check("expect_column_pair_values_a_to_be_greater_than_b(value_min, range_min)", "batch_cells",
               e.ExpectColumnPairValuesAToBeGreaterThanB(
                   column_A="value_min", column_B="range_min", or_equal=True,
                   ignore_row_if="either_value_is_missing", notes=range_note),
               f"not {_WITHDRAWN} and {_NUMBER} and v.value < r.min_value"),
        _Check("expect_column_pair_values_a_to_be_greater_than_b(range_max, value_max)", "batch_cells",
               e.ExpectColumnPairValuesAToBeGreaterThanB(
                   column_A="range_max", column_B="value_max", or_equal=True,
                   ignore_row_if="either_value_is_missing", notes=range_note),
               f"not {_WITHDRAWN} and {_NUMBER} and v.value > r.max_value"),
    ]  # fmt: skip
    checks += [
        _Check(f"expect_column_values_to_be_between(null_{k}, 0, 0)", "batch_cells",
               e.ExpectColumnValuesToBeBetween(column=f"null_{k}", min_value=0, max_value=0,
                                               notes=f"rows without {k} (a key column)"),
               f"v.{k} is null")
        for k in KEY_COLUMNS
    ]  # fmt: skip
    checks += [
        _Check("expect_column_values_to_be_between(duplicate_row_ids, 0, 0)", "batch_totals",
               e.ExpectColumnValuesToBeBetween(
                   column="duplicate_row_ids", min_value=0, max_value=0,
                   notes="rows whose row id (file_id:line_no) occurs more than once in the batch"),
               f"(v.file_id, v.line_no) in (select (file_id, line_no) from {table} "
               "where source_id = $source and reason_code is null "
               "group by file_id, line_no having count(*) > 1)"),
        _Check(ROW_COUNT_CHECK, "batch_totals",
               e.ExpectColumnPairValuesToBeEqual(
                   column_A="rows_landed", column_B="rows_read",
                   notes="well-formed + rejected rows = rows read by this run's files (ingest_files)")),
    ]  # fmt: skip
    return checks


def _suite(name: str, checks: list[_Check]) -> Any:
    import great_expectations as gx

    suite = gx.ExpectationSuite(name=name)
    for check in checks:
        check.expectation.meta = {"check": check.name}
        suite.add_expectation(check.expectation)
    return suite


# --------------------------------------------------------------------------- verdicts


def _failing_sources(
    item: Any, check: _Check, sources: list[str]
) -> dict[str, list[dict[str, Any]]]:
    """The sources a failed expectation names, each with its failing summary rows.

    A failed column check, an expectation that raised, or a failing row without a source id
    fails every source: they share the table.
    """
    outcome = item.result or {}
    indices = outcome.get("unexpected_index_list") or []
    raised = (item.exception_info or {}).get("raised_exception")
    if check.frame == "standardised_columns" or raised or not indices:
        return {s: [] for s in sources}
    found: dict[str, list[dict[str, Any]]] = {}
    for index in indices:
        source = index.get("source_id") if isinstance(index, dict) else None
        targets = [source] if isinstance(source, str) and source in sources else sources
        for s in targets:
            found.setdefault(s, []).append(index)
    return found


def _reason(con: duckdb.DuckDBPyConnection, check: _Check, item: Any, cells: list[dict[str, Any]],
            totals: dict[str, Any], present: dict[str, str], table: str) -> tuple[str, list[str]]:  # fmt: skip
    """Why the check failed for one source, and the first failing row ids."""
    info = item.exception_info or {}
    if info.get("raised_exception"):
        return f"error: {str(info.get('exception_message'))[:200]}", []
    if check.name == ROW_COUNT_CHECK:
        return (f"batch {totals['rows']} + rejected {totals['rejected']} = {totals['rows_landed']} rows, "
                f"but this run's files read {totals['rows_read']}"), []  # fmt: skip
    if check.rows is None or any(present.get(c) != t for c, t in STANDARD_COLUMNS.items()):
        outcome = item.result or {}
        unexpected = outcome.get("partial_unexpected_list")
        if unexpected:
            return f"unexpected {_short(unexpected)}", []
        return f"observed {_short(outcome.get('observed_value'))}", []
    count, ids = _failing_rows(con, check.rows, totals["source_id"], table)
    where = "; ".join(_describe(c) for c in cells[:3]) + (
        f"; {len(cells) - 3} more" if len(cells) > 3 else ""
    )
    return f"{where}: {count} of {totals['rows']} rows unexpected", ids


def _failing_rows(
    con: duckdb.DuckDBPyConnection, predicate: str, source_id: str, table: str
) -> tuple[int, list[str]]:
    """How many of the source's well-formed rows break a check, and the first row ids."""
    base = (f"from {checked_name(table)} as v left join reference.ranges as r on r.analyte = v.analyte "
            f"where v.source_id = $source and v.reason_code is null and ({predicate})")  # fmt: skip
    values = {"source": source_id, "statuses": list(FHIR_STATUSES), "sexes": list(SEX_CODES)}
    params = {k: v for k, v in values.items() if re.search(rf"\${k}\b", base)}
    count = con.execute(f"select count(*) {base}", params).fetchall()[0][0]
    ids = con.execute(
        f"select v.file_id::varchar || ':' || v.line_no::varchar {base} "
        "order by v.file_id, v.line_no limit $limit",
        {**params, "limit": MAX_UNEXPECTED_IDS},
    ).fetchall()
    return int(count), [i for (i,) in ids]


def _describe(cell: dict[str, Any]) -> str:
    """A failing summary row in a few words: its cell, then the values checked."""

    def text(value: Any) -> str:
        if isinstance(value, float):
            return f"{value:g}"
        return "(none)" if value is None or value != value else str(value)

    where = ", ".join(text(cell[k]) for k in ("analyte_unit", "status", "sex") if k in cell)
    shown = ", ".join(f"{k} {text(v)}" for k, v in cell.items() if k not in FRAMES["batch_cells"])
    if not where:
        return shown
    return f"{where} ({shown})" if shown else where


def _short(value: Any, limit: int = 120) -> str:
    text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


# --------------------------------------------------------------------------- GX plumbing


def _ephemeral_context(docs_dir: Path | None) -> Any:
    """An in-memory context: no project folder, analytics off, progress bars off."""
    import great_expectations as gx
    from great_expectations.data_context.types.base import (
        DataContextConfig,
        InMemoryStoreBackendDefaults,
        ProgressBarsConfig,
    )

    sites = {}
    if docs_dir is not None:
        sites[_SITE] = {
            "class_name": "SiteBuilder",
            "store_backend": {"class_name": "TupleFilesystemStoreBackend",
                              "base_directory": str(Path(docs_dir).resolve())},
            "site_index_builder": {"class_name": "DefaultSiteIndexBuilder"},
        }  # fmt: skip
    config = DataContextConfig(
        store_backend_defaults=InMemoryStoreBackendDefaults(),
        data_docs_sites=sites,
        analytics_enabled=False,
        progress_bars=ProgressBarsConfig(globally=False, metric_calculations=False),
    )
    return gx.get_context(mode="ephemeral", project_config=config)


def _validation_definition(context: Any, datasource: Any, name: str, suite: Any) -> Any:
    """A validation definition of a suite on a whole in-memory frame."""
    import great_expectations as gx

    batch = datasource.add_dataframe_asset(name).add_batch_definition_whole_dataframe("run")
    return context.validation_definitions.add(
        gx.ValidationDefinition(name=name, data=batch, suite=suite)
    )


def _run_id() -> Any:
    from great_expectations.core.run_identifier import RunIdentifier

    return RunIdentifier(run_name="batch_summary")


# --------------------------------------------------------------------------- Data Docs


def build_docs(context: Any, docs_dir: Path) -> list[Path]:
    """Build the Data Docs into ``docs_dir`` and make them work offline; return the HTML pages.

    What GX writes there (index.html, expectations/, validations/, static/) is replaced; other
    files in the folder are left alone. The folder is created owner-only.
    """
    docs_dir.mkdir(mode=0o700, parents=True, exist_ok=True)
    for name in ("expectations", "validations", "static"):
        shutil.rmtree(docs_dir / name, ignore_errors=True)
    (docs_dir / "index.html").unlink(missing_ok=True)
    context.build_data_docs(site_names=[_SITE])
    return localise_docs(docs_dir)


def clear_docs(docs_dir: Path) -> None:
    """Remove an earlier report from ``docs_dir`` (a clean run with on_failure builds none)."""
    if not docs_dir.is_dir():
        return
    for name in ("expectations", "validations", "static"):
        shutil.rmtree(docs_dir / name, ignore_errors=True)
    (docs_dir / "index.html").unlink(missing_ok=True)
    if not any(docs_dir.iterdir()):
        docs_dir.rmdir()


def localise_docs(docs_dir: Path) -> list[Path]:
    """Copy the vendored assets beside the pages and point every page and stylesheet at them.

    A stylesheet, script or font still loaded from the network afterwards (a template changed
    with a GX upgrade) is logged as a warning, with its URL.
    """
    static = docs_dir / _VENDOR_DIR[0]
    shutil.copytree(ASSETS_DIR, docs_dir.joinpath(*_VENDOR_DIR), dirs_exist_ok=True,
                    ignore=shutil.ignore_patterns("README.md"))  # fmt: skip
    pages = sorted(docs_dir.rglob("*.html"))
    for path in pages + sorted((static / "styles").glob("*.css")):
        text = path.read_text(encoding="utf-8")
        new = _rewrite(text, static, path.parent)
        if new != text:
            path.write_text(new, encoding="utf-8")
    leftovers = external_assets(docs_dir)
    if leftovers:
        log.warning("Data Docs still load %d asset(s) from the network: %s", len(leftovers),
                    ", ".join(sorted(set(leftovers))[:5]))  # fmt: skip
    return pages


def _rewrite(text: str, static: Path, page_dir: Path) -> str:
    """The text of a page or stylesheet with every asset link pointing at the site's static/."""
    static_rel = Path(os.path.relpath(static, page_dir)).as_posix()
    vendor_rel = f"{static_rel}/{'/'.join(_VENDOR_DIR[1:])}"
    images_rel = f"{static_rel}/images"
    images = static / "images"

    def tag(match: re.Match[str]) -> str:
        whole = match.group(0)
        found = _TAG_URL.search(whole)
        if not found:
            return whole
        url = found.group(3)
        if url in CDN_ASSETS:
            local = f"{vendor_rel}/{CDN_ASSETS[url]}"
            whole = whole[: found.start(3)] + local + whole[found.end(3) :]
            return _SRI.sub("", whole)  # the CDN's integrity hash and CORS mode do not apply
        in_site = _SITE_STATIC.match(url)
        if in_site:  # GX counts one folder too few for validation pages' favicon
            local = f"{static_rel}/{url[in_site.end() :]}"
            return whole[: found.start(3)] + local + whole[found.end(3) :]
        return whole

    def script_drop(text: str) -> str:
        for url in DROPPED_SCRIPTS:
            script = (
                r"<script\b[^>]*\bsrc\s*=\s*[\"']" + re.escape(url) + r"[\"'][^>]*>\s*</script>\s*"
            )
            text = re.sub(script, "", text, flags=re.IGNORECASE)
        return text

    def image(match: re.Match[str]) -> str:
        name = match.group(1)
        if not (images / name).is_file():
            name = _GX_IMAGE_FALLBACK
        return f"{images_rel}/{name}"

    text = script_drop(text)
    text = _TAG.sub(tag, text)
    return _GX_IMAGE.sub(image, text)


def external_assets(docs_dir: Path) -> list[str]:
    """Stylesheets, scripts and fonts that pages or stylesheets under docs_dir load from a URL."""
    found: list[str] = []
    for path in sorted(docs_dir.rglob("*")):
        if path.suffix.lower() in (".html", ".css") and path.is_file():
            found += [m.group(0) for m in EXTERNAL_ASSET.finditer(path.read_text(encoding="utf-8"))]
    return found
