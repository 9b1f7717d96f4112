"""Checking TOML tables against a key schema, with errors that name the file line.

Shared by the study spec (:mod:`cohort.study.spec`) and the per-kind analysis options
(:mod:`cohort.study.analyses`): unknown keys and wrong types raise
:class:`cohort.errors.SpecError` naming the key, the line of the spec file where it is (found
by scanning the text, since ``tomllib`` keeps no positions) and the nearest valid key.
"""

from __future__ import annotations

import copy
import datetime as dt
import difflib
import re
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from cohort.errors import SpecError

KeyPath = tuple[str | int, ...]

_HEADER = re.compile(r"^\[\s*([^\[\]]+?)\s*\]$")
_ARRAY_HEADER = re.compile(r"^\[\[\s*([^\[\]]+?)\s*\]\]$")
_ASSIGN = re.compile(r"^((?:[A-Za-z0-9_\-]+|\"[^\"]*\"|'[^']*')(?:\s*\.\s*(?:[A-Za-z0-9_\-]+|\"[^\"]*\"|'[^']*'))*)\s*=(.*)$")
_INLINE_KEY = re.compile(r"[{,]\s*([A-Za-z0-9_\-]+)\s*=")

REQUIRED = object()  # marker: the key has no default


def _split_key(text: str) -> list[str]:
    """Parts of a dotted TOML key (bare or quoted parts)."""
    parts = re.findall(r"\"([^\"]*)\"|'([^']*)'|([A-Za-z0-9_\-]+)", text)
    return [a or b or c for a, b, c in parts]


def _strip_comment(line: str) -> str:
    """The line without a trailing ``#`` comment (a ``#`` inside quotes is kept)."""
    quote = None
    for i, ch in enumerate(line):
        if quote:
            if ch == quote:
                quote = None
        elif ch in "\"'":
            quote = ch
        elif ch == "#":
            return line[:i]
    return line


def index_lines(text: str) -> dict[KeyPath, int]:
    """Line number (1-based) of every table header and key assignment in a TOML text.

    Paths are tuples of key parts; arrays of tables add the 0-based element number, e.g.
    ``("analyses", 1, "kind")``. Keys of one-line inline tables get the line of their parent.
    """
    index: dict[KeyPath, int] = {}
    current: KeyPath = ()
    counters: dict[KeyPath, int] = {}
    for number, raw in enumerate(text.splitlines(), start=1):
        line = _strip_comment(raw).strip()
        if not line:
            continue
        if m := _ARRAY_HEADER.match(line):
            parts = tuple(_split_key(m[1]))
            counters[parts] = counters.get(parts, -1) + 1
            current = (*parts, counters[parts])
            index.setdefault(current, number)
        elif m := _HEADER.match(line):
            current = tuple(_split_key(m[1]))
            index.setdefault(current, number)
        elif m := _ASSIGN.match(line):
            key = (*current, *_split_key(m[1]))
            index.setdefault(key, number)
            for sub in _INLINE_KEY.finditer(m[2]):
                index.setdefault((*key, sub[1]), number)
    return index


def dotted(path: KeyPath) -> str:
    """``("analyses", 1, "kind")`` -> ``analyses[2].kind`` (1-based element number)."""
    out = ""
    for part in path:
        if isinstance(part, int):
            out += f"[{part + 1}]"
        else:
            out += f".{part}" if out else str(part)
    return out


def nearest(word: str, valid: Sequence[str]) -> str | None:
    """The closest valid word (difflib), or None when nothing is close."""
    close = difflib.get_close_matches(word, list(valid), n=1, cutoff=0.6)
    return close[0] if close else None


@dataclass
class SpecSource:
    """The spec text and file name, to locate keys in error messages."""

    path: Path | None
    text: str
    _index: dict[KeyPath, int] = field(default_factory=dict, repr=False)

    def __post_init__(self) -> None:
        self._index = index_lines(self.text)

    def line_of(self, path: KeyPath) -> int | None:
        """Line of ``path``, else of its nearest enclosing table that is in the file."""
        for n in range(len(path), 0, -1):
            if path[:n] in self._index:
                return self._index[path[:n]]
        return None

    def where(self, path: KeyPath) -> str:
        """``spec.toml, line 12`` (or just the file name when the key is not in the text)."""
        name = self.path.name if self.path is not None else "spec"
        line = self.line_of(path)
        return f"{name}, line {line}" if line is not None else name

    def fail(self, path: KeyPath, message: str) -> SpecError:
        """A SpecError located at ``path`` (raise it)."""
        return SpecError(f"{self.where(path)}: {message}")


@dataclass(frozen=True)
class Key:
    """Schema of one key: accepted types, default, allowed values and a doc line."""

    types: tuple[type, ...]
    default: Any = None
    choices: tuple[Any, ...] | None = None
    doc: str = ""
    items: tuple[type, ...] | None = None  # element types of a list
    check: Callable[[Any], str | None] | None = None  # returns a problem text or None

    @property
    def required(self) -> bool:
        return self.default is REQUIRED


_TYPE_NAMES = {
    bool: "true/false",
    int: "a whole number",
    float: "a number",
    str: "a string",
    list: "a list",
    dict: "a table",
    dt.date: "a date (YYYY-MM-DD)",
}


