"""Report: the month's static HTML report, and its headline numbers as plain text.

One self-contained file: CSS inline, charts drawn with matplotlib as inline SVG, no script, no font, image
or style sheet fetched from anywhere (a Content-Security-Policy meta tells the browser so too).

What it reads is fixed in :data:`READABLE_TABLES`: the publishable tables (schema ``published``,
every period present, for the trend), the quality tables per lab (no person-level value), the
district names and the run manifest (``runs``). It never reads a person-level table; every query
goes through :func:`_select`, which refuses any other table. Counts blanked by disclosure control
are shown as "s" in the tables and "suppressed" elsewhere, never as a number.

The output depends only on the warehouse (no wall-clock time), so the same run gives the same file.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import duckdb

from pipeline.core.periods import Period
from pipeline.report import (
    indicators as report_indicators,  # new sections; it uses this module's helpers
)
from pipeline.report.charts import _Bar, _bar_chart, _line_chart, _Reference
from pipeline.report.data import (
    READABLE_TABLES,
    TOTAL,
    UNKNOWN_DISTRICT,
    _collect,
    _Data,
    _district_order,
    _is_blanked,
    _rate_blanked,
)
from pipeline.report.html import (
    CATEGORY_AXES,
    EQUATION_NAMES,
    EQUATION_ROLES,
    _age_groups,
    _Cell,
    _confidence,
    _count_cell,
    _dec,
    _district_label,
    _e,
    _has_interval,
    _int,
    _missing,
    _num,
    _pct,
    _rate_cell,
    _rate_number,
    _share_number,
    _suppression_notes,
    _table,
)

__all__ = ["READABLE_TABLES", "build_report_html", "headline_text", "write_report"]


# --------------------------------------------------------------------------- public API


def write_report(con: duckdb.DuckDBPyConnection, period: str, path: Path) -> Path:
    """Write the period's report to ``path`` (one self-contained HTML file) and return the path.

    The file is written beside its target and renamed into place, so a reader never sees half.
    """
    text = build_report_html(con, period)
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_text(text, encoding="utf-8")
    os.replace(tmp, path)
    return path


def headline_text(con: duckdb.DuckDBPyConnection, period: str) -> str:
    """The report's headline numbers as a few plain lines (the CLI may print them)."""
    data = _collect(con, Period.parse(period))
    lines = [f"Kidney surveillance, {data.period_words} (period {data.period.label})"]
    if data.demo_key is not False:
        lines.append("  " + data.key_notice)
    for h in _headlines(data):
        lines.append(f"  {h.label}: {h.value}" + (f" ({h.detail})" if h.detail else ""))
    return "\n".join(lines).replace("\u00a0", " ")


def build_report_html(con: duckdb.DuckDBPyConnection, period: str) -> str:
    """The report as an HTML string."""
    return _render(_collect(con, Period.parse(period)))


# --------------------------------------------------------------------------- reading


# --------------------------------------------------------------------------- cells and formats


# --------------------------------------------------------------------------- headline


@dataclass
class _Headline:
    key: str
    label: str
    value: str
    detail: str = ""


def _headline_value(row: dict[str, Any] | None, column: str, data: _Data) -> str:
    if row is None:
        return "not available"
    if _is_blanked(row, column):
        return f"suppressed (≤{data.suppress_max})"
    if row.get(column) is None:
        return "not available"
    return _int(row[column])


def _headline_share(table: str, row: dict[str, Any] | None, rate: str, data: _Data) -> str:
    if row is None:
        return "not available"
    if _rate_blanked(table, row, rate, data):
        return "suppressed"
    if row.get(rate) is None:
        return "not available"
    return _pct(row[rate])


def _headlines(data: _Data) -> list[_Headline]:
    prev = next((r for r in data.prevalence if r["district_code"] == TOTAL), None)
    cov = next((r for r in data.coverage if r["district_code"] == TOTAL), None)
    window = int(data.threshold("summaries", "window_months", 12))
    share = _headline_share("district_ckd_prevalence", prev, "ckd_share_of_tested", data)
    both = _headline_share("district_screening_coverage", cov, "share_with_both", data)
    both_n = _headline_value(cov, "with_egfr_and_acr", data)
    if share == "suppressed":
        share_detail = "share of persons tested suppressed"
    else:
        share_detail = "" if share == "not available" else f"{share} of persons tested"
    if both == "suppressed":
        both_detail = "share with both an eGFR and an ACR suppressed"
    elif both == "not available":
        both_detail = ""
    else:
        both_detail = f"{both} had both an eGFR and an ACR" + (
            f": {both_n} persons" if both_n[:1].isdigit() else ""
        )
    return [
        _Headline("persons_tested", f"Persons tested (eGFR or ACR) in the {window} months to {data.end_words}",
                  _headline_value(prev, "persons_tested", data)),
        _Headline("persons_ckd", "Persons with confirmed CKD", _headline_value(prev, "persons_ckd", data),
                  share_detail),
        _Headline("persons_ckd_g3_g5", "Confirmed CKD with latest eGFR in G3a–G5",
                  _headline_value(prev, "persons_ckd_g3_g5", data)),
        _Headline("persons_with_diabetes", "Persons with lab-evidenced diabetes",
                  _headline_value(cov, "persons_with_diabetes", data), both_detail),
    ]  # fmt: skip


