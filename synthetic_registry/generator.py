"""``generate``: write a synthetic registry export (flat CSV/Parquet or FHIR NDJSON) and truth.

Persons are simulated in fixed blocks of 10,000 (data/parameters.toml network.block_persons),
each with its own random stream derived from ``seed`` and the block number, so the output
is byte-identical for a given seed whatever ``chunk_persons`` is, and memory stays bounded.
"""

from __future__ import annotations

import datetime as dt
import math
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl

from cohort import __version__
from cohort.errors import DataError
from synthetic_registry.clinical import simulate_diagnoses, simulate_procedures
from synthetic_registry.config import Config, load_config
from synthetic_registry.defects import DefectLog, inject_ecg_defects, inject_person_defects
from synthetic_registry.ecgs import finish_measurements, simulate_tracings
from synthetic_registry.fhir import FhirWriter
from synthetic_registry.frames import (
    DIAGNOSIS_SCHEMA,
    ECG_SCHEMA,
    PERSON_SCHEMA,
    PROCEDURE_SCHEMA,
    WAVE_SCHEMA,
    BlockFrames,
    ecg_truth_frame,
    ecgs_frame,
    person_ids,
    persons_frame,
    persons_truth_frame,
    records_frame,
    tracing_ids,
    waves_frame,
)
from synthetic_registry.population import simulate_persons
from synthetic_registry.reads import make_reads
from synthetic_registry.sinks import CsvSink, ParquetSink, Sink
from synthetic_registry.truth import PrevalenceCounter, true_effects, write_json
from synthetic_registry.waves import simulate_waves

FORMATS = ("csv", "parquet", "fhir")
FLAT_FILES = {
    "persons": PERSON_SCHEMA,
    "ecgs": ECG_SCHEMA,
    "wave_events": WAVE_SCHEMA,
    "procedures": PROCEDURE_SCHEMA,
    "diagnoses": DIAGNOSIS_SCHEMA,
}
_EPOCH = dt.date(1970, 1, 1)

Progress = Callable[[int, int], None]


def generate(
    out_dir: str | Path,
    *,
    persons: int = 50_000,
    seed: int = 0,
    fmt: str = "csv",
    defects: float = 0.0,
    start_year: int = 2008,
    end_year: int = 2024,
    chunk_persons: int = 100_000,
    progress: Progress | None = None,
) -> dict[str, Any]:
    """Write a synthetic registry export from the fictional Orrindale network.

    Parameters
    ----------
    out_dir
        Directory to write into (created; existing export files are overwritten).
    persons
        Number of persons.
    seed
        Seed of every random stream (same seed and arguments -> identical files).
    fmt
        "csv" or "parquet" (flat layout, docs/export-format.md) or "fhir" (R4 NDJSON).
    defects
        Share of ecgs.csv rows given an injected fault (CSV only; persons.csv gets a quarter
        of that share); each one is listed in truth/defects.csv.
    start_year, end_year
        Export window; data cut-off is end_year-12-31.
    chunk_persons
        Persons held in memory before writing (rounded up to whole blocks of 10,000);
        does not change the output.
    progress
        Optional callable(done_persons, total_persons).

    Returns
    -------
    dict
        The manifest (also written to truth/manifest.json): files with rows and sha256.
    """
    _check_args(persons, seed, fmt, defects, start_year, end_year, chunk_persons)
    cfg = load_config()
    root = Path(out_dir)
    (root / "truth").mkdir(parents=True, exist_ok=True)
    run = _Run(
        cfg,
        root,
        seed,
        fmt,
        defects,
        _day(dt.date(start_year, 1, 1)),
        _day(dt.date(end_year, 12, 31)),
    )
    block = int(cfg.value("network", "block_persons"))
    per_chunk = max(1, math.ceil(chunk_persons / block))
    pending: list[tuple[int, BlockFrames]] = []
    for b in range(math.ceil(persons / block)):
        first = b * block
        n = min(block, persons - first)
        pending.append((b, run.simulate_block(b, first, n)))
        if len(pending) >= per_chunk:
            run.flush(pending)
            pending = []
        if progress is not None:
            progress(first + n, persons)
    run.flush(pending)
    args = {
        "persons": persons,
        "seed": seed,
        "format": fmt,
        "defects": defects,
        "start_year": start_year,
        "end_year": end_year,
    }
    return run.finish(args)


