"""FHIR R4 Observations read into the standard fields.

Outside facts (HL7 FHIR R4, Observation resource): the test is ``code.coding`` with system
``http://loinc.org``; a quantity is ``valueQuantity`` with ``value``, an optional
``comparator`` (``<``, ``<=``, ``>=``, ``>``) and a UCUM ``code``; ``status`` is one of the
ObservationStatus codes; ``effectiveDateTime`` the collection time and ``issued`` the report
time. LOINC 2160-0 is creatinine in serum or plasma, mass per volume (LOINC, common practice).
"""

from __future__ import annotations

from pipeline.stages.ingest.fhir import _observation_fields

OBSERVATION = {
    "resourceType": "Observation",
    "status": "final",
    "code": {
        "coding": [
            {"system": "http://example.org/local", "code": "CREA"},
            {"system": "http://loinc.org", "code": "2160-0"},
        ]
    },  # fmt: skip
    "subject": {"reference": "Patient/p1"},
    "specimen": {"reference": "Specimen/S-77"},
    "effectiveDateTime": "2026-10-03",
    "issued": "2026-10-05T09:00:00Z",
    "valueQuantity": {
        "value": 1.4,
        "comparator": "<",
        "unit": "mg/dL",
        "system": "http://unitsofmeasure.org",
        "code": "mg/dL",
    },  # fmt: skip
}


def test_the_loinc_coding_quantity_and_times_are_read():
    fields = _observation_fields(OBSERVATION)
    assert fields["test_code"] == "2160-0"  # the LOINC coding, not the local one
    assert fields["value_text"] == "<1.4"  # the comparator kept with the value (censored)
    assert fields["unit_text"] == "mg/dL"  # the UCUM code
    assert fields["status"] == "final"
    assert fields["specimen_id"] == "S-77"
    assert fields["collected_text"] == "2026-10-03"
    assert fields["reported_text"] == "2026-10-05T09:00:00Z"


def test_a_value_string_is_read_when_there_is_no_quantity():
    resource = {k: v for k, v in OBSERVATION.items() if k != "valueQuantity"}
    resource["valueString"] = "trace"
    fields = _observation_fields(resource)
    assert fields["value_text"] == "trace"
    assert "unit_text" not in fields or fields["unit_text"] is None
