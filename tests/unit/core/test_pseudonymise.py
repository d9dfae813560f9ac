"""Tests for the pseudonymisation key (pipeline.core.pseudonymise) and the privacy of a run's outputs.

- The key comes from KIDNEYSURV_PSEUDONYM_KEY or from an owner-only key file named by
  KIDNEYSURV_PSEUDONYM_KEY_FILE; a key file that group or others may read is refused (the
  owner-only rule is the one OpenSSH applies to private keys: common practice).
- A non-demo run without a key refuses to start.
- The key is in no output and no log line; the demo key is marked as such in the outputs.
- The warehouse and every output folder and file are the owner's only (mode bits per POSIX).

The HMAC-SHA256 check value is computed with Python's hmac module (RFC 2104), a reference
library outside the project.
"""

from __future__ import annotations

import hashlib
import hmac
import json
import logging
import os
import stat
from pathlib import Path

import duckdb
import pytest

from pipeline.core.pseudonymise import (
    DEMO_KEY,
    KEY_ENV,
    KEY_FILE_ENV,
    KeyFileUnsafe,
    KeyMissing,
    person_key,
    resolve_key,
)
from pipeline.run.flows import run_month_plain
from pipeline.warehouse.connection import WAREHOUSE_FILE
from tests.conftest import make_small_config, rows, write_inbox

SECRET = "westerfold-region-key-7Qm2-test-only"
HEADER = ("person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,"
          "status,height_cm,reported_at,fasting\n")  # fmt: skip


@pytest.fixture(autouse=True)
def no_key_in_env(monkeypatch):
    monkeypatch.delenv(KEY_ENV, raising=False)
    monkeypatch.delenv(KEY_FILE_ENV, raising=False)


def key_file(tmp_path: Path, mode: int, content: str = SECRET + "\n") -> Path:
    path = tmp_path / "keys" / "pseudonym.key"
    path.parent.mkdir(exist_ok=True)
    path.write_text(content, encoding="utf-8")
    path.chmod(mode)
    return path


def test_key_from_the_environment(monkeypatch):
    monkeypatch.setenv(KEY_ENV, SECRET)
    key = resolve_key(demo=False)
    assert key.secret == SECRET.encode() and not key.is_demo


@pytest.mark.parametrize("mode", [0o600, 0o400])
def test_key_from_an_owner_only_file(tmp_path, monkeypatch, mode):
    monkeypatch.setenv(KEY_FILE_ENV, str(key_file(tmp_path, mode)))
    key = resolve_key(demo=False)
    assert key.secret == SECRET.encode() and not key.is_demo  # the line end is not part of the key
    expected = hmac.new(SECRET.encode(), b"shared\x1fWF-0000aaaa", hashlib.sha256).hexdigest()[:32]
    assert person_key(key, "shared", "WF-0000aaaa") == expected


@pytest.mark.parametrize("mode", [0o644, 0o640, 0o604, 0o660, 0o606, 0o700 | 0o004])
def test_a_key_file_others_may_read_or_change_is_refused(tmp_path, monkeypatch, mode):
    path = key_file(tmp_path, mode)
    monkeypatch.setenv(KEY_FILE_ENV, str(path))
    with pytest.raises(KeyFileUnsafe) as refused:
        resolve_key(demo=False)
    message = str(refused.value)
    assert (
        str(path) in message
        and f"{stat.S_IMODE(path.stat().st_mode):04o}" in message
        and "chmod 600" in message
    )
    assert SECRET not in message
    with pytest.raises(KeyMissing):  # the CLI's usage-error path (exit 2) catches it
        resolve_key(demo=True)


@pytest.mark.parametrize("content", ["", "\n", "   \n"])
def test_an_empty_key_file_is_refused(tmp_path, monkeypatch, content):
    monkeypatch.setenv(KEY_FILE_ENV, str(key_file(tmp_path, 0o600, content)))
    with pytest.raises(KeyFileUnsafe, match="empty"):
        resolve_key(demo=False)


def test_a_missing_key_file_is_refused_naming_it(tmp_path, monkeypatch):
    monkeypatch.setenv(KEY_FILE_ENV, str(tmp_path / "nowhere.key"))
    with pytest.raises(KeyFileUnsafe, match="nowhere.key"):
        resolve_key(demo=False)


def test_non_demo_run_without_a_key_refuses_to_start(tmp_path):
    with pytest.raises(KeyMissing, match=KEY_ENV):
        resolve_key(demo=False)
    config = make_small_config(tmp_path / "config")
    with pytest.raises(KeyMissing):
        run_month_plain(
            "2026-01", str(config), str(_inbox(tmp_path)), str(tmp_path / "out"), demo=False
        )
    assert not (tmp_path / "out" / WAREHOUSE_FILE).exists()


