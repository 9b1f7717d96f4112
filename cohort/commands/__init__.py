"""CLI subcommands: each module defines ``register(subparsers)`` and sets ``func`` on its parser.

Add a subcommand by adding a module here and its name to ``COMMAND_MODULES``.
"""

COMMAND_MODULES = (
    "synth",
    "ingest",
    "status",
    "phenotype",
    "explain",
    "beats",
    "run",
    "demo",
)
