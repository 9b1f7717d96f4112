"""Site quality tracking: funnel plot limits and u-charts.

Funnel plots (Spiegelhalter DJ (2005) "Funnel plots for comparing institutional
performance", Stat Med 24:1185-1202) draw, around a target (by default the network-wide
value), control limits as a function of each unit's precision (denominator n for proportions,
person-time T for rates). With ``method="exact"`` the p-quantile limit uses the discrete
quantile r_p of Binomial(n, target) or Poisson(target * T) with the paper's interpolation:

    alpha = (F(r_p) - p) / (F(r_p) - F(r_p - 1)),   limit = (r_p - alpha) / n   (or / T),

and ``method="normal"`` uses target +/- z sqrt(target (1 - target) / n) (proportions) or
target +/- z sqrt(target / T) (rates). Limits are clipped to [0, 1] for proportions and at 0
for rates; with almost no expected events (P(count = 0) >= p) the interpolated quantile falls
at or below 0, so such tiny units get limits of 0 (the funnel's mouth). The two conventional coverages are 95% (about 2 SD) and 99.8% (about 3 SD); a unit
beyond the 99.8% limits is flagged as an alarm, beyond 95% as an alert. Overdispersion
adjustments (the paper's section 6) are not applied.

u-charts (attribute control chart for counts per unit of exposure, variable exposure per
period): centre u = sum c_i / sum n_i, limits u +/- sigma sqrt(u / n_i) per period, lower
limit clipped at 0 (Montgomery DC, Introduction to Statistical Quality Control, Wiley).
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
    check_choice,
    grouped_sums,
    require_columns,
    sorted_partitions,
    validate_binomial,
    validate_counts,
)
from cohort.stats.rates import validate_person_time

FunnelKind = Literal["proportion", "rate"]
FunnelMethod = Literal["exact", "normal"]
FUNNEL_KINDS: tuple[str, ...] = ("proportion", "rate")
FUNNEL_METHODS: tuple[str, ...] = ("exact", "normal")
#: Inner and outer funnel coverages (Spiegelhalter 2005: ~2 and ~3 standard deviations).
FUNNEL_COVERAGES: tuple[float, float] = (0.95, 0.998)
FLAGS: tuple[str, ...] = ("below_998", "below_95", "within", "above_95", "above_998")

#: Columns of :func:`funnel_table` (one row per unit).
FUNNEL_COLUMNS: tuple[str, ...] = (
    "unit",
    "events",
    "denominator",
    "estimate",
    "target",
    "lower_95",
    "upper_95",
    "lower_998",
    "upper_998",
    "flag",
    "kind",
    "method",
    "per",
)
#: Columns of :func:`u_chart`, after the ``by`` key columns (one row per period).
U_CHART_COLUMNS: tuple[str, ...] = (
    "period",
    "events",
    "exposure",
    "estimate",
    "centre",
    "lower",
    "upper",
    "flag",
    "per",
    "sigma",
)


@dataclass(frozen=True, eq=False)
class FunnelLimits:
    """Funnel control limits at each precision value, unscaled (proportion or rate per unit)."""

    precision: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    target: float
    coverage: float
    kind: str
    method: str


def _check_coverage(coverage: float) -> float:
    coverage = float(coverage)
    if not 0.5 < coverage < 1.0:
        raise DataError(f"coverage must lie in (0.5, 1), got {coverage!r}; e.g. 0.95 or 0.998.")
    return coverage


def _interpolated(dist: Any, p: float, precision: np.ndarray) -> np.ndarray:
    """Spiegelhalter (2005) interpolated p-quantile of a discrete count, divided by precision."""
    r = dist.ppf(p)
    f_r, f_below = dist.cdf(r), dist.cdf(r - 1.0)
    step = (f_r - p) / (f_r - f_below)
    return (r - step) / precision


def binomial_funnel_limits(
    n: Any, target: float, coverage: float = 0.95, method: FunnelMethod = "exact"
) -> FunnelLimits:
    """Funnel limits for a proportion with target ``target`` at denominators ``n``."""
    check_choice(method, FUNNEL_METHODS, "funnel method")
    coverage = _check_coverage(coverage)
    if not 0.0 < target < 1.0:
        raise DataError(
            f"target proportion must lie strictly between 0 and 1, got {target!r}: "
            "a funnel around 0 or 1 has no spread."
        )
    na = validate_person_time(validate_counts(n, "n"), "n")
    lo_p, up_p = (1.0 - coverage) / 2.0, (1.0 + coverage) / 2.0
    if method == "exact":
        lower = _interpolated(stats.binom(na, target), lo_p, na)
        upper = _interpolated(stats.binom(na, target), up_p, na)
    else:
        half = stats.norm.ppf(up_p) * np.sqrt(target * (1.0 - target) / na)
        lower, upper = target - half, target + half
    return FunnelLimits(na, np.clip(lower, 0.0, 1.0), np.clip(upper, 0.0, 1.0), float(target),
                        coverage, "proportion", method)


def poisson_funnel_limits(
    person_time: Any, target_rate: float, coverage: float = 0.95, method: FunnelMethod = "exact"
) -> FunnelLimits:
    """Funnel limits for a rate (events per unit person-time) around ``target_rate``."""
    check_choice(method, FUNNEL_METHODS, "funnel method")
    coverage = _check_coverage(coverage)
    if not target_rate > 0.0:
        raise DataError(
            f"target rate must be > 0, got {target_rate!r}: with no events in the network "
            "there is nothing to compare units against."
        )
    t = validate_person_time(person_time)
    lo_p, up_p = (1.0 - coverage) / 2.0, (1.0 + coverage) / 2.0
    if method == "exact":
        lower = _interpolated(stats.poisson(target_rate * t), lo_p, t)
        upper = _interpolated(stats.poisson(target_rate * t), up_p, t)
    else:
        half = stats.norm.ppf(up_p) * np.sqrt(target_rate / t)
        lower, upper = target_rate - half, target_rate + half
    return FunnelLimits(t, np.maximum(lower, 0.0), upper, float(target_rate), coverage, "rate",
                        method)


def funnel_limits(
    precision: Any,
    target: float,
    kind: FunnelKind = "proportion",
    coverage: float = 0.95,
    method: FunnelMethod = "exact",
) -> FunnelLimits:
    """Dispatch to :func:`binomial_funnel_limits` or :func:`poisson_funnel_limits`."""
    check_choice(kind, FUNNEL_KINDS, "funnel kind")
    if kind == "proportion":
        return binomial_funnel_limits(precision, target, coverage, method)
    return poisson_funnel_limits(precision, target, coverage, method)


def funnel_flags(
    estimate: np.ndarray, inner: FunnelLimits, outer: FunnelLimits
) -> np.ndarray:
    """Flag per unit: beyond the outer (alarm) or inner (alert) limits, or within.

    A unit exactly on a limit counts as within.
    """
    flag = np.full(estimate.shape, "within", dtype=object)
    flag[estimate > inner.upper] = "above_95"
    flag[estimate < inner.lower] = "below_95"
    flag[estimate > outer.upper] = "above_998"
    flag[estimate < outer.lower] = "below_998"
    return flag


def funnel_table(
    frame: pl.DataFrame | pd.DataFrame,
    *,
    unit: str,
    events: str,
    denominator: str,
    kind: FunnelKind = "proportion",
    target: float | None = None,
    method: FunnelMethod = "exact",
    per: float = 1.0,
) -> pd.DataFrame:
    """Units (e.g. sites) against funnel limits around the network-wide value.

    Parameters
    ----------
    frame : polars or pandas DataFrame
        Rows with a unit, an event count and a denominator (persons for proportions,
        person-time for rates); rows are summed per unit.
    unit, events, denominator : str
        Column names.
    kind : {"proportion", "rate"}
        Binomial or Poisson limits.
    target : float, optional
        Value to compare against, unscaled (proportion, or events per unit person-time);
        default the pooled value sum(events) / sum(denominator).
    method : {"exact", "normal"}
        Limits as in the module docstring.
    per : float
        Multiplier for estimate, target and limits (e.g. 100 for percent, 1000 for rates per
        1,000 person-years).

    Returns
    -------
    pandas.DataFrame
        :data:`FUNNEL_COLUMNS`, one row per unit in sort order; ``flag`` is one of
        :data:`FLAGS`.
    """
    check_choice(kind, FUNNEL_KINDS, "funnel kind")
    pf = as_polars(frame)
    require_columns(pf, [unit, events, denominator])
    sums = grouped_sums(
        pf,
        [unit],
        [
            pl.col(events).cast(pl.Float64).sum().alias("events"),
            pl.col(denominator).cast(pl.Float64).sum().alias("denominator"),
        ],
    )
    ev, den = sums["events"].to_numpy(), sums["denominator"].to_numpy()
    if kind == "proportion":
        validate_binomial(ev, den)
    else:
        validate_counts(ev, "events")
    validate_person_time(den, "denominator")
    tgt = float(ev.sum() / den.sum()) if target is None else float(target)
    inner, outer = (funnel_limits(den, tgt, kind, c, method) for c in FUNNEL_COVERAGES)
    estimate = ev / den
    return pd.DataFrame(
        {
            "unit": sums[unit].to_list(),
            "events": ev.astype(np.int64),
            "denominator": den,
            "estimate": estimate * per,
            "target": tgt * per,
            "lower_95": inner.lower * per,
            "upper_95": inner.upper * per,
            "lower_998": outer.lower * per,
            "upper_998": outer.upper * per,
            "flag": funnel_flags(estimate, inner, outer),
            "kind": kind,
            "method": method,
            "per": float(per),
        }
    )


def funnel_curve(
    target: float,
    max_precision: float,
    *,
    kind: FunnelKind = "proportion",
    min_precision: float = 1.0,
    points: int = 200,
    method: FunnelMethod = "exact",
    coverages: Sequence[float] = FUNNEL_COVERAGES,
    per: float = 1.0,
) -> pd.DataFrame:
    """Funnel contours for plotting: columns precision, coverage, lower, upper.

    Precision runs on a log-spaced grid from ``min_precision`` to ``max_precision`` (whole
    numbers for proportions, since n counts persons).
    """
    grid = np.geomspace(min_precision, max_precision, points)
    if kind == "proportion":
        grid = np.unique(np.round(grid))
    frames = []
    for c in coverages:
        lim = funnel_limits(grid, target, kind, c, method)
        frames.append(pd.DataFrame({"precision": grid, "coverage": float(c),
                                    "lower": lim.lower * per, "upper": lim.upper * per}))
    return pd.concat(frames, ignore_index=True)


# --------------------------------------------------------------------------- u-chart


def u_chart_limits(
    exposure: Any, centre: float, sigma: float = 3.0
) -> tuple[np.ndarray, np.ndarray]:
    """u-chart limits centre +/- sigma sqrt(centre / exposure) (lower clipped at 0)."""
    n = validate_person_time(exposure, "exposure")
    if not centre >= 0.0:
        raise DataError(f"u-chart centre must be >= 0, got {centre!r}.")
    half = sigma * np.sqrt(centre / n)
    return np.maximum(centre - half, 0.0), centre + half


def u_chart(
    frame: pl.DataFrame | pd.DataFrame,
    *,
    period: str,
    events: str,
    exposure: str,
    by: str | Sequence[str] | None = None,
    centre: float | None = None,
    sigma: float = 3.0,
    per: float = 1.0,
) -> pd.DataFrame:
    """u-chart of events per unit of exposure over periods (one chart per ``by`` group).

    Parameters
    ----------
    frame : polars or pandas DataFrame
        Rows with a period, an event count and exposure (e.g. person-years, ECGs read);
        summed per group and period.
    period, events, exposure : str
        Column names.
    by : str or list of str, optional
        One chart per group (e.g. per site), each with its own centre line.
    centre : float, optional
        Fixed centre line (unscaled, e.g. from a baseline phase); default the pooled
        rate of the chart's own periods.
    sigma : float
        Width of the limits in standard deviations (3 by convention).
    per : float
        Multiplier for estimate, centre and limits.

    Returns
    -------
    pandas.DataFrame
        The ``by`` columns, then :data:`U_CHART_COLUMNS`; flag is "above", "below" or
        "within" (on a limit counts as within).
    """
    keys = as_key_list(by)
    pf = as_polars(frame)
    require_columns(pf, [period, events, exposure, *keys])
    sums = grouped_sums(
        pf,
        [*keys, period],
        [
            pl.col(events).cast(pl.Float64).sum().alias("__events"),
            pl.col(exposure).cast(pl.Float64).sum().alias("__exposure"),
        ],
    )
    parts = []
    for key, part in sorted_partitions(sums, keys):
        parts.append(_u_chart_part(key, keys, part, period, centre, sigma, per))
    return pd.concat(parts, ignore_index=True)


def _u_chart_part(
    key: tuple,
    keys: list[str],
    part: pl.DataFrame,
    period: str,
    centre: float | None,
    sigma: float,
    per: float,
) -> pd.DataFrame:
    part = part.sort(period)
    c = validate_counts(part["__events"].to_numpy(), "events")
    n = validate_person_time(part["__exposure"].to_numpy(), "exposure")
    u_bar = float(c.sum() / n.sum()) if centre is None else float(centre)
    lower, upper = u_chart_limits(n, u_bar, sigma)
    u = c / n
    flag = np.where(u > upper, "above", np.where(u < lower, "below", "within"))
    columns: dict[str, Any] = {k: [v] * part.height for k, v in zip(keys, key, strict=True)}
    columns.update(
        period=part[period].to_list(),
        events=c.astype(np.int64),
        exposure=n,
        estimate=u * per,
        centre=u_bar * per,
        lower=lower * per,
        upper=upper * per,
        flag=flag,
        per=float(per),
        sigma=float(sigma),
    )
    return pd.DataFrame(columns)
