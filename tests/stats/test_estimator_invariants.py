"""Invariants shared by every survival estimator (design.md, statistics style).

fit returns self; refitting gives an identical summary; the summary has its documented fixed
columns; polars and pandas inputs agree; bad input raises DataError (not a traceback from the
arithmetic); asking an unfitted estimator for results raises a clear error.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
import polars as pl
import pytest

from cohort.errors import DataError
from cohort.stats import (
    AalenJohansen,
    AbsoluteRisk,
    CoxPH,
    FineGray,
    KaplanMeier,
    MultiState,
    Turnbull,
)
from cohort.stats._survival_base import CURVE_COLUMNS, REGRESSION_COLUMNS
from cohort.stats.absolute_risk import RISK_COLUMNS


def _frame(seed: int = 0, n: int = 120) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = rng.normal(size=n)
    t = np.round(rng.exponential(5 / np.exp(0.3 * x)), 1) + 0.1
    c = np.round(rng.uniform(1, 12, n), 1)
    cause = np.where(t <= c, rng.integers(1, 3, n), 0)
    return pd.DataFrame({
        "time": np.minimum(t, c), "cause": cause, "event": (cause > 0).astype(int), "x": x,
        "z": rng.integers(0, 2, n).astype(float), "grp": rng.choice(["a", "b"], n),
        "left": np.floor(np.minimum(t, c)), "right": np.where(cause > 0, np.ceil(t) + 0.5,
                                                             np.inf),
        "id": np.arange(n), "from": "well", "start": 0.0,
        "to": np.array([None, "ill", "dead"], dtype=object)[cause]})


@dataclass
class Case:
    name: str
    make: Callable[[], Any]
    kwargs: dict
    columns: tuple[str, ...]
    time_col: str


CASES = [
    Case("kaplan_meier", KaplanMeier, {"duration": "time", "event": "event", "group": "grp"},
         CURVE_COLUMNS, "time"),
    Case("aalen_johansen", AalenJohansen, {"duration": "time", "event": "cause", "group": "grp"},
         CURVE_COLUMNS, "time"),
    Case("cox", lambda: CoxPH(event_of_interest=1),
         {"duration": "time", "event": "cause", "covariates": ["x", "z"]}, REGRESSION_COLUMNS,
         "time"),
    Case("fine_gray", FineGray, {"duration": "time", "event": "cause", "covariates": ["x", "z"]},
         REGRESSION_COLUMNS, "time"),
    Case("turnbull", Turnbull, {"left": "left", "right": "right"}, CURVE_COLUMNS, "left"),
    Case("multistate", lambda: MultiState(["well", "ill", "dead"], n_boot=5),
         {"id": "id", "from_state": "from", "to_state": "to", "start": "start", "stop": "time"},
         CURVE_COLUMNS, "time"),
    Case("absolute_risk", lambda: AbsoluteRisk(horizons=(3.0, 6.0)),
         {"duration": "time", "event": "cause", "covariates": ["x", "z"]}, RISK_COLUMNS, "time"),
]
IDS = [c.name for c in CASES]


def _fit(case: Case, frame: Any) -> Any:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # e.g. KM's competing-event caveat
        return case.make().fit(frame, **case.kwargs)


@pytest.mark.parametrize("case", CASES, ids=IDS)
def test_fit_returns_self_and_refit_is_identical(case):
    df = _frame()
    est = case.make()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert est.fit(df, **case.kwargs) is est
        first = est.summary
        est.fit(df, **case.kwargs)
    pd.testing.assert_frame_equal(first, est.summary)


@pytest.mark.parametrize("case", CASES, ids=IDS)
def test_summary_has_the_documented_columns(case):
    summary = _fit(case, _frame()).summary
    assert tuple(summary.columns) == case.columns
    assert len(summary) > 0


@pytest.mark.parametrize("case", CASES, ids=IDS)
def test_polars_input_equals_pandas_input(case):
    df = _frame(1)
    pd.testing.assert_frame_equal(_fit(case, df).summary, _fit(case, pl.from_pandas(df)).summary)


@pytest.mark.parametrize("case", CASES, ids=IDS)
def test_missing_column_is_a_data_error(case):
    df = _frame().drop(columns=[case.time_col])
    with pytest.raises(DataError, match="not found"):
        _fit(case, df)


@pytest.mark.parametrize("case", CASES, ids=IDS)
def test_missing_values_are_a_data_error_with_counts(case):
    df = _frame()
    df.loc[[3, 7, 11], case.time_col] = np.nan
    with pytest.raises(DataError, match="3 of 120"):
        _fit(case, df)


@pytest.mark.parametrize("case", [c for c in CASES if c.time_col == "time"],
                         ids=[c.name for c in CASES if c.time_col == "time"])
def test_negative_times_are_a_data_error(case):
    df = _frame()
    df.loc[[0, 5], "time"] = -1.0
    with pytest.raises(DataError):
        _fit(case, df)


@pytest.mark.parametrize("case", CASES, ids=IDS)
def test_unfitted_estimator_says_so(case):
    with pytest.raises(RuntimeError, match="not fitted"):
        _ = case.make().summary
