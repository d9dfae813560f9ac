"""The identifier screen: refuse a file that carries direct identifiers, before anything is stored.

A lab extract for surveillance carries a pseudonymous token, a birth year, sex and a district:
never a person's name, full date of birth, phone number, e-mail address, national ID number or
street address. The screen looks at every column name of a file and at a sample of its values
(the first :data:`SAMPLE_FIRST` rows, then every :data:`SAMPLE_EVERY`-th, at most
:data:`SAMPLE_MAX`) and reports each column that looks like one of these, with the pattern found.
A FHIR export is screened by element path (``Patient.name``, ``Observation.subject.display``)
and by the values of every text element. The sample is judged in bulk: the patterns run as
polars regular expressions over the printable-ASCII values and :func:`value_patterns` judges
any other value, with the same findings as judging every value by itself
(tests/unit/test_identifiers_vectorised.py).

The screen never copies a value into its findings: messages name the column, the pattern and
line numbers only, because they are stored in the ledger and the run manifest.

What the screen is not: a proof that a file holds no identifier. It catches the usual ways an
over-broad export goes wrong (an extra column, a mapping to the wrong column, a token field
filled with a national ID, a contact block in a FHIR Patient). The patterns are common practice
for data-minimisation checks; the thresholds below are this project's choice.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import itertools
import re
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import polars as pl

#: What each pattern means, as written in messages.
PATTERNS = {
    "person_name": "person names",
    "birth_date": "full dates of birth",
    "phone": "phone numbers",
    "email": "e-mail addresses",
    "national_id": "national-ID-like numbers",
    "street_address": "street addresses",
    "record_number": "medical record numbers",
}

#: The screen reads every row of a file: an identifier in the last row of a million is found
#: as surely as one in the first (these names are kept for the readers that ask per row).
SAMPLE_EVERY_ROW = True
#: The patterns judged from values (a record number is known by its column's name only).
_VALUE_PATTERNS = tuple(p for p in PATTERNS if p != "record_number")

# --------------------------------------------------------------------------- column names

#: Column names (normalised to snake_case words) that say what the column holds.
_NAME_RULES: list[tuple[str, re.Pattern[str]]] = [
    (
        "person_name",
        re.compile(
            r"^(?:patient|person|client|subject|full|display)?_?names?$"
            r"|(?:^|_)(?:first|last|given|family|middle|maiden|birth|sur|fore|christian|full|patient"
            r"|person)_?names?(?:$|_)"
            r"|(?:^|_)(?:surname|forenames?|initials)(?:$|_)"
            # the same words in the other languages labs of the region export in (French, German,
            # Spanish, Dutch): common practice for data-minimisation screens
            r"|(?:^|_)(?:nom|prenom|nom_de_famille|nachname|vorname|familienname|apellidos?|nombre"
            r"|naam|achternaam|voornaam)(?:$|_)"
        ),
    ),
    (
        "birth_date",
        re.compile(
            r"(?:^|_)(?:dob|birth_?date|birth_?day|date_of_birth|birth_dt|born_on|born_date"
            r"|date_naissance|date_de_naissance|ddn|geburtsdatum|geb_datum|fecha_(?:de_)?nacimiento"
            r"|geboortedatum)(?:$|_)"
        ),
    ),
    (
        "email",
        re.compile(
            r"(?:^|_)(?:e_?mail|e_?mail_address|mail_address|courriel|correo"
            r"|correo_electronico)(?:$|_)"
        ),
    ),
    (
        "phone",
        re.compile(
            r"(?:^|_)(?:phone|telephone|tel|tel_no|mobile|mobile_no|cellphone|cell_phone|fax"
            r"|contact_number|phone_number|telefon|telefoon|telefono|telephone_portable|portable"
            r"|handy|movil|celular|gsm)(?:$|_)"
        ),
    ),
    (
        "national_id",
        re.compile(
            r"(?:^|_)(?:ssn|national_?id|national_?number|national_?no|national_insurance"
            r"|social_security|passport(?:_no|_number)?|id_card|identity_card|identity_number"
            r"|personal_?id|personal_?number|personal_code|citizen_?id|insurance_number"
            r"|health_?card|health_number|tax_?id)(?:$|_)"
        ),
    ),
    (
        "street_address",
        re.compile(
            r"(?:^|_)(?:address|addr|street|address_line\d?|house_number|house_no|postcode|post_code"
            r"|postal_code|zip|zip_code|zipcode|adresse|direccion|strasse|rue|calle|adres"
            r"|postleitzahl|plz|code_postal|codigo_postal|postcode_nl)(?:$|_)"
        ),
    ),
    (
        "record_number",
        re.compile(
            r"(?:^|_)(?:mrn|urn|medical_record(?:_number|_no|_nr)?|record_(?:number|no|nr)|chart_(?:number|no)"
            r"|hospital_(?:number|no|id)|patient_(?:number|no|nr)|case_(?:number|no)|unit_number"
            r"|dossier|dossiernummer|patientennummer|numero_(?:de_)?(?:dossier|historia)"
            r"|historia_clinica)(?:$|_)"
        ),
    ),
]

#: FHIR element paths (resource type dropped, list positions ignored) that are identifiers by
#: definition, matched at the end of the path so that contained resources are caught too.
_FHIR_PATH_RULES: list[tuple[str, re.Pattern[str]]] = [
    ("person_name", re.compile(r"(?:^|\.)name(?:\.(?:family|given|text|prefix|suffix))?$")),
    ("person_name", re.compile(r"(?:^|\.)subject\.display$")),
    ("phone", re.compile(r"(?:^|\.)telecom\.value$")),
    ("street_address", re.compile(r"(?:^|\.)address\.(?:line|text|postalCode)$")),
]


def normalise_column(name: str) -> str:
    """``PatientName`` / ``patient-name`` / ``Patient Name`` -> ``patient_name``."""
    spaced = re.sub(r"([a-z0-9])([A-Z])", r"\1_\2", name.strip())
    spaced = re.sub(r"([A-Z]+)([A-Z][a-z])", r"\1_\2", spaced)
    return re.sub(r"[^a-z0-9]+", "_", spaced.lower()).strip("_")


def column_name_pattern(name: str) -> str | None:
    """The pattern a column's name announces, or None."""
    norm = normalise_column(name)
    for pattern, rule in _NAME_RULES:
        if rule.search(norm):
            return pattern
    return None


