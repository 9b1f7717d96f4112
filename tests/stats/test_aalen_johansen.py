"""Aalen-Johansen cumulative incidence: lifelines on untied data, hand-worked ties, invariants.

Published checks on mgus2 (cmprsk::cuminc, Gray's test) and the left-truncated etm abortion
data live in tests/reference/test_survival_reference.py.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from lifelines import AalenJohansenFitter

from cohort.errors import DataError
from cohort.stats import AalenJohansen


def _untied(seed: int, n: int = 300, entry: bool = False) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    t1, t2, c = rng.exponential(8, n), rng.exponential(12, n), rng.exponential(15, n)
    t = np.minimum.reduce([t1, t2, c])
    cause = np.select([t == t1, t == t2], [1, 2], 0)
    df = pd.DataFrame({"time": t, "cause": cause})
    if entry:
        df["entry"] = t * rng.uniform(0, 0.5, n)
    return df


@pytest.mark.parametrize("use_entry", [False, True])
def test_matches_lifelines_on_untied_data(use_entry):
    # Oracle: lifelines AalenJohansenFitter (delta-method variance, Collett 2015 p.411;
    # log(-log F) interval). lifelines jitters tied times, so compare on continuous times only.
    df = _untied(11, entry=use_entry)
    ours = AalenJohansen().fit(df, duration="time", event="cause",
                               entry="entry" if use_entry else None)
    for cause in (1, 2):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ref = AalenJohansenFitter(calculate_variance=True).fit(
                df["time"], df["cause"], event_of_interest=cause,
                entry=df["entry"] if use_entry else None)
        times = np.sort(df["time"].to_numpy())
        got = ours.cumulative_incidence_at(times)
        got = got[got["term"] == f"cause_{cause}"]
        np.testing.assert_allclose(got["estimate"], ref.cumulative_density_.iloc[:, 0].loc[times],
                                   rtol=1e-10, atol=1e-12)
        var = ref.variance_.loc[times].to_numpy()
        fin = np.isfinite(var)  # lifelines divides by n - d = 0 at the last exit
        assert fin[:-1].all()
        np.testing.assert_allclose((got["se"] ** 2)[fin], var[fin], rtol=1e-8, atol=1e-14)
        ci = ref.confidence_interval_.loc[times]
        live = (got["estimate"].to_numpy() > 0) & fin
        lo = np.minimum(ci.iloc[:, 0], ci.iloc[:, 1]).to_numpy()[live]
        np.testing.assert_allclose(got["lower"].to_numpy()[live], lo, rtol=1e-7)


def test_ties_processed_together_by_hand():
    # Worked by hand (product-limit with all exits at a tied time taken together):
    # t=1: n=6, one of each cause -> S=4/6, F1=F2=1/6; t=2: n=4, cause 1 -> F1=1/6+4/6*1/4;
    # t=3: n=3, cause 2 and a censoring -> F2=1/6+1/2*1/3; t=4: n=1, cause 1 -> F1=1/3+1/3.
    df = pd.DataFrame({"t": [1, 1, 2, 3, 3, 4.0], "c": [1, 2, 1, 0, 2, 1]})
    aj = AalenJohansen().fit(df, duration="t", event="c")
    f = aj.cumulative_incidence_at([1, 2, 3, 4])
    np.testing.assert_allclose(f.loc[f.term == "cause_1", "estimate"], [1 / 6, 1 / 3, 1 / 3, 2 / 3])
    np.testing.assert_allclose(f.loc[f.term == "cause_2", "estimate"], [1 / 6, 1 / 6, 1 / 3, 1 / 3])


def test_order_of_tied_rows_does_not_matter():
    rng = np.random.default_rng(2)
    df = pd.DataFrame({"t": rng.integers(1, 20, 500).astype(float), "c": rng.integers(0, 3, 500)})
    a = AalenJohansen().fit(df, duration="t", event="c").summary
    b = AalenJohansen().fit(df.sample(frac=1, random_state=1), duration="t", event="c").summary
    pd.testing.assert_frame_equal(a, b)


def test_integer_weights_equal_duplicated_rows():
    rng = np.random.default_rng(4)
    df = pd.DataFrame({"t": rng.integers(1, 30, 200).astype(float), "c": rng.integers(0, 3, 200),
                       "w": rng.integers(1, 4, 200).astype(float)})
    weighted = AalenJohansen().fit(df, duration="t", event="c", weights="w").summary
    dup = df.loc[df.index.repeat(df["w"].astype(int))]
    plain = AalenJohansen().fit(dup, duration="t", event="c").summary
    np.testing.assert_allclose(weighted["estimate"], plain["estimate"], rtol=1e-12)
    np.testing.assert_allclose(weighted["se"], plain["se"], rtol=1e-10)


def test_cifs_and_survival_add_to_one():
    # Fact of the trade: S(t) + sum_k F_k(t) = 1 for the Aalen-Johansen estimator.
    df = _untied(7, entry=True)
    aj = AalenJohansen().fit(df, duration="time", event="cause", entry="entry")
    c = aj.curves_["all"]
    np.testing.assert_allclose(c.survival + c.cif.sum(axis=1), 1.0, atol=1e-12)


def test_aalen_and_delta_variances_agree_in_large_samples():
    # Both estimators are consistent for the same variance (Andersen et al. 1993, IV.4).
    df = _untied(9, n=20000)
    d = AalenJohansen(variance="delta").fit(df, duration="time", event="cause")
    a = AalenJohansen(variance="aalen").fit(df, duration="time", event="cause")
    fd, fa = d.cumulative_incidence_at([5, 10]), a.cumulative_incidence_at([5, 10])
    np.testing.assert_allclose(fd["se"], fa["se"], rtol=0.02)
    assert not np.allclose(fd["se"], fa["se"], rtol=1e-6)


def test_gray_test_is_near_null_for_identical_groups():
    df = _untied(3, n=400)
    both = pd.concat([df.assign(g="a"), df.assign(g="b")], ignore_index=True)
    res = AalenJohansen().fit(both, duration="time", event="cause", group="g").gray_test()
    np.testing.assert_allclose(res["statistic"], 0.0, atol=1e-10)
    assert list(res.columns) == ["term", "statistic", "df", "p", "n", "events"]


def test_gray_test_needs_groups():
    aj = AalenJohansen().fit(_untied(1), duration="time", event="cause")
    with pytest.raises(DataError, match="group"):
        aj.gray_test()


@pytest.mark.slow
def test_gray_test_size_under_the_null():
    # Under H0 the p-values are uniform: about 5% below 0.05 (Gray 1988, simulations).
    rng = np.random.default_rng(123)
    pvals = []
    for _ in range(400):
        df = _untied(int(rng.integers(1 << 30)), n=200)
        df["g"] = rng.integers(0, 2, len(df))
        pvals.append(AalenJohansen().fit(df, duration="time", event="cause", group="g")
                     .gray_test()["p"].iloc[0])
    assert 0.02 < np.mean(np.array(pvals) < 0.05) < 0.09


def test_no_events_is_a_data_error():
    df = pd.DataFrame({"t": [1.0, 2.0], "c": [0, 0]})
    with pytest.raises(DataError, match="no events"):
        AalenJohansen().fit(df, duration="t", event="c")


def test_cause_names_label_the_terms():
    df = _untied(5)
    aj = AalenJohansen(cause_names={1: "pacemaker", 2: "death"}).fit(
        df, duration="time", event="cause")
    assert set(aj.summary["term"]) == {"pacemaker", "death"}
