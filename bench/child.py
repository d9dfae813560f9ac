"""One measured thing, in its own process (started by bench/run.py; not meant to be run by hand).

Modes:
  pipeline  ``pipeline.run.flows.run_month_plain`` (or, with --flow, the Prefect flow
            ``monthly_surveillance`` with its temporary server) on one period;
  floor     bench/floor.sql in one DuckDB connection (with --kept, then bench/floor_kept.sql
            into a DuckDB file, timed apart).

Each writes a JSON document to --stats: wall seconds of the measured call (imports excluded and
reported apart), per-stage seconds and peak RSS, and the process's own peak RSS. Per-stage peak
RSS: after each stage the kernel's high-water mark (VmHWM) is read and then reset through
/proc/self/clear_refs, so each stage's figure is the peak reached during that stage (work done
between two stages counts toward the next one). Where the reset is refused the figures are the
running high-water mark instead (``stage_rss_basis``: "cumulative").
"""

from __future__ import annotations

import argparse
import cProfile
import io
import json
import pstats
import resource
import sys
import time
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
BENCH = Path(__file__).resolve().parent


def _status_kb(field: str) -> int:
    with open("/proc/self/status", encoding="ascii") as fh:
        for line in fh:
            if line.startswith(field + ":"):
                return int(line.split()[1])
    return 0


def _reset_hwm() -> bool:
    try:
        with open("/proc/self/clear_refs", "w", encoding="ascii") as fh:
            fh.write("5")
        return True
    except OSError:
        return False


def _self_maxrss_mb() -> float:
    """This process's peak RSS: the kernel's high-water mark of its memory map (VmHWM), which
    starts afresh at exec. Not ``getrusage``'s ru_maxrss: Linux keeps that across execve, so a
    child of a parent that had just generated 30M rows in memory reported the parent's 8.1 GB."""
    hwm_kb = _status_kb("VmHWM")
    return hwm_kb / 1024 if hwm_kb else resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


#: Pipeline functions timed by --trace (module: names). Each is replaced, in every pipeline module
#: that holds it, by a wrapper adding up its wall time; calls nest (a build_table inside a
#: replace_period_rows counts in both), so the figures show where the time goes, not a partition.
TRACED = {
    "pipeline.stages.ingest.inbox": ("scan_inbox", "sha256_of"),
    "pipeline.stages.ingest.delimited": ("read_delimited", "_rows_in_bulk", "_rows_by_csv"),
    "pipeline.stages.ingest.parquet": ("read_parquet",),
    "pipeline.stages.ingest.rows": ("_to_landed",),
    "pipeline.stages.ingest.dates": ("add_dates",),
    "pipeline.core.pseudonymise": ("add_person_keys",),
    "pipeline.core.identifiers": ("screen_table", "screen_values"),
    "pipeline.warehouse.sql": ("build_table", "replace_period_rows"),
    "pipeline.warehouse.connection": ("fetch_frame",),
    "pipeline.warehouse.reference": ("load_reference_tables",),
    "pipeline.warehouse.catalog": ("apply_comments",),
    "pipeline.warehouse.versions": ("close_over_partitions",),
    "pipeline.stages.validate": ("validate_landed", "hold_back_sources", "settle_scope",
                          "resolve_versions", "update_ledger_counts"),
    "pipeline.stages.quality_gate": ("check_batches", "_cells_frame", "_totals_frame", "build_docs"),
    "pipeline.core.measure_rules": ("measure_frame",),
    "pipeline.stages.measure": ("measure_stage",),
    "pipeline.stages.link.persons": ("build_known_at_period_end", "changed_persons", "carry_over",
                                     "build_person_tables"),
    "pipeline.stages.summarise": ("build_equation_change", "build_undetected_albuminuria",
                                  "add_standardised_rates"),
    "pipeline.stages.disclose.audit": ("audit",),
    "pipeline.stages.disclose.suppression": ("disclose_stage",),
    "pipeline.stages.publish": ("commit_month", "write_exports"),
    "pipeline.run.manifest": ("build_manifest", "record_run", "input_files"),
}  # fmt: skip
#: Functions whose first argument after the connection names the SQL file: timed per name.
_BY_NAME = {"build_table", "replace_period_rows"}