# --------------------------------------------------------------------------- values

_EMAIL = re.compile(r"[A-Za-z0-9._%+-]+@[A-Za-z0-9-]+(?:\.[A-Za-z0-9-]+)*\.[A-Za-z]{2,}")
#: International form (+ and a country code) or a national form with a leading 0 and separators.
_PHONE = re.compile(
    r"\+[1-9][0-9 ().-]{6,20}"  # international: + and a country code
    r"|\(?0\d{1,4}\)?[ .-]?\d{3,4}[ .-]\d{3,4}"  # national, a leading 0 and separators
    r"|\(\d{2,5}\) ?\d{3,4}[ .-]?\d{3,4}"  # an area code in brackets
    r"|\d{3,4}[ .-]\d{3}[ .-]\d{3,4}"  # local groups of 3-4 digits
)
_NATIONAL_ID = re.compile(
    r"\d{3}-\d{2}-\d{4}"  # 3-2-4 digit groups
    r"|\d{6}[-+]\d{4}"  # six digits (a birth date), a sign, four digits
    r"|\d{3} \d{3} \d{3,4}"  # 9 or 10 digits in groups of three
    r"|\d{3}\.\d{3}\.\d{3}-\d{2}"  # 3.3.3-2
    r"|[A-Z]{2} ?\d{2} ?\d{2} ?\d{2} ?[A-D]"  # two letters, six digits, a letter
)
_STREET_WORDS = (
    "Street|St|Road|Rd|Lane|Ln|Avenue|Ave|Way|Drive|Dr|Close|Court|Ct|Place|Pl|Crescent|"
    "Terrace|Gardens|Row|Square|Sq|Hill|Boulevard|Blvd|Walk|Mews|Parade|Grove"
)
_STREET = re.compile(rf"\b\d{{1,5}}[A-Za-z]?,? (?:[A-Z][a-z]+ ){{1,3}}(?:{_STREET_WORDS})\b\.?")
_NAME_TITLE = re.compile(
    r"[A-Z][a-z'’-]+(?: [A-Z][a-z'’-]+){1,3}|[A-Z][a-z'’-]+, [A-Z][a-z'’-]+(?: [A-Z][a-z'’-]+)?"
)
_NAME_UPPER = re.compile(
    r"[A-Z]{2,}(?: [A-Z]{2,}){1,3}|[A-Z]{2,}, [A-Z]{2,}"
    r"|[A-Z][A-Z'’-]+, [A-Z][a-z'’-]+(?: [A-Z][a-z'’-]+)?"
)  # SURNAME, Given
#: Words of lab reports and places that make a two-word capitalised value not a name.
_NOT_NAME_WORDS = {
    "serum",
    "plasma",
    "urine",
    "blood",
    "whole",
    "random",
    "fasting",
    "spot",
    "total",
    "ratio",
    "creatinine",
    "cystatin",
    "albumin",
    "protein",
    "glucose",
    "haemoglobin",
    "hemoglobin",
    "glycated",
    "estimated",
    "see",
    "note",
    "not",
    "done",
    "test",
    "sample",
    "result",
    "lab",
    "laboratory",
    "hospital",
    "general",
    "reference",
    "district",
    "north",
    "south",
    "east",
    "west",
    "upper",
    "lower",
    "new",
    "old",
    "final",
    "amended",
    "corrected",
    "cancelled",
    "preliminary",
    "entered",
    "error",
    "unknown",
    "other",
    "female",
    "male",
    "nd",
    "na",
}
_DATE_FORMS = (
    re.compile(r"(\d{4})-(\d{1,2})-(\d{1,2})(?:[T ][\d:.+Z-]*)?"),
    re.compile(r"(\d{1,2})[./-](\d{1,2})[./-](\d{4})"),
    re.compile(r"(\d{4})(\d{2})(\d{2})"),
)


