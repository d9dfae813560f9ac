"""What the report reads from the warehouse: the published tables of a period, the run's
manifest and quality figures, gathered once into one record the sections draw from.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import duckdb

from pipeline.core.periods import Period
from pipeline.warehouse.catalog import PUBLISHED_TABLES
from pipeline.warehouse.sql_files import checked_name

PREVALENCE = "published.district_ckd_prevalence"


COVERAGE = "published.district_screening_coverage"


INCIDENCE = "published.district_decline_incidence"


CATEGORIES = "published.district_ckd_categories"


TREND = "published.region_coverage_trend"


#: The only tables the report reads: publishable, quality per lab, reference and the manifest.
READABLE_TABLES = (
    PREVALENCE,
    COVERAGE,
    INCIDENCE,
    CATEGORIES,
    "published.district_undetected_albuminuria",
    "published.district_equation_change",
    "published.district_equation_change_categories",
    "published.region_coverage_trend",
    "published.district_estimated_acr_sensitivity",
    "reference.district_shapes",
    "source_quality",
    "source_rejection_reasons",
    "lab_egfr_agreement",
    "reference.districts",
    "runs",
)


MONTHS = ("January", "February", "March", "April", "May", "June", "July", "August", "September",
          "October", "November", "December")  # fmt: skip


TOTAL = "ALL"


UNKNOWN_DISTRICT = "unknown"


_RATES = {t.name: t.rates for t in PUBLISHED_TABLES}


_PUBLIC = {c for t in PUBLISHED_TABLES for c in t.public}  # never suppressed (resident population)


_GROUP_RATES = {t.name: t.group_rates for t in PUBLISHED_TABLES}


#: Standardised rates and the column that says whether each is published (pipeline/stages/disclose/suppression.py).
_STANDARDISED = {t.name: t.standardised for t in PUBLISHED_TABLES if t.standardised is not None}


def _select(con: duckdb.DuckDBPyConnection, table: str, query: str,
            params: Sequence[Any] = ()) -> list[dict[str, Any]]:  # fmt: skip
    """Rows of ``query`` (which reads ``{t}`` = ``table``) as dicts; only READABLE_TABLES."""
    if table not in READABLE_TABLES:
        raise ValueError(f"the report does not read {table!r}")
    if not _exists(con, table):
        return []
    cur = con.execute(query.format(t=checked_name(table)), list(params))
    names = [d[0] for d in cur.description]
    return [dict(zip(names, row, strict=False)) for row in cur.fetchall()]


def _exists(con: duckdb.DuckDBPyConnection, table: str) -> bool:
    schema, _, name = table.rpartition(".")
    found = con.execute(
        "select count(*) from duckdb_tables() where schema_name = ? and table_name = ? "
        "and database_name = current_database()",
        [schema or "main", name],
    ).fetchall()
    return bool(found[0][0])


def _columns(con: duckdb.DuckDBPyConnection, table: str) -> set[str]:
    schema, _, name = table.rpartition(".")
    rows = con.execute(
        "select column_name from duckdb_columns() where schema_name = ? and table_name = ? "
        "and database_name = current_database()",
        [schema or "main", name],
    ).fetchall()
    return {r[0] for r in rows}


@dataclass
class _Data:
    period: Period
    districts: dict[str, str]
    run: dict[str, Any] | None
    manifest: dict[str, Any]
    prevalence: list[dict[str, Any]]
    prevalence_columns: set[str]
    suppressed_below: dict[str, int]  # district -> blanked counts in its rows (ALL: the table)
    coverage: list[dict[str, Any]]
    coverage_columns: set[str]
    coverage_trend: list[dict[str, Any]]
    quality: list[dict[str, Any]]
    reasons: list[dict[str, Any]]
    agreement: list[dict[str, Any]]
    incidence: list[dict[str, Any]] = field(default_factory=list)
    categories: list[dict[str, Any]] = field(default_factory=list)
    undetected: list[dict[str, Any]] = field(default_factory=list)  # pipeline/report/indicators.py
    equation_change: dict[str, list[dict[str, Any]]] = field(default_factory=dict)
    sensitivity: list[dict[str, Any]] = field(default_factory=list)
    shapes: dict[str, dict] = field(
        default_factory=dict
    )  # district boundaries (GeoJSON geometries)

    @property
    def demo_key(self) -> bool | None:
        return None if self.run is None else bool(self.run["demo_key"])

    @property
    def key_notice(self) -> str:
        if self.demo_key is None:
            return "No published run is recorded for this period: the key and settings cannot be shown."
        return "Made with the public demo key: invented data, not for real use."

    @property
    def period_words(self) -> str:
        return f"{MONTHS[self.period.month - 1]} {self.period.year}"

    @property
    def end_words(self) -> str:
        end = self.period.end
        return f"{end.day} {MONTHS[end.month - 1]} {end.year}"

    def threshold(self, section: str, key: str, default: Any) -> Any:
        value = self.manifest.get("thresholds", {}).get(section, {}).get(key)
        return default if value is None else value

    @property
    def suppress_max(self) -> int:
        return int(self.threshold("disclosure", "suppress_max", 10))

    @property
    def suppress_min(self) -> int:
        return int(self.threshold("disclosure", "suppress_min", 1))

    @property
    def confidence(self) -> float:
        return float(self.threshold("summaries", "confidence", 0.95))

    def district_name(self, code: str) -> str:
        if code == TOTAL:
            return "All districts"
        if code == UNKNOWN_DISTRICT:
            return "District not known"
        return self.districts.get(code, code)


def _collect(con: duckdb.DuckDBPyConnection, period: Period) -> _Data:
    p = period.label
    districts = {r["district_code"]: r["district_name"] for r in
                 _select(con, "reference.districts", "select * from {t} order by district_code")}  # fmt: skip
    runs = _select(con, "runs", "select run_id, period, started_at, status, package_version, git_commit, "
                   "config_sha256, demo_key, manifest from {t} where period = ? "
                   "order by started_at desc, run_id desc limit 1", [p])  # fmt: skip
    run = runs[0] if runs else None
    manifest = {}
    if run is not None:
        raw = run["manifest"]
        manifest = json.loads(raw) if isinstance(raw, str) else dict(raw or {})
    prevalence = _select(con, PREVALENCE, "select * from {t} where period = ? and sex = 'ALL' "
                         "and age_band = 'ALL'", [p])  # fmt: skip
    below = {
        r["district_code"]: int(r["n"] or 0)
        for r in _select(
            con,
            PREVALENCE,
            "select district_code, sum(n_suppressed) as n from {t} where period = ? group by 1",
            [p],
        )
    }
    below[TOTAL] = sum(below.values())
    coverage = _select(con, COVERAGE, "select * from {t} where period = ?", [p])
    if _exists(
        con, TREND
    ):  # as it stood at each of the 12 month ends (sql/reports/region_coverage_trend.sql)
        trend = _select(con, TREND, "select * exclude (period), as_of_month as period from {t} where period = ? "
                        "order by as_of_month", [p])  # fmt: skip
    else:
        trend = _select(con, COVERAGE, "select * from {t} where district_code = 'ALL' and period <= ? "
                        "order by period", [p])  # fmt: skip
    quality = _select(con, "source_quality", "select * from {t} where period = ? "
                      "order by source_id, extract_month", [p])  # fmt: skip
    reasons = _select(con, "source_rejection_reasons",
                      "select source_id, reason_code, sum(rows)::bigint as rows from {t} where period = ? "
                      "group by all order by source_id, rows desc, reason_code", [p])  # fmt: skip
    agreement = _select(con, "lab_egfr_agreement", "select * from {t} where period = ? "
                        "order by source_id, month", [p])  # fmt: skip
    incidence = (_select(con, INCIDENCE, "select * from {t} where period = ?", [p])
                 if _exists(con, INCIDENCE) else [])  # fmt: skip
    categories = _select(con, CATEGORIES, "select * from {t} where period = ?", [p])
    return _Data(
        period=period, districts=districts, run=run, manifest=manifest,
        prevalence=_district_order(prevalence), prevalence_columns=_columns(con, PREVALENCE),
        suppressed_below=below, coverage=_district_order(coverage), coverage_columns=_columns(con, COVERAGE),
        coverage_trend=trend, quality=quality, reasons=reasons, agreement=agreement,
        incidence=_district_order(incidence), categories=categories,
        undetected=collect_undetected(con, p),
        equation_change=collect_equation_change(con, p),
        sensitivity=collect_sensitivity(con, p),
        shapes=collect_shapes(con),
    )  # fmt: skip


def _district_order(rows: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Districts by code, then the unknown district, then the total."""
    rank = {UNKNOWN_DISTRICT: 1, TOTAL: 2}
    return sorted(rows, key=lambda r: (rank.get(r["district_code"], 0), str(r["district_code"])))


