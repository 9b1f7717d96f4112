"""Restricted cubic splines: span of natural cubic splines (patsy), linear tails, HR curves."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from lifelines import CoxPHFitter
from patsy import dmatrix

from cohort.stats import CoxPH, harrell_knots, hr_curve, rcs_basis, rcs_columns


def test_knots_at_harrell_quantiles():
    # Harrell (2015) RMS Table 2.3 (recalled from memory): 4 knots at 5/35/65/95%; numpy's
    # linear quantile of 1..100 at p is 1 + 99 p (R type 7; common practice, no source).
    x = np.arange(1, 101)
    np.testing.assert_allclose(harrell_knots(x, 4), 1 + 99 * np.array([0.05, 0.35, 0.65, 0.95]))
    assert harrell_knots(x, 3).size == 3 and harrell_knots(x, 5).size == 5


def test_basis_spans_the_natural_cubic_spline_space():
    # Oracle: patsy's cr() natural cubic regression spline with the same knots spans the same
    # function space as {1, RCS basis} (Harrell 2015, sec. 2.4.5; Stone & Koo 1985).
    rng = np.random.default_rng(0)
    x = rng.uniform(100, 300, 400)
    knots = harrell_knots(x, 5)
    ours = np.column_stack([np.ones(x.size), rcs_basis(x, knots)])
    ref = np.asarray(dmatrix(
        f"cr(x, knots={list(knots[1:-1])}, lower_bound={knots[0]}, upper_bound={knots[-1]}) - 1",
        {"x": x}))
    coef, *_ = np.linalg.lstsq(ours, ref, rcond=None)
    np.testing.assert_allclose(ours @ coef, ref, atol=1e-8)
    assert np.linalg.matrix_rank(ours) == ref.shape[1] == 5


def test_basis_is_linear_beyond_the_outer_knots():
    knots = [120.0, 150, 180, 220]
    for grid in (np.linspace(60, 119, 7), np.linspace(221, 400, 7)):
        second = np.diff(rcs_basis(grid, knots), n=2, axis=0)
        np.testing.assert_allclose(second, 0.0, atol=1e-9)


def test_cox_on_spline_columns_equals_lifelines_and_curve_is_relative_to_reference():
    rng = np.random.default_rng(1)
    n = 1500
    pr = rng.normal(170, 30, n)
    log_hr = 0.0002 * (pr - 160) ** 2  # U-shaped truth
    t = rng.exponential(1 / (0.1 * np.exp(log_hr)))
    c = rng.uniform(0, 20, n)
    knots = harrell_knots(pr, 4)
    df = pd.concat([rcs_columns(pr, knots, "pr"),
                    pd.DataFrame({"time": np.minimum(t, c), "event": (t <= c).astype(int)})],
                   axis=1)
    terms = ["pr", "pr_rcs1", "pr_rcs2"]
    fit = CoxPH().fit(df, duration="time", event="event", covariates=terms)
    ref = CoxPHFitter().fit(df, "time", "event")
    np.testing.assert_allclose(fit.params_[terms], ref.params_[terms], atol=1e-6)
    curve = hr_curve(fit, terms, knots, [120, 160, 220], reference=160)
    ref_row = curve[curve["value"] == 160].iloc[0]
    assert ref_row["hr"] == pytest.approx(1.0) and ref_row["se"] == pytest.approx(0.0)
    # Delta method by hand for one value.
    b = rcs_basis(np.array([220.0]), knots) - rcs_basis(np.array([160.0]), knots)
    var = fit.variance_.loc[terms, terms].to_numpy()
    assert curve["se"].iloc[2] == pytest.approx(float(np.sqrt((b @ var @ b.T)[0, 0])))
    # The U shape is recovered: both ends above the reference.
    assert curve["hr"].iloc[0] > 1 and curve["hr"].iloc[2] > 1
    truth_220 = np.exp(0.0002 * 60**2)
    assert curve["lower"].iloc[2] < truth_220 < curve["upper"].iloc[2]
