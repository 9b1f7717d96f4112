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
            "variants side by side), then apply disclosure control to them and write "
            "DIR/figures/ (SVG, PNG and the plotted rows), DIR/report.html and "
            "DIR/manifest.json. Re-runs on the same inputs write identical tables."
        ),
    )
    parser.add_argument("spec", metavar="SPEC",
                        help="study spec: a .toml file, or the name of a shipped spec "
                             "(prevalence, incidence, progression, pacemaker, site_quality)")
    parser.add_argument("--db", type=Path, help="registry file (.duckdb); required unless --check")
    parser.add_argument("--out", type=Path, metavar="DIR", help="output folder; required unless --check")
    parser.add_argument("--suppress-below", type=int, metavar="N", default=None,
                        help="disclosure control: withhold counts of 1 to N-1 persons or events, "
                             "with complementary cells (default: 11)")
    parser.add_argument("--no-disclosure-control", action="store_true",
                        help="keep exact small counts (internal use only; the report says so "
                             "on its first screen)")
    parser.add_argument("--tables-only", action="store_true",
                        help="write the tables only: no disclosure control, figures or report")
    parser.add_argument("--check", action="store_true",
                        help="only validate the spec (no registry access)")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """Validate, run and summarize; 0 on success (errors are DromosError: exit code 2)."""
    from cohort.errors import SpecError as UsageError
    from cohort.study.run import run_spec
    from cohort.study.shipped import resolve_spec
    from cohort.study.spec import load_spec

    spec_path = resolve_spec(args.spec)
    spec = load_spec(spec_path)
    if not args.check and (args.db is None or args.out is None):
        raise UsageError("dromos run needs --db FILE and --out DIR (or --check to only validate)")
    if args.suppress_below is not None and (args.no_disclosure_control or args.suppress_below < 2):
        raise UsageError("--suppress-below needs a count of at least 2 and cannot be combined "
                         "with --no-disclosure-control")
    if args.check:
        print(f"spec {spec_path} is valid: study {spec.id}, {len(spec.variants)} variant(s), "
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
    if args.tables_only:
        print(f"wrote {len(result.tables)} table(s), attrition.csv and run.json in "
              f"{result.out_dir} ({result.seconds:.1f} s); tables are NOT disclosure-controlled")
        return 0
    report = report_run(result, args.db, disclosure=not args.no_disclosure_control,
                        threshold=args.suppress_below)
    print(report_lines(result, report))
    return 0


def report_run(result, db: Path, *, disclosure: bool, threshold: int | None):
    """Disclosure control, figures, report.html and manifest.json of a finished run."""
    from cohort.registry import connect
    from cohort.report.build import write_report
    from cohort.report.disclosure import DEFAULT_THRESHOLD

    con = connect(db, create=False, read_only=True)
    try:
        return write_report(result, con=con, disclosure=disclosure,
                            threshold=DEFAULT_THRESHOLD if threshold is None else threshold)
    finally:
        con.close()


def report_lines(result, report) -> str:
    """What the user reads after a run: where the report is and what was withheld."""
    log = report.disclosure
    control = (f"disclosure control: counts below {log.threshold} withheld "
               f"({log.primary} small, {log.complementary} complementary cells)" if log.enabled
               else "disclosure control OFF: internal use only")
    return "\n".join([
        f"wrote {len(result.tables)} table(s) and {len(report.figures)} figure(s) in "
        f"{result.out_dir} ({result.seconds:.1f} s analysis)",
        f"  {control}",
        f"  report:   {report.report}",
        f"  manifest: {report.manifest}",
    ])
