"""Statistical disclosure control of the exported tables: small cells, complementary suppression.

``apply_disclosure(tables_dir, threshold)`` rewrites, in place, every CSV of a run folder
(``tables/*.csv`` and beside them ``attrition.csv`` and ``exposure.csv``) so that no count of
1 to ``threshold - 1`` persons or events can be read or worked out from what is published.
Withheld values are written as the marker of ``disclosure.toml`` ("suppressed"); no
unsuppressed copy is kept.

How (cell suppression for linked tables, in the tradition of tabular disclosure control, e.g.
Hundepool A et al. (2012) Statistical Disclosure Control, Wiley, chapter 4; recalled from
memory):

1. Every published count is a *cell* with a logical identity (what it counts: e.g. persons of
   the study cohort with sex F and first-degree AV block at index). The same quantity printed
   in several tables (prevalence, Table 1, exposure levels, attrition) is one cell, so it is
   withheld everywhere or nowhere.
2. *Lines* are the additive relations the tables publish: a margin equals the sum of its
   parts (over sex, age band, category, site, period...), a flow box equals the persons
   excluded plus those remaining, persons at risk equal censored + events + competing events,
   numbers at risk fall by the exits between two times. Sensitivity variants that only add
   exclusions (or shorten the counting window) count subsets of the main analysis, so
   ``main = variant + difference`` is a line whose difference is never published.
3. Primary suppression: counts of 1 .. threshold - 1 (zero stays visible).
4. Complementary suppression, repeated until nothing changes: (a) no line may have exactly
   one withheld cell (it would follow by subtraction); (b) in a line with a published total
   the withheld cells, expanded through the lines below them, must hold 0 or at least
   ``threshold`` together (else their sum is itself a small count); (c) an exact audit:
   no primary cell may be determined by the published lines taken together (null space of
   the linear system of withheld cells, per linked group). Each violation withholds the
   smallest (non-zero first) published cell of the offending line; grand totals (registry
   persons, persons included) are taken last.
5. Estimates, intervals and test statistics computed from a withheld count are withheld in
   the same row (a proportion from a withheld numerator, a rate from withheld events).
6. Curves at every event time (Kaplan-Meier, Aalen-Johansen, hazards, state occupation)
   are individual-level event times: their per-time counts are withheld, and the curve is
   published only at the times where at least ``threshold`` events have accumulated since
   the previous published point and at least ``threshold`` persons remain at risk; estimates
   at fixed times with fewer than ``threshold`` events so far are withheld.

Limits (said in the log and the report): the audit covers exact recovery and small sums of
suppressed cells along lines; it does not bound every linear combination by linear
programming, and differences between rule-set variants (which reclassify persons rather
than drop them) are not modelled.
"""

from __future__ import annotations

import csv
import json
import math
import tomllib
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

CONFIG_FILE = Path(__file__).resolve().parent / "disclosure.toml"
_CONFIG = tomllib.loads(CONFIG_FILE.read_text(encoding="utf-8"))["suppression"]
#: Default threshold: counts below it (and above zero) are suppressed.
DEFAULT_THRESHOLD: int = int(_CONFIG["threshold"])
#: Text written in place of a withheld value.
MARKER: str = str(_CONFIG["marker"])
EXACT_AUDIT_MAX_CELLS: int = int(_CONFIG["exact_audit_max_cells"])
#: File of the disclosure log, beside ``tables/``.
LOG_FILE = "disclosure.json"

CellId = tuple
Position = tuple[int, int, int]  # table, row, column


# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class TableLog:
    """What suppression did to one table (no values, no positions by reason)."""

    file: str
    schema: str
    count_cells: int
    withheld_counts: int
    withheld_values: int


@dataclass(frozen=True)
class DisclosureLog:
    """Summary of a disclosure pass: settings, per-table counts, audit, notes."""

    enabled: bool
    threshold: int
    marker: str
    tables: tuple[TableLog, ...]
    primary: int
    complementary: int
    rounds: int
    audit: str
    notes: tuple[str, ...] = ()
    hashes: tuple[tuple[str, str], ...] = ()  # (file, sha256) of every table after the pass

    @property
    def withheld(self) -> int:
        """Cells written as the marker, over all tables."""
        return sum(t.withheld_counts + t.withheld_values for t in self.tables)

    def to_dict(self) -> dict[str, Any]:
        return {"enabled": self.enabled, "threshold": self.threshold, "marker": self.marker,
                "primary_cells": self.primary, "complementary_cells": self.complementary,
                "rounds": self.rounds, "audit": self.audit, "notes": list(self.notes),
                "tables": [t.__dict__ for t in self.tables],
                "sha256": dict(self.hashes)}

    @classmethod
    def read(cls, path: Path) -> DisclosureLog:
        d = json.loads(Path(path).read_text(encoding="utf-8"))
        return cls(d["enabled"], d["threshold"], d["marker"],
                   tuple(TableLog(**t) for t in d["tables"]), d["primary_cells"],
                   d["complementary_cells"], d["rounds"], d["audit"], tuple(d["notes"]),
                   tuple(d.get("sha256", {}).items()))

    def matches(self, out_dir: Path) -> bool:
        """True when every table of ``out_dir`` is the one this log's pass wrote."""
        current = dict(_table_hashes(out_dir))
        return bool(self.hashes) and current == dict(self.hashes)

    def write(self, path: Path) -> Path:
        path.write_text(json.dumps(self.to_dict(), indent=2, ensure_ascii=False) + "\n",
                        encoding="utf-8")
        return path


def _table_hashes(out_dir: Path) -> list[tuple[str, str]]:
    import hashlib

    files = [*(out_dir / n for n in ("attrition.csv", "exposure.csv")),
             *sorted((out_dir / "tables").glob("*.csv"))]
    return [(str(p.relative_to(out_dir)), hashlib.sha256(p.read_bytes()).hexdigest())
            for p in files if p.is_file()]


