"""The ``kidneysurv`` command: a thin front on the monthly flow.

Exit codes: 0 success; 1 a source was held back by the quality gate (the others published);
2 bad usage or configuration; 3 another run holds the output folder; 4 an internal failure (one
line on the terminal naming what failed and the log file holding the traceback).
"""

from __future__ import annotations

import os
import sys
import time
from enum import StrEnum
from pathlib import Path
from typing import Annotated

import typer
from rich.console import Console
from rich.markup import escape
from rich.table import Table

from pipeline.core.errors import ConfigError
from pipeline.core.periods import Period
from pipeline.core.pseudonymise import KeyMissing, resolve_key
from pipeline.core.settings import load_settings
from pipeline.run.progress import MODES as PROGRESS_MODES
from pipeline.run.progress import make_progress
from pipeline.run.runlock import EXIT_LOCKED, RunLocked, run_lock

app = typer.Typer(
    help="Population kidney surveillance from monthly lab extracts: eGFR, albuminuria, sustained "
    "decline and diabetes screening coverage by district, with small counts suppressed.",
    no_args_is_help=True,
    add_completion=False,
    rich_markup_mode=None,  # plain help: a flag is shown as a flag, not as an option taking <bool>
)
sources_app = typer.Typer(
    help="Look at lab sources and their files.", no_args_is_help=True, rich_markup_mode=None
)
app.add_typer(sources_app, name="sources")
console = Console(highlight=False, width=None if sys.stdout.isatty() else 120)
err = Console(stderr=True, highlight=False)

EXIT_OK, EXIT_HELD_BACK, EXIT_USAGE = 0, 1, 2
EXIT_INTERNAL = 4


def write_failure_log(out: Path, period: str, text: str) -> Path | None:
    """Write ``text`` (a traceback) to ``<out>/<period>/logs/``, or to the system's temporary
    folder when the output folder cannot be written (read-only, full); None if neither can.
    """
    import datetime as dt
    import tempfile

    stamp = dt.datetime.now(dt.UTC).strftime("%Y%m%dT%H%M%SZ")
    name = f"failure-{period}-{stamp}-{os.getpid()}.log"
    for folder in (out / period / "logs", Path(tempfile.gettempdir()) / "kidneysurv-logs"):
        path = folder / name
        try:
            folder.mkdir(parents=True, exist_ok=True)
            with path.open("w", encoding="utf-8") as fh:
                fh.write(text)
                fh.flush()
                os.fsync(fh.fileno())
            return path
        except OSError:
            try:
                path.unlink(missing_ok=True)
            except OSError:
                pass
    return None


def report_failure(exc: BaseException, out: Path, period: str, verbose: bool) -> int:
    """One line on the terminal (what failed, where the traceback is), the traceback in the log
    file (and on the terminal too with ``--verbose``); returns :data:`EXIT_INTERNAL`.
    """
    import traceback

    text = "".join(traceback.format_exception(exc))
    log = write_failure_log(out, period, text)
    where = (
        f"traceback in {log}"
        if log
        else "the traceback could not be written anywhere; run with --verbose"
    )
    first = (str(exc).strip().splitlines() or [""])[0][:300]
    hint = _failure_hint(exc)
    if verbose:
        err.print(text, markup=False, highlight=False, soft_wrap=True)
    err.print(f"[bold red]internal failure:[/] {type(exc).__name__}: {first}{hint}; {where}",
              markup=True, soft_wrap=True)  # fmt: skip
    return EXIT_INTERNAL


class WarehouseDamaged(Exception):
    """The warehouse file exists but DuckDB cannot open it."""


def check_warehouse_opens(out: Path) -> None:
    """Open an existing warehouse read-only before Prefect starts, so that a damaged file is
    reported at once (exit 4), not after the temporary server's start-up.
    """
    import duckdb

    from pipeline.warehouse.connection import WAREHOUSE_FILE

    path = out / WAREHOUSE_FILE
    if not path.exists():
        return
    try:
        duckdb.connect(str(path), read_only=True).close()
    except duckdb.Error as exc:
        raise WarehouseDamaged(
            f"{path}: the warehouse file cannot be opened ({str(exc).splitlines()[0][:200]})"
        ) from exc


