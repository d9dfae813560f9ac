"""Validated settings: the pipeline config, the analyte table, the lab sources and the region.

Everything under ``config/`` is read here, once, into typed objects. A mistake in a file (an
unknown key, a wrong type, a missing file) raises :class:`ConfigError` with one message naming
the file, the key and what was expected; the CLI prints it and exits with code 2.
"""

from __future__ import annotations

import csv
import hashlib
import json
import re
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any, Literal

import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from pipeline.core.errors import ConfigError
from pipeline.core.regions import read_district_shapes

#: Identifiers taken from config end up in SQL as table values or file names: keep them plain.
IDENTIFIER_PATTERN = r"^[a-z][a-z0-9_]{0,62}$"

#: Fields of the standard extract layout (DEVELOPERS.md, Design notes), required and optional.
STANDARD_REQUIRED = (
    "person_token",
    "birth_year",
    "sex",
    "district_code",
    "specimen_id",
    "collected_date",
    "test_code",
    "value",
    "unit",
    "status",
)
STANDARD_OPTIONAL = ("height_cm", "reported_at", "fasting")
STANDARD_FIELDS = STANDARD_REQUIRED + STANDARD_OPTIONAL

FHIR_STATUSES = ("final", "amended", "corrected", "cancelled", "entered-in-error", "preliminary")


#: strftime directives a date column may use (day, month, year; a time part is ignored only
#: when written in the format).
_DATE_DIRECTIVES = set("dmyYbBjHMSIpfzaAeT%")


def check_date_format(value: str | None) -> str | None:
    """``value`` if it is a strftime format that reads a whole date (day, month and year), else
    a ValueError saying what is wrong: a typo such as ``%d/%m/%y%`` or ``dd/mm/yyyy`` would
    otherwise turn every row into ``invalid_date``.
    """
    if value is None:
        return value
    import datetime as dt

    directives = []
    i = 0
    while i < len(value):
        if value[i] == "%":
            if i + 1 >= len(value):
                raise ValueError(f"{value!r} ends with a lone '%'; write e.g. '%d/%m/%Y'")
            directives.append(value[i + 1])
            i += 2
        else:
            i += 1
    unknown = sorted({d for d in directives if d not in _DATE_DIRECTIVES})
    if unknown:
        raise ValueError(
            f"{value!r} uses unknown directive(s) {['%' + d for d in unknown]}; "
            "write e.g. '%d/%m/%Y' (strftime codes)"
        )
    has_day = "d" in directives or "e" in directives or "j" in directives
    has_month = bool({"m", "b", "B"} & set(directives)) or "j" in directives
    has_year = bool({"Y", "y"} & set(directives))
    if not (has_day and has_month and has_year):
        raise ValueError(
            f"{value!r} does not read a whole date (a day, a month and a year); "
            "write e.g. '%d/%m/%Y' or '%Y%m%d' (strftime codes)"
        )
    try:
        sample = dt.date(2026, 3, 14).strftime(value)
        if dt.datetime.strptime(sample, value).date() != dt.date(2026, 3, 14):
            raise ValueError
    except ValueError:
        raise ValueError(
            f"{value!r} does not read back the dates it writes; write e.g. '%d/%m/%Y'"
        ) from None
    return value


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


# --------------------------------------------------------------------------- sources


class FhirOptions(_Strict):
    linkage_identifier_system: str | None = Field(
        default=None,
        description="Patient.identifier system carrying the shared linkage token.",
    )


