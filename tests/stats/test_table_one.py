"""Tests for cohort.stats.table_one, SMDs checked by hand against Austin (2009)."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import polars as pl
import pytest

from cohort.errors import DataError
from cohort.stats.table_one import (
    GROUP_SIZE,
    TABLE_ONE_COLUMNS,
    smd_binary,
    smd_categorical,
    smd_continuous,
    table_one,
)


@pytest.fixture
def tiny() -> pd.DataFrame:
    # Exposed (first_degree) vs reference (normal): 4 and 5 persons.
    return pd.DataFrame(
        {
            "pr_group": ["normal"] * 5 + ["first_degree"] * 4,
            "age": [50, 52, 54, 56, 58, 60, 64, 68, np.nan],
            "sex": ["F", "F", "M", "F", "M", "M", "M", "F", None],
            "rhythm": ["sinus", "sinus", "sinus", "other", "sinus",
                       "sinus", "atrial_fibrillation", "other", "other"],
        }
    )


def _get(out: pd.DataFrame, variable: str, group: str, statistic: str, level=None) -> pd.Series:
    rows = out[(out.variable == variable) & (out.group == group) & (out.statistic == statistic)]
    rows = rows[rows.level.isna()] if level is None else rows[rows.level == level]
    assert len(rows) == 1
    return rows.iloc[0]


def test_smd_continuous_by_hand(tiny: pd.DataFrame) -> None:
    # Austin PC (2009) Stat Med 28:3083, continuous SMD. By hand: normal ages 50..58 step 2,
    # mean 54, SD sqrt(10); exposed 60, 64, 68: mean 64, SD 4.
    # d = (64 - 54) / sqrt((16 + 10) / 2) = 10 / sqrt(13) = 2.7735.
    out = table_one(tiny, group="pr_group", variables={"age": "mean_sd"}, reference="normal")
    row = _get(out, "age", "first_degree", "mean")
    assert row.value == pytest.approx(64.0)
    assert row.smd == pytest.approx(10 / math.sqrt(13), rel=1e-12)
    assert row.n_missing == 1
    assert _get(out, "age", "normal", "sd").value == pytest.approx(math.sqrt(10))
    assert np.isnan(_get(out, "age", "normal", "mean").smd)
    assert smd_continuous(64, 4, 54, math.sqrt(10)) == pytest.approx(2.773500981126146)


def test_smd_binary_by_hand(tiny: pd.DataFrame) -> None:
    # Austin (2009) binary SMD. Women: normal 3/5 = 0.6, exposed 1/3 (one sex missing).
    # d = (1/3 - 0.6) / sqrt((1/3 * 2/3 + 0.6 * 0.4) / 2) = -0.26667 / sqrt(0.231111)
    #   = -0.55470.
    out = table_one(tiny, group="pr_group", variables={"sex": "categorical"},
                    reference="normal")
    women = _get(out, "sex", "first_degree", "percent", level="F")
    assert women.value == pytest.approx(100 / 3)
    assert women.smd == pytest.approx(-0.5547001962252291, rel=1e-12)
    assert women.n_missing == 1
    # Two levels: the multi-level SMD equals |binary SMD| (Yang & Dalton 2012).
    assert _get(out, "sex", "first_degree", "n_nonmissing").smd == pytest.approx(0.5547001962,
                                                                                rel=1e-9)
    assert smd_binary(1 / 3, 0.6) == pytest.approx(-0.5547001962252291)


def test_smd_three_level_categorical_by_hand() -> None:
    # Multi-level SMD (Yang D & Dalton JE 2012, SAS Global Forum 335-2012; recalled from
    # memory), written out with the 2x2 inverse by hand. Levels A, B, C; drop A.
    t, c = np.array([0.5, 0.3]), np.array([0.2, 0.4])  # shares of B, C (treated, control)
    s11 = (t[0] * (1 - t[0]) + c[0] * (1 - c[0])) / 2
    s22 = (t[1] * (1 - t[1]) + c[1] * (1 - c[1])) / 2
    s12 = -(t[0] * t[1] + c[0] * c[1]) / 2
    det = s11 * s22 - s12 * s12
    d1, d2 = t - c
    hand = math.sqrt((d1 * d1 * s22 - 2 * d1 * d2 * s12 + d2 * d2 * s11) / det)
    assert smd_categorical([0.2, 0.5, 0.3], [0.4, 0.2, 0.4]) == pytest.approx(hand, rel=1e-12)
    assert smd_categorical([0.3, 0.7], [0.5, 0.5]) == pytest.approx(abs(smd_binary(0.7, 0.5)))
    assert smd_categorical([0.2, 0.8], [0.2, 0.8]) == 0.0


def test_smd_degenerate_spread() -> None:
    assert smd_continuous(5, 0, 5, 0) == 0.0
    assert smd_continuous(6, 0, 5, 0) == math.inf
    assert smd_binary(1.0, 1.0) == 0.0
    assert math.isnan(smd_continuous(float("nan"), 1, 5, 1))


def test_layout_counts_and_overall(tiny: pd.DataFrame) -> None:
    out = table_one(tiny, group="pr_group",
                    variables={"age": "median_iqr", "rhythm": "categorical"})
    assert list(out.columns) == list(TABLE_ONE_COLUMNS)
    sizes = out[out.variable == GROUP_SIZE].set_index("group")["value"]
    assert sizes.to_dict() == {"first_degree": 4.0, "normal": 5.0, "overall": 9.0}
    assert out.variable.tolist()[3:] == ["age"] * 12 + ["rhythm"] * 3 * (1 + 2 * 3)
    # Default reference is the first group in sort order.
    assert np.isnan(_get(out, "age", "first_degree", "median").smd)
    assert not np.isnan(_get(out, "age", "normal", "median").smd)
    ages = tiny.loc[tiny.pr_group == "normal", "age"].to_numpy()
    assert _get(out, "age", "normal", "q1").value == pytest.approx(np.percentile(ages, 25))
    assert _get(out, "age", "overall", "q3").value == pytest.approx(
        np.nanpercentile(tiny.age, 75))
    af = _get(out, "rhythm", "normal", "n", level="atrial_fibrillation")
    assert af.value == 0.0  # a level absent from a group is shown as 0
    assert _get(out, "rhythm", "overall", "percent", level="other").value == pytest.approx(
        100 * 3 / 9)


def test_polars_and_pandas_agree(tiny: pd.DataFrame) -> None:
    spec = {"age": "mean_sd", "sex": "categorical"}
    a = table_one(tiny, group="pr_group", variables=spec)
    b = table_one(pl.from_pandas(tiny), group="pr_group", variables=spec)
    pd.testing.assert_frame_equal(a, b)


def test_level_order_and_unknown_levels(tiny: pd.DataFrame) -> None:
    out = table_one(tiny, group="pr_group", variables={"sex": "categorical"},
                    levels={"sex": ["M", "F"]}, overall=False)
    assert out[out.statistic == "n"].level.dropna().tolist() == ["M", "M", "F", "F"]
    assert "overall" not in set(out.group)
    with pytest.raises(DataError, match="4 rows of 'rhythm' hold values not among"):
        table_one(tiny, group="pr_group", variables={"rhythm": "categorical"},
                  levels={"rhythm": ["sinus", "paced"]})


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"variables": {"sex": "mean_sd"}}, "needs a numeric column"),
        ({"variables": {"age": "mean"}}, "unknown kind of variable 'age'"),
        ({"variables": {"age": "mean_sd"}, "reference": "paced"}, "reference group 'paced'"),
        ({"variables": {"weight": "mean_sd"}}, "missing: weight"),
    ],
)
def test_invalid_requests(tiny: pd.DataFrame, kwargs: dict, message: str) -> None:
    with pytest.raises(DataError, match=message):
        table_one(tiny, group="pr_group", **kwargs)


def test_missing_group_is_an_error(tiny: pd.DataFrame) -> None:
    tiny.loc[0, "pr_group"] = None
    with pytest.raises(DataError, match="1 of 9 rows have no 'pr_group'"):
        table_one(tiny, group="pr_group", variables={"age": "mean_sd"})
