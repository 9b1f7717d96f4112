"""Reading the tidy output tables back as text, and their numbers for plotting.

Tables are read with every column as text so that what the report shows, and what each
figure's data file holds, is the CSV text itself; numbers are parsed only to draw. The
disclosure marker and empty fields parse as NaN.
"""

from __future__ import annotations

import csv
import io
from pathlib import Path

import numpy as np
import polars as pl

from cohort.report.disclosure import MARKER


def load_csv(path: str | Path) -> pl.DataFrame:
    """A CSV of the run folder with every column as text (empty fields are "")."""
    with Path(path).open(encoding="utf-8", newline="") as handle:
        rows = list(csv.reader(handle))
    if not rows:
        return pl.DataFrame()
    header, body = rows[0], rows[1:]
    columns = {h: [r[i] if i < len(r) else "" for r in body] for i, h in enumerate(header)}
    return pl.DataFrame(columns, schema=dict.fromkeys(header, pl.String))


def num(values: pl.Series | list[str]) -> np.ndarray:
    """Numbers of a text column; "", the disclosure marker and text that is not a number -> NaN."""
    out = np.full(len(values), np.nan)
    for i, text in enumerate(values):
        if text in ("", MARKER, None):
            continue
        try:
            out[i] = float(text)
        except ValueError:
            continue
    return out


def withheld(values: pl.Series | list[str]) -> np.ndarray:
    """True where the disclosure marker stands."""
    return np.array([v == MARKER for v in values], dtype=bool)


def to_csv_text(frame: pl.DataFrame) -> str:
    """The frame as CSV text in the run layer's format (text cells written unchanged)."""
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(frame.columns)
    writer.writerows(frame.iter_rows())
    return buffer.getvalue()


__all__ = ["load_csv", "num", "to_csv_text", "withheld"]