class SourceConfig(_Strict):
    """One lab source: ``config/sources/<id>.yaml``."""

    id: str = Field(pattern=IDENTIFIER_PATTERN)
    layout: Literal["standard", "delimited", "fhir_ndjson", "parquet"]
    folder: str
    description: str | None = None
    files: str | None = Field(default=None, description="glob of files inside the folder")
    linkage: Literal["shared", "lab_local"] = "shared"
    delimiter: str = ","
    decimal_mark: Literal[".", ","] = "."
    thousands_separator: Literal["", ",", ".", " "] = ""
    encoding: Literal["utf-8", "utf-8-sig", "latin-1", "cp1252"] = "utf-8"
    date_format: str | None = Field(default=None, description="strftime format; ISO 8601 if unset")
    columns: dict[str, str] = Field(default_factory=dict)
    test_codes: dict[str, str] = Field(default_factory=dict)
    status_codes: dict[str, str] = Field(default_factory=dict)
    sex_codes: dict[str, str] = Field(default_factory=dict)
    unit_aliases: dict[str, str] = Field(default_factory=dict)
    #: The lab's own spellings of the fasting flag, mapped to Y or N (Y/N, yes/no, true/false,
    #: 1/0 need no entry).
    fasting_codes: dict[str, Literal["Y", "N"]] = Field(default_factory=dict)
    max_rejection_rate: float | None = Field(default=None, ge=0, le=1)
    #: This source's own limit on the share of rows with an unmapped sex or unit (default:
    #: quality_gate.max_unmapped_share).
    max_unmapped_share: float | None = Field(default=None, ge=0, le=1)
    #: How often the lab sends an extract: monthly (the default), quarterly, or none (sends when
    #: it has results; never reported missing).
    cadence: Literal["monthly", "quarterly", "none"] = "monthly"
    fhir: FhirOptions = Field(default_factory=FhirOptions)
    #: Columns the identifier screen would refuse but that this source may send, each with the
    #: written reason (recorded in the run manifest), e.g. {"birth_year": "year only, reviewed"}.
    allowed_identifier_columns: dict[str, str] = Field(default_factory=dict)
    #: ``required`` (default): a delimited file whose last line has no line end may have been
    #: cut short, and that line is rejected as ``truncated_line``; ``optional``: this lab's
    #: files end without one, and the last line is read as any other.
    last_line_end: Literal["required", "optional"] = "required"

    @field_validator("allowed_identifier_columns")
    @classmethod
    def _reasons_written(cls, value: dict[str, str]) -> dict[str, str]:
        short = sorted(c for c, why in value.items() if len(why.strip()) < 10)
        if short:
            raise ValueError(
                f"each allowed column needs a written reason (10 characters or more): {short}"
            )
        return value

    @field_validator("folder")
    @classmethod
    def _plain_folder(cls, value: str) -> str:
        if value.startswith("/") or ".." in Path(value).parts:
            raise ValueError("must be a subfolder of the inbox (no '/' at the start, no '..')")
        return value

    @field_validator("date_format")
    @classmethod
    def _valid_date_format(cls, value: str | None) -> str | None:
        return check_date_format(value)

    @field_validator("delimiter")
    @classmethod
    def _one_char(cls, value: str) -> str:
        if len(value) != 1:
            raise ValueError("must be a single character, e.g. ',' or ';'")
        return value

    @field_validator("columns")
    @classmethod
    def _known_fields(cls, value: dict[str, str]) -> dict[str, str]:
        unknown = sorted(set(value) - set(STANDARD_FIELDS))
        if unknown:
            raise ValueError(
                f"unknown standard field(s) {unknown}; expected keys among {list(STANDARD_FIELDS)}"
            )
        return value

    @field_validator("status_codes")
    @classmethod
    def _fhir_statuses(cls, value: dict[str, str]) -> dict[str, str]:
        bad = sorted(v for v in value.values() if v not in FHIR_STATUSES)
        if bad:
            raise ValueError(f"maps to {bad}; values must be FHIR statuses {list(FHIR_STATUSES)}")
        return value

    @model_validator(mode="after")
    def _layout_needs(self) -> SourceConfig:
        if self.layout in ("delimited", "parquet"):
            missing = [f for f in STANDARD_REQUIRED if f not in self.columns]
            if missing:
                raise ValueError(
                    f"layout '{self.layout}' needs a 'columns' entry for every required field; "
                    f"missing {missing}"
                )
        elif self.columns:
            raise ValueError(
                f"'columns' is only for layouts 'delimited' and 'parquet', not '{self.layout}'"
            )
        return self

    @property
    def file_glob(self) -> str:
        if self.files:
            return self.files
        return {"fhir_ndjson": "*/Observation.ndjson", "parquet": "*.parquet"}.get(
            self.layout, "*.csv"
        )


# --------------------------------------------------------------------------- pipeline.yaml


class DemoSettings(_Strict):
    period: str = Field(pattern=r"^\d{4}-(0[1-9]|1[0-2])$")


EquationName = Literal[
    "ckd_epi_2021_creatinine",
    "ckd_epi_2009_creatinine",
    "ekfc_creatinine",
    "ckid_u25_creatinine",
]


