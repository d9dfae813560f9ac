"""One run at a time per warehouse, owner-only outputs, and a month published whole or not at all.

**The lock.** :func:`run_lock` takes an exclusive ``flock`` on ``<out>/.run.lock`` for the whole
run. A second run on the same output folder, from any process, gets :class:`RunLocked` at once
(the CLI exits with code 3) and changes nothing. The kernel drops the lock when its process ends,
however it ends, so a crashed run never leaves a stale lock. Inside one process the lock may be
taken again (the CLI takes it before Prefect starts, the flow takes it again). While it is held,
the process umask is 077: the warehouse, the exports and every folder the run creates are the
owner's only.

**The month's publication.** The month's tables are written in one DuckDB transaction and its
exports into the hidden folder ``<out>/.<period>.partial``; nothing a reader sees has changed
yet. :func:`commit_and_install` then writes a journal naming the run, commits, and moves the
exports into ``<out>/<period>/`` (the previous ones are moved aside first and deleted last). A
crash before the commit leaves the warehouse and the published exports exactly as they were (the
hidden leftovers are removed by the next run); a crash after it is finished by the next run:
:func:`recover_interrupted_run` reads the journal, sees the run committed, and moves its exports
into place, so the outcome is that of the run that was not interrupted.
"""

from __future__ import annotations

import datetime as dt
import fcntl
import json
import os
import re
import shutil
import socket
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path

import duckdb

from pipeline.core.faults import maybe_fail

LOCK_FILE = ".run.lock"
EXIT_LOCKED = 3

_HIDDEN = re.compile(r"^\.(\d{4}-(?:0[1-9]|1[0-2]))\.(partial|quality|old|publishing\.json)$")
#: Locks this process holds: resolved output folder -> [file descriptor, depth, previous umask].
_HELD: dict[Path, list[int]] = {}


class RunLocked(Exception):
    """Another run holds the output folder; this one stopped before changing anything."""


def _holder(fd: int) -> str:
    try:
        os.lseek(fd, 0, os.SEEK_SET)
        info = json.loads(os.read(fd, 4096).decode("utf-8") or "{}")
    except (OSError, ValueError):
        return "details unknown"
    parts = [f"pid {info.get('pid', '?')}"]
    if info.get("host"):
        parts.append(f"on {info['host']}")
    if info.get("period"):
        parts.append(f"period {info['period']}")
    if info.get("started_at"):
        parts.append(f"since {info['started_at']}")
    return ", ".join(parts)


