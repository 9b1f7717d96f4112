"""Turnbull NPMLE: reduction to Kaplan-Meier, brute-force likelihood maximization, lifelines."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from lifelines import KaplanMeierFitter
from lifelines.datasets import load_leukemia
from scipy import optimize

from cohort.errors import DataError
from cohort.stats import KaplanMeier, Turnbull
from cohort.stats.turnbull import innermost_intervals, log_likelihood


def _interval_data(seed: int, n: int) -> pd.DataFrame:
    # Inspection every ~1 time unit (like ECGs taken at visits): event seen between visits.
    rng = np.random.default_rng(seed)
    t = rng.weibull(1.5, n) * 3
    visits = np.cumsum(rng.uniform(0.5, 1.5, (n, 6)), axis=1)
    k = (visits < t[:, None]).sum(axis=1)
    left = np.where(k > 0, visits[np.arange(n), np.maximum(k - 1, 0)], 0.0)
    right = np.where(k < 6, visits[np.arange(n), np.minimum(k, 5)], np.inf)
    return pd.DataFrame({"left": np.round(left, 2), "right": np.round(right, 2)})


def test_exact_and_right_censored_data_give_kaplan_meier():
    # Efron B (1967): with exact and right-censored data the self-consistent NPMLE is the
    # Kaplan-Meier estimate. Data: 6-MP arm (Freireich et al. 1963, lifelines load_leukemia).
    leuk = load_leukemia()
    arm = leuk[leuk["Rx"] == 0]
    df = pd.DataFrame({"l": arm["t"].astype(float),
                       "r": np.where(arm["status"] == 1, arm["t"], np.inf)})
    tb = Turnbull(tol=1e-12).fit(df, left="l", right="r")
    km = KaplanMeier().fit(arm, duration="t", event="status")
    times = np.array([6, 7, 10, 13, 16, 22, 23, 30.0])
    np.testing.assert_allclose(tb.survival_at(times), km.survival_at(times)["estimate"],
                               atol=1e-9)


def test_innermost_intervals_by_hand():
    # Peto (1973) / Turnbull (1976): left ends immediately followed by right ends.
    # (0,2], (1,3], (4,6], (5,inf]  ->  innermost (1,2] and (5,6].
    lo, hi, a, b = innermost_intervals(np.array([0.0, 1, 4, 5]), np.array([2.0, 3, 6, np.inf]))
    np.testing.assert_array_equal(lo, [1, 5])
    np.testing.assert_array_equal(hi, [2, 6])
    np.testing.assert_array_equal(a, [0, 0, 1, 1])
    np.testing.assert_array_equal(b, [0, 0, 1, 1])


def test_matches_brute_force_likelihood_maximization():
    # Independent check: maximize sum log P(L_i < T <= R_i) over the simplex of masses on the
    # innermost intervals with scipy (softmax parameterization), compare log likelihoods.
    df = _interval_data(1, 60)
    tb = Turnbull(tol=1e-11).fit(df, left="left", right="right")
    lo, hi, a, b = innermost_intervals(df["left"].to_numpy(), df["right"].to_numpy())
    cover = np.zeros((len(df), lo.size))
    for i in range(len(df)):
        cover[i, a[i]:b[i] + 1] = 1

    def negll(theta):
        p = np.exp(theta - theta.max())
        p /= p.sum()
        return -np.sum(np.log(cover @ p))

    best = optimize.minimize(negll, np.zeros(lo.size), method="BFGS", options={"gtol": 1e-9})
    # The softmax parameterization is ill-conditioned where masses vanish, so the optimizer
    # may stop a little short of the maximum (by ~2e-6 with scipy 1.17): EM must be at least
    # as likely and close.
    assert tb.loglik_ >= -best.fun - 1e-9
    assert tb.loglik_ == pytest.approx(-best.fun, abs=1e-4)
    # Optimality certificate of the NPMLE (Gentleman & Geyer 1994, Biometrika 81:618-623,
    # recalled from memory): with d_j = sum_i cover_ij / P_i, d_j <= n for every innermost
    # interval, with equality where the mass is positive.
    p = tb.intervals_["probability"].to_numpy()
    d = cover.T @ (1.0 / (cover @ p))
    n = len(df)
    assert d.max() <= n * (1 + 1e-6)
    assert np.all(np.abs(d[p > 1e-6] / n - 1) <= 1e-6)


def test_at_least_as_likely_as_lifelines_interval_censoring():
    # Oracle: lifelines KaplanMeierFitter.fit_interval_censoring (closed intervals [L, R], so
    # (L, R] is passed as [L + eps, R]). lifelines stops its EM earlier, so its curve is close
    # but its likelihood is not higher than ours.
    df = _interval_data(2, 150)
    tb = Turnbull(tol=1e-10).fit(df, left="left", right="right")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = KaplanMeierFitter().fit_interval_censoring(df["left"] + 1e-6, df["right"])
    curve = ref.survival_function_["NPMLE_estimate_lower"]
    lo, hi, a, b = innermost_intervals(df["left"].to_numpy(), df["right"].to_numpy())

    def s_at(t: float) -> float:
        return float(curve[curve.index <= t].iloc[-1])

    mass = np.array([s_at(lft + 1e-6) - (s_at(rgt) if np.isfinite(rgt) else 0.0)
                     for lft, rgt in zip(lo, hi, strict=True)])
    their_ll = log_likelihood(mass / mass.sum(), a, b, np.ones(len(df)))
    assert tb.loglik_ >= their_ll - 1e-9
    assert tb.loglik_ - their_ll < 0.1
    grid = np.array([1.0, 2.0, 3.0, 4.0])
    theirs = np.array([s_at(t) for t in grid])
    ours = tb.survival_at(grid)
    ok = np.isfinite(ours)
    np.testing.assert_allclose(ours[ok], theirs[ok], atol=0.03)


def test_bootstrap_is_seeded():
    df = _interval_data(3, 80)
    a = Turnbull(n_boot=20, seed=5).fit(df, left="left", right="right").summary
    b = Turnbull(n_boot=20, seed=5).fit(df, left="left", right="right").summary
    pd.testing.assert_frame_equal(a, b)
    assert a["se"].notna().all()


def test_left_after_right_is_a_data_error():
    with pytest.raises(DataError, match="1 rows"):
        Turnbull().fit(pd.DataFrame({"l": [1.0, 3.0], "r": [2.0, 2.5]}), left="l", right="r")