# --------------------------------------------------------------------------- charts (matplotlib, SVG)


# --------------------------------------------------------------------------- sections


def _prevalence_section(data: _Data) -> str:
    table = "district_ckd_prevalence"
    cols = data.prevalence_columns
    share_ci = _has_interval(cols, "ckd_share_of_tested")
    std = "ckd_per_1000_standardised" in cols
    std_ci = _has_interval(cols, "ckd_per_1000_standardised")
    head = ["District", "Persons tested", "Confirmed CKD", "Share of tested (%)", "CKD G3a–G5",
            "Per 1,000 residents"] + (["Age-standardised per 1,000"] if std else []) + ["Population"]  # fmt: skip
    rows = []
    for r in data.prevalence:
        cells = [
            _count_cell(r, "persons_tested"),
            _count_cell(r, "persons_ckd"),
            _rate_cell(table, r, "ckd_share_of_tested", data, _share_number, share_ci),
            _count_cell(r, "persons_ckd_g3_g5"),
            _rate_cell(table, r, "ckd_per_1000_residents", data, _rate_number, False),
        ]
        if std:
            few = r.get("ckd_per_1000_standardised_flag") == "few_events"
            cells.append(
                _Cell("r", "ckd_per_1000_standardised", "s")
                if few
                else _rate_cell(table, r, "ckd_per_1000_standardised", data, _rate_number, std_ci)
            )
        cells.append(_count_cell(r, "population"))
        rows.append((r["district_code"], _district_label(data, r["district_code"]), cells))
    caption = f"Confirmed CKD among persons tested, by district, {_e(data.period_words)}"
    notes = _suppression_notes(data, share_ci or std_ci)
    if std:
        groups = _age_groups(data.threshold("summaries", "standardisation_age_bands", [0, 65, 75]))
        notes.append(f"Age-standardised: direct method, WHO World Standard Population 2000–2025, on the broad "
                     f"age groups {groups}, sexes pooled; shown only where its counts per age group give no "
                     "suppressed count away.")  # fmt: skip
        if any(r.get("ckd_per_1000_standardised_flag") == "rounded" for r in data.prevalence):
            notes.append("Some age-standardised rates are rounded to fewer decimals: at two decimals, with their "
                         "interval and the district's count, they would give an age group's count back.")  # fmt: skip
        if any(r.get("ckd_per_1000_standardised_flag") == "few_events" for r in data.prevalence):
            minimum = int(data.threshold("disclosure", "standardised_min_events", 20))
            notes.append(f"<b>r</b> not shown: fewer than {minimum} persons with confirmed CKD, too few for a "
                         "reliable standardised rate (common practice).")  # fmt: skip
    return (
        _table("table-prevalence", caption, head, rows, notes) if rows else _missing("prevalence")
    )


def _categories_section(data: _Data) -> str:
    """One table per axis: districts down, categories across; each cell the count and, in small
    type, per 100 persons tested.
    """
    if not data.categories:
        return _missing("CKD by category")
    table = "district_ckd_categories"
    by = {(r["district_code"], r["category_axis"], r["category"]): r for r in data.categories}
    districts = [r["district_code"] for r in _district_order(
        [{"district_code": d} for d in sorted({r["district_code"] for r in data.categories})])]  # fmt: skip
    out = []
    for axis, (title, categories) in CATEGORY_AXES.items():
        rows = []
        for d in districts:
            cells = []
            for category, _ in categories:
                r = by.get((d, axis, category))
                if r is None:
                    cells.append(_Cell("–", category, "na"))
                    continue
                cell = _count_cell(r, "persons_ckd")
                cell.column = category
                if cell.kind == "num":
                    rate = _rate_cell(
                        table, r, "ckd_per_100_tested", data, lambda v: _dec(v, 1), False
                    )
                    if rate.kind == "num":
                        cell = _Cell(f'{cell.text} <span class="rate">{rate.text}</span>', category)
                cells.append(cell)
            rows.append((d, _district_label(data, d), cells))
        caption = f"Confirmed CKD by {title}, {_e(data.period_words)}"
        head = ["District"] + [label for _, label in categories]
        notes = [] if axis == "gfr" else _suppression_notes(data, False) + [
            "In small type: per 100 persons tested (persons with an eGFR or ACR in the window). A whole row is "
            "suppressed when the district's total is suppressed in the table above, or when no other blank "
            "could protect a count. Zeros are shown."]  # fmt: skip
        out.append(_table(f"table-{axis}-categories", caption, head, rows, notes))
    return "".join(out)


def _coverage_section(data: _Data) -> str:
    table = "district_screening_coverage"
    ci = _has_interval(data.coverage_columns, "share_with_both")
    head = [
        "District",
        "With diabetes",
        "With eGFR",
        "With ACR",
        "With both",
        "Share with both (%)",
    ]
    rows = []
    for r in data.coverage:
        cells = [
            _count_cell(r, c)
            for c in ("persons_with_diabetes", "with_egfr", "with_acr", "with_egfr_and_acr")
        ]
        cells.append(_rate_cell(table, r, "share_with_both", data, _share_number, ci))
        rows.append((r["district_code"], _district_label(data, r["district_code"]), cells))
    caption = f"Kidney testing among persons with lab-evidenced diabetes, by district, {_e(data.period_words)}"
    return (_table("table-coverage", caption, head, rows, _suppression_notes(data, ci))
            if rows else _missing("screening coverage"))  # fmt: skip


