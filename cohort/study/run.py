"""Run a study spec on a registry and write tidy tables: ``run_spec(spec, db, out_dir)``.

Output folder layout (re-runs on the same inputs are byte-identical):

- ``attrition.csv``: the flow of persons of every variant (:data:`ATTRITION_COLUMNS` after
  ``variant``);
- ``exposure.csv``: levels, cut points and scale of the exposure per variant (when the spec
  has an exposure);
- ``tables/<analysis>.csv`` (the kind's first part) and ``tables/<analysis>_<part>.csv``;
  every table starts with the column ``variant`` ("main", then the spec's variants in order),
  so sensitivity variants sit side by side in one file;
- ``run.json``: spec hash, rule sets, variants, analyses and files (no clock times).

Floats are written with 8 significant digits (``%.8g``), missing values and NaN as empty
fields, booleans as true/false; rows keep the deterministic order the kinds produce. Person
and ECG keys are never written.
"""

from __future__ import annotations

import csv
import datetime as dt
import json
import math
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import polars as pl

from cohort import __version__
from cohort.errors import DataError
from cohort.registry import connect
from cohort.study.analyses import ANALYSIS_KINDS, AnalysisContext, run_analysis
from cohort.study.builder import ATTRITION_COLUMNS, StudyFrames, build_cohort, check_phenotyped
from cohort.study.exposure import EXPOSURE_COLUMNS
from cohort.study.spec import Spec, load_spec

FLOAT_FORMAT = "{:.8g}"
#: Columns that identify persons or tracings: never written to an output file.
IDENTIFYING_COLUMNS = frozenset({"person_key", "person_id", "ecg_key", "index_ecg_key",
                                 "tracing_id", "birth_date", "death_date"})

Progress = Callable[[str, int, int], None]


@dataclass
class RunResult:
    """What a run wrote: the folder, files per table, attrition and summary lines."""

    out_dir: Path
    spec: Spec
    tables: dict[str, Path]
    attrition: pl.DataFrame
    summary: list[str]
    seconds: float
    frames: dict[str, StudyFrames] = field(default_factory=dict, repr=False)


def format_cell(value: Any) -> str:
    """Text of one value in the fixed output format."""
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        if math.isnan(value):
            return ""
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        text = FLOAT_FORMAT.format(value)
        return "0" if text == "-0" else text
    if isinstance(value, dt.date | dt.datetime):
        return value.isoformat()
    return str(value)


def frame_rows(frame: pl.DataFrame, variant: str) -> list[list[str]]:
    """Rows of ``frame`` as text, ``variant`` first."""
    return [[variant, *(format_cell(v) for v in row)] for row in frame.iter_rows()]


def write_rows(path: Path, header: Iterable[str], rows: list[list[str]]) -> None:
    """Write a CSV with ``\\n`` line ends (RFC 4180 quoting where needed)."""
    header = list(header)
    leaked = IDENTIFYING_COLUMNS.intersection(header)
    if leaked:
        raise RuntimeError(f"refusing to write identifying column(s) {sorted(leaked)} to {path}")
    path.parent.mkdir(parents=True, exist_ok=True)
    with path.open("w", encoding="utf-8", newline="") as handle:
        writer = csv.writer(handle, lineterminator="\n")
        writer.writerow(header)
        writer.writerows(rows)


def table_file(analysis: str, part: str, first: bool) -> str:
    """File name of an analysis part: the first part is ``<analysis>.csv``."""
    return f"{analysis}.csv" if first else f"{analysis}_{part}.csv"


def _open(con_or_db: Any) -> tuple[Any, bool]:
    if isinstance(con_or_db, str | Path):
        return connect(con_or_db, create=False, read_only=True), True
    return con_or_db, False


def run_spec(
    spec_path: str | Path | Spec,
    con_or_db: Any,
    out_dir: str | Path,
    *,
    progress: Progress | None = None,
    keep_frames: bool = False,
) -> RunResult:
    """Run every analysis of a spec for every variant and write the output folder.

    Parameters
    ----------
    spec_path : path of a study spec (or a loaded :class:`Spec`).
    con_or_db : a DuckDB connection to a phenotyped registry, or the registry file (opened
        read-only).
    out_dir : output folder (created; ``tables/*.csv`` from earlier runs are replaced).
    progress : callable ``progress(step, done, total)`` called after each step.
    keep_frames : keep the study frames of each variant on the result (for notebooks).
    """
    started = time.perf_counter()
    spec = spec_path if isinstance(spec_path, Spec) else load_spec(spec_path)
    con, owned = _open(con_or_db)
    try:
        for rule_set in dict.fromkeys(v.rule_set for v in spec.variants):
            check_phenotyped(con, rule_set)
        collected, attrition, exposure, frames = _run_all(con, spec, progress)
    finally:
        if owned:
            con.close()
    out = Path(out_dir)
    tables = _write_outputs(out, spec, collected, attrition, exposure)
    attrition_frame = _attrition_frame(attrition)
    summary = _summary(spec, frames, collected, out)
    return RunResult(out, spec, tables, attrition_frame, summary,
                     time.perf_counter() - started, frames if keep_frames else {})