def disabled_log(tables_dir: Path) -> DisclosureLog:
    """The log of a run whose tables were left unsuppressed (internal use only); written too."""
    tables_dir = Path(tables_dir)
    files = sorted(p.name for p in tables_dir.glob("*.csv"))
    tables = tuple(TableLog(f, "none", 0, 0, 0) for f in files)
    log = DisclosureLog(False, 0, MARKER, tables, 0, 0, 0, "not run: disclosure control off",
                        ("disclosure control was switched off: tables hold small counts and "
                         "must not leave the analysis environment",),
                        tuple(_table_hashes(tables_dir.parent)))
    log.write(tables_dir.parent / LOG_FILE)
    return log


# --------------------------------------------------------------------------- tables


@dataclass
class Table:
    """One CSV file as text rows (unchanged cells are written back byte for byte)."""

    path: Path
    header: list[str]
    rows: list[list[str]]
    kind: str | None = None
    part: str | None = None
    analysis: str | None = None
    schema: str = "none"
    withheld: set[tuple[int, int]] = field(default_factory=set)

    @property
    def name(self) -> str:
        return self.path.name

    def col(self, name: str) -> int | None:
        return self.header.index(name) if name in self.header else None

    def text(self, r: int, name: str) -> str:
        c = self.col(name)
        return "" if c is None else self.rows[r][c]

    def write(self, marker: str) -> None:
        rows = [list(r) for r in self.rows]
        for r, c in self.withheld:
            rows[r][c] = marker
        with self.path.open("w", encoding="utf-8", newline="") as handle:
            writer = csv.writer(handle, lineterminator="\n")
            writer.writerow(self.header)
            writer.writerows(rows)


def read_table(path: Path) -> Table:
    """Read a CSV written by the run layer (UTF-8, RFC 4180) as text."""
    with Path(path).open(encoding="utf-8", newline="") as handle:
        reader = csv.reader(handle)
        header = next(reader, [])
        rows = [row for row in reader]
    return Table(Path(path), header, rows)


def _as_int(text: str) -> int | None:
    """A whole count from its text, else None (missing, fractional, marker)."""
    if text == "" or text == MARKER:
        return None
    try:
        value = float(text)
    except ValueError:
        return None
    if not math.isfinite(value) or value != int(value) or value < 0:
        return None
    return int(value)


def _as_float(text: str) -> float | None:
    try:
        return float(text)
    except ValueError:
        return None


# --------------------------------------------------------------------------- the model


class Model:
    """Cells (logical counts with their positions), lines and derived values of a run folder."""

    def __init__(self, tables: list[Table]) -> None:
        self.tables = tables
        self.values: dict[CellId, int] = {}
        self.positions: dict[CellId, list[Position]] = {}
        self.priority: dict[CellId, int] = {}
        self.virtual: dict[CellId, None] = {}
        self.lines: dict[tuple[CellId, tuple[CellId, ...]], None] = {}
        self.derived: list[tuple[int, int, tuple[int, ...], tuple[CellId, ...]]] = []
        self.notes: list[str] = []
        self._cell_count: dict[int, int] = {}

    # building ---------------------------------------------------------------
    def count(self, t: int, r: int, column: str, cid: CellId, priority: int = 0) -> CellId | None:
        """Register the count at (table t, row r, column) as cell ``cid``; None if not a count."""
        table = self.tables[t]
        c = table.col(column)
        if c is None:
            return None
        value = _as_int(table.rows[r][c])
        if value is None:
            return None
        if cid in self.values and self.values[cid] != value:
            # Two places disagree: the mapping is wrong for this table; keep them apart.
            self.notes.append(f"{table.name} row {r + 2} column {column}: value {value} differs "
                              f"from the same quantity elsewhere ({self.values[cid]}); "
                              "treated as a separate cell")
            cid = (*cid, ("~at", table.name, r, column))
        self.values[cid] = value
        self.positions.setdefault(cid, []).append((t, r, c))
        self.priority[cid] = max(priority, self.priority.get(cid, 0))
        self._cell_count[t] = self._cell_count.get(t, 0) + 1
        return cid

    def derive(self, t: int, r: int, columns: Iterable[str], deps: Iterable[CellId | None]) -> None:
        """Columns of row r withheld when any of ``deps`` is withheld."""
        table = self.tables[t]
        cols = tuple(c for c in (table.col(n) for n in columns) if c is not None)
        deps = tuple(d for d in deps if d is not None)
        if cols and deps:
            self.derived.append((t, r, cols, deps))

    def line(self, total: CellId | None, parts: Sequence[CellId | None]) -> None:
        """total = sum(parts); ignored when the total or every part is not a cell."""
        parts = tuple(dict.fromkeys(p for p in parts if p is not None and p in self.values))
        if total is None or total not in self.values or not parts:
            return
        self.lines[(total, parts)] = None

    def add_virtual(self, cid: CellId, value: int) -> None:
        self.values[cid] = value
        self.virtual[cid] = None
        self.priority[cid] = 0

    def margin_lines(self) -> None:
        """Lines over every partition dimension: a cell equals the sum over one of its dims.

        Cell ids are (namespace, measure, dims) with dims a sorted tuple of (name, value);
        names starting with "~" are labels, not partitions (a step, a time, an outcome).
        """
        children: dict[tuple[CellId, str], list[CellId]] = {}
        for cid in self.values:
            if cid in self.virtual or len(cid) != 3 or not isinstance(cid[2], tuple):
                continue
            ns, measure, dims = cid
            for i, (name, _value) in enumerate(dims):
                if name.startswith("~"):
                    continue
                parent = (ns, measure, dims[:i] + dims[i + 1:])
                if parent in self.values:
                    children.setdefault((parent, name), []).append(cid)
        for (parent, _name), kids in children.items():
            self.line(parent, kids)

    def cells_of_table(self, t: int) -> int:
        return self._cell_count.get(t, 0)


def cell(ns: tuple, measure: str, **dims: Any) -> CellId:
    """A cell id: namespace, measure and dimensions (None / "" values are left out)."""
    items = tuple(sorted((k, str(v)) for k, v in dims.items() if v not in (None, "")))
    return (ns, measure, items)


# --------------------------------------------------------------------------- protection


