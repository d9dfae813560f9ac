"""Tests for pipeline.run.runlock: one run per output folder.

Outside facts: ``flock(2)`` locks belong to an open file description, so a second ``open`` of
the lock file, even in the same process, cannot take the lock while the first holds it (Linux
man page flock(2)); a lock file readable by its owner only has mode 0o600 (POSIX, common
practice).
"""

from __future__ import annotations

import fcntl
import os
import stat

import pytest

from pipeline.run.runlock import LOCK_FILE, RunLocked, holds_lock, run_lock


def test_a_second_run_is_refused_naming_the_holder(tmp_path):
    out = tmp_path / "out"
    with run_lock(out, "2026-01"):
        assert holds_lock(out)
        fd = os.open(out / LOCK_FILE, os.O_RDWR)
        try:
            with pytest.raises(BlockingIOError):  # flock(2): the folder's lock is taken
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        finally:
            os.close(fd)
        assert stat.S_IMODE((out / LOCK_FILE).stat().st_mode) == 0o600
        assert stat.S_IMODE(out.stat().st_mode) == 0o700
    assert not holds_lock(out)


def test_the_lock_is_free_again_after_the_run(tmp_path):
    out = tmp_path / "out"
    with run_lock(out):
        pass
    fd = os.open(out / LOCK_FILE, os.O_RDWR)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)  # free: no BlockingIOError
    finally:
        os.close(fd)


def test_a_lock_held_by_another_open_file_refuses_the_run(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    fd = os.open(out / LOCK_FILE, os.O_RDWR | os.O_CREAT, 0o600)
    os.write(fd, b'{"pid": 4242, "period": "2026-02"}')
    fcntl.flock(fd, fcntl.LOCK_EX)
    try:
        with pytest.raises(RunLocked, match="pid 4242.*period 2026-02"), run_lock(out):
            pass
    finally:
        os.close(fd)


def test_the_same_process_may_nest_its_lock(tmp_path):
    with run_lock(tmp_path / "out"), run_lock(tmp_path / "out"):
        assert holds_lock(tmp_path / "out")