@contextmanager
def run_lock(out_dir: Path | str, period: str | None = None) -> Iterator[Path]:
    """Hold the run lock of ``out_dir`` (created owner-only) for the ``with`` block.

    Raises :class:`RunLocked`, naming the folder and the process that holds it, when another
    run is using the folder.
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(mode=0o700, parents=True, exist_ok=True)
    os.chmod(out_dir, 0o700)
    key = out_dir.resolve()
    if key in _HELD:
        _HELD[key][1] += 1
        try:
            yield out_dir
        finally:
            _HELD[key][1] -= 1
        return
    fd = os.open(out_dir / LOCK_FILE, os.O_RDWR | os.O_CREAT, 0o600)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        holder = _holder(fd)
        os.close(fd)
        raise RunLocked(
            f"{out_dir}: another kidneysurv run is using this warehouse ({holder}); this run "
            "changed nothing. Wait for that run to finish, then run again"
        ) from None
    except BaseException:
        os.close(fd)
        raise
    info = {"pid": os.getpid(), "host": socket.gethostname(), "period": period,
            "started_at": dt.datetime.now(dt.UTC).isoformat(timespec="seconds")}  # fmt: skip
    try:  # who holds it, for the other run's message; best effort (the disk may be full)
        os.ftruncate(fd, 0)
        os.pwrite(fd, json.dumps(info).encode("utf-8"), 0)
    except OSError:
        pass
    old_umask = os.umask(0o077)
    _HELD[key] = [fd, 1, old_umask]
    try:
        yield out_dir
    finally:
        del _HELD[key]
        os.umask(old_umask)
        try:
            os.ftruncate(fd, 0)
        except OSError:
            pass
        fcntl.flock(fd, fcntl.LOCK_UN)
        os.close(fd)


def holds_lock(out_dir: Path | str) -> bool:
    return Path(out_dir).resolve() in _HELD


# --------------------------------------------------------------------------- publication


def staged_exports(out_dir: Path, label: str) -> Path:
    """Where a run writes its exports before the commit (``write_exports``' work folder)."""
    return out_dir / f".{label}.partial"


def _journal(out_dir: Path, label: str) -> Path:
    return out_dir / f".{label}.publishing.json"


def _sync_dir(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def commit_and_install(out_dir: Path, label: str, run_id: str, commit: Callable[[], None]) -> Path:
    """Commit the month and put its staged exports in place; the point of no return is the commit.

    ``commit`` commits the run's transaction (``lambda: publish.commit_month(con)``); the
    exports must already be complete in :func:`staged_exports`. Returns ``<out>/<label>``.
    """
    out_dir = Path(out_dir)
    if staged_exports(out_dir, label).is_dir():
        journal = _journal(out_dir, label)
        tmp = journal.with_name(journal.name + ".tmp")
        with tmp.open("w", encoding="utf-8") as fh:
            json.dump({"run_id": run_id, "period": label}, fh)
            fh.flush()
            os.fsync(fh.fileno())
        tmp.replace(journal)
        _sync_dir(out_dir)
    maybe_fail("publish:journal")
    commit()
    maybe_fail("publish:committed")
    install_exports(out_dir, label)
    return out_dir / label


def install_exports(out_dir: Path, label: str) -> None:
    """Move the staged exports of a committed run into ``<out>/<label>``; safe to repeat after
    a crash at any step (each step is one rename, and the state says which steps are done).
    """
    final, staged, old = out_dir / label, staged_exports(out_dir, label), out_dir / f".{label}.old"
    if staged.is_dir():
        if final.exists():
            if old.exists():
                shutil.rmtree(old)
            final.rename(old)
            _sync_dir(out_dir)
        maybe_fail("publish:moved")
        staged.rename(final)
        _sync_dir(out_dir)
    elif not final.exists() and old.is_dir():  # never expected: keep the last exports visible
        old.rename(final)
    shutil.rmtree(old, ignore_errors=True)
    _journal(out_dir, label).unlink(missing_ok=True)
    _sync_dir(out_dir)


def _committed(con: duckdb.DuckDBPyConnection, run_id: str) -> bool:
    return con.execute("select count(*) from runs where run_id = ?", [run_id]).fetchall()[0][0] > 0


def recover_interrupted_run(out_dir: Path, con: duckdb.DuckDBPyConnection) -> list[str]:
    """Finish or undo what a crashed run left in ``out_dir``; call it with the lock held and the
    warehouse open, before the run writes anything. Returns one line per thing done.
    """
    out_dir = Path(out_dir)
    done: list[str] = []
    entries = (
        sorted(p for p in out_dir.iterdir() if _HIDDEN.match(p.name)) if out_dir.is_dir() else []
    )
    for journal in (p for p in entries if p.name.endswith(".publishing.json")):
        label = _HIDDEN.match(journal.name).group(1)  # type: ignore[union-attr]
        try:
            run_id = str(json.loads(journal.read_text(encoding="utf-8"))["run_id"])
        except (OSError, ValueError, KeyError, TypeError):
            run_id = ""
        if run_id and _committed(con, run_id):
            install_exports(out_dir, label)
            done.append(
                f"{label}: run {run_id[:8]} stopped after its commit; its exports were put in place"
            )
        else:
            shutil.rmtree(staged_exports(out_dir, label), ignore_errors=True)
            journal.unlink(missing_ok=True)
            done.append(f"{label}: run stopped before its commit; its staged exports were removed")
    for path in entries:
        m = _HIDDEN.match(path.name)
        label, kind = m.group(1), m.group(2)  # type: ignore[union-attr]
        if kind in ("partial", "quality") and path.exists():
            shutil.rmtree(path, ignore_errors=True)
            done.append(f"{label}: removed the unfinished {kind} folder of a stopped run")
        elif kind == "old" and path.exists():
            final = out_dir / label
            if final.exists():
                shutil.rmtree(path, ignore_errors=True)
            else:
                path.rename(final)
                done.append(f"{label}: put the previous exports back in place")
    if done:
        _sync_dir(out_dir)
    return done
