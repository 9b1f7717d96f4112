"""Determinism, layout and manifest of synthetic_registry.generate."""

from __future__ import annotations

import csv
import dataclasses
import hashlib
import json
import re
from pathlib import Path

import polars as pl
import pyarrow.parquet as pq
import pytest

import synthetic_registry.generator as gen
from cohort.cli import main
from cohort.errors import DataError
from cohort.vocabulary import AV_CATEGORIES, RHYTHM_CLASSES, VENTRICULAR_CONDUCTION
from synthetic_registry import generate
from synthetic_registry.config import load_config

DOCS = Path(__file__).resolve().parents[2] / "docs" / "export-format.md"
FLAT = ("persons", "ecgs", "wave_events", "procedures", "diagnoses")


def documented_columns() -> dict[str, list[str]]:
    """Column names per flat file, read from the table in docs/export-format.md."""
    out = {}
    for line in DOCS.read_text(encoding="utf-8").splitlines():
        m = re.match(r"\| `(\w+)\.csv` \|[^|]*\| (.*) \|$", line)
        if m:
            out[m.group(1)] = re.findall(r"(?:^|, )`(\w+)`", m.group(2))
    return out


def sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_same_seed_same_bytes_other_seed_differs(tmp_path):
    a = generate(tmp_path / "a", persons=400, seed=3)
    b = generate(tmp_path / "b", persons=400, seed=3)
    c = generate(tmp_path / "c", persons=400, seed=4)
    assert [f["sha256"] for f in a["files"]] == [f["sha256"] for f in b["files"]]
    differ = {
        f["path"] for f, g in zip(a["files"], c["files"], strict=True) if f["sha256"] != g["sha256"]
    }
    assert {f"{k}.csv" for k in FLAT} <= differ


def test_output_independent_of_chunk_size(tmp_path, monkeypatch):
    # Blocks of 250 persons so that 900 persons span four random streams.
    cfg = load_config()
    params = json.loads(json.dumps(cfg.params))
    params["network"]["block_persons"]["value"] = 250
    small = dataclasses.replace(cfg, params=params)
    monkeypatch.setattr(gen, "load_config", lambda: small)
    a = generate(tmp_path / "a", persons=900, seed=2, chunk_persons=1)
    b = generate(tmp_path / "b", persons=900, seed=2, chunk_persons=10_000)
    assert [f["sha256"] for f in a["files"]] == [f["sha256"] for f in b["files"]]


def test_manifest_lists_every_file_with_rows_and_sha(clean_export):
    manifest = json.loads((clean_export / "truth" / "manifest.json").read_text())
    paths = {f["path"] for f in manifest["files"]}
    assert {f"{k}.csv" for k in FLAT} | {
        "truth/persons_truth.parquet",
        "truth/ecg_truth.parquet",
    } <= paths
    for f in manifest["files"]:
        path = clean_export / f["path"]
        assert sha(path) == f["sha256"]
        if path.suffix == ".csv":
            with path.open(newline="", encoding="utf-8") as fh:
                assert sum(1 for _ in csv.reader(fh)) - 1 == f["rows"]
        elif path.suffix == ".parquet":
            assert pq.ParquetFile(path).metadata.num_rows == f["rows"]


def test_csv_headers_match_docs(clean_export):
    cols = documented_columns()
    assert set(cols) == set(FLAT)
    for name, expected in cols.items():
        with (clean_export / f"{name}.csv").open(encoding="utf-8") as fh:
            assert fh.readline().rstrip("\n").split(",") == expected


def read_ecgs(root: Path) -> pl.DataFrame:
    return pl.read_csv(root / "ecgs.csv", infer_schema_length=0)


def test_csv_values_have_documented_types(clean_export):
    persons = pl.read_csv(clean_export / "persons.csv", infer_schema_length=0)
    for col in ("birth_date", "followup_end"):
        assert persons[col].str.to_date("%Y-%m-%d", strict=True).null_count() == 0
    assert persons["death_date"].drop_nulls().str.to_date("%Y-%m-%d", strict=True).null_count() == 0
    assert set(persons["sex"]) <= {"F", "M", "U"}
    assert persons["person_id"].is_unique().all()

    ecgs = read_ecgs(clean_export)
    assert ecgs["acquired_at"].str.to_datetime("%Y-%m-%dT%H:%M:%S", strict=True).null_count() == 0
    assert set(ecgs["read_kind"]) == {"machine", "confirmed"}
    for col in (
        "vent_rate",
        "atrial_rate",
        "pr_ms",
        "qrs_ms",
        "qt_ms",
        "qtc_ms",
        "p_axis",
        "qrs_axis",
        "t_axis",
    ):
        assert ecgs[col].drop_nulls().str.contains(r"^-?\d+$").all(), col
    assert ecgs["statements"].null_count() == 0
    codes = ecgs["statement_codes"].drop_nulls()
    assert codes.str.contains(r"^SNOMED:\d+(;SNOMED:\d+)*$").all()
    # (tracing_id, read_kind) is unique and every confirmed read has its machine read.
    assert ecgs.select("tracing_id", "read_kind").is_unique().all()
    machine = set(ecgs.filter(pl.col("read_kind") == "machine")["tracing_id"])
    assert set(ecgs.filter(pl.col("read_kind") == "confirmed")["tracing_id"]) <= machine
    assert set(ecgs["person_id"]) <= set(persons["person_id"])

    waves = pl.read_csv(clean_export / "wave_events.csv", infer_schema_length=0)
    assert set(waves["kind"]) == {"P", "QRS"}
    assert waves["t_ms"].str.contains(r"^\d+$").all()
    assert set(waves["tracing_id"]) <= machine

    codes_csv = {(r["code_system"], r["code"]) for r in load_config().codes}
    for name, date_col in (("procedures", "procedure_date"), ("diagnoses", "diagnosis_date")):
        frame = pl.read_csv(clean_export / f"{name}.csv", infer_schema_length=0)
        assert frame[date_col].str.to_date("%Y-%m-%d", strict=True).null_count() == 0
        assert set(zip(frame["code_system"], frame["code"], strict=True)) <= codes_csv
    dx = pl.read_csv(clean_export / "diagnoses.csv", infer_schema_length=0)
    assert dx["code"].str.contains(r"^[A-Z]\d\d\.\d{1,2}$").all()  # ICD-10-CM with the dot


