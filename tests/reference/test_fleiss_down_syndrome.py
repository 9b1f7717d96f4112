"""Direct standardization against the Fleiss (1981) Down syndrome example (Fay & Feuer 1997).

Data: data/fleiss_down_syndrome.csv, from Fleiss JL (1981) Statistical Methods for Rates and
Proportions, 2nd ed., p. 249; Table 1 of Fay MP & Feuer EJ (1997) Stat Med 16:791-801 (see
data/fleiss_down_syndrome.source.md). Standard: mean live births of the five birth-order
columns per maternal-age band. Expected values per 100,000 as reproduced with R epitools
ageadjust.direct (quoted in the project's reference notes, level S).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from cohort.stats.standardize import (
    StandardPopulation,
    direct_standardize,
    load_standard_population,
    map_age_bands,
    standardized_table,
)

DATA = Path(__file__).parent / "data" / "fleiss_down_syndrome.csv"
# birth order: crude, adjusted, lower, upper (per 100,000; epitools ageadjust.direct).
EPITOOLS = {
    "1": (56.3, 92.3, 80.4, 105.8),
    "2": (67.6, 91.2, 82.4, 100.9),
    "3": (83.3, 85.1, 77.2, 94.2),
    "4": (115.5, 92.7, 80.0, 114.7),
    "5+": (167.1, 75.5, 67.7, 188.3),
}


@pytest.fixture(scope="module")
def births() -> pd.DataFrame:
    return pd.read_csv(DATA, dtype={"birth_order": str})


@pytest.fixture(scope="module")
def mean_standard(births: pd.DataFrame) -> StandardPopulation:
    mean = births.groupby("maternal_age", sort=False)["live_births"].mean()
    return StandardPopulation.from_weights("fleiss_mean", list(mean.index), list(mean))


def test_adjusted_rates_and_gamma_limits_match_epitools(
    births: pd.DataFrame, mean_standard: StandardPopulation
) -> None:
    out = standardized_table(births, age_band="maternal_age", events="down_syndrome_cases",
                             population="live_births", by="birth_order",
                             standard=mean_standard, per=1e5).set_index("birth_order")
    for order, (crude, adjusted, lower, upper) in EPITOOLS.items():
        row = out.loc[order]
        # Source: Fay & Feuer (1997) gamma interval via epitools, 1 decimal as quoted.
        got = tuple(round(float(row[c]), 1) for c in ("crude", "estimate", "lower", "upper"))
        assert got == (crude, adjusted, lower, upper), order


def _chi2_gamma_limits(x: np.ndarray, n: np.ndarray, std: np.ndarray) -> tuple[float, float]:
    # Independent scipy computation of Fay & Feuer (1997) eq. for the gamma limits, using the
    # identity Gamma^-1(q; shape a, scale b) = b * chi2^-1(q; 2a) / 2 (no scipy.stats.gamma).
    w = std / (n * std.sum())
    y, v, wm = np.sum(w * x), np.sum(w**2 * x), w.max()
    lower = (v / y) * stats.chi2.ppf(0.025, 2 * y * y / v) / 2
    a_up, b_up = (y + wm) ** 2 / (v + wm**2), (v + wm**2) / (y + wm)
    return float(lower), float(b_up * stats.chi2.ppf(0.975, 2 * a_up) / 2)


def test_gamma_limits_match_an_independent_scipy_computation(births: pd.DataFrame) -> None:
    std = births.groupby("maternal_age", sort=False)["live_births"].mean().to_numpy()
    for _, part in births.groupby("birth_order"):
        x, n = part["down_syndrome_cases"].to_numpy(), part["live_births"].to_numpy(float)
        res = direct_standardize(x, n, std)
        assert (res.lower, res.upper) == pytest.approx(_chi2_gamma_limits(x, n, std), rel=1e-9)


def test_fleiss_bands_on_the_who_standard(births: pd.DataFrame) -> None:
    # "Under 20" holds WHO bands 0-4 ... 15-19 and "40 and over" the bands from 40 on
    # (Ahmad et al. 2001 percents, renormalized).
    who = load_standard_population("who_2000_2025")
    mapping = map_age_bands(births["maternal_age"].unique(), who)
    assert mapping.weights[0] == pytest.approx(who.weights[:4].sum())
    assert mapping.weights[-1] == pytest.approx(who.weights[8:].sum())
    assert mapping.weights[0] == pytest.approx((8.86 + 8.69 + 8.60 + 8.47) / 100.035)
