"""The report's charts, drawn by matplotlib and inlined as SVG (Agg, a fixed hash salt, no date
or creator, text as text), so two renders of one warehouse are byte-identical.
"""

from __future__ import annotations

import io
import math
import re
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

from pipeline.report.html import GRID, INK, MUTED, PALETTE, _e

#: Fixed settings so that the same data give the same SVG bytes (no date, no random ids, the
#: text kept as text in a font shipped with matplotlib).
_MPL_RC = {
    "svg.hashsalt": "kidneysurv-report",
    "svg.fonttype": "none",
    "font.family": "DejaVu Sans",
    "font.size": 9,
    "axes.edgecolor": "#59636e",
    "axes.labelcolor": "#1f2328",
    "xtick.color": "#59636e",
    "ytick.color": "#59636e",
    "text.color": "#1f2328",
    "path.simplify": False,
}


@contextmanager
def _mpl() -> Iterator[Any]:
    """matplotlib, imported here (the CLI does not pay for it at start), headless and fixed."""
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.figure import Figure

    with matplotlib.rc_context(_MPL_RC):
        yield Figure


def _svg_of(fig: Any, chart_id: str, klass: str, title: str, desc: str) -> str:
    """The figure as an inline <svg> element: ids prefixed with ``chart_id`` (several charts share
    one page), the size in CSS pixels, role="img" with the title and description for assistive
    technology. Deterministic: no date or creator in the metadata, fixed hash salt.
    """
    buf = io.StringIO()
    fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None})
    svg = buf.getvalue()
    svg = svg[svg.index("<svg") :]
    # inline in HTML: no namespace declarations (the HTML parser supplies them), no RDF metadata
    svg = re.sub(r"\s*<metadata>.*?</metadata>", "", svg, count=1, flags=re.S)
    # its page-wide "*{stroke-linejoin: round; ...}" sheet: in the page's own CSS, scoped to charts
    svg = re.sub(r"\s*<style[^>]*>.*?</style>", "", svg, count=1, flags=re.S)
    svg = re.sub(r' xmlns(:xlink)?="[^"]*"', "", svg)
    svg = svg.replace("xlink:href=", "href=")
    svg = re.sub(r' id="([^"]+)"', lambda m: f' id="{chart_id}-{m.group(1)}"', svg)
    svg = re.sub(r"url\(#([^)]+)\)", lambda m: f"url(#{chart_id}-{m.group(1)})", svg)
    svg = re.sub(r'href="#([^"]+)"', lambda m: f'href="#{chart_id}-{m.group(1)}"', svg)
    head_end = svg.index(">") + 1
    head = re.sub(r'(width|height)="([0-9.]+)pt"', r'\1="\2"', svg[:head_end])
    head = head.replace(
        "<svg ",
        f'<svg class="{klass}" id="{chart_id}" role="img" '
        f'aria-labelledby="{chart_id}-title {chart_id}-desc" ',
        1,
    )
    return (
        head
        + f'<title id="{chart_id}-title">{_e(title)}</title>'
        + f'<desc id="{chart_id}-desc">{_e(desc)}</desc>'
        + svg[head_end:].strip()
    )


#: Marker shape per series (colour is not the only cue); odd shapes are drawn dashed.
MARKERS = ("o", "s", "^", "D")


@dataclass
class _Bar:
    value: float | None
    low: float | None = None
    high: float | None = None
    note: str = "suppressed"  # shown instead of a bar when value is None


@dataclass
class _Reference:
    value: float
    label: str


