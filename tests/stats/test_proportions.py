"""Unit and property tests for cohort.stats.proportions (published values: tests/reference)."""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from cohort.errors import DataError
from cohort.stats.proportions import (
    PROPORTION_COLUMNS,
    PROPORTION_METHODS,
    ProportionInterval,
    clopper_pearson_interval,
    clopper_pearson_intervals,
    proportion_interval,
    proportion_intervals,
    proportion_table,
    wilson_interval,
    wilson_intervals,
)


@st.composite
def counts(draw: st.DrawFn, max_n: int = 100_000) -> tuple[int, int]:
    n = draw(st.integers(min_value=1, max_value=max_n))
    return draw(st.integers(min_value=0, max_value=n)), n


ALPHAS = st.floats(min_value=0.001, max_value=0.5)


# --------------------------------------------------------------------------- scalar results


def test_scalar_result_is_frozen_record() -> None:
    res = wilson_interval(3, 10)
    assert isinstance(res, ProportionInterval)
    assert (res.x, res.n, res.method, res.alpha) == (3.0, 10.0, "wilson", 0.05)
    assert res.estimate == pytest.approx(0.3)
    with pytest.raises(dataclasses.FrozenInstanceError):
        res.lower = 0.0  # type: ignore[misc]


@pytest.mark.parametrize("method", PROPORTION_METHODS)
def test_limits_are_exactly_0_and_1_at_the_edges(method: str) -> None:
    assert proportion_interval(0, 17, method=method).lower == 0.0
    assert proportion_interval(17, 17, method=method).upper == 1.0
    assert proportion_interval(0, 17, method=method).upper < 1.0
    assert proportion_interval(17, 17, method=method).lower > 0.0


def test_method_names_follow_arguments() -> None:
    assert wilson_interval(2, 9, continuity=True).method == "wilson_cc"
    assert clopper_pearson_interval(2, 9).method == "clopper_pearson"


def test_scalar_zero_denominator_raises() -> None:
    with pytest.raises(DataError, match="n = 0"):
        wilson_interval(0, 0)


def test_scalar_rejects_arrays() -> None:
    with pytest.raises(DataError, match="single counts"):
        wilson_interval([1, 2], [3, 4])  # type: ignore[arg-type]


# --------------------------------------------------------------------------- arrays


@pytest.mark.parametrize("method", PROPORTION_METHODS)
def test_array_matches_scalar(method: str) -> None:
    x, n = np.array([0, 3, 7, 12]), np.array([5, 9, 7, 40])
    arr = proportion_intervals(x, n, alpha=0.1, method=method)
    for i in range(x.size):
        one = proportion_interval(int(x[i]), int(n[i]), alpha=0.1, method=method)
        assert (arr.lower[i], arr.upper[i]) == pytest.approx((one.lower, one.upper), abs=1e-12)


def test_array_wrappers_pick_the_method() -> None:
    assert wilson_intervals([1], [4]).method == "wilson"
    assert wilson_intervals([1], [4], continuity=True).method == "wilson_cc"
    assert clopper_pearson_intervals([1], [4]).method == "clopper_pearson"


def test_array_zero_denominator_gives_nan_row_only() -> None:
    res = proportion_intervals([0, 2], [0, 4])
    assert np.isnan([res.estimate[0], res.lower[0], res.upper[0]]).all()
    assert res.estimate[1] == pytest.approx(0.5)
    frame = res.to_frame()
    assert list(frame.columns) == ["events", "n", "estimate", "lower", "upper", "method", "alpha"]


@pytest.mark.parametrize(
    ("x", "n", "message"),
    [
        ([5, 1, 9], [3, 2, 4], "2 of 3 values of x exceed their denominator"),
        ([-1], [4], "negative"),
        ([1.5], [4], "not whole numbers"),
        ([np.nan], [4], "missing"),
        ([1, 2], [4], "one denominator per numerator"),
    ],
)
def test_invalid_counts_raise_with_count(x: list, n: list, message: str) -> None:
    with pytest.raises(DataError, match=message):
        proportion_intervals(x, n)


def test_invalid_settings_raise() -> None:
    with pytest.raises(DataError, match="alpha"):
        wilson_interval(1, 4, alpha=1.5)
    with pytest.raises(DataError, match="unknown proportion method"):
        proportion_interval(1, 4, method="agresti")  # type: ignore[arg-type]


# --------------------------------------------------------------------------- properties


