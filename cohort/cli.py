"""Command-line entry point ``dromos``."""

from __future__ import annotations

import argparse
import importlib
import sys

from cohort import __version__
from cohort.commands import COMMAND_MODULES
from cohort.errors import DromosError


def build_parser() -> argparse.ArgumentParser:
    """Parser with every subcommand module that is present."""
    parser = argparse.ArgumentParser(
        prog="dromos",
        description="Population evidence on cardiac conduction disease from ECG registries.",
    )
    parser.add_argument("--version", action="version", version=f"dromos {__version__}")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMAND_MODULES:
        try:
            module = importlib.import_module(f"cohort.commands.{name}")
        except ModuleNotFoundError as exc:
            if exc.name == f"cohort.commands.{name}":
                continue  # subcommand not built yet
            raise
        module.register(subparsers)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Run the CLI; DromosError becomes a one-paragraph message and a non-zero exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 1
    try:
        return int(args.func(args) or 0)
    except DromosError as exc:
        print(f"dromos {args.command}: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print(f"dromos {args.command}: interrupted; the registry is unchanged.", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