class MeasureSettings(_Strict):
    adult_equation: EquationName = "ckd_epi_2021_creatinine"
    child_equation: EquationName = "ekfc_creatinine"
    child_equation_with_height: EquationName = "ckid_u25_creatinine"
    use_height_for_children: bool = True
    adult_min_age_years: int = Field(default=18, ge=2, le=25)
    min_age_years: int = Field(default=2, ge=0, le=18)
    hyperfiltration_ml_min_1_73m2: float = Field(default=130, gt=0)
    use_cystatin: bool = True
    combine_same_day_cystatin: bool = True
    acr_300_is_a2: bool = True
    risk_pairing_window_days: int = Field(default=90, gt=0)
    diabetes_hba1c_percent: float = 6.5
    diabetes_hba1c_mmol_mol: float = 48
    diabetes_fasting_glucose_mg_dl: float = 126
    diabetes_fasting_glucose_mmol_l: float = 7.0
    #: confirmed: two abnormal results, on one day from two different tests or on two days (ADA
    #: Standards of Care); single: one abnormal result.
    diabetes_rule: Literal["confirmed", "single"] = "confirmed"


class TrajectorySettings(_Strict):
    baseline_window_days: int = Field(default=90, gt=0)
    decline_thresholds: list[float] = Field(default=[0.30, 0.40, 0.57])
    decline_min_span_days: int = Field(default=28, gt=0)
    kidney_failure_egfr: float = 15
    kidney_failure_min_span_days: int = Field(default=28, gt=0)
    ckd_egfr_below: float = 60
    ckd_acr_at_or_above_mg_g: float = 30
    ckd_min_span_days: int = Field(default=90, gt=0)
    rapid_decline_ml_min_per_year: float = Field(default=5, gt=0)
    rapid_decline_min_values: int = Field(default=3, ge=2)
    rapid_decline_min_span_days: int = Field(default=365, gt=0)
    progression_decline: float = Field(default=0.25, gt=0, lt=1)
    #: Progression must hold over consecutive daily eGFRs spanning this many days (chronicity).
    progression_min_span_days: int = Field(default=90, gt=0)

    @field_validator("ckd_acr_at_or_above_mg_g")
    @classmethod
    def _kdigo_a2(cls, value: float) -> float:
        if value != 30:
            raise ValueError(
                "the CKD-by-albuminuria rule follows the KDIGO A2 category in the unit "
                "reported (30 mg/g, 3 mg/mmol, 30 mg/24 h); this must be 30"
            )
        return value

    @field_validator("decline_thresholds")
    @classmethod
    def _fractions(cls, value: list[float]) -> list[float]:
        if not value or any(not 0 < t < 1 for t in value):
            raise ValueError("each threshold is a fraction between 0 and 1, e.g. 0.40 for 40 %")
        return sorted(value)


class SummarySettings(_Strict):
    window_months: int = Field(default=12, ge=1, le=60)
    standard_population: Literal["who_world_2000_2025"] = "who_world_2000_2025"
    confidence: float = Field(default=0.95, gt=0.5, lt=1)
    drift_months: int = Field(default=6, ge=1, le=24)
    drift_threshold: float = Field(default=0.10, gt=0, lt=1)
    drift_min_results: int = Field(default=30, ge=1)
    age_bands: list[int] = Field(
        default=[0, 5, 10, 15, 20, 25, 30, 35, 40, 45, 50, 55, 60, 65, 70, 75, 80, 85]
    )
    #: Broad age groups of the published age-standardised rate (lower bounds, last open), each a
    #: union of age_bands: the standard weights are summed within each group.
    standardisation_age_bands: list[int] = Field(default=[0, 65, 75])
    #: Expected undetected albuminuria (pipeline/core/undetected.py): age groups of its strata (lower
    #: bounds, last open) and the fewest tested persons a stratum's share may rest on.
    albuminuria_age_bands: list[int] = Field(default=[0, 45, 65, 75])
    albuminuria_min_tested: int = Field(default=10, ge=1)
    #: Equation-change impact (pipeline/core/equation_impact.py): the adult creatinine equation the
    #: one in force is compared with.
    equation_comparison: EquationName = "ckd_epi_2009_creatinine"

    @field_validator("equation_comparison")
    @classmethod
    def _adult_equation(cls, value: str) -> str:
        if value == "ckid_u25_creatinine":
            raise ValueError(
                "equation_comparison must be an adult creatinine equation (CKiD U25 needs a height)"
            )
        return value

    @field_validator("age_bands", "standardisation_age_bands", "albuminuria_age_bands")
    @classmethod
    def _increasing(cls, value: list[int]) -> list[int]:
        if (
            not value
            or value[0] != 0
            or any(b <= a for a, b in zip(value, value[1:], strict=False))
        ):
            raise ValueError("lower bounds must start at 0 and increase, e.g. [0, 5, 10, ...]")
        return value

    @model_validator(mode="after")
    def _broad_groups_are_unions_of_bands(self) -> SummarySettings:
        stray = sorted(set(self.standardisation_age_bands) - set(self.age_bands))
        if stray:
            raise ValueError(
                f"standardisation_age_bands {stray} are not lower bounds of age_bands "
                "(each broad group must be a union of age bands)"
            )
        return self