class _Protector:
    """Primary and complementary suppression over the model's lines (see module docstring)."""

    def __init__(self, model: Model, threshold: int) -> None:
        self.m = model
        self.k = threshold
        self.by_cell: dict[CellId, list[int]] = {}
        self.line_list = list(model.lines)
        for i, (total, parts) in enumerate(self.line_list):
            for c in (total, *parts):
                self.by_cell.setdefault(c, []).append(i)
        self.totals: dict[CellId, list[int]] = {}
        for i, (total, _parts) in enumerate(self.line_list):
            self.totals.setdefault(total, []).append(i)
        self.sensitive = {c for c, v in model.values.items() if 0 < v < threshold}
        self.primary = {c: None for c in model.values if c in self.sensitive and c not in model.virtual}
        self.S: dict[CellId, None] = {**self.primary, **model.virtual}
        self.rounds = 0
        self.audit = "exact"

    # checks -----------------------------------------------------------------
    def _unknown(self, i: int) -> list[CellId]:
        total, parts = self.line_list[i]
        return [c for c in (total, *parts) if c in self.S]

    def _simple(self) -> list[int]:
        out = []
        for i in range(len(self.line_list)):
            unknown = self._unknown(i)
            if len(unknown) == 1:
                u = unknown[0]
                if u not in self.m.virtual or u in self.sensitive:
                    out.append(i)
        return out

    def _mass(self, c: CellId, memo: dict, depth: int = 0) -> tuple[int, tuple[CellId, ...]]:
        """Smallest withheld mass behind a withheld cell, with the published cells it subtracts."""
        if c in memo:
            return memo[c]
        memo[c] = (self.m.values[c], ())  # guard against cycles
        best = (self.m.values[c], ())
        if depth < 12:
            for i in self.totals.get(c, []):
                _, parts = self.line_list[i]
                mass, seen = 0, []
                for p in parts:
                    if p in self.S:
                        sub, sub_seen = self._mass(p, memo, depth + 1)
                        mass += sub
                        seen.extend(sub_seen)
                    else:
                        seen.append(p)
                if mass < best[0]:
                    best = (mass, tuple(seen))
        memo[c] = best
        return best

    def _mass_violations(self) -> list[tuple[int, tuple[CellId, ...]]]:
        out, memo = [], {}
        for i, (total, parts) in enumerate(self.line_list):
            if total in self.S:
                continue
            hidden = [p for p in parts if p in self.S]
            if not hidden:
                continue
            mass, seen = 0, [p for p in parts if p not in self.S]
            for p in hidden:
                sub, sub_seen = self._mass(p, memo)
                mass += sub
                seen.extend(sub_seen)
            if 0 < mass < self.k:
                out.append((i, tuple(dict.fromkeys(seen))))
        return out

    def _exact_violations(self) -> list[CellId]:
        """Sensitive withheld cells determined by the published lines (null-space test)."""
        unknown = list(self.S)
        index = {c: j for j, c in enumerate(unknown)}
        parent = list(range(len(unknown)))

        def find(a: int) -> int:
            while parent[a] != a:
                parent[a] = parent[parent[a]]
                a = parent[a]
            return a

        eqs = []
        for i in range(len(self.line_list)):
            u = self._unknown(i)
            if not u:
                continue
            eqs.append(i)
            for c in u[1:]:
                ra, rb = find(index[u[0]]), find(index[c])
                if ra != rb:
                    parent[max(ra, rb)] = min(ra, rb)
        groups: dict[int, list[CellId]] = {}
        for c in unknown:
            groups.setdefault(find(index[c]), []).append(c)
        group_eqs: dict[int, list[int]] = {}
        for i in eqs:
            group_eqs.setdefault(find(index[self._unknown(i)[0]]), []).append(i)
        out = []
        for root, cells in groups.items():
            if not any(c in self.sensitive for c in cells):
                continue
            if len(cells) > EXACT_AUDIT_MAX_CELLS:
                self.audit = (f"exact audit skipped for a group of {len(cells)} linked withheld "
                              f"cells (limit {EXACT_AUDIT_MAX_CELLS}); checked by subtraction")
                continue
            out.extend(self._determined(cells, group_eqs.get(root, [])))
        return out

    def _determined(self, cells: list[CellId], eqs: list[int]) -> list[CellId]:
        if not eqs:
            return []
        col = {c: j for j, c in enumerate(cells)}
        a = np.zeros((len(eqs), len(cells)))
        for r, i in enumerate(eqs):
            total, parts = self.line_list[i]
            if total in col:
                a[r, col[total]] += 1.0
            for p in parts:
                if p in col:
                    a[r, col[p]] -= 1.0
        _, s, vt = np.linalg.svd(a, full_matrices=True)
        rank = int((s > 1e-9 * max(1.0, s.max(initial=0.0))).sum())
        null = vt[rank:]
        weight = np.sqrt((null ** 2).sum(axis=0)) if null.size else np.zeros(len(cells))
        return [c for c in cells if c in self.sensitive and weight[col[c]] < 1e-9]

    # fixing -----------------------------------------------------------------
    def _choose(self, candidates: Iterable[CellId]) -> CellId | None:
        pool = [c for c in dict.fromkeys(candidates) if c not in self.S and c not in self.m.virtual]
        if not pool:
            return None
        return min(pool, key=lambda c: (self.m.priority.get(c, 0), self.m.values[c] == 0,
                                         self.m.values[c], repr(c)))

    def _line_cells(self, i: int) -> list[CellId]:
        total, parts = self.line_list[i]
        return [*parts, total]

    def run(self) -> None:
        while True:
            self.rounds += 1
            changed = False
            for i in self._simple():
                if len(self._unknown(i)) == 1:
                    changed |= self._add(self._choose(self._line_cells(i)))
            if not changed:
                for i, seen in self._mass_violations():
                    changed |= self._add(self._choose([*seen, self.line_list[i][0]]))
            if not changed:
                for c in self._exact_violations():
                    lines = sorted(self.by_cell.get(c, []), key=lambda i: len(self._line_cells(i)))
                    for i in lines:
                        if self._add(self._choose(self._line_cells(i))):
                            changed = True
                            break
            if not changed:
                return

    def _add(self, c: CellId | None) -> bool:
        if c is None or c in self.S:
            return False
        self.S[c] = None
        return True


def protect(model: Model, threshold: int) -> _Protector:
    """Run primary and complementary suppression; the protector holds the withheld set ``S``."""
    p = _Protector(model, threshold)
    p.run()
    return p


