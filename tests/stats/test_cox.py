"""Cox regression: Rossi published values, lifelines and statsmodels as oracles."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import polars as pl
import pytest
from lifelines import CoxPHFitter, CoxTimeVaryingFitter
from lifelines.datasets import load_rossi, load_stanford_heart_transplants
from lifelines.statistics import proportional_hazard_test
from statsmodels.duration.hazard_regression import PHReg

from cohort.errors import DataError
from cohort.stats import CoxPH, split_counting_process

ROSSI_TERMS = ["fin", "age", "race", "wexp", "mar", "paro", "prio"]


@pytest.fixture(scope="module")
def rossi() -> pd.DataFrame:
    return load_rossi()


@pytest.fixture(scope="module")
def rossi_fit(rossi) -> CoxPH:
    return CoxPH().fit(rossi, duration="week", event="arrest", covariates=ROSSI_TERMS)


def _untied(seed: int, n: int = 300, p: int = 3) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, p))
    t = rng.exponential(1 / np.exp(x @ np.linspace(0.5, -0.3, p)))
    c = rng.exponential(1.5, n)
    df = pd.DataFrame(x, columns=[f"x{i}" for i in range(p)])
    df["time"] = np.minimum(t, c)
    df["event"] = (t <= c).astype(int)
    df["w"] = rng.uniform(0.5, 2, n)
    df["g"] = rng.integers(0, 3, n)
    df["id"] = rng.integers(0, n // 3, n)
    return df


def test_rossi_published_coefficients(rossi_fit):
    # Rossi recidivism data, Efron ties: lifelines documentation; Fox J & Weisberg S, "Cox
    # Proportional-Hazards Regression for Survival Data in R" (appendix to An R Companion to
    # Applied Regression) -- values as quoted in shared/references.md.
    published = {"fin": (-0.379, 0.191), "age": (-0.057, 0.022), "race": (0.314, 0.308),
                 "wexp": (-0.150, 0.212), "mar": (-0.434, 0.382), "paro": (-0.085, 0.196),
                 "prio": (0.091, 0.029)}
    s = rossi_fit.summary.set_index("term")
    for term, (coef, se) in published.items():
        assert s.loc[term, "estimate"] == pytest.approx(coef, abs=6e-4)
        assert s.loc[term, "se"] == pytest.approx(se, abs=6e-4)
    assert rossi_fit.loglik_ == pytest.approx(-658.75, abs=6e-3)
    assert s["n"].iloc[0] == 432 and s["events"].iloc[0] == 114


def test_rossi_equals_lifelines_efron(rossi, rossi_fit):
    # Oracle: lifelines CoxPHFitter (Efron ties), same frame.
    ref = CoxPHFitter().fit(rossi, "week", "arrest")
    np.testing.assert_allclose(rossi_fit.params_[ref.params_.index], ref.params_, atol=1e-6)
    np.testing.assert_allclose(rossi_fit.summary.set_index("term").loc[ref.params_.index, "se"],
                               ref.standard_errors_, atol=1e-6)
    assert rossi_fit.loglik_ == pytest.approx(ref.log_likelihood_, abs=1e-6)


@pytest.mark.parametrize("ties", ["efron", "breslow"])
def test_rossi_equals_statsmodels_phreg(rossi, ties):
    # Oracle: statsmodels PHReg with the same ties method.
    ref = PHReg(rossi["week"], rossi[ROSSI_TERMS], status=rossi["arrest"], ties=ties).fit()
    ours = CoxPH(ties=ties).fit(rossi, duration="week", event="arrest", covariates=ROSSI_TERMS)
    np.testing.assert_allclose(ours.params_, ref.params, atol=1e-6)
    np.testing.assert_allclose(ours.summary["se"], ref.bse, atol=1e-6)
    assert ours.loglik_ == pytest.approx(ref.llf, abs=1e-6)


def test_left_truncation_equals_statsmodels_phreg():
    # Oracle: statsmodels PHReg(entry=...) (risk set: entry < t <= exit), Breslow ties.
    df = _untied(21, n=400)
    df["entry"] = df["time"] * np.random.default_rng(1).uniform(0, 0.8, len(df))
    cols = ["x0", "x1", "x2"]
    ref = PHReg(df["time"], df[cols], status=df["event"], entry=df["entry"], ties="breslow").fit()
    ours = CoxPH(ties="breslow").fit(df, duration="time", event="event", covariates=cols,
                                     entry="entry")
    np.testing.assert_allclose(ours.params_, ref.params, atol=1e-6)
    np.testing.assert_allclose(ours.summary["se"], ref.bse, atol=1e-6)


def test_strata_equal_lifelines(rossi):
    # Oracle: lifelines CoxPHFitter(strata=...).
    ref = CoxPHFitter(strata=["wexp"]).fit(rossi, "week", "arrest")
    terms = [t for t in ROSSI_TERMS if t != "wexp"]
    ours = CoxPH().fit(rossi, duration="week", event="arrest", covariates=terms, strata="wexp")
    np.testing.assert_allclose(ours.params_[ref.params_.index], ref.params_, atol=1e-6)


def test_robust_variance_equals_lifelines_on_untied_data():
    # Oracle: lifelines robust=True (Lin-Wei sandwich). lifelines' score residuals ignore
    # ties, so the comparison is on continuous times; ties are checked against R's finegray +
    # coxph numbers in the reference tests.
    df = _untied(5)
    cols = ["x0", "x1", "x2"]
    ref = CoxPHFitter().fit(df[cols + ["time", "event"]], "time", "event", robust=True)
    ours = CoxPH(robust=True).fit(df, duration="time", event="event", covariates=cols)
    np.testing.assert_allclose(ours.summary["se"], ref.standard_errors_[cols], rtol=1e-6)


def test_weighted_clustered_robust_equals_lifelines():
    # Oracle: lifelines weights_col + cluster_col (sandwich summed within clusters).
    df = _untied(8)
    cols = ["x0", "x1", "x2"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = CoxPHFitter().fit(df[cols + ["time", "event", "w", "id"]], "time", "event",
                                weights_col="w", cluster_col="id", robust=True)
    ours = CoxPH(robust=True).fit(df, duration="time", event="event", covariates=cols,
                                  weights="w", id="id")
    np.testing.assert_allclose(ours.params_, ref.params_[cols], atol=1e-6)
    np.testing.assert_allclose(ours.summary["se"], ref.standard_errors_[cols], rtol=1e-6)


def test_ph_test_equals_lifelines_km_transform(rossi, rossi_fit):
    # Oracle: lifelines proportional_hazard_test(time_transform="km"), the Grambsch-Therneau
    # (1994) approximation (R survival < 3.0 cox.zph).
    ref = CoxPHFitter().fit(rossi, "week", "arrest")
    res = proportional_hazard_test(ref, rossi, time_transform="km").summary
    ph = rossi_fit.ph_test_.set_index("term")
    np.testing.assert_allclose(ph.loc[res.index, "statistic"], res["test_statistic"], rtol=1e-6)
    s = rossi_fit.summary.set_index("term")
    assert bool(s.loc["age", "ph_flag"]) and not bool(s.loc["fin", "ph_flag"])
    assert ph.loc["GLOBAL", "df"] == len(ROSSI_TERMS)


def test_ph_test_rank_transform_on_untied_data():
    # With no ties lifelines' rank (cumulative count) equals the rank of the event times.
    df = _untied(13)
    cols = ["x0", "x1", "x2"]
    ref = CoxPHFitter().fit(df[cols + ["time", "event"]], "time", "event")
    res = proportional_hazard_test(ref, df[cols + ["time", "event"]], time_transform="rank")
    ours = CoxPH(ph_transform="rank").fit(df, duration="time", event="event", covariates=cols)
    got = ours.ph_test_.set_index("term").loc[cols, "statistic"]
    # lifelines stops Newton at a step of 1e-7, hence the tolerance.
    np.testing.assert_allclose(got, res.summary.loc[cols, "test_statistic"], rtol=1e-5)


def test_schoenfeld_residuals_equal_lifelines(rossi, rossi_fit):
    ref = CoxPHFitter().fit(rossi, "week", "arrest")
    res = ref.compute_residuals(rossi, kind="schoenfeld")
    ours = rossi_fit.schoenfeld_
    # Same multiset of residuals per event time (row order within a tied time may differ).
    ref_sorted = np.sort(res[ROSSI_TERMS].to_numpy().round(10), axis=0)
    our_sorted = np.sort(ours[ROSSI_TERMS].to_numpy().round(10), axis=0)
    np.testing.assert_allclose(our_sorted, ref_sorted, atol=1e-6)


def test_counting_process_equals_lifelines_time_varying():
    # Oracle: lifelines CoxTimeVaryingFitter on the Stanford heart transplant (start, stop]
    # data (shipped with lifelines).
    df = load_stanford_heart_transplants()
    cols = ["age", "year", "surgery", "transplant"]
    ref = CoxTimeVaryingFitter().fit(df, id_col="id", event_col="event", start_col="start",
                                     stop_col="stop")
    ours = CoxPH().fit(df, duration="stop", event="event", covariates=cols, start="start",
                       id="id")
    np.testing.assert_allclose(ours.params_, ref.params_[cols], atol=1e-6)
    np.testing.assert_allclose(ours.summary["se"], ref.standard_errors_[cols], atol=1e-6)
    assert ours.n_ == df["id"].nunique()


def test_splitting_follow_up_leaves_the_fit_unchanged(rossi, rossi_fit):
    # Fact of the trade: a Cox fit on (start, stop] pieces of the same follow-up, covariates
    # constant, equals the fit on whole follow-up (the partial likelihood only sees risk sets).
    pieces = []
    for lo, hi in [(0, 10), (10, 30), (30, 60)]:
        part = rossi[rossi["week"] > lo].copy()
        part["start"] = float(lo)
        part["stop"] = np.minimum(part["week"], hi).astype(float)
        part["event"] = np.where(part["week"] <= hi, part["arrest"], 0)
        part["pid"] = part.index
        pieces.append(part)
    long = pd.concat(pieces, ignore_index=True)
    split = CoxPH().fit(long, duration="stop", event="event", covariates=ROSSI_TERMS,
                        start="start", id="pid")
    np.testing.assert_allclose(split.params_, rossi_fit.params_, atol=1e-8)
    np.testing.assert_allclose(split.summary["se"], rossi_fit.summary["se"], atol=1e-8)
    assert split.n_ == 432


def test_cause_specific_equals_recoding_other_causes_as_censored():
    df = _untied(17)
    df["cause"] = df["event"] * np.where(df["x1"] > 0, 1, 2)
    cols = ["x0", "x1", "x2"]
    a = CoxPH(event_of_interest=2).fit(df, duration="time", event="cause", covariates=cols)
    b = CoxPH().fit(df.assign(e2=(df["cause"] == 2).astype(int)), duration="time", event="e2",
                    covariates=cols)
    np.testing.assert_allclose(a.params_, b.params_, atol=1e-12)
    with pytest.raises(DataError, match="event_of_interest"):
        CoxPH().fit(df, duration="time", event="cause", covariates=cols)


def test_concordance_equals_lifelines(rossi):
    ref = CoxPHFitter().fit(rossi, "week", "arrest")
    ours = CoxPH(concordance=True).fit(rossi, duration="week", event="arrest",
                                       covariates=ROSSI_TERMS)
    assert ours.concordance_ == pytest.approx(ref.concordance_index_, abs=1e-9)


def test_baseline_cumulative_hazard_equals_lifelines(rossi, rossi_fit):
    # Oracle: lifelines' Breslow baseline cumulative hazard (at the covariate means).
    ref = CoxPHFitter().fit(rossi, "week", "arrest").baseline_cumulative_hazard_
    ours = rossi_fit.baseline_cumulative_hazard_.set_index("time")["cumulative_hazard"]
    np.testing.assert_allclose(ours, ref.loc[ours.index].iloc[:, 0], rtol=1e-6)


def test_polars_input_equals_pandas(rossi, rossi_fit):
    ours = CoxPH().fit(pl.from_pandas(rossi), duration="week", event="arrest",
                       covariates=ROSSI_TERMS)
    pd.testing.assert_frame_equal(ours.summary, rossi_fit.summary)


def test_constant_and_missing_covariates_are_data_errors(rossi):
    with pytest.raises(DataError, match="constant"):
        CoxPH().fit(rossi.assign(k=1.0), duration="week", event="arrest", covariates=["k", "fin"])
    bad = rossi.assign(age=rossi["age"].where(rossi.index % 50 != 0))
    with pytest.raises(DataError, match="9 of 432"):
        CoxPH().fit(bad, duration="week", event="arrest", covariates=["age"])


def test_split_counting_process_carries_values_forward():
    # Worked by hand: person A followed (0, 10], PR measured at 0 (150), 4 (210), 12 (after
    # exit, ignored); person B entered at age-like time 50 with a reading at 45 (carried in).
    persons = pd.DataFrame({"pid": ["A", "B"], "t0": [0.0, 50.0], "t1": [10.0, 60.0],
                            "status": [1, 0]})
    changes = pd.DataFrame({"pid": ["A", "A", "A", "B", "B"], "at": [0.0, 4.0, 12.0, 45.0, 55.0],
                            "pr": [150.0, 210.0, 230.0, 170.0, 190.0]})
    out = split_counting_process(persons, changes, id="pid", entry="t0", exit="t1",
                                 event="status", time="at", values=["pr"])
    expected = pd.DataFrame({"pid": ["A", "A", "B", "B"], "start": [0.0, 4.0, 50.0, 55.0],
                             "stop": [4.0, 10.0, 55.0, 60.0], "status": [0, 1, 0, 0],
                             "pr": [150.0, 210.0, 170.0, 190.0]})
    pd.testing.assert_frame_equal(out, expected, check_dtype=False)


def test_time_updated_cox_on_split_data_recovers_truth():
    # Simulated truth: hazard exp(0.7 z(t)), z switches from 0 to 1 at a known time; the
    # episodes from split_counting_process must give an estimate close to 0.7.
    rng = np.random.default_rng(99)
    n = 4000
    switch = rng.uniform(0, 2, n)
    u = rng.exponential(1, n)
    # Inverse of the cumulative hazard H(t) = t (t < s) or s + e^0.7 (t - s).
    t = np.where(u < switch, u, switch + (u - switch) / np.exp(0.7))
    c = rng.uniform(0.5, 3, n)
    persons = pd.DataFrame({"id": np.arange(n), "entry": 0.0, "exit": np.minimum(t, c),
                            "event": (t <= c).astype(int)})
    changes = pd.concat([pd.DataFrame({"id": np.arange(n), "time": 0.0, "z": 0.0}),
                         pd.DataFrame({"id": np.arange(n), "time": switch, "z": 1.0})])
    long = split_counting_process(persons, changes, id="id", entry="entry", exit="exit",
                                  event="event", time="time", values=["z"])
    fit = CoxPH().fit(long, duration="stop", event="event",
                      covariates=["z"], start="start", id="id")
    est, se = fit.params_["z"], fit.summary["se"].iloc[0]
    assert abs(est - 0.7) < 3 * se
