"""Binomial proportions with score and exact confidence intervals.

Methods (numbering as in Newcombe RG (1998) Stat Med 17:857-872):

- ``"wilson"``: Wilson EB (1927) score interval (Newcombe method 3);
- ``"wilson_cc"``: the score interval with continuity correction (Newcombe method 4);
- ``"clopper_pearson"``: Clopper CJ & Pearson ES (1934) exact interval from beta quantiles
  (Newcombe method 5), central, alpha/2 in each tail also at x = 0 and x = n.

Scalar functions return a frozen :class:`ProportionInterval`; the ``*_intervals`` functions
take arrays of counts and return :class:`ProportionIntervals`. :func:`proportion_table` is the
frame-level helper. This module also holds the small frame and count checks the other
descriptive modules (rates, standardize, trend, table_one, quality) reuse.

Zero denominators: the scalar functions raise :class:`~cohort.errors.DataError`; the array
functions and :func:`proportion_table` return NaN estimate and limits for rows with n = 0
(a group whose outcome is missing for everyone), so one empty cell does not stop a table.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import pandas as pd
import polars as pl
from scipy import stats

from cohort.errors import DataError

ProportionMethod = Literal["wilson", "wilson_cc", "clopper_pearson"]
PROPORTION_METHODS: tuple[str, ...] = ("wilson", "wilson_cc", "clopper_pearson")

#: Columns of :func:`proportion_table`, after the ``by`` key columns (in the order given).
PROPORTION_COLUMNS: tuple[str, ...] = (
    "events",
    "n",
    "n_missing",
    "estimate",
    "lower",
    "upper",
    "method",
    "alpha",
)


# --------------------------------------------------------------------------- checks


def _first_position(mask: np.ndarray) -> int:
    return int(np.flatnonzero(mask.ravel())[0])


def _raise_if(mask: np.ndarray, total: int, what: str, fix: str, values: np.ndarray) -> None:
    """Raise DataError naming how many values fail, the first one, and the fix."""
    if mask.any():
        i = _first_position(mask)
        raise DataError(
            f"{int(mask.sum())} of {total} values {what} (first at index {i}: "
            f"{float(values.ravel()[i]):g}). {fix}"
        )


def check_alpha(alpha: float) -> float:
    """Return ``alpha`` as float, or raise DataError unless 0 < alpha < 1."""
    alpha = float(alpha)
    if not 0.0 < alpha < 1.0:
        raise DataError(
            f"alpha must lie strictly between 0 and 1, got {alpha!r}; use e.g. 0.05 for 95% limits."
        )
    return alpha


def check_choice(value: str, choices: Sequence[str], name: str) -> str:
    """Raise DataError unless ``value`` is one of ``choices``."""
    if value not in choices:
        raise DataError(f"unknown {name} {value!r}; choose one of: {', '.join(choices)}.")
    return value


def validate_counts(values: Any, name: str) -> np.ndarray:
    """Return counts as a float array; raise DataError for missing, negative or fractional ones.

    Counts are whole numbers of persons or events; fractional values usually mean a rate or
    a weighted count was passed where a count belongs.
    """
    arr = np.atleast_1d(np.asarray(values, dtype=float))
    total = arr.size
    _raise_if(~np.isfinite(arr), total, f"of {name} are missing or infinite",
              f"Drop or fill those rows before counting {name}.", arr)
    _raise_if(arr < 0, total, f"of {name} are negative",
              f"{name} counts persons or events and cannot be below 0: check the source column.",
              arr)
    _raise_if(np.abs(arr - np.round(arr)) > 1e-9, total, f"of {name} are not whole numbers",
              f"Pass counts for {name}, not rates, proportions or weighted sums.", arr)
    return arr


def validate_binomial(x: Any, n: Any) -> tuple[np.ndarray, np.ndarray]:
    """Check numerators ``x`` and denominators ``n`` (same shape, 0 <= x <= n, counts)."""
    xa, na = validate_counts(x, "x (events)"), validate_counts(n, "n (denominator)")
    if xa.shape != na.shape:
        raise DataError(
            f"x has {xa.size} values but n has {na.size}; pass one denominator per numerator."
        )
    _raise_if(xa > na, xa.size, "of x exceed their denominator n",
              "x counts persons with the outcome among the n persons of the same row: "
              "check that numerator and denominator come from the same group.", xa)
    return xa, na


# --------------------------------------------------------------------------- frames


def as_polars(frame: pl.DataFrame | pd.DataFrame) -> pl.DataFrame:
    """Return ``frame`` as a polars DataFrame with float NaN read as missing (null)."""
    if isinstance(frame, pd.DataFrame):
        return pl.from_pandas(frame, nan_to_null=True)
    if isinstance(frame, pl.DataFrame):
        return frame.with_columns(pl.col(pl.Float32, pl.Float64).fill_nan(None))
    raise DataError(
        f"expected a polars or pandas DataFrame, got {type(frame).__name__}; "
        "convert it with polars.DataFrame(...) first."
    )


def require_columns(frame: pl.DataFrame, columns: Sequence[str]) -> None:
    """Raise DataError naming the missing columns and those available."""
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        raise DataError(
            f"{len(missing)} required column(s) missing: {', '.join(missing)}; the frame has: "
            f"{', '.join(frame.columns)}. Rename the columns or pass the right names."
        )


def as_key_list(by: str | Sequence[str] | None) -> list[str]:
    """Normalize a ``by`` argument (None, one name or several) to a list of names."""
    if by is None:
        return []
    return [by] if isinstance(by, str) else list(by)


def grouped_sums(frame: pl.DataFrame, by: list[str], exprs: list[pl.Expr]) -> pl.DataFrame:
    """Aggregate ``exprs`` per combination of ``by`` (all rows when empty), sorted by key."""
    if not by:
        return frame.select(exprs)
    return frame.group_by(by).agg(exprs).sort(by, nulls_last=True)


def sorted_partitions(
    frame: pl.DataFrame, keys: list[str]
) -> list[tuple[tuple[Any, ...], pl.DataFrame]]:
    """Split ``frame`` by ``keys`` into (key tuple, part) pairs sorted by key, missing last.

    With no keys the whole frame is one part with key ``()``.
    """
    if not keys:
        return [((), frame)]
    parts = frame.partition_by(keys, as_dict=True)
    order = sorted(parts, key=lambda k: tuple((v is None, v if v is not None else 0) for v in k))
    return [(k, parts[k]) for k in order]


def check_binary_column(frame: pl.DataFrame, column: str) -> None:
    """Raise DataError unless ``column`` holds only 0/1 or booleans (nulls allowed)."""
    values = frame.get_column(column)
    if values.dtype == pl.Boolean:
        return
    if not values.dtype.is_numeric():
        raise DataError(
            f"column {column!r} has type {values.dtype}; an outcome must be boolean or 0/1."
        )
    bad = values.is_not_null() & ~values.cast(pl.Float64).is_in([0.0, 1.0])
    n_bad = int(bad.sum())
    if n_bad:
        first = int(bad.arg_true()[0])
        raise DataError(
            f"{n_bad} of {frame.height} rows of {column!r} are neither 0 nor 1 (first at row "
            f"{first}: {values[first]!r}); code the outcome as 1 = present, 0 = absent."
        )


# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class ProportionInterval:
    """A proportion x/n with its confidence limits."""

    estimate: float
    lower: float
    upper: float
    x: float
    n: float
    method: str
    alpha: float


@dataclass(frozen=True, eq=False)
class ProportionIntervals:
    """Proportions and limits for arrays of counts (NaN where n = 0)."""

    estimate: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    x: np.ndarray
    n: np.ndarray
    method: str
    alpha: float

    def to_frame(self) -> pd.DataFrame:
        """One row per count pair: events, n, estimate, lower, upper, method, alpha."""
        return pd.DataFrame(
            {
                "events": self.x,
                "n": self.n,
                "estimate": self.estimate,
                "lower": self.lower,
                "upper": self.upper,
                "method": self.method,
                "alpha": self.alpha,
            }
        )


# --------------------------------------------------------------------------- arithmetic


def _wilson_limits(x: np.ndarray, n: np.ndarray, z: float) -> tuple[np.ndarray, np.ndarray]:
    centre = (x + z * z / 2.0) / (n + z * z)
    half = z / (n + z * z) * np.sqrt(x * (n - x) / n + z * z / 4.0)
    return centre - half, centre + half


def _wilson_cc_limits(x: np.ndarray, n: np.ndarray, z: float) -> tuple[np.ndarray, np.ndarray]:
    # Newcombe (1998) method 4, written in x and n; the radicands stay >= 0 for 0 < x < n.
    p, z2, denom = x / n, z * z, 2.0 * (n + z * z)
    rad_lo = np.maximum(z2 - 2.0 - 1.0 / n + 4.0 * p * (n * (1.0 - p) + 1.0), 0.0)
    rad_up = np.maximum(z2 + 2.0 - 1.0 / n + 4.0 * p * (n * (1.0 - p) - 1.0), 0.0)
    lower = (2.0 * x + z2 - 1.0 - z * np.sqrt(rad_lo)) / denom
    upper = (2.0 * x + z2 + 1.0 + z * np.sqrt(rad_up)) / denom
    return lower, upper


def _clopper_pearson_limits(
    x: np.ndarray, n: np.ndarray, alpha: float
) -> tuple[np.ndarray, np.ndarray]:
    # beta.ppf is NaN for a zero shape parameter: those ends are set to 0 and 1 below.
    with np.errstate(invalid="ignore"):
        lower = stats.beta.ppf(alpha / 2.0, x, n - x + 1.0)
        upper = stats.beta.ppf(1.0 - alpha / 2.0, x + 1.0, n - x)
    return lower, upper


def proportion_intervals(
    x: Any, n: Any, alpha: float = 0.05, method: ProportionMethod = "wilson"
) -> ProportionIntervals:
    """Proportions x/n with confidence limits, vectorized over arrays of counts.

    Parameters
    ----------
    x, n : array-like of whole numbers
        Persons with the outcome and persons in the denominator, 0 <= x <= n.
    alpha : float
        Two-sided level; limits have nominal coverage 1 - alpha.
    method : {"wilson", "wilson_cc", "clopper_pearson"}
        See the module docstring for the references.

    Returns
    -------
    ProportionIntervals
        Estimates and limits in [0, 1]; NaN for rows with n = 0.
    """
    alpha = check_alpha(alpha)
    check_choice(method, PROPORTION_METHODS, "proportion method")
    xa, na = validate_binomial(x, n)
    ok = na > 0
    safe_n = np.where(ok, na, 1.0)  # placeholder denominator; results masked to NaN below
    z = float(stats.norm.ppf(1.0 - alpha / 2.0))
    with np.errstate(invalid="ignore", divide="ignore"):
        if method == "wilson":
            lower, upper = _wilson_limits(xa, safe_n, z)
        elif method == "wilson_cc":
            lower, upper = _wilson_cc_limits(xa, safe_n, z)
        else:
            lower, upper = _clopper_pearson_limits(xa, safe_n, alpha)
    # The limits at x = 0 and x = n are exactly 0 and 1; set them so rounding cannot move them.
    lower = np.clip(np.where(xa == 0, 0.0, lower), 0.0, 1.0)
    upper = np.clip(np.where(xa == safe_n, 1.0, upper), 0.0, 1.0)
    nan = np.full(xa.shape, np.nan)
    return ProportionIntervals(
        estimate=np.where(ok, xa / safe_n, nan),
        lower=np.where(ok, lower, nan),
        upper=np.where(ok, upper, nan),
        x=xa,
        n=na,
        method=method,
        alpha=alpha,
    )


def wilson_intervals(
    x: Any, n: Any, alpha: float = 0.05, continuity: bool = False
) -> ProportionIntervals:
    """Wilson score limits for arrays of counts (continuity-corrected if ``continuity``)."""
    return proportion_intervals(x, n, alpha, "wilson_cc" if continuity else "wilson")


def clopper_pearson_intervals(x: Any, n: Any, alpha: float = 0.05) -> ProportionIntervals:
    """Clopper-Pearson exact limits for arrays of counts."""
    return proportion_intervals(x, n, alpha, "clopper_pearson")


def _scalar(x: float, n: float, alpha: float, method: ProportionMethod) -> ProportionInterval:
    if np.ndim(x) or np.ndim(n):
        raise DataError("pass single counts here; use the *_intervals functions for arrays.")
    if float(n) == 0.0:
        raise DataError(
            "n = 0: a proportion needs at least one person in the denominator; "
            "drop the empty group, or use the array functions, which return NaN for it."
        )
    res = proportion_intervals([x], [n], alpha, method)
    return ProportionInterval(
        estimate=float(res.estimate[0]),
        lower=float(res.lower[0]),
        upper=float(res.upper[0]),
        x=float(res.x[0]),
        n=float(res.n[0]),
        method=method,
        alpha=res.alpha,
    )


def wilson_interval(
    x: float, n: float, alpha: float = 0.05, continuity: bool = False
) -> ProportionInterval:
    """Wilson (1927) score interval for x/n; Newcombe (1998) methods 3 and 4 (continuity)."""
    return _scalar(x, n, alpha, "wilson_cc" if continuity else "wilson")


def clopper_pearson_interval(x: float, n: float, alpha: float = 0.05) -> ProportionInterval:
    """Clopper-Pearson (1934) exact interval for x/n (central, alpha/2 per tail)."""
    return _scalar(x, n, alpha, "clopper_pearson")


def proportion_interval(
    x: float, n: float, alpha: float = 0.05, method: ProportionMethod = "wilson"
) -> ProportionInterval:
    """Proportion x/n with the limits of ``method`` (see :func:`proportion_intervals`)."""
    check_choice(method, PROPORTION_METHODS, "proportion method")
    return _scalar(x, n, alpha, method)


# --------------------------------------------------------------------------- frame level


def proportion_table(
    frame: pl.DataFrame | pd.DataFrame,
    outcome: str,
    *,
    by: str | Sequence[str] | None = None,
    method: ProportionMethod = "wilson",
    alpha: float = 0.05,
) -> pd.DataFrame:
    """Proportion of persons with ``outcome`` per group, with confidence limits.

    Parameters
    ----------
    frame : polars or pandas DataFrame
        One row per person; ``outcome`` is boolean or 0/1, missing values allowed.
    outcome : str
        Column holding the outcome.
    by : str or list of str, optional
        Grouping columns; none gives one overall row.
    method, alpha
        As in :func:`proportion_intervals`.

    Returns
    -------
    pandas.DataFrame
        The ``by`` columns, then :data:`PROPORTION_COLUMNS`: events (persons with the
        outcome), n (persons with a non-missing outcome), n_missing, estimate, lower, upper,
        method, alpha. Rows sorted by the keys (missing keys last).
    """
    keys = as_key_list(by)
    pf = as_polars(frame)
    require_columns(pf, [outcome, *keys])
    check_binary_column(pf, outcome)
    col = pl.col(outcome).cast(pl.Float64)
    counts = grouped_sums(
        pf,
        keys,
        [
            col.sum().alias("events"),
            col.is_not_null().sum().cast(pl.Float64).alias("n"),
            col.is_null().sum().cast(pl.Int64).alias("n_missing"),
        ],
    )
    res = proportion_intervals(counts["events"].to_numpy(), counts["n"].to_numpy(), alpha, method)
    out = counts.select(keys).to_pandas() if keys else pd.DataFrame(index=range(counts.height))
    out["events"] = res.x.astype(np.int64)
    out["n"] = res.n.astype(np.int64)
    out["n_missing"] = counts["n_missing"].to_numpy()
    out["estimate"], out["lower"], out["upper"] = res.estimate, res.lower, res.upper
    out["method"], out["alpha"] = method, res.alpha
    return out