def _full_date(value: str) -> bool:
    """A whole calendar date (day, month and year), in ISO, d/m/y or yyyymmdd form."""
    for i, form in enumerate(_DATE_FORMS):
        m = form.fullmatch(value)
        if not m:
            continue
        a, b, c = (int(g) for g in m.groups())
        year, month, day = (a, b, c) if i != 1 else (c, b, a)
        if i == 1 and b > 12:  # m/d/y
            month, day = a, b
        if not 1880 <= year <= 2100:
            return False
        try:
            dt.date(year, month, day)
        except ValueError:
            return False
        return True
    return False


def _digits(value: str) -> int:
    return sum(ch.isdigit() for ch in value)


def _looks_like_name(value: str) -> bool:
    if not (_NAME_TITLE.fullmatch(value) or _NAME_UPPER.fullmatch(value)):
        return False
    words = re.split(r"[ ,]+", value.lower())
    return not any(w in _NOT_NAME_WORDS for w in words)


def value_patterns(value: str) -> set[str]:
    """The patterns one value matches (birth dates are judged with the column, not here)."""
    found: set[str] = set()
    if "@" in value and _EMAIL.search(value):
        found.add("email")
    if any(ch.isdigit() for ch in value):
        if _PHONE.fullmatch(value) and 8 <= _digits(value) <= 15:
            found.add("phone")
        if _NATIONAL_ID.fullmatch(value):
            found.add("national_id")
        if _STREET.search(value):
            found.add("street_address")
    elif " " in value and _looks_like_name(value):
        found.add("person_name")
    return found


# --------------------------------------------------------------------------- findings


@dataclass(frozen=True)
class Finding:
    """One column that looks like a direct identifier."""

    column: str
    pattern: str
    evidence: str
    allowed_reason: str | None = None
    #: the column's usual content (an over-broad export: the file is refused); False: a few
    #: values only, and the rows that hold them are quarantined (``lines``)
    whole_column: bool = True
    #: every line with a matching value (for a finding of a few values)
    lines: tuple[int, ...] = ()

    def describe(self) -> str:
        return f"column {self.column!r}: {PATTERNS[self.pattern]} ({self.evidence})"


def sampled(index: int) -> bool:
    """Whether the ``index``-th row (0-based) of a file is screened: every row is."""
    return True


#: Printable ASCII only: for such a value Python's ``re`` and the Rust regex engine behind polars
#: agree on every pattern here (``\\d``, ``\\b``, ``isdigit`` and ``strip`` differ only outside
#: ASCII), so the patterns run vectorised over the sample, in the engine's ASCII mode (``(?-u)``,
#: ten times faster than its Unicode classes); any other value (an accent, a tab, a control
#: character) is judged by :func:`value_patterns` itself.
_PRINTABLE_ASCII = r"\A[\x20-\x7E]*\z"


