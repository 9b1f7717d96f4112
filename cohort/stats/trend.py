"""Trend of a proportion across calendar years, as an annual percent change (APC).

The model is log P(outcome | year) = a + b * year, fitted with statsmodels GLM on counts
x_t of n_t persons per year t:

- ``"poisson"``: modified Poisson regression with robust (HC0 sandwich) variance (Zou G (2004)
  Am J Epidemiol 159:702-706). The fit uses two rows per year (outcome 1 with frequency
  weight x_t, outcome 0 with weight n_t - x_t), which gives the same estimate and the same
  person-level sandwich variance as a fit on one row per person, at the cost of a few rows.
- ``"log_binomial"``: binomial GLM with log link (model-based variance), started from the
  Poisson solution; it can fail when fitted proportions approach 1, and then raises.

APC = 100 * (exp(b) - 1) with limits 100 * (exp(b -/+ z se) - 1); the p for trend is the
Wald test of b = 0. Years are centred before fitting (numerically safer; b is unchanged).
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import pandas as pd
import polars as pl
import statsmodels.api as sm
from scipy import stats
from statsmodels.tools.sm_exceptions import ConvergenceWarning, DomainWarning

from cohort.errors import DataError
from cohort.stats.proportions import (
    as_key_list,
    as_polars,
    check_alpha,
    check_binary_column,
    check_choice,
    require_columns,
    sorted_partitions,
    validate_binomial,
)

TrendMethod = Literal["poisson", "log_binomial"]
TREND_METHODS: tuple[str, ...] = ("poisson", "log_binomial")

#: Columns of :func:`trend_table`, after the ``by`` key columns.
TREND_COLUMNS: tuple[str, ...] = (
    "term",
    "estimate",
    "lower",
    "upper",
    "slope",
    "se",
    "p",
    "events",
    "n",
    "first_year",
    "last_year",
    "n_years",
    "method",
    "alpha",
)


@dataclass(frozen=True)
class TrendEstimate:
    """Annual percent change of a proportion, with the log-scale slope behind it."""

    apc: float
    lower: float
    upper: float
    slope: float
    se: float
    p: float
    events: float
    n: float
    first_year: float
    last_year: float
    n_years: int
    method: str
    alpha: float


def _per_year(years: Any, x: Any, n: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Sum counts per distinct year, dropping years with no persons."""
    xa, na = validate_binomial(x, n)
    ya = np.atleast_1d(np.asarray(years, dtype=float))
    if ya.shape != xa.shape:
        raise DataError(f"{ya.size} years for {xa.size} counts; give one year per count.")
    if not np.all(np.isfinite(ya)):
        raise DataError(
            f"{int((~np.isfinite(ya)).sum())} of {ya.size} years are missing; drop those rows."
        )
    uniq, inv = np.unique(ya, return_inverse=True)
    xs, ns = np.bincount(inv, weights=xa), np.bincount(inv, weights=na)
    keep = ns > 0
    uniq, xs, ns = uniq[keep], xs[keep], ns[keep]
    if uniq.size < 2:
        raise DataError(
            f"a trend needs persons in at least 2 calendar years, got {uniq.size}; "
            "widen the calendar window."
        )
    if xs.sum() == 0:
        raise DataError("no events in any year: the trend of a zero proportion is undefined.")
    return uniq, xs, ns


def _fit_poisson(t: np.ndarray, x: np.ndarray, n: np.ndarray) -> tuple[float, float]:
    y = np.r_[np.ones_like(t), np.zeros_like(t)]
    w = np.r_[x, n - x]
    keep = w > 0
    exog = sm.add_constant(np.r_[t, t][keep], has_constant="add")
    fit = sm.GLM(y[keep], exog, family=sm.families.Poisson(), freq_weights=w[keep]).fit(
        cov_type="HC0"
    )
    return _checked(fit, "poisson")


def _fit_log_binomial(t: np.ndarray, x: np.ndarray, n: np.ndarray) -> tuple[float, float]:
    exog = sm.add_constant(t, has_constant="add")
    start = sm.GLM(x, exog, family=sm.families.Poisson(), offset=np.log(n)).fit().params
    family = sm.families.Binomial(link=sm.families.links.Log())
    with warnings.catch_warnings():
        # The log link is not a canonical binomial link; statsmodels warns about the domain.
        warnings.simplefilter("ignore", DomainWarning)
        warnings.simplefilter("ignore", ConvergenceWarning)  # reported through _checked
        fit = sm.GLM(np.c_[x, n - x], exog, family=family).fit(start_params=start)
    if np.any(fit.fittedvalues >= 1.0):
        raise DataError(
            "log-binomial fit reached fitted proportions of 1; use method='poisson' "
            "(modified Poisson with robust variance) instead."
        )
    return _checked(fit, "log_binomial")


