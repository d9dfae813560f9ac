"""The inbox: a file's hash and the month an extract belongs to.

Outside facts: SHA-256 of "abc" is ba7816bf...f20015ad (FIPS 180-2, Appendix B.1) and of the
empty message e3b0c442...7852b855 (common practice, from memory; hashlib agrees); a file read in
pieces hashes as the whole (hashlib, Python docs).
"""

from __future__ import annotations

import hashlib

import pytest

from pipeline.stages.ingest.inbox import HASH_READ_BYTES, extract_month, sha256_of


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
