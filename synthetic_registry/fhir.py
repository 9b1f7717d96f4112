"""FHIR R4 NDJSON rendering of the same registry (bulk-data style, one resource per line).

Rendered from the flat frames of each block, so the same seed gives the same people, reads,
procedures and diagnoses as the CSV export. Choices (docs/export-format.md):
- One Observation per read; ``identifier`` (system TRACING_SYSTEM) holds the tracing id so
  machine and confirmed reads of one tracing match; ``meta.tag`` (READ_KIND_SYSTEM) holds
  the read kind; status "final" for machine reads, "amended" for confirmed overreads.
- Intervals in UCUM ``ms``, or ``s`` for sites whose sites.csv fhir_interval_unit is "s".
- Statements as ``note`` texts (one per statement, in order); SNOMED CT codes as
  ``interpretation`` entries.
- Times are network local time written with offset +00:00 (the fictional region keeps UTC).
"""

from __future__ import annotations

import json
from pathlib import Path

from synthetic_registry.config import Config
from synthetic_registry.frames import BlockFrames
from synthetic_registry.sinks import NdjsonSink, Sink

NS = "https://dromos.example/fhir"
TRACING_SYSTEM = f"{NS}/tracing-id"
PERSON_SYSTEM = f"{NS}/person-id"
READ_KIND_SYSTEM = f"{NS}/CodeSystem/read-kind"
LOCAL_MEASURE_SYSTEM = f"{NS}/CodeSystem/ecg-measure"
FOLLOWUP_END_URL = f"{NS}/StructureDefinition/followup-end"
LOINC = "http://loinc.org"
SNOMED = "http://snomed.info/sct"
UCUM = "http://unitsofmeasure.org"
ICD10CM = "http://hl7.org/fhir/sid/icd-10-cm"
ICD10PCS = "http://www.cms.gov/Medicare/Coding/ICD10"
ECG_STUDY = {
    "system": LOINC,
    "code": "11524-6",
    "display": "EKG study",
}  # as in HL7 JP Core examples (S)

# column -> (code system, code, display, kind) ; kind: rate, interval or angle
COMPONENTS: dict[str, tuple[str, str, str, str]] = {
    "vent_rate": (LOINC, "8867-4", "Heart rate", "rate"),
    "atrial_rate": (LOCAL_MEASURE_SYSTEM, "atrial-rate", "Atrial rate", "rate"),
    "pr_ms": (LOINC, "8625-6", "P-R interval", "interval"),
    "qrs_ms": (LOINC, "8633-0", "QRS duration", "interval"),
    "qt_ms": (LOINC, "8634-8", "Q-T interval", "interval"),
    "qtc_ms": (LOINC, "8636-3", "Q-T interval corrected", "interval"),
    "p_axis": (LOINC, "8626-4", "P wave axis", "angle"),
    "qrs_axis": (LOINC, "8632-2", "R wave axis", "angle"),
    "t_axis": (LOINC, "8638-9", "T wave axis", "angle"),
}
_GENDER = {"F": "female", "M": "male", "U": "unknown"}