def _checked(fit: Any, method: str) -> tuple[float, float]:
    slope, se = float(fit.params[1]), float(fit.bse[1])
    if not fit.converged or not np.isfinite(slope) or not np.isfinite(se):
        raise DataError(
            f"the {method} trend model did not converge (events in too few years?); "
            "merge sparse years or report the yearly proportions without a trend."
        )
    return slope, se


def proportion_trend(
    years: Any,
    x: Any,
    n: Any,
    method: TrendMethod = "poisson",
    alpha: float = 0.05,
) -> TrendEstimate:
    """Annual percent change of the proportion x/n across calendar years.

    Parameters
    ----------
    years : array-like of float
        Calendar year of each count pair (repeats are summed).
    x, n : array-like of whole numbers
        Persons with the outcome and persons observed in that year.
    method : {"poisson", "log_binomial"}
        See the module docstring.
    alpha : float
        Two-sided level of the APC limits.
    """
    alpha = check_alpha(alpha)
    check_choice(method, TREND_METHODS, "trend method")
    yr, xs, ns = _per_year(years, x, n)
    t = yr - yr.mean()
    fit = _fit_poisson if method == "poisson" else _fit_log_binomial
    slope, se = fit(t, xs, ns)
    if not np.isfinite(se) or se <= 0:
        raise DataError(
            "proportion_trend: the trend's standard error is zero or undefined (the proportion is "
            "0 or 1 in every year, or the years carry no information); no trend can be estimated"
        )
    z = float(stats.norm.ppf(1.0 - alpha / 2.0))
    return TrendEstimate(
        apc=100.0 * float(np.expm1(slope)),
        lower=100.0 * float(np.expm1(slope - z * se)),
        upper=100.0 * float(np.expm1(slope + z * se)),
        slope=slope,
        se=se,
        p=float(2.0 * stats.norm.sf(abs(slope / se))),
        events=float(xs.sum()),
        n=float(ns.sum()),
        first_year=float(yr[0]),
        last_year=float(yr[-1]),
        n_years=int(yr.size),
        method=method,
        alpha=alpha,
    )


def trend_table(
    frame: pl.DataFrame | pd.DataFrame,
    *,
    year: str,
    outcome: str,
    by: str | Sequence[str] | None = None,
    method: TrendMethod = "poisson",
    alpha: float = 0.05,
) -> pd.DataFrame:
    """Annual percent change of a proportion per group, from one row per person(-year).

    Parameters
    ----------
    frame : polars or pandas DataFrame
        Rows with a calendar year (number, or a date whose year is taken) and a 0/1 outcome;
        rows with a missing outcome are left out.
    year, outcome : str
        Column names.
    by : str or list of str, optional
        Grouping columns; one trend per group.
    method, alpha
        As in :func:`proportion_trend`.

    Returns
    -------
    pandas.DataFrame
        The ``by`` columns, then :data:`TREND_COLUMNS` with term = "annual_percent_change";
        estimate, lower and upper are the APC in percent per year.
    """
    keys = as_key_list(by)
    pf = as_polars(frame)
    require_columns(pf, [year, outcome, *keys])
    check_binary_column(pf, outcome)
    yr = pl.col(year)
    if pf.schema[year] in (pl.Date, pl.Datetime):
        yr = yr.dt.year()
    counts = (
        pf.filter(pl.col(outcome).is_not_null())
        .with_columns(yr.cast(pl.Float64).alias("__year"))
        .group_by([*keys, "__year"])
        .agg(
            pl.col(outcome).cast(pl.Float64).sum().alias("x"),
            pl.len().cast(pl.Float64).alias("n"),
        )
    )
    rows = []
    for key, part in sorted_partitions(counts, keys):
        res = proportion_trend(part["__year"].to_numpy(), part["x"].to_numpy(),
                               part["n"].to_numpy(), method=method, alpha=alpha)
        rows.append((*key, "annual_percent_change", res.apc, res.lower, res.upper, res.slope,
                     res.se, res.p, int(res.events), int(res.n), res.first_year,
                     res.last_year, res.n_years, res.method, res.alpha))
    return pd.DataFrame(rows, columns=[*keys, *TREND_COLUMNS])