def _failure_hint(exc: BaseException) -> str:
    """What the failure most likely means for the person running it."""
    import errno

    import duckdb

    if isinstance(exc, OSError) and exc.errno == errno.ENOSPC:
        return (
            " (the disk is full: free space, then run again; the last published month is unchanged)"
        )
    if isinstance(exc, PermissionError | OSError) and exc.errno in (
        errno.EACCES,
        errno.EROFS,
        errno.EPERM,
    ):
        return (
            " (the output folder cannot be written: check its permissions; nothing was published)"
        )
    if isinstance(exc, duckdb.Error) and "no space left" in str(exc).lower():
        return (
            " (the disk is full: free space, then run again; the last published month is unchanged)"
        )
    if isinstance(exc, duckdb.Error | WarehouseDamaged):
        return (
            " (the warehouse file could not be used: it may be damaged; restore it from a backup)"
        )
    return ""


#: The modes of ``--progress`` (pipeline/run/progress.py keeps the one list of them).
ProgressMode = StrEnum("ProgressMode", {mode: mode for mode in PROGRESS_MODES})
PROGRESS_AUTO = ProgressMode("auto")


#: ``--progress`` of the commands that run months (pipeline/run/progress.py).
ProgressOption = Annotated[
    ProgressMode,
    typer.Option(
        help="Progress of long stages: live (redrawn on a terminal), plain (a line every 30 s, "
        "for logs), off; auto: live on a terminal outside CI, else plain."
    ),
]


class Executor(StrEnum):
    local = "local"
    shards = "shards"
    dask = "dask"


def _fail(message: str) -> None:
    err.print(f"[bold red]error:[/] {message}", markup=True, soft_wrap=True)
    raise typer.Exit(EXIT_USAGE)


def _stage_line(name: str, seconds: float, text: str) -> None:
    console.print(f"  {name:<10} {seconds:6.1f} s  {text}")


def _print_summary(summary: dict, out: Path) -> None:
    table = Table(
        title=f"Period {summary['period']}: rows per source (files ingested for this period)",
        title_justify="left",
    )
    from pipeline.run.period_checks import PERIOD_COLUMNS as cols

    table.add_column("source")
    for c in cols:
        table.add_column(c.replace("_", " "), justify="right")
    for source, counts in summary["sources"].items():
        table.add_row(source, *(f"{counts.get(c, 0):,}" for c in cols))
    if not summary["sources"]:
        table.add_row("(no file was ingested for this period)", *("" for _ in cols))
    console.print(table)
    totals = summary.get("warehouse_sources") or {}
    if totals:
        console.print(
            "  warehouse totals, all periods (not this period's): "
            + "; ".join(
                f"{s} read {c.get('read', 0):,}, accepted {c.get('accepted', 0):,}"
                for s, c in totals.items()
            )
        )
    _print_period_checks(summary)
    console.print(f"  persons with results up to {summary['period']}: {summary['persons']:,}")
    for line in headline_lines(summary.get("headline", {})):
        console.print(line)
    if summary.get("indicators_lack"):
        console.print(
            "  [yellow]these indicators lack[/] "
            + ", ".join(summary["indicators_lack"])
            + " (see the notices above and below)"
        )
    for path, message in summary["held_back_files"].items():
        console.print(f"  [yellow]held back file[/] {path}: {message}")
    for source, message in summary["held_back_sources"].items():
        console.print(f"  [yellow]held back source[/] {source}: {message}")
    for table, message in summary.get("withheld_tables", {}).items():
        console.print(f"  [yellow]withheld table[/] {table} (disclosure audit): {message}")
    for message in (summary.get("config_drift") or {}).values():
        console.print(f"  [bold yellow]config changed[/] {message}", soft_wrap=True)
    for period, n in (summary.get("late_results") or {}).items():
        console.print(
            f"  [yellow]late results[/] for published period {period}: {n:,} received now that would "
            f"change it if revised ('kidneysurv run --period {period} --revise \"...\"')"
        )
    rev = summary.get("revision") or {}
    if rev.get("reason"):
        console.print(
            f"  [yellow]revision {rev['number']}[/] of {summary['period']} (revision {rev['previous']} "
            f"kept in {out / summary['period'] / 'revisions' / str(rev['previous'])}/): {rev['reason']}"
        )
    console.print(f"  warehouse: {out / 'surveillance.duckdb'}")
    console.print(f"  exports:   {out / summary['period']}/")
    if summary.get("demo_key"):
        console.print("  [dim]made with the public DEMO pseudonymisation key: not for real data[/]")


