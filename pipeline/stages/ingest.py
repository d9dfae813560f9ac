"""Ingest: find what is new in the inbox, read it into landed rows, record every file in the ledger.

One reader per layout (delimited text, FHIR NDJSON, Parquet) turns a lab's file into the same
landed columns (all text, as reported), with the file's line number and the raw line (the person
token masked) kept for every row. A delimited file without quotes is split in bulk (polars), any
other goes through the csv module; both give the same rows. Each file's rows are keyed and
handed to the run's sink (the validate stage's judge) as soon as it is read, so one file at a
time is held in memory and the run's rows are never stored unjudged. A fault that concerns the
whole file (not UTF-8, a missing column, the wrong delimiter, a truncated or corrupt Parquet
file) holds that file back with a message naming it; the other
files go on, and so does a file that cannot be read at all (permission denied, an I/O error).
Before anything is stored, every file passes the identifier screen (:mod:`pipeline.core.identifiers`):
a file whose columns or sampled values look like direct identifiers is held back the same way,
unless the source config allows the column with a written reason (recorded in the ledger
message, hence in the run manifest). Nothing here judges a value: that is the validate stage.
"""

from __future__ import annotations

import calendar
import csv
import datetime as dt
import difflib
import hashlib
import io
import json
import re
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import duckdb
import polars as pl

from pipeline.core import identifiers
from pipeline.core.landed import _LANDED_SCHEMA, LANDED_COLUMNS
from pipeline.core.pseudonymise import SHARED_DOMAIN, PersonKeyCache, PseudonymKey, add_person_keys
from pipeline.core.settings import (
    STANDARD_FIELDS,
    STANDARD_REQUIRED,
    Settings,
    SourceConfig,
    source_config_sha256,
)

CHUNK_ROWS = 200_000
_MASK = "[person]"
_PATIENT_REF = re.compile(r"Patient/[^\"\s,}]+")


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

    def safe(self, message: str) -> str:
        """``message`` with the file's name withheld if the name looks identifying."""
        if self.name_withheld:
            message = message.replace(str(self.path), self.rel_path).replace(
                self.path.name, self.rel_path
            )
        return message


@dataclass
class IngestSummary:
    files_new: int = 0
    files_skipped: int = 0
    files_held_back: int = 0
    rows_landed: int = 0
    held_back: list[tuple[str, str]] = field(default_factory=list)  # (path, message)
    #: (path, column, pattern, reason) of every flagged column a source config allows
    allowed_identifiers: list[tuple[str, str, str, str]] = field(default_factory=list)


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


def scan_inbox(
    con: duckdb.DuckDBPyConnection | None, settings: Settings, inbox: Path
) -> list[InboxFile]:
    """List every file of every source, in a stable order, marked new or already ingested."""
    seen: dict[tuple[str, str], str] = {}  # (source, sha) -> path first ingested with it
    recorded: set[tuple[str, str, str]] = set()  # (source, sha, path) already in the ledger
    if con is not None:
        for source_id, sha, path, status in con.execute(
            "select source_id, sha256, file_path, status from ingest_files "
            "where status in ('ingested', 'duplicate_file') order by file_id"
        ).fetchall():
            recorded.add((source_id, sha, path))
            if status == "ingested":
                seen.setdefault((source_id, sha), path)
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
            try:
                sha = sha256_of(path)
                size = path.stat().st_size
            except OSError as exc:  # held back by land_inbox, with the reason
                bad = InboxFile(
                    source.id, path, rel, "", 0, status="unreadable", name_withheld=name_flags
                )
                bad.fault = bad.safe(str(_unreadable(path, exc)))
                found.append(bad)
                continue
            item = InboxFile(source.id, path, rel, sha, size, name_withheld=name_flags)
            earlier = seen.get((source.id, sha))
            if (source.id, sha, rel) in recorded:
                item.status = "already_ingested"
            elif earlier is not None:
                item.status, item.same_as = "duplicate_file", earlier
            else:
                seen[(source.id, sha)] = rel
            found.append(item)
    return found


# --------------------------------------------------------------------------- text files


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


def _header_fault(
    path: Path, header: list[str], wanted: dict[str, str], delimiter: str | None
) -> str | None:
    """Why the header lacks a required column, or None; ``delimiter`` None: a Parquet schema."""
    missing = [col for col in wanted.values() if col not in header]
    if not missing:
        return None
    where = "line 1" if delimiter is not None else "the file's schema"
    if (
        delimiter is not None
        and len(header) == 1
        and any(d in header[0] for d in ",;\t|" if d != delimiter)
    ):
        return (
            f"{path}: line 1: the header has one column {header[0][:60]!r}; the file does not "
            f"seem to use the delimiter {delimiter!r} set for this source"
        )
    hints = []
    for col in missing:
        close = difflib.get_close_matches(col, header, n=1)
        hints.append(f"{col!r}" + (f" (found {close[0]!r}: a typo?)" if close else ""))
    return f"{path}: {where}: missing required column(s) {', '.join(hints)}"


#: The characters Python's ``str.strip()`` removes (``str.isspace``): Unicode White_Space plus
#: the information separators U+001C..U+001F, which polars' own ``strip_chars()`` keeps. The
#: bulk reader strips with these so that a token or a blank line is judged as the csv reader's
#: path judges it (test_reader_paths.py checks the set against ``str.isspace``).
PY_WHITESPACE = (
    "\t\n\x0b\x0c\r\x1c\x1d\x1e\x1f \x85\xa0\u1680\u2000\u2001\u2002\u2003\u2004\u2005\u2006"
    "\u2007\u2008\u2009\u200a\u2028\u2029\u202f\u205f\u3000"
)


