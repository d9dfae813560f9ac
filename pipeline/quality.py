"""Quality gate per source batch: one Great Expectations suite per source, and its Data Docs.

Runs inside the validate stage after this run's rows were judged
(``staging.int_results_validated``). For every source with rows in this run, its well-formed rows
(``reason_code`` null) form one batch, a pandas frame with a ``row_id`` column
(``"<file_id>:<line_no>"``). One expectation suite, built in code from the reference tables, is
validated against the batch in one call (a validation definition in an ephemeral context: no
files, no network, progress bars off). The suite checks:

- the schema of the standardised table: the column set, and the type of every column;
- analytes among ``reference.analytes``; each analyte's unit equal to its canonical unit (an
  in-set expectation on the derived column ``analyte_unit``, "creatinine [mg/dL]");
- the value within the plausible range of its analyte in the canonical unit (``reference.ranges``,
  carried on each row as ``value_min`` and ``value_max``; null on cancellations and
  entered-in-error rows, which carry no result), as two column-pair expectations; a value present
  on every other row;
- no null key (person_key, collected_date, analyte, source_id, file_id, line_no); ``row_id``
  unique; status in the FHIR Observation status value set; sex in F, M, U.

One more check runs in plain Python (not in GX, so it is absent from the Data Docs): rows in the
batch + the source's rejected rows = the sum of ``rows_read`` of this run's files of the source in
``ingest_files`` (this run's files: every file from the run's first file id on, except
``duplicate_file`` rows, whose rows are never landed). It is reported as ``row_count_balance``.

A batch above ``chunk_rows`` rows is validated in chunks of whole (file_id, line_no) keys, so rows
sharing a ``row_id`` always meet in one chunk and the uniqueness check stays exact; the chunks'
results are merged. Great Expectations is imported inside :func:`check_batches` (the import takes
several seconds) and only when there is a batch to check.

Data Docs: with ``docs_dir`` given, the HTML report is built there (the caller passes
``out/<period>/quality/``). Pages load their stylesheets, scripts and fonts from CDNs by default;
the copies vendored in ``pipeline/quality_assets/`` are put beside the pages (``static/vendor/``)
and every such link is rewritten to a relative path, so the report renders offline.

**The quality folder is restricted output**: Data Docs show sample values and row ids of failing
rows (person keys among them). Keep it with the other restricted outputs; never publish it.
"""

from __future__ import annotations

import logging
import os
import re
import shutil
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import duckdb

from pipeline.settings import FHIR_STATUSES, Settings

log = logging.getLogger(__name__)

#: Rows per validation call; a larger batch is validated in chunks (proposed setting
#: ``quality_gate.chunk_rows``). Measured on 2 cores: 1M rows in one call about 9 s and +1.3 GB
#: peak (frame included); in chunks of 500k about 7 s and +1.0 GB.
DEFAULT_CHUNK_ROWS = 1_000_000
#: How many failing row ids a BatchCheck carries (every failing id is in the GX result).
MAX_UNEXPECTED_IDS = 20
#: Statuses that withdraw a result: no value is expected and none is range-checked.
WITHDRAWN_STATUSES = ("cancelled", "entered-in-error")
#: Sex codes after staging (DESIGN.md: F, M, U; FHIR female/male mapped, anything else U).
SEX_CODES = ("F", "M", "U")
#: Columns that must never be null on a well-formed row.
KEY_COLUMNS = ("person_key", "collected_date", "analyte", "source_id", "file_id", "line_no")

