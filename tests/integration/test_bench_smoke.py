"""Smoke test of the benchmark harness (bench/run.py) at about 20,000 rows.

Runs the harness once into temporary folders, without the Prefect and Great Expectations
comparisons (the incremental month is kept: at this size it is 200 rows), and checks that
results.json has every key the report is made from, with positive numbers. No timing is asserted:
the figures depend on the machine. The row count read by the pipeline is checked against the
generator's own count of rows written (common practice: a benchmark that loses rows measures
nothing).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[2]
ROWS = 20_000

pytestmark = pytest.mark.slow


def _positive(value: object) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool) and value > 0


@pytest.fixture(scope="module")
def bench_results(tmp_path_factory: pytest.TempPathFactory) -> tuple[dict, Path]:
    root = tmp_path_factory.mktemp("bench")
    cmd = [sys.executable, str(REPO / "bench" / "run.py"), "--rows", str(ROWS),
           "--data", str(root / "data"), "--out", str(root / "out"), "--results-dir", str(root / "results"),
           "--skip-prefect", "--skip-gx"]  # fmt: skip
    proc = subprocess.run(cmd, cwd=REPO, capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stdout[-2000:] + proc.stderr[-4000:]
    results = json.loads((root / "results" / "results.json").read_text(encoding="utf-8"))
    return results, root


def test_results_have_machine_facts(bench_results: tuple[dict, Path]) -> None:
    results, _ = bench_results
    machine = results["machine"]
    assert machine["nproc"] >= 1 and machine["ram_gb"] > 0
    for key in ("python", "duckdb", "polars"):
        assert machine[key], key


def test_pipeline_floor_and_incremental_figures(bench_results: tuple[dict, Path]) -> None:
    results, root = bench_results
    (run,) = results["runs"]
    assert run["rows"] == ROWS
    pipeline = run["pipeline"]
    for key in ("wall_seconds", "peak_rss_mb", "rows_per_second"):
        assert _positive(pipeline[key]), key
    # every stage of run_month_plain reports a time and a peak RSS
    for stage in (
        "scan",
        "ingest",
        "validate",
        "measure",
        "link",
        "summarise",
        "publish",
        "export",
    ):
        assert stage in pipeline["stages"], stage
        assert pipeline["stages"][stage]["seconds"] >= 0
        assert _positive(pipeline["stages"][stage]["peak_rss_mb"]), stage
    # the whole input was read: rows written by the generator = rows read by the pipeline
    manifest = json.loads(
        next((root / "data").glob("rows_*/manifest.json")).read_text(encoding="utf-8")
    )
    assert sum(manifest["files"].values()) == ROWS
    assert sum(s["read"] for s in pipeline["sources"].values()) == ROWS
    for key in ("wall_seconds", "peak_rss_mb", "rows_per_second", "egfr_rows", "persons_tested"):
        assert _positive(run["floor"][key]), key
    assert _positive(run["ratio_vs_floor"])
    # the second lower bound: the floor, then what the warehouse keeps (one row per input row)
    kept = run["floor_kept"]
    assert _positive(kept["kept_seconds"]) and _positive(kept["floor_part_seconds"])
    assert kept["wall_seconds"] >= kept["kept_seconds"]
    assert _positive(run["ratio_vs_floor_kept"])
    assert _positive(run["incremental"]["wall_seconds"])
    assert _positive(run["incremental"]["fraction"])
    assert run["incremental"]["new_rows"] == round(ROWS * 0.01)
    # (f) the same month with the person buckets on a local Dask cluster: the same files, byte
    # for byte, and the driver's figures
    scaled = run["scale_out"]
    assert scaled["exports"] > 0 and scaled["exports_identical"] is True
    assert _positive(scaled["wall_seconds"]) and _positive(scaled["driver_peak_rss_mb"])
    # ... and the incremental month on the Dask run's warehouse: the local month's files
    month = scaled["month"]
    assert month["exports"] > 0 and month["exports_identical"] is True
    assert _positive(month["wall_seconds"]) and _positive(month["driver_peak_rss_mb"])
    # skipped parts are absent, not zero
    assert "great_expectations" not in run and "prefect" not in run


def test_markdown_report_written(bench_results: tuple[dict, Path]) -> None:
    _, root = bench_results
    text = (root / "results" / "results.md").read_text(encoding="utf-8")
    assert "<!-- bench:begin -->" in text and "<!-- bench:end -->" in text
    assert "ratio_vs_floor" in text and "20,000 rows" in text
