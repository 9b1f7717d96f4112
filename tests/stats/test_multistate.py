"""Multi-state Aalen-Johansen: equality with AalenJohansen, complete data, Nelson-Aalen."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from lifelines import NelsonAalenFitter

from cohort.errors import DataError
from cohort.stats import AalenJohansen, MultiState

STATES = ["normal", "first_degree", "higher_grade", "pacemaker", "death"]
ALLOWED = [("normal", "first_degree"), ("first_degree", "higher_grade"),
           ("higher_grade", "pacemaker"), ("normal", "death"), ("first_degree", "death"),
           ("higher_grade", "death"), ("pacemaker", "death")]


def _competing(seed: int, n: int = 500) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    t = rng.integers(1, 40, n).astype(float)  # integer times: many ties across causes
    cause = rng.integers(0, 3, n)
    return pd.DataFrame({"id": np.arange(n), "time": t, "cause": cause})


def _illness_death(seed: int, n: int, censor: bool) -> pd.DataFrame:
    """Fictional progression normal -> first_degree -> higher_grade -> pacemaker, death."""
    rng = np.random.default_rng(seed)
    rows = []
    for pid in range(n):
        t, state = 0.0, "normal"
        c = rng.uniform(2, 12) if censor else np.inf
        while state != "death":
            nxt = [k for h, k in ALLOWED if h == state]
            if not nxt:
                break
            times = rng.exponential(4, len(nxt))
            j = int(np.argmin(times))
            stop = t + times[j]
            if stop > c:
                rows.append((pid, state, None, t, c))
                break
            rows.append((pid, state, nxt[j], t, stop))
            t, state = stop, nxt[j]
    return pd.DataFrame(rows, columns=["id", "from", "to", "start", "stop"])


def test_competing_risk_special_case_equals_aalen_johansen():
    df = _competing(1)
    aj = AalenJohansen().fit(df, duration="time", event="cause").curves_["all"]
    long = pd.DataFrame({"id": df["id"], "from": "event_free",
                         "to": np.array([None, "cause1", "cause2"], dtype=object)[df["cause"]],
                         "start": 0.0, "stop": df["time"]})
    ms = MultiState(["event_free", "cause1", "cause2"], n_boot=0).fit(
        long, id="id", from_state="from", to_state="to", start="start", stop="stop")
    occ = ms.occupation_at(aj.time)
    np.testing.assert_allclose(occ["cause1"], aj.cif[:, 0], rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(occ["cause2"], aj.cif[:, 1], rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(occ["event_free"], aj.survival, rtol=1e-12, atol=1e-15)


def test_complete_data_give_empirical_state_proportions():
    # Fact of the trade: without censoring the Aalen-Johansen estimator equals the empirical
    # proportion of persons in each state at each time.
    long = _illness_death(2, 300, censor=False)
    ms = MultiState(STATES, ALLOWED, n_boot=0).fit(long, id="id", from_state="from",
                                                   to_state="to", start="start", stop="stop")
    for t in (1.0, 3.0, 8.0):
        at = long[(long["start"] < t) & (long["stop"] >= t)]
        current = at.groupby("id")["from"].first()
        absorbed = long[long["stop"] < t].groupby("id").last()
        done = absorbed.loc[~absorbed.index.isin(current.index), "to"]
        empirical = pd.concat([current, done]).value_counts(normalize=True)
        got = ms.occupation_at([t]).iloc[0]
        for s in STATES:
            assert got[s] == pytest.approx(empirical.get(s, 0.0), abs=1e-12)


def test_nelson_aalen_equals_lifelines_for_one_transition():
    # Oracle: lifelines NelsonAalenFitter (nelson_aalen_smoothing=False) on normal -> death.
    df = _competing(3)
    long = pd.DataFrame({"id": df["id"], "from": "normal",
                         "to": np.where(df["cause"] > 0, "death", None), "start": 0.0,
                         "stop": df["time"]})
    ms = MultiState(["normal", "death"], n_boot=0).fit(long, id="id", from_state="from",
                                                       to_state="to", start="start", stop="stop")
    ref = NelsonAalenFitter(nelson_aalen_smoothing=False).fit(df["time"], df["cause"] > 0)
    h = ms.cumulative_hazard_
    np.testing.assert_allclose(h["cumulative_hazard"],
                               ref.cumulative_hazard_.loc[h["time"]].iloc[:, 0], rtol=1e-12)


def test_bootstrap_intervals_are_seeded_and_cover_the_estimate():
    long = _illness_death(4, 200, censor=True)
    kw = {"id": "id", "from_state": "from", "to_state": "to", "start": "start", "stop": "stop"}
    a = MultiState(STATES, ALLOWED, n_boot=30, seed=7).fit(long, **kw).summary
    b = MultiState(STATES, ALLOWED, n_boot=30, seed=7).fit(long, **kw).summary
    c = MultiState(STATES, ALLOWED, n_boot=30, seed=8).fit(long, **kw).summary
    pd.testing.assert_frame_equal(a, b)
    assert not np.allclose(a["se"], c["se"])
    inside = (a["lower"] <= a["estimate"] + 1e-12) & (a["estimate"] <= a["upper"] + 1e-12)
    assert inside.mean() > 0.95


def test_transition_counts_and_disallowed_transitions():
    long = _illness_death(5, 100, censor=True)
    ms = MultiState(STATES, ALLOWED, n_boot=0).fit(long, id="id", from_state="from",
                                                   to_state="to", start="start", stop="stop")
    counts = ms.transition_counts_
    assert counts["count"].sum() == len(long)
    bad = long.copy()
    bad.loc[bad.index[0], "to"] = "pacemaker"  # normal -> pacemaker is not allowed
    with pytest.raises(DataError, match="not allowed"):
        MultiState(STATES, ALLOWED, n_boot=0).fit(bad, id="id", from_state="from",
                                                  to_state="to", start="start", stop="stop")
