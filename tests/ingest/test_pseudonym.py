"""Keyed pseudonymization: HMAC-SHA256 in SQL equals the standard; key never stored."""

from __future__ import annotations

import duckdb
import pytest

from cohort.errors import InputFileError
from cohort.ingest.loader import load_file
from cohort.ingest.pseudonym import define_person_key_macro, python_pseudonym, read_key
from tests.conftest import ECG_HEADER, ecg_row, write_csv

KEY = b"kestrel-valley-demo-key-0001"


def test_sql_hmac_matches_rfc_4231_test_case_2():
    # RFC 4231 (Nystrom 2005), test case 2: key "Jefe", data "what do ya want for nothing?",
    # HMAC-SHA-256 = 5bdcc146bf60754e6a042426089575c75a003f089d2739839dec58b964ec3843.
    con = duckdb.connect()
    define_person_key_macro(con, b"Jefe")
    got = con.execute("SELECT dromos_person_key('what do ya want for nothing?')").fetchone()[0]
    assert got == "5bdcc146bf60754e6a042426089575c75a003f089d2739839dec58b964ec3843"[:32]


def test_sql_hmac_matches_python_for_long_keys():
    # Keys longer than the 64-byte block are hashed first (RFC 2104, section 2).
    long_key = b"k" * 100
    con = duckdb.connect()
    define_person_key_macro(con, long_key)
    assert con.execute("SELECT dromos_person_key('P000042')").fetchone()[0] == python_pseudonym(long_key, "P000042")


def test_pseudonymized_load_keeps_links_and_never_stores_ids_or_key(registry, persons_file, tmp_path):
    load_file(registry, persons_file, key=KEY)
    load_file(registry, write_csv(tmp_path / "ecgs.csv", ECG_HEADER, [ecg_row("T1", "P1")]), key=KEY)
    keys = {r[0] for r in registry.execute("SELECT person_key FROM person").fetchall()}
    assert keys == {python_pseudonym(KEY, p) for p in ("P1", "P2", "P3")}
    assert registry.execute("SELECT person_key FROM ecg").fetchone()[0] == python_pseudonym(KEY, "P1")
    registry.execute("CHECKPOINT")
    raw = (tmp_path / "registry.duckdb").read_bytes()
    assert KEY not in raw


def test_loading_with_another_key_or_none_is_refused(registry, persons_file, tmp_path):
    load_file(registry, persons_file, key=KEY)
    ecgs = write_csv(tmp_path / "ecgs.csv", ECG_HEADER, [ecg_row("T1", "P1")])
    with pytest.raises(InputFileError, match="different pseudonym key"):
        load_file(registry, ecgs, key=b"another-key-of-enough-length")
    with pytest.raises(InputFileError, match="pseudonymized ids"):
        load_file(registry, ecgs)


def test_key_sources(tmp_path, monkeypatch):
    path = tmp_path / "key.txt"
    path.write_bytes(KEY + b"\n")
    assert read_key(path) == KEY
    monkeypatch.setenv("DROMOS_PSEUDONYM_KEY", "short")
    with pytest.raises(InputFileError, match="shorter than 16"):
        read_key(use_env=True)
    monkeypatch.delenv("DROMOS_PSEUDONYM_KEY")
    with pytest.raises(InputFileError, match="not set"):
        read_key(use_env=True)
    assert read_key() is None