def install_trace() -> dict[str, dict]:
    import functools
    import importlib

    totals: dict[str, dict] = {}
    originals = {}
    for module_name, names in TRACED.items():
        try:
            module = importlib.import_module(module_name)
        except ImportError:  # a module renamed or gone: time the rest
            continue
        for name in names:
            if hasattr(module, name):
                originals[id(getattr(module, name))] = (name, getattr(module, name))

    def wrap(name: str, fn):
        @functools.wraps(fn)
        def timed(*a, **k):
            key = f"{name}:{a[1]}" if name in _BY_NAME and len(a) > 1 else name
            t0 = time.perf_counter()
            try:
                return fn(*a, **k)
            finally:
                entry = totals.setdefault(key, {"seconds": 0.0, "calls": 0})
                entry["seconds"] += time.perf_counter() - t0
                entry["calls"] += 1

        return timed

    wrappers = {key: wrap(name, fn) for key, (name, fn) in originals.items()}
    for module_name, module in list(sys.modules.items()):
        if module_name == "pipeline" or module_name.startswith("pipeline."):
            for attr, value in list(vars(module).items()):
                if id(value) in wrappers and getattr(value, "__wrapped__", None) is None:
                    setattr(module, attr, wrappers[id(value)])
    return totals


def run_pipeline(args: argparse.Namespace) -> dict:
    started = time.perf_counter()
    if str(REPO) not in sys.path:
        sys.path.insert(0, str(REPO))
    from pipeline.run import flows  # imports Prefect (settings only; no server in plain mode)

    import_seconds = time.perf_counter() - started
    trace = install_trace() if args.trace else None
    stages: dict[str, dict] = {}
    peak_kb = [_status_kb("VmHWM")]  # the reset below loses earlier peaks: keep the largest seen
    can_reset = _reset_hwm()
    baseline_mb = _status_kb("VmRSS") / 1024

    def report(name: str, seconds: float, text: str) -> None:
        hwm = _status_kb("VmHWM")
        peak_kb.append(hwm)
        stages[name] = {"seconds": round(seconds, 4), "peak_rss_mb": round(hwm / 1024, 1),
                        "rss_after_mb": round(_status_kb("VmRSS") / 1024, 1), "detail": text}  # fmt: skip
        print(f"[stage] {name} {seconds:.1f} s, peak {hwm / 1024:.0f} MB", flush=True)
        if can_reset:
            _reset_hwm()

    profiler = cProfile.Profile() if args.profile else None
    t0 = time.perf_counter()
    if args.flow:
        flows.set_reporter(report)
        summary = flows.monthly_surveillance(
            args.period, args.config, args.inbox, args.out, demo=True
        )
    else:
        if profiler:
            profiler.enable()
        summary = flows.run_month_plain(
            args.period, args.config, args.inbox, args.out, demo=True, report=report
        )
        if profiler:
            profiler.disable()
    wall = time.perf_counter() - t0
    out = {
        "mode": "flow" if args.flow else "plain",
        "period": args.period,
        "import_seconds": round(import_seconds, 3),
        "wall_seconds": round(wall, 3),
        "stages": stages,
        "stage_seconds_sum": round(sum(s["seconds"] for s in stages.values()), 3),
        "stage_rss_basis": "per_stage" if can_reset else "cumulative",
        "rss_before_run_mb": round(baseline_mb, 1),
        # the kernel's ru_maxrss only covers the time since the last reset: take the larger
        "self_peak_rss_mb": round(
            max(_self_maxrss_mb(), max(peak_kb) / 1024, _status_kb("VmHWM") / 1024), 1
        ),
        "sources": summary.get("sources"),
        "held_back_sources": summary.get("held_back_sources"),
        "exit_code": summary.get("exit_code"),
        "batch_checks_seconds": {
            s: c.get("seconds") for s, c in (summary.get("batch_checks") or {}).items()
        },
        "persons": summary.get("persons"),
    }
    if trace is not None:
        out["trace"] = {k: {"seconds": round(v["seconds"], 3), "calls": v["calls"]}
                        for k, v in sorted(trace.items(), key=lambda kv: -kv[1]["seconds"])}  # fmt: skip
    if profiler:
        buf = io.StringIO()
        stats = pstats.Stats(profiler, stream=buf)
        stats.sort_stats("cumulative").print_stats(45)
        stats.sort_stats("tottime").print_stats(30)
        Path(args.profile).write_text(buf.getvalue(), encoding="utf-8")
    return out


