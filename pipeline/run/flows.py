"""The monthly flow: one Prefect task per stage, each a thin wrapper of a plain function.

Tasks pass small things (the run id, counts, paths); the DuckDB connection that holds the run's
transaction stays in this process, in :data:`_RUNS`. Only the I/O tasks (listing the inbox,
writing exports) retry.
"""

from __future__ import annotations

import datetime as dt
import time
import uuid
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from pipeline.run import prefect_env

prefect_env.configure()

import duckdb  # noqa: E402
from prefect import flow, task  # noqa: E402

from pipeline.core.faults import maybe_fail  # noqa: E402
from pipeline.core.periods import Period  # noqa: E402
from pipeline.core.pseudonymise import PseudonymKey, resolve_key, verify_warehouse_key  # noqa: E402
from pipeline.core.settings import Settings, load_settings  # noqa: E402
from pipeline.report.page import write_report  # noqa: E402
from pipeline.run.buckets import prefect_submit  # noqa: E402
from pipeline.run.manifest import build_manifest, input_files, record_run  # noqa: E402
from pipeline.run.period_checks import period_checks  # noqa: E402
from pipeline.run.progress import RunProgress  # noqa: E402
from pipeline.run.reprocess import config_drift, hold_back_drifted  # noqa: E402
from pipeline.run.revisions import (  # noqa: E402
    Release,
    RevisionNeeded,
    carry_releases,
    describe,
    late_results,
    settle_release,
    stash_release,
)
from pipeline.run.runlock import commit_and_install, recover_interrupted_run, run_lock  # noqa: E402
from pipeline.stages.disclose.suppression import disclose_stage  # noqa: E402
from pipeline.stages.ingest.inbox import InboxFile, scan_inbox  # noqa: E402
from pipeline.stages.ingest.landing import LANDED_FILES, Landed, land_inbox  # noqa: E402
from pipeline.stages.link.persons import ValidatedScope  # noqa: E402
from pipeline.stages.link.stage import link_stage  # noqa: E402
from pipeline.stages.measure import measure_stage  # noqa: E402
from pipeline.stages.publish import (  # noqa: E402
    commit_month,
    open_warehouse,
    quality_docs_dir,
    write_exports,
    write_json,
)
from pipeline.stages.summarise import PersonScope, summarise_stage  # noqa: E402
from pipeline.stages.validate import (  # noqa: E402
    Judged,
    begin_judging,
    judge_file,
    validate_stage,
)
from pipeline.warehouse.reference import load_reference_tables, write_district_shapes  # noqa: E402
from pipeline.warehouse.sql_files import read_sql  # noqa: E402


@dataclass
class RunContext:
    settings: Settings
    period: Period
    inbox: Path
    out: Path
    key: PseudonymKey
    con: duckdb.DuckDBPyConnection
    report: Callable[[str, float, str], None]
    run_id: str = ""
    started_at: dt.datetime = field(default_factory=lambda: dt.datetime.now(dt.UTC))
    stages: dict[str, dict[str, Any]] = field(default_factory=dict)
    manifest: dict[str, Any] = field(default_factory=dict)
    batch_checks: dict[str, dict[str, Any]] = field(default_factory=dict)
    judged: Judged | None = None  # what the ingest stage judged, handed to the validate stage
    touched_only: bool = False  # the validate stage settled only the versions new rows touch
    changed_versions: str | None = None  # the results it changed then, for the measure stage
    validated: ValidatedScope | None = None  # what the validate stage hands the link stage
    person_scope: PersonScope | None = None  # what the link stage hands the summarise stage
    inbox_items: list[InboxFile] | None = None  # the scan stage's listing, read by the ingest stage
    landed: Landed | None = None  # what the ingest stage leaves (the table of this run's files)
    revise: str | None = None  # the reason given for a revision of an already published period
    release: Release | None = None  # what the summarise stage published (pipeline/run/revisions.py)
    config_drift: dict[str, str] = field(
        default_factory=dict
    )  # source -> message (pipeline/run/reprocess.py)
    refused: str | None = None  # why this run may not publish (a revision without a reason)


_RUNS: dict[str, RunContext] = {}