def _incidence_section(data: _Data) -> str:
    table = "district_decline_incidence"
    head = ["District", "Persons with an eGFR", "Person-years", "Decline ≥30 %", "≥40 %", "≥57 %",
            "≥40 % per 1,000 person-years"]  # fmt: skip
    rows = []
    for r in data.incidence:
        cells = [
            _count_cell(r, "persons_tested"),
            _Cell(
                _dec(r["person_years"], 1) if r.get("person_years") is not None else "–",
                "person_years",
            ),
        ]
        cells += [_count_cell(r, f"persons_decline_{t}") for t in (30, 40, 57)]
        cells.append(
            _rate_cell(table, r, "decline_40_per_1000_person_years", data, _rate_number, False)
        )
        rows.append((r["district_code"], _district_label(data, r["district_code"]), cells))
    caption = (
        f"Sustained eGFR decline with its event in the 12 months to {_e(data.end_words)}, by district "
        "(confirmed: every daily eGFR of the run at or below the threshold for at least 28 days)"
    )
    notes = _suppression_notes(data, False) + [
        "Each column counts the persons whose event at that threshold is dated in the window. A person whose "
        "30 % decline was dated before the window and whose 40 % decline falls in it is counted at 40 % and "
        "not at 30 %, so the ≥40 % count can exceed the ≥30 % count."
    ]
    return (_table("table-incidence", caption, head, rows, notes)
            if rows else _missing("sustained-decline incidence"))  # fmt: skip


def _share_chart(data: _Data) -> str:
    table = "district_ckd_prevalence"
    ci = _has_interval(data.prevalence_columns, "ckd_share_of_tested")
    names, bars, words = [], [], []
    total = None
    for r in data.prevalence:
        code = r["district_code"]
        blanked = _rate_blanked(table, r, "ckd_share_of_tested", data)
        value = (
            None
            if blanked or r.get("ckd_share_of_tested") is None
            else r["ckd_share_of_tested"] * 100
        )
        if code == TOTAL:
            total = value
            continue
        if code == UNKNOWN_DISTRICT:
            continue
        low = r.get("ckd_share_of_tested_low") if ci and value is not None else None
        high = r.get("ckd_share_of_tested_high") if ci and value is not None else None
        name = data.district_name(code)
        names.append(name)
        bars.append(_Bar(value, None if low is None else low * 100, None if high is None else high * 100,
                         "suppressed" if blanked else "no data"))  # fmt: skip
        words.append(f"{name} {'suppressed' if value is None else _dec(value) + ' %'}")
    if not names:
        return ""
    refs = [_Reference(total, f"all districts {_dec(total)} %")] if total is not None else []
    desc = (f"Horizontal bars: share of persons tested with confirmed CKD, per district, {data.period_words}"
            + (f", with {_confidence(data)} confidence intervals as error bars" if ci else "")
            + f". {'; '.join(words)}."
            + (f" All districts: {_dec(total)} %." if total is not None else ""))  # fmt: skip
    return _bar_chart("chart-ckd-share", "Confirmed CKD, share of persons tested, by district", desc, names,
                      [("share", bars)], "Confirmed CKD (% of persons tested)", " %", _dec, refs)  # fmt: skip


def _trend_chart(data: _Data) -> str:
    table = "district_screening_coverage"
    ci = _has_interval(data.coverage_columns, "share_with_both")
    labels, values, intervals, words = [], [], [], []
    for r in data.coverage_trend:
        blanked = _rate_blanked(table, r, "share_with_both", data)
        v = None if blanked or r.get("share_with_both") is None else r["share_with_both"] * 100
        labels.append(r["period"])
        values.append(v)
        low, high = r.get("share_with_both_low"), r.get("share_with_both_high")
        intervals.append((low * 100, high * 100) if ci and v is not None and low is not None and high is not None
                         else None)  # fmt: skip
        words.append(f"{r['period']} {'suppressed' if v is None else _dec(v) + ' %'}")
    if not labels:
        return ""
    one = " Only one period is published so far." if len(labels) == 1 else ""
    desc = ("Line: share of persons with lab-evidenced diabetes who had both an eGFR and an ACR in the "
            f"12 months ending each month, as the data stood at that month's end, all districts. "
            f"{'; '.join(words)}.{one}")  # fmt: skip
    return _line_chart("chart-coverage-trend", "Persons with diabetes tested for both eGFR and ACR, all districts",
                       desc, labels, [("all districts", values, intervals if ci else None)],
                       "Both eGFR and ACR (%)", "Month end (12 months ending that month)", " %", _dec,
                       y_range=(0.0, 100.0))  # fmt: skip


