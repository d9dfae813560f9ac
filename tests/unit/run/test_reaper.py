"""Tests for pipeline.run.reaper: the watcher finds a run's descendants and ends them.

Outside facts: psutil (a well-kept library) reports a process's children and their start time,
and a process's (pid, start time) pair names it uniquely where a pid alone may be reused
(psutil documentation, ``Process.create_time``; common practice).
"""

from __future__ import annotations

import os
import subprocess
import sys

import psutil
import pytest

from pipeline.run.reaper import _descendants, reap


def sleeper() -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])


def test_the_descendants_are_the_children_psutil_sees():
    child = sleeper()
    try:
        found = _descendants(psutil.Process(os.getpid()), me=-1)
        assert child.pid in found
        assert found[child.pid] == pytest.approx(psutil.Process(child.pid).create_time())
        assert os.getpid() not in found
    finally:
        child.kill()
        child.wait()


@pytest.mark.slow  # ends a process
def test_reap_terminates_the_same_process_and_leaves_a_reused_pid_alone():
    child, other = sleeper(), sleeper()
    try:
        started = psutil.Process(child.pid).create_time()
        # ``other`` is given a wrong start time: as if its pid had been reused since
        ended = reap({child.pid: started, other.pid: started - 1000.0})
        assert ended == [child.pid]
        child.wait(timeout=30)  # already reaped by psutil.wait_procs: the status is gone
        assert not psutil.pid_exists(child.pid)
        assert other.poll() is None
    finally:
        for proc in (child, other):
            proc.kill()
            proc.wait()
