"""Tests for pipeline.report.page: the monthly HTML report on a warehouse built from the shipped
sample extracts (two months, so the trend has two points).

What is checked and against what:
- the numbers shown are those of the published (disclosure-controlled) tables, read here with
  plain SQL, and a suppressed cell never shows its internal count: counts from 1 to 10 are
  suppressed (common practice in official statistics; config/pipeline.yaml, disclosure);
- the file is self-contained: no http(s) reference in any ``src``, ``href`` or ``url(``, no script,
  no linked style sheet (the report's own contract);
- the report reads no person-level table: rendered from an in-memory database holding only the
  tables it may read, it is byte-identical;
- the cautions of the README and the demo-key banner are there.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
from html.parser import HTMLParser
from pathlib import Path

import duckdb
import pytest

from pipeline.report.data import READABLE_TABLES, _select
from pipeline.report.page import build_report_html, headline_text, write_report
from tests.conftest import ROOT, SAMPLE_PERIODS, rows

PERIODS = ("2026-09", "2026-10")
PERIOD = PERIODS[-1]
#: HTML elements without an end tag (WHATWG HTML, "void elements").
VOID = {
    "area",
    "base",
    "br",
    "col",
    "embed",
    "hr",
    "img",
    "input",
    "link",
    "meta",
    "source",
    "track",
    "wbr",
}
COUNTS = {
    "table-prevalence": ("district_ckd_prevalence", ("persons_tested", "persons_ckd", "persons_ckd_g3_g5")),
    "table-coverage": ("district_screening_coverage",
                       ("persons_with_diabetes", "with_egfr", "with_acr", "with_egfr_and_acr")),
    "table-undetected": ("district_undetected_albuminuria", ("persons_with_diabetes", "persons_without_acr")),
}  # fmt: skip


@pytest.fixture(scope="module")
def warehouse(sample_warehouse) -> Path:
    """The shipped samples run for two months into one warehouse, shared by the session
    (tests/conftest.py, ``sample_warehouse``: PERIODS, Great Expectations off); read-only."""
    assert PERIODS == SAMPLE_PERIODS
    return sample_warehouse


@pytest.fixture(scope="module")
def con(warehouse):
    connection = duckdb.connect(str(warehouse), read_only=True)
    yield connection
    connection.close()


@pytest.fixture(scope="module")
def report(con, tmp_path_factory) -> str:
    path = write_report(con, PERIOD, tmp_path_factory.mktemp("html") / "report.html")
    return path.read_text(encoding="utf-8")


def restricted_copy(warehouse: Path, tables=READABLE_TABLES) -> duckdb.DuckDBPyConnection:
    """An in-memory database with only ``tables`` copied from the warehouse."""
    mem = duckdb.connect()
    mem.execute("attach '" + str(warehouse).replace("'", "''") + "' as src (read_only)")
    for table in tables:
        schema, _, name = table.rpartition(".")
        mem.execute(f"create schema if not exists {schema or 'main'}")
        mem.execute(
            f"create table {schema or 'main'}.{name} as select * from src.{schema or 'main'}.{name}"
        )
    mem.execute("detach src")
    return mem


class StrictParser(HTMLParser):
    """Collects every element and the text of table cells; records a misnested end tag."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.stack: list[str] = []
        self.errors: list[str] = []
        self.elements: list[tuple[str, dict[str, str | None]]] = []
        self.cells: dict[
            str, list[tuple[str, str, str]]
        ] = {}  # table id -> (district, column, text)
        self._table = self._district = self._column = None
        self._text: list[str] = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.elements.append((tag, a))
        if tag not in VOID:
            self.stack.append(tag)
        if tag == "table":
            self._table = a.get("id")
        elif tag == "tr":
            self._district = a.get("data-district")
        elif tag == "td" and a.get("data-col"):
            self._column, self._text = a["data-col"], []

    def handle_startendtag(self, tag, attrs):
        self.elements.append((tag, dict(attrs)))

    def handle_endtag(self, tag):
        if tag in VOID:
            return
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes <{self.stack[-1] if self.stack else None}>")
            return
        self.stack.pop()
        if tag == "td" and self._column:
            self.cells.setdefault(self._table, []).append(
                (self._district, self._column, "".join(self._text))
            )
            self._column = None
        if tag == "table":
            self._table = None

    def handle_data(self, data):
        self._text.append(data)


