"""FHIR R4 bulk export (layout ``fhir_ndjson``): Observation.ndjson with its Patient.ndjson."""

from __future__ import annotations

import json
import re
from pathlib import Path

import polars as pl

from pipeline.core import identifiers
from pipeline.core.landed import LANDED_COLUMNS
from pipeline.core.pseudonymise import SHARED_DOMAIN
from pipeline.core.settings import Settings, SourceConfig
from pipeline.stages.ingest.inbox import FileFault, InboxFile, _decode, read_file_bytes
from pipeline.stages.ingest.rows import (
    _MASK,
    _apply_screen,
    _quarantine,
    district_places,
    mask_in_value,
)

_PATIENT_REF = re.compile(r"Patient/[^\"\s,}]+")


class _Malformed(ValueError):
    """A FHIR field of the wrong JSON type."""


def _obj(parent: dict, key: str) -> dict:
    value = parent.get(key)
    if value is None:
        return {}
    if not isinstance(value, dict):
        raise _Malformed(f"{key} is not a JSON object")
    return value


def _objects(parent: dict, key: str) -> list[dict]:
    value = parent.get(key)
    if value is None:
        return []
    if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
        raise _Malformed(f"{key} is not a list of JSON objects")
    return value


def _text(parent: dict, key: str) -> str | None:
    value = parent.get(key)
    if value is None:
        return None
    if not isinstance(value, str):
        raise _Malformed(f"{key} is not text")
    return value


def _ndjson_lines(text: str) -> list[str]:
    """Records of an NDJSON text: split at line feeds only (JSON strings may hold U+2028)."""
    return [line.removesuffix("\r") for line in text.split("\n")]


def _read_patients(
    path: Path, source: SourceConfig, item: InboxFile, settings: Settings
) -> dict[str, dict]:
    patients: dict[str, dict] = {}
    if not path.is_file():
        raise FileFault(
            f"{path}: Patient.ndjson is missing beside {path.parent / 'Observation.ndjson'}"
        )
    text = _decode(path, read_file_bytes(path), "utf-8")
    sample: list[tuple[int, dict]] = []
    ids_by_line: dict[int, str] = {}
    system = source.fhir.linkage_identifier_system
    for line_no, line in enumerate(_ndjson_lines(text), start=1):
        if not line.strip():
            continue
        try:
            res = json.loads(line)
        except json.JSONDecodeError as exc:
            raise FileFault(f"{path}: line {line_no}: not valid JSON ({exc.msg})") from None
        if (
            not isinstance(res, dict)
            or res.get("resourceType") != "Patient"
            or not isinstance(res.get("id"), str)
        ):
            raise FileFault(f"{path}: line {line_no}: expected a Patient resource with an id")
        if identifiers.sampled(len(patients)):
            sample.append((line_no, res))
        ids_by_line[line_no] = res["id"]
        try:
            token, domain = None, source.id
            values = []  # every identifier of the Patient, of any system
            for ident in _objects(res, "identifier"):
                value = _text(ident, "value")
                values.append(value or "")
                if token is None and system and _text(ident, "system") == system and value:
                    token, domain = (
                        value,
                        SHARED_DOMAIN if source.linkage == "shared" else source.id,
                    )
            addresses = _objects(res, "address")
            patients[res["id"]] = {
                "person_token": token if token is not None else f"Patient/{res['id']}",
                "linkage_domain": domain,
                "birth_year_text": (_text(res, "birthDate") or "")[:4],
                "sex_text": _text(res, "gender") or "",
                "district_name": (_text(addresses[0], "district") if addresses else None) or "",
                # masked wherever an Observation repeats one (PATIENT_ONLY: never a landed field)
                "hidden": (res["id"], *values),
            }
        except _Malformed as exc:
            raise FileFault(f"{path}: line {line_no}: Patient {res['id']}: {exc}") from None
    flagged = _apply_screen(
        source,
        item,
        path,
        identifiers.screen_resources("Patient", sample, district_places(settings)),
    )
    # a Patient with a value that looks like an identifier: every Observation of it is
    # quarantined with the reason (the Patient records themselves are never stored)
    for f in flagged:
        for line in f.lines:
            patients[ids_by_line[line]].setdefault("quarantine", identifiers.quarantine_reason(f))
    return patients


def _observation_fields(res: dict) -> dict[str, str | None]:
    """The standard fields of one Observation; ``_Malformed`` when a field has the wrong type."""
    loinc = next(
        (
            _text(c, "code")
            for c in _objects(_obj(res, "code"), "coding")
            if _text(c, "system") == "http://loinc.org"
        ),
        None,
    )
    fields: dict[str, str | None] = {"test_code": loinc, "test_code_text": loinc}
    quantity = res.get("valueQuantity")
    if quantity is not None:
        quantity = _obj(res, "valueQuantity")
        number = quantity.get("value")
        if number is not None and (isinstance(number, bool) or not isinstance(number, int | float)):
            raise _Malformed("valueQuantity.value is not a number")
        text = f"{_text(quantity, 'comparator') or ''}{number if number is not None else ''}"
        fields.update(value_text=text, value_clean=text,
                      unit_text=_text(quantity, "code") or _text(quantity, "unit"))  # fmt: skip
    else:
        fields.update(value_text=_text(res, "valueString"), value_clean=_text(res, "valueString"))
    status = _text(res, "status")
    specimen = _text(_obj(res, "specimen"), "reference") or ""
    fields.update(
        status=(status or "").lower(),
        status_text=status,
        specimen_id=specimen.rsplit("/", 1)[-1] or None,
        collected_text=_text(res, "effectiveDateTime"),
        reported_text=_text(res, "issued"),
    )
    return fields