def _quality_by_source(data: _Data) -> list[dict[str, Any]]:
    out: dict[str, dict[str, Any]] = {}
    for r in data.quality:
        s = out.setdefault(r["source_id"], {"source_id": r["source_id"], "months": [], "files": 0, "held": 0,
                                             "read": 0, "accepted": 0, "rejected": 0, "this_read": None,
                                             "this_rejected": None})  # fmt: skip
        s["months"].append(r["extract_month"])
        s["files"] += int(r["files"] or 0)
        s["held"] += int(r["files_held_back"] or 0)
        s["read"] += int(r["rows_read"] or 0)
        s["accepted"] += int(r["rows_accepted"] or 0)
        s["rejected"] += int(r["rows_rejected"] or 0)
        if r["extract_month"] == data.period.label:
            s["this_read"], s["this_rejected"] = (
                int(r["rows_read"] or 0),
                int(r["rows_rejected"] or 0),
            )
    return [out[k] for k in sorted(out)]


def _quality_chart(data: _Data, sources: list[dict[str, Any]]) -> str:
    if not sources:
        return ""
    this, every, words = [], [], []
    for s in sources:
        v_this = 100 * s["this_rejected"] / s["this_read"] if s["this_read"] else None
        v_all = 100 * s["rejected"] / s["read"] if s["read"] else None
        this.append(_Bar(v_this, note=f"no extract for {data.period.label}"))
        every.append(_Bar(v_all, note="no rows read"))
        words.append(f"{s['source_id']}: {data.period.label} extract "
                     f"{'none' if v_this is None else _dec(v_this, 2) + ' %'}, all extract months "
                     f"{'none' if v_all is None else _dec(v_all, 2) + ' %'}")  # fmt: skip
    gate = data.manifest.get("thresholds", {}).get("quality_gate", {}).get("max_rejection_rate")
    refs = (
        [_Reference(100 * float(gate), f"quality gate {_dec(100 * float(gate))} %")]
        if gate is not None
        else []
    )
    desc = f"Horizontal bars: share of rows rejected per lab source. {'; '.join(words)}."
    return _bar_chart("chart-rejected-share", "Rows rejected, share of rows read, by lab", desc,
                      [s["source_id"] for s in sources],
                      [(f"extract month {data.period.label}", this), ("all extract months", every)],
                      "Rejected rows (% of rows read)", " %", lambda v: _dec(v, 2), refs)  # fmt: skip


def _agreement_chart(data: _Data) -> str:
    months = sorted({r["month"] for r in data.agreement})
    sources = sorted({r["source_id"] for r in data.agreement})
    if not months:
        return '<p class="notice">No lab-reported eGFR to compare in this period.</p>'
    by = {(r["source_id"], r["month"]): r["median_difference"] for r in data.agreement}
    series, words = [], []
    for s in sources:
        vs = [by.get((s, m)) for m in months]
        series.append((s, [None if v is None else float(v) for v in vs], None))
        shown = [v for v in vs if v is not None]
        if shown:
            words.append(f"{s}: from {_dec(min(shown), 2)} to {_dec(max(shown), 2)}")
    desc = ("Lines: median of the lab-reported minus the recomputed creatinine eGFR, mL/min/1.73 m², per lab "
            f"and collection month, {months[0]} to {months[-1]}. " + "; ".join(words) + ".")  # fmt: skip
    return _line_chart("chart-egfr-agreement", "Lab-reported minus recomputed eGFR, median by lab and month",
                       desc, months, series, "Median difference (mL/min/1.73 m²)", "Collection month", "",
                       lambda v: _dec(v, 2), zero_line=True, height=300,
                       styles=[report_indicators.source_style(s, sources) for s in sources])  # fmt: skip


def _quality_table(data: _Data, sources: list[dict[str, Any]]) -> str:
    if not sources:
        return '<p class="notice">No data quality rows for this period.</p>'
    reasons: dict[str, list[str]] = {}
    for r in data.reasons:
        reasons.setdefault(r["source_id"], []).append(
            f"{_e(r['reason_code'])}&nbsp;{_int(r['rows'])}"
        )
    head = ["Lab source", "Extract months", "Files", "Held back", "Rows read", "Accepted", "Rejected",
            "Rejected (%)", "Main rejection reasons"]  # fmt: skip
    out = ['<div class="table-wrap"><table id="table-quality"><caption>Rows per lab source, all extract '
           f'months in the warehouse at {_e(data.period.label)}</caption><thead><tr>']  # fmt: skip
    out += [
        f'<th scope="col"{" class=num" if 1 < i < 8 else ""}>{h}</th>' for i, h in enumerate(head)
    ]
    out.append("</tr></thead><tbody>")
    for s in sources:
        months = f"{s['months'][0]} – {s['months'][-1]}" if len(s["months"]) > 1 else s["months"][0]
        share = _dec(100 * s["rejected"] / s["read"], 2) if s["read"] else "–"
        cells = [
            _int(s["files"]),
            _int(s["held"]),
            _int(s["read"]),
            _int(s["accepted"]),
            _int(s["rejected"]),
            share,
        ]
        out.append(
            f'<tr><th scope="row">{_e(s["source_id"])}</th><td class="text nowrap">{_e(months)}</td>'
        )
        out += [f'<td class="num">{c}</td>' for c in cells]
        out.append(
            f'<td class="text reasons">{"<br>".join(reasons.get(s["source_id"], [])[:3]) or "–"}</td></tr>'
        )
    out.append("</tbody></table></div>")
    out.append('<p class="table-notes">Counts of data rows, not of persons. Reason codes are listed in the '
               "project's developer guide.</p>")  # fmt: skip
    return "".join(out)