def headline_lines(h: dict) -> list[str]:
    """The run's headline as printed, from the published (suppressed) tables: a cell the
    disclosure step blanked reads "suppressed", never 0 (it printed 0 for a withheld count).
    """

    def count(key: str) -> str:
        return "suppressed" if h.get(key) is None else f"{h[key]:,}"

    def share(key: str, words: str) -> str:
        return f" ({h[key]:.1%}{words})" if h.get(key) is not None else ""

    lines = []
    if "persons_tested_12m" in h:
        lines.append(f"  tested in the last 12 months: {count('persons_tested_12m')}; confirmed "
                     f"CKD: {count('persons_confirmed_ckd')}"
                     + share("ckd_share_of_tested", " of tested"))  # fmt: skip
    if "persons_with_diabetes" in h:
        lines.append(f"  people with diabetes: {count('persons_with_diabetes')}; with both eGFR "
                     f"and ACR in 12 months: {count('diabetes_with_egfr_and_acr')}"
                     + share("diabetes_share_with_both", ""))  # fmt: skip
    return lines


def _print_period_checks(summary: dict) -> None:
    """What the run says about its own period: missing sources, rows it cannot see, codes the
    source configs do not map (pipeline/run/period_checks.py, pipeline/stages/validate.py).
    """
    hold = summary.get("missing_sources_policy") == "hold"
    for source, message in (summary.get("missing_sources") or {}).items():
        word = "[red]missing source (holds the period)[/]" if hold else "[yellow]missing source[/]"
        console.print(f"  {word} {source}: {message}", soft_wrap=True)
    for line in summary.get("rows_outside_period_notes") or []:
        console.print(f"  [yellow]rows outside the period[/] {line}", soft_wrap=True)
    for source, fields in (summary.get("unmapped_codes") or {}).items():
        for field_name, info in fields.items():
            values = escape(", ".join(f"{v!r} x{n:,}" for v, n in list(info["values"].items())[:8]))
            console.print(
                f"  [yellow]unmapped {field_name}[/] {source}: {info['rows']:,} rows ({values}); "
                f"map them under '{info['config_key']}' in config/sources/{source}.yaml",
                soft_wrap=True,
            )


def _check_key_before_start(out: Path, demo: bool) -> None:
    """The key's strength, and whether it is the warehouse's (before Prefect starts, so a wrong
    key costs nothing); the flow checks again inside the run's transaction.
    """
    import duckdb

    from pipeline.core.pseudonymise import verify_warehouse_key
    from pipeline.warehouse.connection import WAREHOUSE_FILE

    key = resolve_key(demo=demo)
    path = out / WAREHOUSE_FILE
    if not path.exists():
        return
    try:
        con = duckdb.connect(str(path), read_only=True)
    except duckdb.Error:
        return  # in use or not ours: the run itself checks, under the lock
    try:
        present = con.execute(
            "select count(*) from duckdb_tables() where table_name = 'key_check' "
            "and schema_name = 'main'"
        ).fetchall()[0][0]
        if present and con.execute("select count(*) from key_check").fetchall()[0][0]:
            verify_warehouse_key(con, key)
    finally:
        con.close()