class DisclosureSettings(_Strict):
    suppress_min: int = Field(default=1, ge=1)
    suppress_max: int = Field(default=10, ge=1)
    #: An age-standardised rate is published only when its district's persons_ckd reaches this.
    standardised_min_events: int = Field(default=20, ge=1)
    #: The least width of the interval a reader can derive for a blanked count from everything
    #: published together (pipeline/stages/disclose/audit.py).
    protection_width: int = Field(default=10, ge=0)


class QualityGateSettings(_Strict):
    max_rejection_rate: float = Field(default=0.05, ge=0, le=1)
    #: A source whose share of rows with a sex or unit value its config does not map is above
    #: this is held back, as for the rejection rate.
    max_unmapped_share: float = Field(default=0.01, ge=0, le=1)
    great_expectations: bool = True
    #: When the quality pages (Great Expectations' rendered HTML of the suites) are built into out/<period>/quality/: on_failure
    #: (only when some batch fails its suite), always, or never.
    quality_pages: Literal["on_failure", "always", "never"] = "on_failure"

    @field_validator("quality_pages", mode="before")
    @classmethod
    def _quality_pages_choice(cls, value: Any) -> Any:
        if value not in ("on_failure", "always", "never"):
            raise ValueError(
                "must be one of on_failure (build the quality pages only when a batch fails), always "
                "or never; YAML reads true/false/yes/no/on/off as booleans, so write the word"
            )
        return value


class RangeSetting(_Strict):
    min: float
    max: float
    source: str

    @model_validator(mode="after")
    def _ordered(self) -> RangeSetting:
        if self.min >= self.max:
            raise ValueError(f"min ({self.min}) must be below max ({self.max})")
        return self


class ScheduleSettings(_Strict):
    cron: str = "0 6 3 * *"  # the 3rd of each month at 06:00
    timezone: str = "UTC"

    @field_validator("cron")
    @classmethod
    def _five_fields(cls, value: str) -> str:
        if len(value.split()) != 5:
            raise ValueError(
                "a cron expression has 5 fields: minute hour day-of-month month day-of-week"
            )
        return value

    @field_validator("timezone")
    @classmethod
    def _known_zone(cls, value: str) -> str:
        from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

        try:
            ZoneInfo(value)
        except (ZoneInfoNotFoundError, ValueError):
            raise ValueError("not an IANA time zone name, e.g. UTC or Europe/Lisbon") from None
        return value


class ExecutionSettings(_Strict):
    executor: Literal["local", "shards", "dask"] = "local"
    shards: int = Field(default=4, ge=1, le=4096)
    dask_workers: int = Field(default=2, ge=1, le=256)
    scheduler_address: str | None = None
    #: DuckDB's memory limit for the warehouse connection; above it DuckDB spills to
    #: <out>/.duckdb_tmp/. Python's own frames (one measure chunk) come on top.
    memory_limit: str = Field(default="1.5GB", pattern=r"^[1-9][0-9]*(\.[0-9]+)?(MB|GB)$")
    #: changed: a file already ingested is hashed again only when its status (inode, size,
    #: times) changed since it was hashed; every_file: every file at every scan (for an inbox on
    #: a file system without a real status-change time, e.g. one formatted FAT or exFAT)
    inbox_hashing: Literal["changed", "every_file"] = "changed"


