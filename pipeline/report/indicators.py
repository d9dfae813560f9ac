"""Report sections for the indicators added beside the core tables: expected undetected
albuminuria ("expected cases not yet found") and, where published, the equation-change impact.

Kept apart from pipeline/report/page.py so that the core report can change without touching these;
they use its table and cell helpers and read only published tables (report.READABLE_TABLES).
"""

from __future__ import annotations

from typing import Any

from pipeline.core.undetected import ASSUMPTION
from pipeline.report.charts import _mpl, _svg_of
from pipeline.report.data import TOTAL, _is_blanked, _rate_blanked
from pipeline.report.html import (
    EQUATION_NAMES,
    INK,
    MUTED,
    PALETTE,
    _age_groups,
    _Cell,
    _count_cell,
    _dec,
    _district_label,
    _e,
    _has_interval,
    _int,
    _missing,
    _rate_cell,
    _share_number,
    _suppression_notes,
    _table,
)

#: Counts shown as district_screening_coverage publishes them: never empty unless blanked there
#: (this table's own ``suppression`` column does not mark them).
COPIED = ("persons_with_diabetes", "with_acr")


def _copied_blank(row: dict[str, Any]) -> bool:
    return any(row.get(c) is None for c in COPIED)


def _expected_cell(row: dict[str, Any], data: Any, ci: bool) -> _Cell:
    table = "district_undetected_albuminuria"
    if _copied_blank(row):
        return _Cell("s", "expected_a2_a3_without_acr", "s")
    cell = _rate_cell(table, row, "expected_a2_a3_without_acr", data, lambda v: _dec(v, 1), ci)
    if cell.kind == "na" and row.get("persons_without_acr") not in (None, 0):
        cell.text = "not estimable"
    return cell


def undetected_section(rows: list[dict[str, Any]], data: Any) -> str:
    """The table shown beside screening coverage: untested persons with diabetes and the
    expected number of them with A2 or A3.
    """
    if not rows:
        return _missing("expected undetected albuminuria")
    table = "district_undetected_albuminuria"
    ci = _has_interval(set(rows[0]), "expected_a2_a3_without_acr")
    head = [
        "District",
        "With diabetes",
        "Without ACR",
        "A2/A3 among tested (%)",
        "Expected cases not yet found (A2/A3 among those without ACR)",
    ]
    body = []
    for row in rows:
        diabetes = (
            _Cell("s", "persons_with_diabetes", "s")
            if row.get("persons_with_diabetes") is None
            else _count_cell(row, "persons_with_diabetes")
        )
        untested = row.get("persons_without_acr")
        # the difference of two of coverage's counts: shown only where both are and it is not a
        # count from 1 to suppress_max itself
        if _copied_blank(row) or (untested is not None and 1 <= untested <= data.suppress_max):
            untested_cell = _Cell("s", "persons_without_acr", "s")
        else:
            untested_cell = _count_cell(row, "persons_without_acr")
        cells = [
            diabetes,
            untested_cell,
            (
                _Cell("s", "share_a2_a3_of_tested", "s")
                if row.get("with_acr") is None
                else _rate_cell(table, row, "share_a2_a3_of_tested", data, _share_number, False)
            ),
            _expected_cell(row, data, ci),
        ]
        body.append((row["district_code"], _district_label(data, row["district_code"]), cells))
    window = int(data.threshold("summaries", "window_months", 12))
    minimum = int(data.threshold("summaries", "albuminuria_min_tested", 10))
    groups = _age_groups(data.threshold("summaries", "albuminuria_age_bands", [0, 45, 65, 75]))
    caption = (
        f"Expected cases not yet found: moderately or severely increased albuminuria (A2/A3) among "
        f"persons with diabetes without a urine ACR in the {window} months, {_e(data.period_words)}"
    )
    notes = _suppression_notes(data, ci) + [
        "<b>Estimate, not a count.</b> " + _e(ASSUMPTION),
        f"Strata: age groups {groups}, sex and GFR category of the latest eGFR; a stratum with fewer than "
        f"{minimum} tested persons takes its share from the pooled sparse strata of its age group and sex, "
        "then its age group, then the region."
        + (
            " Interval: the uncertainty of the region's stratum shares only (normal approximation); it is not "
            "the range of what testing everyone would find."
            if ci
            else ""
        ),
        (
            "Persons tested outside the region's laboratories count as untested, which also pushes the estimate "
            "up. A dipstick or protein ratio does not count as an ACR."
        ),
    ]
    return _table("table-undetected", caption, head, body, notes)