def _run(
    period: str,
    config: Path,
    inbox: Path,
    out: Path,
    demo: bool,
    verbose: bool,
    executor: str | None = None,
    revise: str | None = None,
    progress: str = "auto",
) -> int:
    from pipeline.run.revisions import RevisionNeeded

    try:
        Period.parse(period)
        settings = load_settings(config)
    except (ValueError, ConfigError) as exc:
        _fail(str(exc))
    if not inbox.is_dir():
        _fail(f"{inbox}: inbox folder not found")
    if revise is not None and not revise.strip():
        _fail("--revise needs a reason, in words (it is shown in the report of the revised period)")
    try:
        _check_key_before_start(out, demo)  # before Prefect starts: a missing, weak or wrong key
    except KeyMissing as exc:
        _fail(str(exc))
    try:
        with run_lock(out, period):  # before Prefect starts: a second run stops at once
            check_warehouse_opens(out)
            from pipeline.run import prefect_env

            prefect_env.configure(verbose=verbose)
            from pipeline.run import flows

            flows.set_reporter(_stage_line)
            if not verbose:  # a failure is told in one line (report_failure), not by Prefect's log
                import logging

                for name in ("prefect.flow_runs", "prefect.task_runs"):
                    logging.getLogger(name).setLevel(logging.CRITICAL)
                if (executor or settings.pipeline.execution.executor) == "dask":
                    # a Dask cluster's start and stop is not news on the console; distributed
                    # sets its loggers' levels when imported, so it is imported first
                    import distributed  # noqa: F401

                    logging.getLogger("distributed").setLevel(logging.WARNING)
            if not os.environ.get(
                "PREFECT_API_URL"
            ):  # Prefect's temporary server: ended if this run is killed
                from pipeline.run import reaper

                reaper.watch()
            console.print(
                f"kidneysurv: monthly run for {period} ({len(settings.sources)} sources, inbox {inbox})"
            )
            started = time.perf_counter()
            display = make_progress(progress, console)
            flows.set_progress(display)
            try:
                summary = flows.monthly_surveillance(
                    period=period,
                    config_dir=str(config),
                    inbox=str(inbox),
                    out=str(out),
                    demo=demo,
                    executor=executor,
                    revise=revise,
                )
            except KeyMissing as exc:
                display.close()
                _fail(str(exc))
            except RevisionNeeded as exc:
                display.close()
                _fail(str(exc))
            finally:
                display.close()
                flows.set_progress(flows.RunProgress())
            if summary.get("revision_refused"):
                _fail(summary["revision_refused"])
            console.print(f"  {'total':<10} {time.perf_counter() - started:6.1f} s (with Prefect)")
            _print_summary(summary, out)
            held = (
                summary["held_back_sources"]
                or summary["held_back_files"]
                or summary.get("config_drift")
                or summary.get("withheld_tables")
            )
            return max(int(summary.get("exit_code") or 0), EXIT_HELD_BACK if held else EXIT_OK)
    except RunLocked as exc:
        err.print(f"[bold red]error:[/] {exc}", markup=True, soft_wrap=True)
        raise typer.Exit(EXIT_LOCKED) from None
    except (typer.Exit, KeyboardInterrupt):
        raise
    except Exception as exc:  # noqa: BLE001 - every other failure: exit 4, the traceback in a log file
        return report_failure(exc, out, period, verbose)


@app.command()
def run(
    period: Annotated[
        str, typer.Option(help="Month to publish, YYYY-MM (indicators as of its last day).")
    ],
    config: Annotated[Path, typer.Option(help="Config folder.")] = Path("config"),
    inbox: Annotated[Path, typer.Option(help="Inbox folder with one subfolder per source.")] = Path(
        "sample_extracts"
    ),
    out: Annotated[Path, typer.Option(help="Output folder: warehouse and exports.")] = Path("out"),
    verbose: Annotated[
        bool, typer.Option("--verbose", help="Show Prefect's own log lines.")
    ] = False,
    executor: Annotated[
        Executor | None,
        typer.Option(help="Person-level work: local, shards or dask (default: config)."),
    ] = None,
    revise: Annotated[
        str | None,
        typer.Option(
            "--revise",
            metavar="REASON",
            help="Publish a revision of an already published period, with the reason shown in its report.",
        ),
    ] = None,
    progress: ProgressOption = PROGRESS_AUTO,
) -> None:
    """Ingest what is new in the inbox and publish the indicators for one month."""
    raise typer.Exit(
        _run(
            period,
            config,
            inbox,
            out,
            demo=False,
            verbose=verbose,
            executor=executor.value if executor else None,
            revise=revise,
            progress=progress.value,
        )
    )


