"""Small pieces of the report's HTML shared by its sections: numbers as text, cells that
show a blank for a suppressed count, tables, colours and names.
"""

from __future__ import annotations

import html
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

from pipeline.report.data import (
    TOTAL,
    UNKNOWN_DISTRICT,
    _Data,
    _is_blanked,
    _rate_blanked,
)

#: Okabe and Ito's colour-blind-safe palette (Okabe and Ito, "Color Universal Design", 2008;
#: common practice in scientific graphics): blue, orange, bluish green, vermillion, purple.
PALETTE = ("#0072B2", "#E69F00", "#009E73", "#D55E00", "#CC79A7", "#56B4E9")


INK, MUTED, GRID = "#1f2328", "#59636e", "#d8dee4"


#: How the equation ids of config/pipeline.yaml read in the report, with their source.
EQUATION_NAMES = {
    "ckd_epi_2021_creatinine": "CKD-EPI 2021 creatinine, without race (Inker et al., NEJM 2021)",
    "ckd_epi_2009_creatinine": "CKD-EPI 2009 creatinine, race term not used (Levey et al., Ann Intern Med 2009)",
    "ekfc_creatinine": "EKFC creatinine (Pottel et al., Ann Intern Med 2021)",
    "ckid_u25_creatinine": "CKiD U25 creatinine (Pierce et al., Kidney Int 2021)",
    "ckd_epi_2012_cystatin": "CKD-EPI 2012 cystatin C (Inker et al., NEJM 2012)",
    "ckd_epi_2021_creatinine_cystatin": "CKD-EPI 2021 creatinine–cystatin C (Inker et al., NEJM 2021)",
}


EQUATION_ROLES = {
    "adult": "Adults (from age {adult_min_age})",
    "child": "Children and adolescents (ages {min_age}–{child_max_age})",
    "child_with_height": "Children when a height is reported{height_note}",
    "cystatin": "Cystatin C (from age {adult_min_age})",
    "creatinine_with_cystatin": "Creatinine and cystatin C collected on the same day",
}


#: The categories of district_ckd_categories, in the order shown, with their KDIGO 2012 ranges.
CATEGORY_AXES = {
    "gfr": (
        "GFR category of the latest eGFR (KDIGO 2012)",
        (
            ("G1", "G1 ≥90"),
            ("G2", "G2 60–89"),
            ("G3a", "G3a 45–59"),
            ("G3b", "G3b 30–44"),
            ("G4", "G4 15–29"),
            ("G5", "G5 <15"),
            ("unknown", "No eGFR"),
        ),
    ),
    "albuminuria": (
        "albuminuria category of the latest measured ACR (KDIGO 2012)",
        (("A1", "A1 <30 mg/g"), ("A2", "A2 30–300"), ("A3", "A3 >300"), ("unknown", "No ACR")),
    ),
}


def _int(value: Any) -> str:
    return f"{int(value):,}"


def _pct(share: float, digits: int = 1) -> str:
    return f"{share * 100:.{digits}f}\u00a0%"


def _dec(value: float, digits: int = 1) -> str:
    return f"{float(value):,.{digits}f}"


@dataclass
class _Cell:
    text: str
    column: str
    kind: str = "num"  # num, s (suppressed), na (not available), text


def _count_cell(row: dict[str, Any], column: str) -> _Cell:
    if _is_blanked(row, column):
        return _Cell("s", column, "s")
    if row.get(column) is None:
        return _Cell("–", column, "na")
    return _Cell(_int(row[column]), column)


def _rate_cell(table: str, row: dict[str, Any], rate: str, data: _Data,
               fmt: Callable[[float], str], with_interval: bool) -> _Cell:  # fmt: skip
    if _rate_blanked(table, row, rate, data):
        return _Cell("s", rate, "s")
    value = row.get(rate)
    if value is None:
        return _Cell("–", rate, "na")
    text = fmt(value)
    low, high = row.get(f"{rate}_low"), row.get(f"{rate}_high")
    if with_interval and low is not None and high is not None:
        text += f' <span class="ci">({fmt(low)}–{fmt(high)})</span>'
    return _Cell(text, rate)


def _share_number(value: float) -> str:
    return f"{value * 100:.1f}"


def _rate_number(value: float) -> str:
    return _dec(value, 1)


def _has_interval(columns: set[str], rate: str) -> bool:
    return f"{rate}_low" in columns and f"{rate}_high" in columns


def _e(text: Any) -> str:
    return html.escape(str(text), quote=True)


def _table(table_id: str, caption: str, head: list[str], rows: list[tuple[str, str, list[_Cell]]],
           notes: list[str]) -> str:  # fmt: skip
    """A table with a text first column; rows are (district code, label, cells); the last row in
    a tfoot when its code is the total.
    """
    out = [
        f'<div class="table-wrap"><table id="{table_id}"><caption>{caption}</caption><thead><tr>'
    ]
    out += [f'<th scope="col"{" class=num" if i else ""}>{h}</th>' for i, h in enumerate(head)]
    out.append("</tr></thead><tbody>")
    for code, label, cells in rows:
        if code == TOTAL:
            out.append("</tbody><tfoot>")
        out.append(f'<tr data-district="{_e(code)}"><th scope="row">{label}</th>')
        for c in cells:
            out.append(f'<td class="{c.kind}" data-col="{_e(c.column)}">{c.text}</td>')
        out.append("</tr>")
    out.append("</tfoot>" if rows and rows[-1][0] == TOTAL else "</tbody>")
    out.append("</table></div>")
    if notes:
        out.append('<p class="table-notes">' + "<br>".join(notes) + "</p>")
    return "".join(out)


def _district_label(data: _Data, code: str) -> str:
    name = _e(data.district_name(code))
    if code in (TOTAL, UNKNOWN_DISTRICT) or code not in data.districts:
        return name
    return f'{name} <span class="code">{_e(code)}</span>'


def _suppression_notes(data: _Data, intervals: bool) -> list[str]:
    notes = [f"<b>s</b> suppressed: a count from {data.suppress_min} to {data.suppress_max}, a count "
             "blanked so that such a count cannot be worked out from the totals, or a rate built on one.",
             "<b>–</b> not available (no denominator, e.g. no resident population)."]  # fmt: skip
    if intervals:
        notes.append(f"In brackets: {_confidence(data)} confidence interval.")
    return notes


def _age_groups(bounds: Sequence[int]) -> str:
    b = [int(x) for x in bounds]
    return ", ".join([f"{lo}–{hi - 1}" for lo, hi in zip(b, b[1:], strict=False)] + [f"{b[-1]}+"])


def _missing(what: str) -> str:
    return f'<p class="notice">No published {what} table for this period.</p>'


def _confidence(data: _Data) -> str:
    return f"{data.confidence * 100:g}\u00a0%"


def _num(value: Any) -> str:
    v = float(value)
    return f"{v:g}"
