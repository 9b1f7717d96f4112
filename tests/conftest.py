"""Shared fixtures: temporary registries and small export writers."""

from __future__ import annotations

import csv
from pathlib import Path
from typing import Any

import pytest

from cohort.registry import connect

PERSON_HEADER = ["person_id", "birth_date", "sex", "site", "death_date", "followup_end"]
ECG_HEADER = [
    "tracing_id", "person_id", "acquired_at", "site", "read_kind", "vent_rate", "atrial_rate",
    "pr_ms", "qrs_ms", "qt_ms", "qtc_ms", "p_axis", "qrs_axis", "t_axis", "statements",
    "statement_codes",
]


def write_csv(path: Path, header: list[str], rows: list[list]) -> Path:
    """Write a small export in the flat layout (rows as lists of values)."""
    with path.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle, lineterminator="\n")
        writer.writerow(header)
        writer.writerows(rows)
    return path


def ecg_row(tracing: str, person: str, **overrides) -> list:
    """A clean sinus-rhythm ECG row; keyword arguments replace columns by header name."""
    values = {
        "tracing_id": tracing, "person_id": person, "acquired_at": "2015-06-01T09:30:00",
        "site": "Harbourside General", "read_kind": "machine", "vent_rate": 68, "atrial_rate": 68,
        "pr_ms": 164, "qrs_ms": 92, "qt_ms": 392, "qtc_ms": 416, "p_axis": 52, "qrs_axis": 31,
        "t_axis": 40, "statements": "Sinus rhythm | Normal ECG", "statement_codes": "",
    }
    values.update(overrides)
    return [values[c] for c in ECG_HEADER]


@pytest.fixture
def registry(tmp_path):
    """A fresh registry file with the schema; closed after the test."""
    con = connect(tmp_path / "registry.duckdb")
    yield con
    con.close()


@pytest.fixture
def persons_file(tmp_path):
    """Three clean persons P1-P3 of a fictional clinic."""
    return write_csv(
        tmp_path / "persons.csv",
        PERSON_HEADER,
        [
            ["P1", "1948-02-11", "M", "Harbourside General", "", "2024-12-31"],
            ["P2", "1961-09-30", "F", "Larkspur Clinic", "2021-04-02", "2021-04-02"],
            ["P3", "1975-01-15", "F", "Larkspur Clinic", "", "2024-12-31"],
        ],
    )


@pytest.fixture(scope="session")
def synthetic_db(tmp_path_factory) -> dict[str, Any]:
    """A small synthetic registry (2,500 persons, seed 11), ingested and phenotyped with the
    rule sets the shipped specs use; returns paths of the registry and the exports."""
    from cohort.ingest import ingest
    from cohort.phenotype import run_phenotype
    from synthetic_registry import generate

    root = tmp_path_factory.mktemp("synthetic_registry")
    exports = root / "exports"
    generate(exports, persons=2500, seed=11)
    db = root / "registry.duckdb"
    con = connect(db)
    try:
        ingest(con, [exports])
        for rules in ("default-v1", "pr220-v1"):
            run_phenotype(con, rules)
    finally:
        con.close()
    return {"db": db, "exports": exports, "root": root}
