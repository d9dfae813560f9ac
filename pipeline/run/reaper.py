"""Leave no process behind: end what a run started when the run itself is killed.

Prefect's temporary API server is a child process that Prefect stops at interpreter exit; a run
killed with SIGKILL (the out-of-memory killer, ``kill -9``, a scheduler's time limit) never gets
there, and the server would keep running and holding its port. :func:`watch` starts a small
watcher process, in its own session so that a Ctrl-C aimed at the run does not end it first.
Every half second it notes the run's descendants (pid and start time); once the run is gone it
terminates those still alive (and kills any that outlive five seconds), then exits. The start
time guards against a pid the system has given to an unrelated process since.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time

POLL_SECONDS = 0.5
GRACE_SECONDS = 5.0


_WATCHERS: dict[int, subprocess.Popen] = {}
#: The environment variable that marks the processes a watched run started.
MARK = "KIDNEYSURV_WATCHED_RUN"


def watch(pid: int | None = None) -> subprocess.Popen:
    """Start the watcher of process ``pid`` (this process by default), once per process."""
    pid = pid or os.getpid()
    if pid in _WATCHERS and _WATCHERS[pid].poll() is None:
        return _WATCHERS[pid]
    # every process the run starts from now on inherits this mark, so the watcher also finds one
    # started between two of its looks (Prefect's server can start and the run be killed within
    # half a second)
    os.environ[MARK] = f"{pid}"
    _WATCHERS[pid] = subprocess.Popen(
        [sys.executable, "-m", "pipeline.run.reaper", str(pid)],
        stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
        start_new_session=True, close_fds=True,
    )  # fmt: skip
    return _WATCHERS[pid]


def _descendants(parent, me: int) -> dict[int, float]:
    import psutil

    found = {}
    try:
        for child in parent.children(recursive=True):
            if child.pid != me:
                try:
                    found[child.pid] = child.create_time()
                except psutil.Error:
                    pass
    except psutil.Error:
        pass
    return found


def reap(known: dict[int, float]) -> list[int]:
    """Terminate the processes of ``known`` (pid -> start time) that are still the same
    processes, kill those still alive after the grace time; returns the pids ended.
    """
    import psutil

    alive = []
    for pid, started in known.items():
        try:
            proc = psutil.Process(pid)
            if abs(proc.create_time() - started) < 0.01:
                proc.terminate()
                alive.append(proc)
        except psutil.Error:
            pass
    _, still = psutil.wait_procs(alive, timeout=GRACE_SECONDS)
    for proc in still:
        try:
            proc.kill()
        except psutil.Error:
            pass
    return [p.pid for p in alive]


def main(pid: int) -> None:
    import psutil

    me = os.getpid()
    try:
        parent = psutil.Process(pid)
    except psutil.Error:
        return
    known: dict[int, float] = {}
    try:
        while parent.is_running() and parent.status() != psutil.STATUS_ZOMBIE:
            known.update(_descendants(parent, me))
            time.sleep(POLL_SECONDS)
    except psutil.Error:  # gone between two looks
        pass
    known.update(_marked(str(pid), me))
    reap(known)


def _marked(mark: str, me: int) -> dict[int, float]:
    """Processes carrying the run's mark in their environment (pid -> start time)."""
    import psutil

    found = {}
    for proc in psutil.process_iter():
        if proc.pid == me:
            continue
        try:
            if proc.environ().get(MARK) == mark:
                found[proc.pid] = proc.create_time()
        except psutil.Error:
            pass
    return found


if __name__ == "__main__":  # pragma: no cover - run by watch()
    main(int(sys.argv[1]))