def fast_path_applies(text: str, delimiter: str) -> bool:
    """Whether a decoded file can be split line by line and field by field in bulk.

    Without the quote character, a CSV record is one line and a field is what lies between two
    delimiters (RFC 4180), which is all the csv module does then too. Anything else (a quote
    anywhere, a delimiter that is a quote or a line break) goes through the csv module, and so
    does a file with a line longer than the csv module's field limit, which it reports as a
    fault (:func:`_rows_in_bulk` declines it).
    """
    return '"' not in text and delimiter not in '"\r\n'


def withheld_text(fields: list[str]) -> str:
    """The raw text kept for a row whose fields cannot be matched to the header with certainty
    (too many or too few): the field count and each field's length, never the text, since a
    person token or a name may sit in any field.
    """
    return f"[text withheld: {len(fields)} fields, lengths {','.join(str(len(f)) for f in fields)}]"


def _rejoin(fields: list[str], delimiter: str) -> str:
    """A row's fields written back as one line of the file (quoted where the csv module
    would quote them); for a file without quotes, the line as read.
    """
    out = io.StringIO()
    # "\r\n" as the terminator: the csv module then quotes a field holding either character
    csv.writer(out, delimiter=delimiter, lineterminator="\r\n").writerow(fields)
    return out.getvalue()[:-2].replace("\r\n", "\n").replace("\r", "\n")


def _rows_by_csv(path: Path, text: str, delimiter: str, n_fields: int,
                 index: dict[str, int]) -> tuple[pl.DataFrame, list[tuple[int, list[str]]]]:  # fmt: skip
    """Rows of a file through the csv module: quoted fields, line breaks inside quotes."""
    token_idx = index["person_token"]
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter)
    next(reader)  # the header
    lines: list[str] = []
    columns: dict[str, list] = {f: [] for f in ("line_no", "raw_text", "row_fault", *index)}
    schema = {k: pl.Int64 if k == "line_no" else pl.String for k in columns}
    chunks: list[pl.DataFrame] = []

    def flush() -> None:
        if columns["line_no"]:
            chunks.append(pl.DataFrame(columns, schema=schema))
            for values in columns.values():
                values.clear()

    del lines  # the raw text of a row is rebuilt from its fields (see withheld_text)
    start = 2
    rows_iter = iter(reader)
    sample: list[tuple[int, list[str]]] = []
    n_rows = 0
    while True:
        try:
            row = next(rows_iter)
        except StopIteration:
            break
        except csv.Error as exc:
            raise FileFault(
                f"{path}: line {reader.line_num}: cannot be read as CSV ({exc})"
            ) from None
        end = reader.line_num
        line_no, start = start, end + 1
        if not row or (len(row) == 1 and not row[0].strip()):
            continue  # blank line: not a row
        if identifiers.sampled(n_rows):
            sample.append((line_no, row))
        n_rows += 1
        fault = None
        if len(row) != n_fields:
            # the fields cannot be matched to the header with certainty: the text is not kept
            fault = f"wrong_field_count:{len(row)} fields, the header has {n_fields}"
            raw = withheld_text(row)
            row = (row + [""] * n_fields)[:n_fields]
        else:
            token = row[token_idx].strip()
            # masked field by field before the fields are written back: a token that needs
            # quoting (a delimiter, a quote) would otherwise survive in its escaped form
            raw = _rejoin([_MASK if i == token_idx and token else v.replace(token, _MASK) if token else v
                           for i, v in enumerate(row)], delimiter)  # fmt: skip
        columns["line_no"].append(line_no)
        columns["raw_text"].append(raw)
        columns["row_fault"].append(fault)
        for f, i in index.items():
            columns[f].append(row[i])
        if len(columns["line_no"]) >= CHUNK_ROWS:
            flush()
    flush()
    return (pl.concat(chunks) if chunks else pl.DataFrame(schema=schema)), sample


def _rows_in_bulk(text: str, delimiter: str, n_fields: int,
                  index: dict[str, int]) -> tuple[pl.DataFrame, pl.DataFrame] | None:  # fmt: skip
    """The same rows as :func:`_rows_by_csv`, for a file :func:`fast_path_applies` to: every
    line split at once in polars. Returns the rows and the identifier screen's sample (line,
    field position, value: the fields as read, before any padding), or None for a file with a
    line over the csv module's field limit (left to the csv module, which names the line).
    """
    if "\r" in text:  # a line ends at \r\n, \n or \r, as for the csv module
        text = text.replace("\r\n", "\n").replace("\r", "\n")
    lines = (
        pl.DataFrame({"raw_text": [text]})
        .select(pl.col("raw_text").str.split("\n"))
        .explode("raw_text")
    )
    limit = csv.field_size_limit()
    if len(text) > limit and lines["raw_text"].str.len_chars().max() > limit:
        return None
    fields = pl.col("fields")
    n = fields.list.len()
    frame = (
        lines.with_row_index("line_no", offset=1)
        .slice(1)  # the header
        .with_columns(
            pl.col("line_no").cast(pl.Int64),
            pl.col("raw_text").str.split(delimiter).alias("fields"),
        )
        # a blank line (nothing but white space) is not a row; its number is still counted
        .filter(~((n == 1) & (fields.list.first().str.strip_chars(PY_WHITESPACE) == "")))
    )
    sample = (
        frame.with_row_index("row")
        .filter(identifiers.sampled_mask(pl.col("row").cast(pl.Int64)))
        .select(pl.col("line_no").alias("line"), fields.alias("value"),
                pl.int_ranges(0, fields.list.len(), dtype=pl.Int64).alias("position"))
        .explode("value", "position")
        .filter(pl.col("value") != "")
    )  # fmt: skip

    def field(i: int) -> pl.Expr:  # a short row is padded with empty fields
        return fields.list.get(i, null_on_oob=True).fill_null("")

    token_idx = index["person_token"]
    token = field(token_idx).str.strip_chars(PY_WHITESPACE)
    # as _rejoin: the token field is the mask, and the token masked in every other field, field
    # by field (masking the joined text would mask the token again inside an earlier mask)
    masked = pl.concat_str(
        [pl.when(token != "").then(pl.lit(_MASK)).otherwise(field(i)) if i == token_idx
         else pl.when(token != "").then(field(i).str.split(token).list.join(_MASK)).otherwise(field(i))
         for i in range(n_fields)], separator=delimiter)  # fmt: skip
    withheld = pl.format(
        "[text withheld: {} fields, lengths {}]", n,
        fields.list.eval(pl.element().str.len_chars().cast(pl.String)).list.join(","))  # fmt: skip
    rows = frame.select(
        "line_no",
        # as withheld_text and _rejoin: a row whose fields do not match the header keeps no
        # text; any other keeps its fields with the token's every occurrence masked
        pl.when(n != n_fields).then(withheld)
        .otherwise(masked).alias("raw_text"),
        pl.when(n != n_fields)
        .then(pl.format("wrong_field_count:{} fields, the header has {}", n, pl.lit(n_fields)))
        .otherwise(pl.lit(None, dtype=pl.String)).alias("row_fault"),
        *(field(i).alias(f) for f, i in index.items()),
    )  # fmt: skip
    return rows, sample


