"""FHIR R4 NDJSON ingest: LOINC-coded measurements, UCUM units, bad lines quarantined."""

from __future__ import annotations

import json

from cohort.ingest.fhir import INTERVAL_UNITS_MS, LOINC_MEASURES, flatten_lines
from cohort.ingest.loader import ingest


def test_loinc_codes_of_global_ecg_measurements():
    # LOINC (Regenstrief Institute) codes as used in public FHIR ECG examples (HL7 FHIR US Core
    # Observation examples): 8867-4 heart rate, 8625-6 P-R interval, 8633-0 QRS duration,
    # 8634-8 Q-T interval, 8636-3 Q-T interval corrected. Axis codes 8626-4 / 8632-2 / 8638-9
    # are recalled from memory, not confirmed against the LOINC table.
    assert LOINC_MEASURES["8867-4"] == "ventricular_rate"
    assert LOINC_MEASURES["8625-6"] == "pr_ms"
    assert LOINC_MEASURES["8633-0"] == "qrs_ms"
    assert LOINC_MEASURES["8634-8"] == "qt_ms"
    assert LOINC_MEASURES["8636-3"] == "qtc_ms"
    assert {LOINC_MEASURES[c] for c in ("8626-4", "8632-2", "8638-9")} == {"p_axis", "qrs_axis", "t_axis"}


def test_ucum_interval_units():
    # UCUM (Regenstrief, The Unified Code for Units of Measure): "s" second, "ms" millisecond = 1e-3 s.
    assert INTERVAL_UNITS_MS == {"ms": 1.0, "s": 1000.0}


def _observation(tracing: str, person: str, pr_value: float, pr_unit: str, **extra) -> dict:
    resource = {
        "resourceType": "Observation",
        "identifier": [{"system": "https://dromos.example/fhir/tracing-id", "value": tracing}],
        "meta": {"tag": [{"system": "https://dromos.example/fhir/CodeSystem/read-kind", "code": "machine"}]},
        "status": "final",
        "subject": {"reference": f"Patient/{person}"},
        "effectiveDateTime": "2019-03-02T11:00:00+01:00",
        "component": [
            {"code": {"coding": [{"system": "http://loinc.org", "code": "8625-6"}]},
             "valueQuantity": {"value": pr_value, "code": pr_unit, "system": "http://unitsofmeasure.org"}},
            {"code": {"coding": [{"system": "http://loinc.org", "code": "8867-4"}]},
             "valueQuantity": {"value": 61, "code": "/min"}},
        ],
        "note": [{"text": "Sinus rhythm"}, {"text": "First degree AV block"}],
        "interpretation": [{"coding": [{"system": "http://snomed.info/sct", "code": "270492004"}]}],
    }
    resource.update(extra)
    return resource


def test_flatten_observation_converts_units_and_time_zone():
    lines = [json.dumps(_observation("E1", "P1", 0.212, "s")).encode()]
    rows, rejected = flatten_lines(iter(lines), "Observation")
    assert not rejected
    row = rows[0]
    assert row["pr_ms"] == "212.0" and row["ventricular_rate"] == "61.0"
    assert row["acquired_at"] == "2019-03-02T10:00:00"  # +01:00 -> UTC
    assert row["statements"].split("\x1f") == ["Sinus rhythm", "First degree AV block"]
    assert row["statement_codes"] == "SNOMED:270492004"


def test_fhir_files_load_with_bad_lines_quarantined(registry, tmp_path):
    patients = [
        {"resourceType": "Patient", "id": "P1", "gender": "female", "birthDate": "1950-05-01",
         "extension": [{"url": "https://dromos.example/fhir/StructureDefinition/followup-end", "valueDate": "2024-12-31"}]},
        {"resourceType": "Patient", "id": "P2", "gender": "male", "birthDate": "1939-02-30",
         "extension": [{"url": "x/followup-end", "valueDate": "2024-12-31"}]},
    ]
    (tmp_path / "Patient.ndjson").write_text("\n".join(json.dumps(p) for p in patients) + "\n", encoding="utf-8")
    observations = [
        json.dumps(_observation("E1", "P1", 212, "ms")),
        json.dumps(_observation("E2", "P1", 0.188, "s")),
        json.dumps(_observation("E3", "P1", 190, "cs")),  # unknown unit
        '{"resourceType": "Observation", "id": ',  # truncated JSON
        json.dumps({"resourceType": "Condition", "id": "x"}),  # wrong resource type
    ]
    (tmp_path / "Observation.ndjson").write_text("\n".join(observations) + "\n", encoding="utf-8")
    results = ingest(registry, [tmp_path])
    assert [(r.table, r.rows_read, r.rows_loaded, r.rows_quarantined) for r in results] == [
        ("person", 2, 1, 1), ("ecg", 5, 2, 3),
    ]
    assert registry.execute("SELECT pr_ms FROM ecg ORDER BY ecg_key").fetchall() == [(212.0,), (188.0,)]
    reasons = dict(registry.execute(
        "SELECT record, reason FROM quarantine WHERE source_id LIKE 'ecg:%' ORDER BY record").fetchall())
    assert reasons[3] == "not a number" and reasons[4].startswith("malformed line (not JSON")
    assert reasons[5] == "not a Observation resource (Condition)"