def _ascii(pattern: re.Pattern[str] | str, whole: bool = False) -> str:
    """``pattern`` for polars over printable-ASCII values; ``whole``: what ``fullmatch`` does.
    The one non-ASCII character of the patterns (the typographic apostrophe of names) cannot
    occur in such a value, and ASCII mode refuses it, so it is left out.
    """
    text = (pattern if isinstance(pattern, str) else pattern.pattern).replace("’", "")
    return rf"(?-u)\A(?:{text})\z" if whole else f"(?-u){text}"


_NOT_NAME = (
    r"(?:\A|[ ,])(?:" + "|".join(re.escape(w) for w in sorted(_NOT_NAME_WORDS)) + r")(?:[ ,]|\z)"
)


def _vector_flags(value: pl.Expr, birth: pl.Expr) -> list[pl.Expr]:
    """One boolean per pattern for printable-ASCII stripped values: the shapes of
    :func:`value_patterns` (and of :func:`_full_date` in birth columns) as polars expressions.
    Three are candidates only, refined on the few rows that have them (:func:`_refine`): a
    phone number's digit count, a name's words, a birth date's calendar.
    """
    digit = value.str.contains(r"(?-u)[0-9]")
    name = value.str.contains(_ascii(_NAME_TITLE, whole=True)) | value.str.contains(
        _ascii(_NAME_UPPER, whole=True)
    )
    dated = pl.any_horizontal(
        [value.str.contains(_ascii(form, whole=True)) for form in _DATE_FORMS]
    )
    return [
        value.str.contains(_ascii(_EMAIL)).alias("email"),
        (digit & value.str.contains(_ascii(_PHONE, whole=True))).alias("phone"),
        (digit & value.str.contains(_ascii(_NATIONAL_ID, whole=True))).alias("national_id"),
        (digit & value.str.contains(_ascii(_STREET))).alias("street_address"),
        (~digit & value.str.contains(" ", literal=True) & name).alias("person_name"),
        (birth & dated).alias("birth_date"),
    ]


def _refine(fast: pl.DataFrame, places: frozenset[str] = frozenset()) -> pl.DataFrame:
    """Settle the candidate flags of :func:`_vector_flags` on the rows that carry them."""
    value = pl.col("value")
    checks = {
        "phone": value.str.count_matches(r"(?-u)[0-9]").is_between(8, 15),
        # a place name of the region's config (a district) is not a person's name
        "person_name": ~value.str.to_lowercase().str.contains(_ascii(_NOT_NAME))
        & ~value.is_in(list(places)),
    }
    for flag, check in checks.items():
        candidates = fast.filter(pl.col(flag))
        if candidates.height:
            failed = candidates.filter(~check)["seq"]
            fast = fast.with_columns(pl.col(flag) & ~pl.col("seq").is_in(failed))
    candidates = fast.filter(pl.col("birth_date"))
    if candidates.height:  # the few date-shaped values of a birth column: a real calendar date?
        failed = candidates.filter(pl.Series([not _full_date(v) for v in candidates["value"]]))[
            "seq"
        ]
        fast = fast.with_columns(pl.col("birth_date") & ~pl.col("seq").is_in(failed))
    return fast


def sampled_mask(index: pl.Expr) -> pl.Expr:
    """:func:`sampled` as a polars expression over 0-based row indexes: every row."""
    return index >= 0


@dataclass
class _Column:
    """What the sample of one column showed: its non-empty values, and per pattern the number
    of matching values with the first line numbers, and how many distinct name-like values.
    """

    values: int = 0
    hits: dict[str, tuple[int, list[int]]] = field(
        default_factory=dict
    )  # pattern -> (count, first lines)
    names: int = 0  # distinct name-like values, counted up to 1000


_VALUES_SCHEMA = {"key": pl.Int64, "line": pl.Int64, "value": pl.String, "birth": pl.Boolean}


