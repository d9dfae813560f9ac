"""What every reader shares: the header check, the identifier screen and the quarantine of
flagged rows, control characters, and the landed columns a reader's rows end in.
"""

from __future__ import annotations

import difflib
import re
from collections.abc import Iterable
from pathlib import Path

import polars as pl

from pipeline.core import identifiers
from pipeline.core.pseudonymise import SHARED_DOMAIN
from pipeline.core.settings import STANDARD_FIELDS, Settings, SourceConfig
from pipeline.stages.ingest.inbox import FileFault, InboxFile

_MASK = "[person]"

#: A person token this long or longer is masked wherever it occurs inside another field's value
#: (a result value, unit or specimen id that holds the token), by every reader. A shorter one is
#: not: it would sit by chance inside real values ("1" in "1.0") and change them, while it
#: identifies no one alone. The raw text of a row is masked at any token length.
MIN_TOKEN_MASKED_IN_VALUES = 6


def mask_in_value(value: str | None, tokens: Iterable[str]) -> str | None:
    """``value`` with every occurrence of each token of ``tokens`` at least
    :data:`MIN_TOKEN_MASKED_IN_VALUES` long replaced by the mask, in one pass (longest token
    first, and a mask already written is not searched again).
    """
    if not value:
        return value
    kept = sorted({t for t in tokens if t and len(t) >= MIN_TOKEN_MASKED_IN_VALUES}, key=len,
                  reverse=True)  # fmt: skip
    if not kept or not any(t in value for t in kept):
        return value
    return re.sub("|".join(re.escape(t) for t in kept), lambda _: _MASK, value)


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
#: path judges it (tests/unit/stages/ingest/test_rows.py checks the set against ``str.isspace``).
PY_WHITESPACE = (
    "\t\n\x0b\x0c\r\x1c\x1d\x1e\x1f \x85\xa0\u1680\u2000\u2001\u2002\u2003\u2004\u2005\u2006"
    "\u2007\u2008\u2009\u200a\u2028\u2029\u202f\u205f\u3000"
)


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


def district_places(settings: Settings) -> tuple[str, ...]:
    """The region's district names and codes: two capitalised words there are a place, not a
    person (the identifier screen leaves them alone).
    """
    return (*settings.districts.values(), *settings.districts.keys())
