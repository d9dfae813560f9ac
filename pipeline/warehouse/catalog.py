"""The catalog: descriptions of tables and columns (sql/catalog.yaml) written as comments, and
the published tables with the shape their disclosure control needs.
"""

from __future__ import annotations

import copy
import functools
from dataclasses import dataclass, field
from typing import Any

import duckdb
import yaml

from pipeline.warehouse.sql_files import _NAME, SQL_DIR, checked_name


def load_catalog() -> dict[str, Any]:
    path = SQL_DIR / "catalog.yaml"
    stat = path.stat()
    return copy.deepcopy(_parsed_catalog(str(path), stat.st_mtime_ns, stat.st_size))


@functools.lru_cache(maxsize=2)
def _parsed_catalog(path: str, mtime_ns: int, size: int) -> dict[str, Any]:
    """The parsed catalog, once per version of the file (every run writes its comments, and
    parsing the file took a quarter of a second, a tenth of a small run); libyaml's loader when
    PyYAML was built with it.
    """
    loader = getattr(yaml, "CSafeLoader", yaml.SafeLoader)
    with open(path, encoding="utf-8") as fh:
        return yaml.load(fh, Loader=loader)["tables"]


def apply_comments(con: duckdb.DuckDBPyConnection) -> None:
    """Write the catalog's descriptions as COMMENTs on every table, view and column it documents.

    Only a comment that differs from the stored one is written (after the first month almost
    none: a COMMENT statement per column took most of a small run's commit).
    """
    existing = {
        (s, t): ("table", c)
        for s, t, c in con.execute(
            "select schema_name, table_name, comment from duckdb_tables() "
            "where database_name = current_database()"
        ).fetchall()
    }
    existing.update({
        (s, t): ("view", c) for s, t, c in con.execute(
            "select schema_name, view_name, comment from duckdb_views() "
            "where database_name = current_database() and not internal and not temporary"
        ).fetchall()
    })  # fmt: skip
    column_comments: dict[tuple[str, str], dict[str, str | None]] = {}
    for s, t, column, comment in con.execute(
        "select schema_name, table_name, column_name, comment from duckdb_columns() "
        "where database_name = current_database()"
    ).fetchall():
        column_comments.setdefault((s, t), {})[column] = comment
    for qualified, entry in load_catalog().items():
        schema, _, table = qualified.rpartition(".")
        schema = schema or "main"
        if (schema, table) not in existing:
            continue
        target = f"{checked_name(schema)}.{checked_name(table)}"
        if not all(_NAME.match(p) for p in (schema, table)):
            raise ValueError(f"catalog.yaml: not a plain table name {qualified!r}")
        text = f"{entry['description'].strip()} Grain: {entry['grain'].strip()}"
        stored = existing[(schema, table)][1]
        kind = "view" if existing[(schema, table)][0] == "view" else "table"
        if stored != text:
            con.execute(f"comment on {kind} {target} is {_quote(text)}")
        columns = column_comments.get((schema, table), {})
        for column, description in (entry.get("columns") or {}).items():
            if column in columns and columns[column] != str(description):
                con.execute(
                    f'comment on column {target}."{checked_name(column)}" '
                    f"is {_quote(str(description))}"
                )


def _quote(text: str) -> str:
    # COMMENT ON does not take bound parameters; the text comes from our own catalog file.
    return "'" + text.replace("'", "''") + "'"


TOTAL = "ALL"


@dataclass(frozen=True)
class Partition:
    """Rows of a table (those whose columns hold the values in ``where``) that add up, per value
    of :attr:`TotalsFrom.join`, to the count ``total`` of the other table's total row.
    """

    column: str  # the count of this table
    total: str  # the count of the other table the rows add up to
    where: dict[str, tuple[str, ...]]


@dataclass(frozen=True)
class TotalsFrom:
    """The totals a table adds up to live in another published table (disclosed before it)."""

    table: str
    join: tuple[str, ...]  # keys shared with the other table's total rows
    row: dict[str, str]  # the other table's keys that mark its total rows
    partitions: tuple[Partition, ...]
    #: Columns shown as the other table publishes them (blank where it blanks them).
    copied: tuple[str, ...] = ()


