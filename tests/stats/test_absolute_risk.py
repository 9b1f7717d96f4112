"""Absolute risk from cause-specific Cox models: independent product integral, invariants."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from lifelines import CoxPHFitter

from cohort.stats import AbsoluteRisk, landmark


def _data(seed: int, n: int = 600) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = rng.integers(0, 2, n)
    age = rng.normal(0, 1, n)
    t1 = rng.exponential(1 / (0.1 * np.exp(0.7 * x + 0.3 * age)))
    t2 = rng.exponential(1 / (0.15 * np.exp(-0.2 * x + 0.8 * age)))
    c = rng.uniform(0, 15, n)
    t = np.minimum.reduce([t1, t2, c])
    return pd.DataFrame({"x": x, "age": age, "time": t,
                         "cause": np.select([t == t1, t == t2], [1, 2], 0)})


def test_equals_product_integral_of_lifelines_cause_specific_hazards():
    # Oracle: lifelines CoxPHFitter per cause (Breslow baseline hazard at the covariate means,
    # times the partial hazard of the profile), combined in the test by the product integral
    # CIF_k(t) = sum S(s-) dA_k(s), S = prod (1 - dA_1 - dA_2) (Andersen et al. 1993, VII.2).
    df = _data(1)
    profile = pd.DataFrame({"x": [1.0], "age": [0.5]})
    ours = AbsoluteRisk(horizons=(2.0, 5.0)).fit(df, duration="time", event="cause",
                                                 covariates=["x", "age"], profiles=profile)
    incs = []
    for k in (1, 2):
        fit = CoxPHFitter().fit(df.assign(e=(df["cause"] == k).astype(int))[
            ["x", "age", "time", "e"]], "time", "e")
        base = fit.baseline_hazard_.iloc[:, 0]
        ph = float(fit.predict_partial_hazard(profile).iloc[0])
        incs.append(base * ph)
    grid = incs[0].index.union(incs[1].index)
    d1 = incs[0].reindex(grid, fill_value=0.0).to_numpy()
    d2 = incs[1].reindex(grid, fill_value=0.0).to_numpy()
    s_prev = np.r_[1.0, np.cumprod(1 - d1 - d2)[:-1]]
    cif1, cif2 = np.cumsum(s_prev * d1), np.cumsum(s_prev * d2)
    for h in (2.0, 5.0):
        i = np.searchsorted(grid, h, side="right") - 1
        got = ours.summary[ours.summary["time"] == h].set_index("term")["estimate"]
        assert got["cause_1"] == pytest.approx(cif1[i], rel=1e-5)
        assert got["cause_2"] == pytest.approx(cif2[i], rel=1e-5)


def test_risks_are_ordered_and_bounded():
    df = _data(2)
    profiles = pd.DataFrame({"x": [0.0, 1.0], "age": [0.0, 0.0]})
    s = AbsoluteRisk(horizons=(1.0, 3.0, 8.0)).fit(
        df, duration="time", event="cause", covariates=["x", "age"], profiles=profiles).summary
    total = s.groupby(["profile", "time"])["estimate"].sum()
    assert (total < 1).all()
    c1 = s[s["term"] == "cause_1"].pivot(index="time", columns="profile", values="estimate")
    assert (np.diff(c1.to_numpy(), axis=0) >= 0).all()  # non-decreasing in the horizon
    assert (c1[1] > c1[0]).all()  # x raises the cause-1 hazard (log HR 0.7 in the simulation)


def test_bootstrap_gives_seeded_intervals():
    df = _data(3, 300)
    kw = {"duration": "time", "event": "cause", "covariates": ["x", "age"]}
    a = AbsoluteRisk(horizons=(3.0,), n_boot=15, seed=1).fit(df, **kw).summary
    b = AbsoluteRisk(horizons=(3.0,), n_boot=15, seed=1).fit(df, **kw).summary
    pd.testing.assert_frame_equal(a, b)
    assert ((a["lower"] <= a["estimate"]) & (a["estimate"] <= a["upper"])).all()


def test_landmark_resets_time_and_keeps_persons_at_risk():
    # Worked by hand: landmark at 2 keeps persons with time > 2 (event-free there), with
    # time - 2; horizon 3 censors beyond 2 + 3.
    df = pd.DataFrame({"time": [1.0, 2.0, 4.0, 9.0], "cause": [1, 2, 1, 2], "x": [1, 2, 3, 4]})
    out = landmark(df, landmarks=[0, 2], duration="time", event="cause", horizon=3)
    at2 = out[out["landmark"] == 2]
    assert at2["x"].tolist() == [3, 4]
    assert at2["time"].tolist() == [2.0, 3.0]
    assert at2["cause"].tolist() == [1, 0]
    at0 = out[out["landmark"] == 0]
    assert at0["time"].tolist() == [1.0, 2.0, 3.0, 3.0]
    assert at0["cause"].tolist() == [1, 2, 0, 0]