def read_delimited(source: SourceConfig, item: InboxFile, reader: str = "auto",
                   places: tuple[str, ...] = ()) -> pl.DataFrame:  # fmt: skip
    """Read a standard-layout or mapped delimited file into landed rows.

    ``reader``: ``auto`` splits a file without quotes in bulk and reads any other through the
    csv module; ``csv`` always uses the csv module, ``bulk`` requires the bulk path (both for
    tests: the two give the same rows).
    """
    path = item.path
    text = _decode(path, read_file_bytes(path), source.encoding)
    if not text.strip():
        raise FileFault(f"{path}: the file is empty")
    if source.layout == "standard":
        wanted = {f: f for f in STANDARD_FIELDS}
        required = {f: f for f in STANDARD_REQUIRED}
    else:
        wanted = dict(source.columns)
        required = {f: c for f, c in source.columns.items() if f in STANDARD_REQUIRED}
    try:
        first = next(csv.reader(io.StringIO(text, newline=""), delimiter=source.delimiter))
    except csv.Error as exc:
        raise FileFault(f"{path}: line 1: the header cannot be read as CSV ({exc})") from None
    header = [h.strip() for h in first]
    twice = sorted({h for h in header if header.count(h) > 1})
    if twice:
        raise FileFault(f"{path}: line 1: the header names the column(s) {twice} more than once; which one "
                        "to read is not certain: ask the lab for a file with one column of each name")  # fmt: skip
    fault = _header_fault(path, header, required, source.delimiter)
    if fault:
        raise FileFault(fault)
    index = {f: header.index(c) for f, c in wanted.items() if c in header}
    extra = [h for h in header if h not in wanted.values()]
    if extra:
        item.notes.append(f"columns not in the layout, ignored: {', '.join(extra)}")
    bulk = fast_path_applies(text, source.delimiter)
    split = (
        _rows_in_bulk(text, source.delimiter, len(header), index)
        if bulk and reader != "csv"
        else None
    )
    if reader == "bulk" and split is None:
        raise ValueError(f"{path}: the bulk reader does not apply to this file")
    if split is not None:
        frame, sample = split
    else:
        frame, sample_rows = _rows_by_csv(path, text, source.delimiter, len(header), index)
        sample = None
    cut_short = source.last_line_end == "required" and not text.endswith(("\n", "\r"))
    cut_short = cut_short and bool(re.split(r"\r\n|\n|\r", text[-4096:])[-1].strip())
    del text
    if not frame.height:
        raise FileFault(f"{path}: the file has a header but no rows")
    aliases = {c: f for f, c in wanted.items()}
    births = [c for f, c in wanted.items() if f == "birth_year"]
    if sample is None:
        findings = identifiers.screen_table(header, sample_rows, births, places)
    else:
        findings = identifiers.screen_values(header, sample, births, places)
    frame = _quarantine(frame, _apply_screen(source, item, path, findings, aliases))
    if cut_short:  # the last row, unless a fault already rejects it
        last = frame["line_no"].max()
        frame = frame.with_columns(
            pl.when((pl.col("line_no") == last) & pl.col("row_fault").is_null())
            .then(pl.lit(TRUNCATED)).otherwise(pl.col("row_fault")).alias("row_fault"))  # fmt: skip
    for f in STANDARD_FIELDS:
        if f not in frame.columns:
            frame = frame.with_columns(pl.lit(None, dtype=pl.String).alias(f))
    return _to_landed(frame, source, item)


#: The row_fault of a last line without a line end (see SourceConfig.last_line_end).
TRUNCATED = ("truncated_line:the file's last line has no line end and may have been cut short; ask the "
             "lab to send the file again (or set last_line_end: optional if its files end so)")  # fmt: skip


def _apply_screen(
    source: SourceConfig,
    item: InboxFile,
    path: Path,
    findings: list[identifiers.Finding],
    aliases: dict[str, str] | None = None,
    rows_ok: bool = True,
) -> list[identifiers.Finding]:
    """Refuse the file (a FileFault) for any finding of a whole column the source does not
    allow; return the findings of a few values (their rows are quarantined), keep the rest.
    ``rows_ok`` False: any finding refuses the file (records that are not stored as rows).
    """
    refused, allowed = identifiers.split_allowed(
        findings, source.allowed_identifier_columns, aliases
    )
    whole = [f for f in refused if f.whole_column or not rows_ok]
    if whole:
        raise FileFault(identifiers.refusal_message(path, whole, source.id))
    item.allowed_identifiers.extend(allowed)
    rows = [f for f in refused if not f.whole_column]
    if rows:
        item.notes.append(identifiers.quarantine_note(rows))
    return rows


