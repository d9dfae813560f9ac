"""Report sections for the indicators added beside the core tables: expected undetected
albuminuria ("expected cases not yet found") and, where published, the equation-change impact.

Kept apart from pipeline/report.py so that the core report can change without touching these;
they use its table and cell helpers and read only published tables (report.READABLE_TABLES)."""

from __future__ import annotations

from typing import Any

from pipeline import report as r
from pipeline.undetected import ASSUMPTION

UNDETECTED = "published.district_undetected_albuminuria"


def collect_undetected(con, period: str) -> list[dict[str, Any]]:
    if not r._exists(con, UNDETECTED):
        return []
    return r._district_order(r._select(con, UNDETECTED, "select * from {t} where period = ?", [period]))


def _expected_cell(row: dict[str, Any], data: Any, ci: bool) -> r._Cell:
    table = "district_undetected_albuminuria"
    cell = r._rate_cell(table, row, "expected_a2_a3_without_acr", data, lambda v: r._dec(v, 1), ci)
    if cell.kind == "na" and row.get("persons_without_acr") not in (None, 0):
        cell.text = "not estimable"
    return cell


def undetected_section(rows: list[dict[str, Any]], data: Any) -> str:
    """The table shown beside screening coverage: untested persons with diabetes and the
    expected number of them with A2 or A3."""
    if not rows:
        return r._missing("expected undetected albuminuria")
    table = "district_undetected_albuminuria"
    ci = r._has_interval(set(rows[0]), "expected_a2_a3_without_acr")
    head = ["District", "With diabetes", "Without ACR", "A2/A3 among tested (%)",
            "Expected cases not yet found (A2/A3 among those without ACR)"]
    body = []
    for row in rows:
        cells = [r._count_cell(row, "persons_with_diabetes"),
                 r._count_cell(row, "persons_without_acr"),
                 r._rate_cell(table, row, "share_a2_a3_of_tested", data, r._share_number, False),
                 _expected_cell(row, data, ci)]
        body.append((row["district_code"], r._district_label(data, row["district_code"]), cells))
    window = int(data.threshold("summaries", "window_months", 12))
    minimum = int(data.threshold("summaries", "albuminuria_min_tested", 10))
    groups = r._age_groups(data.threshold("summaries", "albuminuria_age_bands", [0, 45, 65, 75]))
    caption = (f"Expected cases not yet found: moderately or severely increased albuminuria (A2/A3) among "
               f"persons with diabetes without a urine ACR in the {window} months, {r._e(data.period_words)}")
    notes = r._suppression_notes(data, ci) + [
        "<b>Estimate, not a count.</b> " + r._e(ASSUMPTION),
        f"Strata: age groups {groups}, sex and GFR category of the latest eGFR; a stratum with fewer than "
        f"{minimum} tested persons takes its share from the pooled sparse strata of its age group and sex, "
        "then its age group, then the region."
        + (" Interval: the uncertainty of the region's stratum shares only (normal approximation); it is not "
           "the range of what testing everyone would find." if ci else ""),
        ("Persons tested outside the region's laboratories count as untested, which also pushes the estimate "
         "up. A dipstick or protein ratio does not count as an ACR."),
    ]
    return r._table("table-undetected", caption, head, body, notes)


def undetected_definition() -> tuple[str, str]:
    return ("Expected cases not yet found",
            "Among persons with lab-evidenced diabetes and no urine ACR in the window, the expected number "
            "with A2 or A3: the region's share of A2/A3 among the tested, per stratum of age group, sex and "
            "GFR category, applied to each district's untested persons and summed (indirect "
            "standardisation; Breslow and Day 1987). " + r._e(ASSUMPTION))