def parse(text: str) -> StrictParser:
    parser = StrictParser()
    parser.feed(text)
    parser.close()
    return parser


def card_text(report: str, key: str) -> str:
    # a card is flat: <div class="card"> holding value, label and detail divs
    match = re.search(rf'<div class="card" data-key="{key}">(.*?)</div></div>', report)
    assert match, key
    return re.sub(r"<[^>]+>", " ", match.group(0)).replace("\u00a0", " ")


def published_total(con, table: str) -> dict:
    where = "and sex = 'ALL' and age_band = 'ALL'" if table == "district_ckd_prevalence" else ""
    cur = con.execute(
        f"select * from published.{table} where period = ? and district_code = 'ALL' {where}",
        [PERIOD],
    )
    names = [d[0] for d in cur.description]
    return dict(zip(names, cur.fetchone(), strict=False))


# --------------------------------------------------------------------------- structure


def test_html_parses_with_every_element_closed(report):
    parser = parse(report)
    assert parser.errors == []
    assert parser.stack == []
    tags = [t for t, _ in parser.elements]
    assert tags.count("html") == 1 and tags.count("title") >= 1 and "main" in tags


def test_every_chart_is_inline_svg_with_title_and_desc(report):
    charts = re.findall(r'<svg class="chart" id="([^"]+)"[^>]*>(.*?)</svg>', report, re.S)
    ids = [c[0] for c in charts]
    assert ids == [
        "chart-ckd-share",
        "chart-coverage-trend",
        "chart-rejected-share",
        "chart-egfr-agreement",
    ]
    for chart_id, body in charts:
        assert f'<title id="{chart_id}-title">' in body and f'<desc id="{chart_id}-desc">' in body
        assert f'id="{chart_id}-x-axis-label"' in body, chart_id  # drawn by matplotlib, gid kept


def test_trend_has_one_point_per_month_end_as_known_then(con, report):
    """Twelve month ends up to the period, from the published trend; its last point is the
    published coverage of the period itself (the same persons, counted the same way)."""
    months = [m for (m,) in rows(con, "select as_of_month from published.region_coverage_trend where period = ? "
                                      "order by 1", [PERIOD])]  # fmt: skip
    assert len(months) == 12 and months[-1] == PERIOD and months[0] == "2025-11"
    trend = re.search(r'<svg class="chart" id="chart-coverage-trend".*?</svg>', report, re.S).group(
        0
    )
    desc = re.search(r"<desc[^>]*>(.*?)</desc>", trend, re.S).group(1)
    points = re.findall(r"(\d{4}-\d{2}) [0-9.]+ %", desc)
    line = re.search(r'<g id="chart-coverage-trend-series-0">.*?</g>\s*</g>', trend, re.S).group(0)
    assert line.count("<use ") == len(points)  # one marker per point shown
    assert points == [
        m
        for m in months
        if rows(
            con,
            "select share_with_both from published.region_coverage_trend "
            "where period = ? and as_of_month = ?",
            [PERIOD, m],
        )[0][0]
        is not None
    ]
    assert len(points) > 2
    last = rows(
        con,
        "select persons_with_diabetes, with_egfr, with_acr, with_egfr_and_acr from "
        "main.region_coverage_trend where period = ? and as_of_month = ?",
        [PERIOD, PERIOD],
    )
    coverage = rows(
        con,
        "select persons_with_diabetes, with_egfr, with_acr, with_egfr_and_acr from "
        "main.district_screening_coverage where period = ? and district_code = 'ALL'",
        [PERIOD],
    )
    assert last == coverage
    # earlier month ends know fewer results: the counts do not fall as the months go on (the
    # samples grow month by month; a check that the as-of filter is applied at all)
    first = rows(
        con,
        "select persons_with_diabetes from main.region_coverage_trend where period = ? "
        "order by as_of_month limit 1",
        [PERIOD],
    )[0][0]
    assert first < last[0][0]


