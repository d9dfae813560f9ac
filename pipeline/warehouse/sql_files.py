"""The SQL files of sql/: one file per relation, found by name in any layer folder."""

from __future__ import annotations

import re
from pathlib import Path

SQL_DIR = Path(__file__).resolve().parents[2] / "sql"


#: A plain lower-case identifier; ``\Z``, not ``$``: ``$`` also matches before a final newline.
_NAME = re.compile(r"^[a-z][a-z0-9_]{0,62}\Z")


def sql_path(name: str) -> Path:
    """The file of a table in sql/ (any layer)."""
    if not _NAME.match(name):
        raise ValueError(f"not a plain table name: {name!r}")
    matches = sorted(SQL_DIR.glob(f"*/{name}.sql"))
    if len(matches) != 1:
        raise FileNotFoundError(f"expected one sql/*/{name}.sql, found {len(matches)}")
    return matches[0]


def read_sql(name: str) -> str:
    return sql_path(name).read_text(encoding="utf-8")


def checked_name(name: str, qualified: bool = True) -> str:
    """``name`` unchanged when it is a plain relation or column name (``schema.table`` allowed
    unless ``qualified`` is false): the one way a name enters SQL text by formatting
    (DEVELOPERS.md, "SQL text and values"). Values never do: they are bound parameters.
    """
    parts = name.split(".") if isinstance(name, str) else [name]
    if len(parts) > (2 if qualified else 1) or not all(
        isinstance(p, str) and _NAME.match(p) for p in parts
    ):
        raise ValueError(f"not a plain relation name: {name!r}")
    return name