#: The standardised table (the columns of result_versions, before the outcome is settled) with
#: the pandas dtype each has once read through polars: strings ``str`` (pandas 3), dates
#: ``datetime64[ms]``, the flag ``bool`` (held as pandas' nullable ``boolean``; GX compares the
#: scalar type, so both pass and ``object`` fails).
STANDARD_COLUMNS: dict[str, str] = {
    "source_id": "str",
    "file_id": "int64",
    "line_no": "int64",
    "person_key": "str",
    "specimen_id": "str",
    "collected_date": "datetime64[ms]",
    "reported_date": "datetime64[ms]",
    "reported_date_basis": "str",
    "analyte": "str",
    "loinc": "str",
    "status": "str",
    "value_text": "str",
    "comparator": "str",
    "reported_value": "float64",
    "reported_unit": "str",
    "value": "float64",
    "unit": "str",
    "is_fasting": "bool",
    "height_cm": "float64",
    "sex": "str",
    "birth_year": "int32",
    "age_years": "int64",
    "district_code": "str",
}
_WITHDRAWN_SQL = "v.status in ('cancelled', 'entered-in-error')"
#: Columns added to the batch (SQL over staging.int_results_validated as v, reference.ranges as r)
#: and the columns they are made from. GX's own pair-in-set and row-condition expectations walk
#: or copy the whole frame on pandas (about 8 s per 40k rows; about 6 s per 1M rows for nine
#: per-analyte ranges), so the pairs are put on each row and checked column-wise.
#: name: (dtype, SQL, columns it is made from)
DERIVED_COLUMNS: dict[str, tuple[str, str, tuple[str, ...]]] = {
    "row_id": ("str", "v.file_id::varchar || ':' || v.line_no::varchar", ("file_id", "line_no")),
    "analyte_unit": (
        "str", "coalesce(v.analyte, '(none)') || ' [' || coalesce(v.unit, '(none)') || ']'",
        ("analyte", "unit"),
    ),
    "value_min": (
        "float64", f"case when {_WITHDRAWN_SQL} then null else r.min_value end", ("analyte", "status"),
    ),
    "value_max": (
        "float64", f"case when {_WITHDRAWN_SQL} then null else r.max_value end", ("analyte", "status"),
    ),
}  # fmt: skip
#: Every column of a batch and its expected dtype: row_id, the standard ones, the derived ones.
BATCH_COLUMNS: dict[str, str] = {
    "row_id": "str",
    **STANDARD_COLUMNS,
    **{c: dtype for c, (dtype, _, _) in DERIVED_COLUMNS.items() if c != "row_id"},
}

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


@dataclass
class BatchCheck:
    """The quality gate's verdict on one source's batch of this run.

    ``evaluated`` counts the checks run (the suite's expectations and the row-count balance);
    ``failed`` names each failing check with a short reason; ``unexpected_row_ids`` lists up to
    MAX_UNEXPECTED_IDS failing ``row_id`` values (``"<file_id>:<line_no>"``), to join back to
    the rows; ``rows`` is the size of the batch, ``chunks`` the validation calls it took.
    """

    source_id: str
    success: bool
    evaluated: int
    failed: list[str]
    unexpected_row_ids: list[str]
    seconds: float
    rows: int = 0
    chunks: int = 1


@dataclass
class _Merged:
    """One check's results merged over the chunks of a batch."""

    success: bool = True
    unexpected: int = 0
    elements: int = 0
    reason: str | None = None
    row_ids: list[str] = field(default_factory=list)


def check_batches(
    con: duckdb.DuckDBPyConnection,
    settings: Settings,
    docs_dir: Path | None,
    *,
    chunk_rows: int | None = None,
) -> dict[str, BatchCheck]:
    """Validate each source's well-formed rows of this run with one GX suite; build Data Docs.

    Returns one :class:`BatchCheck` per source with rows in ``staging.int_results_validated``.
    ``docs_dir`` (restricted output: see the module docstring) receives the Data Docs, rebuilt
    on every call; None skips them. ``chunk_rows`` defaults to the setting
    ``quality_gate.chunk_rows`` if present, else DEFAULT_CHUNK_ROWS.
    """
    chunk_rows = int(chunk_rows or getattr(settings.pipeline.quality_gate, "chunk_rows", None)
                     or DEFAULT_CHUNK_ROWS)  # fmt: skip
    counts = _source_counts(con)
    if not counts:
        return {}
    expected_read = _rows_read(con)
    columns = _batch_columns(con)
    spec = _SuiteSpec.from_reference(con)

    context = _ephemeral_context(docs_dir)
    datasource = context.data_sources.add_pandas(_DATASOURCE)
    results: dict[str, BatchCheck] = {}
    for source_id, (well_formed, rejected) in counts.items():
        started = time.perf_counter()
        suite = context.suites.add(spec.build_suite(source_id))
        definition = _validation_definition(context, datasource, source_id, suite)
        merged: dict[str, _Merged] = {}
        rows_seen = 0
        chunks = _chunks(con, source_id, well_formed, chunk_rows)
        for number, bounds in enumerate(chunks, start=1):
            frame = _batch_frame(con, source_id, columns, bounds)
            rows_seen += len(frame)
            result = definition.run(
                batch_parameters={"dataframe": frame},
                result_format={"result_format": "COMPLETE",
                               "unexpected_index_column_names": ["row_id"]},
                run_id=_run_id(number, len(chunks)),
            )  # fmt: skip
            del frame
            _merge(merged, result)
        balance = _balance(rows_seen, rejected, expected_read.get(source_id, 0))
        merged[ROW_COUNT_CHECK] = balance
        results[source_id] = _verdict(source_id, merged, time.perf_counter() - started,
                                      rows_seen, len(chunks))  # fmt: skip
    if docs_dir is not None:
        build_docs(context, Path(docs_dir))
    return results