def _stage(run_id: str, name: str, work: Callable[[RunContext], dict[str, Any]]) -> dict[str, Any]:
    ctx = _RUNS[run_id]
    started = time.perf_counter()
    maybe_fail(f"{name}:before")
    _progress.start(name)
    try:
        result = work(ctx)
    finally:
        _progress.end(name)
    maybe_fail(f"{name}:after")
    seconds = time.perf_counter() - started
    ctx.stages[name] = {**result, "seconds": round(seconds, 3)}
    ctx.report(
        name,
        seconds,
        ", ".join(f"{k} {v}" for k, v in result.items() if not isinstance(v, dict | list)),
    )
    return result


@task(name="scan-inbox", retries=2, retry_delay_seconds=[2, 10])
def scan_task(run_id: str) -> dict[str, Any]:
    def work(ctx: RunContext) -> dict[str, Any]:
        items = scan_inbox(ctx.con, ctx.settings, ctx.inbox)
        # a source whose config changed since its stored rows were made: said, and its new files
        # held back until it is reprocessed (pipeline/run/reprocess.py), never mixed silently
        drift = config_drift(ctx.con, ctx.settings)
        hold_back_drifted(items, drift)
        ctx.config_drift = {s: d.message() for s, d in drift.items()}
        ctx.inbox_items = items  # hashed once: the ingest stage reads what was scanned
        return {
            "files": len(items),
            "new": sum(i.status != "already_ingested" for i in items),
            "config changed": len(drift),
        }

    return _stage(run_id, "scan", work)


@task(name="ingest")
def ingest_task(run_id: str) -> dict[str, Any]:
    def work(ctx: RunContext) -> dict[str, Any]:
        load_reference_tables(ctx.con, ctx.settings)
        write_district_shapes(
            ctx.con, ctx.settings.config_dir, ctx.settings.districts
        )  # the report's maps
        # each file is judged by the validate stage's rules as it lands
        judged = ctx.judged = begin_judging(ctx.con, files=LANDED_FILES)
        s = land_inbox(
            ctx.con,
            ctx.settings,
            ctx.inbox,
            ctx.key,
            ctx.period.label,
            dt.date.today(),
            items=ctx.inbox_items,
            sink=lambda con, frame: judge_file(con, frame, judged),
            on_file=lambda done, total, rows: _progress.advance(
                "ingest", done, total, "files", rows
            ),
        )
        ctx.landed = s
        return {"new files": s.files_new, "skipped": s.files_skipped, "held back": s.files_held_back,
                "rows": s.rows_landed, "held_back_files": list(s.held_back),
                "allowed_identifiers": list(s.allowed_identifiers)}  # fmt: skip

    return _stage(run_id, "ingest", work)


@task(name="validate")
def validate_task(run_id: str) -> dict[str, Any]:
    def work(ctx: RunContext) -> dict[str, Any]:
        if ctx.judged is None:
            raise RuntimeError("the validate stage runs after the ingest stage has judged its rows")
        s = validate_stage(
            ctx.con,
            ctx.settings,
            ctx.judged,
            batch_gate=lambda con, judged: _expectations(ctx, con, judged),
        )
        ctx.touched_only = s.scope is not None and s.scope.kind == "touched"
        ctx.changed_versions = s.changed_versions
        ctx.validated = ValidatedScope(
            s.scope.person_table if s.scope is not None else None,
            ctx.judged.files if ctx.judged is not None else None,
        )
        return {"valid": s.rows_valid, "rejected": s.rows_rejected, "lab_results": s.lab_results,
                "versions settled": f"{s.scope.versions} ({s.scope.kind})",
                "batches checked": len(ctx.batch_checks),
                "by_source": s.by_source, "held_back_sources": s.held_back,
                "unmapped_codes": s.unmapped}  # fmt: skip

    return _stage(run_id, "validate", work)


