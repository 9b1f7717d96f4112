"""``dromos phenotype``: per-ECG conduction categories and per-person timelines."""

from __future__ import annotations

import argparse
import json

from cohort.registry import connect

_TOP = 10


def register(subparsers) -> None:
    """Add the ``phenotype`` subcommand."""
    parser = subparsers.add_parser(
        "phenotype",
        help="derive conduction categories per ECG and timelines per person",
        description=(
            "Apply a versioned rule set (cohort/rules/<ID>.toml) to every ECG of the registry: "
            "rhythm, AV and ventricular conduction categories with evidence (ecg_conduction), "
            "per-person timelines (person_conduction, ecg_state). Rows of other rule sets stay."
        ),
    )
    parser.add_argument("--db", required=True, help="registry file (.duckdb)")
    parser.add_argument(
        "--rules", action="append", metavar="ID",
        help="rule set id or rule file path (repeat for several; default: default-v1)",
    )
    parser.add_argument(
        "--list-unrecognised", action="store_true",
        help="only list the statements the lexicon did not recognise (after a run)",
    )
    parser.add_argument("--limit", type=int, default=None, help="rows of --list-unrecognised")
    parser.add_argument("--skip-beats", action="store_true", help="do not run the beat classifier")
    parser.add_argument(
        "--rebuild", action="store_true",
        help="drop the phenotype tables of all rule sets first and classify every beat strip "
             "again (after a Dromos upgrade)",
    )
    parser.add_argument("--json", action="store_true", help="print the summary as JSON")
    parser.set_defaults(func=run)


def _print_counts(title: str, counts: dict[str, int], total: int) -> None:
    print(f"  {title}:")
    for code, n in counts.items():
        if n:
            share = 100.0 * n / total if total else 0.0
            print(f"    {code:<28}{n:>10}  {share:5.1f} %")


def _print_summary(summary: dict) -> None:
    total = summary["n_ecg"]
    print(
        f"rule set {summary['rule_set_id']}: {total} ECGs, {summary['n_person']} persons, "
        f"{summary['seconds']:.1f} s"
    )
    for note in summary["notes"]:
        print(f"  note: {note}")
    for key in ("rhythm_class", "av_category", "ventricular_conduction"):
        _print_counts(key.replace("_", " "), summary[key], total)
    flags = {k: v for k, v in summary["flags"].items() if v}
    print("  flags: " + (", ".join(f"{k} {v}" for k, v in flags.items()) or "none"))
    print(f"  ECGs with a statement/measurement conflict: {summary['n_with_conflict']}")
    print(
        f"  unrecognised statements: {summary['n_unrecognised_statements']} distinct, "
        f"{summary['n_unrecognised_occurrences']} occurrences"
    )
    for row in summary["top_unrecognised"][:_TOP]:
        print(f"    {row['n']:>8}  {row['statement']!r}  [{row['unrecognised_part']}]")


def _print_unrecognised(rows: list[dict]) -> None:
    print(f"{'n':>8}  kind       statement  [unrecognised part]")
    for row in rows:
        print(f"{row['n']:>8}  {row['kind']:<9}  {row['statement']!r}  [{row['unrecognised_part']}]")


def run(args: argparse.Namespace) -> int:
    """Phenotype the registry (or list unrecognised statements); 0 on success."""
    from tqdm import tqdm

    from cohort.phenotype.run import STEPS, list_unrecognised, run_phenotype

    rules = args.rules or ["default-v1"]
    con = connect(args.db, create=False, read_only=args.list_unrecognised)
    try:
        if args.list_unrecognised:
            for rule in rules:
                rows = list_unrecognised(con, rule, args.limit)
                print(json.dumps(rows, default=str, indent=1)) if args.json else _print_unrecognised(rows)
            return 0
        for i, rule in enumerate(rules):
            with tqdm(total=len(STEPS), desc=f"phenotype {rule}", unit="step", leave=False) as bar:
                # The beat classifier does not depend on the rule set: run it once.
                summary = run_phenotype(con, rule, progress=bar,
                                        beats=not args.skip_beats and i == 0,
                                        rebuild=args.rebuild and i == 0)
            if args.json:
                print(json.dumps(summary, default=str, indent=1))
            else:
                _print_summary(summary)
        return 0
    finally:
        con.close()
