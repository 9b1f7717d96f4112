"""Locate and read the SQL files under ``sql/`` (the source of truth for data shaping)."""

from __future__ import annotations

from functools import cache
from pathlib import Path

_PACKAGED = Path(__file__).resolve().parent / "_sql"
_SOURCE_TREE = Path(__file__).resolve().parents[1] / "sql"


def sql_root() -> Path:
    """The ``sql/`` folder: packaged copy in a wheel, the repository folder in a checkout."""
    return _PACKAGED if _PACKAGED.is_dir() else _SOURCE_TREE


@cache
def read_sql(relative_path: str) -> str:
    """Text of ``sql/<relative_path>``; raises FileNotFoundError naming the path."""
    path = sql_root() / relative_path
    if not path.is_file():
        raise FileNotFoundError(f"SQL file not found: {path}")
    return path.read_text(encoding="utf-8")
