"""``dromos run``: run a study spec on a phenotyped registry and write its tables."""

from __future__ import annotations

import argparse
from pathlib import Path

from cohort.commands._common import progress_bar


def register(subparsers) -> None:
    """Add the ``run`` subcommand."""
    parser = subparsers.add_parser(
        "run",
        help="run a study spec (analyses/*.toml) and write its tables",
        description=(
            "Build the study cohort of a spec (docs/study-spec.md) from a phenotyped registry, "
            "run its analyses for the main analysis and every sensitivity variant, and write "
            "DIR/attrition.csv, DIR/exposure.csv and DIR/tables/*.csv (one 'variant' column, "
            "variants side by side). Re-runs on the same inputs write identical files."
        ),
    )
    parser.add_argument("spec", type=Path, metavar="SPEC", help="study spec (.toml)")
    parser.add_argument("--db", type=Path, help="registry file (.duckdb); required unless --check")
    parser.add_argument("--out", type=Path, metavar="DIR", help="output folder; required unless --check")
    parser.add_argument("--check", action="store_true",
                        help="only validate the spec (no registry access)")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """Validate, run and summarize; 0 on success (errors are DromosError: exit code 2)."""
    from cohort.errors import SpecError as UsageError
    from cohort.study.run import run_spec
    from cohort.study.spec import load_spec

    spec = load_spec(args.spec)
    if not args.check and (args.db is None or args.out is None):
        raise UsageError("dromos run needs --db FILE and --out DIR (or --check to only validate)")
    if args.check:
        print(f"spec {args.spec} is valid: study {spec.id}, {len(spec.variants)} variant(s), "
              f"{len(spec.analyses)} analysis(es)")
        return 0
    total = len(spec.variants) * (1 + len(spec.analyses))
    with progress_bar(total, f"run {spec.id}", unit="step") as bar:
        def advance(step: str, done: int, total: int) -> None:
            bar.set_description(step)
            bar.n = done
            bar.refresh()

        result = run_spec(spec, args.db, args.out, progress=advance)
    print("\n".join(result.summary))
    print(f"wrote {len(result.tables)} table(s), attrition.csv and run.json in {result.out_dir} "
          f"({result.seconds:.1f} s)")
    return 0
