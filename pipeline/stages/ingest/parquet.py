"""Parquet (layout ``parquet``): one file's rows, every column as text, mapped by ``columns``."""

from __future__ import annotations

import re
from pathlib import Path

import polars as pl

from pipeline.core import identifiers
from pipeline.core.settings import STANDARD_FIELDS, STANDARD_REQUIRED, SourceConfig
from pipeline.stages.ingest.inbox import FileFault, InboxFile, read_file_bytes
from pipeline.stages.ingest.rows import (
    _MASK,
    MIN_TOKEN_MASKED_IN_VALUES,
    PY_WHITESPACE,
    _apply_screen,
    _header_fault,
    _quarantine,
    _to_landed,
)


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

    def value(field: str, col: str) -> pl.Expr:
        # as the delimited readers: a token long enough to identify is masked in the other
        # fields' values too (a specimen id or a value that holds it)
        if field == "person_token":
            return pl.col(col).alias(field)
        long = token.str.len_chars() >= MIN_TOKEN_MASKED_IN_VALUES
        return (
            pl.when(long)
            .then(pl.col(col).str.split(token).list.join(_MASK))
            .otherwise(pl.col(col))
            .alias(field)
        )

    rows = text.select(
        "line_no",
        pl.struct([masked(c) for c in header]).struct.json_encode().alias("raw_text"),
        pl.lit(None, dtype=pl.String).alias("row_fault"),
        *(value(f, c) for f, c in wanted.items() if c in header),
    )
    rows = rows.with_columns(
        pl.lit(None, dtype=pl.String).alias(f) for f in STANDARD_FIELDS if f not in rows.columns
    )
    return _to_landed(_quarantine(rows, flagged), source, item)
