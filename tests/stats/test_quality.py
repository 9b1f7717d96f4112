"""Unit tests for cohort.stats.quality (Spiegelhalter formulas checked in tests/reference)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from cohort.errors import DataError
from cohort.stats.quality import (
    FLAGS,
    FUNNEL_COLUMNS,
    U_CHART_COLUMNS,
    binomial_funnel_limits,
    funnel_curve,
    funnel_limits,
    funnel_table,
    poisson_funnel_limits,
    u_chart,
    u_chart_limits,
)


@pytest.fixture
def sites() -> pd.DataFrame:
    # Fictional network: ECGs with first-degree AV block per site (two rows for site D).
    return pd.DataFrame(
        {
            "site": ["Alder", "Birch", "Cedar", "Dogwood", "Dogwood", "Elm"],
            "cases": [5, 30, 12, 40, 40, 2],
            "ecgs": [100, 300, 400, 500, 500, 150],
        }
    )


@pytest.mark.parametrize("kind", ["proportion", "rate"])
@pytest.mark.parametrize("method", ["exact", "normal"])
def test_limits_surround_target_and_narrow_with_precision(kind: str, method: str) -> None:
    precision = np.array([50, 200, 1000, 10_000])
    inner = funnel_limits(precision, 0.08, kind, 0.95, method)  # type: ignore[arg-type]
    outer = funnel_limits(precision, 0.08, kind, 0.998, method)  # type: ignore[arg-type]
    assert np.all(inner.lower <= 0.08) and np.all(inner.upper >= 0.08)
    assert np.all(outer.lower <= inner.lower) and np.all(outer.upper >= inner.upper)
    assert np.all(np.diff(inner.upper - inner.lower) < 0)


def test_normal_limits_are_the_textbook_formula() -> None:
    # target +/- z sqrt(target (1 - target) / n) and target +/- z sqrt(target / T)
    # (Spiegelhalter 2005, section 3; z = 1.959964 and 3.090232).
    n = np.array([100.0, 400.0])
    b = binomial_funnel_limits(n, 0.1, 0.998, "normal")
    assert b.upper == pytest.approx(0.1 + 3.090232306 * np.sqrt(0.09 / n))
    p = poisson_funnel_limits(n, 0.1, 0.95, "normal")
    assert p.lower == pytest.approx(0.1 - 1.959963985 * np.sqrt(0.1 / n))


def test_exact_limits_approach_normal_for_large_n() -> None:
    # Fact of the trade (common practice, no source): binomial -> normal as n grows.
    n = np.array([2_000_000.0])
    exact = binomial_funnel_limits(n, 0.05, 0.95, "exact")
    normal = binomial_funnel_limits(n, 0.05, 0.95, "normal")
    assert exact.upper == pytest.approx(normal.upper, rel=1e-4)
    assert exact.lower == pytest.approx(normal.lower, rel=1e-4)


def test_limits_are_clipped() -> None:
    b = binomial_funnel_limits([3], 0.02, 0.998)
    assert b.lower[0] == 0.0 and b.upper[0] <= 1.0
    assert poisson_funnel_limits([1.0], 0.01, 0.998).lower[0] == 0.0


@pytest.mark.parametrize(
    ("call", "message"),
    [
        (lambda: binomial_funnel_limits([10], 0.0), "strictly between 0 and 1"),
        (lambda: poisson_funnel_limits([10.0], 0.0), "target rate must be > 0"),
        (lambda: binomial_funnel_limits([10, 0], 0.1), "1 of 2 values of n are zero"),
        (lambda: binomial_funnel_limits([10], 0.1, coverage=95), "coverage"),
        (lambda: funnel_limits([10], 0.1, kind="ratio"), "unknown funnel kind"),
    ],
)
def test_funnel_errors(call, message: str) -> None:
    with pytest.raises(DataError, match=message):
        call()


@settings(max_examples=100, deadline=None)
@given(st.integers(1, 50_000), st.floats(0.001, 0.999))
def test_exact_binomial_limits_stay_in_unit_interval(n: int, target: float) -> None:
    lim = binomial_funnel_limits([n], target, 0.998)
    assert 0.0 <= lim.lower[0] <= lim.upper[0] <= 1.0
    # With almost no expected events the interpolated quantiles of a count piled up at 0
    # collapse to 0; from one expected event (and non-event) on, the target lies inside.
    if n * min(target, 1 - target) >= 1:
        assert lim.lower[0] <= target <= lim.upper[0]


def test_funnel_table_flags_and_pooled_target(sites: pd.DataFrame) -> None:
    out = funnel_table(sites, unit="site", events="cases", denominator="ecgs", per=100.0)
    assert list(out.columns) == list(FUNNEL_COLUMNS)
    assert out["unit"].tolist() == ["Alder", "Birch", "Cedar", "Dogwood", "Elm"]
    assert out.loc[3, "denominator"] == 1000.0 and out.loc[3, "events"] == 80
    assert out["target"].iloc[0] == pytest.approx(100 * 129 / 1950)
    assert set(out["flag"]) <= set(FLAGS)
    for row in out.itertuples():
        if row.flag == "within":
            assert row.lower_95 <= row.estimate <= row.upper_95
        elif row.flag == "above_95":
            assert row.upper_95 < row.estimate <= row.upper_998
        elif row.flag == "below_95":
            assert row.lower_998 <= row.estimate < row.lower_95
    assert out.set_index("unit").loc["Birch", "flag"] == "above_95"


def test_funnel_table_alarm_and_fixed_target(sites: pd.DataFrame) -> None:
    out = funnel_table(pl.from_pandas(sites), unit="site", events="cases", denominator="ecgs",
                       target=0.02).set_index("unit")
    assert out.loc["Birch", "flag"] == "above_998"
    assert out["target"].iloc[0] == 0.02


def test_funnel_table_rate_kind(sites: pd.DataFrame) -> None:
    out = funnel_table(sites, unit="site", events="cases", denominator="ecgs", kind="rate",
                       per=1000.0)
    lim = poisson_funnel_limits(out["denominator"].to_numpy(), 129 / 1950, 0.95)
    assert out["upper_95"].to_numpy() == pytest.approx(lim.upper * 1000.0)


def test_funnel_table_rejects_more_events_than_persons(sites: pd.DataFrame) -> None:
    sites.loc[0, "cases"] = 500
    with pytest.raises(DataError, match="exceed their denominator"):
        funnel_table(sites, unit="site", events="cases", denominator="ecgs")


def test_funnel_curve_grid() -> None:
    curve = funnel_curve(0.05, 5000, points=50)
    assert list(curve.columns) == ["precision", "coverage", "lower", "upper"]
    assert set(curve["coverage"]) == {0.95, 0.998}
    assert curve["precision"].min() == 1.0 and curve["precision"].max() == 5000.0
    rates = funnel_curve(0.002, 1e5, kind="rate", per=1000.0, points=20)
    assert len(rates) == 40


# --------------------------------------------------------------------------- u-chart


def test_u_chart_limits_formula() -> None:
    # u-bar +/- 3 sqrt(u-bar / n_i), lower clipped at 0 (Montgomery, Introduction to
    # Statistical Quality Control, u chart; recalled from memory).
    lower, upper = u_chart_limits([4.0, 100.0], 0.5)
    assert upper == pytest.approx(0.5 + 3 * np.sqrt(0.5 / np.array([4.0, 100.0])))
    assert lower[0] == 0.0 and lower[1] == pytest.approx(0.5 - 3 * np.sqrt(0.005))


def test_u_chart_per_site() -> None:
    frame = pd.DataFrame(
        {
            "site": ["Alder"] * 4 + ["Birch"] * 4,
            "quarter": [1, 2, 3, 4] * 2,
            "blocks": [3, 5, 20, 4, 1, 2, 3, 2],
            "person_years": [100.0, 120.0, 110.0, 90.0, 50.0, 60.0, 70.0, 80.0],
        }
    )
    out = u_chart(frame, period="quarter", events="blocks", exposure="person_years", by="site",
                  per=100.0)
    assert list(out.columns) == ["site", *U_CHART_COLUMNS]
    alder = out[out.site == "Alder"]
    assert alder["centre"].iloc[0] == pytest.approx(100 * 32 / 420)
    assert alder["flag"].tolist() == ["within", "within", "above", "within"]
    assert out[out.site == "Birch"]["centre"].iloc[0] == pytest.approx(100 * 8 / 260)
    pooled = u_chart(pl.from_pandas(frame), period="quarter", events="blocks",
                     exposure="person_years", centre=0.02)
    assert list(pooled.columns) == list(U_CHART_COLUMNS)
    assert pooled["events"].tolist() == [4, 7, 23, 6]
    assert set(pooled["centre"]) == {0.02}


def test_u_chart_rejects_empty_periods() -> None:
    frame = pd.DataFrame({"q": [1, 2], "e": [1, 0], "t": [10.0, 0.0]})
    with pytest.raises(DataError, match="1 of 2 values of exposure"):
        u_chart(frame, period="q", events="e", exposure="t")