def undetected_definition() -> tuple[str, str]:
    return (
        "Expected cases not yet found",
        "Among persons with lab-evidenced diabetes and no urine ACR in the window, the expected number "
        "with A2 or A3: the region's share of A2/A3 among the tested, per stratum of age group, sex and "
        "GFR category, applied to each district's untested persons and summed (indirect "
        "standardisation; Breslow and Day 1987). " + _e(ASSUMPTION),
    )


BELOW_60 = ("G3a", "G3b", "G4", "G5")
G_LABELS = (
    ("G1", "G1 ≥90"),
    ("G2", "G2 60–89"),
    ("G3a", "G3a 45–59"),
    ("G3b", "G3b 30–44"),
    ("G4", "G4 15–29"),
    ("G5", "G5 <15"),
)


def _below_60(rows: list[dict[str, Any]], column: str) -> _Cell:
    """G3a + G3b + G4 + G5 from the published cells; 's' if any of them is blank."""
    cells = {row["g_category"]: row for row in rows}
    if any(
        g not in cells or _is_blanked(cells[g], column) or cells[g].get(column) is None
        for g in BELOW_60
    ):
        return _Cell("s", f"below_60_{column}", "s")
    return _Cell(_int(sum(int(cells[g][column]) for g in BELOW_60)), f"below_60_{column}")


def equation_change_section(change: dict[str, list[dict[str, Any]]], data: Any) -> str:
    totals, categories = change.get("totals") or [], change.get("categories") or []
    if not totals:
        return _missing("equation-change impact")
    names = EQUATION_NAMES
    in_force = totals[0].get("in_force_equation")
    comparisons = sorted(
        {t["comparison"] for t in totals}, key=lambda c: c == "ckd_epi_2021_creatinine_cystatin"
    )
    window = int(data.threshold("summaries", "window_months", 12))
    lead = (
        f"<p>Each adult's latest creatinine eGFR in the {window} months to {_e(data.end_words)}, under the "
        f"equation in force ({_e(names.get(in_force, in_force))}) and under another. A switch of equation "
        "moves these counts by itself, with no change in anyone's kidneys. Confirmed CKD under the other "
        "creatinine equation: every adult creatinine eGFR recomputed and the CKD rules run again.</p>"
    )
    out = [lead]
    for comparison in comparisons:
        label = names.get(comparison, comparison)
        region = [
            c for c in categories if c["district_code"] == TOTAL and c["comparison"] == comparison
        ]
        by_g = {c["g_category"]: c for c in region}
        rows = []
        for g, text in G_LABELS:
            row = by_g.get(g)
            if row is None:
                continue
            rows.append(
                (
                    g,
                    _e(text),
                    [
                        _count_cell(row, "persons_in_force"),
                        _count_cell(row, "persons_comparison"),
                        _count_cell(row, "moved_to_lower_gfr_category"),
                        _count_cell(row, "moved_to_higher_gfr_category"),
                    ],
                )
            )
        rows.append(
            (
                "below_60",
                "Below 60 (G3a–G5)",
                [
                    _below_60(region, "persons_in_force"),
                    _below_60(region, "persons_comparison"),
                    _Cell("", "moved_to_lower_gfr_category", "na"),
                    _Cell("", "moved_to_higher_gfr_category", "na"),
                ],
            )
        )
        head = [
            "GFR category",
            "In force",
            "Under the other equation",
            "Of those in force: moved lower",
            "Moved higher",
        ]
        what = (
            "persons whose latest day had a cystatin C too: the creatinine–cystatin C eGFR against the "
            "creatinine eGFR alone"
            if comparison == "ckd_epi_2021_creatinine_cystatin"
            else "adults"
        )
        caption = (
            f"All districts: {_e(label)} against the equation in force, {what}, "
            f"{_e(data.period_words)}"
        )
        out.append(_table(f"table-equation-{_e(comparison)}", caption, head, rows, []))
    main = comparisons[0]
    rows = []
    for t in (t for t in totals if t["comparison"] == main):
        mine = [
            c
            for c in categories
            if c["district_code"] == t["district_code"] and c["comparison"] == main
        ]
        rows.append(
            (
                t["district_code"],
                _district_label(data, t["district_code"]),
                [
                    _count_cell(t, "persons_compared"),
                    _below_60(mine, "persons_in_force"),
                    _below_60(mine, "persons_comparison"),
                    _count_cell(t, "moved_to_lower_gfr_category"),
                    _count_cell(t, "moved_to_higher_gfr_category"),
                    _count_cell(t, "persons_ckd_in_force"),
                    _count_cell(t, "persons_ckd_comparison"),
                ],
            )
        )
    head = [
        "District",
        "Adults compared",
        "Below 60, in force",
        "Below 60, other equation",
        "Moved to a lower category",
        "Moved to a higher category",
        "Confirmed CKD, in force",
        "Confirmed CKD, other equation",
    ]
    caption = f"By district: {_e(names.get(main, main))} against the equation in force, {_e(data.period_words)}"
    notes = _suppression_notes(data, False) + [
        (
            "Below 60 is the sum of the published G3a–G5 counts; shown as <b>s</b> when any of them is suppressed. "
            "A lower category is a higher G number (lower eGFR)."
        )
    ]
    out.append(_table("table-equation-districts", caption, head, rows, notes))
    return "".join(out)


