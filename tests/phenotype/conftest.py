"""Tiny hand-made registries for the phenotype tests (fictional clinics and people)."""

from __future__ import annotations

from typing import Any

import duckdb
import pytest

from cohort.registry import ensure_schema

_ECG_COLUMNS = (
    "ecg_key", "person_key", "acquired_at", "site", "read_kind", "ventricular_rate",
    "atrial_rate", "pr_ms", "qrs_ms", "qt_ms", "qtc_ms", "p_axis", "qrs_axis", "t_axis",
    "statements", "statement_codes", "source_id",
)


class RegistryBuilder:
    """Insert hand-made rows into an in-memory registry and run the phenotype on it."""

    def __init__(self, con):
        self.con = con
        self._n = 0

    def person(self, key: str = "P1", birth: str = "1950-03-01", sex: str = "F") -> RegistryBuilder:
        self.con.execute(
            "INSERT INTO person VALUES (?, ?, ?, 'Heronsgate Clinic', NULL, '2024-12-31', 'test')",
            [key, birth, sex],
        )
        return self

    def ecg(self, key: str | None = None, *, person: str = "P1", at: str | None = None,
            read_kind: str = "machine", vr: float | None = 70, ar: float | None = 70,
            pr: float | None = 160, qrs: float | None = 90, axis: float | None = 30,
            statements: list[str] | None = None, codes: list[str] | None = None) -> str:
        """Add one read; returns its ecg_key. Defaults: a normal adult sinus ECG."""
        self._n += 1
        key = key or f"E{self._n}"
        at = at or f"2015-01-{min(self._n, 28):02d} 09:00:00"
        statements = ["Sinus rhythm"] if statements is None else statements
        values = (key, person, at, "Heronsgate Clinic", read_kind, vr, ar, pr, qrs, 400, 420,
                  50, axis, 40, statements, codes or [], "test")
        self.con.execute(
            f"INSERT INTO ecg ({', '.join(_ECG_COLUMNS)}) VALUES ({', '.join('?' * len(values))})",
            list(values),
        )
        return key

    def procedure(self, person: str, date: str, code: str, system: str = "ICD-10-PCS") -> None:
        self.con.execute("INSERT INTO procedure VALUES (?, ?, ?, ?, 'test')", [person, date, system, code])

    def diagnosis(self, person: str, date: str, code: str, system: str = "ICD-10-CM") -> None:
        self.con.execute("INSERT INTO diagnosis VALUES (?, ?, ?, ?, 'test')", [person, date, system, code])

    def run(self, rules: str = "default-v1", **kwargs) -> dict[str, Any]:
        from cohort.phenotype import run_phenotype

        return run_phenotype(self.con, rules, **kwargs)

    def row(self, ecg_key: str, rules: str = "default-v1", table: str = "ecg_conduction") -> dict:
        cur = self.con.execute(
            f"SELECT * FROM {table} WHERE ecg_key = ? AND rule_set_id = ?", [ecg_key, rules]
        )
        cols = [d[0] for d in cur.description]
        rows = cur.fetchall()
        assert len(rows) == 1, f"{len(rows)} rows for {ecg_key} / {rules} in {table}"
        return dict(zip(cols, rows[0], strict=True))

    def person_row(self, person: str, rules: str = "default-v1") -> dict:
        cur = self.con.execute(
            "SELECT * FROM person_conduction WHERE person_key = ? AND rule_set_id = ?", [person, rules]
        )
        cols = [d[0] for d in cur.description]
        return dict(zip(cols, cur.fetchall()[0], strict=True))


@pytest.fixture
def reg():
    """An empty in-memory registry with one adult person P1, wrapped in a RegistryBuilder."""
    con = duckdb.connect(":memory:")
    ensure_schema(con)
    builder = RegistryBuilder(con)
    builder.person("P1")
    yield builder
    con.close()


def one_ecg(reg: RegistryBuilder, rules: str = "default-v1", **kwargs) -> dict:
    """Add one ECG with ``kwargs``, run the phenotype, return its ecg_conduction row."""
    key = reg.ecg(**kwargs)
    reg.run(rules)
    return reg.row(key, rules)
