"""``dromos demo``: the whole pipeline on an invented registry, in one command."""

from __future__ import annotations

import argparse
import time
from pathlib import Path

from cohort.commands._common import progress_bar, text_table
from cohort.ingest.loader import expand_sources, ingest
from cohort.ingest.status import registry_status
from cohort.registry import connect


def register(subparsers) -> None:
    parser = subparsers.add_parser(
        "demo",
        help="synthesize an invented registry, load it and run the pipeline on it",
        description="Writes invented exports of a fictional health network, loads them into a "
        "registry (one .duckdb file), runs the pipeline and prints where everything is.",
    )
    parser.add_argument("--out", type=Path, default=Path("dromos-demo"), metavar="DIR", help="output folder (default ./dromos-demo)")
    parser.add_argument("--persons", type=int, default=50_000, metavar="N", help="persons to invent (default 50,000)")
    parser.add_argument("--seed", type=int, default=2026, metavar="S", help="random seed (default 2026)")
    parser.add_argument("--defects", type=float, default=0.005, metavar="RATE", help="share of export rows with injected faults (default 0.005)")
    parser.set_defaults(func=run)


def _step(title: str) -> float:
    print(f"\n== {title}", flush=True)
    return time.perf_counter()


def run(args: argparse.Namespace) -> int:
    from synthetic_registry import generate

    exports = args.out / "exports"
    db = args.out / "registry.duckdb"
    if db.exists():
        db.unlink()
    started = _step(f"1. Inventing {args.persons:,} persons of a fictional health network (seed {args.seed})")
    with progress_bar(args.persons, "synth", unit="person") as bar:
        def advance(done: int, total: int) -> None:
            bar.total = total
            bar.n = done
            bar.refresh()

        manifest = generate(exports, persons=args.persons, seed=args.seed, fmt="csv", defects=args.defects, progress=advance)
    print(text_table([{"file": f["path"], "rows": f["rows"]} for f in manifest["files"] if "/" not in f["path"]]))
    print(f"({time.perf_counter() - started:.1f} s; ground truth in {exports / 'truth'})")

    started = _step(f"2. Loading the exports into {db}")
    files = expand_sources([exports])
    con = connect(db)
    with progress_bar(len(files), "ingest", unit="file") as bar:
        results = ingest(con, files, progress=lambda result: bar.update(1))
    print(text_table([
        {"file": r.path.name, "read": r.rows_read, "loaded": r.rows_loaded, "quarantined": r.rows_quarantined,
         "duplicate": r.rows_duplicate, "repaired": r.rows_repaired}
        for r in results
    ]))
    status = registry_status(con, examples=1)
    print("\nTop quarantine reasons (injected faults, caught):")
    print(text_table(status.quarantine_reasons.head(8)[["table", "field", "reason", "n"]]))
    print(f"Row counts reconcile: {'yes' if status.reconciles else 'NO'} ({time.perf_counter() - started:.1f} s)")

    started = _step("3. Phenotyping every ECG with rule sets default-v1 and pr220-v1 (sensitivity)")
    from cohort.phenotype import run_phenotype

    for rules_id in ("default-v1", "pr220-v1"):
        with progress_bar(None, f"phenotype {rules_id}", unit="step") as bar:
            summary = run_phenotype(con, rules_id, progress=bar, beats=rules_id == "default-v1")
        av = summary["av_category"]
        print(f"{rules_id}: {summary['n_ecg']:,} ECGs; first-degree AV block {av.get('first_degree', 0):,}, "
              f"higher-grade (Mobitz II, 2:1, high-grade, third degree) "
              f"{sum(av.get(k, 0) for k in ('mobitz_ii', 'two_to_one', 'high_grade', 'third_degree')):,}; "
              f"unrecognised statements {summary['n_unrecognised_statements']:,}")
    print(f"({time.perf_counter() - started:.1f} s; explain any ECG with: dromos explain --db {db} --ecg KEY)")
    con.close()

    reports = _run_studies(db, args.out / "studies")
    print(f"\nRegistry: {db}\nExports:  {exports}\nReports (open in a browser):")
    for name, path in reports.items():
        print(f"  {name:<13} {path}")
    print(f"Next: dromos status --db {db}; dromos run SPEC --db {db} --out DIR")
    return 0 if status.reconciles else 1


def _run_studies(db: Path, out: Path) -> dict[str, Path]:
    """Run every shipped study spec on the registry; report path per spec."""
    from cohort.commands.run import report_lines, report_run
    from cohort.study.run import run_spec
    from cohort.study.shipped import shipped_specs
    from cohort.study.spec import load_spec

    specs = shipped_specs()
    started = _step(f"4. Running the {len(specs)} shipped study specs ({', '.join(specs)})")
    reports: dict[str, Path] = {}
    for name, path in specs.items():
        spec = load_spec(path)
        with progress_bar(len(spec.variants) * (1 + len(spec.analyses)), f"run {name}", unit="step") as bar:
            def advance(step: str, done: int, total: int, name: str = name) -> None:
                bar.set_description(f"{name}: {step}")
                bar.n = done
                bar.refresh()

            result = run_spec(spec, db, out / name, progress=advance)
        report = report_run(result, db, disclosure=True, threshold=None)
        print(f"{spec.title}\n{report_lines(result, report)}")
        reports[name] = report.report
    print(f"({time.perf_counter() - started:.1f} s)")
    return reports