def run_floor(args: argparse.Namespace) -> dict:
    started = time.perf_counter()
    import duckdb

    import_seconds = time.perf_counter() - started
    Path(args.out).mkdir(parents=True, exist_ok=True)
    con = duckdb.connect()
    # the same memory limit as the pipeline's warehouse connection (pipeline/warehouse/connection.py)
    con.execute(f"set memory_limit = '{args.memory_limit}'")
    con.execute("set variable input_glob = ?", [args.input_glob])
    con.execute("set variable out_dir = ?", [args.out])
    con.execute("set variable period_end = ?::date", [args.period_end])
    script = (BENCH / "floor.sql").read_text(encoding="utf-8")
    t0 = time.perf_counter()
    con.execute(script)
    wall = time.perf_counter() - t0
    kept_seconds = None
    if args.kept:  # then what the warehouse must keep, into a DuckDB file, one transaction
        kept = Path(args.kept)
        kept.parent.mkdir(parents=True, exist_ok=True)
        kept.unlink(missing_ok=True)
        t1 = time.perf_counter()
        con.execute("attach ? as kept", [str(kept)])
        con.execute("begin transaction")
        con.execute((BENCH / "floor_kept.sql").read_text(encoding="utf-8"))
        con.execute("commit")
        kept_seconds = time.perf_counter() - t1
    counts = con.execute(
        "select sum(persons_tested), sum(persons_sustained_decline_40) from read_parquet(?)",
        [args.out + "/district_counts.parquet"],
    ).fetchall()[0]
    egfr_rows = con.execute("select count(*) from floor_egfr").fetchall()[0][0]
    con.close()
    return {
        "mode": "floor",
        "import_seconds": round(import_seconds, 3),
        "wall_seconds": round(wall, 3),
        "self_peak_rss_mb": round(_self_maxrss_mb(), 1),
        **({"kept_seconds": round(kept_seconds, 3)} if kept_seconds is not None else {}),
        "egfr_rows": int(egfr_rows),
        "persons_tested": int(counts[0] or 0),
        "persons_sustained_decline_40": int(counts[1] or 0),
    }


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("mode", choices=("pipeline", "floor"))
    ap.add_argument("--stats", required=True)
    ap.add_argument("--period")
    ap.add_argument("--config")
    ap.add_argument("--inbox")
    ap.add_argument("--out")
    ap.add_argument("--flow", action="store_true")
    ap.add_argument(
        "--trace", action="store_true", help="time the main pipeline functions (TRACED)"
    )
    ap.add_argument("--profile", help="write a cProfile summary of the plain run to this file")
    ap.add_argument("--input-glob")
    ap.add_argument("--period-end")
    ap.add_argument("--memory-limit", default="1.5GB")
    ap.add_argument(
        "--kept",
        help="floor: then write what the warehouse keeps (floor_kept.sql) to this DuckDB file",
    )
    args = ap.parse_args()
    result = run_pipeline(args) if args.mode == "pipeline" else run_floor(args)
    Path(args.stats).write_text(json.dumps(result, indent=2) + "\n", encoding="utf-8")


if __name__ == "__main__":
    main()