def _equations_table(data: _Data) -> str:
    equations = data.manifest.get("equations") or {}
    if not equations:
        return '<p class="notice">The run manifest lists no equations.</p>'
    adult = int(data.threshold("measures", "adult_min_age_years", 18))
    context = {"adult_min_age": adult, "min_age": int(data.threshold("measures", "min_age_years", 2)),
               "child_max_age": adult - 1,
               "height_note": ("" if equations.get("use_height_for_children", True)
                               else " (not used in this run)")}  # fmt: skip
    out = ['<table id="table-equations"><caption>Equations in force for this run</caption><thead><tr>'
           '<th scope="col">Used for</th><th scope="col">Equation</th></tr></thead><tbody>']  # fmt: skip
    for role, equation in equations.items():
        if not isinstance(equation, str):
            continue
        used_for = EQUATION_ROLES.get(role, role.replace("_", " ")).format(**context)
        out.append(f'<tr><th scope="row">{_e(used_for)}</th>'
                   f'<td class="text">{_e(EQUATION_NAMES.get(equation, equation))}</td></tr>')  # fmt: skip
    out.append("</tbody></table>")
    return "".join(out)


def _methods_section(data: _Data) -> str:
    t = data.threshold
    window = int(t("summaries", "window_months", 12))
    ckd_egfr = _num(t("trajectories", "ckd_egfr_below", 60))
    ckd_acr = _num(t("trajectories", "ckd_acr_at_or_above_mg_g", 30))
    ckd_days = int(t("trajectories", "ckd_min_span_days", 90))
    base_days = int(t("trajectories", "baseline_window_days", 90))
    decline = ", ".join(
        f"{_num(100 * float(x))} %"
        for x in t("trajectories", "decline_thresholds", [0.3, 0.4, 0.57])
    )
    decline_days = int(t("trajectories", "decline_min_span_days", 28))
    hba1c = _num(t("measures", "diabetes_hba1c_percent", 6.5))
    hba1c_ifcc = _num(t("measures", "diabetes_hba1c_mmol_mol", 48))
    glucose = _num(t("measures", "diabetes_fasting_glucose_mg_dl", 126))
    glucose_si = f"{float(t('measures', 'diabetes_fasting_glucose_mmol_l', 7.0)):.1f}"
    intervals = (_has_interval(data.prevalence_columns, "ckd_share_of_tested")
                 or _has_interval(data.coverage_columns, "share_with_both"))  # fmt: skip
    definitions = [
        ("Persons tested", f"Persons with at least one eGFR or urine ACR collected in the {window} months "
         f"ending {_e(data.end_words)}, counted once whichever labs they used."),
        ("Confirmed CKD", f"An eGFR below {ckd_egfr} mL/min/1.73 m², or albuminuria in category A2 or A3 "
         f"(ACR at or above {ckd_acr} mg/g or 3 mg/mmol in the unit reported, or a timed excretion of 30 mg/24 h), "
         f"on consecutive days of testing spanning at least {ckd_days} days: kidney damage or reduced function "
         "lasting more than three months, as KDIGO 2012 defines CKD. One low value is not enough. A censored "
         "ACR (such as <5 mg/mmol) counts only where it is certainly below or above A2."),
        ("Share of tested and per 1,000 residents", "The share is among persons tested, who are not a random "
         "sample of residents; per 1,000 residents divides the same count by the whole resident population. "
         "Neither is the prevalence of CKD in the population."),
        ("Sustained decline", f"A person's daily eGFRs after a baseline (the mean of the eGFRs in the first "
         f"{base_days} days) stay at or below the baseline less {decline} for at least {decline_days} days "
         "(Levey et al. 2014); at 30 %, 40 % and 57 %, in the sustained eGFR decline table of this report "
         "(events dated in the window), and per person in the warehouse (kidney_events)."),
        ("Lab-evidenced diabetes", f"An HbA1c at or above {hba1c} % ({hba1c_ifcc} mmol/mol) or fasting glucose at "
         f"or above {glucose} mg/dL ({glucose_si} mmol/L) (ADA Standards of Care), "
         + ("confirmed by a second abnormal result: on the same day from the other test, or on another day."
            if t("measures", "diabetes_rule", "confirmed") == "confirmed"
            else "on a single result (this run does not ask for a confirming second result).")),
        ("Screening coverage", f"Among persons with lab-evidenced diabetes and any result in the {window} "
         "months, the share who had an eGFR, a urine ACR, and both, in that window. An ACR estimated from a "
         "protein ratio or a dipstick (Sumida et al. 2020) does not count: a dipstick misses moderately "
         "increased albuminuria."),
        ("Suppression", f"Every published count from {data.suppress_min} to {data.suppress_max} is blanked, "
         "and so are the counts that would let it be worked out from a total and the rates built on any "
         "blanked count. Zeros are shown, except in a category row blanked whole. GFR and albuminuria "
         "categories add up to the district totals of the prevalence table and are protected against them; "
         "an age-standardised rate is shown only where its counts per broad age group give no blank away."),
    ]  # fmt: skip
    if data.undetected:
        definitions.insert(-1, report_indicators.undetected_definition())
    if intervals:
        definitions.append(("Intervals", f"{_confidence(data)} Wilson score intervals for shares (Wilson 1927; "
                            "Newcombe 1998); Fay–Feuer gamma intervals for age-standardised rates (Fay and "
                            "Feuer 1997)."))  # fmt: skip
    used = set((data.manifest.get("equations") or {}).values())
    sources = [
        "Inker LA, et al. N Engl J Med 2021;385:1737 (CKD-EPI 2021, without race).",
        "KDIGO 2012 Clinical Practice Guideline for the Evaluation and Management of CKD. "
        "Kidney Int Suppl 2013;3:1 (definition of CKD, GFR and albuminuria categories).",
        "Levey AS, et al. Am J Kidney Dis 2014;64:821 (30 % and 40 % eGFR decline as end points).",
        "Sumida K, et al. Ann Intern Med 2020;173:426 (ACR from protein ratio and dipstick).",
        "American Diabetes Association. Standards of Care in Diabetes: classification and diagnosis "
        "(HbA1c and fasting glucose thresholds).",
    ]
    if data.undetected:
        sources.append(
            "Breslow NE, Day NE. Statistical Methods in Cancer Research, vol. II. IARC 1987 "
            "(indirect standardisation)."
        )
    if "ekfc_creatinine" in used:
        sources.append("Pottel H, et al. Ann Intern Med 2021;174:183 (EKFC).")
    if "ckid_u25_creatinine" in used:
        sources.append("Pierce CB, et al. Kidney Int 2021;99:948 (CKiD U25).")
    if "ckd_epi_2012_cystatin" in used:
        sources.append("Inker LA, et al. N Engl J Med 2012;367:20 (CKD-EPI 2012 cystatin C).")
    if intervals:
        sources.append("Wilson EB. J Am Stat Assoc 1927;22:209; Newcombe RG. Stat Med 1998;17:857; "
                       "Fay MP, Feuer EJ. Stat Med 1997;16:791 (intervals).")  # fmt: skip
    out = ['<section id="methods"><h2>Methods</h2>',
           "<p>eGFR is recomputed from every accepted serum creatinine (and cystatin C) with the equations "
           "below, the same way for every lab; a lab's own eGFR is used only for the agreement chart above. "
           "GFR categories follow KDIGO 2012 on the unrounded eGFR; albuminuria is put on one scale, ACR in "
           "mg/g.</p>", _equations_table(data), "<h3>Definitions</h3><dl>"]  # fmt: skip
    out += [f"<dt>{_e(term)}</dt><dd>{text}</dd>" for term, text in definitions]
    out.append('</dl><h3>Sources</h3><ul class="sources">')
    out += [f"<li>{_e(s)}</li>" for s in sources]
    out.append("</ul></section>")
    return "".join(out)


