"""The landed rows' shared pieces: the white space a token is stripped of, and control characters.

Outside facts: Python's ``str.isspace`` (Python docs, "str.isspace": the characters of Unicode
bidirectional class WS, B or S, or general category Zs) is what the csv-module reader strips
with; the bulk reader must strip exactly the same set. C0 and C1 control characters are those of
Unicode general category Cc (Unicode Standard, chapter 23).
"""

from __future__ import annotations

import sys
import unicodedata

import polars as pl

from pipeline.stages.ingest.rows import CONTROL, PY_WHITESPACE


def test_the_stripped_white_space_is_exactly_what_str_isspace_accepts():
    assert set(PY_WHITESPACE) == {chr(c) for c in range(sys.maxunicode + 1) if chr(c).isspace()}


def test_the_control_pattern_matches_the_cc_category_except_tab_and_line_ends():
    """Cc characters other than tab, LF and CR (which delimited text uses) are refused."""
    cc = {chr(c) for c in range(0x100) if unicodedata.category(chr(c)) == "Cc"} - {"\t", "\n", "\r"}
    frame = pl.DataFrame({"c": [chr(c) for c in range(0x100)]})
    matched = set(frame.filter(pl.col("c").str.contains(CONTROL))["c"])
    assert matched == cc