#: Renders the page of one period from a warehouse (read-only) and writes its UTF-8 bytes out.
RENDER = (
    "import sys, duckdb\n"
    "from pipeline.report.page import build_report_html\n"
    "con = duckdb.connect(sys.argv[1], read_only=True)\n"
    "sys.stdout.buffer.write(build_report_html(con, sys.argv[2]).encode('utf-8'))\n"
)


def test_is_deterministic(con, warehouse):
    # Two fresh interpreters with different string-hash seeds (Python randomises str hashes per
    # process: set and dict-of-set orders, matplotlib's ids, would differ) render the same bytes,
    # and the same as this process.
    pages = []
    for seed in ("1", "2"):
        env = {**os.environ, "PYTHONHASHSEED": seed}
        done = subprocess.run(
            [sys.executable, "-c", RENDER, str(warehouse), PERIOD],
            cwd=ROOT, env=env, capture_output=True, check=True, timeout=300,
        )  # fmt: skip
        pages.append(done.stdout)
    assert pages[0] and pages[0] == pages[1]
    assert pages[0] == build_report_html(con, PERIOD).encode("utf-8")


# --------------------------------------------------------------------------- numbers


def test_headline_shows_the_published_all_district_numbers(con, report):
    prev = published_total(con, "district_ckd_prevalence")
    cov = published_total(con, "district_screening_coverage")
    expected = {
        "persons_tested": [prev["persons_tested"]],
        "persons_ckd": [prev["persons_ckd"]],
        "persons_ckd_g3_g5": [prev["persons_ckd_g3_g5"]],
        "persons_with_diabetes": [cov["persons_with_diabetes"], cov["with_egfr_and_acr"]],
    }
    for key, values in expected.items():
        text = card_text(report, key)
        for v in values:
            assert v is not None, "the sample's all-district counts are large: none suppressed"
            assert f"{v:,}" in text, (key, v, text)
    assert f"{prev['ckd_share_of_tested'] * 100:.1f} %" in card_text(report, "persons_ckd")
    assert f"{cov['share_with_both'] * 100:.1f} %" in card_text(report, "persons_with_diabetes")


def test_headline_text_has_the_same_numbers(con):
    text = headline_text(con, PERIOD)
    prev = published_total(con, "district_ckd_prevalence")
    cov = published_total(con, "district_screening_coverage")
    for v in (prev["persons_tested"], prev["persons_ckd"], prev["persons_ckd_g3_g5"],
              cov["persons_with_diabetes"], cov["with_egfr_and_acr"]):  # fmt: skip
        assert f"{v:,}" in text
    assert f"{prev['ckd_share_of_tested'] * 100:.1f} %" in text
    assert "public demo key" in text
    assert len(text.splitlines()) <= 8


def test_district_tables_show_the_published_cells(con, report):
    cells = parse(report).cells
    for table_id, (table, counts) in COUNTS.items():
        where = "and sex = 'ALL' and age_band = 'ALL'" if table == "district_ckd_prevalence" else ""
        query = f"select district_code, {', '.join(counts)} from published.{table} where period = ? {where}"
        if table == "district_undetected_albuminuria":
            # its persons with diabetes and untested persons are coverage's counts (published
            # there only); an untested count of 1 to 10 is not shown either (common practice)
            query = (
                "select u.district_code, c.persons_with_diabetes, "
                "case when c.persons_with_diabetes - c.with_acr between 1 and 10 then null "
                "else c.persons_with_diabetes - c.with_acr end "
                "from published.district_undetected_albuminuria u left join "
                "published.district_screening_coverage c using (period, district_code) where u.period = ?"
            )
        published = {r[0]: r[1:] for r in rows(con, query, [PERIOD])}
        shown = {(d, c): t for d, c, t in cells[table_id]}
        assert {d for d, _ in shown} == set(published)
        for district, values in published.items():
            for column, value in zip(counts, values, strict=False):
                assert shown[(district, column)] == ("s" if value is None else f"{value:,}"), (
                    district,
                    column,
                )


