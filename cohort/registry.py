"""Open a Dromos registry (an embedded DuckDB file) and make sure its schema exists."""

from __future__ import annotations

from pathlib import Path

import duckdb

from cohort.errors import RegistryError
from cohort.sqlfiles import read_sql

CANONICAL_TABLES = ("person", "ecg", "wave_event", "procedure", "diagnosis")
LOG_TABLES = ("quarantine", "repair", "duplicate", "load_log")


def connect(db_path: str | Path, *, create: bool = True, read_only: bool = False):
    """Connect to the registry file, creating the schema when ``create`` is true.

    Raises RegistryError when the file is missing (and ``create`` is false) or locked.
    """
    path = Path(db_path)
    if not create and not path.exists():
        raise RegistryError(
            f"registry {path} does not exist; create it with 'dromos ingest SOURCE --db {path}'"
        )
    try:
        con = duckdb.connect(str(path), read_only=read_only)
    except duckdb.IOException as exc:
        raise RegistryError(f"cannot open registry {path}: {exc}") from exc
    if create and not read_only:
        ensure_schema(con)
    return con


def ensure_schema(con) -> None:
    """Create the canonical tables, logs and views if they are missing (idempotent)."""
    con.execute(read_sql("schema/registry.sql"))


def table_counts(con) -> dict[str, int]:
    """Row count of every canonical and log table."""
    return {
        name: con.execute(f"SELECT count(*) FROM {name}").fetchone()[0]
        for name in CANONICAL_TABLES + LOG_TABLES
    }
