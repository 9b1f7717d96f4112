"""Exact Poisson limits (Garwood 1936) and rate comparisons against statsmodels / scipy."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats import rates as sm_rates

from cohort.stats.rates import exact_poisson_limits, poisson_rates, rate_difference, rate_ratio

# Garwood F (1936) Biometrika 28:437-442, exact 95% limits for a Poisson count k, as tabulated
# by Ulm K (1990) Am J Epidemiol 131:373-375 (values as quoted in the project's reference notes).
GARWOOD = [(0, 0.0, 3.6889), (1, 0.0253, 5.5716), (5, 1.6235, 11.6683), (10, 4.7954, 18.3904)]


@pytest.mark.parametrize(("k", "lower", "upper"), GARWOOD)
def test_garwood_table(k: int, lower: float, upper: float) -> None:
    # Source: Garwood (1936) / Ulm (1990) table, 4 decimals.
    lo, up = exact_poisson_limits([k])
    assert (round(float(lo[0]), 4), round(float(up[0]), 4)) == (lower, upper)


def test_rates_match_statsmodels_exact_c() -> None:
    # Oracle: statsmodels.stats.rates.confint_poisson(method="exact-c") (central exact).
    events = np.array([0, 1, 4, 17, 250])
    time = np.array([12.5, 300.0, 80.0, 1000.0, 5e4])
    lo, up = sm_rates.confint_poisson(events, time, method="exact-c", alpha=0.05)
    res = poisson_rates(events, time, per=1.0)
    np.testing.assert_allclose(res.lower, np.nan_to_num(lo, nan=0.0), rtol=1e-10, atol=1e-15)
    np.testing.assert_allclose(res.upper, up, rtol=1e-10)


CASES = [(30, 1000.0, 12, 1500.0), (3, 50.0, 9, 400.0), (1, 10.0, 1, 10.0),
         (120, 2e4, 80, 3e4)]


@pytest.mark.parametrize(("e1", "t1", "e0", "t0"), CASES)
def test_exact_rate_ratio_against_scipy_and_statsmodels(
    e1: int, t1: float, e0: int, t0: float
) -> None:
    res = rate_ratio(e1, t1, e0, t0, method="exact")
    # Independent scipy computation: Clopper-Pearson limits of e1 out of e1 + e0 from
    # scipy.stats.binomtest(...).proportion_ci("exact"), mapped to RR = pi/(1-pi) * t0/t1.
    ci = stats.binomtest(e1, e1 + e0).proportion_ci(0.95, method="exact")
    odds = np.array([ci.low, ci.high]) / (1 - np.array([ci.low, ci.high]))
    assert (res.lower, res.upper) == pytest.approx(tuple(odds * t0 / t1), rel=1e-9)
    # Oracle for the p-value: statsmodels test_poisson_2indep(method="exact-cond").
    assert res.p == pytest.approx(
        sm_rates.test_poisson_2indep(e1, t1, e0, t0, method="exact-cond").pvalue, rel=1e-9)


@pytest.mark.parametrize(("e1", "t1", "e0", "t0"), CASES)
def test_wald_rate_ratio_and_difference_against_statsmodels(
    e1: int, t1: float, e0: int, t0: float
) -> None:
    # Oracle: statsmodels confint_poisson_2indep(method="wald-log") for the ratio and
    # (compare="diff", method="wald") for the difference.
    wald = rate_ratio(e1, t1, e0, t0, method="wald")
    lo, up = sm_rates.confint_poisson_2indep(e1, t1, e0, t0, method="wald-log", compare="ratio")
    assert (wald.lower, wald.upper) == pytest.approx((lo, up), rel=1e-10)
    diff = rate_difference(e1, t1, e0, t0, per=1.0)
    lo, up = sm_rates.confint_poisson_2indep(e1, t1, e0, t0, method="wald", compare="diff")
    assert (diff.lower, diff.upper) == pytest.approx((lo, up), rel=1e-10)