def test_expected_cases_not_yet_found_show_the_published_estimate(con, report):
    """The estimate beside coverage is the published value with its interval, or 's' where the
    counts it is built on are blanked; the assumption is stated under the table."""
    cells = {(d, c): t for d, c, t in parse(report).cells["table-undetected"]}
    # with_acr is coverage's (published there only)
    published = rows(
        con,
        "select u.district_code, u.expected_a2_a3_without_acr, u.expected_a2_a3_without_acr_low, "
        "u.expected_a2_a3_without_acr_high, c.with_acr from published.district_undetected_albuminuria u "
        "left join published.district_screening_coverage c using (period, district_code) "
        "where u.period = ?",
        [PERIOD],
    )
    assert published
    for district, value, low, high, with_acr in published:
        text = cells[(district, "expected_a2_a3_without_acr")]
        if with_acr is None:
            assert text == "s", district
        elif value is not None:
            assert text == f"{value:,.1f} ({low:,.1f}–{high:,.1f})", district
    assert "untested persons with diabetes are assumed to have A2 or A3 as often as" in report
    assert "Expected cases not yet found" in report


def test_no_suppressed_small_count_appears_in_any_table_cell(con, report):
    """Every internal count from 1 to 10 is blanked in the published tables (common practice:
    counts 1-10 suppressed); none of them may show in the cell it belongs to, and no count cell of
    the district tables may hold a number from 1 to 10 at all."""
    cells = parse(report).cells
    checked = 0
    for table_id, (table, counts) in COUNTS.items():
        where = "and sex = 'ALL' and age_band = 'ALL'" if table == "district_ckd_prevalence" else ""
        internal = {
            r[0]: r[1:]
            for r in rows(
                con,
                f"select district_code, {', '.join(counts)} from main.{table} where period = ? {where}",
                [PERIOD],
            )
        }
        shown = {(d, c): t for d, c, t in cells[table_id]}
        for district, values in internal.items():
            for column, value in zip(counts, values, strict=False):
                if value is not None and 1 <= value <= 10:
                    assert shown[(district, column)] == "s", (table, district, column)
                    checked += 1
        for (_, column), text in shown.items():
            if column in counts and text.replace(",", "").isdigit():
                assert not 1 <= int(text.replace(",", "")) <= 10, (table_id, column, text)
    assert checked > 0, (
        "the samples have small district counts: the check must have something to check"
    )


def test_suppressed_districts_have_no_bar_and_no_rate(con, report):
    suppressed = [
        name
        for (name,) in rows(
            con,
            """
        select d.district_name from published.district_ckd_prevalence p
        join reference.districts d using (district_code)
        where p.period = ? and p.sex = 'ALL' and p.age_band = 'ALL' and p.ckd_share_of_tested is null""",
            [PERIOD],
        )
    ]
    chart = re.search(r'<svg class="chart" id="chart-ckd-share".*?</svg>', report, re.S).group(0)
    desc = re.search(r"<desc[^>]*>(.*?)</desc>", chart, re.S).group(1)
    assert suppressed, "the samples have a district whose share is suppressed"
    for name in suppressed:
        assert f"{name} suppressed" in desc
    # no bar for a suppressed district: one bar (gid "bar-<district>-0") per district shown
    (shown,) = rows(
        con,
        """
        select count(*) from published.district_ckd_prevalence p
        join reference.districts d using (district_code)
        where p.period = ? and p.sex = 'ALL' and p.age_band = 'ALL' and p.ckd_share_of_tested is not null""",
        [PERIOD],
    )[0]
    assert chart.count('id="chart-ckd-share-bar-') == shown > 0


def test_a_suppressed_headline_shows_no_number(warehouse):
    mem = restricted_copy(warehouse)
    mem.execute("update published.district_ckd_prevalence set persons_ckd_g3_g5 = null, suppression = 'primary', "
                "n_suppressed = 1 where period = ? and district_code = 'ALL' and sex = 'ALL' and age_band = 'ALL'",
                [PERIOD])  # fmt: skip
    html = build_report_html(mem, PERIOD)
    card = card_text(html, "persons_ckd_g3_g5")
    assert "suppressed (≤10)" in card
    assert not re.search(r"\d", card.replace("G3a–G5", "").replace("10", ""))
    assert "suppressed (≤10)" in headline_text(mem, PERIOD)


# --------------------------------------------------------------------------- self-contained