def source_style(source_id: str, present: list[str]) -> tuple[str, int]:
    """A lab's colour and marker shape, the same in every report whatever other labs are added:
    the colour from a hash of its id (SHA-256, not Python's salted hash) over the palette, the
    shape from the colour. Only when two labs shown together hash to the same colour does the
    later (by id) take the next free one, so a lab keeps its colour unless a new lab collides
    with it and sorts first; up to len(PALETTE) labs always get distinct colours.
    """
    import hashlib

    size = len(PALETTE)

    def natural(sid: str) -> int:
        return int.from_bytes(hashlib.sha256(sid.encode("utf-8")).digest()[:8], "big") % size

    taken: set[int] = set()
    for sid in sorted(set(present) | {source_id}):
        index = natural(sid)
        while index in taken and len(taken) < size:
            index = (index + 1) % size
        taken.add(index)
        if sid == source_id:
            return PALETTE[index], index % 4
    raise AssertionError("unreachable")


def sensitivity_section(rows: list[dict[str, Any]], data: Any) -> str:
    """All districts: the default counts beside the counts with estimated albuminuria counted."""
    region = next((row for row in rows if row["district_code"] == TOTAL), None)
    prev = next((row for row in data.prevalence if row["district_code"] == TOTAL), None)
    cov = next((row for row in data.coverage if row["district_code"] == TOTAL), None)
    if region is None or prev is None or cov is None:
        return _missing("sensitivity to estimated albuminuria")
    lines = (
        ("Persons tested", prev, "persons_tested", "persons_tested_added"),
        ("Persons with confirmed CKD", prev, "persons_ckd", "persons_ckd_added"),
        ("Persons with diabetes with an ACR", cov, "with_acr", "with_acr_added"),
        (
            "Persons with diabetes with both eGFR and ACR",
            cov,
            "with_egfr_and_acr",
            "with_egfr_and_acr_added",
        ),
    )
    body = []
    for label, base, column, added in lines:
        default, plus = _count_cell(base, column), _count_cell(region, added)
        if default.kind == "num" and plus.kind == "num":
            total = _Cell(_int(int(base[column]) + int(region[added])), f"{column}_with_estimates")
        else:
            total = _Cell("s", f"{column}_with_estimates", "s")
        default.column, plus.column = f"{column}_default", added
        body.append((column, _e(label), [default, plus, total]))
    head = [
        "All districts",
        "Default (estimates left out)",
        "Added by estimates",
        "Estimates counted",
    ]
    caption = f"Counting ACR estimated from a protein ratio or a dipstick, {_e(data.period_words)}"
    notes = _suppression_notes(data, False) + [
        (
            "The default counts only measured ACR: a dipstick misses moderately increased albuminuria (A2), and an "
            "ACR estimated from a protein ratio is uncertain (Sumida et al. 2020). Counted here, a dipstick of "
            "trace or 1+ stands for A2 and 2+ or more for A3; a day with a measured ACR goes by the measured "
            "value. Estimates counted = default + added, shown only where both are published."
        )
    ]
    return _table("table-sensitivity", caption, head, body, notes)