def _bar_chart(chart_id: str, title: str, desc: str, categories: list[str], series: list[tuple[str, list[_Bar]]],
               axis_label: str, suffix: str, fmt: Callable[[float], str],
               references: Sequence[_Reference] = ()) -> str:  # fmt: skip
    """Horizontal bars, one band per category, one bar per series; error bars when given. Each
    drawn bar has the id ``<chart_id>-bar-<category>-<series>`` (a blanked value has a note, no bar).
    """
    band = 0.8 / max(1, len(series))
    height_in = (
        70 + (18 if len(series) > 1 else 0) + 26 * len(series) * max(1, len(categories))
    ) / 72 + 0.6
    highs = [
        b.high if b.high is not None else b.value
        for _, bars in series
        for b in bars
        if b.value is not None
    ]
    highs += [r.value for r in references]
    top = (max(highs, default=1.0) or 1.0) * 1.18
    with _mpl() as Figure:
        from matplotlib.patches import Patch

        fig = Figure(figsize=(10, height_in))
        ax = fig.add_axes((0.25, 0.9 * 50 / (height_in * 72), 0.68, 1 - (110 / (height_in * 72))))
        ax.set_title(title, loc="left", fontsize=11, fontweight="bold", pad=22 if references else 8)
        for j, (_, bars) in enumerate(series):
            colour = PALETTE[j % len(PALETTE)]
            for i, bar in enumerate(bars):
                y = i - 0.4 + band * (j + 0.5)
                if bar.value is None:
                    ax.text(top * 0.01, y, bar.note, va="center", fontstyle="italic", color=MUTED)
                    continue
                (rect,) = ax.barh([y], [bar.value], height=band * 0.85, color=colour)
                rect.set_gid(f"bar-{i}-{j}")
                end = bar.value
                if bar.low is not None and bar.high is not None:
                    eb = ax.errorbar([bar.value], [y], xerr=[[bar.value - bar.low], [bar.high - bar.value]],
                                fmt="none", ecolor=INK, elinewidth=1.2, capsize=3)  # fmt: skip
                    for part in eb.lines[2]:
                        part.set_gid(f"interval-{i}-{j}")
                    end = max(end, bar.high)
                ax.text(end + top * 0.01, y, f"{fmt(bar.value)}{suffix}", va="center")
        for k, ref in enumerate(references):
            ax.axvline(ref.value, color=INK, linewidth=1.2, linestyle=(0, (5, 3)))
            ax.text(ref.value, 1.01 + 0.05 * k, ref.label, transform=ax.get_xaxis_transform(),
                    ha="center", va="bottom", fontsize=8)  # fmt: skip
        ax.set_yticks(range(len(categories)), categories)
        ax.set_ylim(len(categories) - 0.5, -0.5)
        ax.set_xlim(0, top)
        ax.set_xlabel(axis_label, gid="x-axis-label")
        ax.grid(axis="x", color=GRID, linewidth=0.8)
        ax.set_axisbelow(True)
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)
        ax.tick_params(axis="y", length=0)
        if len(series) > 1:  # keys drawn whether or not a series has a bar
            keys = [
                Patch(facecolor=PALETTE[j % len(PALETTE)], label=name)
                for j, (name, _) in enumerate(series)
            ]
            fig.legend(
                handles=keys, loc="upper right", ncols=len(series), frameon=False, fontsize=8
            )
        return _svg_of(fig, chart_id, "chart", title, desc)


def _line_chart(chart_id: str, title: str, desc: str, x_labels: list[str],
                series: list[tuple[str, list[float | None], list[tuple[float, float] | None] | None]],
                axis_label: str, x_axis_label: str, suffix: str, fmt: Callable[[float], str],
                y_range: tuple[float, float] | None = None, zero_line: bool = False,
                height: int = 280, styles: Sequence[tuple[str, int]] | None = None) -> str:  # fmt: skip
    """Lines over categories on the x axis (months), a gap where a value is missing; a shaded
    band where an interval is given. ``styles``: (colour, marker shape) per series (default: by
    position).
    """
    n = len(x_labels)
    xs = list(range(n))
    with _mpl() as Figure:
        fig = Figure(figsize=(10, height / 72))
        ax = fig.add_axes((0.1, 0.2, 0.86, 0.66 if len(series) > 1 else 0.7))
        ax.set_title(
            title, loc="left", fontsize=11, fontweight="bold", pad=22 if len(series) > 1 else 8
        )
        for j, (name, vs, intervals) in enumerate(series):
            colour, shape = styles[j] if styles else (PALETTE[j % len(PALETTE)], j)
            if intervals:
                lows = [math.nan if p is None else p[0] for p in intervals]
                highs = [math.nan if p is None else p[1] for p in intervals]
                ax.fill_between(xs, lows, highs, color=colour, alpha=0.18, linewidth=0)
                for i, pair in enumerate(intervals):
                    alone = (
                        pair
                        and (i == 0 or not intervals[i - 1])
                        and (i == n - 1 or not intervals[i + 1])
                    )
                    if alone:
                        ax.vlines([i], [pair[0]], [pair[1]], color=colour, linewidth=1.5)
            ys = [math.nan if v is None else v for v in vs]
            ax.plot(xs, ys, color=colour, linewidth=2, linestyle="--" if shape % 2 else "-",
                    marker=MARKERS[shape % len(MARKERS)], markersize=5, label=name, gid=f"series-{j}")  # fmt: skip
            if n == 1 and vs and vs[0] is not None:
                ax.annotate(
                    f"{fmt(vs[0])}{suffix}", (0, vs[0]), xytext=(8, 6), textcoords="offset points"
                )
        if y_range is not None:
            ax.set_ylim(*y_range)
        if zero_line:
            ax.axhline(0, color=MUTED, linewidth=1.2)
        every = max(1, math.ceil(n / 8))
        shown = [i for i in xs if (n - 1 - i) % every == 0]  # counted from the last month
        ax.set_xticks(shown, [x_labels[i] for i in shown])
        ax.set_xlim(-0.5, n - 0.5)
        ax.set_xlabel(x_axis_label, gid="x-axis-label")
        ax.set_ylabel(axis_label, gid="y-axis-label")
        ax.yaxis.set_major_formatter(lambda v, _pos: ("−" if v < 0 else "") + f"{abs(v):g}")
        ax.grid(axis="y", color=GRID, linewidth=0.8)
        ax.set_axisbelow(True)
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)
        if len(series) > 1:
            fig.legend(loc="upper right", ncols=min(len(series), 6), frameon=False, fontsize=8)
        return _svg_of(fig, chart_id, "chart", title, desc)