def test_parquet_has_typed_columns(tmp_path):
    generate(tmp_path, persons=300, seed=1, fmt="parquet")
    ecgs = pq.read_schema(tmp_path / "ecgs.parquet")
    assert str(ecgs.field("acquired_at").type).startswith("timestamp")
    assert str(ecgs.field("pr_ms").type) == "int32"
    persons = pq.read_schema(tmp_path / "persons.parquet")
    assert str(persons.field("birth_date").type) == "date32[day]"
    assert (
        pq.read_schema(tmp_path / "procedures.parquet").field("procedure_date").type.id
        == persons.field("birth_date").type.id
    )


def test_parquet_and_csv_carry_the_same_registry(tmp_path):
    generate(tmp_path / "p", persons=300, seed=8, fmt="parquet")
    generate(tmp_path / "c", persons=300, seed=8)
    a = pl.read_parquet(tmp_path / "p" / "ecgs.parquet")
    b = pl.read_csv(
        tmp_path / "c" / "ecgs.csv", schema_overrides={"acquired_at": pl.Datetime("ms")}
    )
    assert a.height == b.height
    assert a["statements"].to_list() == b["statements"].to_list()
    assert a["pr_ms"].cast(pl.Int64).to_list() == b["pr_ms"].cast(pl.Int64).to_list()


def test_truth_uses_vocabulary_codes(clean_export):
    et = pl.read_parquet(clean_export / "truth" / "ecg_truth.parquet")
    assert set(et["rhythm"]) <= set(RHYTHM_CLASSES)
    assert set(et["av_category"]) <= set(AV_CATEGORIES)
    assert set(et["ventricular_conduction"]) <= set(VENTRICULAR_CONDUCTION)
    machine = read_ecgs(clean_export).filter(pl.col("read_kind") == "machine")
    assert et["tracing_id"].to_list() == machine["tracing_id"].to_list()


def test_parameters_have_sources_and_true_effects(clean_export):
    params = json.loads((clean_export / "truth" / "parameters.json").read_text())
    assert params["generator"]["seed"] == 11
    for name, p in params["parameters"].items():
        assert set(p) == {"value", "source"} and p["source"].strip(), name
    effects = {(e["endpoint"], e["term"]): e for e in params["true_effects"]}
    # Death per 20 ms PR: HR 1.08 (Cheng S et al. 2009, JAMA 301:2571).
    assert effects[("death", "pr_per_20ms")]["log_hr"] == pytest.approx(0.0770, abs=1e-3)
    assert effects[("higher_grade", "pr_per_20ms")]["exact"] is True
    assert effects[("pacemaker_any", "pr_per_20ms")]["exact"] is False


def test_bad_arguments_raise_data_error(tmp_path):
    with pytest.raises(DataError, match="format"):
        generate(tmp_path, persons=10, fmt="xml")
    with pytest.raises(DataError, match="CSV files only"):
        generate(tmp_path, persons=10, fmt="parquet", defects=0.01)
    with pytest.raises(DataError, match="persons"):
        generate(tmp_path, persons=0)


def test_progress_reaches_total(tmp_path):
    seen = []
    generate(tmp_path, persons=250, seed=1, progress=lambda done, total: seen.append((done, total)))
    assert seen[-1] == (250, 250)


def test_cli_end_to_end(tmp_path, capsys):
    rc = main(["synth", "--persons", "300", "--seed", "2", "--out", str(tmp_path), "--no-progress"])
    assert rc == 0
    out = capsys.readouterr().out
    assert "ecgs.csv" in out and "rows" in out and "manifest.json" in out
    assert (tmp_path / "truth" / "manifest.json").exists()
    assert main(["synth", "--persons", "-3", "--out", str(tmp_path / "x"), "--no-progress"]) == 2