def test_no_external_reference(report):
    refs = re.findall(
        r"""(?:src|href)\s*=\s*["']?([^"'\s>]+)|url\(\s*["']?([^"')]+)""", report, re.I
    )
    for ref in (a or b for a, b in refs):
        assert not re.match(r"(?i)(https?:)?//", ref), ref
    for tag, attrs in parse(report).elements:
        for name, value in attrs.items():
            assert not re.match(r"(?i)\s*(https?:)?//", value or ""), (tag, name, value)
        assert tag not in ("script", "link", "iframe", "object", "embed", "img"), tag
    assert "http://" not in report and "https://" not in report
    assert "@import" not in report and "@font-face" not in report
    assert "default-src 'none'" in report  # the browser is told to fetch nothing


def test_reads_only_the_publishable_and_quality_tables(con, warehouse, report):
    """Rendered from a database holding only READABLE_TABLES, the report is byte-identical: it
    cannot have read a person-level table."""
    person_level = {"person_status", "kidney_events", "lab_results", "kidney_measures", "result_versions",
                    "rejected_rows", "results_known", "measures_known",
                    "daily_values_averaged"}  # fmt: skip
    assert not person_level & {t.rpartition(".")[2] for t in READABLE_TABLES}
    mem = restricted_copy(warehouse)
    assert build_report_html(mem, PERIOD) == report
    with pytest.raises(ValueError, match="does not read"):
        _select(con, "person_status", "select * from {t}")


def test_interval_columns_are_optional(warehouse):
    """Error bars and bracketed intervals when <rate>_low/_high exist; none when they do not."""
    mem = restricted_copy(warehouse)
    for table, rate in (("district_ckd_prevalence", "ckd_share_of_tested"),
                        ("district_ckd_prevalence", "ckd_per_1000_standardised"),
                        ("district_screening_coverage", "share_with_both"),
                        ("district_undetected_albuminuria", "expected_a2_a3_without_acr")):  # fmt: skip
        for end in ("low", "high"):
            mem.execute(f"alter table published.{table} drop column if exists {rate}_{end}")
    without = build_report_html(mem, PERIOD)
    assert 'class="ci"' not in without and "confidence interval" not in without
    for table, rate in (("district_ckd_prevalence", "ckd_share_of_tested"),
                        ("district_screening_coverage", "share_with_both")):  # fmt: skip
        mem.execute(f"alter table published.{table} add column {rate}_low double")
        mem.execute(f"alter table published.{table} add column {rate}_high double")
        mem.execute(
            f"update published.{table} set {rate}_low = {rate} * 0.9, {rate}_high = least({rate} * 1.1, 1)"
        )
    with_ci = build_report_html(mem, PERIOD)
    chart = re.search(r'<svg class="chart" id="chart-ckd-share".*?</svg>', with_ci, re.S).group(0)
    assert 'id="chart-ckd-share-interval-' in chart and 'class="ci"' in with_ci
    assert "confidence intervals as error bars" in chart


# --------------------------------------------------------------------------- words


def test_cautions_methods_and_demo_banner(con, report):
    text = re.sub(r"<[^>]+>", "", report).replace("\u00a0", " ")
    text = re.sub(r"\s+", " ", text)
    # the README's cautions, in substance
    for phrase in ("not a diagnosis of any individual", "acute illness", "acute kidney injury",
                   "extremes of muscle mass", "pregnancy", "amputation", "children",
                   "Local data-protection law, local guidelines and licensed clinical practice take precedence",
                   "Only disclosure-controlled tables are published"):  # fmt: skip
        assert phrase in text, phrase
    for source in ("Inker LA, et al. N Engl J Med 2021", "KDIGO 2012", "Levey AS, et al. Am J Kidney Dis 2014",
                   "Sumida K, et al. Ann Intern Med 2020", "American Diabetes Association"):  # fmt: skip
        assert source in text, source
    for term in ("Confirmed CKD", "Sustained decline", "Screening coverage", "Suppression"):
        assert f"<dt>{term}</dt>" in report
    assert rows(con, "select demo_key from runs where period = ?", [PERIOD]) == [(True,)]
    assert "Made with the public demo key: invented data, not for real use." in text
    assert 'id="demo-banner"' in report