def _judge(
    values: pl.DataFrame, places: frozenset[str] = frozenset()
) -> tuple[dict[int, _Column], pl.DataFrame]:
    """Judge values given in file order as columns ``key`` (the column), ``line``, ``value``
    (as read) and ``birth`` (a birth column): a :class:`_Column` per key with a non-empty
    value, and the matching values' ``key``, ``line`` and one boolean per pattern.
    The same as running :func:`value_patterns` on every value, in bulk.

    Every row of a file is screened, and its values repeat (codes, units, dates, statuses, a
    person's several results), so each distinct value is judged once and only the few that
    match are joined back to their lines.
    """
    values = values.with_row_index("seq").filter(pl.col("value") != "")
    distinct = values.select("value", "birth").unique()
    ascii_ = pl.col("value").str.contains(_PRINTABLE_ASCII)
    fast = (distinct.filter(ascii_).with_row_index("seq")
            .with_columns(pl.col("value").alias("raw"), pl.col("value").str.strip_chars(" ")))  # fmt: skip
    blanks = fast.filter(pl.col("value") == "")["raw"].to_list()
    fast = _refine(fast.filter(pl.col("value") != "").with_columns(_vector_flags(pl.col("value"), pl.col("birth"))),
                   places)  # fmt: skip
    slow_rows = []
    for raw, birth in distinct.filter(~ascii_).iter_rows():
        value = raw.strip()
        if not value:
            blanks.append(raw)
            continue
        found = value_patterns(value)
        if birth and _full_date(value):
            found.add("birth_date")
        if value in places:
            found.discard("person_name")
        slow_rows.append((raw, value, birth, *(p in found for p in _VALUE_PATTERNS)))
    judged = fast.select("raw", "value", "birth", *_VALUE_PATTERNS)
    if slow_rows:
        judged = pl.concat([judged, pl.DataFrame(slow_rows, schema=judged.schema, orient="row")])
    kept = values.filter(~pl.col("value").is_in(blanks)) if blanks else values
    out = {key: _Column(n) for key, n in kept.group_by("key").len().iter_rows()}
    matched = judged.filter(pl.any_horizontal(*_VALUE_PATTERNS))  # usually none
    hits = (kept.select("seq", "key", "line", pl.col("value").alias("raw"), "birth")
            .join(matched, on=["raw", "birth"], how="inner").sort("seq"))  # fmt: skip
    if hits.height:
        summary = hits.group_by("key").agg(
            *(pl.col(p).sum().alias(f"{p}:n") for p in _VALUE_PATTERNS),
            *(
                pl.col("line").filter(pl.col(p)).head(3).alias(f"{p}:lines")
                for p in _VALUE_PATTERNS
            ),
            pl.col("value").filter(pl.col("person_name")).n_unique().alias("names"),
        )
        for r in summary.iter_rows(named=True):
            col = out[r["key"]]
            col.hits = {p: (r[f"{p}:n"], r[f"{p}:lines"]) for p in _VALUE_PATTERNS if r[f"{p}:n"]}
            col.names = min(r["names"], 1000)
    return out, hits.select("key", "line", *_VALUE_PATTERNS)


#: A pattern is the column's usual content (the file is refused) when at least this share of
#: its non-empty values match. One e-mail address, street address or full birth date is enough;
#: phone and ID numbers and names must be the column's usual content (specimen numbers and test
#: names look alike). Fewer matching values are still flagged: their rows are quarantined.
_MIN_SHARE = {"email": 0.0, "street_address": 0.0, "birth_date": 0.0,
              "phone": 0.5, "national_id": 0.5, "person_name": 0.5, "record_number": 0.5}  # fmt: skip


def _column_findings(
    column: str, col: _Column, hits: pl.DataFrame | None = None, key: int | None = None
) -> list[Finding]:
    """A finding per pattern with any matching value: of the whole column when the share of
    :data:`_MIN_SHARE` is met, else of the few rows that hold one (``hits``: their lines).
    Repeated names count as names: a person has several results, so a column of names
    repeats them.
    """
    out = []
    for pattern in PATTERNS:
        count, lines = col.hits.get(pattern, (0, []))
        if not count:
            continue
        where = ", ".join(str(n) for n in lines[:3])
        evidence = f"{count} of {col.values} values, line {where}" + (" ..." if count > 3 else "")
        whole = count >= _MIN_SHARE[pattern] * col.values
        rows: tuple[int, ...] = ()
        if not whole and hits is not None:
            rows = tuple(
                hits.filter((pl.col("key") == key) & pl.col(pattern))["line"]
                .unique()
                .sort()
                .to_list()
            )
        out.append(Finding(column, pattern, evidence, whole_column=whole, lines=rows))
    return out