class CompletenessSettings(_Strict):
    #: A configured source with no new extract for the period (or no inbox folder): warn (name
    #: it and publish) or hold (name it, publish, and exit 1 as for a source held back).
    missing_source: Literal["warn", "hold"] = "warn"


class PipelineConfig(_Strict):
    demo: DemoSettings
    measures: MeasureSettings = Field(default_factory=MeasureSettings)
    trajectories: TrajectorySettings = Field(default_factory=TrajectorySettings)
    summaries: SummarySettings = Field(default_factory=SummarySettings)
    disclosure: DisclosureSettings = Field(default_factory=DisclosureSettings)
    quality_gate: QualityGateSettings = Field(default_factory=QualityGateSettings)
    schedule: ScheduleSettings = Field(default_factory=ScheduleSettings)
    execution: ExecutionSettings = Field(default_factory=ExecutionSettings)
    completeness: CompletenessSettings = Field(default_factory=CompletenessSettings)
    ranges: dict[str, RangeSetting]


# --------------------------------------------------------------------------- analytes.yaml


class UnitFactor(_Strict):
    factor: float = Field(gt=0)
    offset: float = 0.0
    source: str | None = None


class Analyte(_Strict):
    description: str
    loinc: list[str]
    units: dict[str, UnitFactor] = Field(default_factory=dict)
    canonical_unit: str | None = None
    fasting_loinc: list[str] = Field(default_factory=list)
    result_type: Literal["numeric", "ordinal"] = "numeric"
    readings: dict[str, str] = Field(default_factory=dict, description="ordinal spellings")

    @model_validator(mode="after")
    def _canonical_listed(self) -> Analyte:
        if self.result_type == "ordinal":
            if not self.readings or self.units:
                raise ValueError("an ordinal analyte lists 'readings' and no 'units'")
            return self
        if self.canonical_unit is None:
            raise ValueError("a numeric analyte needs 'canonical_unit'")
        unit = self.units.get(self.canonical_unit)
        if unit is None or unit.factor != 1.0 or unit.offset != 0.0:
            raise ValueError(f"canonical unit {self.canonical_unit!r} must be listed with factor 1")
        return self


class AnalyteTable(_Strict):
    analytes: dict[str, Analyte]
    unit_aliases: dict[str, str]

    @model_validator(mode="after")
    def _unique_codes(self) -> AnalyteTable:
        seen: dict[str, str] = {}
        for name, analyte in self.analytes.items():
            for code in analyte.loinc:
                if code in seen:
                    raise ValueError(f"LOINC {code} listed under both {seen[code]} and {name}")
                seen[code] = name
        return self


# --------------------------------------------------------------------------- loading


class Settings(BaseModel):
    """All configuration of one run."""

    model_config = ConfigDict(arbitrary_types_allowed=True, frozen=True)

    config_dir: Path
    pipeline: PipelineConfig
    analytes: AnalyteTable
    sources: list[SourceConfig]
    districts: dict[str, str]  # district_code -> district_name
    population: list[dict[str, Any]]  # rows: district_code, sex, age_band, population

    def source(self, source_id: str) -> SourceConfig:
        for src in self.sources:
            if src.id == source_id:
                return src
        known = ", ".join(s.id for s in self.sources) or "none"
        raise ConfigError(f"unknown source {source_id!r}; configured sources: {known}")


#: What a config value must be, in our words, per kind of validation failure (the kinds are the
#: validation library's error ``type``s; its own wording never reaches a message).
_MUST_BE = {
    "int_type": "must be a whole number",
    "int_parsing": "must be a whole number",
    "int_from_float": "must be a whole number",
    "float_type": "must be a number",
    "float_parsing": "must be a number",
    "finite_number": "must be a finite number",
    "bool_type": "must be true or false",
    "bool_parsing": "must be true or false",
    "string_type": "must be text",
    "list_type": "must be a list",
    "tuple_type": "must be a list",
    "set_type": "must be a list",
    "dict_type": "must be a mapping of keys to values",
    "model_type": "must be a mapping of keys to values",
    "model_attributes_type": "must be a mapping of keys to values",
    "date_type": "must be a date (YYYY-MM-DD)",
    "date_parsing": "must be a date (YYYY-MM-DD)",
    "date_from_datetime_parsing": "must be a date (YYYY-MM-DD)",
}
#: Bounds: the error kind, the key of its limit, and how the limit reads.
_BOUNDS = {
    "greater_than": ("gt", "must be greater than {}"),
    "greater_than_equal": ("ge", "must be at least {}"),
    "less_than": ("lt", "must be less than {}"),
    "less_than_equal": ("le", "must be at most {}"),
    "multiple_of": ("multiple_of", "must be a multiple of {}"),
    "string_too_short": ("min_length", "must be at least {} characters long"),
    "string_too_long": ("max_length", "must be at most {} characters long"),
    "too_short": ("min_length", "must have at least {} entries"),
    "too_long": ("max_length", "must have at most {} entries"),
}
#: Parts of an error's location that name a branch of a type (``int``, ``list[str]``,
#: ``function-after[...]``), not a key of the file.
_TYPE_TAG = re.compile(r"^(?:[a-z]+(?:-[a-z]+)*\[.*\]|str|int|float|bool|none|list|dict)$")