def _is_blanked(row: dict[str, Any], column: str) -> bool:
    """A count of a published row is blanked when it is empty in a row that suppressed counts
    (a public count, the resident population, is never blanked: empty means there is none).
    """
    return column not in _PUBLIC and row.get(column) is None and bool(row.get("suppression"))


def _rate_blanked(table: str, row: dict[str, Any], rate: str, data: _Data) -> bool:
    """A rate is shown only when none of the counts it is built on is blanked (even if a value is
    there: the report does not rely on the disclosure step having blanked it).
    """
    sources = _RATES.get(table, {}).get(rate)
    if sources is not None:
        return any(_is_blanked(row, s) for s in sources)
    if rate in _GROUP_RATES.get(table, {}):
        return row.get(rate) is None and data.suppressed_below.get(row["district_code"], 0) > 0
    spec = _STANDARDISED.get(table)
    if spec is not None and rate in spec.rates:
        if spec.flag in row:  # published with its flag: shown exactly when the flag is ''
            return row.get(spec.flag) not in ("", None) or (
                row.get(spec.flag) is None and row.get(rate) is not None
            )
        return row.get(rate) is None and data.suppressed_below.get(row["district_code"], 0) > 0
    return row.get(rate) is None and bool(row.get("suppression"))


UNDETECTED = "published.district_undetected_albuminuria"