CAUTIONS = (
    "These are surveillance indicators for populations, <strong>not a diagnosis of any individual</strong>. "
    "A lab value is not a clinical assessment.",
    "eGFR equations estimate kidney function in a steady state and have known limits: acute illness or acute "
    "kidney injury, extremes of muscle mass or diet, pregnancy, amputation, and children, who need their own "
    "equations and heights.",
    "Local data-protection law, local guidelines and licensed clinical practice take precedence over "
    "anything this report or the pipeline computes.",
    "Only disclosure-controlled tables are published: this report is built from them alone, and small counts "
    "are suppressed.",
)


def _cautions_section() -> str:
    items = "".join(f"<li>{c}</li>" for c in CAUTIONS)
    return f'<section id="cautions" class="cautions"><h2>Cautions</h2><ul>{items}</ul></section>'


def _run_footer(data: _Data) -> str:
    if data.run is None:
        return "<footer><p>No run manifest is recorded for this period.</p></footer>"
    r = data.run
    held = data.manifest.get("quality_gate", {}).get("held_back_sources") or {}
    parts = [f"Run {_e(r['run_id'])}", f"started {_e(r['started_at'])} UTC", f"status {_e(r['status'])}",
             f"kidneysurv {_e(r['package_version'])}"]  # fmt: skip
    if r.get("git_commit"):
        parts.append(f"commit {_e(str(r['git_commit'])[:12])}")
    parts.append(f"configuration {_e(str(r['config_sha256'])[:12])}")
    text = " · ".join(parts)
    if held:
        text += "<br>Held back by the quality gate: " + "; ".join(
            f"{_e(k)} ({_e(v)})" for k, v in sorted(held.items())
        )
    return f"<footer><p>{text}</p></footer>"


