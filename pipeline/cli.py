"""The ``kidneysurv`` command: a thin front on the monthly flow.

Exit codes: 0 success; 1 a source was held back by the quality gate (the others published);
2 bad usage or configuration.
"""

from __future__ import annotations

import sys
import time
from enum import Enum
from pathlib import Path
from typing import Annotated, Optional

import typer
from rich.console import Console
from rich.table import Table

from pipeline.periods import Period
from pipeline.pseudonymise import KeyMissing, resolve_key
from pipeline.runlock import EXIT_LOCKED, RunLocked, run_lock
from pipeline.settings import ConfigError, load_settings

app = typer.Typer(
    help="Population kidney surveillance from monthly lab extracts: eGFR, albuminuria, sustained "
    "decline and diabetes screening coverage by district, with small counts suppressed.",
    no_args_is_help=True,
    add_completion=False,
)
sources_app = typer.Typer(help="Look at lab sources and their files.", no_args_is_help=True)
app.add_typer(sources_app, name="sources")
console = Console(highlight=False, width=None if sys.stdout.isatty() else 120)
err = Console(stderr=True, highlight=False)

EXIT_OK, EXIT_HELD_BACK, EXIT_USAGE = 0, 1, 2


class Executor(str, Enum):
    local = "local"
    shards = "shards"
    dask = "dask"


def _fail(message: str) -> None:
    err.print(f"[bold red]error:[/] {message}", markup=True, soft_wrap=True)
    raise typer.Exit(EXIT_USAGE)


def _stage_line(name: str, seconds: float, text: str) -> None:
    console.print(f"  {name:<10} {seconds:6.1f} s  {text}")


def _print_summary(summary: dict, out: Path) -> None:
    table = Table(title=f"Period {summary['period']}: rows per source", title_justify="left")
    cols = ("read", "accepted", "rejected", "superseded", "duplicate", "withdrawn", "pending")
    table.add_column("source")
    for c in cols:
        table.add_column(c, justify="right")
    for source, counts in summary["sources"].items():
        table.add_row(source, *(f"{counts.get(c, 0):,}" for c in cols))
    console.print(table)
    console.print(f"  persons with results up to {summary['period']}: {summary['persons']:,}")
    h = summary.get("headline", {})
    if h.get("persons_tested_12m") is not None:
        share = h.get("ckd_share_of_tested")
        console.print(
            f"  tested in the last 12 months: {h['persons_tested_12m']:,}; confirmed CKD: "
            f"{h.get('persons_confirmed_ckd') or 0:,}" + (f" ({share:.1%} of tested)" if share is not None else "")
        )
    if h.get("persons_with_diabetes") is not None:
        share = h.get("diabetes_share_with_both")
        console.print(
            f"  people with diabetes: {h['persons_with_diabetes']:,}; with both eGFR and ACR in 12 months: "
            f"{h.get('diabetes_with_egfr_and_acr') or 0:,}" + (f" ({share:.1%})" if share is not None else "")
        )
    for path, message in summary["held_back_files"].items():
        console.print(f"  [yellow]held back file[/] {path}: {message}")
    for source, message in summary["held_back_sources"].items():
        console.print(f"  [yellow]held back source[/] {source}: {message}")
    for table, message in summary.get("withheld_tables", {}).items():
        console.print(f"  [yellow]withheld table[/] {table} (disclosure audit): {message}")
    console.print(f"  warehouse: {out / 'surveillance.duckdb'}")
    console.print(f"  exports:   {out / summary['period']}/")
    if summary.get("demo_key"):
        console.print("  [dim]made with the public DEMO pseudonymisation key: not for real data[/]")


def _run(period: str, config: Path, inbox: Path, out: Path, demo: bool, verbose: bool,
         executor: str | None = None) -> int:
    try:
        Period.parse(period)
        settings = load_settings(config)
    except (ValueError, ConfigError) as exc:
        _fail(str(exc))
    if not inbox.is_dir():
        _fail(f"{inbox}: inbox folder not found")
    try:
        resolve_key(demo=demo)  # before Prefect starts: a missing key is a usage error
    except KeyMissing as exc:
        _fail(str(exc))
    try:
        with run_lock(out, period):  # before Prefect starts: a second run stops at once
            from pipeline import prefect_env

            prefect_env.configure(verbose=verbose)
            from pipeline import flows

            flows.set_reporter(_stage_line)
            console.print(f"kidneysurv: monthly run for {period} ({len(settings.sources)} sources, inbox {inbox})")
            started = time.perf_counter()
            try:
                summary = flows.monthly_surveillance(
                    period=period, config_dir=str(config), inbox=str(inbox), out=str(out), demo=demo,
                    executor=executor,
                )
            except KeyMissing as exc:
                _fail(str(exc))
            console.print(f"  {'total':<10} {time.perf_counter() - started:6.1f} s (with Prefect)")
            _print_summary(summary, out)
            held = summary["held_back_sources"] or summary["held_back_files"] or summary.get("withheld_tables")
            return EXIT_HELD_BACK if held else EXIT_OK
    except RunLocked as exc:
        err.print(f"[bold red]error:[/] {exc}", markup=True, soft_wrap=True)
        raise typer.Exit(EXIT_LOCKED) from None


@app.command()
def run(
    period: Annotated[str, typer.Option(help="Month to publish, YYYY-MM (indicators as of its last day).")],
    config: Annotated[Path, typer.Option(help="Config folder.")] = Path("config"),
    inbox: Annotated[Path, typer.Option(help="Inbox folder with one subfolder per source.")] = Path("sample_extracts"),
    out: Annotated[Path, typer.Option(help="Output folder: warehouse and exports.")] = Path("out"),
    verbose: Annotated[bool, typer.Option("--verbose", help="Show Prefect's own log lines.")] = False,
    executor: Annotated[Optional[Executor], typer.Option(help="Person-level work: local, shards or dask (default: config).")] = None,
) -> None:
    """Ingest what is new in the inbox and publish the indicators for one month."""
    raise typer.Exit(_run(period, config, inbox, out, demo=False, verbose=verbose,
                          executor=executor.value if executor else None))


