"""Person-time incidence rates, rate ratios and rate differences.

- Rates: events / person-time with exact Poisson limits (Garwood F (1936) Biometrika
  28:437-442): lower = chi2(alpha/2; 2k)/2, upper = chi2(1 - alpha/2; 2k + 2)/2, scaled by
  person-time. With k = 0 events the lower limit is 0 and only the upper limit is informative.
- Rate ratios: exact conditional limits (given the total count, the exposed count is binomial;
  Clopper-Pearson limits on that binomial proportion mapped to the ratio, with the two-sided
  exact binomial p-value; e.g. Breslow NE & Day NE (1987) Statistical Methods in Cancer
  Research, Vol. II, IARC Sci Publ 82),
  or Wald limits on the log scale, se = sqrt(1/e1 + 1/e0).
- Rate differences: Wald limits, se = sqrt(e1/t1^2 + e0/t0^2).

Person-time is in whatever unit the caller uses (person-years in Dromos); ``per`` scales the
rate, e.g. ``per=1000`` gives events per 1,000 person-years. Zero or negative person-time is a
:class:`~cohort.errors.DataError`.
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
from cohort.stats.proportions import (
    as_key_list,
    as_polars,
    check_alpha,
    check_choice,
    grouped_sums,
    require_columns,
    validate_counts,
)

RatioMethod = Literal["exact", "wald"]
RATIO_METHODS: tuple[str, ...] = ("exact", "wald")

#: Columns of :func:`incidence_table`, after the ``by`` key columns.
RATE_COLUMNS: tuple[str, ...] = (
    "events",
    "person_time",
    "estimate",
    "lower",
    "upper",
    "per",
    "method",
    "alpha",
)

#: Columns of :func:`rate_ratio_table` (one row per non-reference exposure level).
RATIO_COLUMNS: tuple[str, ...] = (
    "term",
    "reference",
    "estimate",
    "lower",
    "upper",
    "p",
    "events",
    "person_time",
    "events_reference",
    "person_time_reference",
    "method",
    "alpha",
)


@dataclass(frozen=True)
class RateEstimate:
    """Events per ``per`` units of person-time with exact Poisson limits."""

    estimate: float
    lower: float
    upper: float
    events: float
    person_time: float
    per: float
    method: str
    alpha: float


@dataclass(frozen=True, eq=False)
class RateEstimates:
    """Rates and exact Poisson limits for arrays of counts and person-time."""

    estimate: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    events: np.ndarray
    person_time: np.ndarray
    per: float
    method: str
    alpha: float


@dataclass(frozen=True)
class RatioEstimate:
    """Rate ratio (group 1 over group 0) with limits and a two-sided p-value for ratio = 1."""

    estimate: float
    lower: float
    upper: float
    p: float
    events1: float
    person_time1: float
    events0: float
    person_time0: float
    method: str
    alpha: float


@dataclass(frozen=True)
class DifferenceEstimate:
    """Rate difference (group 1 minus group 0) per ``per`` units of person-time."""

    estimate: float
    lower: float
    upper: float
    p: float
    events1: float
    person_time1: float
    events0: float
    person_time0: float
    per: float
    method: str
    alpha: float


# --------------------------------------------------------------------------- checks


def validate_person_time(values: Any, name: str = "person_time") -> np.ndarray:
    """Return person-time as a float array; raise DataError unless every value is > 0."""
    arr = np.atleast_1d(np.asarray(values, dtype=float))
    bad = ~np.isfinite(arr) | (arr <= 0)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise DataError(
            f"{int(bad.sum())} of {arr.size} values of {name} are zero, negative or missing "
            f"(first at index {i}: {float(arr[i]):g}). A rate needs positive person-time: drop empty "
            "groups or merge them with a neighbour."
        )
    return arr


def _validate_pair(events: Any, person_time: Any) -> tuple[np.ndarray, np.ndarray]:
    ev, pt = validate_counts(events, "events"), validate_person_time(person_time)
    if ev.shape != pt.shape:
        raise DataError(
            f"events has {ev.size} values but person_time has {pt.size}; pass one each per group."
        )
    return ev, pt


# --------------------------------------------------------------------------- rates


def exact_poisson_limits(events: Any, alpha: float = 0.05) -> tuple[np.ndarray, np.ndarray]:
    """Garwood (1936) exact limits for Poisson counts (not divided by person-time).

    Returns arrays ``(lower, upper)``; lower is 0 where the count is 0.
    """
    alpha = check_alpha(alpha)
    k = validate_counts(events, "events")
    with np.errstate(invalid="ignore"):
        lower = np.where(k > 0, stats.chi2.ppf(alpha / 2.0, 2.0 * k) / 2.0, 0.0)
    upper = stats.chi2.ppf(1.0 - alpha / 2.0, 2.0 * k + 2.0) / 2.0
    return lower, upper


def poisson_rates(
    events: Any, person_time: Any, per: float = 1000.0, alpha: float = 0.05
) -> RateEstimates:
    """Incidence rates with exact Poisson limits, vectorized over groups.

    Parameters
    ----------
    events : array-like of whole numbers
        Event counts per group.
    person_time : array-like of float
        Person-time per group (> 0), e.g. person-years.
    per : float
        Multiplier: rates per ``per`` units of person-time.
    alpha : float
        Two-sided level.
    """
    ev, pt = _validate_pair(events, person_time)
    lower, upper = exact_poisson_limits(ev, alpha)
    return RateEstimates(
        estimate=ev / pt * per,
        lower=lower / pt * per,
        upper=upper / pt * per,
        events=ev,
        person_time=pt,
        per=float(per),
        method="exact_poisson",
        alpha=float(alpha),
    )


def poisson_rate(
    events: float, person_time: float, per: float = 1000.0, alpha: float = 0.05
) -> RateEstimate:
    """Incidence rate with exact Poisson (Garwood 1936) limits; see :func:`poisson_rates`."""
    if np.ndim(events) or np.ndim(person_time):
        raise DataError("pass single values here; use poisson_rates for arrays.")
    res = poisson_rates([events], [person_time], per, alpha)
    return RateEstimate(
        estimate=float(res.estimate[0]),
        lower=float(res.lower[0]),
        upper=float(res.upper[0]),
        events=float(res.events[0]),
        person_time=float(res.person_time[0]),
        per=res.per,
        method=res.method,
        alpha=res.alpha,
    )


# --------------------------------------------------------------------------- comparisons


def _scalar_pair(e1: float, t1: float, e0: float, t0: float) -> tuple[float, float, float, float]:
    ev, pt = _validate_pair([e1, e0], [t1, t0])
    return float(ev[0]), float(pt[0]), float(ev[1]), float(pt[1])


def _exact_ratio(
    e1: float, t1: float, e0: float, t0: float, alpha: float
) -> tuple[float, float, float]:
    # Given N = e1 + e0, e1 ~ Binomial(N, pi) with pi = RR t1 / (RR t1 + t0); invert the
    # Clopper-Pearson limits on pi: RR = pi / (1 - pi) * t0 / t1.
    total = e1 + e0
    pi_lo = stats.beta.ppf(alpha / 2.0, e1, e0 + 1.0) if e1 > 0 else 0.0
    pi_up = stats.beta.ppf(1.0 - alpha / 2.0, e1 + 1.0, e0) if e0 > 0 else 1.0
    scale = t0 / t1
    lower = pi_lo / (1.0 - pi_lo) * scale
    upper = np.inf if pi_up >= 1.0 else pi_up / (1.0 - pi_up) * scale
    p = stats.binomtest(int(e1), int(total), t1 / (t1 + t0)).pvalue
    return float(lower), float(upper), float(p)


def _wald_ratio(
    e1: float, e0: float, ratio: float, alpha: float
) -> tuple[float, float, float]:
    if e1 == 0 or e0 == 0:
        raise DataError(
            f"Wald limits for a rate ratio need events in both groups (got {e1:g} and {e0:g}); "
            "use method='exact', which handles zero counts."
        )
    se = np.sqrt(1.0 / e1 + 1.0 / e0)
    z = stats.norm.ppf(1.0 - alpha / 2.0)
    p = 2.0 * stats.norm.sf(abs(np.log(ratio)) / se)
    return float(ratio * np.exp(-z * se)), float(ratio * np.exp(z * se)), float(p)


def rate_ratio(
    e1: float,
    t1: float,
    e0: float,
    t0: float,
    alpha: float = 0.05,
    method: RatioMethod = "exact",
) -> RatioEstimate:
    """Ratio of the rate e1/t1 (exposed) to e0/t0 (reference).

    Parameters
    ----------
    e1, t1 : float
        Events and person-time in the exposed group.
    e0, t0 : float
        Events and person-time in the reference group.
    alpha : float
        Two-sided level.
    method : {"exact", "wald"}
        ``"exact"``: conditional binomial limits and exact two-sided p (scipy ``binomtest``,
        which sums probabilities no larger than the observed one); with e0 = 0 the estimate
        and upper limit are infinite. ``"wald"``: log-scale normal limits, needs e1, e0 > 0.
    """
    alpha = check_alpha(alpha)
    check_choice(method, RATIO_METHODS, "rate ratio method")
    e1, t1, e0, t0 = _scalar_pair(e1, t1, e0, t0)
    if e1 + e0 == 0:
        raise DataError(
            "no events in either group: the rate ratio is undefined; report the two rates "
            "(with their upper limits) instead."
        )
    ratio = np.inf if e0 == 0 else (e1 / t1) / (e0 / t0)
    if method == "exact":
        lower, upper, p = _exact_ratio(e1, t1, e0, t0, alpha)
    else:
        lower, upper, p = _wald_ratio(e1, e0, ratio, alpha)
    return RatioEstimate(float(ratio), lower, upper, p, e1, t1, e0, t0, method, alpha)


def rate_difference(
    e1: float, t1: float, e0: float, t0: float, per: float = 1000.0, alpha: float = 0.05
) -> DifferenceEstimate:
    """Rate difference e1/t1 - e0/t0 per ``per`` units of person-time, Wald limits.

    With no events in either group the variance is 0 and the limits collapse to the estimate
    (p is NaN): the Wald interval carries no information there.
    """
    alpha = check_alpha(alpha)
    e1, t1, e0, t0 = _scalar_pair(e1, t1, e0, t0)
    diff = e1 / t1 - e0 / t0
    se = np.sqrt(e1 / t1**2 + e0 / t0**2)
    z = stats.norm.ppf(1.0 - alpha / 2.0)
    p = float(2.0 * stats.norm.sf(abs(diff) / se)) if se > 0 else float("nan")
    return DifferenceEstimate(
        estimate=float(diff * per),
        lower=float((diff - z * se) * per),
        upper=float((diff + z * se) * per),
        p=p,
        events1=e1,
        person_time1=t1,
        events0=e0,
        person_time0=t0,
        per=float(per),
        method="wald",
        alpha=alpha,
    )


# --------------------------------------------------------------------------- frame level


def _sum_events_time(
    frame: pl.DataFrame | pd.DataFrame, events: str, person_time: str, keys: list[str]
) -> pl.DataFrame:
    pf = as_polars(frame)
    require_columns(pf, [events, person_time, *keys])
    # Row-level checks first so the message points at the offending rows, not a group sum.
    validate_counts(pf[events].to_numpy(), events)
    pt = pf[person_time].cast(pl.Float64).to_numpy()
    bad = ~np.isfinite(pt) | (pt < 0)
    if bad.any():
        raise DataError(
            f"{int(bad.sum())} of {pt.size} rows have missing or negative {person_time!r} "
            f"(first at row {int(np.flatnonzero(bad)[0])}); fix exit/entry dates upstream."
        )
    return grouped_sums(
        pf,
        keys,
        [
            pl.col(events).cast(pl.Float64).sum().alias("events"),
            pl.col(person_time).cast(pl.Float64).sum().alias("person_time"),
        ],
    )


def incidence_table(
    frame: pl.DataFrame | pd.DataFrame,
    *,
    events: str,
    person_time: str,
    by: str | Sequence[str] | None = None,
    per: float = 1000.0,
    alpha: float = 0.05,
) -> pd.DataFrame:
    """Incidence rates per group from person-level (or pre-aggregated) rows.

    Parameters
    ----------
    frame : polars or pandas DataFrame
        Rows carrying an event count and person-time (summed within groups).
    events, person_time : str
        Column names.
    by : str or list of str, optional
        Grouping columns.
    per, alpha
        As in :func:`poisson_rates`.

    Returns
    -------
    pandas.DataFrame
        The ``by`` columns, then :data:`RATE_COLUMNS`; sorted by the keys.
    """
    keys = as_key_list(by)
    sums = _sum_events_time(frame, events, person_time, keys)
    res = poisson_rates(sums["events"].to_numpy(), sums["person_time"].to_numpy(), per, alpha)
    out = sums.select(keys).to_pandas() if keys else pd.DataFrame(index=range(sums.height))
    out["events"] = res.events.astype(np.int64)
    out["person_time"] = res.person_time
    out["estimate"], out["lower"], out["upper"] = res.estimate, res.lower, res.upper
    out["per"], out["method"], out["alpha"] = res.per, res.method, res.alpha
    return out


def rate_ratio_table(
    frame: pl.DataFrame | pd.DataFrame,
    *,
    exposure: str,
    events: str,
    person_time: str,
    reference: Any = None,
    method: RatioMethod = "exact",
    alpha: float = 0.05,
) -> pd.DataFrame:
    """Rate ratio of each exposure level against a reference level.

    Parameters
    ----------
    frame : polars or pandas DataFrame
        Rows with the exposure level, an event count and person-time.
    exposure, events, person_time : str
        Column names. Rows with a missing exposure are an error (filter them first).
    reference : optional
        Reference level; default the first level in sort order.
    method, alpha
        As in :func:`rate_ratio`.

    Returns
    -------
    pandas.DataFrame
        :data:`RATIO_COLUMNS`, one row per non-reference level in sort order; ``term`` and
        ``reference`` hold the levels as text.
    """
    sums = _sum_events_time(frame, events, person_time, [exposure])
    levels = sums[exposure].to_list()
    if None in levels:
        raise DataError(
            f"exposure column {exposure!r} has missing values; drop or label those rows first."
        )
    if len(levels) < 2:
        raise DataError(f"exposure {exposure!r} has {len(levels)} level(s); a ratio needs two.")
    ref = levels[0] if reference is None else reference
    if ref not in levels:
        raise DataError(f"reference level {ref!r} not found in {exposure!r}; levels: {levels}.")
    e = dict(zip(levels, sums["events"].to_list(), strict=True))
    t = dict(zip(levels, sums["person_time"].to_list(), strict=True))
    rows = []
    for level in levels:
        if level == ref:
            continue
        rr = rate_ratio(e[level], t[level], e[ref], t[ref], alpha=alpha, method=method)
        rows.append(
            (str(level), str(ref), rr.estimate, rr.lower, rr.upper, rr.p, int(rr.events1),
             rr.person_time1, int(rr.events0), rr.person_time0, rr.method, rr.alpha)
        )
    return pd.DataFrame(rows, columns=list(RATIO_COLUMNS))
