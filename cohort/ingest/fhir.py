"""FHIR R4 NDJSON (Bulk Data export style) as a source: Patient, Observation, Procedure, Condition.

Each line is one resource. It is flattened here into the canonical text columns, then
validated by the same staging SQL as flat files, so every rule (ranges, dates, duplicates,
unknown persons) applies alike. A line that is not JSON, not UTF-8 or not the expected resource
type is quarantined with its line number. ECG measurements are read from ``component`` by LOINC
code, and intervals are converted by their UCUM unit (``ms`` or ``s``).
"""

from __future__ import annotations

import datetime as dt
import json
from collections.abc import Callable, Iterator
from pathlib import Path

import pyarrow as pa

from cohort.errors import InputFileError
from cohort.ingest import sources
from cohort.ingest.mapping import CANONICAL_COLUMNS, Mapping, TableMapping

# LOINC codes of global ECG measurements (Regenstrief LOINC; axis codes recalled, see tests).
LOINC_MEASURES: dict[str, str] = {
    "8867-4": "ventricular_rate",
    "8625-6": "pr_ms",
    "8633-0": "qrs_ms",
    "8634-8": "qt_ms",
    "8636-3": "qtc_ms",
    "8626-4": "p_axis",
    "8632-2": "qrs_axis",
    "8638-9": "t_axis",
}
LOCAL_MEASURES: dict[str, str] = {"atrial-rate": "atrial_rate"}
INTERVAL_UNITS_MS: dict[str, float] = {"ms": 1.0, "s": 1000.0}  # UCUM codes
SNOMED_SYSTEM = "http://snomed.info/sct"
CODE_SYSTEMS: dict[str, str] = {
    "http://www.cms.gov/Medicare/Coding/ICD10": "ICD-10-PCS",
    "http://hl7.org/fhir/sid/icd-10-cm": "ICD-10-CM",
    "http://hl7.org/fhir/sid/icd-10": "ICD-10",
    SNOMED_SYSTEM: "SNOMED",
}
RESOURCE_TABLES: dict[str, str] = {
    "Patient": "person",
    "Observation": "ecg",
    "Procedure": "procedure",
    "Condition": "diagnosis",
}
_SEPARATOR = "\x1f"  # ASCII unit separator: never inside a statement
_FOLLOWUP_END_EXTENSION = "followup-end"


def resource_type_of(path: Path) -> str:
    """Resource type from the file name (``Observation.ndjson``, ``Observation.003.ndjson``)."""
    stem = path.name.split(".")[0]
    for resource in RESOURCE_TABLES:
        if stem.lower() == resource.lower():
            return resource
    raise InputFileError(
        f"{path}: cannot tell the FHIR resource type from the file name; name it "
        f"{', '.join(r + '.ndjson' for r in RESOURCE_TABLES)}"
    )


def fhir_rank(path: Path) -> int:
    """Load order of a FHIR file (patients first), matching the flat tables' order."""
    from cohort.ingest.mapping import LOAD_ORDER

    return LOAD_ORDER.index(RESOURCE_TABLES[resource_type_of(path)])


def _table_mapping(table: str) -> TableMapping:
    options: dict = {
        "date_formats": ["%Y-%m-%d"],
        "timestamp_formats": ["%Y-%m-%dT%H:%M:%S", "%Y-%m-%dT%H:%M:%S.%f", "%Y-%m-%d"],
        "statement_separator": _SEPARATOR,
        "code_separator": _SEPARATOR,
        "sex_codes": {"F": ["female"], "M": ["male"], "U": ["unknown", "other"]},
        "read_kind_codes": {"machine": ["machine"], "confirmed": ["confirmed"]},
        "default_code_system": {"procedure": "ICD-10-PCS", "diagnosis": "ICD-10-CM"}.get(table),
        "units": {},
    }
    columns = {c: c for c in CANONICAL_COLUMNS[table]}
    return TableMapping(table=table, files=(), columns=columns, options=options)


def _utc_text(value: str | None) -> str | None:
    """ISO date-time with offset -> naive UTC text; unparseable text passes through (quarantined later)."""
    if not value:
        return None
    try:
        moment = dt.datetime.fromisoformat(value)
    except ValueError:
        return value
    if moment.tzinfo is not None:
        moment = moment.astimezone(dt.UTC).replace(tzinfo=None)
    return moment.isoformat(timespec="seconds")


def _identifier(resource: dict, suffix: str) -> str | None:
    for ident in resource.get("identifier", []) or []:
        if str(ident.get("system", "")).endswith(suffix):
            return ident.get("value")
    return None


def _reference_id(reference: str | None) -> str | None:
    if not reference:
        return None
    return reference.split("/")[-1]


def _number_text(quantity: dict, canonical: str) -> str | None:
    value = quantity.get("value")
    if value is None:
        return None
    unit = quantity.get("code") or quantity.get("unit")
    if canonical.endswith("_ms"):
        factor = INTERVAL_UNITS_MS.get(str(unit))
        if factor is None:
            return f"{value} {unit}"  # not a number: quarantined with the unit shown
        return repr(round(float(value) * factor, 6))  # 0.057 s * 1000 -> 57.0, not 57.00000000000001
    return repr(float(value))