# --------------------------------------------------------------------------- schemas

Builder = Callable[[Model, int, "RunInfo"], None]
SCHEMAS: dict[tuple[str, str], Builder] = {}


def register_schema(kind: str, part: str) -> Callable[[Builder], Builder]:
    """Decorator: the builder of cells, lines and derived values of one (kind, part)."""
    def wrap(fn: Builder) -> Builder:
        SCHEMAS[(kind, part)] = fn
        return fn
    return wrap


@dataclass(frozen=True)
class RunInfo:
    """What run.json tells about the run: analyses (name -> kind) and variants."""

    analyses: dict[str, str]
    variants: tuple[dict, ...]

    @classmethod
    def read(cls, out_dir: Path) -> RunInfo:
        path = out_dir / "run.json"
        if not path.is_file():
            return cls({}, ())
        doc = json.loads(path.read_text(encoding="utf-8"))
        return cls({a["name"]: a["kind"] for a in doc.get("analyses", [])},
                   tuple(doc.get("variants", [])))


def _rows(model: Model, t: int) -> Iterable[tuple[int, dict[str, str]]]:
    table = model.tables[t]
    for r, row in enumerate(table.rows):
        yield r, dict(zip(table.header, row, strict=False))


COHORT = "cohort"
AXIS_COLUMN = {"av": "av_category", "ventricular": "ventricular_conduction", "rhythm": "rhythm_class"}
ESTIMATE_COLUMNS = ("estimate", "lower", "upper", "se", "crude", "p", "slope", "statistic", "z",
                    "hr", "se_naive", "log_hr", "ph_p")


def cohort_total(variant: str) -> CellId:
    """Cell of the persons included in a variant's study cohort."""
    return cell((COHORT, variant), "persons")


@register_schema("attrition", "flow")
def _attrition(m: Model, t: int, info: RunInfo) -> None:
    by_variant: dict[str, list[tuple[int, dict[str, str]]]] = {}
    for r, row in _rows(m, t):
        by_variant.setdefault(row["variant"], []).append((r, row))
    for v, rows in by_variant.items():
        ns = ("attrition", v)
        last = len(rows) - 1

        def remaining(i: int, v: str = v, ns: tuple = ns, last: int = last) -> CellId:
            return cohort_total(v) if i == last else cell(ns, "remaining", **{"~step": i})

        for i, (r, _row) in enumerate(rows):
            excluded = cell(ns, "excluded", **{"~step": i})
            if i == 0:
                m.count(t, r, "n_before", remaining(0), priority=1)
                m.count(t, r, "n_remaining", remaining(0), priority=1)
                m.count(t, r, "n_excluded", excluded)
                continue
            m.count(t, r, "n_before", remaining(i - 1), priority=1 if i - 1 == 0 else 0)
            m.count(t, r, "n_excluded", excluded)
            m.count(t, r, "n_remaining", remaining(i), priority=1 if i == last else 0)
            m.line(remaining(i - 1), [excluded, remaining(i)])
        m.priority[cohort_total(v)] = 1


@register_schema("exposure", "levels")
def _exposure(m: Model, t: int, info: RunInfo) -> None:
    for r, row in _rows(m, t):
        if row.get("level"):
            m.count(t, r, "persons", cell((COHORT, row["variant"]), "persons",
                                          exposure=row["level"], sex=row.get("sex")))


def _prevalence_ns(row: dict[str, str]) -> tuple[tuple, dict[str, str]]:
    if row.get("basis") == "calendar_year":
        return ("ecg_year", row["variant"]), {"year": row.get("year", "")}
    return (COHORT, row["variant"]), {}


@register_schema("prevalence", "estimates")
def _prevalence_estimates(m: Model, t: int, info: RunInfo) -> None:
    for r, row in _rows(m, t):
        ns, extra = _prevalence_ns(row)
        dims = {**extra, "sex": row.get("sex"), "age_band_index": row.get("age_band")}
        n = m.count(t, r, "n", cell(ns, "persons", **dims))
        events = m.count(t, r, "events", cell(ns, "persons", **dims,
                                               **{AXIS_COLUMN[row["axis"]]: row["category"]}))
        m.derive(t, r, ("estimate", "lower", "upper"), (n, events))


@register_schema("prevalence", "standardized")
def _prevalence_standardized(m: Model, t: int, info: RunInfo) -> None:
    for r, row in _rows(m, t):
        ns, extra = _prevalence_ns(row)
        sex = None if row.get("sex") == "all" else row.get("sex")
        n = m.count(t, r, "population", cell(ns, "persons", **extra, sex=sex))
        events = m.count(t, r, "events", cell(ns, "persons", **extra, sex=sex,
                                               **{AXIS_COLUMN[row["axis"]]: row["category"]}))
        m.derive(t, r, ("crude", "estimate", "se", "lower", "upper"), (n, events))


@register_schema("prevalence", "trend")
def _prevalence_trend(m: Model, t: int, info: RunInfo) -> None:
    for r, row in _rows(m, t):
        ns, _ = _prevalence_ns(row)
        sex = None if row.get("sex") == "all" else row.get("sex")
        cat = {AXIS_COLUMN[row["axis"]]: row["category"]}
        n = m.count(t, r, "n", cell(ns, "persons", sex=sex))
        events = m.count(t, r, "events", cell(ns, "persons", sex=sex, **cat))
        deps = [n, events]
        if ns[0] == "ecg_year":  # the slope also depends on every published year
            first, last = _as_int(row.get("first_year", "")), _as_int(row.get("last_year", ""))
            if first is not None and last is not None:
                for y in range(first, last + 1):
                    deps += [cell(ns, "persons", year=y, sex=sex),
                             cell(ns, "persons", year=y, sex=sex, **cat)]
        m.derive(t, r, ("estimate", "lower", "upper", "slope", "se", "p"), deps)


def _incidence_dims(row: dict[str, str], persons: bool) -> dict[str, str | None]:
    age_key = "~attained_age" if persons else "attained_age"
    return {"exposure": row.get("exposure"), "sex": row.get("sex"), "site": row.get("site"),
            age_key: row.get("age_band")}


