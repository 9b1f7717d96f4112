"""Injected defects: each one recorded exactly, on its own row, the rest of the file clean."""

from __future__ import annotations

import csv
import json
from pathlib import Path

import polars as pl
import pytest

from synthetic_registry import generate
from synthetic_registry.defects import EXPECTED

KINDS_ECG = set(EXPECTED)
KINDS_PERSON = {"duplicate_row", "unparseable_date", "malformed_line", "non_utf8"}


def defects(root: Path) -> list[dict[str, str]]:
    with (root / "truth" / "defects.csv").open(encoding="utf-8", newline="") as fh:
        return list(csv.DictReader(fh))


def lines(root: Path, name: str) -> tuple[list[str], list[bytes]]:
    raw = (root / name).read_bytes()
    assert raw.endswith(b"\n") and b"\r" not in raw
    parts = raw.split(b"\n")[:-1]
    return parts[0].decode("utf-8").split(","), parts[1:]


def parse(raw: bytes) -> list[str]:
    return next(csv.reader([raw.decode("utf-8", errors="backslashreplace")]))


def test_every_recorded_defect_is_in_the_file_as_recorded(defect_export):
    rows = defects(defect_export)
    assert rows
    files = {name: lines(defect_export, name) for name in ("ecgs.csv", "persons.csv")}
    for r in rows:
        header, data = files[r["file"]]
        raw = data[int(r["record"]) - 1]
        text = raw.decode("utf-8", errors="backslashreplace")
        kind = r["kind"]
        assert r["expected"] == EXPECTED[kind]
        if kind in ("duplicate_row", "resent_confirmed"):
            src = int(r["original"])
            assert src < int(r["record"]) and data[src - 1] == raw
        elif kind == "malformed_line":
            assert text == r["injected"] and len(parse(raw)) != len(header)
            assert text.count('"') % 2 == 0  # never an unbalanced quote
        elif kind == "non_utf8":
            with pytest.raises(UnicodeDecodeError):
                raw.decode("utf-8")
            assert parse(raw)[header.index(r["field"])] == r["injected"]
        else:
            assert parse(raw)[header.index(r["field"])] == r["injected"], r
            assert r["original"] != r["injected"]


def test_kinds_values_and_one_defect_per_row(defect_export):
    rows = defects(defect_export)
    keys = [(r["file"], int(r["record"])) for r in rows]
    assert len(keys) == len(set(keys))
    sources = {
        (r["file"], int(r["original"]))
        for r in rows
        if r["kind"] in ("duplicate_row", "resent_confirmed")
    }
    assert not sources & set(keys)  # never a copy of a defective row
    assert {r["kind"] for r in rows if r["file"] == "ecgs.csv"} == KINDS_ECG
    assert {r["kind"] for r in rows if r["file"] == "persons.csv"} <= KINDS_PERSON
    n_ecg = sum(r["file"] == "ecgs.csv" for r in rows)
    _, data = lines(defect_export, "ecgs.csv")
    assert 0.02 < n_ecg / len(data) < 0.04  # 3 % asked
    by = {r["kind"]: r for r in rows}
    assert float(by["pr_in_seconds"]["injected"]) * 1000 == pytest.approx(
        float(by["pr_in_seconds"]["original"])
    )
    bad = {r["injected"] for r in rows if r["kind"] == "impossible_value"}
    assert bad <= {"2500", "-5", "900", "0", "1500"}
    resent = [r for r in rows if r["kind"] == "resent_confirmed"]
    _, ecg_lines = lines(defect_export, "ecgs.csv")
    assert all(parse(ecg_lines[int(r["record"]) - 1])[4] == "confirmed" for r in resent)


def test_clean_rows_are_well_formed_and_counts_reconcile(defect_export):
    rows = defects(defect_export)
    for name in ("ecgs.csv", "persons.csv"):
        header, data = lines(defect_export, name)
        marked = {int(r["record"]) for r in rows if r["file"] == name}
        for i, raw in enumerate(data, start=1):
            if i not in marked:
                assert len(next(csv.reader([raw.decode("utf-8")]))) == len(header), (name, i)
        manifest = json.loads((defect_export / "truth" / "manifest.json").read_text())
        assert {f["path"]: f["rows"] for f in manifest["files"]}[name] == len(data)


def test_same_registry_as_the_clean_export(defect_export, clean_export):
    rows = defects(defect_export)
    for name in ("ecgs.csv", "persons.csv"):
        _, dirty = lines(defect_export, name)
        _, clean = lines(clean_export, name)
        copies = {
            int(r["record"]) for r in rows if r["file"] == name and r["expected"] == "duplicate"
        }
        edited = {
            int(r["record"]) for r in rows if r["file"] == name and r["expected"] != "duplicate"
        }
        kept = [(i, raw) for i, raw in enumerate(dirty, start=1) if i not in copies]
        assert len(kept) == len(clean)
        for (i, raw), want in zip(kept, clean, strict=True):
            assert (raw == want) != (i in edited), (name, i)


def test_quarantined_persons_have_no_dependent_rows(defect_export):
    rows = [
        r
        for r in defects(defect_export)
        if r["file"] == "persons.csv" and r["expected"] == "quarantine"
    ]
    assert rows
    _, data = lines(defect_export, "persons.csv")
    ids = {data[int(r["record"]) - 1].split(b",")[0].decode("ascii") for r in rows}
    for name in ("ecgs.csv", "procedures.csv", "diagnoses.csv"):
        used = set(
            pl.read_csv(
                defect_export / name,
                infer_schema_length=0,
                encoding="utf8-lossy",
                truncate_ragged_lines=True,
            )["person_id"]
        )
        assert not ids & used, name


def test_no_defects_means_header_only_defect_file(clean_export):
    assert defects(clean_export) == []
    for name in ("ecgs.csv", "persons.csv"):
        header, data = lines(clean_export, name)
        for raw in data:
            assert len(next(csv.reader([raw.decode("utf-8")]))) == len(header)


def test_unknown_persons_are_not_in_persons_file(defect_export):
    persons = set(
        pl.read_csv(
            defect_export / "persons.csv",
            infer_schema_length=0,
            encoding="utf8-lossy",
            truncate_ragged_lines=True,
        )["person_id"]
    )
    unknown = {r["injected"] for r in defects(defect_export) if r["kind"] == "unknown_person"}
    assert unknown and not unknown & persons


def test_defect_seed_is_deterministic(tmp_path):
    a = generate(tmp_path / "a", persons=500, seed=9, defects=0.05)
    b = generate(tmp_path / "b", persons=500, seed=9, defects=0.05)
    assert [f["sha256"] for f in a["files"]] == [f["sha256"] for f in b["files"]]
