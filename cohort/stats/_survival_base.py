"""Shared machinery of the survival estimators: input checks, risk-set sums, tidy frames.

Every survival estimator in :mod:`cohort.stats` converts its input frame (polars, pandas,
pyarrow or a mapping of arrays) to numpy once, here, and validates it here, so that bad input
raises :class:`cohort.errors.DataError` with the number of offending rows and the fix instead
of a traceback from deep inside the arithmetic.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from cohort.errors import DataError

# Column sets of the tidy outputs (documented in each estimator's docstring).
CURVE_COLUMNS: tuple[str, ...] = (
    "group", "term", "time", "estimate", "se", "lower", "upper", "n_at_risk", "events", "censored",
)
REGRESSION_COLUMNS: tuple[str, ...] = (
    "term", "estimate", "se", "se_naive", "hr", "lower", "upper", "z", "p", "n", "events",
    "ph_p", "ph_flag",
)
CI_KINDS: tuple[str, ...] = ("log-log", "log", "plain")
_SHOW_ROWS = 5  # how many offending row positions a message lists


# --------------------------------------------------------------------------- frames -> numpy
def frame_columns(frame: Any) -> list[str]:
    """Column names of a polars/pandas/pyarrow frame or a mapping of arrays."""
    if isinstance(frame, Mapping):
        return list(frame.keys())
    names = getattr(frame, "columns", None)
    if names is None:
        names = getattr(frame, "column_names", None)
    if names is None:
        raise DataError(
            f"expected a polars or pandas DataFrame (or pyarrow Table), got {type(frame).__name__}; "
            "convert the data to a DataFrame before fitting"
        )
    return [str(c) for c in names]


def extract(frame: Any, names: Iterable[str | None], *, caller: str) -> dict[str, np.ndarray]:
    """Pull the named columns out of ``frame`` as numpy arrays (one conversion per column).

    ``None`` entries are skipped, so optional roles (entry, weights, ...) can be passed as is.
    """
    wanted = [n for n in dict.fromkeys(names) if n is not None]
    present = set(frame_columns(frame))
    missing = [n for n in wanted if n not in present]
    if missing:
        raise DataError(
            f"{caller}: column(s) {missing} not found in the frame (it has {sorted(present)}); "
            "pass the names of existing columns"
        )
    out: dict[str, np.ndarray] = {}
    for name in wanted:
        col = frame[name]
        if hasattr(col, "to_numpy"):
            arr = col.to_numpy()
        else:  # pyarrow ChunkedArray or a plain sequence
            arr = np.asarray(col.to_pylist() if hasattr(col, "to_pylist") else col)
        out[name] = np.asarray(arr)
    return out


def _rows(mask: np.ndarray) -> str:
    idx = np.flatnonzero(mask)[:_SHOW_ROWS]
    more = ", ..." if mask.sum() > _SHOW_ROWS else ""
    return ", ".join(str(i) for i in idx) + more


def as_float(arr: np.ndarray, name: str, *, caller: str, allow_inf: bool = False) -> np.ndarray:
    """Numeric column as float64; missing or non-numeric values raise DataError with counts."""
    if arr.dtype == object:
        try:
            arr = np.array([np.nan if v is None else v for v in arr], dtype=float)
        except (TypeError, ValueError) as exc:
            raise DataError(
                f"{caller}: column '{name}' is not numeric ({exc}); encode it as numbers "
                "(e.g. 0/1 indicators for categories) before fitting"
            ) from None
    elif arr.dtype.kind not in "biuf":
        raise DataError(
            f"{caller}: column '{name}' has non-numeric type {arr.dtype}; encode it as numbers "
            "(e.g. 0/1 indicators for categories, days since origin for dates) before fitting"
        )
    out = arr.astype(np.float64, copy=False)
    bad = np.isnan(out) if allow_inf else ~np.isfinite(out)
    if bad.any():
        raise DataError(
            f"{caller}: column '{name}' has {int(bad.sum())} of {out.size} rows missing or "
            f"non-finite (row positions {_rows(bad)}); drop or impute those rows before fitting"
        )
    return out


def as_labels(arr: np.ndarray, name: str, *, caller: str) -> tuple[np.ndarray, np.ndarray]:
    """Group/strata/id column -> (integer codes 0..g-1, sorted labels); nulls raise DataError."""
    if arr.dtype == object:
        bad = np.array([v is None or (isinstance(v, float) and np.isnan(v)) for v in arr])
    elif arr.dtype.kind == "f":
        bad = np.isnan(arr)
    else:
        bad = np.zeros(arr.shape, dtype=bool)
    if bad.any():
        raise DataError(
            f"{caller}: column '{name}' has {int(bad.sum())} missing values (row positions "
            f"{_rows(bad)}); give every row a value (e.g. an explicit 'unknown' level)"
        )
    labels, codes = np.unique(arr.astype(str) if arr.dtype == object else arr, return_inverse=True)
    return codes.astype(np.int64), labels


def event_codes(arr: np.ndarray, name: str, *, caller: str) -> np.ndarray:
    """Event column as non-negative integer codes (0 = censored, 1..k = causes)."""
    if arr.dtype == bool:
        return arr.astype(np.int64)
    vals = as_float(arr, name, caller=caller)
    bad = (vals < 0) | (vals != np.round(vals))
    if bad.any():
        raise DataError(
            f"{caller}: column '{name}' must hold integer codes 0 (censored) and 1, 2, ... "
            f"(causes); {int(bad.sum())} rows do not (row positions {_rows(bad)}); recode them"
        )
    return vals.astype(np.int64)


def check_times(duration: np.ndarray, entry: np.ndarray | None, *, caller: str,
                duration_name: str, entry_name: str | None) -> None:
    """Durations must be >= 0 and entry strictly before exit (follow-up on (entry, exit])."""
    neg = duration < 0
    if neg.any():
        raise DataError(
            f"{caller}: column '{duration_name}' has {int(neg.sum())} negative times (row "
            f"positions {_rows(neg)}); times are measured from the time origin and must be >= 0"
        )
    if entry is not None:
        bad = entry >= duration
        if bad.any():
            raise DataError(
                f"{caller}: {int(bad.sum())} rows have '{entry_name}' >= '{duration_name}' (row "
                f"positions {_rows(bad)}); follow-up is the interval (entry, exit], so drop rows "
                "with no follow-up or fix their dates"
            )


def check_weights(weights: np.ndarray, name: str, *, caller: str) -> None:
    """Case weights must be positive."""
    bad = weights <= 0
    if bad.any():
        raise DataError(
            f"{caller}: column '{name}' has {int(bad.sum())} weights <= 0 (row positions "
            f"{_rows(bad)}); drop those rows or give them a positive weight"
        )


def check_nonempty(n: int, *, caller: str) -> None:
    """An estimator needs at least one row."""
    if n == 0:
        raise DataError(f"{caller}: the frame has no rows; check the filters that built it")


def curve_inputs(frame: Any, *, duration: str, event: str, entry: str | None, weights: str | None,
                 group: str | None, caller: str):
    """Validated inputs of a curve estimator: (columns, times, event codes, entry, weights)."""
    cols = extract(frame, [duration, event, entry, weights, group], caller=caller)
    t = as_float(cols[duration], duration, caller=caller)
    check_nonempty(t.size, caller=caller)
    codes = event_codes(cols[event], event, caller=caller)
    e = as_float(cols[entry], entry, caller=caller, allow_inf=True) if entry else None
    check_times(t, e, caller=caller, duration_name=duration, entry_name=entry)
    w = as_float(cols[weights], weights, caller=caller) if weights else None
    if w is not None:
        check_weights(w, weights, caller=caller)
    return cols, t, codes, e, w


def check_setting(value: Any, allowed: Sequence[Any], name: str, *, caller: str) -> None:
    """Constructor settings restricted to a fixed set raise ValueError early."""
    if value not in allowed:
        raise ValueError(f"{caller}: {name}={value!r} is not one of {list(allowed)}")


# --------------------------------------------------------------------------- risk tables
def risk_table(duration: np.ndarray, codes: np.ndarray, entry: np.ndarray | None,
               weights: np.ndarray | None, n_codes: int) -> dict[str, np.ndarray]:
    """Counts at each unique exit time: at risk, per-code exits (code 0 = censored).

    Returns ``time`` (sorted unique exit times), ``at_risk`` (weighted number with
    entry < t <= exit), ``counts`` (T x (n_codes + 1) weighted exits by code).
    All rows exiting at a tied time are processed together (no jitter): O(n log n).
    """
    w = np.ones(duration.size) if weights is None else weights
    time, inv = np.unique(duration, return_inverse=True)
    n_t = time.size
    counts = np.bincount(inv * (n_codes + 1) + codes, weights=w,
                         minlength=n_t * (n_codes + 1)).reshape(n_t, n_codes + 1)
    exits = counts.sum(axis=1)
    at_risk = np.cumsum(exits[::-1])[::-1]  # exit time >= t
    if entry is not None:
        at_risk = at_risk - entered_at_or_after(entry, w, time)
    return {"time": time, "at_risk": at_risk, "counts": counts}


def entered_at_or_after(entry: np.ndarray, weights: np.ndarray, times: np.ndarray) -> np.ndarray:
    """Weighted number of rows with entry >= t for each t (they are not yet at risk at t)."""
    order = np.argsort(entry, kind="stable")
    cum = np.concatenate(([0.0], np.cumsum(weights[order])))
    pos = np.searchsorted(entry[order], times, side="left")
    return cum[-1] - cum[pos]


def at_risk_counts(duration: np.ndarray, codes: np.ndarray, entry: np.ndarray | None,
                   weights: np.ndarray | None, times: np.ndarray) -> pd.DataFrame:
    """Numbers at risk at each of ``times`` and events/censored in (previous time, time]."""
    w = np.ones(duration.size) if weights is None else weights
    times = np.asarray(times, dtype=float)
    order = np.argsort(duration, kind="stable")
    d_sorted = duration[order]
    cum_all = np.concatenate(([0.0], np.cumsum(w[order])))
    cum_ev = np.concatenate(([0.0], np.cumsum((w * (codes > 0))[order])))
    at_risk = cum_all[-1] - cum_all[np.searchsorted(d_sorted, times, side="left")]
    if entry is not None:
        at_risk = at_risk - entered_at_or_after(entry, w, times)
    upto = np.searchsorted(d_sorted, times, side="right")
    ev_cum = cum_ev[upto]
    out_cum = cum_all[upto]
    events = np.diff(np.concatenate(([0.0], ev_cum)))
    censored = np.diff(np.concatenate(([0.0], out_cum - ev_cum)))
    return pd.DataFrame({"time": times, "n_at_risk": at_risk, "events": events,
                         "censored": censored})


def step_lookup(grid: np.ndarray, values: np.ndarray, times: np.ndarray,
                before: float) -> np.ndarray:
    """Right-continuous step function defined on ``grid`` evaluated at ``times``."""
    idx = np.searchsorted(grid, np.asarray(times, dtype=float), side="right") - 1
    vals = np.concatenate(([before], values))
    return vals[idx + 1]


# --------------------------------------------------------------------------- intervals
def z_value(alpha: float) -> float:
    """Two-sided standard normal quantile for level ``1 - alpha``."""
    if not 0 < alpha < 1:
        raise ValueError(f"alpha={alpha} must lie in (0, 1)")
    return float(stats.norm.ppf(1 - alpha / 2))


def probability_ci(est: np.ndarray, se: np.ndarray, z: float, kind: str) -> tuple[np.ndarray,
                                                                                 np.ndarray]:
    """Pointwise interval for a probability ``est`` with standard error ``se``.

    ``log-log``: symmetric on log(-log p) (Kalbfleisch & Prentice 2002, sec. 1.3; R survfit
    conf.type="log-log"); ``log``: symmetric on log p, upper bound capped at 1; ``plain``:
    est +/- z se clipped to [0, 1].
    """
    est = np.asarray(est, dtype=float)
    se = np.asarray(se, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        if kind == "plain":
            lo, hi = est - z * se, est + z * se
        elif kind == "log":
            lo, hi = est * np.exp(-z * se / est), est * np.exp(z * se / est)
        elif kind == "log-log":
            theta = np.log(-np.log(est))
            se_t = se / (est * np.abs(np.log(est)))
            lo = np.exp(-np.exp(theta + z * se_t))
            hi = np.exp(-np.exp(theta - z * se_t))
        else:  # pragma: no cover - guarded by check_setting
            raise ValueError(kind)
    degenerate = (est <= 0) | (est >= 1) | (se == 0)
    lo = np.where(degenerate, est, lo)
    hi = np.where(degenerate, est, hi)
    return np.clip(lo, 0.0, 1.0), np.clip(hi, 0.0, 1.0)


def wald_table(terms: Sequence[str], beta: np.ndarray, se: np.ndarray, se_naive: np.ndarray,
               z: float, n: int, events: float) -> pd.DataFrame:
    """Tidy regression rows on the log-hazard scale with hazard-ratio limits."""
    with np.errstate(divide="ignore", invalid="ignore"):
        zstat = beta / se
    return pd.DataFrame({
        "term": list(terms),
        "estimate": beta,
        "se": se,
        "se_naive": se_naive,
        "hr": np.exp(beta),
        "lower": np.exp(beta - z * se),
        "upper": np.exp(beta + z * se),
        "z": zstat,
        "p": 2 * stats.norm.sf(np.abs(zstat)),
        "n": n,
        "events": events,
    })


def tidy(frame: pd.DataFrame, columns: Sequence[str]) -> pd.DataFrame:
    """Reorder to the documented column set (missing ones filled with NaN), fresh index."""
    out = frame.reindex(columns=list(columns))
    return out.reset_index(drop=True)


def require_fitted(obj: Any, attr: str) -> None:
    """Raise a clear error when a result is asked of an unfitted estimator."""
    if not hasattr(obj, attr):
        raise RuntimeError(f"{type(obj).__name__} is not fitted yet; call .fit(frame, ...) first")