# --------------------------------------------------------------------------- maps

#: Five steps of viridis (Garnier et al., matplotlib's default colour map, designed to be read
#: by people with colour-vision deficiency and in grey scale; common practice for choropleths).
MAP_COLOURS = ("#fde725", "#5ec962", "#21918c", "#3b528b", "#440154")
NO_DATA = "#d8dee4"


def _polygons(geometry: dict) -> list[list[list[list[float]]]]:
    return (
        geometry["coordinates"] if geometry["type"] == "MultiPolygon" else [geometry["coordinates"]]
    )


def _map_values(data: Any) -> list[tuple[str, str, str, dict[str, tuple[float | None, str]]]]:
    """(map id, title, unit, district -> (value or None, why blank)) for the three maps."""
    import math

    std: dict[str, tuple[float | None, str]] = {}
    for row in data.prevalence:
        code = row["district_code"]
        if row.get("ckd_per_1000_standardised_flag") == "few_events":
            std[code] = (None, "too few cases")
        elif _rate_blanked("district_ckd_prevalence", row, "ckd_per_1000_standardised", data):
            std[code] = (None, "suppressed")
        else:
            v = row.get("ckd_per_1000_standardised")
            std[code] = (None, "no data") if v is None else (float(v), "")
    cov: dict[str, tuple[float | None, str]] = {}
    for row in data.coverage:
        if _rate_blanked("district_screening_coverage", row, "share_with_both", data):
            cov[row["district_code"]] = (None, "suppressed")
        else:
            v = row.get("share_with_both")
            cov[row["district_code"]] = (None, "no data") if v is None else (100 * float(v), "")
    und: dict[str, tuple[float | None, str]] = {}
    for row in data.undetected:
        table = "district_undetected_albuminuria"
        if _rate_blanked(table, row, "expected_a2_a3_without_acr", data) or _copied_blank(row):
            und[row["district_code"]] = (None, "suppressed")
            continue
        v, n = row.get("expected_a2_a3_without_acr"), row.get("persons_with_diabetes")
        und[row["district_code"]] = (
            (None, "no data")
            if v is None or not n or math.isnan(float(v))
            else (100 * float(v) / float(n), "")
        )
    return [
        ("map-ckd-standardised", "Confirmed CKD per 1,000, age-standardised", "per 1,000", std),
        ("map-coverage", "Diabetes: tested for eGFR and ACR", "%", cov),
        ("map-undetected", "Expected cases not yet found per 100 with diabetes", "per 100", und),
    ]


