"""Delimited text (layouts ``standard`` and ``mapped``): a file without quotes is split in bulk
(polars), any other goes through the csv module; both give the same rows.
"""

from __future__ import annotations

import csv
import io
import re
from pathlib import Path

import polars as pl

from pipeline.core import identifiers
from pipeline.core.settings import STANDARD_FIELDS, STANDARD_REQUIRED, SourceConfig
from pipeline.stages.ingest.inbox import FileFault, InboxFile, _decode, read_file_bytes
from pipeline.stages.ingest.rows import (
    _MASK,
    MIN_TOKEN_MASKED_IN_VALUES,
    PY_WHITESPACE,
    _apply_screen,
    _header_fault,
    _quarantine,
    _to_landed,
)

CHUNK_ROWS = 200_000


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
        # the token is masked in the other fields' values too: a value, unit or specimen id that
        # holds it would otherwise be kept, or quoted in a rejection's message
        token = row[token_idx].strip()
        mask = len(token) >= MIN_TOKEN_MASKED_IN_VALUES
        for f, i in index.items():
            columns[f].append(row[i].replace(token, _MASK) if mask and i != token_idx else row[i])
        if len(columns["line_no"]) >= CHUNK_ROWS:
            flush()
    flush()
    return (pl.concat(chunks) if chunks else pl.DataFrame(schema=schema)), sample


def _rows_in_bulk(text: str, delimiter: str, n_fields: int,
                  index: dict[str, int]) -> tuple[pl.DataFrame, pl.DataFrame] | None:  # fmt: skip
    """The same rows as :func:`_rows_by_csv`, for a file :func:`fast_path_applies` to: the
    lines split in polars, :data:`BULK_SLICE_LINES` lines a pass. Returns the rows and the
    identifier screen's sample (line, field position, value: the fields as read, before any
    padding), or None for a file with a line over the csv module's field limit (left to the
    csv module, which names the line).
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
    numbered = (
        lines.with_row_index("line_no", offset=1)
        .slice(1)  # the header
        .with_columns(pl.col("line_no").cast(pl.Int64))
    )
    del lines
    parts, samples, seen = [], [], 0
    for start in range(0, max(numbered.height, 1), BULK_SLICE_LINES):
        rows, sample = _bulk_slice(
            numbered.slice(start, BULK_SLICE_LINES), delimiter, n_fields, index, seen
        )
        parts.append(rows)
        samples.append(sample)
        seen += rows.height
    return pl.concat(parts), pl.concat(samples)


#: Lines the bulk reader splits per pass. A whole file at once held about seven times the file's
#: size in intermediate columns (a 41 MB file of 500k rows peaked 600 MB above the rows it gave,
#: beside the run's other file read ahead and DuckDB's buffer); passes of this many lines keep
#: that to a slice's share, and the rows are the same (tests/unit/stages/ingest).
BULK_SLICE_LINES = 100_000


def _bulk_slice(lines: pl.DataFrame, delimiter: str, n_fields: int, index: dict[str, int],
                seen: int) -> tuple[pl.DataFrame, pl.DataFrame]:  # fmt: skip
    """:func:`_rows_in_bulk` for one slice of its numbered lines; ``seen``: the rows (lines that
    are not blank) of the slices before it, so that the identifier screen samples the same rows
    as in one pass.
    """
    fields = pl.col("fields")
    n = fields.list.len()
    frame = (
        lines.with_columns(pl.col("raw_text").str.split(delimiter).alias("fields"))
        # a blank line (nothing but white space) is not a row; its number is still counted
        .filter(~((n == 1) & (fields.list.first().str.strip_chars(PY_WHITESPACE) == "")))
    )
    sample = (
        frame.with_row_index("row", offset=seen)
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
    # the usual row (fields match the header, the token in no other field) is the line with the
    # token field masked: splitting every field at a pattern of its own row and writing the
    # rows withheld took most of this function (16 % of a run at 30M results), so that is done
    # only for the few rows that need it
    elsewhere = [
        field(i).str.contains(token, literal=True) for i in range(n_fields) if i != token_idx
    ]
    unusual = (n != n_fields) | ((token != "") & pl.any_horizontal(elsewhere or [pl.lit(False)]))
    frame = frame.with_columns(unusual.alias("_unusual"))
    fault = pl.format("wrong_field_count:{} fields, the header has {}", n, pl.lit(n_fields))
    values = [field(i).alias(f) for f, i in index.items()]
    # as in _rows_by_csv, the token is masked in the other fields' values too
    masked_values = [
        field(i).alias(f) if i == token_idx
        else pl.when(token.str.len_chars() >= MIN_TOKEN_MASKED_IN_VALUES)
        .then(field(i).str.split(token).list.join(_MASK)).otherwise(field(i)).alias(f)
        for f, i in index.items()
    ]  # fmt: skip
    usual = frame.filter(~pl.col("_unusual")).select(
        "line_no",
        pl.when(token != "").then(pl.concat_str(
            [pl.lit(_MASK) if i == token_idx else field(i) for i in range(n_fields)],
            separator=delimiter)).otherwise(pl.col("raw_text")).alias("raw_text"),
        pl.lit(None, dtype=pl.String).alias("row_fault"),
        *values,
    )  # fmt: skip
    other = frame.filter(pl.col("_unusual")).select(
        "line_no",
        # as withheld_text and _rejoin: a row whose fields do not match the header keeps no
        # text; any other keeps its fields with the token's every occurrence masked
        pl.when(n != n_fields).then(withheld).otherwise(masked).alias("raw_text"),
        pl.when(n != n_fields).then(fault)
        .otherwise(pl.lit(None, dtype=pl.String)).alias("row_fault"),
        *masked_values,
    )  # fmt: skip
    rows = pl.concat([usual, other]).sort("line_no") if other.height else usual
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
