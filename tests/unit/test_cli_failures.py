"""Failures that are not the data's fault say so: exit code 4 (CLI contract, DEVELOPERS.md Design notes), one
line naming what failed and where the traceback was written, the traceback itself only with
--verbose; and they never look like a held-back source (exit 1).

The faults are real where this machine allows it: a damaged warehouse file is a file of
garbage; a read-only or full output folder is a small tmpfs mounted read-only or filled up
(skipped where mounting is not permitted); POSIX errno names (EROFS, ENOSPC) are from the
Linux man pages (errno(3)).
"""

from __future__ import annotations

import errno
import subprocess
from pathlib import Path

import pytest
from typer.testing import CliRunner

from pipeline import cli
from tests.conftest import CONFIG_DIR, ROOT

runner = CliRunner()


def run(out: Path, *extra: str):
    return runner.invoke(cli.app, ["run", "--period", "2025-06", "--config", str(CONFIG_DIR),
                                   "--inbox", str(ROOT / "sample_extracts"), "--out", str(out), *extra],
                         env={"KIDNEYSURV_PSEUDONYM_KEY": "a-test-key-made-only-for-this-check-0123456789"})  # fmt: skip


def test_a_damaged_warehouse_exits_4_with_one_line_and_a_log(tmp_path: Path):
    out = tmp_path / "out"
    out.mkdir()
    (out / "surveillance.duckdb").write_bytes(b"this is not a DuckDB file\n" * 200)
    result = run(out)
    assert result.exit_code == cli.EXIT_INTERNAL, result.output
    lines = [x for x in result.output.splitlines() if x.strip()]
    assert len(lines) == 1 and lines[0].startswith("internal failure: WarehouseDamaged")
    assert "Traceback" not in result.output and "may be damaged" in lines[0]
    [log] = (out / "2025-06" / "logs").glob("failure-2025-06-*.log")
    assert str(log) in result.output.replace("\n", "")
    assert "Traceback (most recent call last)" in log.read_text(encoding="utf-8")
    verbose = run(out, "--verbose")
    assert (
        verbose.exit_code == cli.EXIT_INTERNAL
        and "Traceback (most recent call last)" in verbose.output
    )


def test_an_output_path_that_cannot_be_a_folder_exits_4(tmp_path: Path):
    blocker = tmp_path / "file"
    blocker.write_text("x")
    result = run(blocker / "out")  # a folder under a file: NotADirectoryError
    assert (
        result.exit_code == cli.EXIT_INTERNAL
        and "internal failure: NotADirectoryError" in result.output
    )
    assert "Traceback" not in result.output


@pytest.fixture
def small_mount(tmp_path: Path):
    point = tmp_path / "mnt"
    point.mkdir()
    made = subprocess.run(
        ["mount", "-t", "tmpfs", "-o", "size=256k", "tmpfs", str(point)],
        capture_output=True,
        check=False,
    )
    if made.returncode != 0:
        pytest.skip("mounting a tmpfs is not permitted here")
    try:
        yield point
    finally:
        subprocess.run(["umount", "-l", str(point)], capture_output=True, check=False)


def test_a_read_only_output_folder_exits_4(small_mount: Path):
    subprocess.run(["mount", "-o", "remount,ro", str(small_mount)], check=True)
    result = run(small_mount / "out")
    assert result.exit_code == cli.EXIT_INTERNAL, result.output
    assert "cannot be written" in result.output and "Traceback" not in result.output


def test_a_full_disk_is_named_as_such():
    full = OSError(errno.ENOSPC, "No space left on device")
    assert "disk is full" in cli._failure_hint(full)
    read_only = OSError(errno.EROFS, "Read-only file system")
    assert "cannot be written" in cli._failure_hint(read_only)