def _shown(value: Any) -> str:
    """A config value as a reader of the YAML file would recognise it."""
    if value is None:
        return "an empty value"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, dict):
        return "a mapping"
    if isinstance(value, list | tuple):
        return "a list"
    return repr(value)


def _reason(item: Mapping[str, Any]) -> str:
    """One validation failure as a sentence of our own (never the library's message)."""
    kind, ctx = item.get("type", ""), item.get("ctx") or {}
    got = f", got {_shown(item['input'])}" if "input" in item else ""
    if kind == "missing":
        return "required key is missing"
    if kind == "extra_forbidden":
        return "unknown key (check its spelling against DEVELOPERS.md)"
    if kind in ("value_error", "assertion_error"):
        # our own validators' words: the message of the exception they raised, and the value as
        # these messages have always shown it
        error = ctx.get("error")
        text = str(error) if error is not None else ""
        if not text:
            return f"has a value that is not accepted here{got}"
        value = item.get("input")
        return text + ("" if isinstance(value, dict | list) else f" (got {value!r})")
    if kind in _MUST_BE:
        return _MUST_BE[kind] + got
    if kind in ("literal_error", "enum"):
        return f"must be {ctx.get('expected', 'one of the listed values')}{got}"
    if kind in _BOUNDS:
        limit, words = _BOUNDS[kind]
        value = ctx.get(limit, "the limit")
        return words.format(f"{value:g}" if isinstance(value, float) else value) + got
    if kind == "string_pattern_mismatch":
        return f"does not have the expected form (pattern {ctx.get('pattern', '?')}){got}"
    return f"has a value that is not accepted here{got}"


def _key(loc: Sequence[Any]) -> str:
    """An error's location as the key path of the file: ``summaries.age_bands[2]``."""
    key = ""
    for part in loc:
        if isinstance(part, int):
            key += f"[{part}]"
        elif not _TYPE_TAG.match(str(part)):
            key += ("." if key else "") + str(part)
    return key or "(top level)"


def _describe_errors(path: Path, error: ValidationError) -> str:
    lines: list[str] = []
    for item in error.errors(include_url=False):
        line = f"{path}: key '{_key(item['loc'])}': {_reason(item)}"
        if line not in lines:
            lines.append(line)
    return "\n".join(lines)


def _read_yaml(path: Path) -> Any:
    if not path.is_file():
        raise ConfigError(f"{path}: file not found")
    try:
        return yaml.safe_load(path.read_text(encoding="utf-8"))
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f" line {mark.line + 1}" if mark else ""
        raise ConfigError(
            f"{path}:{where} not valid YAML: {getattr(exc, 'problem', exc)}"
        ) from None
    except UnicodeDecodeError as exc:
        raise ConfigError(f"{path}: not UTF-8 text ({exc.reason})") from None


def _parse(model: type[BaseModel], path: Path) -> Any:
    data = _read_yaml(path)
    if not isinstance(data, dict):
        raise ConfigError(f"{path}: expected a mapping of keys to values at the top level")
    try:
        return model.model_validate(data)
    except ValidationError as exc:
        raise ConfigError(_describe_errors(path, exc)) from None


def load_source(path: Path) -> SourceConfig:
    """Read and validate one source config file."""
    source = _parse(SourceConfig, path)
    if source.id != path.stem:
        raise ConfigError(
            f"{path}: key 'id': is {source.id!r} but the file name says {path.stem!r}"
        )
    return source