def _check_args(
    persons: int, seed: int, fmt: str, defects: float, start_year: int, end_year: int, chunk: int
) -> None:
    """Raise DataError with the fix for arguments the generator cannot honour."""
    problems = []
    if not isinstance(persons, int) or persons < 1 or persons > 50_000_000:
        problems.append(f"persons={persons!r}: give a whole number from 1 to 50,000,000")
    if not isinstance(seed, int) or seed < 0:
        problems.append(f"seed={seed!r}: give a non-negative whole number")
    if fmt not in FORMATS:
        problems.append(f"format={fmt!r}: use one of {', '.join(FORMATS)}")
    if not 0.0 <= defects <= 0.2:
        problems.append(f"defects={defects!r}: give a share between 0 and 0.2 (e.g. 0.01)")
    if defects > 0 and fmt != "csv":
        problems.append(
            f"defects={defects} with format={fmt!r}: defects are injected into CSV files only; use --format csv"
        )
    if not 1990 <= start_year <= end_year <= 2100:
        problems.append(
            f"start_year={start_year}, end_year={end_year}: need 1990 <= start_year <= end_year <= 2100"
        )
    if not isinstance(chunk, int) or chunk < 1:
        problems.append(f"chunk_persons={chunk!r}: give a positive whole number")
    if problems:
        raise DataError(f"{len(problems)} invalid generator argument(s): " + "; ".join(problems))


def _day(d: dt.date) -> float:
    return float((d - _EPOCH).days)


def block_rng(seed: int, block: int, stream: int) -> np.random.Generator:
    """Independent random stream for (seed, block, purpose)."""
    return np.random.Generator(
        np.random.PCG64(np.random.SeedSequence(seed, spawn_key=(block, stream)))
    )


