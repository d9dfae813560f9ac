"""EXPLAIN ANALYZE of the pipeline's heavy SQL on a copy of a benchmarked warehouse.

Usage: python bench/explain.py WAREHOUSE [--period YYYY-MM] [--config DIR] [--top N]

Copies ``WAREHOUSE`` (a ``surveillance.duckdb`` written by bench/run.py) to a temporary folder,
then runs each SQL file below as the pipeline does (``create or replace table ... as``, same
parameters, same memory limit) with DuckDB's JSON profiling on (the data behind EXPLAIN
ANALYZE), and prints its wall time, peak buffer memory and most expensive operators; the
profiles are saved beside the warehouse (``profile_<file>.json``). The tables a file
reads must still be in the warehouse: the transient staging tables are dropped at commit, so
only files over persisted tables are listed. Nothing is written to the original warehouse.
"""

from __future__ import annotations

import argparse
import json
import re
import shutil
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

#: SQL files over persisted tables, in pipeline order, with the parameters they get.
FILES = (
    "result_versions_resolved",
    "lab_results",
    "daily_values_averaged",
    "kidney_events",
    "person_status",
)


def operators(
    node: dict, out: list[tuple[float, str, int, str]]
) -> list[tuple[float, str, int, str]]:
    """(seconds, operator, rows out, detail) of every operator of DuckDB's JSON profile."""
    info = node.get("extra_info") or {}
    detail = next((f"{k}: {info[k]}" for k in ("Table", "Partition By", "Order By", "Groups", "Conditions",
                                               "CTE Name", "Aggregates") if k in info), "")  # fmt: skip
    if node.get("name"):
        out.append((float(node.get("timing") or 0), node["name"], int(node.get("intermediate_rows") or 0),
                    str(detail)[:90]))  # fmt: skip
    for child in node.get("children") or []:
        operators(child, out)
    return out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("warehouse", type=Path)
    ap.add_argument("--period", default="2026-10")
    ap.add_argument("--config", type=Path, default=REPO / "config")
    ap.add_argument("--top", type=int, default=6)
    args = ap.parse_args()

    import duckdb

    from pipeline.core.periods import Period
    from pipeline.core.rule_params import event_params
    from pipeline.core.settings import load_settings
    from pipeline.stages.validate import NO_LIMIT
    from pipeline.warehouse.sql_files import read_sql

    settings = load_settings(args.config)
    period = Period.parse(args.period)
    params = {**event_params(settings, period), "as_of": NO_LIMIT, "period_end": period.end}
    with tempfile.TemporaryDirectory() as tmp:
        copy = Path(tmp) / "surveillance.duckdb"
        shutil.copy(args.warehouse, copy)
        con = duckdb.connect(str(copy))
        con.execute("set memory_limit = '2GB'")
        con.execute("set preserve_insertion_order = true")
        for name in FILES:
            sql = read_sql(name)
            code = re.sub(r"--[^\n]*", "", sql)
            used = {k: v for k, v in params.items() if re.search(rf"\${k}\b", code)}
            profile = Path(tmp) / f"{name}.json"
            con.execute("pragma enable_profiling = 'json'")
            con.execute(f"pragma profiling_output = '{profile}'")
            started = time.perf_counter()
            try:  # as build_table runs it
                con.execute(f"create or replace temp table _explained as\n{sql}", used)
            except duckdb.Error as exc:
                print(f"{name}: not run ({str(exc).splitlines()[0]})")
                continue
            finally:
                con.execute("pragma disable_profiling")
            seconds = time.perf_counter() - started
            data = json.loads(profile.read_text(encoding="utf-8"))
            query, system = data.get("query", {}), data.get("system", {})
            print(f"\n== {name}: {seconds:.2f} s wall, {query.get('cpu_time', 0):.2f} s operator CPU, "
                  f"peak buffer {system.get('peak_buffer_memory', 0) / 2**20:,.0f} MB, "
                  f"spilled {system.get('total_bytes_spilled', 0) / 2**20:,.0f} MB")  # fmt: skip
            found: list = []
            for root in data.get("operator") or []:
                operators(root, found)
            for op_seconds, op, rows, detail in sorted(found, reverse=True)[: args.top]:
                print(f"   {op_seconds:7.3f} s  {op:<24} {rows:>11,} rows  {detail}")
            shutil.copy(profile, Path(args.warehouse).parent / f"profile_{name}.json")
        con.close()


if __name__ == "__main__":
    main()