@app.command()
def demo(
    out: Annotated[Path, typer.Option(help="Output folder.")] = Path("out"),
    config: Annotated[Path, typer.Option(help="Config folder.")] = Path("config"),
    verbose: Annotated[bool, typer.Option("--verbose", help="Show Prefect's own log lines.")] = False,
) -> None:
    """Run the latest complete month of the shipped sample extracts (public demo key)."""
    try:
        settings = load_settings(config)
    except ConfigError as exc:
        _fail(str(exc))
    inbox = Path(__file__).resolve().parent.parent / "sample_extracts"
    code = _run(settings.pipeline.demo.period, config, inbox, out, demo=True, verbose=verbose)
    raise typer.Exit(EXIT_OK if code == EXIT_HELD_BACK else code)


@app.command()
def backfill(
    from_period: Annotated[str, typer.Option("--from", help="First month, YYYY-MM.")],
    to_period: Annotated[str, typer.Option("--to", help="Last month, YYYY-MM.")],
    config: Annotated[Path, typer.Option(help="Config folder.")] = Path("config"),
    inbox: Annotated[Path, typer.Option(help="Inbox folder.")] = Path("sample_extracts"),
    out: Annotated[Path, typer.Option(help="Output folder.")] = Path("out"),
    force: Annotated[bool, typer.Option("--force", help="Run months already published again.")] = False,
    demo_key: Annotated[bool, typer.Option("--demo-key", help="Use the public demo key (samples only).")] = False,
    verbose: Annotated[bool, typer.Option("--verbose", help="Show Prefect's own log lines.")] = False,
) -> None:
    """Run a range of months in order, skipping those already published (unless --force)."""
    from pipeline.backfill import months_to_run

    try:
        first, last = Period.parse(from_period), Period.parse(to_period)
        load_settings(config)
    except (ValueError, ConfigError) as exc:
        _fail(str(exc))
    if last < first:
        _fail(f"--to {last} is before --from {first}")
    plan = months_to_run(out, first, last, force)
    worst = EXIT_OK
    for i, (period, skip) in enumerate(plan, start=1):
        if skip:
            console.print(f"[{i}/{len(plan)}] {period}: already published, skipped (--force runs it again)")
            continue
        console.print(f"[{i}/{len(plan)}] {period}")
        code = _run(period.label, config, inbox, out, demo=demo_key, verbose=verbose)
        worst = max(worst, code)
    raise typer.Exit(worst)


@app.command()
def schedule(
    config: Annotated[Path, typer.Option(help="Config folder.")] = Path("config"),
    inbox: Annotated[Path, typer.Option(help="Inbox folder.")] = Path("sample_extracts"),
    out: Annotated[Path, typer.Option(help="Output folder.")] = Path("out"),
) -> None:
    """Serve the monthly run on its cron schedule (config/pipeline.yaml, schedule) against the
    Prefect server in PREFECT_API_URL; runs are listed in the Prefect UI. Ctrl-C stops it."""
    import os

    from pipeline.schedule import serve

    try:
        settings = load_settings(config)
        resolve_key(demo=False)
    except (ConfigError, KeyMissing) as exc:
        _fail(str(exc))
    if not os.environ.get("PREFECT_API_URL"):
        _fail("set PREFECT_API_URL to a running Prefect server (start one with 'prefect server "
              "start'; it prints the URL); a temporary server never fires schedules")
    from pipeline import prefect_env

    prefect_env.configure()
    s = settings.pipeline.schedule
    console.print(f"serving monthly_surveillance/monthly: cron '{s.cron}' ({s.timezone}), previous month each time")
    serve(settings, config, inbox, out)


@sources_app.command("check")
def sources_check(
    source_id: Annotated[str, typer.Argument(help="Source id, as in config/sources/<id>.yaml.")],
    file: Annotated[Path, typer.Argument(help="An extract file (for FHIR: the Observation.ndjson).")],
    config: Annotated[Path, typer.Option(help="Config folder.")] = Path("config"),
    examples: Annotated[int, typer.Option(help="Examples shown per reason.")] = 3,
) -> None:
    """Show what a file would give: rows per outcome and reason, with file:line examples.

    Reads the file into a throw-away in-memory database: the warehouse is not touched.
    """
    from pipeline.checks import check_file

    try:
        settings = load_settings(config)
        settings.source(source_id)
    except ConfigError as exc:
        _fail(str(exc))
    if not file.is_file():
        _fail(f"{file}: file not found")
    try:
        report = check_file(settings, source_id, file)
    except OSError as exc:
        err.print(f"[bold red]file held back:[/] {file}: cannot be read ({exc.strerror or exc})", soft_wrap=True)
        raise typer.Exit(EXIT_HELD_BACK) from None
    if report.fault:
        err.print(f"[bold red]file held back:[/] {report.fault}", soft_wrap=True)
        raise typer.Exit(EXIT_HELD_BACK)
    console.print(f"{file}: {report.rows_read:,} rows read")
    for outcome, n in report.outcomes.items():
        console.print(f"  {outcome:<11} {n:>8,}")
    for reason, (n, lines) in report.reasons.items():
        console.print(f"  rejected {reason}: {n:,}")
        for line_no, message in lines[:examples]:
            console.print(f"      {file}:{line_no}: {message}", soft_wrap=True)
    raise typer.Exit(EXIT_OK)


def main() -> None:  # pragma: no cover
    sys.exit(app())