def _period_checks_section(data: _Data) -> str:
    """What the run said about its own period (run manifest, ``period_checks``): sources that
    sent nothing, rows it could not count, code values no config maps, and the period's own
    rows per source beside the warehouse's totals.
    """
    checks = data.manifest.get("period_checks") or {}
    if not checks:
        return ""
    out = ['<h3 id="period-checks">This period\'s deliveries and coding</h3>']
    notes = []
    hold = checks.get("missing_sources_policy") == "hold"
    for source, message in sorted((checks.get("missing_sources") or {}).items()):
        notes.append(
            f"<li><strong>Missing source{' (holds the period)' if hold else ''}:</strong> "
            f"{_e(source)}: {_e(message)}</li>"
        )
    for line in checks.get("rows_outside_period_notes") or []:
        notes.append(f"<li><strong>Rows outside the period:</strong> {_e(line)}</li>")
    for source, fields in sorted((checks.get("unmapped_codes") or {}).items()):
        for name, info in sorted(fields.items()):
            values = ", ".join(
                f"{_e(v)} ({_int(n)})" for v, n in list(info.get("values", {}).items())[:8]
            )
            notes.append(
                f"<li><strong>Unmapped {_e(name)}:</strong> {_e(source)}: {_int(info.get('rows'))} rows "
                f"({values}); map them under <code>{_e(info.get('config_key'))}</code> in the source "
                "config</li>"
            )
    if checks.get("indicators_lack"):
        notes.append(
            "<li><strong>The indicators lack:</strong> "
            + ", ".join(_e(s) for s in checks["indicators_lack"])
            + "</li>"
        )
    out.append(
        f'<ul class="period-checks">{"".join(notes)}</ul>'
        if notes
        else "<p>Every configured source delivered; no unmapped code; every accepted row of this "
        "period's files is counted in it.</p>"
    )
    cols = (
        "files",
        "read",
        "accepted",
        "rejected",
        "superseded",
        "duplicate",
        "withdrawn",
        "pending",
        "held_back",
    )
    head = "".join(f'<th scope="col">{c.replace("_", " ")}</th>' for c in cols)
    body = "".join(
        f'<tr><th scope="row">{_e(src)}</th>' + "".join(f"<td>{_int(c.get(k, 0))}</td>" for k in cols) + "</tr>"
        for src, c in sorted((checks.get("sources") or {}).items()))  # fmt: skip
    out.append(
        f'<table id="period-rows"><caption>Rows of the files ingested for {_e(data.period.label)}, per '
        f'source (per file, read = the sum of the outcomes)</caption><thead><tr><th scope="col">source</th>'
        f"{head}</tr></thead><tbody>{body}</tbody></table>"
    )
    totals = checks.get("warehouse_sources") or {}
    if totals:
        out.append(
            "<p>Warehouse totals, all periods (not this period's): "
            + "; ".join(
                f"{_e(s)} read {_int(c.get('read', 0))}, accepted {_int(c.get('accepted', 0))}"
                for s, c in sorted(totals.items())
            )
            + ".</p>"
        )
    return "\n".join(out)


# --------------------------------------------------------------------------- page

CSS = (Path(__file__).with_name("style.css")).read_text(encoding="utf-8")

#: Nothing may be fetched: no script, no font, no image except inline data, styles inline only.
CSP = "default-src 'none'; style-src 'unsafe-inline'; img-src data:"


#: How the headline keys of the run manifest read in a revision banner.
_HEADLINE_WORDS = {
    "persons_tested_12m": "persons tested in 12 months",
    "persons_confirmed_ckd": "persons with confirmed CKD",
    "ckd_share_of_tested": "confirmed CKD, share of tested",
    "persons_with_diabetes": "persons with diabetes",
    "diabetes_with_egfr_and_acr": "with diabetes, both eGFR and ACR in 12 months",
    "diabetes_share_with_both": "with diabetes, share with both",
}


def _revision_banner(revision: dict[str, Any]) -> str:
    """A revised period says so before anything else: when, why, and the headline before/after."""
    if not revision.get("reason"):
        return ""

    def shown(v: Any) -> str:
        if v is None:
            return "suppressed or not available"
        return f"{v:.1%}" if isinstance(v, float) else f"{v:,}"

    before, after = revision.get("headline_before") or {}, revision.get("headline_after") or {}
    rows = "".join(
        f"<tr><td>{_e(_HEADLINE_WORDS.get(k, k))}</td><td>{_e(shown(before.get(k)))}</td>"
        f"<td>{_e(shown(after.get(k)))}</td></tr>"
        for k in _HEADLINE_WORDS
        if k in before or k in after
    )
    return (
        f'<div class="banner" id="revision-banner" role="alert"><p>Revised release: revision '
        f"{_e(str(revision.get('number')))} of this period, published {_e(str(revision.get('revised_on')))}, "
        f"replaces revision {_e(str(revision.get('previous')))} (published "
        f"{_e(str(revision.get('previous_published_at', ''))[:10])}). Reason: {_e(str(revision.get('reason')))}. "
        f"The earlier release stays readable (exports in revisions/{_e(str(revision.get('previous')))}/, "
        "tables in schema published_history).</p>"
        f"<table><thead><tr><th>headline</th><th>before</th><th>after</th></tr></thead><tbody>{rows}"
        "</tbody></table></div>"
    )