def test_equations_in_force_come_from_the_manifest(warehouse):
    mem = restricted_copy(warehouse)
    html = build_report_html(mem, PERIOD)
    assert "CKD-EPI 2021 creatinine, without race" in html  # config/pipeline.yaml: adult equation
    mem.execute(
        "update runs set manifest = json_merge_patch(manifest, "
        '\'{"equations": {"adult": "ckd_epi_2009_creatinine"}}\') where period = ?',
        [PERIOD],
    )
    assert "CKD-EPI 2009 creatinine" in build_report_html(mem, PERIOD)


def test_no_banner_for_a_run_with_the_region_key(warehouse):
    mem = restricted_copy(warehouse)
    mem.execute("update runs set demo_key = false where period = ?", [PERIOD])
    html = build_report_html(mem, PERIOD)
    assert 'id="demo-banner"' not in html and "public demo key" not in html
    assert "public demo key" not in headline_text(mem, PERIOD)


def test_two_renders_of_the_same_data_are_byte_identical(con, report, tmp_path):
    """The report depends only on the warehouse: matplotlib's SVG is made deterministic (fixed
    hash salt, no date or creator in the metadata, text kept as text)."""
    again = write_report(con, PERIOD, tmp_path / "again.html").read_bytes()
    assert again == report.encode("utf-8")
    assert "<svg" in report and "<dc:date>" not in report and "<dc:creator>" not in report


# --------------------------------------------------------------------------- CKD by category


def test_category_tables_show_the_published_cells(con, report):
    """Both category tables: every published count as published (its per-100 rate beside it in
    small type), every blank count as "s", never a count from 1 to 10 (common practice)."""
    cells = parse(report).cells
    published = rows(con, "select district_code, category_axis, category, persons_ckd, ckd_per_100_tested "
                          "from published.district_ckd_categories where period = ?", [PERIOD])  # fmt: skip
    assert published, "the samples publish the category table"
    checked = 0
    for axis in ("gfr", "albuminuria"):
        shown = {(d, c): t for d, c, t in cells[f"table-{axis}-categories"]}
        expected = {(d, c): (n, r) for d, a, c, n, r in published if a == axis}
        assert set(shown) == set(expected)
        for key, (count, rate) in expected.items():
            text = shown[key].replace("\u00a0", " ")
            if count is None:
                assert text == "s", key
                checked += 1
            else:
                number, _, small = text.partition(" ")
                assert number == f"{count:,}" and not 1 <= count <= 10, key
                assert small == (f"{rate:,.1f}" if rate is not None else ""), key
    assert checked > 0, "the samples have small category counts"


def test_standardised_rates_shown_as_published(con, report):
    """A standardised rate is shown where published (config: broad age groups), "r" where it
    rests on too few persons (common practice: fewer than about 20 events) and "s" where
    suppressed."""
    cells = {(d, c): t for d, c, t in parse(report).cells["table-prevalence"]}
    published = rows(con, "select district_code, ckd_per_1000_standardised, ckd_per_1000_standardised_flag "
                          "from published.district_ckd_prevalence where period = ? and sex = 'ALL'", [PERIOD])  # fmt: skip
    shown_rates = 0
    for district, rate, flag in published:
        text = cells[(district, "ckd_per_1000_standardised")]
        if flag in ("", "rounded"):
            assert text.startswith(f"{rate:,.1f}" if flag == "" else f"{rate:,.0f}"[:1]), (
                district,
                text,
            )
            shown_rates += 1
        elif flag == "few_events":
            assert text == "r"
        elif flag == "suppressed":
            assert text == "s"
    # Read with the other published figures, most district rates of the samples would narrow a
    # blanked count (pipeline/stages/disclose/audit.py): the region's rate is published.
    assert shown_rates >= 1, "the samples publish the region's standardised rate"
    assert dict((d, f) for d, _, f in published)["ALL"] == ""