def _quarantine(frame: pl.DataFrame, findings: list[identifiers.Finding]) -> pl.DataFrame:
    """Reject every row holding a value the screen flagged (``identifier_in_value``): the reason
    names the column and the pattern, and the row's text is not kept.
    """
    if not findings:
        return frame
    reasons: dict[int, str] = {}
    for f in findings:
        for line in f.lines:
            reasons.setdefault(line, identifiers.quarantine_reason(f))
    flagged = pl.DataFrame({"line_no": list(reasons), "_reason": list(reasons.values())},
                           schema={"line_no": pl.Int64, "_reason": pl.String})  # fmt: skip
    out = frame.join(flagged, on="line_no", how="left", maintain_order="left")
    hit = pl.col("_reason").is_not_null()
    return out.with_columns(
        pl.when(hit).then(pl.col("_reason")).otherwise(pl.col("row_fault")).alias("row_fault"),
        pl.when(hit)
        .then(pl.lit("[text withheld: the identifier screen flagged a field]"))
        .otherwise(pl.col("raw_text"))
        .alias("raw_text"),
    ).drop("_reason")


def _to_landed(frame: pl.DataFrame, source: SourceConfig, item: InboxFile) -> pl.DataFrame:
    """Trim, map the source's own codes to standard ones and name the landed columns."""
    trimmed = frame.with_columns(pl.col(f).str.strip_chars() for f in STANDARD_FIELDS)
    value = pl.col("value")
    clean = value
    if source.thousands_separator:
        clean = clean.str.replace_all(source.thousands_separator, "", literal=True)
    if source.decimal_mark == ",":
        clean = clean.str.replace_all(",", ".", literal=True)

    def mapped(col: str, mapping: dict[str, str]) -> pl.Expr:
        if not mapping:
            return pl.col(col)
        return pl.col(col).replace(mapping)

    domain = SHARED_DOMAIN if source.linkage == "shared" else source.id
    return trimmed.select(
        pl.lit(source.id).alias("source_id"),
        pl.lit(item.file_id, dtype=pl.Int64).alias("file_id"),
        "line_no",
        "raw_text",
        "row_fault",
        pl.lit(domain).alias("linkage_domain"),
        pl.when(pl.col("person_token") != "").then(pl.col("person_token")).alias("person_token"),
        pl.col("birth_year").alias("birth_year_text"),
        mapped("sex", source.sex_codes).alias("sex_text"),
        pl.col("district_code"),
        pl.col("specimen_id"),
        pl.col("collected_date").alias("collected_text"),
        mapped("test_code", source.test_codes).alias("test_code"),
        pl.col("test_code").alias("test_code_text"),
        value.alias("value_text"),
        clean.alias("value_clean"),
        pl.col("unit").alias("unit_text"),
        mapped("status", source.status_codes).str.to_lowercase().alias("status"),
        pl.col("status").alias("status_text"),
        pl.col("height_cm").alias("height_text"),
        pl.col("reported_at").alias("reported_text"),
        mapped("fasting", source.fasting_codes).alias("fasting_text"),
    )


# --------------------------------------------------------------------------- Parquet


def _parquet_fault(path: Path, exc: BaseException) -> FileFault:
    reason = re.sub(r"^Could not open Parquet input source '[^']*': ", "", str(exc).strip())
    reason = " ".join(reason.split())[:200] or type(exc).__name__
    return FileFault(
        f"{path}: not a readable Parquet file ({reason}); it may be truncated or corrupt: ask the lab "
        "to send it again, it is tried again next run"
    )


def _as_text(path: Path, frame: pl.DataFrame) -> pl.DataFrame:
    """Every column as text, as reported (numbers and dates in their usual text form); a
    missing value is an empty field, as in a delimited file.
    """
    out = []
    for name, dtype in frame.schema.items():
        if dtype.is_nested() or dtype == pl.Object:
            raise FileFault(f"{path}: column {name!r} holds {dtype} values; the parquet layout reads "
                            "text, numbers, booleans and dates only")  # fmt: skip
        out.append(pl.col(name).cast(pl.String))
    try:
        return frame.select(out).with_columns(pl.all().fill_null(""))
    except pl.exceptions.PolarsError as exc:  # e.g. a binary column that is not UTF-8
        raise FileFault(
            f"{path}: a column cannot be read as text ({str(exc).splitlines()[0][:160]})"
        ) from None


