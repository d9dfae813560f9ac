"""The inbox: a file's hash and the month an extract belongs to.

Outside facts: SHA-256 of "abc" is ba7816bf...f20015ad (FIPS 180-2, Appendix B.1) and of the
empty message e3b0c442...7852b855 (common practice, from memory; hashlib agrees); a file read in
pieces hashes as the whole (hashlib, Python docs). Writing to a file or setting its times moves
its status-change time (ctime), which no program can set back (POSIX ``stat``, ``utimensat``;
common practice).
"""

from __future__ import annotations

import datetime as dt
import hashlib
import os
import time
from pathlib import Path

import pytest

from pipeline.core.pseudonymise import DEMO_KEY, PseudonymKey
from pipeline.core.settings import load_settings
from pipeline.stages.ingest import inbox as inbox_module
from pipeline.stages.ingest.inbox import HASH_READ_BYTES, extract_month, scan_inbox, sha256_of
from pipeline.stages.ingest.landing import land_inbox
from pipeline.warehouse import connection as warehouse
from tests.conftest import ROOT, rows, write_inbox

SAMPLES = ROOT / "sample_extracts"
MAY, JUNE = (
    "westerfold_general_lab/results_2025-05.csv",
    "westerfold_general_lab/results_2025-06.csv",
)


@pytest.mark.parametrize(
    ("content", "digest"),
    [
        (b"abc", "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"),
        (b"", "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"),
    ],
)
def test_sha256_of_a_file_is_the_published_digest(tmp_path, content, digest):
    path = tmp_path / "f.csv"
    path.write_bytes(content)
    assert sha256_of(path) == digest