def _expectations(
    ctx: RunContext, con: duckdb.DuckDBPyConnection, judged: Judged
) -> dict[str, str]:
    """Run the Great Expectations suites on this run's batches; the failed sources and why."""
    gate = ctx.settings.pipeline.quality_gate
    if not gate.great_expectations:
        return {}
    from pipeline.stages.quality_gate import (  # GX itself is imported inside (it takes seconds)
        Batch,
        check_batches,
    )

    docs = quality_docs_dir(ctx.out, ctx.period) if gate.quality_pages != "never" else None
    checks = check_batches(
        con,
        ctx.settings,
        docs,
        quality_pages=gate.quality_pages,
        batch=Batch(judged.rows, judged.files),
    )
    ctx.batch_checks = {
        s: {"success": c.success, "evaluated": c.evaluated, "failed": c.failed,
            "unexpected_row_ids": c.unexpected_row_ids, "seconds": round(c.seconds, 3)}
        for s, c in checks.items()
    }  # fmt: skip
    return {s: "; ".join(c.failed[:3]) for s, c in checks.items() if not c.success}


@task(name="measure")
def measure_task(run_id: str) -> dict[str, Any]:
    def work(ctx: RunContext) -> dict[str, Any]:
        s = measure_stage(
            ctx.con,
            ctx.settings,
            touched_only=ctx.touched_only,
            changed=ctx.changed_versions or "changed_versions",
        )
        return {"creatinine/cystatin": s.egfr_rows, "eGFR": s.egfr_computed,
                "albuminuria": s.acr_rows, "A category": s.acr_categorised}  # fmt: skip

    return _stage(run_id, "measure", work)


@task(name="link")
def link_task(run_id: str) -> dict[str, Any]:
    def work(ctx: RunContext) -> dict[str, Any]:
        s = link_stage(
            ctx.con,
            ctx.settings,
            ctx.period,
            work=ctx.out / ".work" / ctx.period.label,
            validated=ctx.validated,
            on_shard=lambda done, total: _progress.advance("link", done, total, "shards"),
            submit_shards=prefect_submit(),  # each bucket a Prefect task run, in a flow run
        )
        ctx.person_scope = PersonScope(s.fingerprint, s.carried_from, s.changed_persons)
        return {
            "persons": s.persons,
            "events confirmed": s.events_confirmed,
            "pending": s.events_pending,
            "recomputed": s.persons_recomputed,
        }

    return _stage(run_id, "link", work)


@task(name="summarise")
def summarise_task(run_id: str) -> dict[str, Any]:
    def work(ctx: RunContext) -> dict[str, Any]:
        stash = stash_release(ctx.con, ctx.period.label)  # the release now published
        summarised = summarise_stage(ctx.con, ctx.settings, ctx.period, ctx.person_scope)
        counts = summarised.tables
        disclosed = disclose_stage(ctx.con, ctx.settings.pipeline.disclosure, ctx.period,
                                   ctx.settings.pipeline.summaries, summarised.tables)  # fmt: skip
        try:
            ctx.release = settle_release(ctx.con, ctx.period.label, ctx.revise, headline(ctx),
                                         stash, disclosed.present)  # fmt: skip
        except RevisionNeeded as exc:  # not a failure of the task: the run stops, unpublished
            ctx.refused = str(exc)
            return {
                "tables": len(counts),
                "revision": "refused (already published; --revise needed)",
            }
        return {"tables": len(counts), "rows": sum(counts.values()),
                "published rows": sum(disclosed.counts.values()), "blanked by the joint audit": disclosed.added,
                "by_table": counts, "revision": ctx.release.revision,
                "withheld_tables": dict(disclosed.withheld)}  # fmt: skip

    return _stage(run_id, "summarise", work)


@task(name="publish")
def publish_task(run_id: str) -> dict[str, Any]:
    def work(ctx: RunContext) -> dict[str, Any]:
        commit_and_install(ctx.out, ctx.period.label, ctx.run_id, lambda: commit_month(ctx.con))
        return {"warehouse": str(ctx.out / "surveillance.duckdb")}

    return _stage(run_id, "publish", work)


@task(name="export", retries=2, retry_delay_seconds=[2, 10])
def export_task(run_id: str, summary: dict[str, Any]) -> dict[str, Any]:
    def work(ctx: RunContext) -> dict[str, Any]:
        folder = write_exports(
            ctx.con,
            ctx.out,
            ctx.period,
            {"run_summary.json": summary, "run_manifest.json": ctx.manifest},
            demo_key=ctx.key.is_demo,
        ).folder
        if ctx.release is not None:
            carry_releases(ctx.out, ctx.period.label, folder, ctx.release)
        write_report(ctx.con, ctx.period.label, folder / "report.html")
        # staged beside the warehouse; moved into out/<period>/ once the month is committed
        final = ctx.out / ctx.period.label
        return {"exports": f"{final}/", "report": str(final / "report.html")}

    return _stage(run_id, "export", work)


