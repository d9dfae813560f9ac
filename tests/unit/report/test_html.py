"""The report's HTML pieces: numbers as text, escaping, and a suppressed count shown as "s".

Outside facts: HTML special characters are escaped as character references (WHATWG HTML, "Escaping
a string"; Python's ``html.escape``); a suppressed small count is shown by a mark, never by a
number or a zero (common practice in official statistics).
"""

from __future__ import annotations

import html

import pytest

from pipeline.report.html import _count_cell, _dec, _e, _int, _pct


@pytest.mark.parametrize("text", ['<script>alert("x")</script>', "A & B", "it's", "plain"])
def test_text_is_escaped_as_html_escape_does(text):
    assert _e(text) == html.escape(text)


def test_numbers_as_text():
    assert _int(1234567) == "1,234,567"
    assert _pct(0.6512) == "65.1\u00a0%"  # a no-break space keeps the sign with its number
    assert _dec(2.5, 2) == "2.50"
    assert _dec(1500.0) == "1,500.0"


def test_a_blanked_count_is_shown_as_a_mark_not_a_number():
    row = {"persons": None, "suppression": "suppressed"}
    cell = _count_cell(row, "persons")
    assert (cell.text, cell.kind) == ("s", "s")


def test_an_empty_count_in_a_row_without_suppression_is_not_available():
    cell = _count_cell({"persons": None, "suppression": ""}, "persons")
    assert (cell.text, cell.kind) == ("–", "na")


def test_a_published_count_is_shown():
    cell = _count_cell({"persons": 42, "suppression": ""}, "persons")
    assert (cell.text, cell.kind) == ("42", "num")
