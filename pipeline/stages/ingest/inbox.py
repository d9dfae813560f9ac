"""The inbox: every file of every source found and hashed, marked new or already ingested;
a file's bytes and text, and the month an extract belongs to (from its name).
"""

from __future__ import annotations

import calendar
import datetime as dt
import hashlib
import os
import re
import time
from dataclasses import dataclass, field
from pathlib import Path

import duckdb

from pipeline.core import identifiers
from pipeline.core.settings import Settings
from pipeline.warehouse.sql_files import read_sql


class FileFault(Exception):
    """A whole file cannot be read; the message names the file and the reason."""


@dataclass
class InboxFile:
    source_id: str
    path: Path
    rel_path: str
    sha256: str
    size_bytes: int
    status: str = (
        "new"  # new | already_ingested | duplicate_file | unreadable | held_back (config drift)
    )
    same_as: str | None = None
    file_id: int | None = None
    #: why the file could not be read at the scan (status unreadable)
    fault: str | None = None
    #: columns the identifier screen flagged and the source config allows, with the reason
    allowed_identifiers: list[identifiers.Finding] = field(default_factory=list)
    #: things worth telling about a file that was ingested (e.g. columns it ignored)
    notes: list[str] = field(default_factory=list)
    #: the patterns the file's name matched: it is stored as its hash (rel_path), never in clear
    name_withheld: list[str] = field(default_factory=list)
    #: the file's status as hashed (:func:`stat_signature`), kept in the ledger so that the next
    #: scan need not read it again; None when it may have changed while it was hashed
    stat: str | None = None
    #: True when the hash was taken from the ledger, the file unchanged since it was hashed
    hash_reused: bool = False

    def safe(self, message: str) -> str:
        """``message`` with the file's name withheld if the name looks identifying."""
        if self.name_withheld:
            message = message.replace(str(self.path), self.rel_path).replace(
                self.path.name, self.rel_path
            )
        return message


def _unreadable(path: Path, exc: OSError) -> FileFault:
    reason = exc.strerror or type(exc).__name__
    hint = (
        "check the file's owner and permissions"
        if isinstance(exc, PermissionError)
        else "check the file"
    )
    return FileFault(
        f"{path}: the file cannot be read ({reason}); {hint}, it is tried again next run"
    )


def read_file_bytes(path: Path) -> bytes:
    """The file's bytes; a file that cannot be read is a :class:`FileFault` naming it."""
    try:
        return path.read_bytes()
    except OSError as exc:
        raise _unreadable(path, exc) from None


#: Bytes hashed per read, into one reused buffer (hashlib releases the interpreter lock while it
#: digests it): the 60 files of the 10M benchmark hashed in 0.7 s instead of 1.1 s with 1 MB reads.
HASH_READ_BYTES = 16 << 20


def sha256_of(path: Path) -> str:
    digest = hashlib.sha256()
    buffer = bytearray(HASH_READ_BYTES)
    view = memoryview(buffer)
    with path.open("rb") as fh:
        while n := fh.readinto(buffer):
            digest.update(view[:n])
    return digest.hexdigest()


#: A file changed less than this long before it was hashed gets no :func:`stat_signature` in
#: the ledger: a second change within the file system's timestamp tick would leave its status as
#: it was, so such a file is hashed again at the next scan.
STAT_SETTLED_NS = 2_000_000_000


def stat_signature(st: os.stat_result) -> str:
    """What says a file is the one hashed before: its device, inode, size, modification time and
    status-change time (ns). Writing to a file, replacing it, and setting its modification time
    back all move its status-change time, which no program can set (POSIX ``stat``); a copy to
    another disk or folder has another inode or device. As version-control systems do to tell an
    unchanged working file (common practice).
    """
    return f"{st.st_dev}:{st.st_ino}:{st.st_size}:{st.st_mtime_ns}:{st.st_ctime_ns}"


def opened_status(path: Path) -> os.stat_result:
    """The file's status, taken from the file opened for reading: on a network file system a
    plain ``stat`` may answer from the client's cache, while opening a file revalidates it
    (close-to-open consistency, as NFS gives; common practice); a file that cannot be read
    fails here as it would when hashed.
    """
    with path.open("rb") as fh:
        return os.fstat(fh.fileno())