def test_demo_key_only_for_demo_and_marked():
    key = resolve_key(demo=True)
    assert key.is_demo and key.secret == DEMO_KEY.encode()


def test_the_key_is_never_printed():
    key = resolve_key(demo=True)
    assert DEMO_KEY not in repr(key) and DEMO_KEY not in str(key) and DEMO_KEY not in f"{key}"


# --------------------------------------------------------------------------- a run's outputs


def _inbox(tmp_path: Path) -> Path:
    lines = [f"WF-{p:08x},{1950 + p},{'FM'[p % 2]},WF0{1 + p % 4},WGH{p:05d},2026-01-{1 + p % 27:02d},2160-0,"
             f"{0.7 + p / 50:.2f},mg/dL,final,,2026-01-{1 + p % 27:02d},\n" for p in range(30)]  # fmt: skip
    return write_inbox(
        tmp_path, {"westerfold_general_lab/results_2026-01.csv": HEADER + "".join(lines)}
    )


@pytest.fixture(scope="module")
def secret_run(tmp_path_factory):
    """A non-demo run with the key from an owner-only file, its logs captured."""
    tmp_path = tmp_path_factory.mktemp("secret_run")
    config = make_small_config(tmp_path / "config")
    inbox = _inbox(tmp_path)
    out = tmp_path / "out"
    records: list[logging.LogRecord] = []

    class Keep(logging.Handler):
        def emit(self, record: logging.LogRecord) -> None:
            records.append(record)

    handler = Keep(level=logging.DEBUG)
    root = logging.getLogger()
    old_level = root.level
    root.addHandler(handler)
    root.setLevel(logging.DEBUG)
    with pytest.MonkeyPatch.context() as mp:
        mp.delenv(KEY_ENV, raising=False)
        mp.setenv(KEY_FILE_ENV, str(key_file(tmp_path, 0o600)))
        try:
            summary = run_month_plain("2026-01", str(config), str(inbox), str(out), demo=False)
        finally:
            root.removeHandler(handler)
            root.setLevel(old_level)
    return out, summary, [r.getMessage() for r in records]


def test_the_key_is_in_no_output_and_no_log(secret_run, capfd):
    out, summary, log_lines = secret_run
    needles = (SECRET.encode(), SECRET.encode("utf-16-le"), SECRET.encode().hex().encode())
    files = [p for p in out.rglob("*") if p.is_file()]
    assert any(p.name == WAREHOUSE_FILE for p in files) and any(p.suffix == ".csv" for p in files)
    for path in files:
        data = path.read_bytes()
        assert not any(n in data for n in needles), path
    assert not any(SECRET in line for line in log_lines)
    assert SECRET not in json.dumps(summary, default=str) and SECRET not in capfd.readouterr().out
    assert summary["demo_key"] is False


def _modes(out: Path) -> dict[str, int]:
    return {
        p.relative_to(out).as_posix() or ".": stat.S_IMODE(p.stat().st_mode)
        for p in [out, *out.rglob("*")]
    }


def test_warehouse_and_output_folders_are_owner_only(secret_run):
    out, _, _ = secret_run
    modes = _modes(out)
    assert modes["."] == 0o700
    assert WAREHOUSE_FILE in modes and "2026-01" in modes
    shared = {p: f"{m:04o}" for p, m in modes.items() if m & 0o077}
    assert shared == {}, shared  # no folder or file readable or writable by group or others
    assert os.stat(out).st_uid == os.geteuid()


def test_outputs_made_with_the_demo_key_say_so(tmp_path):
    config = make_small_config(tmp_path / "config")
    out = tmp_path / "out"
    run_month_plain("2026-01", str(config), str(_inbox(tmp_path)), str(out), demo=True)
    folder = out / "2026-01"
    assert json.loads((folder / "run_summary.json").read_text(encoding="utf-8"))["demo_key"] is True
    assert (
        json.loads((folder / "run_manifest.json").read_text(encoding="utf-8"))["demo_key"] is True
    )
    assert "demo key" in (folder / "report.html").read_text(encoding="utf-8").lower()
    con = duckdb.connect(str(out / WAREHOUSE_FILE), read_only=True)
    try:
        assert rows(con, "select demo_key from runs") == [(True,)]
    finally:
        con.close()


def test_person_ranges_cover_every_key_once():
    import hashlib

    from pipeline.core.pseudonymise import person_range

    keys = [hashlib.sha256(str(i).encode()).hexdigest()[:32] for i in range(2000)] + [
        "0" * 32,
        "f" * 32,
    ]
    for chunks in (1, 3, 14, 100):
        ranges = [person_range(c, chunks) for c in range(chunks)]
        for key in keys:
            assert sum(lower <= key < upper for lower, upper in ranges) == 1