def test_equation_change_shows_the_published_cells(con, report):
    """Each district's adults compared and moved counts are those published; 'below 60' is the
    sum of the published G3a..G5 counts (KDIGO 2012: G3a-G5 is an eGFR below 60), or 's' when
    any of them is blank."""
    cells = {(d, c): t for d, c, t in parse(report).cells["table-equation-districts"]}
    totals = rows(
        con,
        "select district_code, persons_compared, moved_to_lower_gfr_category from "
        "published.district_equation_change where period = ? and comparison = 'ckd_epi_2009_creatinine'",
        [PERIOD],
    )
    assert totals
    for district, compared, lower in totals:
        assert cells[(district, "persons_compared")] == (
            "s" if compared is None else f"{compared:,}"
        )
        assert cells[(district, "moved_to_lower_gfr_category")] == (
            "s" if lower is None else f"{lower:,}"
        )
        below = rows(
            con,
            "select persons_in_force from published.district_equation_change_categories where "
            "period = ? and comparison = 'ckd_epi_2009_creatinine' and district_code = ? and "
            "g_category in ('G3a', 'G3b', 'G4', 'G5')",
            [PERIOD, district],
        )
        values = [v for (v,) in below]
        expected = "s" if any(v is None for v in values) else f"{sum(values):,}"
        assert cells[(district, "below_60_persons_in_force")] == expected, district
    assert "with no change in anyone's kidneys" in report


def test_sensitivity_shows_the_default_beside_estimates_counted(con, report):
    cells = {(d, c): t for d, c, t in parse(report).cells["table-sensitivity"]}
    tested = published_total(con, "district_ckd_prevalence")["persons_tested"]
    added = rows(
        con,
        "select persons_tested_added from published.district_estimated_acr_sensitivity "
        "where period = ? and district_code = 'ALL'",
        [PERIOD],
    )[0][0]
    assert cells[("persons_tested", "persons_tested_default")] == f"{tested:,}"
    shown = cells[("persons_tested", "persons_tested_with_estimates")]
    assert shown == ("s" if added is None else f"{tested + added:,}")


def test_maps_colour_the_published_values_and_hatch_the_blanks(con, report):
    """The coverage map: a district whose published share is blank is hatched and labelled 's';
    the others are coloured by equal steps between the lowest and highest published share (the
    lowest in the first colour, the highest in the last)."""
    svg = re.search(r'<svg class="map" id="map-coverage".*?</svg>', report, re.S).group(0)
    kinds, fills = {}, {}
    for kind, code, fill in re.findall(
        r'<g id="map-coverage-(district|blanked)-([^"]+)">\s*<path d="[^"]*"[^>]*style="fill: ([^;]+);',
        svg,
    ):
        kinds[code], fills[code] = kind, fill
    published = {
        d: v
        for d, v in rows(
            con,
            "select district_code, share_with_both from "
            "published.district_screening_coverage where period = ? and "
            "district_code like 'WF%'",
            [PERIOD],
        )
    }
    assert set(fills) == set(published)
    blank = [d for d, v in published.items() if v is None]
    assert blank, "the samples have a district whose coverage is suppressed"
    for d in blank:
        assert kinds[d] == "blanked" and fills[d].startswith("url(#map-coverage-h")
        assert f">{d} s</text>" in svg
    shown = {d: v for d, v in published.items() if v is not None}
    lowest, highest = min(shown, key=shown.get), max(shown, key=shown.get)
    assert fills[lowest] == "#fde725" and fills[highest] == "#440154"


def test_a_count_blanked_in_coverage_shows_as_suppressed_beside_it(warehouse):
    """persons_with_diabetes and with_acr of the expected-cases table are coverage's, blank where
    coverage blanks them even when this table's own counts are all published: 's', never '–'."""
    mem = restricted_copy(warehouse)
    mem.execute(
        "update published.district_screening_coverage set with_acr = null "
        "where period = ? and district_code = 'WF01'",
        [PERIOD],
    )
    mem.execute(
        "update published.district_undetected_albuminuria set expected_a2_a3_without_acr = null, "
        "suppression = '' where period = ? and district_code = 'WF01'",
        [PERIOD],
    )
    cells = {
        (d, c): t for d, c, t in parse(build_report_html(mem, PERIOD)).cells["table-undetected"]
    }
    assert cells[("WF01", "expected_a2_a3_without_acr")] == "s"
    assert cells[("WF01", "share_a2_a3_of_tested")] == "s"