def hash_file(path: Path) -> tuple[str, int, str | None]:
    """The file's SHA-256, size and :func:`stat_signature`; the signature is None when the file
    changed while it was read, or had changed less than :data:`STAT_SETTLED_NS` before.
    """
    before = opened_status(path)
    started = time.time_ns()
    sha = sha256_of(path)
    signature = stat_signature(before)
    settled = max(before.st_mtime_ns, before.st_ctime_ns) < started - STAT_SETTLED_NS
    unchanged = stat_signature(opened_status(path)) == signature
    return sha, before.st_size, signature if settled and unchanged else None


def scan_inbox(
    con: duckdb.DuckDBPyConnection | None, settings: Settings, inbox: Path
) -> list[InboxFile]:
    """List every file of every source, in a stable order, marked new or already ingested.

    A file the ledger holds is not read again when its :func:`stat_signature` is the one
    recorded when it was hashed: its hash is the recorded one. Otherwise every file is hashed,
    so a month's scan reads only what arrived or changed, not the whole archive of past extracts
    (unless ``execution.inbox_hashing`` is ``every_file``).
    """
    seen: dict[tuple[str, str], str] = {}  # (source, sha) -> path first ingested with it
    recorded: set[tuple[str, str, str]] = set()  # (source, sha, path) already in the ledger
    hashed: dict[tuple[str, str], tuple[str, str]] = {}  # (source, path) -> (signature, sha)
    reuse = settings.pipeline.execution.inbox_hashing == "changed"
    if con is not None:
        for source_id, sha, path, status, stat in con.execute(
            read_sql("ingest_files_recorded")
        ).fetchall():
            recorded.add((source_id, sha, path))
            if status == "ingested":
                seen.setdefault((source_id, sha), path)
            if stat is not None:  # the latest row of the path wins
                hashed[(source_id, path)] = (stat, sha)
            else:
                hashed.pop((source_id, path), None)
    found: list[InboxFile] = []
    for source in settings.sources:
        folder = inbox / source.folder
        if not folder.is_dir():
            continue
        for path in sorted(folder.glob(source.file_glob)):
            if not path.is_file():
                continue
            rel = path.relative_to(inbox).as_posix()
            # a file name that looks like a person's name, phone number or e-mail address is
            # stored as its hash, before anything is written
            name_flags = sorted(identifiers.file_name_patterns(rel))
            if name_flags:
                month = _month_end_from_name(rel)
                rel = identifiers.withheld_file_name(rel, f"{month:%Y-%m}" if month else None)
            known = hashed.get((source.id, rel)) if reuse else None
            try:
                now = opened_status(path)
                if known is not None and stat_signature(now) == known[0]:
                    (stat, sha), size, reused = known, now.st_size, True
                else:
                    (sha, size, stat), reused = hash_file(path), False
            except OSError as exc:  # held back by land_inbox, with the reason
                bad = InboxFile(
                    source.id, path, rel, "", 0, status="unreadable", name_withheld=name_flags
                )
                bad.fault = bad.safe(str(_unreadable(path, exc)))
                found.append(bad)
                continue
            item = InboxFile(source.id, path, rel, sha, size, name_withheld=name_flags, stat=stat,
                             hash_reused=reused)  # fmt: skip
            earlier = seen.get((source.id, sha))
            if (source.id, sha, rel) in recorded:
                item.status = "already_ingested"
            elif earlier is not None:
                item.status, item.same_as = "duplicate_file", earlier
            else:
                seen[(source.id, sha)] = rel
            found.append(item)
    return found


def _decode(path: Path, data: bytes, encoding: str) -> str:
    if data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]
    try:
        return data.decode("utf-8" if encoding == "utf-8-sig" else encoding)
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise FileFault(
            f"{path}: line {line}: bytes that are not {encoding} ({data[exc.start : exc.start + 4]!r}); "
            f"re-export the file as {encoding}, or set 'encoding' in the source config"
        ) from None


def _month_end_from_name(name: str) -> dt.date | None:
    match = re.search(r"(20\d{2})[-_]?(0[1-9]|1[0-2])(?!\d)", name)
    if not match:
        return None
    year, month = int(match.group(1)), int(match.group(2))
    return dt.date(year, month, calendar.monthrange(year, month)[1])


def extract_month(rel_path: str, run_period: str) -> str:
    """The month an extract belongs to: from its file name (YYYY-MM or YYYYMM), else the run's."""
    end = _month_end_from_name(rel_path)
    return f"{end.year:04d}-{end.month:02d}" if end else run_period