class FhirWriter:
    """Four NDJSON files written block by block."""

    def __init__(self, cfg: Config, root: Path) -> None:
        self.cfg = cfg
        self.unit_of_site = dict(
            zip(cfg.sites.name.tolist(), cfg.sites.fhir_interval_unit.tolist(), strict=True)
        )
        self.sinks = {
            k: NdjsonSink(root / f"{k}.ndjson")
            for k in ("Patient", "Observation", "Procedure", "Condition")
        }
        self.n_proc = 0
        self.n_cond = 0

    def write_block(self, f: BlockFrames) -> None:
        self.sinks["Patient"].write_lines(
            [_dump(patient(r)) for r in f.persons.iter_rows(named=True)]
        )
        self.sinks["Observation"].write_lines(
            [_dump(self.observation(r)) for r in f.ecgs.iter_rows(named=True)]
        )
        lines = []
        for r in f.procedures.iter_rows(named=True):
            self.n_proc += 1
            lines.append(_dump(procedure(r, f"proc{self.n_proc:010d}")))
        self.sinks["Procedure"].write_lines(lines)
        lines = []
        for r in f.diagnoses.iter_rows(named=True):
            self.n_cond += 1
            lines.append(_dump(condition(r, f"cond{self.n_cond:010d}")))
        self.sinks["Condition"].write_lines(lines)

    def observation(self, r: dict) -> dict:
        """One ECG read as an Observation."""
        kind = r["read_kind"]
        seconds = self.unit_of_site.get(r["site"]) == "s"
        obs: dict = {
            "resourceType": "Observation",
            "id": f"{r['tracing_id']}-{kind}",
            "meta": {"tag": [{"system": READ_KIND_SYSTEM, "code": kind}]},
            "identifier": [{"system": TRACING_SYSTEM, "value": r["tracing_id"]}],
            "status": "final" if kind == "machine" else "amended",
            "category": [
                {
                    "coding": [
                        {
                            "system": "http://terminology.hl7.org/CodeSystem/observation-category",
                            "code": "procedure",
                        }
                    ]
                }
            ],
            "code": {"coding": [ECG_STUDY]},
            "subject": {"reference": f"Patient/{r['person_id']}"},
            "effectiveDateTime": r["acquired_at"].strftime("%Y-%m-%dT%H:%M:%S") + "+00:00",
            "performer": [{"display": r["site"]}],
        }
        components = [_component(col, r[col], seconds) for col in COMPONENTS if r[col] is not None]
        if components:
            obs["component"] = components
        if r["statements"]:
            obs["note"] = [{"text": s} for s in r["statements"].split(" | ")]
        if r["statement_codes"]:
            obs["interpretation"] = [
                {"coding": [{"system": SNOMED, "code": c.split(":", 1)[1]}]}
                for c in r["statement_codes"].split(";")
            ]
        return obs

    def close(self) -> list[Sink]:
        for s in self.sinks.values():
            s.close()
        return list(self.sinks.values())


def _component(col: str, value: int, seconds: bool) -> dict:
    system, code, display, kind = COMPONENTS[col]
    if kind == "rate":
        q = {"value": value, "unit": "/min", "system": UCUM, "code": "/min"}
    elif kind == "angle":
        q = {"value": value, "unit": "deg", "system": UCUM, "code": "deg"}
    elif seconds:
        q = {"value": round(value / 1000.0, 3), "unit": "s", "system": UCUM, "code": "s"}
    else:
        q = {"value": value, "unit": "ms", "system": UCUM, "code": "ms"}
    return {
        "code": {"coding": [{"system": system, "code": code, "display": display}]},
        "valueQuantity": q,
    }


def patient(r: dict) -> dict:
    res: dict = {
        "resourceType": "Patient",
        "id": r["person_id"],
        "identifier": [{"system": PERSON_SYSTEM, "value": r["person_id"]}],
        "gender": _GENDER[r["sex"]],
        "birthDate": r["birth_date"].isoformat(),
        "managingOrganization": {"display": r["site"]},
        "extension": [{"url": FOLLOWUP_END_URL, "valueDate": r["followup_end"].isoformat()}],
    }
    if r["death_date"] is not None:
        res["deceasedDateTime"] = r["death_date"].isoformat()
    return res


def procedure(r: dict, rid: str) -> dict:
    return {
        "resourceType": "Procedure",
        "id": rid,
        "status": "completed",
        "code": {"coding": [{"system": ICD10PCS, "code": r["code"]}]},
        "subject": {"reference": f"Patient/{r['person_id']}"},
        "performedDateTime": r["procedure_date"].isoformat(),
    }


def condition(r: dict, rid: str) -> dict:
    day = r["diagnosis_date"].isoformat()
    return {
        "resourceType": "Condition",
        "id": rid,
        "clinicalStatus": {
            "coding": [
                {
                    "system": "http://terminology.hl7.org/CodeSystem/condition-clinical",
                    "code": "active",
                }
            ]
        },
        "code": {"coding": [{"system": ICD10CM, "code": r["code"]}]},
        "subject": {"reference": f"Patient/{r['person_id']}"},
        "onsetDateTime": day,
        "recordedDate": day,
    }


def _dump(obj: dict) -> str:
    return json.dumps(obj, ensure_ascii=False, separators=(",", ":"))
