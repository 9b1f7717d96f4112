"""FHIR R4 NDJSON rendering: valid JSON, LOINC/UCUM coding, same registry as the flat files."""

from __future__ import annotations

import json
from collections import Counter
from pathlib import Path

import polars as pl
import pytest

from synthetic_registry.config import load_config

# LOINC codes of docs/export-format.md and shared/references.md (8867-4 heart rate, 8625-6 PR,
# 8633-0 QRS, 8634-8 QT, 8636-3 QTc: S; axes 8626-4/8632-2/8638-9: recalled from memory, M).
LOINC_MEASURES = {
    "8867-4": "vent_rate",
    "8625-6": "pr_ms",
    "8633-0": "qrs_ms",
    "8634-8": "qt_ms",
    "8636-3": "qtc_ms",
    "8626-4": "p_axis",
    "8632-2": "qrs_axis",
    "8638-9": "t_axis",
}
UCUM = {"ms", "s", "/min", "deg"}


def resources(root: Path, name: str) -> list[dict]:
    with (root / f"{name}.ndjson").open(encoding="utf-8") as fh:
        out = [json.loads(line) for line in fh]
    assert all(r["resourceType"] == name for r in out)
    return out


def test_counts_and_people_match_the_flat_export(fhir_pair):
    fhir, flat = fhir_pair
    persons = pl.read_csv(flat / "persons.csv", infer_schema_length=0)
    patients = {p["id"]: p for p in resources(fhir, "Patient")}
    assert set(patients) == set(persons["person_id"])
    for row in persons.iter_rows(named=True):
        p = patients[row["person_id"]]
        assert p["birthDate"] == row["birth_date"]
        assert p.get("deceasedDateTime") == row["death_date"]
        assert p["gender"] == {"F": "female", "M": "male", "U": "unknown"}[row["sex"]]
    for name, flat_name in (
        ("Observation", "ecgs"),
        ("Procedure", "procedures"),
        ("Condition", "diagnoses"),
    ):
        assert (
            len(resources(fhir, name))
            == pl.read_csv(flat / f"{flat_name}.csv", infer_schema_length=0).height
        )
    ids = set(patients)
    for name in ("Observation", "Procedure", "Condition"):
        assert {
            r["subject"]["reference"].removeprefix("Patient/") for r in resources(fhir, name)
        } <= ids


def test_observations_carry_loinc_and_ucum_and_match_reads(fhir_pair):
    fhir, flat = fhir_pair
    obs = resources(fhir, "Observation")
    ecgs = pl.read_csv(flat / "ecgs.csv", infer_schema_length=0)
    by_key = {(r["tracing_id"], r["read_kind"]): r for r in ecgs.iter_rows(named=True)}
    seconds_sites = {
        s
        for s, u in zip(
            load_config().sites.name, load_config().sites.fhir_interval_unit, strict=True
        )
        if u == "s"
    }
    kinds = Counter()
    for o in obs:
        assert o["code"]["coding"][0] == {
            "system": "http://loinc.org",
            "code": "11524-6",
            "display": "EKG study",
        }
        tid = o["identifier"][0]["value"]
        kind = o["meta"]["tag"][0]["code"]
        kinds[kind] += 1
        assert o["status"] == ("final" if kind == "machine" else "amended")
        row = by_key[(tid, kind)]
        assert o["effectiveDateTime"] == row["acquired_at"] + "+00:00"
        for c in o.get("component", []):
            coding = c["code"]["coding"][0]
            q = c["valueQuantity"]
            assert q["system"] == "http://unitsofmeasure.org" and q["code"] in UCUM
            if coding["system"] == "http://loinc.org":
                col = LOINC_MEASURES[coding["code"]]
                value = float(row[col])
                if q["code"] == "s":
                    assert row["site"] in seconds_sites
                    assert q["value"] == pytest.approx(value / 1000.0)
                else:
                    assert q["value"] == value
            else:
                assert coding["code"] == "atrial-rate" and q["value"] == float(row["atrial_rate"])
        assert [n["text"] for n in o["note"]] == row["statements"].split(" | ")
        if row["statement_codes"]:
            codes = [i["coding"][0]["code"] for i in o["interpretation"]]
            assert codes == [c.split(":")[1] for c in row["statement_codes"].split(";")]
    assert kinds["machine"] > kinds["confirmed"] > 0
    machine_ids = {
        o["identifier"][0]["value"] for o in obs if o["meta"]["tag"][0]["code"] == "machine"
    }
    confirmed_ids = {
        o["identifier"][0]["value"] for o in obs if o["meta"]["tag"][0]["code"] == "confirmed"
    }
    assert confirmed_ids <= machine_ids  # a confirmed read matches its machine read by identifier


def test_procedure_and_condition_coding(fhir_pair):
    fhir, _ = fhir_pair
    for p in resources(fhir, "Procedure"):
        assert p["code"]["coding"][0]["system"] == "http://www.cms.gov/Medicare/Coding/ICD10"
        assert p["status"] == "completed" and len(p["performedDateTime"]) == 10
    for c in resources(fhir, "Condition"):
        assert c["code"]["coding"][0]["system"] == "http://hl7.org/fhir/sid/icd-10-cm"
        assert c["onsetDateTime"] == c["recordedDate"]


def test_resources_validate_against_fhir_models(fhir_pair):
    """Oracle: the fhir.resources R4B models (pydantic), if installed (optional test dependency)."""
    pytest.importorskip("fhir.resources")
    from fhir.resources.R4B.condition import Condition
    from fhir.resources.R4B.observation import Observation
    from fhir.resources.R4B.patient import Patient
    from fhir.resources.R4B.procedure import Procedure

    fhir, _ = fhir_pair
    models = {
        "Patient": Patient,
        "Observation": Observation,
        "Procedure": Procedure,
        "Condition": Condition,
    }
    for name, model in models.items():
        with (fhir / f"{name}.ndjson").open(encoding="utf-8") as fh:
            for i, line in enumerate(fh):
                model.model_validate_json(line)
                if i >= 400:
                    break
    bad = json.loads((fhir / "Observation.ndjson").open().readline())
    bad.pop("status")  # Observation.status is 1..1 in FHIR R4 (HL7 FHIR R4 Observation, recalled)
    with pytest.raises(ValueError):
        Observation.model_validate(bad)