def collect_undetected(con, period: str) -> list[dict[str, Any]]:
    if not _exists(con, UNDETECTED):
        return []
    # the counts of persons with diabetes and with an ACR are coverage's, published there only
    # (pipeline/stages/disclose/suppression.py): shown beside the estimates as coverage publishes them
    query = (
        "select u.*, c.persons_with_diabetes, c.with_acr, "
        "c.persons_with_diabetes - c.with_acr as persons_without_acr "
        "from {t} as u left join published.district_screening_coverage as c "
        "on c.period = u.period and c.district_code = u.district_code where u.period = ?"
    )
    return _district_order(_select(con, UNDETECTED, query, [period]))


EQUATION_TOTALS = "published.district_equation_change"


EQUATION_CATEGORIES = "published.district_equation_change_categories"


def collect_equation_change(con, period: str) -> dict[str, list[dict[str, Any]]]:
    if not (_exists(con, EQUATION_TOTALS) and _exists(con, EQUATION_CATEGORIES)):
        return {"totals": [], "categories": []}
    totals = _select(
        con, EQUATION_TOTALS, "select * from {t} where period = ? order by comparison", [period]
    )
    categories = _select(con, EQUATION_CATEGORIES, "select * from {t} where period = ?", [period])
    return {"totals": _district_order(totals), "categories": categories}


SENSITIVITY = "published.district_estimated_acr_sensitivity"


def collect_sensitivity(con, period: str) -> list[dict[str, Any]]:
    if not _exists(con, SENSITIVITY):
        return []
    return _district_order(
        _select(con, SENSITIVITY, "select * from {t} where period = ?", [period])
    )


SHAPES = "reference.district_shapes"


def collect_shapes(con) -> dict[str, dict]:
    import json

    if not _exists(con, SHAPES):
        return {}
    rows = _select(
        con, SHAPES, "select district_code, geometry_geojson from {t} order by district_code"
    )
    return {row["district_code"]: json.loads(row["geometry_geojson"]) for row in rows}
