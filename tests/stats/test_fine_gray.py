"""Fine-Gray regression: explicit weighted expansion, simulated truth, reduction to Cox.

The mgus2 check against R (survival::finegray + coxph, cmprsk::crr) is in
tests/reference/test_survival_reference.py.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from lifelines import KaplanMeierFitter

from cohort.errors import DataError
from cohort.stats import CoxPH, FineGray


def simulate_fine_gray(seed: int, n: int, beta1=(0.5, -0.5), beta2=(-0.5, 0.5), p=0.3):
    """Fine & Gray (1999) JASA sec. 5 design (recalled from memory).

    F1(t | x) = 1 - (1 - p (1 - exp(-t)))^exp(x'beta1); given cause 2, T ~ Exp(exp(x'beta2)).
    Censoring Uniform(0, 3).
    """
    rng = np.random.default_rng(seed)
    x = np.column_stack([rng.integers(0, 2, n), rng.normal(size=n)])
    e1 = np.exp(x @ np.asarray(beta1))
    p1 = 1 - (1 - p) ** e1  # P(cause 1 | x)
    cause1 = rng.uniform(size=n) < p1
    u = rng.uniform(size=n)
    t1 = -np.log(1 - (1 - (1 - u * p1) ** (1 / e1)) / p)
    t2 = rng.exponential(1 / np.exp(x @ np.asarray(beta2)))
    t = np.where(cause1, t1, t2)
    c = rng.uniform(0, 3, n)
    return pd.DataFrame({"x1": x[:, 0], "x2": x[:, 1], "time": np.minimum(t, c),
                         "cause": np.where(t <= c, np.where(cause1, 1, 2), 0)})


def _censoring_km_events_first(time: np.ndarray, cause: np.ndarray) -> KaplanMeierFitter:
    # Independent G: lifelines KM of the censoring indicator, with event times moved a hair
    # earlier so that at ties events leave before censoring (the R finegray convention).
    t = np.where(cause > 0, time - 1e-9, time)
    return KaplanMeierFitter().fit(t, (cause == 0).astype(int))


def _expanded(df: pd.DataFrame) -> pd.DataFrame:
    """Counting-process expansion of Geskus (2011): one row per later cause-1 time."""
    km = _censoring_km_events_first(df["time"].to_numpy(), df["cause"].to_numpy())

    def g_before(t):  # G(t-)
        return km.survival_function_at_times(np.asarray(t) - 1e-7).to_numpy()

    ev_times = np.unique(df.loc[df["cause"] == 1, "time"])
    rows = [pd.DataFrame({"pid": df.index, "start": 0.0, "stop": df["time"],
                          "status": (df["cause"] == 1).astype(int), "wt": 1.0,
                          "x1": df["x1"], "x2": df["x2"]})]
    comp = df[df["cause"] == 2]
    for pid, r in comp.iterrows():
        later = ev_times[ev_times > r["time"]]
        if later.size == 0:
            continue
        starts = np.r_[r["time"], later[:-1]]
        rows.append(pd.DataFrame({"pid": pid, "start": starts, "stop": later, "status": 0,
                                  "wt": g_before(later) / g_before([r["time"]])[0],
                                  "x1": r["x1"], "x2": r["x2"]}))
    return pd.concat(rows, ignore_index=True)


def test_equals_weighted_cox_on_the_explicit_expansion():
    # Oracle: the weighted counting-process Cox fit of Geskus (2011) on explicitly expanded
    # data (weights G(t-)/G(T_i-) from an independent censoring KM), robust SE clustered on
    # the person. Times rounded so that events and censorings tie.
    df = simulate_fine_gray(1, 400)
    df["time"] = np.round(df["time"], 1) + 0.1
    fg = FineGray().fit(df, duration="time", event="cause", covariates=["x1", "x2"])
    long = _expanded(df)
    ref = CoxPH(robust=True).fit(long, duration="stop", event="status", start="start",
                                 weights="wt", id="pid", covariates=["x1", "x2"])
    np.testing.assert_allclose(fg.params_, ref.params_, atol=1e-8)
    np.testing.assert_allclose(fg.summary["se"], ref.summary["se"], rtol=1e-7)
    np.testing.assert_allclose(fg.summary["se_naive"], ref.summary["se_naive"], rtol=1e-7)


def test_without_competing_events_it_is_the_cox_model():
    # Fact of the trade: with no competing events the subdistribution hazard is the hazard.
    df = simulate_fine_gray(2, 500)
    df = df[df["cause"] != 2]
    fg = FineGray().fit(df, duration="time", event="cause", covariates=["x1", "x2"])
    cox = CoxPH().fit(df, duration="time", event="cause", covariates=["x1", "x2"])
    np.testing.assert_allclose(fg.params_, cox.params_, atol=1e-10)


def test_recovers_simulated_truth():
    df = simulate_fine_gray(3, 3000)
    fg = FineGray().fit(df, duration="time", event="cause", covariates=["x1", "x2"])
    s = fg.summary.set_index("term")
    for term, truth in (("x1", 0.5), ("x2", -0.5)):
        assert abs(s.loc[term, "estimate"] - truth) < 3 * s.loc[term, "se"]


@pytest.mark.slow
def test_unbiased_and_covered_over_replicates():
    est, cover = [], []
    for seed in range(200):
        s = FineGray().fit(simulate_fine_gray(100 + seed, 1000), duration="time", event="cause",
                           covariates=["x1", "x2"]).summary.set_index("term")
        est.append(s.loc["x1", "estimate"])
        cover.append(s.loc["x1", "lower"] <= np.exp(0.5) <= s.loc["x1", "upper"])
    assert abs(np.mean(est) - 0.5) < 0.03
    assert 0.91 < np.mean(cover) < 0.98


def test_predicted_cif_tracks_the_true_cif():
    df = simulate_fine_gray(4, 4000)
    fg = FineGray().fit(df, duration="time", event="cause", covariates=["x1", "x2"])
    pred = fg.cumulative_incidence(np.array([[1.0, 0.0]]), [0.5, 1.0, 2.0])
    truth = 1 - (1 - 0.3 * (1 - np.exp(-np.array([0.5, 1.0, 2.0])))) ** np.exp(0.5)
    np.testing.assert_allclose(pred["estimate"], truth, atol=0.03)


def test_delayed_entry_and_missing_cause_are_data_errors():
    df = simulate_fine_gray(5, 100).assign(e=0.0)
    with pytest.raises(DataError, match="delayed entry"):
        FineGray().fit(df, duration="time", event="cause", covariates=["x1"], entry="e")
    with pytest.raises(DataError, match="event code 3"):
        FineGray(event_of_interest=3).fit(df, duration="time", event="cause", covariates=["x1"])