def read_parquet(
    source: SourceConfig, item: InboxFile, places: tuple[str, ...] = ()
) -> pl.DataFrame:
    """Read one Parquet file (layout ``parquet``) into landed rows, mapped by ``columns``.

    ``line_no`` is the row's 1-based number in the file; ``raw_text`` the row as compact JSON of
    its columns as text, the person token masked. A file that is not Parquet, truncated, or with
    a page that does not decode (or fails its page checksum, when the writer stored one) is a
    :class:`FileFault`: nothing of it is landed.
    """
    import pyarrow as pa  # imported here: only a source with this layout needs it
    import pyarrow.parquet as pq

    path = item.path
    data = read_file_bytes(path)
    if not data:
        raise FileFault(f"{path}: the file is empty")
    try:
        table = pq.read_table(pa.BufferReader(data), page_checksum_verification=True)
        del data
        header = list(table.column_names)
        if len(set(header)) != len(header):
            twice = sorted({h for h in header if header.count(h) > 1})
            raise FileFault(f"{path}: the file's schema has the column(s) {twice} more than once")
        frame = pl.from_arrow(table, rechunk=False)
    except (pa.ArrowException, OSError, ValueError, TypeError, pl.exceptions.PolarsError) as exc:
        raise _parquet_fault(path, exc) from None
    del table
    assert isinstance(frame, pl.DataFrame)
    wanted = dict(source.columns)
    required = {f: c for f, c in wanted.items() if f in STANDARD_REQUIRED}
    fault = _header_fault(path, header, required, None)
    if fault:
        raise FileFault(fault)
    extra = [h for h in header if h not in wanted.values()]
    if extra:
        item.notes.append(f"columns not in the layout, ignored: {', '.join(extra)}")
    if not frame.height:
        raise FileFault(f"{path}: the file has a schema but no rows")
    text = (
        _as_text(path, frame)
        .with_row_index("line_no", offset=1)
        .with_columns(pl.col("line_no").cast(pl.Int64))
    )
    del frame
    sample = pl.concat([
        text.with_row_index("row").filter(identifiers.sampled_mask(pl.col("row").cast(pl.Int64)))
        .select(pl.col("line_no").alias("line"), pl.lit(i, dtype=pl.Int64).alias("position"), pl.col(c).alias("value"))
        for i, c in enumerate(header)
    ]).sort("line", "position", maintain_order=True).filter(pl.col("value") != "")  # fmt: skip
    births = [c for f, c in wanted.items() if f == "birth_year"]
    findings = identifiers.screen_values(header, sample, births, places)
    flagged = _apply_screen(source, item, path, findings, {c: f for f, c in wanted.items()})
    token = pl.col(wanted["person_token"]).str.strip_chars(PY_WHITESPACE)

    def masked(
        col: str,
    ) -> pl.Expr:  # str.replace of the token in every value, as in a line of text
        value = pl.col(col)
        return (
            pl.when(token != "")
            .then(value.str.split(token).list.join(_MASK))
            .otherwise(value)
            .alias(col)
        )

    rows = text.select(
        "line_no",
        pl.struct([masked(c) for c in header]).struct.json_encode().alias("raw_text"),
        pl.lit(None, dtype=pl.String).alias("row_fault"),
        *(pl.col(c).alias(f) for f, c in wanted.items() if c in header),
    )
    rows = rows.with_columns(
        pl.lit(None, dtype=pl.String).alias(f) for f in STANDARD_FIELDS if f not in rows.columns
    )
    return _to_landed(_quarantine(rows, flagged), source, item)


# --------------------------------------------------------------------------- FHIR NDJSON


class _Malformed(ValueError):
    """A FHIR field of the wrong JSON type."""


def _obj(parent: dict, key: str) -> dict:
    value = parent.get(key)
    if value is None:
        return {}
    if not isinstance(value, dict):
        raise _Malformed(f"{key} is not a JSON object")
    return value


def _objects(parent: dict, key: str) -> list[dict]:
    value = parent.get(key)
    if value is None:
        return []
    if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
        raise _Malformed(f"{key} is not a list of JSON objects")
    return value


def _text(parent: dict, key: str) -> str | None:
    value = parent.get(key)
    if value is None:
        return None
    if not isinstance(value, str):
        raise _Malformed(f"{key} is not text")
    return value


def _ndjson_lines(text: str) -> list[str]:
    """Records of an NDJSON text: split at line feeds only (JSON strings may hold U+2028)."""
    return [line.removesuffix("\r") for line in text.split("\n")]


def _read_patients(
    path: Path, source: SourceConfig, item: InboxFile, settings: Settings
) -> dict[str, dict]:
    patients: dict[str, dict] = {}
    if not path.is_file():
        raise FileFault(
            f"{path}: Patient.ndjson is missing beside {path.parent / 'Observation.ndjson'}"
        )
    text = _decode(path, read_file_bytes(path), "utf-8")
    sample: list[tuple[int, dict]] = []
    ids_by_line: dict[int, str] = {}
    system = source.fhir.linkage_identifier_system
    for line_no, line in enumerate(_ndjson_lines(text), start=1):
        if not line.strip():
            continue
        try:
            res = json.loads(line)
        except json.JSONDecodeError as exc:
            raise FileFault(f"{path}: line {line_no}: not valid JSON ({exc.msg})") from None
        if (
            not isinstance(res, dict)
            or res.get("resourceType") != "Patient"
            or not isinstance(res.get("id"), str)
        ):
            raise FileFault(f"{path}: line {line_no}: expected a Patient resource with an id")
        if identifiers.sampled(len(patients)):
            sample.append((line_no, res))
        ids_by_line[line_no] = res["id"]
        try:
            token, domain = None, source.id
            for ident in _objects(res, "identifier"):
                value = _text(ident, "value")
                if system and _text(ident, "system") == system and value:
                    token, domain = (
                        value,
                        SHARED_DOMAIN if source.linkage == "shared" else source.id,
                    )
                    break
            addresses = _objects(res, "address")
            patients[res["id"]] = {
                "person_token": token if token is not None else f"Patient/{res['id']}",
                "linkage_domain": domain,
                "birth_year_text": (_text(res, "birthDate") or "")[:4],
                "sex_text": _text(res, "gender") or "",
                "district_name": (_text(addresses[0], "district") if addresses else None) or "",
            }
        except _Malformed as exc:
            raise FileFault(f"{path}: line {line_no}: Patient {res['id']}: {exc}") from None
    flagged = _apply_screen(
        source,
        item,
        path,
        identifiers.screen_resources("Patient", sample, district_places(settings)),
    )
    # a Patient with a value that looks like an identifier: every Observation of it is
    # quarantined with the reason (the Patient records themselves are never stored)
    for f in flagged:
        for line in f.lines:
            patients[ids_by_line[line]].setdefault("quarantine", identifiers.quarantine_reason(f))
    return patients