@app.command()
def demo(
    out: Annotated[Path, typer.Option(help="Output folder.")] = Path("out"),
    config: Annotated[Path, typer.Option(help="Config folder.")] = Path("config"),
    verbose: Annotated[
        bool, typer.Option("--verbose", help="Show Prefect's own log lines.")
    ] = False,
    progress: ProgressOption = PROGRESS_AUTO,
) -> None:
    """Run the latest complete month of the shipped sample extracts (public demo key)."""
    try:
        settings = load_settings(config)
    except ConfigError as exc:
        _fail(str(exc))
    inbox = Path(__file__).resolve().parent.parent / "sample_extracts"
    code = _run(settings.pipeline.demo.period, config, inbox, out, demo=True, verbose=verbose,
                progress=progress.value)  # fmt: skip
    raise typer.Exit(EXIT_OK if code == EXIT_HELD_BACK else code)


@app.command()
def backfill(
    from_period: Annotated[str, typer.Option("--from", help="First month, YYYY-MM.")],
    to_period: Annotated[str, typer.Option("--to", help="Last month, YYYY-MM.")],
    config: Annotated[Path, typer.Option(help="Config folder.")] = Path("config"),
    inbox: Annotated[Path, typer.Option(help="Inbox folder.")] = Path("sample_extracts"),
    out: Annotated[Path, typer.Option(help="Output folder.")] = Path("out"),
    force: Annotated[
        bool, typer.Option("--force", help="Run months already published again.")
    ] = False,
    revise: Annotated[
        str | None,
        typer.Option(
            "--revise",
            metavar="REASON",
            help="With --force: publish a revision where a month's figures change.",
        ),
    ] = None,
    demo_key: Annotated[
        bool, typer.Option("--demo-key", help="Use the public demo key (samples only).")
    ] = False,
    verbose: Annotated[
        bool, typer.Option("--verbose", help="Show Prefect's own log lines.")
    ] = False,
    progress: ProgressOption = PROGRESS_AUTO,
) -> None:
    """Run a range of months in order, skipping those already published (unless --force)."""
    from pipeline.run.backfill import months_to_run

    try:
        first, last = Period.parse(from_period), Period.parse(to_period)
        load_settings(config)
    except (ValueError, ConfigError) as exc:
        _fail(str(exc))
    if last < first:
        _fail(f"--to {last} is before --from {first}")
    from pipeline.run.backfill import finish_interrupted

    try:  # a month that committed but whose exports were never put in place is finished first
        for line in finish_interrupted(out):
            console.print(f"finished a stopped run: {line}")
    except RunLocked as exc:
        err.print(f"[bold red]error:[/] {exc}", markup=True, soft_wrap=True)
        raise typer.Exit(EXIT_LOCKED) from None
    except Exception as exc:  # noqa: BLE001 - exit 4, the traceback in a log file
        raise typer.Exit(report_failure(exc, out, first.label, verbose)) from None
    plan = months_to_run(out, first, last, force)
    worst = EXIT_OK
    for i, (period, skip) in enumerate(plan, start=1):
        if skip:
            console.print(
                f"[{i}/{len(plan)}] {period}: already published, skipped (--force runs it again)"
            )
            continue
        console.print(f"[{i}/{len(plan)}] {period}")
        code = _run(period.label, config, inbox, out, demo=demo_key, verbose=verbose, revise=revise,
                    progress=progress.value)  # fmt: skip
        worst = max(worst, code)
    raise typer.Exit(worst)