# --------------------------------------------------------------------------- batches


def _source_counts(con: duckdb.DuckDBPyConnection) -> dict[str, tuple[int, int]]:
    """Well-formed and rejected rows per source in this run."""
    rows = con.execute(
        """
        select source_id,
               count(*) filter (where reason_code is null) as well_formed,
               count(*) filter (where reason_code is not null) as rejected
        from staging.int_results_validated
        group by source_id order by source_id
        """
    ).fetchall()
    return {s: (int(w), int(r)) for s, w, r in rows}


def _rows_read(con: duckdb.DuckDBPyConnection) -> dict[str, int]:
    """Sum of rows_read of this run's files per source.

    This run's files: every ledger row from the run's first file id on (ids are given in
    order, so a file whose rows all went missing is still counted), except ``duplicate_file``
    rows, whose rows are counted duplicate at ingest and never landed.
    """
    rows = con.execute(
        """
        select source_id, sum(rows_read)
        from ingest_files
        where status <> 'duplicate_file'
          and file_id >= (select min(file_id) from staging.int_results_validated)
        group by source_id
        """
    ).fetchall()
    return {s: int(n or 0) for s, n in rows}


def _batch_columns(con: duckdb.DuckDBPyConnection) -> list[str]:
    """The standardised columns present in the table (a missing one fails the schema check)."""
    present = {c for (c,) in con.execute(
        "select column_name from duckdb_columns() "
        "where schema_name = 'staging' and table_name = 'int_results_validated'"
    ).fetchall()}  # fmt: skip
    def available(column: str) -> bool:
        if column in DERIVED_COLUMNS:
            return set(DERIVED_COLUMNS[column][2]) <= present
        return column in present

    return [c for c in BATCH_COLUMNS if available(c)]


def _chunks(con: duckdb.DuckDBPyConnection, source_id: str, rows: int,
            chunk_rows: int) -> list[tuple[int, int, int, int] | None]:  # fmt: skip
    """Key ranges (first file, first line, last file, last line) of the batch's chunks.

    None = the whole batch in one call. Chunks are cut between (file_id, line_no) keys, never
    inside one, so duplicated row ids fall in the same chunk.
    """
    if rows <= chunk_rows:
        return [None]
    ranges = con.execute(
        """
        with keys as (
            select file_id, line_no, count(*) as n
            from staging.int_results_validated
            where source_id = $source and reason_code is null
            group by file_id, line_no
        ),
        placed as (
            select file_id, line_no,
                   (sum(n) over (order by file_id, line_no rows unbounded preceding) - n)
                       // $chunk_rows as chunk_no
            from keys
        )
        select first(file_id order by file_id, line_no), first(line_no order by file_id, line_no),
               last(file_id order by file_id, line_no), last(line_no order by file_id, line_no)
        from placed group by chunk_no order by chunk_no
        """,
        {"source": source_id, "chunk_rows": chunk_rows},
    ).fetchall()
    return [(int(f0), int(l0), int(f1), int(l1)) for f0, l0, f1, l1 in ranges]