@register_schema("incidence", "rates")
def _incidence_rates(m: Model, t: int, info: RunInfo) -> None:
    for r, row in _rows(m, t):
        ns = ("incidence", row["variant"], row["endpoint"])
        m.count(t, r, "persons", cell(ns, "at_risk", **_incidence_dims(row, True)))
        events = m.count(t, r, "events", cell(ns, "events", **_incidence_dims(row, False)))
        m.derive(t, r, ("estimate", "lower", "upper"), (events,))


@register_schema("incidence", "rate_ratios")
def _incidence_ratios(m: Model, t: int, info: RunInfo) -> None:
    for r, row in _rows(m, t):
        ns = ("incidence", row["variant"], row["endpoint"])
        var = row["variable"]
        e1 = m.count(t, r, "events", cell(ns, "events", **{var: row["term"]}))
        e0 = m.count(t, r, "events_reference", cell(ns, "events", **{var: row["reference"]}))
        m.derive(t, r, ("estimate", "lower", "upper", "p"), (e1, e0))


@register_schema("incidence", "follow_up")
def _incidence_follow_up(m: Model, t: int, info: RunInfo) -> None:
    groups: dict[tuple[str, str], dict[str, CellId]] = {}
    for r, row in _rows(m, t):
        ns = ("incidence", row["variant"], row["endpoint"])
        outcome = row["outcome"]
        if outcome == "at_risk":
            cid = cell(ns, "at_risk")
        elif outcome == "event":
            cid = cell(ns, "events")
        else:
            cid = cell(ns, "outcome", **{"~outcome": outcome})
        got = m.count(t, r, "persons", cid)
        if got is not None:
            groups.setdefault((row["variant"], row["endpoint"]), {})[outcome] = got
    for (variant, _endpoint), cells in groups.items():
        at_risk = cells.get("at_risk")
        m.line(at_risk, [c for o, c in cells.items() if o != "at_risk" and not o.startswith("not_at_risk")])
        m.line(cohort_total(variant), [at_risk, *(c for o, c in cells.items() if o.startswith("not_at_risk"))])


_TABLE_ONE_GROUP = {"exposure": "exposure", "sex": "sex", "site": "site"}


def _table_one_group_dim(info: RunInfo, analysis: str | None, m: Model, t: int) -> str:
    """Which person attribute the groups of a Table 1 are (from the group labels)."""
    groups = {row.get("group") for _, row in _rows(m, t)} - {"overall"}
    if groups and groups <= {"F", "M", "U"}:
        return "sex"
    exposure_levels = {c[2][0][1] for c in m.values if len(c) == 3 and c[1] == "persons"
                       and len(c[2]) == 1 and c[2][0][0] == "exposure"}
    if groups and groups <= exposure_levels:
        return "exposure"
    return "site" if groups else "group"


@register_schema("table_one", "table")
def _table_one(m: Model, t: int, info: RunInfo) -> None:
    """Table 1: group sizes, recorded/missing counts and level counts of every variable.

    Levels and "(missing)" partition a group for a categorical variable; for a continuous
    one the missing count is a label ("~missing") beside the recorded count.
    """
    gdim = _table_one_group_dim(info, m.tables[t].analysis, m, t)
    rows = list(_rows(m, t))
    categorical = {(row["variant"], row["variable"]) for _, row in rows if row.get("level")}
    levels: dict[tuple[str, str, str], list[CellId]] = {}
    recorded: dict[tuple[str, str, str], CellId | None] = {}
    every: dict[tuple[str, str], list[CellId | None]] = {}
    for r, row in rows:
        v, var, group, stat = row["variant"], row["variable"], row["group"], row["statistic"]
        ns, gd = (COHORT, v), ({} if group == "overall" else {gdim: group})
        if var == "group_size":
            m.count(t, r, "value", cell(ns, "persons", **gd))
            continue
        miss_dim = var if (v, var) in categorical else f"~missing:{var}"
        missing = m.count(t, r, "n_missing", cell(ns, "persons", **gd, **{miss_dim: "(missing)"}))
        found = None
        if stat == "n_nonmissing":
            found = recorded[(v, var, group)] = m.count(t, r, "value", cell(ns, f"recorded:{var}", **gd))
            m.line(cell(ns, "persons", **gd), [found, missing])
        elif stat == "n" and row.get("level"):
            found = m.count(t, r, "value", cell(ns, "persons", **gd, **{var: row["level"]}))
            levels.setdefault((v, var, group), []).append(found)
        every.setdefault((v, var), []).extend([found, missing])
    for key, cells in levels.items():
        m.line(recorded.get(key), cells)
    for r, row in rows:
        v, var, group, stat = row["variant"], row["variable"], row["group"], row["statistic"]
        if var == "group_size":
            continue
        ns, gd = (COHORT, v), ({} if group == "overall" else {gdim: group})
        rec = recorded.get((v, var, group))
        if stat == "percent":
            m.derive(t, r, ("value",), (cell(ns, "persons", **gd, **{var: row["level"]}), rec))
        elif stat not in ("n", "n_nonmissing"):
            m.derive(t, r, ("value",), (rec,))
        m.derive(t, r, ("smd",), every.get((v, var), []))


def _sq_ns(row: dict[str, str], analysis: str | None) -> tuple:
    return ("site_quality", row["variant"], analysis or "", row["endpoint"])


def _sq_period(row: dict[str, str]) -> str | None:
    return row.get("period_start") or None


@register_schema("site_quality", "rates")
def _sq_rates(m: Model, t: int, info: RunInfo) -> None:
    from cohort.study.quality_kinds import NETWORK

    for r, row in _rows(m, t):
        ns = _sq_ns(row, m.tables[t].analysis)
        site = None if row["site"] == NETWORK else row["site"]
        m.count(t, r, "persons", cell(ns, "persons", site=site))
        events = m.count(t, r, "events", cell(ns, "events", site=site))
        m.derive(t, r, ("estimate", "lower", "upper"), (events,))


@register_schema("site_quality", "funnel")
def _sq_funnel(m: Model, t: int, info: RunInfo) -> None:
    for r, row in _rows(m, t):
        events = m.count(t, r, "events", cell(_sq_ns(row, m.tables[t].analysis), "events",
                                               site=row["site"]))
        m.derive(t, r, ("estimate",), (events,))


