"""``dromos synth``: write a seeded synthetic registry export from the fictional network."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``synth`` subcommand."""
    p = subparsers.add_parser(
        "synth",
        help="write a synthetic demo registry export (seeded, with ground truth)",
        description=(
            "Write exports of the fictional Orrindale Regional Health Network: persons, ECG reads, "
            "beat-level wave onsets, procedures and diagnoses, plus ground truth under truth/. "
            "Same seed and options give identical files."
        ),
    )
    p.add_argument("--out", required=True, type=Path, help="output directory (created)")
    p.add_argument("--persons", type=int, default=50_000, help="number of persons (default 50000)")
    p.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    p.add_argument(
        "--format",
        dest="fmt",
        choices=("csv", "parquet", "fhir"),
        default="csv",
        help="flat CSV or Parquet (docs/export-format.md) or FHIR R4 NDJSON (default csv)",
    )
    p.add_argument(
        "--defects",
        type=float,
        default=0.0,
        metavar="RATE",
        help="share of ecgs.csv rows given an injected fault, listed in truth/defects.csv (CSV only)",
    )
    p.add_argument("--start-year", type=int, default=2008, help="first year of the export window")
    p.add_argument(
        "--end-year", type=int, default=2024, help="last year; data cut-off is its 31 December"
    )
    p.add_argument(
        "--chunk-persons", type=int, default=100_000, help="persons held in memory per write"
    )
    p.add_argument("--no-progress", action="store_true", help="no progress bar")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """Generate, show a progress bar, then print the files written and their rows."""
    from tqdm import tqdm

    from synthetic_registry import generate

    with tqdm(total=args.persons, unit="persons", disable=args.no_progress, file=sys.stderr) as bar:

        def progress(done: int, total: int) -> None:
            bar.update(done - bar.n)

        manifest = generate(
            args.out,
            persons=args.persons,
            seed=args.seed,
            fmt=args.fmt,
            defects=args.defects,
            start_year=args.start_year,
            end_year=args.end_year,
            chunk_persons=args.chunk_persons,
            progress=progress,
        )
    print(summary(manifest, args.out))
    return 0


def summary(manifest: dict, out: Path) -> str:
    """Plain-text table of the files written."""
    files = manifest["files"]
    width = max(len(f["path"]) for f in files)
    lines = [f"Wrote {len(files)} files to {out}:"]
    for f in files:
        rows = "" if f["rows"] is None else f"{f['rows']:>12,} rows"
        lines.append(f"  {f['path']:<{width}}  {rows:>17}  {f['bytes'] / 1e6:>9.1f} MB")
    lines.append(f"Manifest with sha256: {out / 'truth' / 'manifest.json'}")
    return "\n".join(lines)
