"""Tests for cohort.stats.trend: simulated known trends and a direct statsmodels oracle."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import polars as pl
import pytest
import statsmodels.api as sm

from cohort.errors import DataError
from cohort.stats.trend import TREND_COLUMNS, proportion_trend, trend_table

YEARS = np.arange(2008, 2023)


def _simulate(seed: int, apc: float, n_per_year: int = 20_000, base: float = 0.015):
    rng = np.random.default_rng(seed)
    p = base * (1 + apc / 100.0) ** (YEARS - YEARS[0])
    n = np.full(YEARS.size, n_per_year)
    return n, rng.binomial(n, p)


def _person_level(x: np.ndarray, n: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    year = np.repeat(YEARS, n).astype(float)
    outcome = np.concatenate([np.r_[np.ones(k), np.zeros(m - k)] for k, m in zip(x, n,
                                                                               strict=True)])
    return year, outcome


@pytest.mark.parametrize("method", ["poisson", "log_binomial"])
def test_recovers_a_known_trend(method: str) -> None:
    n, x = _simulate(seed=11, apc=5.0)
    res = proportion_trend(YEARS, x, n, method=method)  # type: ignore[arg-type]
    assert res.lower < 5.0 < res.upper
    assert res.apc == pytest.approx(5.0, abs=1.0)
    assert res.p < 1e-10
    assert (res.n_years, res.first_year, res.last_year) == (15, 2008.0, 2022.0)
    assert res.events == x.sum() and res.n == n.sum()


def test_flat_trend_interval_holds_zero() -> None:
    n, x = _simulate(seed=12, apc=0.0)
    res = proportion_trend(YEARS, x, n)
    assert res.lower < 0.0 < res.upper


def test_poisson_agrees_with_person_level_statsmodels_glm() -> None:
    # Oracle: statsmodels GLM, Poisson family, HC0 sandwich, fitted on one row per person
    # (Zou 2004 modified Poisson); our two-rows-per-year fit must give the same slope and SE.
    n, x = _simulate(seed=13, apc=3.0, n_per_year=2000)
    year, outcome = _person_level(x, n)
    exog = sm.add_constant(year - YEARS.mean())
    oracle = sm.GLM(outcome, exog, family=sm.families.Poisson()).fit(cov_type="HC0")
    res = proportion_trend(YEARS, x, n, method="poisson")
    assert res.slope == pytest.approx(oracle.params[1], rel=1e-7)
    assert res.se == pytest.approx(oracle.bse[1], rel=1e-7)
    assert res.p == pytest.approx(oracle.pvalues[1], rel=1e-5)
    lo, up = oracle.conf_int()[1]
    assert res.lower == pytest.approx(100 * np.expm1(lo), rel=1e-6)
    assert res.upper == pytest.approx(100 * np.expm1(up), rel=1e-6)


def test_log_binomial_agrees_with_person_level_statsmodels_glm() -> None:
    # Oracle: statsmodels binomial GLM with log link on person-level 0/1 outcomes.
    n, x = _simulate(seed=14, apc=-4.0, n_per_year=2000, base=0.05)
    year, outcome = _person_level(x, n)
    family = sm.families.Binomial(link=sm.families.links.Log())
    exog = sm.add_constant(year - YEARS.mean())
    with pytest.warns(sm.tools.sm_exceptions.DomainWarning):
        oracle = sm.GLM(outcome, exog, family=family).fit()
    res = proportion_trend(YEARS, x, n, method="log_binomial")
    assert res.slope == pytest.approx(oracle.params[1], rel=1e-5)
    assert res.se == pytest.approx(oracle.bse[1], rel=1e-4)


def test_repeated_and_unsorted_years_are_summed() -> None:
    n, x = _simulate(seed=15, apc=2.0, n_per_year=1000)
    whole = proportion_trend(YEARS, x, n)
    half_x, half_n = x // 2, n // 2
    rev = slice(None, None, -1)
    split = proportion_trend(np.r_[YEARS, YEARS][rev], np.r_[half_x, x - half_x][rev],
                             np.r_[half_n, n - half_n][rev])
    assert split.slope == pytest.approx(whole.slope, rel=1e-9)
    assert split.se == pytest.approx(whole.se, rel=1e-9)


@pytest.mark.parametrize(
    ("years", "x", "n", "message"),
    [
        ([2010, 2010], [1, 2], [10, 10], "at least 2 calendar years"),
        ([2010, 2011], [0, 0], [10, 10], "no events"),
        ([2010, 2011], [11, 2], [10, 10], "exceed their denominator"),
        ([2010, np.nan], [1, 2], [10, 10], "years are missing"),
        ([2010, 2011, 2012], [1, 2], [10, 10], "one year per count"),
    ],
)
def test_invalid_inputs(years: list, x: list, n: list, message: str) -> None:
    with pytest.raises(DataError, match=message):
        proportion_trend(years, x, n)


def test_unknown_method() -> None:
    with pytest.raises(DataError, match="unknown trend method"):
        proportion_trend([1, 2], [1, 1], [5, 5], method="joinpoint")  # type: ignore[arg-type]


def test_trend_table_by_group_and_date_years() -> None:
    n, x = _simulate(seed=16, apc=6.0, n_per_year=1500)
    year, outcome = _person_level(x, n)
    rng = np.random.default_rng(17)
    site = rng.choice(["north", "south"], year.size)
    pf = pl.DataFrame({"year": year.astype(int), "block": outcome.astype(int), "site": site})
    out = trend_table(pf, year="year", outcome="block", by="site")
    assert list(out.columns) == ["site", *TREND_COLUMNS]
    assert out["site"].tolist() == ["north", "south"]
    assert set(out["term"]) == {"annual_percent_change"}
    north = site == "north"
    counts = pd.DataFrame({"y": year[north], "o": outcome[north]}).groupby("y")["o"].agg(
        ["sum", "count"])
    direct = proportion_trend(counts.index, counts["sum"], counts["count"])
    assert out.loc[0, "estimate"] == pytest.approx(direct.apc)
    # A date column is read by its calendar year.
    dated = pf.with_columns(
        pl.col("year").map_elements(lambda y: dt.date(y, 6, 30), return_dtype=pl.Date))
    pd.testing.assert_frame_equal(trend_table(dated, year="year", outcome="block", by="site"),
                                  out)


@pytest.mark.slow
def test_interval_coverage_on_many_seeds() -> None:
    # 400 simulated registries with a true APC of 4%: the 95% interval should cover it in
    # about 95% of them (binomial sd ~1.1 points; accept 91-99%).
    hits = 0
    for seed in range(400):
        n, x = _simulate(seed=1000 + seed, apc=4.0, n_per_year=3000)
        res = proportion_trend(YEARS, x, n)
        hits += res.lower < 4.0 < res.upper
    assert 0.91 <= hits / 400 <= 0.99


def test_constant_certain_proportion_is_a_clear_error():
    # A proportion of 1 in every year carries no trend information (zero standard error).
    import warnings

    from cohort.errors import DataError

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with pytest.raises(DataError, match="no trend can be estimated"):
            proportion_trend([2010, 2011, 2012], [10, 10, 10], [10, 10, 10])