def _run_all(con, spec: Spec, progress: Progress | None):
    total = len(spec.variants) * (1 + len(spec.analyses))
    done = 0
    collected: dict[tuple[str, str], list[tuple[str, pl.DataFrame]]] = {}
    attrition: list[tuple[str, pl.DataFrame]] = []
    exposure: list[tuple[str, pl.DataFrame]] = []
    frames: dict[str, StudyFrames] = {}
    for variant in spec.variants:
        study = build_cohort(con, spec, variant)
        _require_persons(study)
        frames[variant.name] = study
        attrition.append((variant.name, study.attrition))
        if study.exposure is not None:
            exposure.append((variant.name, study.exposure.table))
        done += 1
        _tick(progress, f"{variant.name}: cohort", done, total)
        for analysis in spec.analyses:
            parts = run_analysis(AnalysisContext(study, analysis))
            for part, frame in parts.items():
                collected.setdefault((analysis.name, part), []).append((variant.name, frame))
            done += 1
            _tick(progress, f"{variant.name}: {analysis.name}", done, total)
    return collected, attrition, exposure, frames


def _require_persons(study: StudyFrames) -> None:
    """DataError naming the steps that excluded everyone (analyses need persons)."""
    if study.persons.height:
        return
    steps = [f"{r['criterion']} -{r['n_excluded']}" for r in study.attrition.iter_rows(named=True)
             if r["n_excluded"]]
    raise DataError(
        f"no person of the registry's {study.n_registry} passed the criteria of variant "
        f"'{study.variant.name}' (excluded at: {', '.join(steps) or 'no step'}); widen the "
        "population or check the rule set's phenotype tables"
    )


def _tick(progress: Progress | None, step: str, done: int, total: int) -> None:
    if progress is not None:
        progress(step, done, total)


def _write_outputs(out: Path, spec: Spec, collected, attrition, exposure) -> dict[str, Path]:
    tables_dir = out / "tables"
    tables_dir.mkdir(parents=True, exist_ok=True)
    for stale in tables_dir.glob("*.csv"):
        stale.unlink()
    written: dict[str, Path] = {}
    for analysis in spec.analyses:
        kind = ANALYSIS_KINDS[analysis.kind]
        for i, (part, columns) in enumerate(kind.parts.items()):
            pieces = collected.get((analysis.name, part))
            if pieces is None:
                continue
            path = tables_dir / table_file(analysis.name, part, i == 0)
            rows = [r for variant, frame in pieces for r in frame_rows(frame, variant)]
            write_rows(path, ["variant", *columns], rows)
            written[path.stem] = path
    write_rows(out / "attrition.csv", ["variant", *ATTRITION_COLUMNS],
               [r for v, f in attrition for r in frame_rows(f, v)])
    if exposure:
        write_rows(out / "exposure.csv", ["variant", *EXPOSURE_COLUMNS],
                   [r for v, f in exposure for r in frame_rows(f.select(EXPOSURE_COLUMNS), v)])
    _write_manifest(out, spec, written)
    return written


def _write_manifest(out: Path, spec: Spec, written: dict[str, Path]) -> None:
    doc = {
        "study": spec.id,
        "title": spec.title,
        "spec_file": spec.path.name if spec.path else None,
        "spec_sha256": spec.sha256,
        "software_version": __version__,
        "seed": spec.seed,
        "variants": [{"name": v.name, "rule_set": v.rule_set, "lag_days": v.lag_days,
                      "horizon_days": v.horizon_days,
                      "exclusions": [[k, _jsonable(x)] for k, x in v.exclusions]}
                     for v in spec.variants],
        "analyses": [{"name": a.name, "kind": a.kind} for a in spec.analyses],
        "tables": sorted(p.name for p in written.values()),
    }
    (out / "run.json").write_text(json.dumps(doc, indent=2) + "\n", encoding="utf-8")


def _jsonable(value: Any) -> Any:
    return value.isoformat() if isinstance(value, dt.date) else value


def _attrition_frame(attrition: list[tuple[str, pl.DataFrame]]) -> pl.DataFrame:
    return pl.concat([f.with_columns(pl.lit(v).alias("variant")).select("variant", *ATTRITION_COLUMNS)
                      for v, f in attrition])


def _summary(spec: Spec, frames: dict[str, StudyFrames], collected, out: Path) -> list[str]:
    lines = [f"study {spec.id}: {len(spec.variants)} variant(s), {len(spec.analyses)} analysis(es) -> {out}"]
    for name, study in frames.items():
        lines.append(f"  {name} (rule set {study.rule_set}): {study.persons.height:,} of "
                     f"{study.n_registry:,} persons included")
        for analysis in spec.analyses:
            kind = ANALYSIS_KINDS[analysis.kind]
            parts = {p: f for (a, p), pieces in collected.items() if a == analysis.name
                     for v, f in pieces if v == name}
            rows = sum(f.height for f in parts.values())
            lines.append(f"    {analysis.name}: {rows:,} rows")
            if kind.summary is not None and parts:
                lines.extend(f"      {s}" for s in kind.summary(parts))
    return lines