def headline(ctx: RunContext) -> dict[str, Any]:
    """All-district headline numbers from the published (suppressed) tables."""
    params = {"period": ctx.period.label}
    prevalence = ctx.con.execute(read_sql("headline_prevalence"), params).fetchall()
    coverage = ctx.con.execute(read_sql("headline_coverage"), params).fetchall()
    out: dict[str, Any] = {}
    if prevalence:
        out.update(
            zip(
                ("persons_tested_12m", "persons_confirmed_ckd", "ckd_share_of_tested"),
                prevalence[0],
                strict=False,
            )
        )
    if coverage:
        out.update(zip(("persons_with_diabetes", "diabetes_with_egfr_and_acr", "diabetes_share_with_both"),
                       coverage[0], strict=False))  # fmt: skip
    return out


def _quiet(name: str, seconds: float, text: str) -> None:
    pass


def start_run(
    period: str,
    config_dir: str,
    inbox: str,
    out: str,
    demo: bool,
    report: Callable[[str, float, str], None] = _quiet,
    executor: str | None = None,
    revise: str | None = None,
) -> str:
    """Open the warehouse and register the run; the caller runs the stages. ``executor``
    overrides ``execution.executor`` of the config (local, shards or dask); ``revise`` is the
    reason for publishing a revision of an already published period (pipeline/run/revisions.py).
    """
    settings = with_executor(load_settings(config_dir), executor)
    key = resolve_key(demo=demo)
    ctx = RunContext(settings, Period.parse(period), Path(inbox), Path(out), key,
                     open_warehouse(Path(out), settings.pipeline.execution.memory_limit), report)  # fmt: skip
    ctx.revise = revise
    recover_interrupted_run(ctx.out, ctx.con)
    try:
        verify_warehouse_key(ctx.con, key)  # a different key would split persons from their history
    except Exception:
        ctx.con.close()
        raise
    run_id = uuid.uuid4().hex
    ctx.run_id = run_id
    _RUNS[run_id] = ctx
    return run_id


def with_executor(settings: Settings, executor: str | None) -> Settings:
    if executor is None:
        return settings
    execution = settings.pipeline.execution.model_validate(
        {**settings.pipeline.execution.model_dump(), "executor": executor}
    )
    pipeline = settings.pipeline.model_copy(update={"execution": execution})
    return settings.model_copy(update={"pipeline": pipeline})


def finish_run(run_id: str) -> dict[str, Any]:
    ctx = _RUNS.pop(run_id)
    try:
        ctx.con.execute("rollback")  # no-op after a commit; undoes a failed run
    except duckdb.Error:
        pass
    ctx.con.close()
    return ctx.stages


@flow(name="monthly_surveillance", log_prints=False)
def monthly_surveillance(
    period: str | None = None,
    config_dir: str = "config",
    inbox: str = "sample_extracts",
    out: str = "out",
    demo: bool = False,
    executor: str | None = None,
    revise: str | None = None,
) -> dict[str, Any]:
    """Ingest what is new, validate, measure, link, summarise and publish one month
    (``period`` None: the previous month, as a scheduled run does).
    """
    period = period or Period.previous_month(dt.date.today()).label
    with run_lock(Path(out), period):
        run_id = start_run(
            period, config_dir, inbox, out, demo, report=_reporter, executor=executor, revise=revise
        )
        try:
            return run_stages(run_id)
        finally:
            finish_run(run_id)