@register_schema("site_quality", "u_chart")
def _sq_u_chart(m: Model, t: int, info: RunInfo) -> None:
    from cohort.study.quality_kinds import NETWORK

    for r, row in _rows(m, t):
        site = None if row["site"] == NETWORK else row["site"]
        events = m.count(t, r, "events", cell(_sq_ns(row, m.tables[t].analysis), "events",
                                               site=site, period=row["period"]))
        m.derive(t, r, ("estimate",), (events,))


@register_schema("site_quality", "outliers")
def _sq_outliers(m: Model, t: int, info: RunInfo) -> None:
    from cohort.study.quality_kinds import NETWORK

    for r, row in _rows(m, t):
        site = None if row["site"] == NETWORK else row["site"]
        events = m.count(t, r, "events", cell(_sq_ns(row, m.tables[t].analysis), "events",
                                               site=site, period=row.get("period") or None))
        m.derive(t, r, ("estimate",), (events,))


@register_schema("site_quality", "funnel_curve")
def _no_counts(m: Model, t: int, info: RunInfo) -> None:
    """Tables without counts (limits, curves of a model)."""


for _kind, _part in (("cox", "ph_test"), ("cox", "hr_curve"), ("fine_gray", "ph_test"),
                     ("fine_gray", "hr_curve"), ("time_updated_cox", "ph_test"),
                     ("time_updated_cox", "hr_curve")):
    register_schema(_kind, _part)(_no_counts)


def _model_counts(columns: Sequence[str], derived: Sequence[str]) -> Builder:
    """Builder for tables whose count columns are per-model totals (n, events)."""
    def build(m: Model, t: int, info: RunInfo) -> None:
        table = m.tables[t]
        for r, row in _rows(m, t):
            ns = ("model", row["variant"], table.analysis or table.name, row.get("endpoint", ""),
                  row.get("model", ""), row.get("landmark", ""), row.get("cause", ""),
                  row.get("term", "") if "statistic" in row else "")
            cids = [m.count(t, r, c, cell(ns, c)) for c in columns]
            m.derive(t, r, derived, cids)
    return build


_COEF_DERIVED = ("estimate", "se", "se_naive", "hr", "lower", "upper", "z", "p", "ph_p", "ph_flag")
for _kind in ("cox", "fine_gray", "time_updated_cox"):
    register_schema(_kind, "coefficients")(_model_counts(("n", "events"), _COEF_DERIVED))
register_schema("cumulative_incidence", "gray_test")(_model_counts(("n", "events"), ("statistic", "p")))
register_schema("absolute_risk", "risk")(_model_counts(("n", "events"), ("estimate", "se", "lower", "upper")))


@register_schema("landmark", "counts")
def _landmark_counts(m: Model, t: int, info: RunInfo) -> None:
    for r, row in _rows(m, t):
        ns = ("landmark", row["variant"], m.tables[t].analysis or "", row["landmark"], row["endpoint"])
        cids = {c: m.count(t, r, c, cell(ns, c)) for c in ("at_risk", "events", "competing",
                                                           "censored", "left_out")}
        m.line(cids["at_risk"], [cids["events"], cids["competing"], cids["censored"]])


@register_schema("landmark", "coefficients")
def _landmark_coefficients(m: Model, t: int, info: RunInfo) -> None:
    for r, row in _rows(m, t):
        ns = ("landmark", row["variant"], m.tables[t].analysis or "", _num_text(row["landmark"]),
              row["endpoint"])
        n = m.count(t, r, "n", cell(ns, "at_risk"))
        events = m.count(t, r, "events", cell(ns, "events"))
        m.derive(t, r, _COEF_DERIVED, (n, events))


def _num_text(text: str) -> str:
    """'0.0' and '0' name the same landmark."""
    value = _as_float(text)
    return text if value is None else f"{value:.8g}"


@register_schema("multistate", "transitions")
def _transitions(m: Model, t: int, info: RunInfo) -> None:
    for r, row in _rows(m, t):
        ns = ("transitions", row["variant"], m.tables[t].analysis or "", row["model"])
        m.count(t, r, "count", cell(ns, "count", **{"~from": row["from_state"], "~to": row["to_state"]}))


@register_schema("interval_censored", "intervals")
def _interval_summary(m: Model, t: int, info: RunInfo) -> None:
    for r, row in _rows(m, t):
        ns = ("intervals", row["variant"], m.tables[t].analysis or "", row["endpoint"], row["group"])
        persons = m.count(t, r, "persons", cell(ns, "persons"))
        seen = m.count(t, r, "events_seen", cell(ns, "events_seen"))
        right = m.count(t, r, "right_censored", cell(ns, "right_censored"))
        m.line(persons, [seen, right])
        m.derive(t, r, ("median_width_years", "mean_width_years"), (seen,))
        m.derive(t, r, ("median_ecgs",), (persons,))


def _at_risk(m: Model, t: int, info: RunInfo) -> None:
    """Numbers at risk on a time grid: n(t_k-1) = n(t_k) + events + censored in (t_k-1, t_k]."""
    table = m.tables[t]
    groups: dict[tuple, list[tuple[int, dict[str, str]]]] = {}
    for r, row in _rows(m, t):
        groups.setdefault((row["variant"], row["endpoint"], row.get("group_by", ""), row.get("group", "")),
                          []).append((r, row))
    for key, rows in groups.items():
        ns = ("at_risk", *key)
        previous = None
        for r, row in rows:
            time = _num_text(row["time"])
            n = m.count(t, r, "n_at_risk", cell(ns, "n_at_risk", **{"~time": time}))
            d = m.count(t, r, "events", cell(ns, f"events:{table.kind}", **{"~time": time}))
            c = m.count(t, r, "censored", cell(ns, f"censored:{table.kind}", **{"~time": time}))
            if previous is not None:
                m.line(previous, [n, d, c])
            previous = n


register_schema("kaplan_meier", "at_risk")(_at_risk)
register_schema("cumulative_incidence", "at_risk")(_at_risk)


