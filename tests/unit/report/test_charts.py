"""Tests for pipeline.report.charts: a chart is the same bytes every time it is drawn.

The report is byte-identical for the same warehouse (DEVELOPERS.md, Principles); matplotlib's SVG
is made so by a fixed hash salt, no date or creator in the metadata and text kept as text
(matplotlib documentation, "svg.hashsalt" and savefig's ``metadata``). The values below are
invented.
"""

from __future__ import annotations

import subprocess
import sys

from pipeline.report.charts import _Bar, _bar_chart, _line_chart, _Reference

DRAW = """
from pipeline.report.charts import _Bar, _bar_chart, _Reference
print(_bar_chart("chart-test", "Share by district", "Bars of invented shares.",
                 ["North", "South", "East"],
                 [("share", [_Bar(12.5, 10.0, 15.0), _Bar(None), _Bar(8.25)])],
                 "Share (%)", " %", lambda v: f"{v:.1f}", [_Reference(10.0, "all 10.0 %")]), end="")
"""


def bars() -> str:
    return _bar_chart(
        "chart-test",
        "Share by district",
        "Bars of invented shares.",
        ["North", "South", "East"],
        [("share", [_Bar(12.5, 10.0, 15.0), _Bar(None), _Bar(8.25)])],
        "Share (%)",
        " %",
        lambda v: f"{v:.1f}",
        [_Reference(10.0, "all 10.0 %")],
    )


def lines() -> str:
    return _line_chart(
        "chart-line",
        "Two labs by month",
        "Lines of invented differences.",
        ["2026-08", "2026-09", "2026-10"],
        [
            ("lab_a", [1.5, None, -0.5], None),
            ("lab_b", [0.2, 0.4, 0.1], [(0, 1), (0.1, 0.7), None]),
        ],
        "Difference",
        "Month",
        "",
        lambda v: f"{v:.2f}",
        zero_line=True,
    )


def test_a_bar_chart_drawn_twice_is_byte_identical():
    first, second = bars(), bars()
    assert first == second
    assert first.startswith('<svg class="chart" id="chart-test" role="img"')
    assert "<dc:date>" not in first and "<dc:creator>" not in first and "<metadata>" not in first


def test_a_line_chart_drawn_twice_is_byte_identical():
    assert lines() == lines()


def test_a_chart_is_the_same_in_a_fresh_interpreter():
    """No state of this process (earlier figures, Python's salted string hash) reaches the SVG."""
    other = subprocess.run(
        [sys.executable, "-c", DRAW],
        capture_output=True,
        text=True,
        check=True,
        env={"PYTHONHASHSEED": "12345", "PATH": ""},
    )
    assert other.stdout == bars()


def test_ids_are_prefixed_with_the_chart_id():
    svg = bars()
    assert 'id="chart-test-bar-0-0"' in svg  # a drawn bar: category 0, series 0
    assert 'id="chart-test-bar-1-0"' not in svg  # a blanked value has a note, not a bar
    assert "suppressed" in svg
