"""``dromos beats FILE.csv``: the AV conduction pattern of one strip of P and QRS onset times.

The CSV needs a header with columns ``t_ms`` (onset time in ms) and ``kind`` (``P`` or ``QRS``);
other columns are ignored, except that a ``tracing_id`` or ``ecg_key`` column may hold only one
strip. Prints the pattern, ratio, rates, evidence and the per-P table, or with ``--json`` one
JSON object.
"""

from __future__ import annotations

import argparse
import csv
import json
import math
from pathlib import Path

from cohort.commands._common import text_table
from cohort.errors import InputFileError
from cohort.phenotype.beats import StripResult, classify_strip

REQUIRED = ("t_ms", "kind")
STRIP_ID_COLUMNS = ("tracing_id", "ecg_key")
KINDS = ("P", "QRS")
_MAX_LISTED = 5  # bad rows quoted in an error message


def register(subparsers) -> None:
    parser = subparsers.add_parser(
        "beats", help="AV conduction pattern of one strip from P and QRS onset times (CSV)"
    )
    parser.add_argument("file", metavar="FILE.csv", help="CSV with columns t_ms and kind (P or QRS)")
    parser.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    parser.add_argument("--rules", metavar="FILE", default=None,
                        help="beat rule file (default: the built-in beats-v1)")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    p_ms, qrs_ms = read_strip_csv(Path(args.file))
    result = classify_strip(p_ms, qrs_ms, rules=args.rules)
    if args.json:
        print(json.dumps({"file": str(args.file), **result.to_dict()}, indent=2))
    else:
        print(format_result(result, Path(args.file)))
    return 0


def read_strip_csv(path: Path) -> tuple[list[float], list[float]]:
    """P and QRS onset times from a strip CSV; InputFileError names the file, rows and fix."""
    try:
        with path.open(newline="", encoding="utf-8-sig") as handle:
            reader = csv.DictReader(handle)
            header = [h.strip() for h in (reader.fieldnames or [])]
            _check_header(path, header)
            reader.fieldnames = header
            rows = list(reader)
    except FileNotFoundError:
        raise InputFileError(f"{path}: file not found; pass a CSV with columns t_ms and kind") from None
    except UnicodeDecodeError as exc:
        raise InputFileError(f"{path}: not UTF-8 text ({exc.reason} at byte {exc.start}); "
                             "save the file as UTF-8 CSV") from None
    except csv.Error as exc:
        raise InputFileError(f"{path}: not a readable CSV ({exc})") from None
    _check_one_strip(path, rows, header)
    return _parse_rows(path, rows)


def _check_header(path: Path, header: list[str]) -> None:
    if not header:
        raise InputFileError(f"{path}: empty file; the first line must be a header with columns "
                             "t_ms and kind")
    missing = [c for c in REQUIRED if c not in header]
    if missing:
        raise InputFileError(f"{path}: missing column(s) {', '.join(missing)} (header has "
                             f"{', '.join(header)}); the header needs t_ms and kind")


def _check_one_strip(path: Path, rows: list[dict], header: list[str]) -> None:
    for column in STRIP_ID_COLUMNS:
        if column in header:
            ids = sorted({(row.get(column) or "").strip() for row in rows})
            if len(ids) > 1:
                shown = ", ".join(ids[:_MAX_LISTED]) + (" ..." if len(ids) > _MAX_LISTED else "")
                raise InputFileError(f"{path}: column {column} holds {len(ids)} strips ({shown}); "
                                     "pass one strip per file")


def _parse_rows(path: Path, rows: list[dict]) -> tuple[list[float], list[float]]:
    p_ms, qrs_ms, bad = [], [], []
    for number, row in enumerate(rows, start=1):
        problem, value, kind = _parse_row(row)
        if problem:
            bad.append(f"row {number} (line {number + 1}): {problem}")
        else:
            (p_ms if kind == "P" else qrs_ms).append(value)
    if bad:
        listed = "; ".join(bad[:_MAX_LISTED]) + ("; ..." if len(bad) > _MAX_LISTED else "")
        raise InputFileError(f"{path}: {len(bad)} bad row(s) of {len(rows)}: {listed}. Fix them: "
                             "t_ms must be a finite number of ms and kind P or QRS")
    if not rows:
        raise InputFileError(f"{path}: no data rows after the header; add one row per P and QRS onset")
    return p_ms, qrs_ms


def _parse_row(row: dict) -> tuple[str | None, float, str]:
    """(problem, t_ms, kind) of one CSV row; problem is None when the row is valid."""
    raw_t = (row.get("t_ms") or "").strip()
    kind = (row.get("kind") or "").strip().upper()
    if kind not in KINDS:
        return f"kind {row.get('kind')!r} is not P or QRS", math.nan, kind
    try:
        value = float(raw_t)
    except ValueError:
        return f"t_ms {raw_t!r} is not a number", math.nan, kind
    if not math.isfinite(value):
        return f"t_ms {raw_t!r} is not finite", math.nan, kind
    return None, value, kind


def format_result(result: StripResult, path: Path | None = None) -> str:
    """Plain-text report: pattern, ratio, rates, evidence, per-P table."""
    lines = [f"Strip: {path}"] if path else []
    lines.append(f"Pattern: {result.label} ({result.pattern})")
    groups = f" (groups: {', '.join(result.group_ratios)})" if result.group_ratios else ""
    lines.append(f"Conduction ratio: {result.ratio or 'not determined'}{groups}")
    lines.append(f"Atrial rate: {_rate(result.atrial_rate_bpm)}   "
                 f"Ventricular rate: {_rate(result.ventricular_rate_bpm)}")
    if result.escape_rate_bpm is not None:
        lines.append(f"Escape rate: {_rate(result.escape_rate_bpm)}")
    if result.pr_median_ms is not None:
        lines.append(f"PR median: {result.pr_median_ms:.0f} ms")
    lines += ["", f"Why: {result.sentence}", "Evidence: " + ", ".join(result.reasons), "",
              "P waves"]
    table = [
        {"P": w.index, "t_ms": f"{w.t_ms:.0f}", "fate": w.fate,
         "PR_ms": "" if w.pr_ms is None else f"{w.pr_ms:.0f}",
         "timing": {True: "on time", False: "early", None: ""}[w.on_time],
         "source": w.source, "note": w.note}
        for w in result.p_waves
    ]
    lines.append(text_table(table))
    return "\n".join(lines)


def _rate(bpm: float | None) -> str:
    return "n/a" if bpm is None else f"{bpm:.0f} bpm"