@app.command()
def reprocess(
    source_id: Annotated[str, typer.Argument(help="Source id, as in config/sources/<id>.yaml.")],
    from_month: Annotated[
        str | None,
        typer.Option(
            "--from-month",
            metavar="YYYY-MM",
            help="Only the files of extract months from this one on.",
        ),
    ] = None,
    file: Annotated[
        str | None, typer.Option("--file", help="Only this file (path in the inbox).")
    ] = None,
    apply: Annotated[
        bool,
        typer.Option("--apply", help="Apply it (default: a dry run that shows the difference)."),
    ] = False,
    config: Annotated[Path, typer.Option(help="Config folder.")] = Path("config"),
    inbox: Annotated[Path, typer.Option(help="Inbox folder.")] = Path("sample_extracts"),
    out: Annotated[Path, typer.Option(help="Output folder: warehouse and exports.")] = Path("out"),
    demo_key: Annotated[
        bool, typer.Option("--demo-key", help="Use the public demo key (samples only).")
    ] = False,
) -> None:
    """Read a source's stored files again under its current config and replace what they gave
    (old rows kept as superseded versions). A dry run unless --apply; publish the periods it
    changes with 'run --period P --revise REASON'.
    """
    from pipeline.run.reprocess import ReprocessRefused, reprocess_source

    try:
        if from_month:
            Period.parse(from_month)
        load_settings(config).source(source_id)
    except (ValueError, ConfigError) as exc:
        _fail(str(exc))
    try:
        r = reprocess_source(
            config,
            inbox,
            out,
            source_id,
            from_month=from_month,
            file=file,
            apply=apply,
            demo=demo_key,
        )
    except (ReprocessRefused, KeyMissing) as exc:
        _fail(str(exc))
    except RunLocked as exc:
        err.print(f"[bold red]error:[/] {exc}", markup=True, soft_wrap=True)
        raise typer.Exit(EXIT_LOCKED) from None
    if r.skipped_current:
        console.print(
            f"{len(r.skipped_current)} file(s) of {source_id} already made under the current config "
            f"({r.config_after[:12]}): left as they are"
        )
    if not r.files:
        console.print(f"{source_id}: nothing to reprocess")
        raise typer.Exit(EXIT_OK)
    verb = "reprocessed" if r.applied else "would be reprocessed (dry run; --apply applies it)"
    console.print(f"{source_id}: {len(r.files)} file(s) {verb} under config {r.config_after[:12]}")
    table = Table(title="rows per outcome", title_justify="left")
    for c in ("outcome", "before", "after", "change"):
        table.add_column(c, justify="left" if c == "outcome" else "right")
    for name, (b, a) in r.outcomes.items():
        table.add_row(name, f"{b:,}", f"{a:,}", f"{a - b:+,}")
    console.print(table)
    for reason, (b, a) in r.reasons.items():
        if a != b:
            console.print(f"  rejected {reason}: {b:,} -> {a:,} ({a - b:+,})")
    for other, pairs in r.other_sources.items():
        changes = ", ".join(f"{k} {b:,} -> {a:,}" for k, (b, a) in pairs.items() if a != b)
        console.print(f"  other source {other}: {changes}")
    if r.periods:
        console.print(
            f"  published periods it reaches: {', '.join(r.periods)}; "
            + ("publish each with" if r.applied else "after --apply, publish each with")
            + " 'kidneysurv run --period P --revise \"reason\"'"
        )
    raise typer.Exit(EXIT_OK)


@app.command()
def schedule(
    config: Annotated[Path, typer.Option(help="Config folder.")] = Path("config"),
    inbox: Annotated[Path, typer.Option(help="Inbox folder.")] = Path("sample_extracts"),
    out: Annotated[Path, typer.Option(help="Output folder.")] = Path("out"),
) -> None:
    """Serve the monthly run on its cron schedule (config/pipeline.yaml, schedule) against the
    Prefect server in PREFECT_API_URL; runs are listed in the Prefect UI. Ctrl-C stops it.
    """
    import os

    from pipeline.run.schedule import serve

    try:
        settings = load_settings(config)
        resolve_key(demo=False)
    except (ConfigError, KeyMissing) as exc:
        _fail(str(exc))
    if not os.environ.get("PREFECT_API_URL"):
        _fail(
            "set PREFECT_API_URL to a running Prefect server (start one with 'prefect server "
            "start'; it prints the URL); a temporary server never fires schedules"
        )
    from pipeline.run import prefect_env

    prefect_env.configure()
    s = settings.pipeline.schedule
    console.print(
        f"serving monthly_surveillance/monthly: cron '{s.cron}' ({s.timezone}), previous month each time"
    )
    serve(settings, config, inbox, out)