def _name_findings(header: Sequence[str]) -> tuple[list[Finding], set[str]]:
    findings = []
    for name in header:
        pattern = column_name_pattern(name)
        if pattern:
            findings.append(Finding(name, pattern, "column name"))
    return findings, {f.column for f in findings}


def screen_table(header: Sequence[str], rows: Iterable[tuple[int, Sequence[str]]],
                 birth_columns: Iterable[str] = (), places: Iterable[str] = ()) -> list[Finding]:  # fmt: skip
    """Findings of a delimited file: its ``header`` and sampled ``rows`` as (line, fields).

    ``birth_columns`` are the columns mapped to the birth year: a full date there is a date of
    birth whatever the column is called. Fields beyond the header are screened as well (they
    are kept in the raw text of a rejected row).
    """
    lines, positions, values = [], [], []
    for line, fields in rows:
        for i, value in enumerate(fields):
            if value:
                lines.append(line)
                positions.append(i)
                values.append(value)
    frame = pl.DataFrame({"line": lines, "position": positions, "value": values},
                         schema={"line": pl.Int64, "position": pl.Int64, "value": pl.String})  # fmt: skip
    return screen_values(header, frame, birth_columns, places)


def screen_values(
    header: Sequence[str],
    values: pl.DataFrame,
    birth_columns: Iterable[str] = (),
    places: Iterable[str] = (),
) -> list[Finding]:
    """:func:`screen_table` with the sampled fields as a frame in sample order: ``line``,
    ``position`` (0-based field index, beyond the header too) and ``value`` as read.
    """
    findings, flagged = _name_findings(header)
    births = set(birth_columns) | {
        h for h in header if re.search(r"birth|born|dob", normalise_column(h))
    }
    birth_positions = [i for i, h in enumerate(header) if h in births]
    judged, hits = _judge(values.select(
        pl.col("position").cast(pl.Int64).alias("key"), pl.col("line").cast(pl.Int64), "value",
        pl.col("position").is_in(birth_positions).alias("birth"),
    ), frozenset(places))  # fmt: skip
    for i, col in sorted(judged.items()):
        name = header[i] if i < len(header) else f"(field {i + 1}, beyond the header)"
        if name in flagged:
            continue
        findings.extend(_column_findings(name, col, hits, i))
    return findings


def _leaves(value: Any, path: str) -> Iterator[tuple[str, str]]:
    if isinstance(value, dict):
        for key, child in value.items():
            if isinstance(key, str):
                yield from _leaves(child, f"{path}.{key}")
    elif isinstance(value, list):
        for child in value:
            yield from _leaves(child, path)
    elif isinstance(value, str):
        yield path, value


def screen_resources(
    resource_type: str, records: Iterable[tuple[int, Any]], places: Iterable[str] = ()
) -> list[Finding]:
    """Findings of FHIR resources given as (line, parsed JSON), by element path and value.

    A Patient's ``birthDate`` is not judged: the reader keeps its year only and Patient
    records are never stored (see DEVELOPERS.md, Threat model).
    """
    paths: dict[str, int] = {}
    keys: list[int] = []
    lines: list[int] = []
    values: list[str] = []
    path_hits: dict[str, tuple[str, list[int]]] = {}
    for line, record in records:
        if not isinstance(record, dict):
            continue
        for path, value in _leaves(record, resource_type):
            if path == "Patient.birthDate" or not value.strip():
                continue
            relative = path.split(".", 1)[1] if "." in path else path
            rule = next((p for p, r in _FHIR_PATH_RULES if r.search(relative)), None)
            if rule:
                path_hits.setdefault(path, (rule, []))[1].append(line)
            else:
                keys.append(paths.setdefault(path, len(paths)))
                lines.append(line)
                values.append(value)
    judged, hits = _judge(pl.DataFrame({"key": keys, "line": lines, "value": values, "birth": [False] * len(keys)},
                                       schema=_VALUES_SCHEMA), frozenset(places))  # fmt: skip
    by_path = {path: (judged[k], k) for path, k in paths.items() if k in judged}
    findings = []
    for path, (pattern, lines) in sorted(path_hits.items()):
        where = ", ".join(str(n) for n in lines[:3])
        findings.append(
            Finding(
                path, pattern, f"element present, line {where}" + (" ..." if len(lines) > 3 else "")
            )
        )
    for path, (col, k) in sorted(by_path.items()):
        findings.extend(_column_findings(path, col, hits, k))
    return findings