def _read_region(config_dir: Path) -> tuple[dict[str, str], list[dict[str, Any]]]:
    districts_path = config_dir / "regions" / "districts.csv"
    population_path = config_dir / "regions" / "population.csv"
    for path in (districts_path, population_path):
        if not path.is_file():
            raise ConfigError(f"{path}: file not found")
    with districts_path.open(encoding="utf-8", newline="") as fh:
        rows = list(csv.DictReader(fh))
    if not rows or set(rows[0]) != {"district_code", "district_name"}:
        raise ConfigError(f"{districts_path}: expected columns district_code,district_name")
    districts = {}
    for line, row in enumerate(rows, start=2):
        code = row["district_code"].strip()
        if not re.fullmatch(r"[A-Za-z0-9_-]{1,16}", code):
            raise ConfigError(
                f"{districts_path}:{line}: district_code {code!r} is not a plain code"
            )
        districts[code] = row["district_name"].strip()
    with population_path.open(encoding="utf-8", newline="") as fh:
        prow = list(csv.DictReader(fh))
    expected = {"district_code", "sex", "age_band", "population"}
    if not prow or set(prow[0]) != expected:
        raise ConfigError(f"{population_path}: expected columns {','.join(sorted(expected))}")
    population = []
    for line, row in enumerate(prow, start=2):
        if row["district_code"] not in districts:
            raise ConfigError(
                f"{population_path}:{line}: district_code {row['district_code']!r} "
                f"is not in {districts_path.name}"
            )
        if row["sex"] not in ("F", "M"):
            raise ConfigError(f"{population_path}:{line}: sex must be F or M, got {row['sex']!r}")
        try:
            count = int(row["population"])
        except ValueError:
            raise ConfigError(
                f"{population_path}:{line}: population must be a whole number, got {row['population']!r}"
            ) from None
        population.append({**row, "population": count})
    return districts, population


def load_settings(config_dir: Path | str = "config") -> Settings:
    """Read and validate everything under ``config_dir``."""
    config_dir = Path(config_dir)
    if not config_dir.is_dir():
        raise ConfigError(f"{config_dir}: config folder not found")
    pipeline = _parse(PipelineConfig, config_dir / "pipeline.yaml")
    analytes = _parse(AnalyteTable, config_dir / "analytes.yaml")
    numeric = {n for n, a in analytes.analytes.items() if a.result_type == "numeric"}
    missing_ranges = sorted(numeric - set(pipeline.ranges))
    if missing_ranges:
        raise ConfigError(
            f"{config_dir / 'pipeline.yaml'}: key 'ranges': no plausible range for {missing_ranges}"
        )
    source_paths = sorted((config_dir / "sources").glob("*.yaml"))
    if not source_paths:
        raise ConfigError(f"{config_dir / 'sources'}: no source configs (*.yaml) found")
    sources = [load_source(p) for p in source_paths]
    known_units = {u for a in analytes.analytes.values() for u in a.units}
    for src, path in zip(sources, source_paths, strict=False):
        bad = sorted(v for v in src.unit_aliases.values() if v not in known_units)
        if bad:
            raise ConfigError(
                f"{path}: key 'unit_aliases': maps to {bad}, which no analyte in analytes.yaml uses"
            )
        codes = {c for a in analytes.analytes.values() for c in a.loinc}
        unknown = sorted(v for v in src.test_codes.values() if v not in codes)
        if unknown:
            raise ConfigError(
                f"{path}: key 'test_codes': LOINC {unknown} not listed in analytes.yaml"
            )
    districts, population = _read_region(config_dir)
    read_district_shapes(config_dir, districts)  # every district a shape, every shape a district
    return Settings(
        config_dir=config_dir,
        pipeline=pipeline,
        analytes=analytes,
        sources=sources,
        districts=districts,
        population=population,
    )


def source_config_sha256(settings: Settings, source_id: str) -> str:
    """What one source's stored rows depend on: its own config, the analytes (codes, units,
    factors, readings) and the plausible ranges. Recorded per file in ``ingest_files``; a run
    whose current hash differs says so and holds the source's new files back (reprocess).
    """
    data = {
        "source": settings.source(source_id).model_dump(mode="json"),
        "analytes": settings.analytes.model_dump(mode="json"),
        "ranges": {k: v.model_dump(mode="json") for k, v in settings.pipeline.ranges.items()},
    }
    text = json.dumps(data, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest()