def _district_map(
    map_id: str,
    title: str,
    unit: str,
    values: dict[str, tuple[float | None, str]],
    shapes: dict[str, dict],
    data: Any,
) -> str:
    """One district map drawn with matplotlib: each district a patch with the id
    ``<map_id>-district-<code>`` (``<map_id>-blanked-<code>`` when blanked: hatched and labelled
    "s" or "r", never a number), equal steps of the viridis colours between the lowest and highest
    value shown.
    """
    import math

    from matplotlib.patches import Patch, PathPatch
    from matplotlib.path import Path as MplPath

    points = [p for g in shapes.values() for poly in _polygons(g) for ring in poly for p in ring]
    lat0 = sum(p[1] for p in points) / len(points)
    k = math.cos(math.radians(lat0))

    def xy(p: list[float]) -> tuple[float, float]:
        return p[0] * k, p[1]

    shown = [v for v, _ in values.values() if v is not None]
    low, high = (min(shown), max(shown)) if shown else (0.0, 1.0)
    step = (high - low) / len(MAP_COLOURS) or 1.0

    def colour(v: float) -> str:
        return MAP_COLOURS[min(len(MAP_COLOURS) - 1, int((v - low) / step))]

    words = []
    with _mpl() as Figure:
        fig = Figure(figsize=(320 / 72, 420 / 72))
        ax = fig.add_axes((0.03, 0.36, 0.94, 0.56))
        ax.set_title(title, loc="left", fontsize=9, fontweight="bold")
        for code in sorted(shapes):
            value, why = values.get(code, (None, "no data"))
            name = data.district_name(code)
            vertices: list[tuple[float, float]] = []
            codes: list[int] = []
            for poly in _polygons(shapes[code]):
                for ring in poly:
                    vertices += [xy(p) for p in ring]
                    codes += (
                        [MplPath.MOVETO] + [MplPath.LINETO] * (len(ring) - 2) + [MplPath.CLOSEPOLY]
                    )
            blanked = value is None and why != "no data"
            patch = PathPatch(
                MplPath(vertices, codes),
                facecolor=colour(value)
                if value is not None
                else ("#ffffff" if blanked else NO_DATA),
                edgecolor="#ffffff",
                linewidth=1.2,
                hatch="///" if blanked else None,
                hatchcolor=MUTED,
            )
            patch.set_gid(f"{'blanked' if value is None else 'district'}-{code}")
            ax.add_patch(patch)
            text = f"{_dec(value, 1)} {unit}" if value is not None else why
            words.append(f"{name} {text}")
            ring = _polygons(shapes[code])[0][0][:-1]
            cx = sum(xy(p)[0] for p in ring) / len(ring)
            cy = sum(xy(p)[1] for p in ring) / len(ring)
            mark = {"suppressed": "s", "too few cases": "r"}.get(why, "–")
            label = code if value is not None else f"{code} {mark}"
            dark = value is not None and colour(value) in MAP_COLOURS[2:]
            ax.text(cx, cy, label, ha="center", va="center", fontsize=8,
                    color="#ffffff" if dark else INK,
                    bbox=None if value is not None else {"facecolor": "#ffffff", "edgecolor": "none", "pad": 1})  # fmt: skip
        ax.set_aspect("equal")
        ax.autoscale_view()
        ax.set_axis_off()
        bins = (
            [(low + i * step, low + (i + 1) * step) for i in range(len(MAP_COLOURS))]
            if shown
            else []
        )
        handles = [
            Patch(facecolor=c, label=f"{_dec(a, 1)} to {_dec(b, 1)} {unit}")
            for (a, b), c in zip(bins, MAP_COLOURS, strict=False)
        ]
        handles.append(Patch(facecolor="#ffffff", edgecolor=MUTED, hatch="///",
                             label="blanked: s suppressed, r too few cases"))  # fmt: skip
        handles.append(Patch(facecolor=NO_DATA, label="no data"))
        fig.legend(
            handles=handles, loc="lower left", bbox_to_anchor=(0.02, 0.0), frameon=False, fontsize=8
        )
        desc = f"Map of the districts: {title}. {'; '.join(words)}."
        return _svg_of(fig, map_id, "map", title, desc)


def maps_section(shapes: dict[str, dict], data: Any) -> str:
    if not shapes:
        return (
            '<p class="notice">No district boundaries are configured (config/regions/districts.geojson): '
            "no maps.</p>"
        )
    maps = [_district_map(i, t, u, v, shapes, data) for i, t, u, v in _map_values(data)]
    return (
        '<div class="maps">' + "".join(f"<figure>{m}</figure>" for m in maps) + "</div>"
        '<p class="table-notes">Equal steps between the lowest and highest value shown on each map. Hatched: '
        "blanked by disclosure control (s) or, for the standardised rate, too few persons with confirmed CKD "
        "for a reliable rate (r). Boundaries: config/regions/districts.geojson.</p>"
    )