def run_stages(run_id: str, plain: bool = False) -> dict[str, Any]:
    """Run every stage in order; ``plain`` calls the task functions without Prefect."""
    ctx = _RUNS[run_id]

    def call(t: Any, *args: Any) -> Any:
        return t.fn(*args) if plain else t(*args)

    call(scan_task, run_id)
    ingest = call(ingest_task, run_id)
    validate = call(validate_task, run_id)
    call(measure_task, run_id)
    link = call(link_task, run_id)
    summarised = call(summarise_task, run_id)
    if ctx.refused:  # nothing is published: the caller rolls the transaction back
        return {"period": ctx.period.label, "revision_refused": ctx.refused}
    if ctx.landed is None:
        raise RuntimeError("the period checks run after the ingest stage")
    checks = period_checks(ctx.con, ctx.settings, ctx.inbox, ctx.period, ctx.landed.files)
    missing_policy = ctx.settings.pipeline.completeness.missing_source
    summary = {
        "period": ctx.period.label,
        "demo_key": ctx.key.is_demo,
        # the period's own rows: files ingested for this period (pipeline/run/period_checks.py)
        "sources": checks["period_sources"],
        "warehouse_sources": validate["by_source"],  # whole-warehouse totals, every period
        "held_back_sources": validate["held_back_sources"],
        "held_back_files": dict(ingest["held_back_files"]),
        "withheld_tables": dict(summarised.get("withheld_tables", {})),
        "missing_sources": checks["missing_sources"],
        "missing_sources_policy": missing_policy,
        "rows_outside_period": checks["rows_outside_period"],
        "rows_outside_period_notes": checks["rows_outside_period_notes"],
        "unmapped_codes": validate.get("unmapped_codes", {}),
        "indicators_lack": sorted(
            set(checks["missing_sources"]) | set(validate["held_back_sources"])
        ),
        "persons": link["persons"],
        "headline": headline(ctx),
        "batch_checks": ctx.batch_checks,
        "config_drift": ctx.config_drift,
        "late_results": late_results(ctx.con, ctx.period.label, ctx.landed.files),
    }
    ctx.manifest = build_manifest(ctx.run_id, ctx.started_at, ctx.settings, ctx.period.label,
                                  ctx.key.is_demo, ctx.stages, summary,
                                  input_files(ctx.con, ctx.period.label))  # fmt: skip
    if ctx.release is not None:
        ctx.manifest["revision"] = summary["revision"] = describe(
            ctx.release, ctx.period.label, ctx.started_at.date().isoformat(), summary["headline"]
        )
    if ctx.config_drift:
        ctx.manifest["config_drift"] = ctx.config_drift
        if (
            ctx.manifest["exit_code"] == 0
        ):  # published, but a source's current config is not applied yet
            ctx.manifest["exit_code"], ctx.manifest["status"] = 1, "published_with_config_drift"
    record_run(ctx.con, ctx.manifest)
    summary["exit_code"] = ctx.manifest["exit_code"]
    call(export_task, run_id, summary)  # into <out>/.<period>.partial, inside the transaction
    call(publish_task, run_id)  # commit, then the exports move into <out>/<period>/
    ctx.manifest["durations_seconds"] = {name: info["seconds"] for name, info in ctx.stages.items()}
    write_json(ctx.out / ctx.period.label / "run_manifest.json", ctx.manifest)
    return summary


def run_month_plain(
    period: str,
    config_dir: str,
    inbox: str,
    out: str,
    demo: bool = False,
    report: Callable[[str, float, str], None] = _quiet,
    executor: str | None = None,
    revise: str | None = None,
) -> dict[str, Any]:
    """The monthly run without Prefect (tests, benchmarks, debugging); raises
    :class:`RevisionNeeded` when the period is published and would change without ``revise``.
    """
    with run_lock(Path(out), period):
        run_id = start_run(
            period, config_dir, inbox, out, demo, report=report, executor=executor, revise=revise
        )
        try:
            summary = run_stages(run_id, plain=True)
        finally:
            finish_run(run_id)
    if summary.get("revision_refused"):
        raise RevisionNeeded(summary["revision_refused"])
    return summary


# The console reporter of the flow: kept out of the flow's parameters (a function is not a
# parameter Prefect can record); the CLI sets it with set_reporter.
_reporter: Callable[[str, float, str], None] = _quiet


def set_reporter(report: Callable[[str, float, str], None]) -> None:
    """Where the flow writes its one line per stage."""
    global _reporter
    _reporter = report


# The progress display of long stages (pipeline/run/progress.py), set by the CLI like the
# reporter; by default none.
_progress: RunProgress = RunProgress()


def set_progress(progress: RunProgress) -> None:
    """Which display the flow tells how far each stage is."""
    global _progress
    _progress = progress