def _render(data: _Data) -> str:
    title = f"Kidney surveillance report, {data.period_words}"
    names = [data.districts[c] for c in sorted(data.districts)]
    region = (f"Region of {len(names)} district{'s' if len(names) != 1 else ''}: " + ", ".join(names)
              if names else "Region: districts not listed")  # fmt: skip
    banner = ""
    if data.demo_key is not False:
        banner = f'<p class="banner" id="demo-banner" role="alert">{_e(data.key_notice)}</p>'
    banner += _revision_banner(data.manifest.get("revision") or {})
    held = data.manifest.get("quality_gate", {}).get("held_back_sources") or {}
    held_note = ""
    if held:
        held_note = ('<p class="notice">Held back by the quality gate this month (not in the counts): '
                     + ", ".join(_e(s) for s in sorted(held)) + ".</p>")  # fmt: skip
    drift = data.manifest.get("config_drift") or {}
    if drift:
        held_note += ('<p class="notice" id="config-drift">Config changed since their rows were stored, not yet '
                      "reprocessed (their new files are held back; these figures use their rows as first "
                      "read): " + ", ".join(_e(s) for s in sorted(drift)) + ".</p>")  # fmt: skip
    lacking = (data.manifest.get("period_checks") or {}).get("indicators_lack") or []
    if lacking:
        held_note += (
            '<p class="notice" id="indicators-lack">These indicators lack: '
            + ", ".join(_e(s) for s in lacking)
            + ' (held back or sent nothing; see <a href="#period-checks">data quality</a>).</p>'
        )
    cards = []
    for h in _headlines(data):
        klass = " suppressed" if h.value.startswith(("suppressed", "not available")) else ""
        detail = f'<div class="detail">{_e(h.detail)}</div>' if h.detail else ""
        cards.append(f'<div class="card" data-key="{h.key}"><div class="value{klass}">{_e(h.value)}</div>'
                     f'<div class="label">{_e(h.label)}</div>{detail}</div>')  # fmt: skip
    sources = _quality_by_source(data)

    def figure(svg: str, caption: str) -> str:
        return f"<figure>{svg}<figcaption>{caption}</figcaption></figure>" if svg else ""

    body = [
        "<header>", f"<h1>{_e(title)}</h1>",
        f'<p class="sub">{_e(region)}</p>',
        f'<p class="sub">Indicators as of {_e(data.end_words)} (period {_e(data.period.label)}), from the '
        "disclosure-controlled tables only.</p>", "</header>", banner, held_note,
        '<p class="lead-caution">Surveillance indicators for populations, not a diagnosis of any '
        'individual: read the <a href="#cautions">cautions</a> and <a href="#methods">methods</a>.</p>',
        '<section id="headline"><h2>Headline, all districts</h2><div class="headline">', *cards, "</div></section>",
        '<section id="maps"><h2>Districts on the map</h2>', report_indicators.maps_section(data.shapes, data),
        "</section>",
        '<section id="prevalence"><h2>Chronic kidney disease by district</h2>',
        figure(_share_chart(data), "Dashed line: all districts. Suppressed districts have no bar."),
        _prevalence_section(data), "</section>",
        '<section id="categories"><h2>Confirmed CKD by GFR and albuminuria category</h2>',
        _categories_section(data), "</section>",
        '<section id="coverage"><h2>Kidney testing in diabetes</h2>',
        figure(_trend_chart(data), "One point per month end, as the results reported by then stood; each covers "
               "the 12 months ending that month. The last point is the table below."),
        _coverage_section(data),
        '<h3 id="undetected">Expected cases not yet found</h3>',
        report_indicators.undetected_section(data.undetected, data),
        '<h3 id="sensitivity">If estimated albuminuria were counted</h3>',
        report_indicators.sensitivity_section(data.sensitivity, data), "</section>",
        '<section id="decline"><h2>Sustained eGFR decline</h2>', _incidence_section(data), "</section>",
        '<section id="equation-change"><h2>If the eGFR equation changed</h2>',
        report_indicators.equation_change_section(data.equation_change, data), "</section>",
        '<section id="quality"><h2>Data quality by lab</h2>',
        figure(_quality_chart(data, sources), "Rows the row-level rules rejected, for this month's extract and "
               "for every extract month received so far. Dashed line: the share above which a lab is held back."),
        figure(_agreement_chart(data), "Each lab's own eGFR against the one recomputed here (CKD-EPI 2021 for "
               "adults). A steady offset suggests the lab reports another equation; a sudden step, an assay or "
               "calibration change."),
        _quality_table(data, sources), _period_checks_section(data), "</section>",
        _methods_section(data), _cautions_section(), _run_footer(data),
    ]  # fmt: skip
    return ("<!DOCTYPE html>\n"
            '<html lang="en"><head><meta charset="utf-8">'
            f'<meta http-equiv="Content-Security-Policy" content="{CSP}">'
            '<meta name="viewport" content="width=device-width, initial-scale=1">'
            f'<meta name="generator" content="kidneysurv">'
            f"<title>{_e(title)}</title><style>{CSS}</style></head>"
            "<body><main>" + "\n".join(part for part in body if part) + "</main></body></html>\n")  # fmt: skip