def _observation_fields(res: dict) -> dict[str, str | None]:
    """The standard fields of one Observation; ``_Malformed`` when a field has the wrong type."""
    loinc = next(
        (
            _text(c, "code")
            for c in _objects(_obj(res, "code"), "coding")
            if _text(c, "system") == "http://loinc.org"
        ),
        None,
    )
    fields: dict[str, str | None] = {"test_code": loinc, "test_code_text": loinc}
    quantity = res.get("valueQuantity")
    if quantity is not None:
        quantity = _obj(res, "valueQuantity")
        number = quantity.get("value")
        if number is not None and (isinstance(number, bool) or not isinstance(number, int | float)):
            raise _Malformed("valueQuantity.value is not a number")
        text = f"{_text(quantity, 'comparator') or ''}{number if number is not None else ''}"
        fields.update(value_text=text, value_clean=text,
                      unit_text=_text(quantity, "code") or _text(quantity, "unit"))  # fmt: skip
    else:
        fields.update(value_text=_text(res, "valueString"), value_clean=_text(res, "valueString"))
    status = _text(res, "status")
    specimen = _text(_obj(res, "specimen"), "reference") or ""
    fields.update(
        status=(status or "").lower(),
        status_text=status,
        specimen_id=specimen.rsplit("/", 1)[-1] or None,
        collected_text=_text(res, "effectiveDateTime"),
        reported_text=_text(res, "issued"),
    )
    return fields


_FHIR_FIELDS = (
    "line_no", "raw_text", "row_fault", "linkage_domain", "person_token", "birth_year_text",
    "sex_text", "district_code", "specimen_id", "collected_text", "test_code", "test_code_text",
    "value_text", "value_clean", "unit_text", "status", "status_text", "height_text",
    "reported_text", "fasting_text",
)  # fmt: skip


def read_fhir_export(source: SourceConfig, item: InboxFile, settings: Settings) -> pl.DataFrame:
    """Read one bulk-export folder (Observation.ndjson with its Patient.ndjson)."""
    path = item.path
    patients = _read_patients(path.parent / "Patient.ndjson", source, item, settings)
    by_name = {name.casefold(): code for code, name in settings.districts.items()}
    text = _decode(path, read_file_bytes(path), "utf-8")
    rows: dict[str, list] = {f: [] for f in _FHIR_FIELDS}
    sample: list[tuple[int, object]] = []
    for line_no, line in enumerate(_ndjson_lines(text), start=1):
        if not line.strip():
            continue
        rec: dict = {f: None for f in _FHIR_FIELDS}
        rec["line_no"] = line_no
        try:
            res = json.loads(line)
            if identifiers.sampled(len(rows["line_no"])):
                sample.append((line_no, res))
            if not isinstance(res, dict) or res.get("resourceType") != "Observation":
                raise _Malformed("not an Observation resource")
            subject = _text(_obj(res, "subject"), "reference") or ""
            rec.update(_observation_fields(res))
        except (json.JSONDecodeError, _Malformed) as exc:
            rec["row_fault"] = f"malformed_record:{getattr(exc, 'msg', str(exc))}"
            # not readable as an Observation: which part is what is not certain, no text kept
            rec["raw_text"] = (
                f"[text withheld: a record of {len(line)} characters that is not a readable Observation]"
            )
            for f, v in rec.items():
                rows[f].append(v)
            continue
        patient = patients.get(subject.removeprefix("Patient/"))
        if patient is not None and "quarantine" in patient:
            rec["row_fault"] = patient["quarantine"]
            rec["raw_text"] = (
                "[text withheld: the identifier screen flagged a field of its Patient]"
            )
            rec["person_token"] = patient["person_token"]
            rec["linkage_domain"] = patient["linkage_domain"]
            for f, v in rec.items():
                rows[f].append(v)
            continue
        if patient is not None:
            rec.update({k: v for k, v in patient.items() if k != "district_name"})
            name = patient["district_name"]
            rec["district_code"] = by_name.get(name.casefold(), name)
        elif subject:
            rec["row_fault"] = f"unknown_patient:{subject} is not in Patient.ndjson"
        rec["raw_text"] = _PATIENT_REF.sub(_MASK, line)
        if patient is not None and patient["person_token"] in rec["raw_text"]:
            rec["raw_text"] = rec["raw_text"].replace(patient["person_token"], _MASK)
        for f, v in rec.items():
            rows[f].append(v)
    if not rows["line_no"]:
        raise FileFault(f"{path}: no Observation records")
    flagged = _apply_screen(
        source,
        item,
        path,
        identifiers.screen_resources("Observation", sample, district_places(settings)),
    )
    frame = pl.DataFrame(
        rows, schema={f: pl.Int64 if f == "line_no" else pl.String for f in _FHIR_FIELDS}
    )
    frame = _quarantine(frame, flagged)
    return frame.with_columns(
        pl.lit(source.id).alias("source_id"), pl.lit(item.file_id, dtype=pl.Int64).alias("file_id")
    ).select(LANDED_COLUMNS)


# --------------------------------------------------------------------------- dates


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


#: A date in ISO 8601 as the standard layout sends it: a calendar date, optionally a time.
_ISO_DATE = (
    r"\d{4}-\d{2}-\d{2}(?:[T ]\d{2}:\d{2}(?::\d{2}(?:[.,]\d+)?)?(?:Z|[+-]\d{2}(?::?\d{2})?)?)?"
)
_STRFTIME_PARTS = {"Y": r"\d{4}", "m": r"\d{2}", "d": r"\d{2}", "H": r"\d{2}", "M": r"\d{2}", "S": r"\d{2}",
                   "y": r"\d{2}", "f": r"\d{1,9}", "b": r"[A-Za-z]{3}", "B": r"[A-Za-z]{3,9}",
                   "z": r"[+-]\d{4}", "%": "%"}  # fmt: skip


