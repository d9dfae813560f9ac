"""Reference tables: the config the SQL reads, written to schema ``reference`` every run
(analytes, codes, unit factors, GFR and albuminuria categories, age bands, district shapes).
"""

from __future__ import annotations

import json
from pathlib import Path

import duckdb
import polars as pl

from pipeline.core.equations import KDIGO_GFR_LOWER_BOUNDS, KDIGO_RISK
from pipeline.core.measure_rules import dipstick_categories, equation_coefficients
from pipeline.core.regions import read_district_shapes
from pipeline.core.settings import Settings
from pipeline.warehouse.connection import with_frame
from pipeline.warehouse.sql_files import checked_name


def write_district_shapes(
    con: duckdb.DuckDBPyConnection, config_dir: Path, districts: dict[str, str]
) -> int:
    """Replace ``reference.district_shapes`` from the config (empty when there is no file)."""
    shapes = read_district_shapes(config_dir, districts)
    frame = pl.DataFrame(
        {
            "district_code": sorted(shapes),
            "geometry_geojson": [
                json.dumps(shapes[c], separators=(",", ":")) for c in sorted(shapes)
            ],
        },
        schema={"district_code": pl.String, "geometry_geojson": pl.String},
    )
    with_frame(
        con, frame, "create or replace table reference.district_shapes as select * from _frame"
    )
    return frame.height


def load_reference_tables(con: duckdb.DuckDBPyConnection, settings: Settings) -> None:
    """Write the config the SQL needs as tables in schema ``reference`` (replaced every run)."""
    analytes = settings.analytes.analytes
    frames = {
        "analytes": pl.DataFrame(
            [{"analyte": n, "canonical_unit": a.canonical_unit, "result_type": a.result_type,
              "description": a.description} for n, a in analytes.items()],
            schema_overrides={"canonical_unit": pl.String},
        ),
        "ordinal_readings": pl.DataFrame(
            [{"analyte": n, "spelling": k.strip().lower(), "reading": v}
             for n, a in analytes.items() for k, v in a.readings.items()],
            schema={"analyte": pl.String, "spelling": pl.String, "reading": pl.String},
        ),
        "analyte_codes": pl.DataFrame(
            [{"loinc": c, "analyte": n, "is_fasting_code": c in a.fasting_loinc}
             for n, a in analytes.items() for c in a.loinc]
        ),
        "unit_factors": pl.DataFrame(
            [{"analyte": n, "unit": u, "factor": f.factor, "offset": f.offset,
              "is_canonical": u == a.canonical_unit, "factor_source": f.source}
             for n, a in analytes.items() for u, f in a.units.items()],
            schema_overrides={"factor_source": pl.String},
        ),
        "ranges": pl.DataFrame(
            [{"analyte": n, "min_value": r.min, "max_value": r.max, "range_source": r.source}
             for n, r in settings.pipeline.ranges.items()]
        ),
        "unit_aliases": pl.DataFrame(
            [{"source_id": "*", "alias_key": k, "unit": v} for k, v in settings.analytes.unit_aliases.items()]
            + [{"source_id": s.id, "alias_key": k.strip().lower().replace("µ", "u").replace("μ", "u"), "unit": v}
               for s in settings.sources for k, v in s.unit_aliases.items()]
        ),
        "districts": pl.DataFrame(
            [{"district_code": c, "district_name": n} for c, n in settings.districts.items()]
        ),
        "population": pl.DataFrame(settings.population).select(
            "district_code", "sex", "age_band", pl.col("population").cast(pl.Int64)
        ),
        "age_bands": _age_bands(settings.pipeline.summaries.age_bands),
        "gfr_categories": _gfr_categories(),
        "gfr_categories_ordered": _gfr_categories().with_row_index("band_order"),
        # the coefficients of pipeline/core/equations.py, for sql/derived/kidney_measures.sql
        "equation_coefficients": equation_coefficients(),
        "dipstick_categories": dipstick_categories(),
        "kdigo_risk": pl.DataFrame(
            [{"g_category": g, "a_category": a, "risk_category": r} for (g, a), r in KDIGO_RISK.items()]
        ),
    }  # fmt: skip
    for name, frame in frames.items():
        with_frame(
            con,
            frame,
            f"create or replace table reference.{checked_name(name)} as select * from _frame",
        )


def _gfr_categories() -> pl.DataFrame:
    """KDIGO GFR categories as [lower, upper) bounds, from the one table in pipeline.core.equations."""
    rows, upper = [], float("inf")
    for category, lower in KDIGO_GFR_LOWER_BOUNDS:
        rows.append({"g_category": category, "lower_bound": lower, "upper_bound": upper})
        upper = lower
    return pl.DataFrame(rows)


def _age_bands(lower_bounds: list[int]) -> pl.DataFrame:
    rows = []
    for i, low in enumerate(lower_bounds):
        high = lower_bounds[i + 1] - 1 if i + 1 < len(lower_bounds) else None
        rows.append(
            {
                "age_band": f"{low}-{high}" if high is not None else f"{low}+",
                "age_min": low,
                "age_max": high if high is not None else 200,
                "band_order": i,
            }
        )
    return pl.DataFrame(rows)


def reference_tables(con: duckdb.DuckDBPyConnection) -> list[str]:
    """Every table of schema ``reference`` (small: the reference loader's, the trajectory rules,
    the measure SQL's coefficients): a shard reads them as the warehouse does.
    """
    return [t for (t,) in con.execute(
        "select table_name from information_schema.tables where table_schema = 'reference' "
        "and table_type = 'BASE TABLE' order by table_name"
    ).fetchall()]  # fmt: skip
