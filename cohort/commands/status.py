"""``dromos status --db FILE``: what the registry holds and what was quarantined."""

from __future__ import annotations

import argparse

from cohort.commands._common import text_table
from cohort.ingest.status import registry_status
from cohort.registry import connect


def register(subparsers) -> None:
    parser = subparsers.add_parser("status", help="counts, loaded sources and quarantine reasons of a registry")
    parser.add_argument("--db", required=True, metavar="FILE", help="registry file (.duckdb)")
    parser.add_argument("--examples", type=int, default=2, metavar="N", help="example values per quarantine reason (default 2)")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    con = connect(args.db, create=False, read_only=True)
    status = registry_status(con, examples=args.examples)
    con.close()
    print("Tables")
    print(text_table([{"table": k, "rows": v} for k, v in status.counts.items()]))
    print("\nSources")
    print(text_table(status.sources.drop(columns=["source_file"])))
    print("\nQuarantine reasons")
    frame = status.quarantine_reasons.copy()
    for column in ("example_records", "example_values"):
        frame[column] = frame[column].map(lambda values: ", ".join(map(str, values)))
    print(text_table(frame))
    if not status.repairs.empty:
        print("\nRepairs")
        print(text_table(status.repairs))
    print(f"\nRow counts reconcile (read = loaded + quarantined + duplicate): {'yes' if status.reconciles else 'NO'}")
    return 0 if status.reconciles else 1