def date_shape(date_format: str | None) -> str:
    """The regular expression a date text must match in full: ISO 8601 when no format is set,
    else the configured strftime format with each part at its full width (``%d`` two digits),
    so that trailing text and unpadded dates are refused rather than read leniently.
    """
    if date_format is None:
        return _ISO_DATE
    out, i = [], 0
    while i < len(date_format):
        ch = date_format[i]
        if ch == "%" and i + 1 < len(date_format):
            out.append(_STRFTIME_PARTS.get(date_format[i + 1], re.escape("%" + date_format[i + 1])))
            i += 2
        else:
            out.append(re.escape(ch))
            i += 1
    return "".join(out)


#: C0 and C1 control characters other than tab, line feed and carriage return (which a quoted
#: field may hold): a value carrying one is rejected, never stored.
CONTROL = r"[\x00-\x08\x0B\x0C\x0E-\x1F\x7F-\x9F]"
#: The landed text fields checked for control characters, with the name used in messages.
_CHECKED_FIELDS = {
    "person_token": "person_token", "birth_year_text": "birth_year", "sex_text": "sex",
    "district_code": "district_code", "specimen_id": "specimen_id", "collected_text": "collected_date",
    "test_code_text": "test_code", "value_text": "value", "unit_text": "unit", "status_text": "status",
    "height_text": "height_cm", "reported_text": "reported_at", "fasting_text": "fasting",
}  # fmt: skip


def reject_control_characters(frame: pl.DataFrame) -> pl.DataFrame:
    """Reject a row with a control character in any field (``control_character``), naming
    the field, not the value; in the kept raw text each such character becomes U+FFFD.
    """
    fault = pl.lit(None, dtype=pl.String)
    for col, name in reversed(_CHECKED_FIELDS.items()):
        fault = (
            pl.when(pl.col(col).str.contains(CONTROL))
            .then(pl.lit(f"control_character:field {name!r} holds a control character"))
            .otherwise(fault)
        )
    return frame.with_columns(
        pl.coalesce(pl.col("row_fault"), fault).alias("row_fault"),
        pl.col("raw_text").str.replace_all(CONTROL, "\ufffd"),
    )


def undated_report_date(run_period: str, fallback: dt.date) -> dt.date:
    """The report date of a row without one, in a file without a month in its name: the last day
    of the period of the run that first ingests the file (never the day it happened to be
    loaded, which is after the period end and would hide the rows from their month);
    ``fallback`` only when ``run_period`` is not a month (``sources check`` without a period).
    """
    match = re.fullmatch(r"(\d{4})-(0[1-9]|1[0-2])", run_period or "")
    if not match:
        return fallback
    year, month = int(match.group(1)), int(match.group(2))
    return dt.date(year, month, calendar.monthrange(year, month)[1])


def add_dates(frame: pl.DataFrame, source: SourceConfig, item: InboxFile, undated_on: dt.date,
              run_day: dt.date | None = None) -> pl.DataFrame:  # fmt: skip
    """Parse the collection and report dates; keep the text as reported beside them.

    A row without a report date is known at the end of its extract's month: the month in the
    file name (basis ``file_name``), else ``undated_on``, the end of the period of the run that
    first ingests the file (basis ``run_period``; :func:`undated_report_date`); a row collected
    after that month, at the end of its own collection month (basis ``collected_month``).

    A date must match the source's format in full (:func:`date_shape`). A report date given
    but not readable rejects the row (``invalid_report_date``) instead of falling back to the
    extract's month; a collection date after ``run_day`` (the day of the run, today if not
    given) rejects it (``collected_after_run``) whatever its report date says.
    """
    run_day = run_day or dt.date.today()
    fmt = source.date_format or "%Y-%m-%d"
    shape = date_shape(source.date_format)

    def parse(col: str) -> pl.Expr:
        text = pl.col(col).str.strip_chars()
        whole = text.str.contains(rf"^(?:{shape})$")
        if source.date_format is None:
            text = text.str.slice(0, 10)
        return pl.when(whole).then(text.str.strptime(pl.Date, fmt, strict=False))

    from_name = _month_end_from_name(item.rel_path)
    extract_date = from_name or undated_on
    basis_extract = "file_name" if from_name else "run_period"
    collected = parse("collected_text")
    # a row collected after its extract's month (a history sent as one file) cannot have been
    # known before its own collection month ended: never date it before it was collected
    collected_month_end = collected.dt.month_end()
    later = collected_month_end > pl.lit(extract_date)
    reported_given = pl.col("reported_text").str.strip_chars().fill_null("") != ""
    out = frame.with_columns(
        collected.alias("collected_date"),
        pl.coalesce(
            parse("reported_text"),
            pl.when(later).then(collected_month_end).otherwise(pl.lit(extract_date)),
        ).alias("reported_date"),
        pl.when(parse("reported_text").is_not_null())
        .then(pl.lit("reported"))
        .when(later)
        .then(pl.lit("collected_month"))
        .otherwise(pl.lit(basis_extract))
        .alias("reported_date_basis"),
    )
    fault = (
        pl.when(reported_given & parse("reported_text").is_null())
        .then(pl.format("invalid_report_date:report date \"{}\" is not a date in the format {}",
                        pl.col("reported_text"), pl.lit(source.date_format or "YYYY-MM-DD")))
        .when(pl.col("collected_date") > pl.lit(run_day))
        .then(pl.format("collected_after_run:collected {}, after the day of this run ({})",
                        pl.col("collected_date").dt.strftime("%Y-%m-%d"), pl.lit(run_day.isoformat())))
    )  # fmt: skip
    return out.with_columns(pl.coalesce(pl.col("row_fault"), fault).alias("row_fault"))


