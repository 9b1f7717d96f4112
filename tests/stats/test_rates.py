"""Unit and property tests for cohort.stats.rates (published values: tests/reference)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from cohort.errors import DataError
from cohort.stats.rates import (
    RATE_COLUMNS,
    RATIO_COLUMNS,
    exact_poisson_limits,
    incidence_table,
    poisson_rate,
    poisson_rates,
    rate_difference,
    rate_ratio,
    rate_ratio_table,
)

EVENTS = st.integers(min_value=0, max_value=5000)
TIME = st.floats(min_value=0.5, max_value=1e6)
ALPHAS = st.floats(min_value=0.001, max_value=0.5)


def test_rate_is_scaled_per_person_time() -> None:
    res = poisson_rate(12, 4000.0, per=1000.0)
    assert res.estimate == pytest.approx(3.0)
    lower, upper = exact_poisson_limits([12])
    assert res.lower == pytest.approx(lower[0] / 4.0)
    assert res.upper == pytest.approx(upper[0] / 4.0)
    assert (res.method, res.per, res.events, res.person_time) == ("exact_poisson", 1000.0,
                                                                  12.0, 4000.0)


def test_zero_events_give_only_an_upper_limit() -> None:
    res = poisson_rate(0, 250.0, per=1.0)
    assert res.estimate == 0.0 and res.lower == 0.0
    assert res.upper > 0.0


def test_array_matches_scalar() -> None:
    arr = poisson_rates([0, 3, 40], [10.0, 20.0, 30.0], per=100.0, alpha=0.1)
    for i, (e, t) in enumerate([(0, 10.0), (3, 20.0), (40, 30.0)]):
        one = poisson_rate(e, t, per=100.0, alpha=0.1)
        assert (arr.lower[i], arr.upper[i]) == pytest.approx((one.lower, one.upper))


@pytest.mark.parametrize(
    ("events", "time", "message"),
    [
        ([1, 2, 3], [10.0, 0.0, -1.0], "2 of 3 values of person_time are zero, negative"),
        ([-1], [10.0], "negative"),
        ([1, 2], [10.0], "one each per group"),
    ],
)
def test_invalid_inputs_raise_with_counts(events: list, time: list, message: str) -> None:
    with pytest.raises(DataError, match=message):
        poisson_rates(events, time)


# --------------------------------------------------------------------------- ratios


@pytest.mark.parametrize("method", ["exact", "wald"])
def test_rate_ratio_estimate_and_reciprocity(method: str) -> None:
    ab = rate_ratio(30, 1000.0, 12, 1500.0, method=method)
    ba = rate_ratio(12, 1500.0, 30, 1000.0, method=method)
    assert ab.estimate == pytest.approx((30 / 1000) / (12 / 1500))
    assert ab.lower < ab.estimate < ab.upper
    # Swapping the groups inverts the ratio and its limits, and keeps the p-value.
    assert (ab.lower, ab.upper) == pytest.approx((1 / ba.upper, 1 / ba.lower))
    assert ab.p == pytest.approx(ba.p)


def test_exact_ratio_handles_zero_counts() -> None:
    zero_exposed = rate_ratio(0, 100.0, 8, 100.0)
    assert zero_exposed.estimate == 0.0 and zero_exposed.lower == 0.0
    assert 0.0 < zero_exposed.upper < np.inf
    zero_reference = rate_ratio(8, 100.0, 0, 100.0)
    assert zero_reference.estimate == np.inf and zero_reference.upper == np.inf
    assert zero_reference.lower > 0.0


def test_ratio_errors() -> None:
    with pytest.raises(DataError, match="no events in either group"):
        rate_ratio(0, 10.0, 0, 10.0)
    with pytest.raises(DataError, match="method='exact'"):
        rate_ratio(0, 10.0, 3, 10.0, method="wald")
    with pytest.raises(DataError, match="unknown rate ratio method"):
        rate_ratio(1, 10.0, 3, 10.0, method="score")  # type: ignore[arg-type]
    with pytest.raises(DataError, match="person_time"):
        rate_ratio(1, 0.0, 3, 10.0)


def test_rate_difference() -> None:
    res = rate_difference(30, 1000.0, 12, 1500.0, per=1000.0)
    assert res.estimate == pytest.approx(30 - 8.0)
    se = np.sqrt(30 / 1000.0**2 + 12 / 1500.0**2) * 1000.0
    assert res.upper - res.lower == pytest.approx(2 * 1.959963984540054 * se)
    empty = rate_difference(0, 10.0, 0, 20.0)
    assert empty.estimate == 0.0 and np.isnan(empty.p)


# --------------------------------------------------------------------------- properties


@settings(max_examples=150, deadline=None)
@given(EVENTS, TIME, ALPHAS)
def test_rate_interval_contains_estimate(events: int, time: float, alpha: float) -> None:
    res = poisson_rate(events, time, per=1.0, alpha=alpha)
    assert 0.0 <= res.lower <= res.estimate <= res.upper


@settings(max_examples=150, deadline=None)
@given(EVENTS, TIME, ALPHAS, ALPHAS)
def test_rate_interval_widens_as_alpha_shrinks(
    events: int, time: float, a1: float, a2: float
) -> None:
    small, large = sorted((a1, a2))
    wide, narrow = poisson_rate(events, time, alpha=small), poisson_rate(events, time, alpha=large)
    assert wide.lower <= narrow.lower + 1e-12 and wide.upper >= narrow.upper - 1e-12


@settings(max_examples=100, deadline=None)
@given(st.integers(1, 500), TIME, st.integers(1, 500), TIME, st.sampled_from(["exact", "wald"]))
def test_ratio_interval_contains_estimate(
    e1: int, t1: float, e0: int, t0: float, method: str
) -> None:
    res = rate_ratio(e1, t1, e0, t0, method=method)  # type: ignore[arg-type]
    assert res.lower <= res.estimate * (1 + 1e-12) and res.estimate <= res.upper * (1 + 1e-12)
    assert 0.0 <= res.p <= 1.0


# --------------------------------------------------------------------------- frame level


@pytest.fixture
def followup() -> pd.DataFrame:
    return pd.DataFrame(
        {
            "pr_group": ["normal", "normal", "first_degree", "first_degree", "normal", "short"],
            "pacemaker": [0, 1, 1, 1, 0, 0],
            "years": [5.0, 2.5, 3.0, 1.5, 8.0, 4.0],
        }
    )


def test_incidence_table(followup: pd.DataFrame) -> None:
    out = incidence_table(followup, events="pacemaker", person_time="years", by="pr_group")
    assert list(out.columns) == ["pr_group", *RATE_COLUMNS]
    assert out["pr_group"].tolist() == ["first_degree", "normal", "short"]
    assert out["events"].tolist() == [2, 1, 0]
    assert out["person_time"].tolist() == [4.5, 15.5, 4.0]
    assert out.loc[0, "estimate"] == pytest.approx(2 / 4.5 * 1000)
    overall = incidence_table(pl.from_pandas(followup), events="pacemaker", person_time="years")
    assert list(overall.columns) == list(RATE_COLUMNS) and overall.loc[0, "events"] == 3


def test_incidence_table_points_at_bad_rows(followup: pd.DataFrame) -> None:
    followup.loc[4, "years"] = -1.0
    with pytest.raises(DataError, match="1 of 6 rows have missing or negative 'years'"):
        incidence_table(followup, events="pacemaker", person_time="years")


def test_rate_ratio_table(followup: pd.DataFrame) -> None:
    out = rate_ratio_table(followup, exposure="pr_group", events="pacemaker",
                           person_time="years", reference="normal")
    assert list(out.columns) == list(RATIO_COLUMNS)
    assert out["term"].tolist() == ["first_degree", "short"]
    assert set(out["reference"]) == {"normal"}
    first = rate_ratio(2, 4.5, 1, 15.5)
    assert out.loc[0, "estimate"] == pytest.approx(first.estimate)
    assert out.loc[0, "upper"] == pytest.approx(first.upper)


def test_rate_ratio_table_errors(followup: pd.DataFrame) -> None:
    with pytest.raises(DataError, match="reference level 'nope' not found"):
        rate_ratio_table(followup, exposure="pr_group", events="pacemaker", person_time="years",
                         reference="nope")
    followup.loc[0, "pr_group"] = None
    with pytest.raises(DataError, match="missing values"):
        rate_ratio_table(followup, exposure="pr_group", events="pacemaker", person_time="years")