def _batch_frame(con: duckdb.DuckDBPyConnection, source_id: str, columns: list[str],
                 bounds: tuple[int, int, int, int] | None) -> Any:  # fmt: skip
    """One batch (or chunk) as a pandas frame, in file and line order.

    Read through polars: DuckDB's own ``.df()`` took about 5 s at 1M rows, polars' Arrow path
    0.7 s. Booleans map to pandas' nullable ``boolean`` (a null would make them ``object``).
    """
    import polars as pl

    select = ", ".join(f"{DERIVED_COLUMNS[c][1]} as {c}" if c in DERIVED_COLUMNS else f"v.{c}"
                       for c in columns)  # fmt: skip
    where = "v.source_id = $source and v.reason_code is null"
    params: dict[str, Any] = {"source": source_id}
    if bounds is not None:
        where += (" and (v.file_id > $f0 or (v.file_id = $f0 and v.line_no >= $l0))"
                  " and (v.file_id < $f1 or (v.file_id = $f1 and v.line_no <= $l1))")  # fmt: skip
        params.update(f0=bounds[0], l0=bounds[1], f1=bounds[2], l1=bounds[3])
    query = (f"select {select} from staging.int_results_validated as v "
             f"left join reference.ranges as r on r.analyte = v.analyte "
             f"where {where} order by v.file_id, v.line_no")  # fmt: skip
    frame = con.sql(query, params=params).pl()
    flags = [name for name, dtype in frame.schema.items() if dtype == pl.Boolean]
    out = frame.to_pandas()
    for name in flags:
        out[name] = out[name].astype("boolean")
    return out


def _balance(batch_rows: int, rejected: int, rows_read: int) -> _Merged:
    if batch_rows + rejected == rows_read:
        return _Merged()
    return _Merged(
        success=False,
        reason=f"batch {batch_rows} + rejected {rejected} = {batch_rows + rejected} rows, "
        f"but this run's files read {rows_read}",
    )


# --------------------------------------------------------------------------- the suite


@dataclass
class _SuiteSpec:
    """What the suite needs from the reference tables."""

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

    def build_suite(self, source_id: str) -> Any:
        import great_expectations as gx
        from great_expectations.expectations.row_conditions import Column

        e = gx.expectations
        result_bearing = Column("status").is_not_in(list(WITHDRAWN_STATUSES))
        ranges = "; ".join(f"{a} {lo:g}-{hi:g} {self.canonical_units.get(a, '')}".rstrip()
                           for a, (lo, hi) in sorted(self.ranges.items()))  # fmt: skip
        range_note = (
            "value_min and value_max are the plausible range of the row's analyte in its canonical "
            f"unit (reference.ranges), null on withdrawn results: {ranges}"
        )
        checks: list[tuple[str, Any]] = [
            ("expect_table_columns_to_match_set",
             e.ExpectTableColumnsToMatchSet(column_set=list(BATCH_COLUMNS), exact_match=True)),
        ]  # fmt: skip
        checks += [
            (f"expect_column_values_to_be_of_type({c}, {t})",
             e.ExpectColumnValuesToBeOfType(column=c, type_=t))
            for c, t in BATCH_COLUMNS.items()
        ]
        checks += [
            (f"expect_column_values_to_not_be_null({c})", e.ExpectColumnValuesToNotBeNull(column=c))
            for c in KEY_COLUMNS
        ]
        checks += [
            ("expect_column_values_to_be_unique(row_id)",
             e.ExpectColumnValuesToBeUnique(column="row_id")),
            ("expect_column_values_to_be_in_set(analyte)",
             e.ExpectColumnValuesToBeInSet(column="analyte",
                                           value_set=sorted(self.canonical_units))),
            ("expect_column_values_to_be_in_set(analyte_unit)",
             e.ExpectColumnValuesToBeInSet(
                 column="analyte_unit",
                 value_set=[f"{a} [{u}]" for a, u in sorted(self.canonical_units.items())],
                 notes="each analyte in its canonical unit (reference.analytes)")),
            ("expect_column_values_to_be_in_set(status)",
             e.ExpectColumnValuesToBeInSet(column="status", value_set=list(FHIR_STATUSES))),
            ("expect_column_values_to_be_in_set(sex)",
             e.ExpectColumnValuesToBeInSet(column="sex", value_set=list(SEX_CODES))),
            # a null value is allowed only on a withdrawn result; between-checks skip nulls
            ("expect_column_values_to_not_be_null(value, status not withdrawn)",
             e.ExpectColumnValuesToNotBeNull(column="value", row_condition=result_bearing)),
            ("expect_column_pair_values_a_to_be_greater_than_b(value, value_min)",
             e.ExpectColumnPairValuesAToBeGreaterThanB(
                 column_A="value", column_B="value_min", or_equal=True,
                 ignore_row_if="either_value_is_missing", notes=range_note)),
            ("expect_column_pair_values_a_to_be_greater_than_b(value_max, value)",
             e.ExpectColumnPairValuesAToBeGreaterThanB(
                 column_A="value_max", column_B="value", or_equal=True,
                 ignore_row_if="either_value_is_missing", notes=range_note)),
        ]  # fmt: skip
        suite = gx.ExpectationSuite(name=source_id)
        for name, expectation in checks:
            expectation.meta = {"check": name}
            suite.add_expectation(expectation)
        return suite


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