@dataclass
class _Run:
    """State of one generate() call: sinks, counters and truth accumulators."""

    cfg: Config
    root: Path
    seed: int
    fmt: str
    defects: float
    start: float
    cutoff: float

    def __post_init__(self) -> None:
        truth = self.root / "truth"
        self.tracings = 0
        self.prevalence = PrevalenceCounter()
        self.defect_log = DefectLog()
        self.sinks: dict[str, Sink] = {}
        if self.fmt == "csv":
            self.sinks = {k: CsvSink(self.root / f"{k}.csv", s) for k, s in FLAT_FILES.items()}
        elif self.fmt == "parquet":
            self.sinks = {
                k: ParquetSink(self.root / f"{k}.parquet", s) for k, s in FLAT_FILES.items()
            }
        self.fhir = FhirWriter(self.cfg, self.root) if self.fmt == "fhir" else None
        self.truth_sinks = {
            "persons_truth": ParquetSink(truth / "persons_truth.parquet"),
            "ecg_truth": ParquetSink(truth / "ecg_truth.parquet"),
        }

    def simulate_block(self, block: int, first: int, n: int) -> BlockFrames:
        """All frames of one block of persons (deterministic in seed and block)."""
        cfg = self.cfg
        rng = block_rng(self.seed, block, 0)
        p = simulate_persons(cfg, rng, first, n, self.start, self.cutoff)
        tr = simulate_tracings(cfg, rng, p)
        strips = simulate_waves(cfg, rng, tr)
        finish_measurements(cfg, rng, p, tr)
        reads = make_reads(cfg, rng, p, tr)
        dx = simulate_diagnoses(cfg, rng, p, tr)
        px = simulate_procedures(cfg, rng, p)
        pids = person_ids(p.index)
        ids = tracing_ids(self.tracings, tr.n)
        self.tracings += tr.n
        n_tr = np.bincount(tr.person, minlength=p.n)
        return BlockFrames(
            persons=persons_frame(cfg, p),
            ecgs=ecgs_frame(cfg, rng, tr, reads, ids, pids),
            waves=waves_frame(strips, ids),
            procedures=records_frame(px, pids, "ICD-10-PCS", "procedure_date", PROCEDURE_SCHEMA),
            diagnoses=records_frame(dx, pids, "ICD-10-CM", "diagnosis_date", DIAGNOSIS_SCHEMA),
            persons_truth=persons_truth_frame(cfg, p, pids, n_tr),
            ecg_truth=ecg_truth_frame(cfg, p, tr, reads, strips, ids, pids),
        )

    def flush(self, pending: list[tuple[int, BlockFrames]]) -> None:
        """Write the pending blocks in block order."""
        for block, frames in pending:
            self._write_block(block, frames)

    def _write_block(self, block: int, f: BlockFrames) -> None:
        self.prevalence.add(f.ecg_truth)
        self.truth_sinks["persons_truth"].write(f.persons_truth)
        self.truth_sinks["ecg_truth"].write(f.ecg_truth)
        if self.fhir is not None:
            self.fhir.write_block(f)
            return
        if self.defects > 0:
            rng = block_rng(self.seed, block, 1)
            self._write_defective(rng, f)
        else:
            self.sinks["persons"].write(f.persons)
            self.sinks["ecgs"].write(f.ecgs)
        self.sinks["wave_events"].write(f.waves)
        self.sinks["procedures"].write(f.procedures)
        self.sinks["diagnoses"].write(f.diagnoses)

    def _write_defective(self, rng: np.random.Generator, f: BlockFrames) -> None:
        persons, ecgs = self.sinks["persons"], self.sinks["ecgs"]
        assert isinstance(persons, CsvSink) and isinstance(ecgs, CsvSink)
        busy = pl.concat(
            [f.ecgs["person_id"], f.procedures["person_id"], f.diagnoses["person_id"]]
        ).unique()
        data, rows = inject_person_defects(
            self.cfg, rng, f.persons, busy, self.defects, persons.rows, self.defect_log
        )
        persons.write_raw(data, rows)
        data, rows = inject_ecg_defects(
            self.cfg, rng, f.ecgs, self.defects, ecgs.rows, self.defect_log
        )
        ecgs.write_raw(data, rows)

    def finish(self, args: dict[str, Any]) -> dict[str, Any]:
        """Close files, write truth tables, parameters and the manifest."""
        truth = self.root / "truth"
        sinks: list[Sink] = list(self.sinks.values())
        if self.fhir is not None:
            sinks += self.fhir.close()
        sinks += list(self.truth_sinks.values())
        for s in self.sinks.values():
            s.close()
        for s in self.truth_sinks.values():
            s.close()
        prevalence = truth / "prevalence.csv"
        self.prevalence.frame().write_csv(prevalence, float_precision=6)
        defects_path = truth / "defects.csv"
        self.defect_log.write(defects_path)
        parameters = truth / "parameters.json"
        write_json(
            parameters,
            {
                "generator": {"name": "synthetic_registry", "version": __version__, **args},
                "true_effects": true_effects(self.cfg),
                "parameters": self.cfg.parameters_with_sources(),
                "sites": self.cfg.sites.name.tolist(),
                "codes": list(self.cfg.codes),
            },
        )
        files = [s.entry(self.root) for s in sinks]
        files += [
            _extra_entry(self.root, prevalence),
            _extra_entry(self.root, defects_path),
            _extra_entry(self.root, parameters),
        ]
        manifest = {
            "generator": {"name": "synthetic_registry", "version": __version__, **args},
            "files": files,
        }
        write_json(truth / "manifest.json", manifest)
        return manifest


def _extra_entry(root: Path, path: Path) -> dict[str, Any]:
    from synthetic_registry.sinks import sha256_of

    rows = None
    if path.suffix == ".csv":
        with path.open("rb") as fh:
            rows = sum(1 for _ in fh) - 1
    return {
        "path": path.relative_to(root).as_posix(),
        "rows": rows,
        "bytes": path.stat().st_size,
        "sha256": sha256_of(path),
    }