def district_places(settings: Settings) -> tuple[str, ...]:
    """The region's district names and codes: two capitalised words there are a place, not a
    person (the identifier screen leaves them alone).
    """
    return (*settings.districts.values(), *settings.districts.keys())


def read_inbox_file(source: SourceConfig, item: InboxFile, settings: Settings, undated_on: dt.date,
                    run_day: dt.date | None = None) -> pl.DataFrame:  # fmt: skip
    """Landed rows of one file, dates parsed, the person token still present; ``undated_on`` is
    the report date of rows without one in a file without a month in its name, ``run_day`` the
    day of the run (a collection date after it is rejected; today if not given).
    """
    if source.layout == "fhir_ndjson":
        frame = read_fhir_export(source, item, settings)
    elif source.layout == "parquet":
        frame = read_parquet(source, item, district_places(settings))
    else:
        frame = read_delimited(source, item, places=district_places(settings))
    return add_dates(
        reject_control_characters(frame.select(LANDED_COLUMNS)), source, item, undated_on, run_day
    )


def land_inbox(
    con: duckdb.DuckDBPyConnection,
    settings: Settings,
    inbox: Path,
    key: PseudonymKey,
    run_period: str,
    ingested_on: dt.date,
    items: list[InboxFile] | None = None,
    *,
    sink: Callable[[duckdb.DuckDBPyConnection, pl.DataFrame], None],
) -> IngestSummary:
    """Read every new file, hand its keyed rows to ``sink`` and record it in ``ingest_files``.

    Person tokens are re-keyed before the rows reach DuckDB, each distinct token once per run.
    Each file's rows go to ``sink`` (``pipeline.stages.validate.judge_file`` in a run) as soon as it is
    read, so only one file is held in memory; the temporary table ``landed_files`` names the
    files of this run that gave rows. ``items`` replaces the inbox scan (``sources check``
    reads one given file).
    """
    summary = IngestSummary()
    undated_on = undated_report_date(run_period, ingested_on)
    if items is None:
        items = scan_inbox(con, settings, inbox)
    next_id = con.execute("select coalesce(max(file_id), 0) + 1 from ingest_files").fetchall()[0][0]
    con.execute("create or replace temp table landed_files (file_id bigint)")
    keys = PersonKeyCache(key)
    for item in items:
        if item.status == "already_ingested":
            summary.files_skipped += 1
            continue
        item.allowed_identifiers.clear()
        source = settings.source(item.source_id)
        item.file_id = next_id
        next_id += 1
        # a file held back earlier is tried again: its old ledger row (no rows stored) goes
        con.execute(
            "delete from ingest_files where source_id = ? and file_path = ? and sha256 = ? "
            "and status = 'held_back'",
            [item.source_id, item.rel_path, item.sha256],
        )
        version = con.execute(
            "select count(distinct sha256) + 1 from ingest_files where source_id = ? and file_path = ?",
            [item.source_id, item.rel_path],
        ).fetchall()[0][0]
        status, message, rows_read = "ingested", None, 0
        original = con.execute(
            "select rows_read from ingest_files where source_id = ? and sha256 = ? "
            "and status = 'ingested' order by file_id limit 1",
            [item.source_id, item.sha256],
        ).fetchall() if item.status == "duplicate_file" else []  # fmt: skip
        if item.status in ("unreadable", "held_back"):  # held_back: the source's config changed
            status, message = "held_back", item.fault
            summary.files_held_back += 1
            summary.held_back.append((item.rel_path, item.fault or ""))
        elif original:
            status = "duplicate_file"
            message = (
                f"same content as {item.same_as}, already ingested; every row counted as duplicate"
            )
            rows_read = original[0][0]
            summary.files_skipped += 1
        else:  # new, or a copy of a file that was not ingested (held back): read it
            try:
                frame = read_inbox_file(source, item, settings, undated_on, ingested_on)
            except FileFault as fault:
                status, message = "held_back", item.safe(str(fault))
                summary.files_held_back += 1
                summary.held_back.append((item.rel_path, message))
            else:
                rows_read = frame.height
                keyed = add_person_keys(frame, key, keys)
                del frame
                if keyed.schema != _LANDED_SCHEMA:
                    raise AssertionError(
                        f"landed columns {dict(keyed.schema)} differ from {dict(_LANDED_SCHEMA)}"
                    )
                sink(con, keyed)
                del keyed
                if rows_read:
                    con.execute("insert into landed_files values (?)", [item.file_id])
                summary.files_new += 1
                summary.rows_landed += rows_read
                if item.notes:
                    message = "; ".join(item.notes)
                if item.allowed_identifiers:
                    note = identifiers.allowance_note(item.allowed_identifiers)
                    message = f"{message}; {note}" if message else note
                    summary.allowed_identifiers.extend(
                        (item.rel_path, f.column, f.pattern, f.allowed_reason or "")
                        for f in item.allowed_identifiers
                    )
        con.execute(
            "insert into ingest_files (file_id, source_id, file_path, version, sha256, size_bytes, "
            "status, message, rows_read, rows_duplicate, run_period, extract_month, ingested_at, config_sha256) "
            "values (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, current_timestamp, ?)",
            [item.file_id, item.source_id, item.rel_path, version, item.sha256, item.size_bytes,
             status, message, rows_read, rows_read if status == "duplicate_file" else 0, run_period,
             extract_month(item.rel_path, run_period), source_config_sha256(settings, item.source_id)],
        )  # fmt: skip
    return summary
