"""The identifier screen judges its sample in bulk (polars regexes over printable-ASCII values,
:func:`pipeline.core.identifiers.value_patterns` for any other value): the findings must be those of
judging every value one by one with ``value_patterns`` (and ``_full_date`` in birth columns),
which is how the screen worked before, written here again as the reference.

Outside facts: whether a regular expression matches somewhere (or matches the whole value) does
not depend on the engine for the constructs used here (classes, counted repetition, alternation,
``\\b``), so Python's ``re`` and the Rust regex engine behind polars agree on ASCII text (Rust
``regex`` crate docs, from memory); they differ outside it (``\\d`` and ``str.isdigit`` on other
scripts' digits, ``str.strip`` on U+001C..U+001F; Python docs), which is why such values go
through ``value_patterns``.
"""

from __future__ import annotations

import dataclasses
import re
from dataclasses import dataclass, field

import polars as pl
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.core import identifiers
from pipeline.core.identifiers import _column_findings, _full_date, value_patterns


@dataclass
class _Reference:
    """The per-value screen: one ``value_patterns`` call per sampled value."""

    values: int = 0
    lines: dict[str, list[int]] = field(default_factory=dict)
    names: set[str] = field(default_factory=set)

    def add(self, line: int, value: str, birth: bool) -> None:
        value = value.strip()
        if not value:
            return
        self.values += 1
        found = value_patterns(value)
        if birth and _full_date(value):
            found.add("birth_date")
        for pattern in found:
            self.lines.setdefault(pattern, []).append(line)
        if "person_name" in found and len(self.names) < 1000:
            self.names.add(value)

    def summary(self) -> identifiers._Column:
        hits = {p: (len(v), v[:3]) for p, v in self.lines.items()}
        return identifiers._Column(self.values, hits, len(self.names))


def reference_screen(header, rows, births) -> list[identifiers.Finding]:
    findings, flagged = identifiers._name_findings(header)
    births = set(births) | {
        h for h in header if re.search(r"birth|born|dob", identifiers.normalise_column(h))
    }
    columns: dict[int, _Reference] = {}
    for line, fields in rows:
        for i, value in enumerate(fields):
            if value:
                name = header[i] if i < len(header) else None
                columns.setdefault(i, _Reference()).add(line, value, name in births)
    for i, col in sorted(columns.items()):
        name = header[i] if i < len(header) else f"(field {i + 1}, beyond the header)"
        if name not in flagged:
            for f in _column_findings(name, col.summary()):
                # a finding of a few values lists every line that holds one (quarantined)
                lines = () if f.whole_column else tuple(sorted(set(col.lines[f.pattern])))
                findings.append(dataclasses.replace(f, lines=lines))
    return findings


#: characters where the two engines could part: digits of other scripts, separators, accents
ALPHABET = list("abcdeJMSTWxyzABCDEFNOQRSTUVXZ0123456789 ,.-+()/@_'%") + [
    "’", "\t", "\x1c", "\x1f", "\xa0", "\u2028", "٣", "²", "é", "Ö", "\x00"]  # fmt: skip
SHAPES = st.sampled_from([
    "+99 5550 100200", "(0123) 456 7890", "01234 567 890", "123-45-6789", "850101-1234", "123 456 789",
    "123.456.789-01", "AB 12 34 56 C", "AB123456C", "12 Mill Lane", "3b, Upper Hill Road", "m.h@example.invalid",
    "Maren Holloway", "HOLLOWAY, MAREN", "Holloway, Maren Ann", "O’Brien Kell", "Serum Creatinine",
    "Alder Bank", "1961-03-14", "14/03/1961", "19610314", "2025-02-29", "31/02/1961", "1879-01-01",
    "1961-03-14T08:00:00Z", "03/14/1961", "1961", "WF-00a1", "+٩٩ 5550 100200", "١٢٣-٤٥-٦٧٨٩",
    "Ann Lee²", " Maren Holloway ", "\x1fMaren Holloway",
])  # fmt: skip
VALUE = st.one_of(st.text(st.sampled_from(ALPHABET), max_size=24), SHAPES,
                  st.builds(lambda a, b: a + b, SHAPES, st.text(st.sampled_from(ALPHABET), max_size=4)))  # fmt: skip

FAST = settings(
    max_examples=300, deadline=None, database=None, suppress_health_check=[HealthCheck.too_slow]
)


@FAST
@given(values=st.lists(VALUE, max_size=12), birth=st.booleans())
def test_bulk_patterns_equal_value_patterns(values, birth):
    frame = pl.DataFrame({"key": [0] * len(values), "line": list(range(len(values))), "value": values,
                          "birth": [birth] * len(values)}, schema=identifiers._VALUES_SCHEMA)  # fmt: skip
    got = identifiers._judge(frame)[0].get(0)
    ref = _Reference()
    for line, value in enumerate(values):
        if value:
            ref.add(line, value, birth)
    if ref.values == 0:
        assert got is None or got.values == 0
    else:
        assert got == ref.summary()


HEADER = ["person_token", "birth_year", "note", "who"]


@FAST
@given(rows=st.lists(st.lists(VALUE, min_size=1, max_size=6), min_size=1, max_size=40))
def test_bulk_screen_gives_the_findings_of_the_per_value_screen(rows):
    # the same findings, word for word (messages are stored in the ledger), beyond the header too
    sample = [(n + 2, r) for n, r in enumerate(rows)]
    assert identifiers.screen_table(HEADER, sample, ["birth_year"]) == reference_screen(
        HEADER, sample, ["birth_year"]
    )


def test_many_name_like_values_are_counted_up_to_a_thousand():
    names = [
        f"Maren Hol{chr(97 + i % 26)}{chr(97 + i // 26 % 26)}{chr(97 + i // 676)}way"
        for i in range(1500)
    ]
    sample = [(n + 2, ["WF-1", "1960", "", v]) for n, v in enumerate(names * 2)]
    assert identifiers.screen_table(HEADER, sample) == reference_screen(HEADER, sample, [])


def test_the_screen_reads_every_row():
    index = pl.Series("i", range(210_000), dtype=pl.Int64)
    mask = pl.select(identifiers.sampled_mask(pl.lit(index))).to_series()
    assert mask.to_list() == [identifiers.sampled(i) for i in range(210_000)]
    assert int(mask.sum()) == 210_000  # no row is skipped: an identifier in row 200,001 is found
