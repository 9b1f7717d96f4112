"""Render statement concepts as text (with wording, case and punctuation variation) and codes."""

from __future__ import annotations

import numpy as np
import polars as pl

from synthetic_registry.config import Config

SEPARATOR = " | "


def render_statements(
    cfg: Config,
    rng: np.random.Generator,
    slots: np.ndarray,
    kind: str,
    upper: np.ndarray,
    with_codes: np.ndarray,
) -> tuple[pl.Series, pl.Series]:
    """Statement text and SNOMED CT code list of each read.

    Parameters
    ----------
    slots
        (n, k) concept indices into the lexicon, -1 = empty slot.
    kind
        "machine" or "confirmed" (selects the wording variants).
    upper
        Rows whose text is written in upper case (machine style of some sites).
    with_codes
        Rows whose export carries statement codes.
    """
    lex = cfg.lexicon
    texts = lex.texts[kind]
    keys = lex.keys[kind]
    n, k = slots.shape
    period = cfg.value("statements", "trailing_period_share") if kind == "confirmed" else 0.0
    # Variant table doubled: the second half carries a trailing period.
    table = pl.Series(
        "t",
        np.concatenate((texts, np.array([t + "." for t in texts], dtype=object))).tolist(),
        dtype=pl.String,
    )
    code_table = pl.Series("c", [_codes_text(c) for c in lex.snomed], dtype=pl.String)
    text_cols = []
    code_cols = []
    for j in range(k):
        c = slots[:, j]
        valid = c >= 0
        u = rng.random(n)
        variant = np.searchsorted(keys, np.where(valid, c, 0) + np.maximum(u, 1e-12))
        variant = variant + np.where(rng.random(n) < period, texts.size, 0)
        text_cols.append(table.gather(_nullable_index(variant, valid)).alias(f"s{j}"))
        code_cols.append(code_table.gather(_nullable_index(c, valid)).alias(f"c{j}"))
    frame = pl.DataFrame(text_cols + code_cols)
    lower = (
        (rng.random(n) < cfg.value("statements", "confirmed_lower_case_share"))
        if kind == "confirmed"
        else np.zeros(n, dtype=bool)
    )
    joined = pl.concat_str([f"s{j}" for j in range(k)], separator=SEPARATOR, ignore_nulls=True)
    codes = pl.concat_str([f"c{j}" for j in range(k)], separator=";", ignore_nulls=True)
    out = (
        frame.with_columns(
            pl.Series("upper", upper),
            pl.Series("lower", lower),
            pl.Series("with_codes", with_codes),
        )
        .select(
            pl.when(pl.col("upper"))
            .then(joined.str.to_uppercase())
            .when(pl.col("lower"))
            .then(joined.str.to_lowercase())
            .otherwise(joined)
            .alias("statements"),
            pl.when(pl.col("with_codes")).then(codes).otherwise(None).alias("statement_codes"),
        )
        .select(
            pl.when(pl.col(c) == "").then(None).otherwise(pl.col(c)).alias(c)
            for c in ("statements", "statement_codes")
        )
    )
    return out["statements"], out["statement_codes"]


def _codes_text(snomed: str) -> str | None:
    """ "SNOMED:a;SNOMED:b" for a concept's ids, None if it has none."""
    ids = [x for x in snomed.split(";") if x]
    return ";".join(f"SNOMED:{x}" for x in ids) if ids else None


def _nullable_index(idx: np.ndarray, valid: np.ndarray) -> pl.Series:
    """UInt32 index series with nulls where not valid."""
    s = pl.Series("i", np.where(valid, idx, 0).astype(np.uint32))
    return pl.select(pl.when(pl.Series(valid)).then(s).otherwise(None)).to_series()
