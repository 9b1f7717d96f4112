"""Kaplan-Meier: published 6-MP values and lifelines KaplanMeierFitter as oracles."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from lifelines import KaplanMeierFitter
from lifelines.datasets import load_leukemia

from cohort.errors import DataError
from cohort.stats import KaplanMeier
from cohort.stats.kaplan_meier import COMPETING_WARNING


@pytest.fixture(scope="module")
def six_mp() -> pd.DataFrame:
    leuk = load_leukemia()
    return leuk[leuk["Rx"] == 0].reset_index(drop=True)


def test_lifelines_treatment_arm_is_the_6mp_arm(six_mp):
    # Freireich EJ et al. (1963) Blood 21:699: 6-MP arm has 21 patients, 9 relapses at
    # 6,6,6,7,10,13,16,22,23 weeks (as tabulated in Cox & Oakes 1984, Table 1.1).
    assert len(six_mp) == 21
    relapses = sorted(six_mp.loc[six_mp["status"] == 1, "t"].tolist())
    assert relapses == [6, 6, 6, 7, 10, 13, 16, 22, 23]


def test_6mp_survival_and_greenwood_se(six_mp):
    # S(t): Cox DR & Oakes D (1984) Analysis of Survival Data, Table 4.1; Greenwood SE: Klein JP
    # & Moeschberger ML (2003) Survival Analysis, Table 4.1B (values as quoted in
    # shared/references.md).
    published = {6: (0.8571, 0.076), 7: (0.8067, 0.087), 10: (0.7529, 0.096),
                 13: (0.6902, 0.107), 16: (0.6275, 0.114), 22: (0.5378, 0.128),
                 23: (0.4482, 0.135)}
    km = KaplanMeier().fit(six_mp, duration="t", event="status")
    got = km.survival_at(list(published))
    np.testing.assert_allclose(got["estimate"], [v[0] for v in published.values()], atol=1e-4)
    np.testing.assert_allclose(got["se"], [v[1] for v in published.values()], atol=1e-3)


def test_6mp_log_log_limits(six_mp):
    # R survival survfit(conf.type="log-log"), as quoted in shared/references.md.
    km = KaplanMeier(ci="log-log").fit(six_mp, duration="t", event="status")
    got = km.survival_at([6, 23])
    np.testing.assert_allclose(got["lower"], [0.6197, 0.1881], atol=1e-4)
    np.testing.assert_allclose(got["upper"], [0.9516, 0.6801], atol=1e-4)


def _random_frame(seed: int, n: int = 400, entry: bool = True) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    t = np.round(rng.exponential(10, n), 1) + 0.1  # rounded: plenty of ties
    c = np.round(rng.exponential(15, n), 1) + 0.1
    df = pd.DataFrame({"time": np.minimum(t, c), "event": (t <= c).astype(int),
                       "w": rng.uniform(0.5, 2.0, n)})
    if entry:
        df["entry"] = np.minimum(rng.exponential(2, n), df["time"] * 0.9)
    return df


@pytest.mark.filterwarnings("ignore:It looks like your weights")
@pytest.mark.parametrize("use_entry", [False, True])
@pytest.mark.parametrize("use_weights", [False, True])
def test_matches_lifelines_kaplan_meier(use_entry, use_weights):
    # Oracle: lifelines KaplanMeierFitter (Greenwood variance, log(-log) "exponential
    # Greenwood" interval), with delayed entry and case weights.
    df = _random_frame(3)
    kw = {"entry": "entry" if use_entry else None, "weights": "w" if use_weights else None}
    ours = KaplanMeier().fit(df, duration="time", event="event", **kw)
    ref = KaplanMeierFitter().fit(df["time"], df["event"],
                                  entry=df["entry"] if use_entry else None,
                                  weights=df["w"] if use_weights else None)
    times = np.unique(df["time"])
    got = ours.survival_at(times)
    # Where everyone left at risk has the event, S = 0 exactly; lifelines' weighted fit keeps
    # the previous value there (a quirk of its log-sum arithmetic), so compare before that.
    live = got["estimate"].to_numpy() > 0
    assert live[:-1].all()
    np.testing.assert_allclose(got["estimate"][live],
                               ref.survival_function_at_times(times).values[live], rtol=1e-10)
    if use_weights:
        return  # lifelines truncates weighted numbers at risk to integers in its variance
    ci = ref.confidence_interval_survival_function_.loc[times]
    ok = got["estimate"].to_numpy() < 1
    np.testing.assert_allclose(got["lower"].to_numpy()[ok], ci.iloc[:, 0].to_numpy()[ok],
                               rtol=1e-8)
    np.testing.assert_allclose(got["upper"].to_numpy()[ok], ci.iloc[:, 1].to_numpy()[ok],
                               rtol=1e-8)


def test_at_risk_table_matches_lifelines_event_table(six_mp):
    # Oracle: lifelines' event table (at_risk at a time, observed/censored in (prev, time]).
    km = KaplanMeier().fit(six_mp, duration="t", event="status")
    tab = km.at_risk_table([6, 10, 20, 35])
    ref = KaplanMeierFitter().fit(six_mp["t"], six_mp["status"]).event_table
    np.testing.assert_array_equal(tab["n_at_risk"], ref.loc[[6, 10, 20, 35], "at_risk"])
    cum_obs = ref["observed"].cumsum()
    cum_cens = ref["censored"].cumsum()
    np.testing.assert_array_equal(tab["events"], np.diff(np.r_[0, cum_obs.loc[[6, 10, 20, 35]]]))
    np.testing.assert_array_equal(tab["censored"],
                                  np.diff(np.r_[0, cum_cens.loc[[6, 10, 20, 35]]]))
    # A time before any exit: everyone at risk, nothing happened yet.
    first = km.at_risk_table([0]).iloc[0]
    assert (first["n_at_risk"], first["events"], first["censored"]) == (21, 0, 0)


def test_plain_and_log_intervals_follow_their_formulas(six_mp):
    # Textbook formulas (Klein & Moeschberger 2003, sec. 4.3): plain S +/- z se, log
    # S exp(+/- z se / S).
    z = 1.959963984540054
    plain = KaplanMeier(ci="plain").fit(six_mp, duration="t", event="status").survival_at([13])
    log = KaplanMeier(ci="log").fit(six_mp, duration="t", event="status").survival_at([13])
    s, se = plain["estimate"].iloc[0], plain["se"].iloc[0]
    assert plain["lower"].iloc[0] == pytest.approx(s - z * se)
    assert log["upper"].iloc[0] == pytest.approx(s * np.exp(z * se / s))


def test_competing_codes_warn_and_label_risk_naive():
    df = pd.DataFrame({"t": [1, 2, 3, 4, 5, 6.0], "e": [1, 2, 0, 1, 2, 0]})
    with pytest.warns(UserWarning, match="overstates"):
        km = KaplanMeier().fit(df, duration="t", event="e")
    terms = set(km.summary["term"])
    assert terms == {"survival", "risk_naive"}
    # Cause 2 is censored: S after t=1 is 5/6, after t=4 (3 at risk) 5/6 * 2/3.
    s = km.survival_at([1, 4])["estimate"].to_numpy()
    np.testing.assert_allclose(s, [5 / 6, 5 / 6 * 2 / 3])
    assert "1 - KM" in COMPETING_WARNING


def test_declared_competing_event_warns_even_without_codes():
    df = pd.DataFrame({"t": [1, 2, 3.0], "e": [1, 0, 1]})
    with pytest.warns(UserWarning, match="competing"):
        km = KaplanMeier(competing_event_present=True).fit(df, duration="t", event="e")
    assert "risk_naive" in set(km.summary["term"])
    plain = KaplanMeier().fit(df, duration="t", event="e")
    assert "risk" in set(plain.summary["term"])


def test_groups_equal_separate_fits():
    df = _random_frame(5, entry=False)
    df["arm"] = np.where(np.arange(len(df)) % 3 == 0, "A", "B")
    both = KaplanMeier().fit(df, duration="time", event="event", group="arm").summary
    for arm in ("A", "B"):
        alone = KaplanMeier().fit(df[df["arm"] == arm], duration="time", event="event").summary
        mine = both[both["group"] == arm].reset_index(drop=True)
        np.testing.assert_allclose(mine["estimate"], alone["estimate"])


def test_entry_not_before_exit_is_a_data_error():
    df = pd.DataFrame({"t": [1.0, 2.0, 3.0], "e": [1, 0, 1], "s": [0.0, 2.0, 4.0]})
    with pytest.raises(DataError, match="2 rows"):
        KaplanMeier().fit(df, duration="t", event="e", entry="s")


def test_unknown_ci_kind_is_rejected():
    with pytest.raises(ValueError, match="ci="):
        KaplanMeier(ci="arcsine")
