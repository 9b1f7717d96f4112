"""Fixtures of the study tests: tiny hand-made registries and one small synthetic registry.

People, clinics and dates are invented (the fictional Heronsgate Clinic).
"""

from __future__ import annotations

import textwrap
from pathlib import Path

import duckdb
import pytest

from cohort.registry import ensure_schema
from cohort.study import build_cohort, parse_spec

_ECG_COLUMNS = (
    "ecg_key", "person_key", "acquired_at", "site", "read_kind", "ventricular_rate",
    "atrial_rate", "pr_ms", "qrs_ms", "qt_ms", "qtc_ms", "p_axis", "qrs_axis", "t_axis",
    "statements", "statement_codes", "source_id",
)
PACEMAKER_IMPLANT = "0JH606Z"  # ICD-10-PCS dual-chamber generator, chest (references.md)
HIGHER_GRADE_DX = "I44.2"  # ICD-10-CM complete AV block (references.md, level M)


class TinyRegistry:
    """Hand-made registry rows (persons, ECGs, procedures, diagnoses) and the phenotype run."""

    def __init__(self, con):
        self.con = con
        self._n = 0

    def person(self, key: str, birth: str = "1950-03-01", sex: str = "F", *,
               site: str = "Heronsgate Clinic", death: str | None = None,
               end: str = "2024-12-31") -> str:
        self.con.execute("INSERT INTO person VALUES (?, ?, ?, ?, ?, ?, 'test')",
                         [key, birth, sex, site, death, death or end])
        return key

    def ecg(self, person: str, at: str, *, pr: float | None = 160, qrs: float = 90,
            rate: float = 70, statements: list[str] | None = None) -> str:
        """One machine read; default a normal sinus ECG (PR 160 ms, QRS 90 ms)."""
        self._n += 1
        key = f"E{self._n:05d}"
        statements = ["Sinus rhythm"] if statements is None else statements
        values = (key, person, f"{at} 09:00:00", "Heronsgate Clinic", "machine", rate, rate, pr,
                  qrs, 400, 420, 50, 30, 40, statements, [], "test")
        self.con.execute(
            f"INSERT INTO ecg ({', '.join(_ECG_COLUMNS)}) VALUES ({', '.join('?' * len(values))})",
            list(values),
        )
        return key

    def block(self, person: str, at: str) -> str:
        """An ECG read as complete (third-degree) AV block: a higher-grade block."""
        return self.ecg(person, at, pr=None, rate=38,
                        statements=["Sinus rhythm", "Complete heart block"])

    def af(self, person: str, at: str) -> str:
        return self.ecg(person, at, pr=None, rate=95, statements=["Atrial fibrillation"])

    def implant(self, person: str, date: str) -> None:
        self.con.execute("INSERT INTO procedure VALUES (?, ?, 'ICD-10-PCS', ?, 'test')",
                         [person, date, PACEMAKER_IMPLANT])

    def diagnosis(self, person: str, date: str, code: str = HIGHER_GRADE_DX) -> None:
        self.con.execute("INSERT INTO diagnosis VALUES (?, ?, 'ICD-10-CM', ?, 'test')",
                         [person, date, code])

    def phenotype(self, rules: str = "default-v1") -> None:
        from cohort.phenotype import run_phenotype

        run_phenotype(self.con, rules, beats=False)


@pytest.fixture
def tiny():
    """An empty in-memory registry wrapped in a TinyRegistry."""
    con = duckdb.connect(":memory:")
    ensure_schema(con)
    yield TinyRegistry(con)
    con.close()


def spec_text(body: str, analyses: str | None = None) -> str:
    """A spec: [study] header, ``body``, and an analysis (a prevalence one by default)."""
    head = '[study]\nid = "test-study"\n'
    tail = analyses if analyses is not None else '[[analyses]]\nkind = "prevalence"\n'
    return head + textwrap.dedent(body) + "\n" + textwrap.dedent(tail)


def build(con, body: str, analyses: str | None = None, variant: str = "main"):
    """Parse a spec made of ``body`` and build its frames on ``con``."""
    spec = parse_spec(spec_text(body, analyses), Path("test.toml"))
    return build_cohort(con, spec, variant)
