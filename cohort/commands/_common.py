"""Small helpers shared by the CLI subcommands: text tables and progress bars."""

from __future__ import annotations

import sys
from collections.abc import Sequence

import pandas as pd
from tqdm import tqdm


def text_table(frame: pd.DataFrame | Sequence[dict], *, max_width: int = 60) -> str:
    """Plain fixed-width table: left-aligned text, right-aligned numbers."""
    frame = pd.DataFrame(frame)
    if frame.empty:
        return "(none)"
    cells = frame.astype(object).where(frame.notna(), "").map(lambda v: _cell(v, max_width))
    widths = {c: max(len(str(c)), *(len(v) for v in cells[c])) for c in frame.columns}
    numeric = {c: pd.api.types.is_numeric_dtype(frame[c]) for c in frame.columns}

    def line(values: dict) -> str:
        return "  ".join(
            (values[c].rjust(widths[c]) if numeric[c] else values[c].ljust(widths[c])) for c in frame.columns
        ).rstrip()

    header = line({c: str(c) for c in frame.columns})
    rule = "  ".join("-" * widths[c] for c in frame.columns)
    body = [line(row) for row in cells.to_dict("records")]
    return "\n".join([header, rule, *body])


def _cell(value, max_width: int) -> str:
    if isinstance(value, float):
        text = f"{value:,.2f}" if abs(value) < 1e6 else f"{value:,.0f}"
    elif isinstance(value, int):
        text = f"{value:,}"
    else:
        text = str(value)
    return text if len(text) <= max_width else text[: max_width - 1] + "…"


def progress_bar(total: int | None, description: str, *, unit: str = "it") -> tqdm:
    """A tqdm bar on stderr that stays quiet when stderr is not a terminal (CI, pipes)."""
    return tqdm(total=total, desc=description, unit=unit, file=sys.stderr, disable=not sys.stderr.isatty(), leave=False)