def type_words(types: Sequence[type]) -> str:
    """Human words for a tuple of types ('a number or a string')."""
    names = [_TYPE_NAMES.get(t, t.__name__) for t in types if not (t is int and float in types)]
    return " or ".join(dict.fromkeys(names))


def _shown(value: Any) -> str:
    kind = {bool: "true/false", int: "number", float: "number", str: "string", list: "list",
            dict: "table"}.get(type(value), type(value).__name__)
    text = repr(value)
    return f"{kind} {text if len(text) <= 40 else text[:37] + '...'}"


def type_ok(value: Any, types: Sequence[type]) -> bool:
    """isinstance check where bool is not a number and int counts as float."""
    if isinstance(value, bool):
        return bool in types
    if isinstance(value, int) and float in types:
        return True
    if isinstance(value, dt.datetime):
        return False  # a date-time is not a date
    return isinstance(value, tuple(types))


def check_table(
    source: SpecSource,
    path: KeyPath,
    table: Any,
    schema: Mapping[str, Key],
    *,
    what: str | None = None,
) -> dict[str, Any]:
    """Validate ``table`` against ``schema``; return it with defaults filled in.

    Raises SpecError for a non-table, an unknown key (with the nearest valid key), a missing
    required key, a wrong type, an element of the wrong type or a value outside ``choices``.
    """
    label = what or (f"[{dotted(path)}]" if path else "the top level")
    if not isinstance(table, dict):
        raise source.fail(path, f"{dotted(path)} must be a table, got {_shown(table)}")
    for key in table:
        if key not in schema:
            hint = nearest(key, list(schema))
            tip = f"did you mean '{hint}'?" if hint else f"valid keys: {', '.join(schema)}"
            raise source.fail((*path, key), f"unknown key '{key}' in {label} ({tip})")
    out: dict[str, Any] = {}
    for key, spec in schema.items():
        if key not in table:
            if spec.required:
                raise source.fail(path, f"{label} lacks the required key '{key}' ({spec.doc})")
            out[key] = copy.deepcopy(spec.default)
            continue
        out[key] = check_value(source, (*path, key), table[key], spec)
    return out


def check_value(source: SpecSource, path: KeyPath, value: Any, spec: Key) -> Any:
    """Validate one value against its Key; dates given as text are parsed."""
    name = dotted(path)
    if dt.date in spec.types and isinstance(value, str):
        value = parse_date(source, path, value)
    if not type_ok(value, spec.types):
        raise source.fail(path, f"key '{name}' must be {type_words(spec.types)}, got {_shown(value)}")
    if isinstance(value, list) and spec.items:
        for i, item in enumerate(value):
            if dt.date in spec.items and isinstance(item, str):
                value[i] = item = parse_date(source, path, item)
            if not type_ok(item, spec.items):
                raise source.fail(
                    path,
                    f"element {i + 1} of '{name}' must be {type_words(spec.items)}, got {_shown(item)}",
                )
    if spec.choices is not None:
        values = value if isinstance(value, list) else [value]
        for item in values:
            if item not in spec.choices:
                hint = nearest(str(item), [str(c) for c in spec.choices])
                tip = f" (did you mean '{hint}'?)" if hint else ""
                raise source.fail(
                    path,
                    f"key '{name}' has the value {item!r}{tip}; allowed: "
                    f"{', '.join(map(str, spec.choices))}",
                )
    if spec.check is not None and (problem := spec.check(value)):
        raise source.fail(path, f"key '{name}' {problem}")
    return value


def parse_date(source: SpecSource, path: KeyPath, text: str) -> dt.date:
    """A date from 'YYYY-MM-DD' text (TOML date literals arrive as dates already)."""
    try:
        return dt.date.fromisoformat(text)
    except ValueError:
        raise source.fail(
            path, f"key '{dotted(path)}' has {text!r}, not a date; write YYYY-MM-DD, e.g. 2015-01-01"
        ) from None


# --------------------------------------------------------------------------- small checkers


def positive(value: Any) -> str | None:
    """Checker: the number must be > 0."""
    return None if value > 0 else f"must be > 0, got {value}"


def non_negative(value: Any) -> str | None:
    """Checker: the number must be >= 0."""
    return None if value >= 0 else f"must be >= 0, got {value}"


def alpha_level(value: Any) -> str | None:
    """Checker: a two-sided level strictly between 0 and 1."""
    return None if 0 < value < 1 else f"must lie strictly between 0 and 1 (e.g. 0.05), got {value}"


def increasing(value: Sequence[float]) -> str | None:
    """Checker: a non-empty, strictly increasing list."""
    if not value:
        return "must not be empty"
    bad = [i for i in range(1, len(value)) if value[i] <= value[i - 1]]
    if bad:
        return f"must be strictly increasing; element {bad[0] + 1} ({value[bad[0]]}) is not above {value[bad[0] - 1]}"
    return None


def distinct(value: Sequence[Any]) -> str | None:
    """Checker: no element listed twice."""
    seen = [v for i, v in enumerate(value) if v in value[:i]]
    return f"lists {seen[0]!r} twice" if seen else None


def date_window(value: Sequence[dt.date]) -> str | None:
    """Checker: a [start, end] pair of dates with start <= end."""
    if len(value) != 2:
        return f"must be [start, end] (two dates), got {len(value)} value(s)"
    if value[0] > value[1]:
        return f"starts after it ends ({value[0]} > {value[1]}); write [start, end]"
    return None