@sources_app.command("check")
def sources_check(
    source_id: Annotated[str, typer.Argument(help="Source id, as in config/sources/<id>.yaml.")],
    file: Annotated[
        Path, typer.Argument(help="An extract file (for FHIR: the Observation.ndjson).")
    ],
    config: Annotated[Path, typer.Option(help="Config folder.")] = Path("config"),
    examples: Annotated[int, typer.Option(help="Examples shown per reason.")] = 3,
    period: Annotated[
        str | None,
        typer.Option(
            help="Month the file would be run in, YYYY-MM (default: the month in its name)."
        ),
    ] = None,
) -> None:
    """Show what a file would give: rows per outcome and reason, with file:line examples, code
    values the source config does not map, and the rows the period would not count.

    Reads the file into a throw-away in-memory database: the warehouse is not touched. Exits 1
    when a run would hold the file back or leave rows unmapped.
    """
    from pipeline.run.source_checks import check_file

    try:
        settings = load_settings(config)
        source = settings.source(source_id)
        if period is not None:
            Period.parse(period)
    except (ConfigError, ValueError) as exc:
        _fail(str(exc))
    if not file.is_file():
        _fail(f"{file}: file not found")
    try:
        report = check_file(settings, source_id, file, period)
    except OSError as exc:
        err.print(
            f"[bold red]file held back:[/] {file}: cannot be read ({exc.strerror or exc})",
            soft_wrap=True,
        )
        raise typer.Exit(EXIT_HELD_BACK) from None
    if report.fault:
        err.print(f"[bold red]file held back:[/] {report.fault}", soft_wrap=True)
        raise typer.Exit(EXIT_HELD_BACK)
    console.print(f"{file}: {report.rows_read:,} rows read")
    for outcome, n in report.outcomes.items():
        console.print(f"  {outcome:<11} {n:>8,}")
    for reason, (n, lines) in report.reasons.items():
        hint = ""
        if reason in ("invalid_date", "future_date"):
            hint = (
                f" (date_format in config/sources/{source_id}.yaml: '{source.date_format}')"
                if source.date_format
                else f" (no date_format in config/sources/{source_id}.yaml: ISO 8601, YYYY-MM-DD, expected)"
            )
        console.print(f"  rejected {reason}: {n:,}{hint}", soft_wrap=True)
        for line_no, message in lines[:examples]:
            console.print(f"      {file}:{line_no}: {message}", soft_wrap=True)
    for name, info in report.unmapped.items():
        values = escape(", ".join(f"{v!r} x{n:,}" for v, n in list(info["values"].items())[:8]))
        console.print(
            f"  unmapped {name}: {info['rows']:,} rows ({values}); map them under "
            f"'{info['config_key']}' in config/sources/{source_id}.yaml",
            soft_wrap=True,
        )
    n_out, lines_out = report.outside_period
    if report.period is None:
        console.print(
            "  period: no month in the file name and no --period: rows outside a period not checked"
        )
    elif n_out:
        where = ", ".join(str(n) for n in lines_out) + (", ..." if n_out > len(lines_out) else "")
        console.print(
            f"  outside {report.period}: {n_out:,} accepted rows collected or reported after "
            f"{Period.parse(report.period).end.isoformat()} would not count in it (lines {where})",
            soft_wrap=True,
        )
    for reason in report.would_hold:
        console.print(f"  [bold red]would be held back:[/] {reason}", soft_wrap=True)
    raise typer.Exit(EXIT_HELD_BACK if report.would_hold or report.unmapped else EXIT_OK)


@sources_app.command("list")
def sources_list(
    config: Annotated[Path, typer.Option(help="Config folder.")] = Path("config"),
) -> None:
    """List the configured lab sources: id, layout, inbox folder, cadence and files expected."""
    try:
        settings = load_settings(config)
    except ConfigError as exc:
        _fail(str(exc))
    table = Table("source", "layout", "inbox folder", "cadence", "files")
    for source in sorted(settings.sources, key=lambda s: s.id):
        table.add_row(source.id, source.layout, source.folder, source.cadence, source.file_glob)
    console.print(table)
    console.print(f"{len(settings.sources)} sources in {config / 'sources'}")


def _print_version(value: bool) -> None:
    if value:
        from importlib.metadata import PackageNotFoundError, version

        try:
            console.print(f"kidneysurv {version('kidneysurv')}")
        except PackageNotFoundError:  # run from a checkout that was never installed
            console.print("kidneysurv (not installed)")
        raise typer.Exit(EXIT_OK)


@app.callback()
def _main(
    show_version: Annotated[
        bool,
        typer.Option(
            "--version", callback=_print_version, is_eager=True, help="Print the version and exit."
        ),
    ] = False,
) -> None:
    """Population kidney surveillance from monthly lab extracts."""


def main() -> None:  # pragma: no cover
    sys.exit(app())
