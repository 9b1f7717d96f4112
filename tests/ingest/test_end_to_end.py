"""End to end: synthesize a small registry (clean and with defects), ingest it, reconcile.

Checks the loader against the generator's own record of what it wrote (manifest) and what it
injected (truth/defects.csv): every injected defect is quarantined, repaired or marked
duplicate as recorded, and nothing else is lost except records that depend on a quarantined
one (an ECG of a quarantined person, a wave of a tracing whose reads were all quarantined).
"""

from __future__ import annotations

import json

import pandas as pd
import pytest

from cohort.ingest.loader import ingest
from cohort.registry import connect
from synthetic_registry import generate

TABLE_OF_FILE = {
    "persons.csv": "person", "ecgs.csv": "ecg", "wave_events.csv": "wave_event",
    "procedures.csv": "procedure", "diagnoses.csv": "diagnosis",
}


def _load_defective(out, persons: int, seed: int, rate: float):
    generate(out, persons=persons, seed=seed, fmt="csv", defects=rate)
    con = connect(out / "registry.duckdb")
    results = ingest(con, [out])
    return out, con, {r.path.name: r for r in results}


@pytest.fixture(scope="module")
def defective(tmp_path_factory):
    loaded = _load_defective(tmp_path_factory.mktemp("synth_defects"), 1500, 5, 0.03)
    yield loaded
    loaded[1].close()


def _outcomes(con, source_id: str) -> dict[str, set[int]]:
    def records(table: str) -> set[int]:
        rows = con.execute(f"SELECT DISTINCT record FROM {table} WHERE source_id = ?", [source_id]).fetchall()
        return {r[0] for r in rows}

    return {"quarantine": records("quarantine"), "repair": records("repair"), "duplicate": records("duplicate")}


def test_counts_match_the_generator_manifest(defective):
    _check_counts(*defective)


def _check_counts(out, con, results):
    manifest = json.loads((out / "truth" / "manifest.json").read_text())
    rows_written = {f["path"]: f["rows"] for f in manifest["files"]}
    for name, result in results.items():
        assert result.rows_read == rows_written[name], name
        assert result.reconciles
        loaded = con.execute(f"SELECT count(*) FROM {TABLE_OF_FILE[name]} WHERE source_id = ?", [result.source_id]).fetchone()[0]
        assert loaded == result.rows_loaded


def test_every_injected_defect_has_its_expected_outcome(defective):
    _check_defect_outcomes(*defective)


def _check_defect_outcomes(out, con, results):
    defects = pd.read_csv(out / "truth" / "defects.csv")
    assert set(defects["kind"]) >= {
        "duplicate_row", "resent_confirmed", "pr_in_seconds", "impossible_value",
        "unparseable_date", "unknown_person", "malformed_line", "non_utf8",
    }
    for name, group in defects.groupby("file"):
        outcomes = _outcomes(con, results[name].source_id)
        for row in group.itertuples():
            assert row.record in outcomes[row.expected], (name, row.record, row.kind, row.expected)


def test_nothing_else_is_lost(defective):
    _check_nothing_else_lost(*defective)


def _check_nothing_else_lost(out, con, results):
    defects = pd.read_csv(out / "truth" / "defects.csv")
    for name in ("persons.csv", "ecgs.csv"):
        got = _outcomes(con, results[name].source_id)
        injected = {kind: set(g["record"]) for kind, g in defects[defects.file == name].groupby("expected")}
        assert got["duplicate"] == injected.get("duplicate", set()), name
        assert got["repair"] == injected.get("repair", set()), name
        extra = got["quarantine"] - injected.get("quarantine", set())
        for record in extra:  # only ECGs of a person whose own row was quarantined
            reasons = {r[0] for r in con.execute(
                "SELECT reason FROM quarantine WHERE source_id = ? AND record = ?",
                [results[name].source_id, record]).fetchall()}
            assert name == "ecgs.csv" and reasons == {
                "unknown person (not in the registry; load the person file first)"}, (name, record, reasons)

    # Waves are quarantined only when no read of their tracing was loaded.
    loaded_tracings = {r[0] for r in con.execute("SELECT DISTINCT ecg_key FROM ecg").fetchall()}
    waves = con.execute(
        "SELECT raw_value, reason FROM quarantine WHERE source_id = ?", [results["wave_events.csv"].source_id]
    ).fetchall()
    for tracing, reason in waves:
        assert reason.startswith("unknown tracing") and tracing not in loaded_tracings


@pytest.mark.scale
def test_defects_round_trip_in_exports_read_on_several_threads(tmp_path):
    """Exports of tens of MB are read in parallel blocks; records must keep their numbers."""
    out, con, results = _load_defective(tmp_path, 60_000, 11, 0.005)
    try:
        _check_counts(out, con, results)
        _check_defect_outcomes(out, con, results)
        _check_nothing_else_lost(out, con, results)
    finally:
        con.close()


def test_clean_export_loads_every_row(tmp_path):
    generate(tmp_path, persons=400, seed=2, fmt="csv")
    con = connect(tmp_path / "registry.duckdb")
    results = ingest(con, [tmp_path])
    for result in results:
        assert result.rows_quarantined == 0, result
        assert result.rows_loaded + result.rows_duplicate == result.rows_read
    con.close()


def test_flat_and_fhir_renderings_load_the_same_registry(tmp_path):
    flat, fhir = tmp_path / "flat", tmp_path / "fhir"
    generate(flat, persons=300, seed=9, fmt="csv")
    generate(fhir, persons=300, seed=9, fmt="fhir")
    tables = {}
    for name, folder in (("flat", flat), ("fhir", fhir)):
        con = connect(folder / "registry.duckdb")
        ingest(con, [folder])
        tables[name] = {
            t: con.execute(f"SELECT * EXCLUDE (source_id) FROM {t} ORDER BY ALL").df()
            for t in ("person", "ecg", "procedure", "diagnosis")
        }
        con.close()
    for table in ("person", "ecg", "procedure", "diagnosis"):
        pd.testing.assert_frame_equal(tables["flat"][table], tables["fhir"][table], check_dtype=False, obj=table)
