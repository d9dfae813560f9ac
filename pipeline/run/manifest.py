"""The run manifest: what went in, what came out, with which settings, in how long.

Written as ``out/<period>/run_manifest.json`` and as a row of the ``runs`` table (in the month's
transaction, so a run that fails leaves none). It holds no person-level value and no key.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import subprocess
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path
from typing import Any

import duckdb

from pipeline.core.settings import Settings
from pipeline.warehouse.sql_files import read_sql

EXIT_OK, EXIT_HELD_BACK = 0, 1


def package_version() -> str:
    try:
        return version("kidneysurv")
    except PackageNotFoundError:  # pragma: no cover - running from a source tree
        return "unknown"


def git_commit() -> str | None:
    """The commit of the code that ran, when it runs from a git checkout."""
    root = Path(__file__).resolve().parents[2]
    try:
        out = subprocess.run(["git", "-C", str(root), "rev-parse", "HEAD"], capture_output=True,
                             text=True, timeout=5, check=True)  # fmt: skip
    except (OSError, subprocess.SubprocessError):
        return None
    return out.stdout.strip() or None


def effective_config(settings: Settings) -> dict[str, Any]:
    """Every setting in force, as plain data (the region's tables by content hash)."""
    regions = settings.config_dir / "regions"
    return {
        "pipeline": settings.pipeline.model_dump(mode="json"),
        "analytes": settings.analytes.model_dump(mode="json"),
        "sources": [s.model_dump(mode="json") for s in settings.sources],
        "regions": {p.name: hashlib.sha256(p.read_bytes()).hexdigest()
                    for p in sorted(regions.glob("*.csv"))},
    }  # fmt: skip


def config_sha256(settings: Settings) -> str:
    text = json.dumps(effective_config(settings), sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest()


def input_files(con: duckdb.DuckDBPyConnection, run_period: str) -> list[dict[str, Any]]:
    """Every file version in the ledger with its hash and outcome counts; ``this_run`` marks
    the ones this run ingested or held back.
    """
    rows = con.execute(read_sql("manifest_input_files")).fetchall()
    keys = ("source_id", "file_path", "version", "sha256", "status", "message", "rows_read",
            "rows_accepted", "rows_rejected", "rows_superseded", "rows_duplicate", "rows_withdrawn",
            "rows_pending")  # fmt: skip
    return [
        {**dict(zip(keys, r[:-1], strict=False)), "this_run": r[-1] == run_period} for r in rows
    ]


def build_manifest(run_id: str, started_at: dt.datetime, settings: Settings, period: str,
                   demo_key: bool, stages: dict[str, dict[str, Any]], summary: dict[str, Any],
                   files: list[dict[str, Any]]) -> dict[str, Any]:  # fmt: skip
    held = bool(
        summary.get("held_back_sources")
        or summary.get("held_back_files")
        or summary.get("withheld_tables")
        or (summary.get("missing_sources") and summary.get("missing_sources_policy") == "hold")
    )
    m = settings.pipeline.measures
    return {
        "run_id": run_id,
        "period": period,
        # to the microsecond: two runs of a period within one second (a rerun, a revision) must
        # still order, as the report and the revision check read the latest run of a period
        "started_at": started_at.isoformat(timespec="microseconds"),
        "status": "published_with_sources_held_back" if held else "published",
        "exit_code": EXIT_HELD_BACK if held else EXIT_OK,
        "package_version": package_version(),
        "git_commit": git_commit(),
        "config_sha256": config_sha256(settings),
        "demo_key": demo_key,
        "equations": {
            "adult": m.adult_equation,
            "child": m.child_equation,
            "child_with_height": m.child_equation_with_height,
            "use_height_for_children": m.use_height_for_children,
            "cystatin": "ckd_epi_2012_cystatin" if m.use_cystatin else None,
            "creatinine_with_cystatin": "ckd_epi_2021_creatinine_cystatin"
            if m.combine_same_day_cystatin
            else None,
        },  # fmt: skip
        "thresholds": {
            "measures": settings.pipeline.measures.model_dump(mode="json"),
            "trajectories": settings.pipeline.trajectories.model_dump(mode="json"),
            "summaries": settings.pipeline.summaries.model_dump(mode="json"),
            "disclosure": settings.pipeline.disclosure.model_dump(mode="json"),
            "quality_gate": settings.pipeline.quality_gate.model_dump(mode="json"),
        },  # fmt: skip
        "input_files": files,
        "stages": {
            name: {k: v for k, v in info.items() if k != "seconds"} for name, info in stages.items()
        },
        "durations_seconds": {name: info.get("seconds") for name, info in stages.items()},
        "quality_gate": {
            "held_back_sources": summary.get("held_back_sources", {}),
            "held_back_files": summary.get("held_back_files", {}),
            "batch_checks": summary.get("batch_checks", {}),
        },  # fmt: skip
        "headline": summary.get("headline", {}),
        # what the run says about its own period (pipeline/run/period_checks.py, unmapped codes)
        "period_checks": {
            k: summary.get(k)
            for k in (
                "sources",
                "warehouse_sources",
                "missing_sources",
                "missing_sources_policy",
                "rows_outside_period",
                "rows_outside_period_notes",
                "unmapped_codes",
                "indicators_lack",
            )
        },
    }


def record_run(con: duckdb.DuckDBPyConnection, manifest: dict[str, Any]) -> None:
    """The manifest as a row of ``runs`` (inside the month's transaction)."""
    revision = manifest.get("revision") or {}
    con.execute(
        "insert or replace into runs (run_id, period, started_at, status, exit_code, package_version, "
        "git_commit, config_sha256, demo_key, manifest, revision, revision_reason) "
        "values (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
        [manifest["run_id"], manifest["period"], manifest["started_at"], manifest["status"],
         manifest["exit_code"], manifest["package_version"], manifest["git_commit"],
         manifest["config_sha256"], manifest["demo_key"], json.dumps(manifest, default=str),
         revision.get("number"), revision.get("reason")],
    )  # fmt: skip