@pytest.mark.slow
def test_a_full_output_disk_exits_4_not_1(small_mount: Path):
    # the mount filled to the last block: the warehouse cannot be written (a whole run, Prefect too)
    subprocess.run(
        ["dd", "if=/dev/zero", f"of={small_mount / 'filler'}", "bs=4k"],
        capture_output=True,
        check=False,
    )
    result = run(small_mount / "out")
    assert result.exit_code == cli.EXIT_INTERNAL, result.output
    assert "disk is full" in result.output and "Traceback" not in result.output
    # the output disk is full: the traceback goes to the temporary folder instead, and says so
    logged = result.output.replace("\n", "").split("traceback in ")[-1].strip()
    assert "kidneysurv-logs" in logged and Path(logged).is_file()


# --------------------------------------------------------------------------- backfill


def _committed_but_not_installed(out: Path) -> None:
    """What a run stopped between its commit and the move of its exports leaves behind."""
    import duckdb

    out.mkdir(parents=True)
    con = duckdb.connect(str(out / "surveillance.duckdb"))
    con.execute("create table runs (run_id varchar, period varchar)")
    con.execute("insert into runs values ('run-0001', '2025-06')")
    con.close()
    staged = out / ".2025-06.partial"
    staged.mkdir()
    (staged / "district_ckd_prevalence.csv").write_text("district_code,persons\n")
    (out / ".2025-06.publishing.json").write_text('{"run_id": "run-0001", "period": "2025-06"}')


def test_backfill_finishes_a_month_committed_but_not_installed(tmp_path: Path):
    from pipeline.core.periods import Period
    from pipeline.run.backfill import finish_interrupted, months_to_run

    out = tmp_path / "out"
    _committed_but_not_installed(out)
    june = Period.parse("2025-06")
    assert months_to_run(out, june, june, force=False) == [(june, False)]  # not "already published"
    done = finish_interrupted(out)
    assert done and "exports were put in place" in done[0]
    assert (out / "2025-06" / "district_ckd_prevalence.csv").is_file()
    assert not (out / ".2025-06.publishing.json").exists()
    assert months_to_run(out, june, june, force=False) == [(june, True)]


def test_backfill_command_reports_the_finished_month(tmp_path: Path):
    out = tmp_path / "out"
    _committed_but_not_installed(out)
    result = runner.invoke(cli.app, ["backfill", "--from", "2025-06", "--to", "2025-06", "--config", str(CONFIG_DIR),
                                     "--out", str(out)])  # fmt: skip
    assert result.exit_code == 0, result.output
    assert (
        "finished a stopped run: 2025-06" in result.output
        and "already published, skipped" in result.output
    )


# --------------------------------------------------------------------------- a killed run


@pytest.mark.slow
def test_a_killed_run_leaves_no_prefect_server_behind(tmp_path: Path):
    import os
    import signal
    import sys
    import time

    import psutil

    env = {
        **os.environ,
        "KIDNEYSURV_PSEUDONYM_KEY": "a-test-key-made-only-for-this-check-0123456789",
    }
    env.pop("PREFECT_API_URL", None)
    proc = subprocess.Popen([str(Path(sys.executable).parent / "kidneysurv"), "run", "--period", "2025-06", "--config",
                             str(CONFIG_DIR), "--inbox", str(ROOT / "sample_extracts"), "--out", str(tmp_path / "out")],
                            cwd=tmp_path, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)  # fmt: skip
    server = None
    try:
        deadline = time.monotonic() + 240
        while server is None and time.monotonic() < deadline and proc.poll() is None:
            kids = psutil.Process(proc.pid).children(recursive=True)
            server = next((k for k in kids if "uvicorn" in " ".join(k.cmdline())), None)
            time.sleep(0.2)
        assert server is not None, "the run never started Prefect's temporary server"
        proc.send_signal(
            signal.SIGKILL
        )  # no atexit, no finally: what the out-of-memory killer does
        proc.wait()
        gone, _ = psutil.wait_procs([server], timeout=20)
        assert gone, "Prefect's temporary server outlived the killed run"
    finally:
        if proc.poll() is None:
            proc.kill()
        if server is not None and server.is_running():  # leave nothing behind, even on failure
            server.kill()
