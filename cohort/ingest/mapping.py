"""Mapping files: how a source layout maps onto the registry's canonical tables.

A mapping is TOML (see ``cohort/ingest/mappings/dromos-flat-v1.toml`` and ``docs/mapping.md``).
Loading validates every key; errors name the file, the key and the nearest valid key.
"""

from __future__ import annotations

import difflib
import fnmatch
import hashlib
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from cohort.errors import MappingError

MAPPINGS_DIR = Path(__file__).resolve().parent / "mappings"
BUILTIN_MAPPING = "dromos-flat-v1"

# Canonical columns each table accepts from a source, and which of them are required.
CANONICAL_COLUMNS: dict[str, tuple[str, ...]] = {
    "person": ("person_key", "birth_date", "sex", "site", "death_date", "followup_end"),
    "ecg": (
        "ecg_key", "person_key", "acquired_at", "site", "read_kind", "ventricular_rate",
        "atrial_rate", "pr_ms", "qrs_ms", "qt_ms", "qtc_ms", "p_axis", "qrs_axis", "t_axis",
        "statements", "statement_codes",
    ),
    "wave_event": ("ecg_key", "t_ms", "kind"),
    "procedure": ("person_key", "date", "code_system", "code"),
    "diagnosis": ("person_key", "date", "code_system", "code"),
}
REQUIRED_COLUMNS: dict[str, tuple[str, ...]] = {
    "person": ("person_key", "birth_date", "sex", "followup_end"),
    "ecg": ("ecg_key", "person_key", "acquired_at"),
    "wave_event": ("ecg_key", "t_ms", "kind"),
    "procedure": ("person_key", "date", "code"),
    "diagnosis": ("person_key", "date", "code"),
}
# Load order: a table's rows may only refer to tables loaded before it.
LOAD_ORDER = ("person", "ecg", "wave_event", "procedure", "diagnosis")
INTERVAL_COLUMNS = ("pr_ms", "qrs_ms", "qt_ms", "qtc_ms")

_TABLE_KEYS = {
    "files", "columns", "date_formats", "timestamp_formats", "sex_codes", "units",
    "read_kind_codes", "kind_codes", "statement_separator", "code_separator",
    "default_code_system",
}
_TOP_KEYS = {"mapping", "csv", "table"}
_CSV_KEYS = {"delimiter", "quote", "escape", "header"}
_MAPPING_KEYS = {"id", "description"}
_DEFAULTS: dict[str, dict] = {
    "person": {"date_formats": ["%Y-%m-%d"], "sex_codes": {"F": ["F"], "M": ["M"], "U": ["U"]}},
    "ecg": {
        "timestamp_formats": ["%Y-%m-%dT%H:%M:%S", "%Y-%m-%d %H:%M:%S", "%Y-%m-%d"],
        "statement_separator": " | ",
        "code_separator": ";",
        "units": {},
        "read_kind_codes": {"machine": ["machine"], "confirmed": ["confirmed"]},
    },
    "wave_event": {"kind_codes": {"P": ["P"], "QRS": ["QRS"]}},
    "procedure": {"date_formats": ["%Y-%m-%d"], "default_code_system": "ICD-10-PCS"},
    "diagnosis": {"date_formats": ["%Y-%m-%d"], "default_code_system": "ICD-10-CM"},
}


@dataclass(frozen=True)
class TableMapping:
    """How one canonical table is read from a source file."""

    table: str
    files: tuple[str, ...]
    columns: dict[str, str]
    options: dict = field(default_factory=dict)

    def matches(self, path: Path) -> bool:
        """True when the file name matches one of this table's file patterns."""
        return any(fnmatch.fnmatch(path.name, pattern) for pattern in self.files)

    def codes(self, name: str) -> dict[str, list[str]]:
        """A code map (canonical code -> source values) of this table."""
        return self.options.get(name, {})


@dataclass(frozen=True)
class Mapping:
    """A validated mapping file."""

    mapping_id: str
    path: Path
    sha256: str
    csv: dict
    tables: dict[str, TableMapping]

    def table_for(self, path: Path) -> TableMapping:
        """The table a source file feeds, from its file name."""
        hits = [t for t in self.tables.values() if t.matches(path)]
        if len(hits) == 1:
            return hits[0]
        patterns = "; ".join(f"{t.table}: {', '.join(t.files)}" for t in self.tables.values())
        if not hits:
            raise MappingError(
                f"{path}: the mapping {self.mapping_id} does not say which table this file "
                f"feeds. Rename the file to match a pattern ({patterns}) or pass --table."
            )
        names = ", ".join(t.table for t in hits)
        raise MappingError(f"{path}: file name matches several tables ({names}); pass --table.")


def _nearest(key: str, valid: set[str]) -> str:
    close = difflib.get_close_matches(key, sorted(valid), n=1)
    return f" (did you mean '{close[0]}'?)" if close else f" (valid keys: {', '.join(sorted(valid))})"