@dataclass(frozen=True)
class Standardised:
    """Directly standardised rates on total rows, functions of the broad-age-group counts of the
    cells below (``group``: the cell's group, null for a cell outside the rate).
    """

    count: str
    group: str
    rates: tuple[str, ...]
    flag: str  # column written: '' published, few_events, suppressed (null: no rate on the row)


@dataclass(frozen=True)
class PublishedTable:
    name: str
    keys: tuple[str, ...]
    counts: tuple[str, ...]  # suppressed when small
    rates: dict[str, tuple[str, ...]]  # rate column -> the counts it is computed from
    public: tuple[str, ...] = ()  # counts that are public already (resident population)
    #: The hierarchy below the other keys, outermost first: a level whose columns are all 'ALL'
    #: marks a total of the rows below it. Empty: no totals, primary suppression only.
    levels: tuple[tuple[str, ...], ...] = ()
    #: Rates a total row computes from the rows below it: blanked when a source count of the row
    #: or of any row below it is blanked.
    group_rates: dict[str, tuple[str, ...]] = field(default_factory=dict)
    #: Sums of rows that equal counts published in another table.
    totals: TotalsFrom | None = None
    #: Standardised rates published by the broad-group rule of the module docstring.
    standardised: Standardised | None = None
    #: Columns read to blank this table's figures but not published with it: counts another
    #: table publishes (a count published under one name in two tables is one cell to the joint
    #: audit, which cannot protect a copy that lags the other table's blanks), or a difference
    #: of them. After the joint audit the figures of a row are blanked again wherever the other
    #: table's final rows blank one of ``follows`` (:func:`follow_final_blanks`).
    hidden: tuple[str, ...] = ()
    follows: tuple[str, tuple[str, ...], tuple[str, ...]] | None = (
        None  # (table, its counts, our columns)
    )