def _patient(resource: dict) -> dict:
    followup = None
    for extension in resource.get("extension", []) or []:
        if str(extension.get("url", "")).endswith(_FOLLOWUP_END_EXTENSION):
            followup = extension.get("valueDate")
    deceased = resource.get("deceasedDateTime")
    return {
        "person_key": _identifier(resource, "person-id") or resource.get("id"),
        "birth_date": resource.get("birthDate"),
        "sex": resource.get("gender"),
        "site": (resource.get("managingOrganization") or {}).get("display"),
        "death_date": deceased[:10] if deceased else None,
        "followup_end": followup,
    }


def _read_kind(resource: dict) -> str | None:
    for tag in (resource.get("meta") or {}).get("tag", []) or []:
        if str(tag.get("system", "")).endswith("read-kind"):
            return tag.get("code")
    return {"final": "machine", "amended": "confirmed", "corrected": "confirmed"}.get(resource.get("status"))


def _observation(resource: dict) -> dict:
    row: dict[str, str | None] = {
        "ecg_key": _identifier(resource, "tracing-id") or resource.get("id"),
        "person_key": _reference_id((resource.get("subject") or {}).get("reference")),
        "acquired_at": _utc_text(resource.get("effectiveDateTime")),
        "site": ((resource.get("performer") or [{}])[0] or {}).get("display"),
        "read_kind": _read_kind(resource),
    }
    for component in resource.get("component", []) or []:
        for coding in (component.get("code") or {}).get("coding", []) or []:
            canonical = LOINC_MEASURES.get(coding.get("code")) if "loinc" in str(coding.get("system", "")) else None
            canonical = canonical or LOCAL_MEASURES.get(coding.get("code"))
            if canonical and "valueQuantity" in component:
                row[canonical] = _number_text(component["valueQuantity"], canonical)
    statements = [note.get("text", "") for note in resource.get("note", []) or [] if note.get("text")]
    row["statements"] = _SEPARATOR.join(statements) if statements else None
    codes = [
        f"{CODE_SYSTEMS.get(c.get('system'), c.get('system'))}:{c.get('code')}"
        for concept in resource.get("interpretation", []) or []
        for c in concept.get("coding", []) or []
    ]
    row["statement_codes"] = _SEPARATOR.join(codes) if codes else None
    return row


def _coded(resource: dict, date_key: str) -> dict:
    coding = ((resource.get("code") or {}).get("coding") or [{}])[0]
    date = resource.get(date_key) or resource.get("recordedDate")
    return {
        "person_key": _reference_id((resource.get("subject") or {}).get("reference")),
        "date": date[:10] if date else None,
        "code_system": CODE_SYSTEMS.get(coding.get("system"), coding.get("system")),
        "code": coding.get("code"),
    }


_FLATTEN: dict[str, Callable[[dict], dict]] = {
    "Patient": _patient,
    "Observation": _observation,
    "Procedure": lambda r: _coded(r, "performedDateTime"),
    "Condition": lambda r: _coded(r, "onsetDateTime"),
}


def flatten_lines(lines: Iterator[bytes], resource_type: str) -> tuple[list[dict], list[tuple[int, str | None, str, str]]]:
    """Canonical rows (with ``row_k`` = line number) and rejected lines of one NDJSON stream."""
    rows: list[dict] = []
    rejected: list[tuple[int, str | None, str, str]] = []
    flatten = _FLATTEN[resource_type]
    for line_no, raw in enumerate(lines, start=1):
        if not raw.strip():
            continue
        try:
            text = raw.decode("utf-8")
        except UnicodeDecodeError:
            rejected.append((line_no, None, raw.decode("utf-8", "replace")[:500], "invalid UTF-8 bytes in the line"))
            continue
        try:
            resource = json.loads(text)
        except json.JSONDecodeError as exc:
            rejected.append((line_no, None, text[:500], f"malformed line (not JSON: {exc.msg})"))
            continue
        if not isinstance(resource, dict) or resource.get("resourceType") != resource_type:
            found = resource.get("resourceType") if isinstance(resource, dict) else type(resource).__name__
            rejected.append((line_no, "resourceType", text[:500], f"not a {resource_type} resource ({found})"))
            continue
        try:
            row = flatten(resource)
        except (AttributeError, TypeError, ValueError, IndexError) as exc:
            rejected.append((line_no, None, text[:500], f"malformed {resource_type} resource ({exc})"))
            continue
        row["row_k"] = line_no
        rows.append(row)
    return rows, rejected


def load_fhir_file(con, path: Path, *, mapping: Mapping, key: bytes | None, rules: dict, load: Callable):
    """Load one NDJSON file through the shared staging path (``loader._load_scanned``)."""
    resource_type = resource_type_of(path)
    table = RESOURCE_TABLES[resource_type]
    table_mapping = _table_mapping(table)
    sha256 = sources.file_sha256(path)
    columns = ["row_k", *CANONICAL_COLUMNS[table]]

    def scan() -> sources.ScanResult:
        with path.open("rb") as handle:
            rows, rejected = flatten_lines(iter(handle), resource_type)
        arrays = {name: [row.get(name) for row in rows] for name in columns}
        arrow = pa.table(
            {name: pa.array(values, type=pa.int64() if name == "row_k" else pa.string()) for name, values in arrays.items()}
        )
        result = sources.scan_arrow(con, arrow, table_mapping, "fhir")
        result.preset_rejects = rejected
        return result

    return load(con, path, scan, table_mapping, mapping, key, rules, sha256, "fhir")