def _validation_definition(context: Any, datasource: Any, source_id: str, suite: Any) -> Any:
    """A validation definition of the source's suite on a whole in-memory frame."""
    import great_expectations as gx

    batch = datasource.add_dataframe_asset(source_id).add_batch_definition_whole_dataframe("run")
    return context.validation_definitions.add(
        gx.ValidationDefinition(name=source_id, data=batch, suite=suite)
    )


def _run_id(number: int, total: int) -> Any:
    from great_expectations.core.run_identifier import RunIdentifier

    return RunIdentifier(run_name="whole_batch" if total == 1 else f"chunk_{number}_of_{total}")


def _merge(merged: dict[str, _Merged], result: Any) -> None:
    """Fold one validation result into the per-check totals."""
    for item in result.results:
        config = item.expectation_config
        name = (config.meta or {}).get("check") or config.type
        entry = merged.setdefault(name, _Merged())
        outcome = item.result or {}
        entry.unexpected += int(outcome.get("unexpected_count") or 0)
        entry.elements += int(outcome.get("element_count") or 0)
        if item.success:
            continue
        entry.success = False
        info = item.exception_info or {}
        if info.get("raised_exception"):
            entry.reason = f"error: {str(info.get('exception_message'))[:200]}"
        elif "unexpected_count" not in outcome and entry.reason is None:
            entry.reason = f"observed {_short(outcome.get('observed_value'))}"
        for index in outcome.get("unexpected_index_list") or []:
            if len(entry.row_ids) >= MAX_UNEXPECTED_IDS:
                break
            row_id = index.get("row_id") if isinstance(index, dict) else None
            if row_id is not None:
                entry.row_ids.append(str(row_id))


def _short(value: Any, limit: int = 120) -> str:
    text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _verdict(source_id: str, merged: dict[str, _Merged], seconds: float, rows: int,
             chunks: int) -> BatchCheck:  # fmt: skip
    failed, row_ids = [], []
    for name, entry in merged.items():
        if entry.success:
            continue
        reason = entry.reason or f"{entry.unexpected} of {entry.elements} rows unexpected"
        failed.append(f"{name}: {reason}")
        row_ids += [r for r in entry.row_ids if r not in row_ids]
    return BatchCheck(
        source_id=source_id,
        success=not failed,
        evaluated=len(merged),
        failed=failed,
        unexpected_row_ids=row_ids[:MAX_UNEXPECTED_IDS],
        seconds=round(seconds, 3),
        rows=rows,
        chunks=chunks,
    )


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
            whole = whole[: found.start(3)] + local + whole[found.end(3):]
            return _SRI.sub("", whole)  # the CDN's integrity hash and CORS mode do not apply
        in_site = _SITE_STATIC.match(url)
        if in_site:  # GX counts one folder too few for validation pages' favicon
            local = f"{static_rel}/{url[in_site.end():]}"
            return whole[: found.start(3)] + local + whole[found.end(3):]
        return whole

    def script_drop(text: str) -> str:
        for url in DROPPED_SCRIPTS:
            script = r"<script\b[^>]*\bsrc\s*=\s*[\"']" + re.escape(url) + r"[\"'][^>]*>\s*</script>\s*"
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
