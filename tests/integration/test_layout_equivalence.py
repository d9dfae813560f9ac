"""The same creatinine values sent through the three layouts give the same events
(1 mg/dL = 88.4 µmol/L, DEVELOPERS.md, Methods and sources, confirmed; sustained 40 % decline, Levey et al., AJKD
2014;64:821)."""

from __future__ import annotations

import json

from tests.conftest import make_small_config, rows, run_month, write_inbox

#: (day, creatinine mg/dL): a woman of 60 whose eGFR falls by more than half and stays there
TRAJECTORY = [("2025-01-10", 0.80), ("2025-02-20", 0.82), ("2025-06-01", 1.60), ("2025-07-15", 1.70),
              ("2025-09-01", 1.75)]  # fmt: skip


def _standard() -> str:
    lines = [
        "person_token,birth_year,sex,district_code,specimen_id,collected_date,test_code,value,unit,status,reported_at"
    ]
    lines += [
        f"WF-std,1965,F,WF01,G{i},{d},2160-0,{v:.2f},mg/dL,final,{d}"
        for i, (d, v) in enumerate(TRAJECTORY)
    ]
    return "\n".join(lines) + "\n"


def _semicolon() -> str:
    lines = [
        "PatientRef;YearOfBirth;Gender;AreaCode;SampleNo;SampleDate;TestCode;Result;Units;State;ReportDate"
    ]
    for i, (d, v) in enumerate(TRAJECTORY):
        y, m, dd = d.split("-")
        umol = f"{v * 88.4:.2f}".replace(".", ",")
        lines.append(f"WF-semi;1965;F;WF01;CV{i};{dd}/{m}/{y};CREA;{umol};µmol/l;F;{dd}/{m}/{y}")
    return "\n".join(lines) + "\n"


def _fhir() -> tuple[str, str]:
    patient = {"resourceType": "Patient", "id": "fr-9", "gender": "female", "birthDate": "1965",
               "identifier": [{"system": "urn:westerfold:linkage-token", "value": "WF-fhir"}],
               "address": [{"district": "Alderbank"}]}  # fmt: skip
    observations = [
        {"resourceType": "Observation", "id": f"o{i}", "status": "final",
         "code": {"coding": [{"system": "http://loinc.org", "code": "2160-0"}]},
         "subject": {"reference": "Patient/fr-9"}, "specimen": {"reference": f"Specimen/F{i}"},
         "effectiveDateTime": d, "issued": f"{d}T12:00:00Z",
         "valueQuantity": {"value": v, "unit": "mg/dL", "system": "http://unitsofmeasure.org", "code": "mg/dL"}}
        for i, (d, v) in enumerate(TRAJECTORY)
    ]  # fmt: skip
    return json.dumps(patient) + "\n", "".join(json.dumps(o) + "\n" for o in observations)


def test_events_are_the_same_through_every_layout(tmp_path):
    config = make_small_config(tmp_path / "config")
    patients, observations = _fhir()
    inbox = write_inbox(tmp_path, {
        "westerfold_general_lab/results_2025-09.csv": _standard(),
        "corvale_lab_chain/export_202509.csv": _semicolon(),
        "fallowmere_reference_lab/2025-09/Patient.ndjson": patients,
        "fallowmere_reference_lab/2025-09/Observation.ndjson": observations,
    })  # fmt: skip
    with run_month(config, inbox, tmp_path / "out", period="2025-09") as con:
        by_source = rows(con, """
            select r.source_id, e.rule_id, e.event_status, e.event_date, e.confirmation_date,
                   e.baseline_egfr, e.run_values
            from kidney_events as e
            join (select distinct person_key, source_id from lab_results) as r using (person_key)
            order by e.rule_id, r.source_id
        """)  # fmt: skip
    events = {}
    for source, *event in by_source:
        events.setdefault(source, []).append(tuple(event))
    assert set(events) == {
        "westerfold_general_lab",
        "corvale_lab_chain",
        "fallowmere_reference_lab",
    }
    standard = events["westerfold_general_lab"]
    assert ("sustained_decline_40", "confirmed") in {(r, s) for r, s, *_ in standard}
    assert events["corvale_lab_chain"] == standard
    assert events["fallowmere_reference_lab"] == standard
