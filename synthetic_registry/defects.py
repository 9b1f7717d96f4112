"""Injected export faults (CSV only), each recorded exactly in truth/defects.csv.

Kinds and the ingest outcome expected for them (docs/export-format.md):
duplicate_row / resent_confirmed -> duplicate; pr_in_seconds -> repair; impossible_value,
unparseable_date, unknown_person, malformed_line, non_utf8 -> quarantine.
Every defect sits on its own row; a duplicated row is always a clean one; every record stays
on one line. ``record`` is the 1-based data row number in the file as written.
Bytes that are not valid UTF-8 are shown in defects.csv as ``\\xNN`` escapes.
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np
import polars as pl

from synthetic_registry.config import Config
from synthetic_registry.sinks import DATETIME_FORMAT, csv_bytes

COLUMNS = ("file", "record", "kind", "field", "original", "injected", "expected")
EXPECTED = {
    "duplicate_row": "duplicate",
    "resent_confirmed": "duplicate",
    "pr_in_seconds": "repair",
    "impossible_value": "quarantine",
    "unparseable_date": "quarantine",
    "unknown_person": "quarantine",
    "malformed_line": "quarantine",
    "non_utf8": "quarantine",
}
_IMPOSSIBLE = (
    ("qrs_ms", "2500"),
    ("vent_rate", "-5"),
    ("vent_rate", "900"),
    ("qt_ms", "0"),
    ("pr_ms", "1500"),
)
_LATIN1_BYTES = (b"\xe9", b"\xff", b"\xb0", b"\xe8")


class DefectLog:
    """Rows of truth/defects.csv."""

    def __init__(self) -> None:
        self.rows: list[tuple[str, int, str, str, str, str, str]] = []

    def add(
        self, file: str, record: int, kind: str, field: str, original: str, injected: str
    ) -> None:
        self.rows.append((file, record, kind, field, original, injected, EXPECTED[kind]))

    def write(self, path: Path) -> None:
        rows = sorted(self.rows, key=lambda r: (r[0], r[1]))
        with path.open("w", encoding="utf-8", newline="") as fh:
            w = csv.writer(fh, lineterminator="\n")
            w.writerow(COLUMNS)
            w.writerows(rows)


def show_bytes(raw: bytes) -> str:
    """Text of raw bytes with invalid UTF-8 shown as \\xNN."""
    return raw.decode("utf-8", errors="backslashreplace")


def quote_field(value: str | None) -> str:
    """RFC 4180 field: quoted when it holds a comma, quote or line break."""
    if value is None:
        return ""
    if any(ch in value for ch in ',"\n\r'):
        return '"' + value.replace('"', '""') + '"'
    return value


def _as_text(frame: pl.DataFrame) -> pl.DataFrame:
    """Every column as text exactly as the CSV writer renders it (null stays null)."""
    cols = []
    for name, dtype in frame.schema.items():
        if dtype == pl.Date:
            cols.append(pl.col(name).dt.strftime("%Y-%m-%d"))
        elif isinstance(dtype, pl.Datetime):
            cols.append(pl.col(name).dt.strftime(DATETIME_FORMAT))
        else:
            cols.append(pl.col(name).cast(pl.String))
    return frame.select(cols)


class _Plan:
    """Rows chosen for defects in one block, with the edits and copies to make."""

    def __init__(self, n: int) -> None:
        self.n = n
        self.used = np.zeros(n, dtype=bool)
        self.edits: list[
            tuple[int, str, str, str, str]
        ] = []  # row, kind, field, original, injected
        self.copies: list[tuple[int, str, float]] = []  # source row, kind, sort key
        self.lines: list[
            tuple[int, str, str, int]
        ] = []  # row, kind, field, position (line-level edits)

    def take(self, rng: np.random.Generator, eligible: np.ndarray) -> int | None:
        """A random unused eligible row (marked used), or None."""
        idx = np.flatnonzero(eligible & ~self.used)
        if idx.size == 0:
            return None
        row = int(idx[rng.integers(idx.size)])
        self.used[row] = True
        return row


def _kinds(rng: np.random.Generator, shares: dict[str, float], k: int) -> list[str]:
    names = list(shares)
    w = np.array(list(shares.values()), dtype=float)
    return [names[i] for i in rng.choice(len(names), size=k, p=w / w.sum())]


def inject_ecg_defects(
    cfg: Config,
    rng: np.random.Generator,
    frame: pl.DataFrame,
    rate: float,
    offset: int,
    log: DefectLog,
) -> tuple[bytes, int]:
    """CSV bytes (no header) of one block of ecgs.csv with defects; rows written."""
    text = _as_text(frame)
    n = text.height
    plan = _Plan(n)
    k = int(rng.binomial(n, rate)) if n else 0
    confirmed = (text["read_kind"] == "confirmed").to_numpy()
    for kind in _kinds(rng, cfg.value("defects", "ecg_kind_share"), k):
        if kind == "resent_confirmed":
            row = plan.take(rng, confirmed)
            if row is not None:
                plan.copies.append((row, kind, 2.0 * n + len(plan.copies)))
        elif kind == "duplicate_row":
            row = plan.take(rng, np.ones(n, dtype=bool))
            if row is not None:
                later = int(rng.integers(row + 1, n + 1))
                plan.copies.append((row, kind, 2.0 * later - 1.0 + 1e-6 * len(plan.copies)))
        else:
            _value_or_line_defect(rng, text, plan, kind)
    return _render(text, plan, "ecgs.csv", offset, log)


def inject_person_defects(
    cfg: Config,
    rng: np.random.Generator,
    frame: pl.DataFrame,
    busy: pl.Series,
    rate: float,
    offset: int,
    log: DefectLog,
) -> tuple[bytes, int]:
    """CSV bytes of one block of persons.csv with defects.

    Rows that would be quarantined are chosen among persons with no ECG, procedure or
    diagnosis rows, so that no clean row elsewhere depends on a rejected person.
    """
    text = _as_text(frame)
    n = text.height
    plan = _Plan(n)
    free = ~text["person_id"].is_in(busy.implode()).to_numpy() if n else np.zeros(0, dtype=bool)
    k = int(rng.binomial(n, rate * cfg.value("defects", "person_rate_factor"))) if n else 0
    for kind in _kinds(rng, cfg.value("defects", "person_kind_share"), k):
        if kind == "duplicate_row":
            row = plan.take(rng, np.ones(n, dtype=bool))
            if row is not None:
                later = int(rng.integers(row + 1, n + 1))
                plan.copies.append((row, kind, 2.0 * later - 1.0 + 1e-6 * len(plan.copies)))
        elif kind == "unparseable_date":
            row = plan.take(rng, free)
            if row is not None:
                orig = text["birth_date"][row]
                bad = _bad_birth_date(rng, orig)
                plan.edits.append((row, kind, "birth_date", orig, bad))
        elif kind == "non_utf8":
            row = plan.take(rng, free & ~_ascii(text["site"]))
            if row is not None:
                plan.lines.append((row, kind, "site", 0))
        elif kind == "malformed_line":
            row = plan.take(rng, free)
            if row is not None:
                plan.lines.append((row, kind, "", int(rng.integers(2 * len(text.columns)))))
    return _render(text, plan, "persons.csv", offset, log)


def _ascii(s: pl.Series) -> np.ndarray:
    return s.fill_null("").map_elements(str.isascii, return_dtype=pl.Boolean).to_numpy()


def _bad_birth_date(rng: np.random.Generator, orig: str) -> str:
    y, m, d = orig.split("-")
    options = (f"{y[:2]}xx-{m}-{d}", f"31/02/{y}", f"{y}-13-45", f"{y}-{m}-{d}T99")
    return options[int(rng.integers(len(options)))]


def _value_or_line_defect(
    rng: np.random.Generator, text: pl.DataFrame, plan: _Plan, kind: str
) -> None:
    """Plan one ECG value defect or line defect on an unused eligible row."""
    n = text.height
    if kind == "pr_in_seconds":
        row = plan.take(rng, text["pr_ms"].is_not_null().to_numpy())
        if row is not None:
            orig = text["pr_ms"][row]
            plan.edits.append((row, kind, "pr_ms", orig, f"{int(orig) / 1000:.3f}"))
    elif kind == "impossible_value":
        field, value = _IMPOSSIBLE[int(rng.integers(len(_IMPOSSIBLE)))]
        row = plan.take(rng, text[field].is_not_null().to_numpy())
        if row is not None:
            plan.edits.append((row, kind, field, text[field][row], value))
    elif kind == "unparseable_date":
        row = plan.take(rng, np.ones(n, dtype=bool))
        if row is not None:
            orig = text["acquired_at"][row]
            plan.edits.append((row, kind, "acquired_at", orig, _bad_timestamp(rng, orig)))
    elif kind == "unknown_person":
        row = plan.take(rng, np.ones(n, dtype=bool))
        if row is not None:
            fake = f"P9{int(rng.integers(0, 10_000_000)):07d}"
            plan.edits.append((row, kind, "person_id", text["person_id"][row], fake))
    elif kind == "malformed_line":
        row = plan.take(rng, np.ones(n, dtype=bool))
        if row is not None:
            plan.lines.append((row, kind, "", int(rng.integers(2 * len(text.columns)))))
    elif kind == "non_utf8":
        row = plan.take(rng, np.ones(n, dtype=bool))
        if row is not None:
            site_ascii = text["site"][row].isascii()
            plan.lines.append(
                (row, kind, "statements" if site_ascii else "site", int(rng.integers(1 << 30)))
            )


def _bad_timestamp(rng: np.random.Generator, orig: str) -> str:
    y, m = orig[:4], orig[5:7]
    hh, mm = orig[11:13], orig[14:16]
    options = (
        f"31/02/{y} 25:00",
        "yesterday",
        f"{y}-13-45",
        f"{y}-02-30T{hh}:{mm}:00",
        f"{y}-{m}-00T{hh}:{mm}:00",
    )
    return options[int(rng.integers(len(options)))]


def _render(
    text: pl.DataFrame, plan: _Plan, file: str, offset: int, log: DefectLog
) -> tuple[bytes, int]:
    """Apply edits, insert copies, serialize, patch line defects, log every defect."""
    for row, _kind, field, _orig, injected in plan.edits:
        col = text[field].clone()
        col.scatter(row, injected)
        text = text.with_columns(col)
    n = text.height
    keys = np.concatenate((2.0 * np.arange(n), np.array([c[2] for c in plan.copies], dtype=float)))
    source = np.concatenate((np.arange(n), np.array([c[0] for c in plan.copies], dtype=np.int64)))
    order = np.argsort(keys, kind="stable")
    position = np.empty(order.size, dtype=np.int64)
    position[order] = np.arange(order.size)  # final 0-based position of base rows and copies
    out = text.select(pl.all().gather(source[order])) if plan.copies else text
    lines = csv_bytes(out, header=False).split(b"\n")[:-1]
    for row, kind, field, choice in plan.lines:
        values = list(text.row(row))
        original = b",".join(quote_field(x).encode("utf-8") for x in values)
        raw, field_name = _broken_line(values, kind, field, text.columns, choice)
        lines[position[row]] = raw
        log.add(
            file,
            offset + int(position[row]) + 1,
            kind,
            field_name,
            show_bytes(original),
            show_bytes(raw)
            if kind == "malformed_line"
            else _field_shown(raw, values, text.columns, field),
        )
    for row, kind, field, orig, injected in plan.edits:
        log.add(file, offset + int(position[row]) + 1, kind, field, orig or "", injected)
    for j, (row, kind, _key) in enumerate(plan.copies):
        log.add(
            file,
            offset + int(position[n + j]) + 1,
            kind,
            "",
            str(offset + int(position[row]) + 1),
            "",
        )
    data = b"\n".join(lines) + b"\n" if lines else b""
    return data, len(lines)


def _broken_line(
    values: list[str | None], kind: str, field: str, columns: list[str], choice: int
) -> tuple[bytes, str]:
    """A malformed line (a field dropped or an extra delimiter) or a latin-1 field.

    ``choice`` (drawn at planning) picks the field and, for malformed lines, drop vs extra.
    """
    if kind == "malformed_line":
        j = choice % len(values)
        if choice < len(values):
            kept = values[:j] + values[j + 1 :]
            return b",".join(quote_field(x).encode("utf-8") for x in kept), columns[j]
        fields = [quote_field(x).encode("utf-8") for x in values]
        fields.insert(j + 1, b"")
        return b",".join(fields), columns[j]
    parts = []
    for name, x in zip(columns, values, strict=True):
        cell = quote_field(x)
        if name == field:
            cell_b = _latin1(cell) if field == "site" else _insert_byte(cell, choice)
        else:
            cell_b = cell.encode("utf-8")
        parts.append(cell_b)
    return b",".join(parts), field


def _latin1(cell: str) -> bytes:
    return cell.encode("latin-1", errors="replace")


def _insert_byte(cell: str, choice: int) -> bytes:
    """Insert one latin-1 byte at the end of a word of the statement text."""
    raw = cell.encode("utf-8")
    ends = [i for i in range(1, len(raw)) if raw[i] == 0x20 and chr(raw[i - 1]).isalnum()]
    at = ends[choice % len(ends)] if ends else len(raw) - (1 if raw.endswith(b'"') else 0)
    return raw[:at] + _LATIN1_BYTES[choice % len(_LATIN1_BYTES)] + raw[at:]


def _field_shown(raw: bytes, values: list[str | None], columns: list[str], field: str) -> str:
    """The injected field's value (unquoted) as shown text."""
    row = next(csv.reader([show_bytes(raw)]))
    return row[columns.index(field)]
