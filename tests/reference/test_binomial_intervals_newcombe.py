"""Binomial intervals against Newcombe (1998) Table I and statsmodels as an oracle."""

from __future__ import annotations

import numpy as np
import pytest
from statsmodels.stats.proportion import proportion_confint

from cohort.stats.proportions import proportion_interval, proportion_intervals

# Newcombe RG (1998) "Two-sided confidence intervals for the single proportion: comparison of
# seven methods", Stat Med 17:857-872, Table I, 95% limits (as quoted in the project's
# reference notes): x, n, Wilson (method 3), Wilson with continuity correction (method 4),
# Clopper-Pearson (method 5).
NEWCOMBE_TABLE_I = [
    (81, 263, (0.2553, 0.3662), (0.2535, 0.3682), (0.2527, 0.3676)),
    (15, 148, (0.0624, 0.1605), (0.0598, 0.1644), (0.0578, 0.1617)),
    (0, 20, (0.0, 0.1611), (0.0, 0.2005), (0.0, 0.1684)),
    (1, 29, (0.0061, 0.1718), (0.0018, 0.1963), (0.0009, 0.1776)),
]


@pytest.mark.parametrize(("x", "n", "wilson", "wilson_cc", "exact"), NEWCOMBE_TABLE_I)
def test_newcombe_table_i(x: int, n: int, wilson: tuple, wilson_cc: tuple, exact: tuple) -> None:
    # Source: Newcombe (1998) Stat Med 17:857, Table I; printed to 4 decimals.
    for method, expected in (("wilson", wilson), ("wilson_cc", wilson_cc),
                             ("clopper_pearson", exact)):
        res = proportion_interval(x, n, method=method)
        assert (round(res.lower, 4), round(res.upper, 4)) == expected, method


GRID_X = np.array([0, 1, 2, 5, 17, 50, 99, 100, 3, 0, 250, 999])
GRID_N = np.array([1, 1, 10, 10, 40, 100, 100, 100, 7, 1000, 1000, 1000])


@pytest.mark.parametrize("alpha", [0.05, 0.01, 0.2])
def test_wilson_matches_statsmodels(alpha: float) -> None:
    # Oracle: statsmodels.stats.proportion.proportion_confint(method="wilson").
    lo, up = proportion_confint(GRID_X, GRID_N, alpha=alpha, method="wilson")
    res = proportion_intervals(GRID_X, GRID_N, alpha=alpha, method="wilson")
    np.testing.assert_allclose(res.lower, lo, atol=1e-12)
    np.testing.assert_allclose(res.upper, up, atol=1e-12)


@pytest.mark.parametrize("alpha", [0.05, 0.01, 0.2])
def test_clopper_pearson_matches_statsmodels(alpha: float) -> None:
    # Oracle: statsmodels proportion_confint(method="beta") (Clopper-Pearson, central).
    lo, up = proportion_confint(GRID_X, GRID_N, alpha=alpha, method="beta")
    res = proportion_intervals(GRID_X, GRID_N, alpha=alpha, method="clopper_pearson")
    np.testing.assert_allclose(res.lower, np.nan_to_num(lo, nan=0.0), atol=1e-12)
    np.testing.assert_allclose(res.upper, np.nan_to_num(up, nan=1.0), atol=1e-12)