# Curves at every event time: handled row-wise (module docstring, point 6).
CURVE_PARTS: dict[tuple[str, str], tuple[str, tuple[str, ...]]] = {
    ("kaplan_meier", "curve"): ("estimate", ("time", "estimate", "se", "lower", "upper")),
    ("cumulative_incidence", "curve"): ("estimate", ("time", "estimate", "se", "lower", "upper")),
    ("multistate", "occupation"): ("estimate", ("time", "estimate", "se", "lower", "upper")),
    ("multistate", "hazards"): ("cumulative_hazard", ("time", "cumulative_hazard", "se")),
    ("interval_censored", "estimates"): ("estimate", ("time", "estimate", "se", "lower", "upper")),
}
#: Parts evaluated at fixed times, with the curve part they are read from.
AT_TIMES_PARTS: dict[tuple[str, str], str] = {
    ("kaplan_meier", "at_times"): "curve",
    ("cumulative_incidence", "at_times"): "curve",
    ("multistate", "at_times"): "occupation",
    ("interval_censored", "at_times"): "estimates",
}
CURVE_COUNTS = ("n_at_risk", "events", "censored")


def _curve_keys(table: Table, value_cols: Sequence[str]) -> list[str]:
    return [h for h in table.header if h not in (*value_cols, *CURVE_COUNTS)]


def thin_curve(table: Table, threshold: int) -> dict[tuple, list[tuple[float, float]]]:
    """Withhold per-time counts and every point before ``threshold`` events have accumulated.

    Returns, per curve key, the (time, cumulative events) of every row, for the fixed-time
    parts read from the same curve.
    """
    _value, cols = CURVE_PARTS[(table.kind, table.part)]
    keys = _curve_keys(table, cols)
    counts = [c for c in CURVE_COUNTS if c in table.header]
    value_idx = [table.col(c) for c in cols if c in table.header]
    count_idx = [table.col(c) for c in counts]
    ev, nr = table.col("events"), table.col("n_at_risk")
    since: dict[tuple, float] = {}
    total: dict[tuple, float] = {}
    history: dict[tuple, list[tuple[float, float]]] = {}
    for r, row in enumerate(table.rows):
        key = tuple(row[table.col(k)] for k in keys)
        events = (_as_float(row[ev]) or 0.0) if ev is not None else 0.0
        since[key] = since.get(key, 0.0) + events
        total[key] = total.get(key, 0.0) + events
        at_risk = _as_float(row[nr]) if nr is not None else None
        time = _as_float(row[table.col("time")])
        history.setdefault(key, []).append((time if time is not None else math.inf, total[key]))
        table.withheld.update((r, c) for c in count_idx)
        show = since[key] >= threshold and (at_risk is None or at_risk >= threshold)
        if show:
            since[key] = 0.0
        else:
            table.withheld.update((r, c) for c in value_idx)
    return history


def at_times_rule(table: Table, history: dict[tuple, list[tuple[float, float]]], curve: Table,
                  threshold: int) -> None:
    """Withhold fixed-time estimates resting on 1 .. threshold - 1 events so far."""
    cols = CURVE_PARTS[(curve.kind, curve.part)][1]
    keys = _curve_keys(curve, cols)
    value_idx = [table.col(c) for c in ("estimate", "se", "lower", "upper") if c in table.header]
    for r, row in enumerate(table.rows):
        key = tuple(row[table.col(k)] if table.col(k) is not None else "" for k in keys)
        when = _as_float(row[table.col("time")]) or 0.0
        events = 0.0
        for time, cum in history.get(key, []):
            if time <= when:
                events = cum
        if 0 < events < threshold:
            table.withheld.update((r, c) for c in value_idx)


# --------------------------------------------------------------------------- fallback

COUNT_NAMES = frozenset({"n", "events", "persons", "n_at_risk", "at_risk", "censored",
                         "population", "events_reference", "count", "competing", "left_out",
                         "n_missing", "events_seen", "right_censored"})


def _fallback(m: Model, t: int, info: RunInfo) -> None:
    """Unknown table: small counts withheld with the numbers of their row, no margins."""
    table = m.tables[t]
    counts = [h for h in table.header if h in COUNT_NAMES]
    numeric = [h for h in table.header if h not in counts and h != "variant"]
    for r, _row in _rows(m, t):
        cids = [m.count(t, r, c, ("fallback", table.name, r, c)) for c in counts]
        m.derive(t, r, [h for h in numeric if _as_float(table.rows[r][table.col(h)]) is not None], cids)
    if counts:
        m.notes.append(f"{table.name}: no disclosure schema for kind {table.kind!r} part "
                       f"{table.part!r}; small counts withheld row by row, no complementary "
                       "suppression")


# --------------------------------------------------------------------------- variants


def _nested_pairs(info: RunInfo) -> list[tuple[str, str, str]]:
    """(larger, smaller, what) pairs of variants whose counts nest.

    "persons": same rule set, lag and horizon, one variant's exclusions a superset of the
    other's (every cell nests). "window": same rule set and exclusions, one counting window
    (lag, horizon] inside the other (events and persons at risk nest).
    """
    out = []
    variants = list(info.variants)
    for a in variants:
        for b in variants:
            if a is b or a.get("rule_set") != b.get("rule_set"):
                continue
            ea = {json.dumps(x, sort_keys=True) for x in a.get("exclusions", [])}
            eb = {json.dumps(x, sort_keys=True) for x in b.get("exclusions", [])}
            same_window = (a.get("lag_days"), a.get("horizon_days")) == (b.get("lag_days"), b.get("horizon_days"))
            if same_window and ea < eb:
                out.append((a["name"], b["name"], "persons"))
            elif ea == eb and not same_window and _window_inside(b, a):
                out.append((a["name"], b["name"], "window"))
    return out


def _window_inside(inner: dict, outer: dict) -> bool:
    lag_in, lag_out = inner.get("lag_days") or 0, outer.get("lag_days") or 0
    hz_in, hz_out = inner.get("horizon_days"), outer.get("horizon_days")
    hz_ok = hz_out is None or (hz_in is not None and hz_in <= hz_out)
    return lag_in >= lag_out and hz_ok


