"""Funnel limits against Spiegelhalter (2005) formulas with scipy quantiles as the oracle.

Spiegelhalter DJ (2005) "Funnel plots for comparing institutional performance", Stat Med
24:1185-1202, appendix: with r_p the smallest r such that P(R <= r) >= p, the exact limit is
(r_p - alpha) / n where alpha = (P(R <= r_p) - p) / (P(R <= r_p) - P(R <= r_p - 1)).
Here the quantile r_p is found by accumulating scipy pmf values, independently of the
module's use of ppf.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from cohort.stats.quality import binomial_funnel_limits, poisson_funnel_limits


def _by_hand(pmf: np.ndarray, p: float, precision: float) -> float:
    cdf = np.cumsum(pmf)
    r = int(np.argmax(cdf >= p - 1e-12))
    below = cdf[r - 1] if r > 0 else 0.0
    return (r - (cdf[r] - p) / (cdf[r] - below)) / precision


@pytest.mark.parametrize(("n", "theta"), [(50, 0.1), (200, 0.05), (1000, 0.02), (37, 0.4)])
@pytest.mark.parametrize("coverage", [0.95, 0.998])
def test_binomial_exact_limits(n: int, theta: float, coverage: float) -> None:
    pmf = stats.binom.pmf(np.arange(n + 1), n, theta)
    lo_p, up_p = (1 - coverage) / 2, (1 + coverage) / 2
    lim = binomial_funnel_limits([n], theta, coverage, "exact")
    assert lim.lower[0] == pytest.approx(max(_by_hand(pmf, lo_p, n), 0.0), abs=1e-10)
    assert lim.upper[0] == pytest.approx(_by_hand(pmf, up_p, n), abs=1e-10)
    # The discrete quantile r_p behind the limit is scipy's binomial quantile (0 <= alpha < 1).
    assert np.ceil(lim.upper[0] * n - 1e-9) == stats.binom.ppf(up_p, n, theta)


@pytest.mark.parametrize(("person_time", "rate"), [(100.0, 0.05), (2500.0, 0.004),
                                                   (40.0, 0.3)])
@pytest.mark.parametrize("coverage", [0.95, 0.998])
def test_poisson_exact_limits(person_time: float, rate: float, coverage: float) -> None:
    mean = rate * person_time
    pmf = stats.poisson.pmf(np.arange(int(mean * 10 + 50)), mean)
    lo_p, up_p = (1 - coverage) / 2, (1 + coverage) / 2
    lim = poisson_funnel_limits([person_time], rate, coverage, "exact")
    assert lim.lower[0] == pytest.approx(max(_by_hand(pmf, lo_p, person_time), 0.0), abs=1e-10)
    assert lim.upper[0] == pytest.approx(_by_hand(pmf, up_p, person_time), abs=1e-10)


def test_coverage_of_two_and_three_sigma() -> None:
    # Spiegelhalter (2005): 95% and 99.8% limits correspond to about 2 and 3 standard
    # deviations; normal limits use z = 1.96 and 3.09.
    lim = binomial_funnel_limits([10_000], 0.1, 0.998, "normal")
    sd = np.sqrt(0.1 * 0.9 / 10_000)
    assert (lim.upper[0] - 0.1) / sd == pytest.approx(3.09, abs=0.001)
