"""Tests for pipeline.core.faults: the injected faults are what the system would raise or send.

Outside facts (POSIX, common practice): ENOSPC is "No space left on device" (errno.h; Python's
``errno`` and ``os.strerror`` give the platform's code and text); SIGKILL is signal 9 and cannot
be caught, and a process ended by it has ``returncode == -9`` in Python's ``subprocess``.
"""

from __future__ import annotations

import errno
import os
import signal
import subprocess
import sys

import pytest

from pipeline.core.faults import FAULT_ENV, KIND_ENV, maybe_fail
from tests.conftest import ROOT


def test_nothing_happens_unless_the_point_is_named(monkeypatch):
    monkeypatch.delenv(FAULT_ENV, raising=False)
    maybe_fail("ingest:before")
    monkeypatch.setenv(FAULT_ENV, "publish:journal")
    monkeypatch.setenv(KIND_ENV, "enospc")
    maybe_fail("ingest:before")  # another point: returns


def test_a_full_disk_is_the_posix_enospc_error(monkeypatch):
    monkeypatch.setenv(FAULT_ENV, " export:after ")
    monkeypatch.setenv(KIND_ENV, "enospc")
    with pytest.raises(OSError) as raised:
        maybe_fail("export:after")
    assert raised.value.errno == errno.ENOSPC
    assert raised.value.strerror == os.strerror(errno.ENOSPC)
    assert "export:after" in str(raised.value)


@pytest.mark.slow  # kills a process
def test_a_kill_is_sigkill_that_nothing_after_it_runs():
    code = (
        "from pipeline.core.faults import maybe_fail\nmaybe_fail('scan:before')\nprint('after')\n"
    )
    env = {**os.environ, FAULT_ENV: "scan:before", KIND_ENV: "kill"}
    done = subprocess.run([sys.executable, "-c", code], cwd=ROOT, env=env, capture_output=True,
                          text=True, timeout=120)  # fmt: skip
    assert done.returncode == -signal.SIGKILL == -9
    assert "after" not in done.stdout
