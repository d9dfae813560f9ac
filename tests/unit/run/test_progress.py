"""The progress display of long runs (pipeline/run/progress.py): plain lines for logs on a
clock the test drives, the redrawn terminal display through rich on a terminal console, and the
choice ``auto`` makes. The counts are invented.
"""

from __future__ import annotations

import io
import time

import pytest
from rich.console import Console

from pipeline.run.progress import (
    LiveProgress,
    PlainProgress,
    RunProgress,
    choose_mode,
    clock_text,
    make_progress,
)


class Clock:
    def __init__(self) -> None:
        self.now = 1000.0

    def __call__(self) -> float:
        return self.now


def test_plain_lines_come_only_for_a_stage_that_runs_long():
    clock, lines = Clock(), []
    progress = PlainProgress(lines.append, every=30, clock=clock, ticker=False)
    progress.start("ingest")
    clock.now += 10
    assert progress.tick() == []  # a short stage prints nothing more than its stage line
    progress.advance("ingest", 12, 40, "files", 3_200_000)
    clock.now += 20  # 30 s into the stage and the run
    assert progress.tick() == [
        "  ingest     running 0:30, 12/40 files, 3,200,000 rows, 106,667 rows/s (run 0:30)"
    ]
    clock.now += 10
    assert progress.tick() == []  # the next line is due 30 s after the last one
    clock.now += 20
    assert len(progress.tick()) == 1
    progress.end("ingest")
    clock.now += 120
    assert progress.tick() == []
    assert len(lines) == 2


def test_a_stage_that_reports_nothing_still_shows_it_is_alive():
    clock, lines = Clock(), []
    progress = PlainProgress(lines.append, every=30, clock=clock, ticker=False)
    clock.now += 95
    progress.start("link")
    clock.now += 61
    assert progress.tick() == ["  link       running 1:01 (run 2:36)"]


def test_plain_lines_are_written_by_a_background_thread():
    lines: list[str] = []
    progress = PlainProgress(lines.append, every=0.05)
    try:
        progress.start("validate")
        deadline = time.monotonic() + 10
        while not lines and time.monotonic() < deadline:
            time.sleep(0.02)
    finally:
        progress.end("validate")
        progress.close()
    assert lines and lines[0].startswith("  validate   running")


def test_live_display_draws_stages_on_a_terminal():
    out = io.StringIO()
    console = Console(file=out, force_terminal=True, width=120)
    progress = LiveProgress(console)
    try:
        progress.start("ingest")
        progress.advance("ingest", 12, 40, "files", 3_200_000)
        progress.display.refresh()
        progress.end("ingest")
        progress.start("link")
        progress.display.refresh()
    finally:
        progress.close()
    drawn = out.getvalue()
    assert "ingest" in drawn and "12/40 files" in drawn and "3,200,000 rows" in drawn
    assert "link" in drawn


def test_auto_is_live_on_a_terminal_and_plain_in_logs_and_ci(monkeypatch):
    monkeypatch.delenv("CI", raising=False)
    terminal = Console(file=io.StringIO(), force_terminal=True)
    log = Console(file=io.StringIO(), force_terminal=False)
    assert choose_mode("auto", terminal) == "live"
    assert choose_mode("auto", log) == "plain"
    monkeypatch.setenv("CI", "true")
    assert choose_mode("auto", terminal) == "plain"
    assert choose_mode("off", terminal) == "off"
    with pytest.raises(ValueError, match="one of auto, live, plain, off"):
        choose_mode("fancy", terminal)
    quiet = make_progress("off", log)
    assert type(quiet) is RunProgress
    quiet.start("ingest")
    quiet.advance("ingest", 1, 2, "files", 10)
    quiet.end("ingest")
    quiet.close()


def test_elapsed_times_read_as_a_clock():
    assert [clock_text(s) for s in (0, 32.9, 725, 3729)] == ["0:00", "0:32", "12:05", "1:02:09"]