def test_a_file_longer_than_one_read_hashes_as_the_whole(tmp_path):
    data = bytes(range(256)) * (HASH_READ_BYTES // 256 + 3)
    path = tmp_path / "big.csv"
    path.write_bytes(data)
    assert sha256_of(path) == hashlib.sha256(data).hexdigest()


@pytest.mark.parametrize(
    ("name", "month"),
    [
        ("lab/results_2026-11.csv", "2026-11"),
        ("lab/results_202611.csv", "2026-11"),
        ("lab/2025_02/extract.csv", "2025-02"),
        ("lab/results.csv", "2026-10"),  # no month in the name: the run's period
        ("lab/results_2026-13.csv", "2026-10"),  # no month 13 in the Gregorian calendar
    ],
)
def test_the_extract_month_comes_from_the_file_name_else_the_run(name, month):
    assert extract_month(name, "2026-10") == month


class CountedHashes:
    """``sha256_of`` as it is, counting the files it reads (which files a scan hashes)."""

    def __init__(self) -> None:
        self.paths: list[str] = []

    def __call__(self, path: Path) -> str:
        self.paths.append(path.name)
        return sha256_of(path)


def _land(con, settings, inbox: Path) -> None:
    land_inbox(con, settings, inbox, PseudonymKey(secret=DEMO_KEY.encode(), is_demo=True),
               "2025-06", dt.date(2025, 7, 1), sink=lambda con, frame: None)  # fmt: skip


@pytest.fixture
def landed(small_config, tmp_path, monkeypatch):
    """May and June landed in a warehouse after they settled (STAT_SETTLED_NS set to 50 ms,
    not 2 s, and the files 100 ms old): (settings, inbox, connection)."""
    monkeypatch.setattr(inbox_module, "STAT_SETTLED_NS", 50_000_000)
    settings = load_settings(small_config)
    inbox = write_inbox(tmp_path, {n: (SAMPLES / n).read_bytes() for n in (MAY, JUNE)})
    time.sleep(0.1)  # settled: each file's last change is older than STAT_SETTLED_NS
    con = warehouse.connect(tmp_path / "w.duckdb")
    try:
        warehouse.ensure_schema(con)
        _land(con, settings, inbox)
        yield settings, inbox, con
    finally:
        con.close()


def test_a_scan_reads_again_only_the_files_changed_since_they_were_hashed(landed, monkeypatch):
    settings, inbox, con = landed
    assert rows(con, "select count(file_stat) from ingest_files") == [(2,)]
    hashes = CountedHashes()
    monkeypatch.setattr(inbox_module, "sha256_of", hashes)
    again = scan_inbox(con, settings, inbox)
    assert hashes.paths == []  # nothing read: both unchanged since they were hashed
    assert [i.status for i in again] == ["already_ingested", "already_ingested"]
    assert [i.sha256 for i in again] == [sha256_of(i.path) for i in again]  # the true hashes

    # a lab rewrites June in place, the same size, and sets its modification time back
    june = inbox / JUNE
    before = june.stat()
    data = bytearray(june.read_bytes())
    at = data.index(b"2025-06-")
    data[at + 5 : at + 7] = b"07" if data[at + 5 : at + 7] != b"07" else b"08"
    june.write_bytes(bytes(data))
    os.utime(june, ns=(before.st_atime_ns, before.st_mtime_ns))
    assert (june.stat().st_size, june.stat().st_mtime_ns) == (
        before.st_size,
        before.st_mtime_ns,
    )
    changed = scan_inbox(con, settings, inbox)
    assert hashes.paths == ["results_2025-06.csv"]  # its status-change time moved
    assert changed[1].status == "new"
    assert changed[1].sha256 == hashlib.sha256(bytes(data)).hexdigest()

    # touched, the content the same: read again, still already ingested, and its new status
    # recorded by the run, so the scan after that reads nothing
    hashes.paths.clear()
    os.utime(inbox / MAY)
    time.sleep(0.1)
    touched = scan_inbox(con, settings, inbox)
    assert touched[0].status == "already_ingested" and hashes.paths[0] == "results_2025-05.csv"
    _land(con, settings, inbox)  # lands the new June; records May's status
    hashes.paths.clear()
    assert [i.status for i in scan_inbox(con, settings, inbox)] == ["already_ingested"] * 2
    assert hashes.paths == []


def test_a_file_changed_just_before_it_was_hashed_is_read_again_at_the_next_scan(
    small_config, tmp_path, monkeypatch
):
    # a second change within the file system's timestamp tick would leave the status unchanged:
    # a file that had changed within STAT_SETTLED_NS (2 s) of its hashing gets no status
    settings = load_settings(small_config)
    inbox = write_inbox(tmp_path, {MAY: (SAMPLES / MAY).read_bytes()})
    con = warehouse.connect(tmp_path / "w.duckdb")
    try:
        warehouse.ensure_schema(con)
        _land(con, settings, inbox)
        assert rows(con, "select file_stat from ingest_files") == [(None,)]
        hashes = CountedHashes()
        monkeypatch.setattr(inbox_module, "sha256_of", hashes)
        [item] = scan_inbox(con, settings, inbox)
        assert item.status == "already_ingested" and hashes.paths == ["results_2025-05.csv"]
    finally:
        con.close()


def test_a_warehouse_without_file_status_hashes_every_file_and_then_records_it(landed, monkeypatch):
    # a warehouse made before file_stat was kept (or a row whose status was not settled)
    settings, inbox, con = landed
    con.execute("update ingest_files set file_stat = null")
    hashes = CountedHashes()
    monkeypatch.setattr(inbox_module, "sha256_of", hashes)
    assert len(scan_inbox(con, settings, inbox)) == 2 and len(hashes.paths) == 2
    _land(con, settings, inbox)  # nothing new; each file's status recorded
    assert rows(con, "select count(file_stat), count(*) from ingest_files") == [(2, 2)]
    hashes.paths.clear()
    scan_inbox(con, settings, inbox)
    assert hashes.paths == []


def test_with_every_file_hashing_each_scan_reads_every_file(landed, small_config, monkeypatch):
    # execution.inbox_hashing: every_file, for an inbox on a file system without a real
    # status-change time: nothing is taken from the ledger
    settings, inbox, con = landed
    pipeline_yaml = small_config / "pipeline.yaml"
    text = pipeline_yaml.read_text()
    assert "  inbox_hashing: changed\n" in text
    pipeline_yaml.write_text(text.replace("inbox_hashing: changed", "inbox_hashing: every_file"))
    every = load_settings(small_config)
    hashes = CountedHashes()
    monkeypatch.setattr(inbox_module, "sha256_of", hashes)
    assert [i.status for i in scan_inbox(con, every, inbox)] == ["already_ingested"] * 2
    assert hashes.paths == ["results_2025-05.csv", "results_2025-06.csv"]