#: What a Patient entry holds beside the fields it gives its Observations.
PATIENT_ONLY = ("district_name", "hidden", "quarantine")

#: The fields of an Observation row that hold what the lab sent (masked for the person's
#: identifiers); the others are the row's number, text, fault and person.
_SENT_FIELDS = ("specimen_id", "collected_text", "test_code", "test_code_text", "value_text",
                "value_clean", "unit_text", "status", "status_text", "reported_text")  # fmt: skip


def _mask_identifiers(rec: dict, hidden: tuple[str, ...]) -> None:
    """Mask the person's identifiers (the Patient's id and identifier values, long enough to
    identify: :func:`mask_in_value`) wherever the Observation repeats them: in the fields it
    lands and in its raw text. A Patient id that the lab also writes into a specimen id would
    otherwise be kept with the result, or quoted in a rejection's message.
    """
    for f in _SENT_FIELDS:
        rec[f] = mask_in_value(rec[f], hidden)
    rec["raw_text"] = mask_in_value(rec["raw_text"], hidden)


_FHIR_FIELDS = (
    "line_no", "raw_text", "row_fault", "linkage_domain", "person_token", "birth_year_text",
    "sex_text", "district_code", "specimen_id", "collected_text", "test_code", "test_code_text",
    "value_text", "value_clean", "unit_text", "status", "status_text", "height_text",
    "reported_text", "fasting_text",
)  # fmt: skip


def read_fhir_export(source: SourceConfig, item: InboxFile, settings: Settings) -> pl.DataFrame:
    """Read one bulk-export folder (Observation.ndjson with its Patient.ndjson)."""
    path = item.path
    patients = _read_patients(path.parent / "Patient.ndjson", source, item, settings)
    by_name = {name.casefold(): code for code, name in settings.districts.items()}
    text = _decode(path, read_file_bytes(path), "utf-8")
    rows: dict[str, list] = {f: [] for f in _FHIR_FIELDS}
    sample: list[tuple[int, object]] = []
    for line_no, line in enumerate(_ndjson_lines(text), start=1):
        if not line.strip():
            continue
        rec: dict = {f: None for f in _FHIR_FIELDS}
        rec["line_no"] = line_no
        try:
            res = json.loads(line)
            if identifiers.sampled(len(rows["line_no"])):
                sample.append((line_no, res))
            if not isinstance(res, dict) or res.get("resourceType") != "Observation":
                raise _Malformed("not an Observation resource")
            subject = _text(_obj(res, "subject"), "reference") or ""
            rec.update(_observation_fields(res))
        except (json.JSONDecodeError, _Malformed) as exc:
            rec["row_fault"] = f"malformed_record:{getattr(exc, 'msg', str(exc))}"
            # not readable as an Observation: which part is what is not certain, no text kept
            rec["raw_text"] = (
                f"[text withheld: a record of {len(line)} characters that is not a readable Observation]"
            )
            for f, v in rec.items():
                rows[f].append(v)
            continue
        subject_id = subject.removeprefix("Patient/")
        patient = patients.get(subject_id)
        if patient is not None and "quarantine" in patient:
            rec["row_fault"] = patient["quarantine"]
            rec["raw_text"] = (
                "[text withheld: the identifier screen flagged a field of its Patient]"
            )
            rec["person_token"] = patient["person_token"]
            rec["linkage_domain"] = patient["linkage_domain"]
            _mask_identifiers(rec, patient["hidden"])
            for f, v in rec.items():
                rows[f].append(v)
            continue
        if patient is not None:
            rec.update({k: v for k, v in patient.items() if k not in PATIENT_ONLY})
            name = patient["district_name"]
            rec["district_code"] = by_name.get(name.casefold(), name)
        elif subject:
            # the reference is not quoted: a Patient id is the person's id at the lab
            rec["row_fault"] = f"unknown_patient:{_MASK} is not in Patient.ndjson"
        rec["raw_text"] = _PATIENT_REF.sub(_MASK, line)
        if patient is not None and patient["person_token"] in rec["raw_text"]:
            rec["raw_text"] = rec["raw_text"].replace(patient["person_token"], _MASK)
        _mask_identifiers(rec, patient["hidden"] if patient is not None else (subject_id,))
        for f, v in rec.items():
            rows[f].append(v)
    if not rows["line_no"]:
        raise FileFault(f"{path}: no Observation records")
    flagged = _apply_screen(
        source,
        item,
        path,
        identifiers.screen_resources("Observation", sample, district_places(settings)),
    )
    frame = pl.DataFrame(
        rows, schema={f: pl.Int64 if f == "line_no" else pl.String for f in _FHIR_FIELDS}
    )
    frame = _quarantine(frame, flagged)
    return frame.with_columns(
        pl.lit(source.id).alias("source_id"), pl.lit(item.file_id, dtype=pl.Int64).alias("file_id")
    ).select(LANDED_COLUMNS)
