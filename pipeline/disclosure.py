"""Disclose: publishable copies of the summary tables, small counts suppressed.

Any count from ``suppress_min`` to ``suppress_max`` (default 1-10, config/pipeline.yaml) is
blanked, and so is every rate whose numerator or denominator is blanked. Only tables in schema
``published`` are ever exported.
"""

from __future__ import annotations

from dataclasses import dataclass

import duckdb
import polars as pl

from pipeline.periods import Period
from pipeline.settings import DisclosureSettings
from pipeline.warehouse import fetch_frame


@dataclass(frozen=True)
class PublishedTable:
    name: str
    keys: tuple[str, ...]
    counts: tuple[str, ...]  # suppressed when small
    rates: dict[str, tuple[str, ...]]  # rate column -> the counts it is computed from
    public: tuple[str, ...] = ()  # counts that are public already (resident population)


PUBLISHED_TABLES = (
    PublishedTable(
        "district_ckd_prevalence",
        keys=("period", "district_code", "sex", "age_band"),
        counts=("persons_tested", "persons_ckd", "persons_ckd_g3_g5"),
        rates={"ckd_share_of_tested": ("persons_ckd", "persons_tested"),
               "ckd_per_1000_residents": ("persons_ckd",)},
        public=("population",),
    ),
    PublishedTable(
        "district_screening_coverage",
        keys=("period", "district_code"),
        counts=("persons_with_diabetes", "with_egfr", "with_acr", "with_egfr_and_acr"),
        rates={"share_with_both": ("with_egfr_and_acr", "persons_with_diabetes")},
    ),
)  # fmt: skip


def suppress(frame: pl.DataFrame, table: PublishedTable, rules: DisclosureSettings) -> pl.DataFrame:
    """Blank small counts and the rates built on them; add ``n_suppressed`` per row."""
    small = {c: pl.col(c).is_between(rules.suppress_min, rules.suppress_max) for c in table.counts}
    out = frame.with_columns(
        [pl.when(small[c]).then(None).otherwise(pl.col(c)).alias(c) for c in table.counts]
        + [pl.when(pl.any_horizontal([small[s] for s in srcs])).then(None).otherwise(pl.col(r)).alias(r)
           for r, srcs in table.rates.items()]
        + [pl.sum_horizontal([small[c].cast(pl.Int32) for c in table.counts]).alias("n_suppressed")]
    )  # fmt: skip
    return out


def disclose_stage(con: duckdb.DuckDBPyConnection, rules: DisclosureSettings, period: Period) -> dict[str, int]:
    """Replace this period's rows of every published table."""
    counts = {}
    for table in PUBLISHED_TABLES:
        frame = fetch_frame(con, f"select * from {table.name} where period = ?", [period.label])
        published = suppress(frame, table, rules)
        con.register("_pub", published.to_arrow())
        exists = con.execute(
            "select count(*) from duckdb_tables() where schema_name = 'published' and table_name = ?",
            [table.name],
        ).fetchall()[0][0]
        if not exists:
            con.execute(f"create table published.{table.name} as select * from _pub")
        else:
            con.execute(f"delete from published.{table.name} where period = ?", [period.label])
            con.execute(f"insert into published.{table.name} select * from _pub")
        con.unregister("_pub")
        counts[table.name] = published.height
    return counts
