"""The SQL files of sql/: one file per relation, found by name in any layer folder."""

from __future__ import annotations

import re
from pathlib import Path

SQL_DIR = Path(__file__).resolve().parents[2] / "sql"


_NAME = re.compile(r"^[a-z][a-z0-9_]{0,62}$")


def checked_name(name: str, qualified: bool = False) -> str:
    """``name`` itself, once it is a plain identifier (``_NAME``; with ``qualified``, also
    ``schema.table``); the only way a schema, table or column name is put into SQL text
    (DEVELOPERS.md, "SQL text and values").
    """
    parts = name.split(".", 1) if qualified and isinstance(name, str) else [name]
    if not all(isinstance(p, str) and _NAME.match(p) for p in parts):
        raise ValueError(f"not a plain name: {name!r}")
    return name


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
