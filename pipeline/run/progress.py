"""Progress of a long run, as the run goes: which stage runs, how far it is (files read, shards
done, rows per second) and the run's elapsed time.

Three displays, picked by ``kidneysurv run --progress``:

- ``live``: on a terminal, one line per running stage redrawn in place (rich's progress
  display, a general-purpose library, rather than hand-drawn cursor moves);
- ``plain``: in logs and CI, where nothing can be redrawn: a plain line when a stage has run for
  ``every`` seconds, and again every ``every`` seconds while it runs, so a short run prints
  nothing more than its stage lines and a long one is never silent for long;
- ``off``: nothing but the stage lines.

``auto`` (the default) is ``live`` when the output is a terminal and ``CI`` is not set, else
``plain``. Every display only reads counts the stages hand it; it never changes what a run does.
"""

from __future__ import annotations

import os
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass

from rich.console import Console
from rich.progress import (
    BarColumn,
    Progress,
    SpinnerColumn,
    TaskID,
    TextColumn,
    TimeElapsedColumn,
)

MODES = ("auto", "live", "plain", "off")


@dataclass
class StageState:
    """How far one running stage is: units done of a total (files, shards) and rows."""

    name: str
    started: float
    unit: str = ""
    done: int = 0
    total: int | None = None
    rows: int = 0

    def count(self) -> str:
        """``12/40 files`` (empty while the total is not known)."""
        if self.total is None:
            return ""
        return f"{self.done:,}/{self.total:,} {self.unit}".rstrip()

    def describe(self, now: float, with_count: bool = True) -> str:
        """``12/40 files, 3,200,000 rows, 410,000 rows/s`` (only the parts known)."""
        parts = [self.count()] if with_count and self.total is not None else []
        if self.rows:
            parts.append(f"{self.rows:,} rows")
            seconds = now - self.started
            if seconds > 0:
                parts.append(f"{self.rows / seconds:,.0f} rows/s")
        return ", ".join(parts)


class RunProgress:
    """No display (``off``): the interface every display shares.

    ``start`` and ``end`` bracket a stage; ``advance`` says how far it is (called by the stage's
    own loop: files landed, shards finished). ``clock`` is ``time.monotonic`` unless a test
    gives another.
    """

    def __init__(self, clock: Callable[[], float] = time.monotonic) -> None:
        self.clock = clock
        self.run_started = clock()
        self.stages: dict[str, StageState] = {}
        self._lock = threading.Lock()

    def start(self, stage: str) -> None:
        with self._lock:
            self.stages[stage] = StageState(stage, self.clock())

    def advance(
        self, stage: str, done: int, total: int | None = None, unit: str = "", rows: int = 0
    ) -> None:
        with self._lock:
            state = self.stages.get(stage)
            if state is None:
                return
            state.done, state.total, state.unit, state.rows = done, total, unit, rows
        self.changed(stage)

    def end(self, stage: str) -> None:
        with self._lock:
            self.stages.pop(stage, None)
        self.ended(stage)

    def close(self) -> None:
        """Stop the display (the run ended, or failed)."""

    def changed(self, stage: str) -> None:
        """A display's hook: a stage advanced."""

    def ended(self, stage: str) -> None:
        """A display's hook: a stage ended."""

    def elapsed(self) -> str:
        return clock_text(self.clock() - self.run_started)


def clock_text(seconds: float) -> str:
    """``0:32``, ``12:05``, ``1:02:09``."""
    whole = int(seconds)
    hours, rest = divmod(whole, 3600)
    minutes, secs = divmod(rest, 60)
    return f"{hours}:{minutes:02d}:{secs:02d}" if hours else f"{minutes}:{secs:02d}"


class PlainProgress(RunProgress):
    """Plain lines for logs and CI: ``  ingest     running 0:30, 12/40 files, 3,200,000 rows,
    410,000 rows/s (run 0:45)``, once a stage has run ``every`` seconds and again every
    ``every`` seconds, from a background thread (a stage that reports nothing still shows it
    is alive).
    """

    def __init__(
        self,
        write: Callable[[str], None],
        every: float = 30.0,
        clock: Callable[[], float] = time.monotonic,
        ticker: bool = True,
    ) -> None:
        super().__init__(clock)
        self.write, self.every = write, every
        self._next: dict[str, float] = {}
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        if ticker:
            self._thread = threading.Thread(target=self._tick, name="run-progress", daemon=True)
            self._thread.start()

    def start(self, stage: str) -> None:
        super().start(stage)
        with self._lock:
            self._next[stage] = self.stages[stage].started + self.every

    def ended(self, stage: str) -> None:
        with self._lock:
            self._next.pop(stage, None)

    def tick(self) -> list[str]:
        """Write a line for every stage due one; return the lines (tests call this directly)."""
        now = self.clock()
        lines = []
        with self._lock:
            for name, state in self.stages.items():
                due = self._next.get(name)
                if due is None or now < due:
                    continue
                self._next[name] = now + self.every
                detail = state.describe(now)
                lines.append(
                    f"  {name:<10} running {clock_text(now - state.started)}"
                    + (f", {detail}" if detail else "")
                    + f" (run {clock_text(now - self.run_started)})"
                )
        for line in lines:
            self.write(line)
        return lines

    def _tick(self) -> None:
        while not self._stop.wait(min(1.0, self.every)):
            self.tick()

    def close(self) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=2)


class LiveProgress(RunProgress):
    """On a terminal: the run's elapsed time and one redrawn line per running stage (a bar when
    the stage knows its total), through rich's progress display on the CLI's console, so the
    stage lines the CLI prints appear above it.
    """

    def __init__(self, console: Console, clock: Callable[[], float] = time.monotonic) -> None:
        super().__init__(clock)
        self.display = Progress(
            SpinnerColumn(),
            TextColumn("{task.description:<10}"),
            BarColumn(bar_width=24),
            TextColumn("{task.fields[count]}"),
            TextColumn("{task.fields[detail]}"),
            TimeElapsedColumn(),
            console=console,
            transient=True,
        )
        self._run_task = self.display.add_task("run", total=None, count="", detail="")
        self._tasks: dict[str, TaskID] = {}
        self.display.start()

    def start(self, stage: str) -> None:
        super().start(stage)
        self._tasks[stage] = self.display.add_task(stage, total=None, count="", detail="")

    def changed(self, stage: str) -> None:
        task = self._tasks.get(stage)
        state = self.stages.get(stage)
        if task is None or state is None:
            return
        self.display.update(
            task,
            completed=state.done,
            total=state.total,
            count=state.count(),
            detail=state.describe(self.clock(), with_count=False),
        )

    def ended(self, stage: str) -> None:
        task = self._tasks.pop(stage, None)
        if task is not None:
            self.display.remove_task(task)

    def close(self) -> None:
        self.display.stop()


def choose_mode(mode: str, console: Console) -> str:
    """The display ``auto`` stands for here: ``live`` on a terminal outside CI, else ``plain``."""
    if mode not in MODES:
        raise ValueError(f"--progress {mode!r}: one of {', '.join(MODES)}")
    if mode != "auto":
        return mode
    return "live" if console.is_terminal and not os.environ.get("CI") else "plain"


def make_progress(mode: str, console: Console) -> RunProgress:
    """The display for ``--progress`` (``auto``, ``live``, ``plain`` or ``off``)."""
    chosen = choose_mode(mode, console)
    if chosen == "live":
        return LiveProgress(console)
    if chosen == "plain":
        return PlainProgress(lambda line: console.print(line, markup=False, highlight=False))
    return RunProgress()