def _check_keys(where: str, given: dict, valid: set[str], path: Path) -> None:
    for key in given:
        if key not in valid:
            raise MappingError(f"{path}: unknown key '{key}' in [{where}]{_nearest(key, valid)}")


def _string_list(value, where: str, path: Path) -> list[str]:
    if isinstance(value, str):
        return [value]
    if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
        raise MappingError(f"{path}: [{where}] must be a string or a list of strings")
    return list(value)


def _check_codes_distinct(codes: dict[str, list[str]], where: str, path: Path) -> None:
    """A source value (compared case-insensitively) may stand for one code only."""
    seen: dict[str, str] = {}
    for code, values in codes.items():
        for value in values:
            earlier = seen.setdefault(value.lower(), code)
            if earlier != code:
                raise MappingError(
                    f"{path}: [{where}] maps '{value}' to both '{earlier}' and '{code}'; "
                    "give each source value one code"
                )


def _table_mapping(name: str, spec: dict, path: Path) -> TableMapping:
    if name not in CANONICAL_COLUMNS:
        raise MappingError(f"{path}: unknown table [table.{name}]{_nearest(name, set(CANONICAL_COLUMNS))}")
    _check_keys(f"table.{name}", spec, _TABLE_KEYS, path)
    columns = spec.get("columns")
    if not isinstance(columns, dict) or not columns:
        raise MappingError(f"{path}: [table.{name}.columns] is missing; map canonical names to source columns")
    _check_keys(f"table.{name}.columns", columns, set(CANONICAL_COLUMNS[name]), path)
    for canonical, source in columns.items():
        if not isinstance(source, str) or not source:
            raise MappingError(f"{path}: [table.{name}.columns] {canonical} must name a source column")
    missing = [c for c in REQUIRED_COLUMNS[name] if c not in columns]
    if missing:
        raise MappingError(f"{path}: [table.{name}.columns] lacks required column(s) {', '.join(missing)}")
    options = {k: v for k, v in _DEFAULTS.get(name, {}).items()}
    options.update({k: v for k, v in spec.items() if k not in ("files", "columns")})
    for key in ("date_formats", "timestamp_formats"):
        if key in options:
            options[key] = _string_list(options[key], f"table.{name}.{key}", path)
    for key in ("sex_codes", "read_kind_codes", "kind_codes"):
        if key in options:
            if not isinstance(options[key], dict):
                raise MappingError(f"{path}: [table.{name}.{key}] must be a table of lists")
            options[key] = {c: _string_list(v, f"table.{name}.{key}.{c}", path) for c, v in options[key].items()}
            _check_codes_distinct(options[key], f"table.{name}.{key}", path)
    for column, unit in options.get("units", {}).items():
        if column not in INTERVAL_COLUMNS:
            raise MappingError(f"{path}: [table.{name}.units] {column} is not an interval column{_nearest(column, set(INTERVAL_COLUMNS))}")
        if unit not in ("ms", "s"):
            raise MappingError(f"{path}: [table.{name}.units] {column} = '{unit}': use \"ms\" or \"s\"")
    files = tuple(_string_list(spec.get("files", []), f"table.{name}.files", path))
    return TableMapping(table=name, files=files, columns=dict(columns), options=options)


def load_mapping(path_or_id: str | Path | None = None) -> Mapping:
    """Read and validate a mapping file (a path, or the id of a built-in mapping)."""
    if path_or_id is None:
        path_or_id = BUILTIN_MAPPING
    path = Path(path_or_id)
    if not path.is_file():
        builtin = MAPPINGS_DIR / f"{path_or_id}.toml"
        if not builtin.is_file():
            known = ", ".join(p.stem for p in MAPPINGS_DIR.glob("*.toml"))
            raise MappingError(f"mapping '{path_or_id}' is neither a file nor a built-in mapping ({known})")
        path = builtin
    raw_bytes = path.read_bytes()
    try:
        doc = tomllib.loads(raw_bytes.decode("utf-8"))
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise MappingError(f"{path}: not valid TOML: {exc}") from exc
    _check_keys("top level", doc, _TOP_KEYS, path)
    meta = doc.get("mapping", {})
    _check_keys("mapping", meta, _MAPPING_KEYS, path)
    csv_options = {"delimiter": ",", "quote": '"', "escape": '"', "header": True}
    _check_keys("csv", doc.get("csv", {}), _CSV_KEYS, path)
    csv_options.update(doc.get("csv", {}))
    tables = {name: _table_mapping(name, spec, path) for name, spec in doc.get("table", {}).items()}
    if not tables:
        raise MappingError(f"{path}: no [table.*] sections; map at least one table")
    return Mapping(
        mapping_id=str(meta.get("id", path.stem)),
        path=path,
        sha256=hashlib.sha256(raw_bytes).hexdigest(),
        csv=csv_options,
        tables=tables,
    )