@settings(max_examples=150, deadline=None)
@given(counts(), ALPHAS, st.sampled_from(PROPORTION_METHODS))
def test_interval_contains_estimate_within_unit_interval(
    xn: tuple[int, int], alpha: float, method: str
) -> None:
    res = proportion_interval(*xn, alpha=alpha, method=method)
    assert 0.0 <= res.lower <= res.estimate <= res.upper <= 1.0


@settings(max_examples=150, deadline=None)
@given(counts(), ALPHAS, ALPHAS, st.sampled_from(PROPORTION_METHODS))
def test_interval_widens_as_alpha_shrinks(
    xn: tuple[int, int], a1: float, a2: float, method: str
) -> None:
    small, large = sorted((a1, a2))
    wide = proportion_interval(*xn, alpha=small, method=method)
    narrow = proportion_interval(*xn, alpha=large, method=method)
    assert wide.lower <= narrow.lower + 1e-12
    assert wide.upper >= narrow.upper - 1e-12


@settings(max_examples=150, deadline=None)
@given(counts(), st.sampled_from(PROPORTION_METHODS))
def test_interval_is_symmetric_under_relabelling(xn: tuple[int, int], method: str) -> None:
    # Counting non-events instead of events mirrors the interval (all three are equivariant).
    x, n = xn
    a, b = proportion_interval(x, n, method=method), proportion_interval(n - x, n, method=method)
    assert a.lower == pytest.approx(1.0 - b.upper, abs=1e-9)
    assert a.upper == pytest.approx(1.0 - b.lower, abs=1e-9)


@settings(max_examples=150, deadline=None)
@given(counts(max_n=5000))
def test_continuity_correction_widens_the_score_interval(xn: tuple[int, int]) -> None:
    plain, corrected = wilson_interval(*xn), wilson_interval(*xn, continuity=True)
    assert corrected.lower <= plain.lower + 1e-12
    assert corrected.upper >= plain.upper - 1e-12


# --------------------------------------------------------------------------- frame level


@pytest.fixture
def persons() -> pd.DataFrame:
    return pd.DataFrame(
        {
            "block": [1, 0, 1, np.nan, 0, 1, 0],
            "sex": ["F", "F", "M", "M", "M", None, "F"],
            "site": ["a", "b", "a", "a", "b", "b", "a"],
        }
    )


def test_proportion_table_groups_and_counts(persons: pd.DataFrame) -> None:
    out = proportion_table(persons, "block", by="sex")
    assert list(out.columns) == ["sex", *PROPORTION_COLUMNS]
    assert out["sex"].tolist() == ["F", "M", None]
    assert out["events"].tolist() == [1, 1, 1]
    assert out["n"].tolist() == [3, 2, 1]
    assert out["n_missing"].tolist() == [0, 1, 0]
    expected = wilson_interval(1, 3)
    assert (out.loc[0, "lower"], out.loc[0, "upper"]) == pytest.approx(
        (expected.lower, expected.upper)
    )


def test_proportion_table_overall_and_two_keys(persons: pd.DataFrame) -> None:
    overall = proportion_table(persons, "block", method="clopper_pearson")
    assert list(overall.columns) == list(PROPORTION_COLUMNS)
    assert (overall.loc[0, "events"], overall.loc[0, "n"]) == (3, 6)
    two = proportion_table(persons, "block", by=["site", "sex"])
    assert two["n"].sum() == 6
    assert list(two.columns[:2]) == ["site", "sex"]


def test_proportion_table_same_from_polars_and_pandas(persons: pd.DataFrame) -> None:
    a = proportion_table(persons, "block", by="site")
    b = proportion_table(pl.from_pandas(persons), "block", by="site")
    pd.testing.assert_frame_equal(a, b)


def test_proportion_table_all_missing_group_is_nan(persons: pd.DataFrame) -> None:
    persons.loc[persons["sex"] == "M", "block"] = np.nan
    out = proportion_table(persons, "block", by="sex").set_index("sex")
    assert out.loc["M", "n"] == 0 and np.isnan(out.loc["M", "estimate"])


def test_proportion_table_rejects_non_binary_outcome(persons: pd.DataFrame) -> None:
    persons.loc[0, "block"] = 2
    with pytest.raises(DataError, match="1 of 7 rows of 'block' are neither 0 nor 1"):
        proportion_table(persons, "block")


def test_proportion_table_names_missing_columns(persons: pd.DataFrame) -> None:
    with pytest.raises(DataError, match="missing: pacer"):
        proportion_table(persons, "pacer")