def split_allowed(findings: Iterable[Finding], allowed: Mapping[str, str],
                  aliases: Mapping[str, str] | None = None) -> tuple[list[Finding], list[Finding]]:  # fmt: skip
    """(refused, allowed) findings. ``allowed`` maps a column (or the standard field it is
    mapped to, via ``aliases`` column -> field; or a FHIR path prefix) to the written reason.
    """
    aliases = aliases or {}
    refused, kept = [], []
    for f in findings:
        reason = allowed.get(f.column) or allowed.get(aliases.get(f.column, "\0"))
        if reason is None:
            reason = next(
                (why for key, why in allowed.items() if f.column.startswith(key + ".")), None
            )
        if reason is None:
            refused.append(f)
        else:
            kept.append(Finding(f.column, f.pattern, f.evidence, reason, f.whole_column, f.lines))
    return refused, kept


def refusal_message(path: object, refused: Sequence[Finding], source_id: str) -> str:
    """The held-back message: every column refused, with its pattern; no value is quoted."""
    what = "; ".join(f.describe() for f in refused)
    return (
        f"{path}: refused by the identifier screen, nothing stored: {what}. Ask the lab for an "
        f"extract without direct identifiers, or list the column under allowed_identifier_columns "
        f"in the config of source {source_id!r} with the written reason"
    )


def allowance_note(allowed: Sequence[Finding]) -> str:
    """The ledger note of a file ingested with allowed columns (it reaches the run manifest)."""
    return "identifier screen: " + "; ".join(
        f"{f.describe()} allowed by the source config: {f.allowed_reason}" for f in allowed
    )


def quarantine_reason(finding: Finding) -> str:
    """The row_fault of a row holding a value that looks like an identifier: the column and
    the pattern, never the value.
    """
    return f"identifier_in_value:field {finding.column!r} holds what looks like {PATTERNS[finding.pattern]}"


def quarantine_note(findings: Sequence[Finding]) -> str:
    """The ledger note of a file some of whose rows were quarantined by the screen."""
    return "identifier screen: rows quarantined, " + "; ".join(
        f"column {f.column!r}: {PATTERNS[f.pattern]} in {len(f.lines)} row(s), line "
        + ", ".join(str(n) for n in f.lines[:3])
        + (" ..." if len(f.lines) > 3 else "")
        for f in findings
    )


# --------------------------------------------------------------------------- file names

_NAME_PARTS = re.compile(r"[_\-. ]+")
_DIGIT_RUN = re.compile(r"\d[\d ().-]*\d")


def file_name_patterns(name: str) -> set[str]:
    """The patterns a file's name matches (its folders and extension left out): an e-mail
    address, a phone-like run of 9 to 15 digits (a date or a month has at most 8), or two
    capitalised words that read as a person's name. A name that matches is stored as its
    hash (:func:`withheld_file_name`), never in clear.
    """
    stem = name.rsplit("/", 1)[-1]
    stem = stem.rsplit(".", 1)[0] if "." in stem else stem
    found: set[str] = set()
    if _EMAIL.search(stem):
        found.add("email")
    for run in _DIGIT_RUN.findall(stem):
        if 9 <= _digits(run) <= 15:
            found.add("phone")
    words = [w for w in _NAME_PARTS.split(stem) if w]
    for a, b in itertools.pairwise(words):
        if (
            a.isalpha()
            and b.isalpha()
            and (
                _looks_like_name(f"{a} {b}")
                or (a.isupper() and len(a) > 1 and _looks_like_name(f"{a}, {b}"))
            )
        ):
            found.add("person_name")
    return found


def withheld_file_name(rel_path: str, month: str | None) -> str:
    """What is stored for a file whose name looks identifying: its folder, the first 16 hex
    digits of the SHA-256 of its path, the extract month read from the name (so that dating
    still works) and its extension.
    """
    folder, _, base = rel_path.rpartition("/")
    suffix = "." + base.rsplit(".", 1)[-1] if "." in base else ""
    digest = hashlib.sha256(rel_path.encode("utf-8")).hexdigest()[:16]
    label = "name-withheld-" + (f"{month}-" if month else "") + digest + suffix
    return f"{folder}/{label}" if folder else label
