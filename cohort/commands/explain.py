"""``dromos explain``: why one ECG got its conduction categories."""

from __future__ import annotations

import argparse
import json

from cohort.registry import connect


def register(subparsers) -> None:
    """Add the ``explain`` subcommand."""
    parser = subparsers.add_parser(
        "explain",
        help="show the measurements, statements and rules behind one ECG's categories",
        description=(
            "Print an ECG's measurements, statements (with the lexicon's findings), the rules "
            "that fired, the resulting categories and why a lower-precedence source was "
            "overridden. Run 'dromos phenotype' with the same rule set first."
        ),
    )
    parser.add_argument("--db", required=True, help="registry file (.duckdb)")
    parser.add_argument("--ecg", required=True, metavar="KEY", help="ecg_key of the tracing")
    parser.add_argument("--rules", default="default-v1", metavar="ID", help="rule set id")
    parser.add_argument("--json", action="store_true", help="print the explanation as JSON")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """Print the explanation; 0 on success."""
    from cohort.phenotype.explain import explain_ecg, format_explanation

    con = connect(args.db, create=False, read_only=True)
    try:
        result = explain_ecg(con, args.ecg, args.rules)
    finally:
        con.close()
    print(json.dumps(result, default=str, indent=1) if args.json else format_explanation(result))
    return 0
