"""``dromos ingest SOURCE... --db FILE``: load exports into the registry."""

from __future__ import annotations

import argparse

from cohort.commands._common import progress_bar, text_table
from cohort.ingest.loader import expand_sources, ingest
from cohort.ingest.mapping import LOAD_ORDER, load_mapping
from cohort.ingest.pseudonym import ENV_VAR, read_key
from cohort.registry import connect


def register(subparsers) -> None:
    parser = subparsers.add_parser(
        "ingest",
        help="load CSV / Parquet / FHIR NDJSON exports into a registry",
        description="Load exports into the registry file (created if missing). Each file loads in "
        "one transaction; bad records go to quarantine with a reason; a file loaded before "
        "loads nothing new.",
    )
    parser.add_argument("sources", nargs="+", metavar="SOURCE", help="files or folders of exports")
    parser.add_argument("--db", required=True, metavar="FILE", help="registry file (.duckdb)")
    parser.add_argument("--mapping", metavar="FILE", help="mapping TOML for a foreign layout (default: built-in dromos-flat-v1)")
    parser.add_argument("--table", choices=LOAD_ORDER, help="target table when file names do not tell")
    key_group = parser.add_mutually_exclusive_group()
    key_group.add_argument("--pseudonym-key-file", metavar="FILE", help="replace person ids by a keyed hash (key read from FILE, never stored)")
    key_group.add_argument("--pseudonymize", action="store_true", help=f"replace person ids by a keyed hash, key from ${ENV_VAR}")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    key = read_key(args.pseudonym_key_file, use_env=args.pseudonymize)
    mapping = load_mapping(args.mapping)
    files = expand_sources(args.sources)
    con = connect(args.db)
    rows = []
    with progress_bar(len(files), "ingest", unit="file") as bar:
        def advance(result) -> None:
            bar.update(1)
            bar.set_postfix_str(result.path.name)

        results = ingest(con, files, mapping=mapping, table=args.table, key=key, progress=advance)
    for result in results:
        rows.append(
            {
                "file": result.path.name,
                "table": result.table,
                "read": result.rows_read,
                "loaded": result.rows_loaded,
                "quarantined": result.rows_quarantined,
                "duplicate": result.rows_duplicate,
                "repaired": result.rows_repaired,
                "seconds": round(result.seconds, 2),
                "note": "already loaded: nothing new" if result.skipped else "",
            }
        )
    con.close()
    print(text_table(rows))
    quarantined = sum(r["quarantined"] for r in rows)
    if quarantined:
        print(f"\n{quarantined:,} record(s) quarantined; see reasons with: dromos status --db {args.db}")
    return 0