def _variant_of(cid: CellId) -> str | None:
    ns = cid[0] if isinstance(cid[0], tuple) else None
    return ns[1] if ns and len(ns) > 1 and isinstance(ns[1], str) else None


def variant_lines(m: Model, info: RunInfo) -> None:
    """main = variant + hidden difference, for nested variants (module docstring, point 2)."""
    pairs = _nested_pairs(info)
    if not pairs:
        return
    by_key: dict[tuple, dict[str, CellId]] = {}
    for cid in list(m.values):
        v = _variant_of(cid)
        if v is None or cid in m.virtual or cid[0][0] == "attrition":  # steps differ by variant
            continue
        ns = cid[0]
        by_key.setdefault((ns[0], *ns[2:], *cid[1:]), {})[v] = cid
    for big, small, what in pairs:
        for key, cells in by_key.items():
            if big not in cells or small not in cells:
                continue
            measure = key[-2] if len(key) >= 2 else ""
            if what == "window" and not (str(measure).startswith("events") or measure == "at_risk"):
                continue
            a, b = cells[big], cells[small]
            diff = m.values[a] - m.values[b]
            if diff < 0:
                m.notes.append(f"variants {big} and {small}: {key} does not nest; not linked")
                continue
            hidden = ("~difference", big, small, key)
            m.add_virtual(hidden, diff)
            m.line(a, [b, hidden])


# --------------------------------------------------------------------------- driver


def _load_tables(tables_dir: Path, info: RunInfo) -> list[Table]:
    from cohort.study.analyses import ANALYSIS_KINDS

    out: list[Table] = []
    parent = tables_dir.parent
    for name, kind, part in (("attrition.csv", "attrition", "flow"), ("exposure.csv", "exposure", "levels")):
        if (parent / name).is_file():
            t = read_table(parent / name)
            t.kind, t.part = kind, part
            out.append(t)
    names = sorted(info.analyses, key=len, reverse=True)
    for path in sorted(tables_dir.glob("*.csv")):
        t = read_table(path)
        t.analysis, t.kind, t.part = _identify(path.stem, names, info, ANALYSIS_KINDS)
        out.append(t)
    return out


def _identify(stem: str, names: list[str], info: RunInfo, kinds: dict) -> tuple[str | None, str | None, str | None]:
    """(analysis, kind, part) of a table file from run.json and the kind's declared parts."""
    for name in names:
        kind = info.analyses[name]
        parts = list(kinds[kind].parts) if kind in kinds else []
        if stem == name and parts:
            return name, kind, parts[0]
        if stem.startswith(name + "_"):
            part = stem[len(name) + 1:]
            if part in parts[1:]:
                return name, kind, part
    return None, None, None


def build_model(tables: list[Table], info: RunInfo, threshold: int) -> Model:
    """Cells, lines and derived values of every table (curve tables thinned row-wise)."""
    m = Model(tables)
    histories: dict[tuple[str, str], tuple[Table, dict]] = {}
    for table in tables:
        if (table.kind, table.part) in CURVE_PARTS:
            table.schema = "curve"
            histories[(table.analysis, table.part)] = (table, thin_curve(table, threshold))
    for t, table in enumerate(tables):
        key = (table.kind, table.part)
        if key in CURVE_PARTS:
            continue
        if key in AT_TIMES_PARTS:
            table.schema = "at_times"
            found = histories.get((table.analysis, AT_TIMES_PARTS[key]))
            if found is not None:
                at_times_rule(table, found[1], found[0], threshold)
            continue
        builder = SCHEMAS.get(key)
        table.schema = f"{table.kind}/{table.part}" if builder else "fallback"
        (builder or _fallback)(m, t, info)
    m.margin_lines()
    variant_lines(m, info)
    return m


def apply_disclosure(tables_dir: str | Path, threshold: int = DEFAULT_THRESHOLD) -> DisclosureLog:
    """Suppress small counts in every table of a run folder, in place; returns the log.

    Parameters
    ----------
    tables_dir : the ``tables/`` folder written by :func:`cohort.study.run_spec`; its parent's
        ``attrition.csv``, ``exposure.csv`` and ``run.json`` are read (and the first two
        rewritten) too.
    threshold : counts of 1 .. threshold - 1 are suppressed (default: fewer than 11).

    The log is also written to ``<run folder>/disclosure.json``.
    """
    tables_dir = Path(tables_dir)
    if threshold < 2:
        raise ValueError(f"disclosure threshold must be >= 2 (got {threshold}); to publish "
                         "unsuppressed tables switch disclosure control off explicitly")
    _import_kinds()
    info = RunInfo.read(tables_dir.parent)
    tables = _load_tables(tables_dir, info)
    model = build_model(tables, info, threshold)
    p = protect(model, threshold)
    for cid in p.S:
        for t, r, c in model.positions.get(cid, []):
            tables[t].withheld.add((r, c))
    for t, r, cols, deps in model.derived:
        if any(d in p.S for d in deps):
            tables[t].withheld.update((r, c) for c in cols)
    logs = []
    for t, table in enumerate(tables):
        count_positions = {(r, c) for cid in p.S for tt, r, c in model.positions.get(cid, []) if tt == t}
        if table.withheld:
            table.write(MARKER)
        logs.append(TableLog(table.name, table.schema, model.cells_of_table(t),
                             len(count_positions), len(table.withheld - count_positions)))
    real = [c for c in p.S if c not in model.virtual]
    log = DisclosureLog(True, threshold, MARKER, tuple(logs), len(p.primary),
                        len(real) - len(p.primary), p.rounds, p.audit, tuple(model.notes),
                        tuple(_table_hashes(tables_dir.parent)))
    log.write(tables_dir.parent / LOG_FILE)
    return log


def _import_kinds() -> None:
    """Register every analysis kind whose tables may be in the folder."""
    import importlib

    for module in ("cohort.study.quality_kinds", "cohort.study.survival_kinds"):
        try:
            importlib.import_module(module)
        except ImportError:  # a kind module not present in this version
            continue


__all__ = ["DEFAULT_THRESHOLD", "LOG_FILE", "MARKER", "DisclosureLog", "Model", "RunInfo",
           "Table", "TableLog", "apply_disclosure", "build_model", "cell", "disabled_log",
           "protect", "read_table", "register_schema"]