PUBLISHED_TABLES = (
    PublishedTable(
        "district_ckd_prevalence",
        keys=("period", "district_code", "sex", "age_band"),
        counts=("persons_tested", "persons_ckd", "persons_ckd_g3_g5"),
        rates={"ckd_share_of_tested": ("persons_ckd", "persons_tested"),
               "ckd_share_of_tested_low": ("persons_ckd", "persons_tested"),
               "ckd_share_of_tested_high": ("persons_ckd", "persons_tested"),
               "ckd_per_1000_residents": ("persons_ckd",)},
        public=("population",),
        levels=(("district_code",), ("sex", "age_band")),
        standardised=Standardised(
            "persons_ckd", "standardisation_age_group",
            ("ckd_per_1000_standardised", "ckd_per_1000_standardised_low", "ckd_per_1000_standardised_high"),
            "ckd_per_1000_standardised_flag"),
    ),
    PublishedTable(
        "district_screening_coverage",
        keys=("period", "district_code"),
        counts=("persons_with_diabetes", "with_egfr", "with_acr", "with_egfr_and_acr"),
        rates={"share_with_both": ("with_egfr_and_acr", "persons_with_diabetes"),
               "share_with_both_low": ("with_egfr_and_acr", "persons_with_diabetes"),
               "share_with_both_high": ("with_egfr_and_acr", "persons_with_diabetes")},
        levels=(("district_code",),),
    ),
    PublishedTable(
        "district_decline_incidence",
        keys=("period", "district_code"),
        counts=("persons_tested", "persons_decline_30", "persons_decline_40", "persons_decline_57"),
        rates={f"decline_{t}_per_1000_tested": (f"persons_decline_{t}", "persons_tested") for t in (30, 40, 57)}
        | {f"decline_{t}_per_1000_person_years": (f"persons_decline_{t}", "persons_tested")
           for t in (30, 40, 57)},
        levels=(("district_code",),),
    ),
    PublishedTable(
        "district_ckd_categories",
        keys=("period", "district_code", "category_axis", "category"),
        counts=("persons_ckd",),
        rates={"ckd_per_100_tested": ("persons_ckd", "persons_tested"),
               "ckd_per_100_tested_low": ("persons_ckd", "persons_tested"),
               "ckd_per_100_tested_high": ("persons_ckd", "persons_tested")},
        levels=(("district_code",),),
        totals=TotalsFrom(
            "district_ckd_prevalence", join=("period", "district_code"), row={"sex": TOTAL, "age_band": TOTAL},
            partitions=(
                Partition("persons_ckd", "persons_ckd", {"category_axis": ("gfr",)}),
                Partition("persons_ckd", "persons_ckd_g3_g5",
                          {"category_axis": ("gfr",), "category": ("G3a", "G3b", "G4", "G5")}),
                Partition("persons_ckd", "persons_ckd", {"category_axis": ("albuminuria",)}),
            ),
            copied=("persons_tested",)),
    ),
    # Expected undetected albuminuria (pipeline/core/undetected.py): its persons with diabetes and with
    # an ACR are the counts of district_screening_coverage, and the untested their difference.
    # They are read here only to blank the estimates (which are bounded by the untested count)
    # wherever coverage blanks either count, and are not published again: readers take them
    # from coverage, the one place the joint audit protects them.
    PublishedTable(
        "district_undetected_albuminuria",
        keys=("period", "district_code"),
        counts=("with_acr_a2_a3", "without_acr_pooled_stratum"),
        rates={"share_a2_a3_of_tested": ("with_acr_a2_a3", "with_acr")}
        | {c: ("persons_with_diabetes", "with_acr")
           for c in ("expected_share_without_acr", "expected_a2_a3_without_acr",
                     "expected_a2_a3_without_acr_low", "expected_a2_a3_without_acr_high")},
        levels=(("district_code",),),
        totals=TotalsFrom("district_screening_coverage", join=("period", "district_code"), row={},
                          partitions=(), copied=("persons_with_diabetes", "with_acr")),
        hidden=("persons_with_diabetes", "with_acr", "persons_without_acr"),
        follows=("district_screening_coverage", ("persons_with_diabetes", "with_acr"),
                 ("share_a2_a3_of_tested", "expected_share_without_acr", "expected_a2_a3_without_acr",
                  "expected_a2_a3_without_acr_low", "expected_a2_a3_without_acr_high")),
    ),
    # Coverage trend, all districts, as it stood at each of the 12 month ends (no hierarchy: one
    # row per month; its last row is district_screening_coverage's 'ALL' row).
    PublishedTable(
        "region_coverage_trend",
        keys=("period", "as_of_month"),
        counts=("persons_with_diabetes", "with_egfr", "with_acr", "with_egfr_and_acr"),
        rates={"share_with_both": ("with_egfr_and_acr", "persons_with_diabetes"),
               "share_with_both_low": ("with_egfr_and_acr", "persons_with_diabetes"),
               "share_with_both_high": ("with_egfr_and_acr", "persons_with_diabetes")},
    ),
    # What counting estimated albuminuria would add to the default counts (each added count is
    # a count of persons of its own, protected like any other).
    PublishedTable(
        "district_estimated_acr_sensitivity",
        keys=("period", "district_code"),
        counts=("persons_tested_added", "persons_ckd_added", "with_acr_added", "with_egfr_and_acr_added"),
        rates={},
        levels=(("district_code",),),
    ),
    # Equation-change impact (pipeline/core/equation_impact.py): per district and comparison, the
    # totals; per GFR category, counts that add up to those totals (protected against them as the
    # categories of district_ckd_categories are against district_ckd_prevalence).
    PublishedTable(
        "district_equation_change",
        keys=("period", "district_code", "comparison"),
        counts=("persons_compared", "moved_to_lower_gfr_category", "moved_to_higher_gfr_category",
                "persons_ckd_in_force", "persons_ckd_comparison"),
        rates={},
        levels=(("district_code",),),
    ),
    PublishedTable(
        "district_equation_change_categories",
        keys=("period", "district_code", "comparison", "g_category"),
        counts=("persons_in_force", "persons_comparison", "moved_to_lower_gfr_category",
                "moved_to_higher_gfr_category"),
        rates={},
        levels=(("district_code",),),
        totals=TotalsFrom(
            "district_equation_change", join=("period", "district_code", "comparison"), row={},
            partitions=(Partition("persons_in_force", "persons_compared", {}),
                        Partition("persons_comparison", "persons_compared", {}),
                        Partition("moved_to_lower_gfr_category", "moved_to_lower_gfr_category", {}),
                        Partition("moved_to_higher_gfr_category", "moved_to_higher_gfr_category", {}))),
    ),
)  # fmt: skip
