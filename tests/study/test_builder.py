"""Cohort builder invariants on a tiny hand-made registry (fictional Heronsgate Clinic).

Each person is a scenario whose expected first exclusion reason, endpoint status and times
were worked out by hand from the dates below (day counts by calendar arithmetic).
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import polars as pl
import pytest

from cohort.study.builder import ATTRITION_COLUMNS, COUNTING_COLUMNS, ENDPOINT_COLUMNS

from .conftest import build

ENDPOINTS = """
[endpoints.hgb]
event = "higher_grade_block"
source = "either"
competing = ["death"]
censor_at = ["pm"]
[endpoints.pm]
event = "pacemaker"
competing = ["death"]
[endpoints.death]
event = "death"
[endpoints.first_degree]
event = "first_degree_block"
competing = ["death"]
[endpoints.combo]
any_of = ["hgb", "pm"]
competing = ["death"]
"""

EXCLUSIONS = """
[exclusions]
pacemaker_before_index = true
higher_grade_before_index = "either"
af_at_index = true
qrs_at_least_ms = 120
min_followup_days = 30
"""

# Expected first failed criterion of each person (None = included).
EXPECTED_REASON = {
    "P01": None, "P02": "index_ecg", "P03": "pacemaker_before_index",
    "P04": "higher_grade_before_index", "P05": "af_at_index", "P06": "qrs_at_least_ms",
    "P07": "min_followup_days", "P08": "age", "P09": None, "P10": None, "P11": None,
    "P12": None, "P13": None, "P14": None, "P15": "higher_grade_before_index",
}


@pytest.fixture
def scenario(tiny):
    """Fifteen persons, one scenario each; phenotyped with default-v1."""
    t = tiny
    t.person("P01", "1950-03-01")  # normal, later first-degree, later block
    t.ecg("P01", "2012-01-10")
    t.ecg("P01", "2014-05-01", pr=230)
    t.block("P01", "2016-07-01")
    t.person("P02")  # no ECG
    t.person("P03")  # implant and a higher-grade block code before the first ECG
    t.implant("P03", "2010-01-01")
    t.diagnosis("P03", "2009-06-01")
    t.ecg("P03", "2012-01-01")
    t.person("P04")  # block on the index ECG
    t.block("P04", "2013-03-03")
    t.person("P05")  # atrial fibrillation at index
    t.af("P05", "2013-03-03")
    t.ecg("P05", "2014-03-03")
    t.person("P06")  # wide QRS at index
    t.ecg("P06", "2013-03-03", qrs=130)
    t.person("P07", death="2013-03-13")  # dies 10 days after index
    t.ecg("P07", "2013-03-03")
    t.person("P08", "1997-06-01")  # 16 at index
    t.ecg("P08", "2013-06-01")
    t.person("P09", "1948-01-01", "M")  # higher-grade block by diagnosis code after index
    t.ecg("P09", "2011-01-01")
    t.diagnosis("P09", "2012-01-01")
    t.block("P09", "2012-06-01")
    t.person("P10", "1940-01-01", death="2015-01-01")  # death, no event: competing
    t.ecg("P10", "2012-01-01")
    t.person("P11")  # first-degree block at index: prevalent for that endpoint
    t.ecg("P11", "2012-01-01", pr=230)
    t.person("P12")  # implant after index, block later: censored at the implant for hgb
    t.ecg("P12", "2012-01-01")
    t.implant("P12", "2013-01-01")
    t.block("P12", "2014-01-01")
    t.person("P13")  # block 20 days after index: inside a 30-day lag
    t.ecg("P13", "2012-01-01")
    t.block("P13", "2012-01-21")
    t.person("P14", death="2015-05-05")  # implant on the day of death: the event wins the tie
    t.ecg("P14", "2012-01-01")
    t.implant("P14", "2015-05-05")
    t.person("P15")  # higher-grade block by diagnosis code before index
    t.diagnosis("P15", "2011-01-01")
    t.ecg("P15", "2012-01-01")
    t.phenotype()
    return t


def _build(t, extra: str = "", follow_up: str = "", analyses: str | None = None):
    body = "[population]\nindex = \"first_ecg\"\n" + EXCLUSIONS + extra + ENDPOINTS + follow_up
    return build(t.con, body, analyses or '[[analyses]]\nkind = "incidence"\n')


def _row(frames, person: str, endpoint: str) -> dict:
    rows = frames.endpoints.filter((pl.col("person_key") == person) & (pl.col("endpoint") == endpoint))
    assert rows.height == 1
    return rows.row(0, named=True)


def _days(a: str, b: str) -> int:
    return (dt.date.fromisoformat(b) - dt.date.fromisoformat(a)).days


def test_one_row_per_included_person_and_first_reasons(scenario):
    f = _build(scenario)
    assert f.persons["person_key"].n_unique() == f.persons.height
    included = sorted(k for k, v in EXPECTED_REASON.items() if v is None)
    assert sorted(f.persons["person_key"].to_list()) == included


def test_attrition_steps_add_up_and_each_person_has_one_first_reason(scenario):
    f = _build(scenario)
    a = f.attrition
    assert tuple(a.columns) == ATTRITION_COLUMNS
    assert a["criterion"].to_list() == [
        "registry", "index_ecg", "index_within_followup", "age", "pacemaker_before_index",
        "higher_grade_before_index", "af_at_index", "qrs_at_least_ms", "min_followup_days",
    ]
    # n_remaining of each step is n_before of the next, and the excluded add up.
    assert a["n_remaining"].to_list()[:-1] == a["n_before"].to_list()[1:]
    assert a["n_before"][0] - a["n_excluded"].sum() == a["n_remaining"][-1] == f.persons.height
    assert a["n_before"][0] == len(EXPECTED_REASON)
    counts = dict(zip(a["criterion"], a["n_excluded"], strict=True))
    for reason in {r for r in EXPECTED_REASON.values() if r}:
        expected = sum(1 for r in EXPECTED_REASON.values() if r == reason)
        assert counts[reason] == expected, reason


def test_order_of_exclusions_decides_the_first_reason(scenario):
    # P03 has both a pacemaker and a block before index: the first listed step is its reason.
    body = "[exclusions]\nhigher_grade_before_index = true\npacemaker_before_index = true\n"
    f = build(scenario.con, body)
    counts = dict(zip(f.attrition["criterion"], f.attrition["n_excluded"], strict=True))
    assert counts["higher_grade_before_index"] == 3  # P03, P04, P15
    assert counts["pacemaker_before_index"] == 0


def test_exit_after_entry_and_no_event_on_or_before_index(scenario):
    f = _build(scenario)
    e = f.endpoints
    assert tuple(e.columns) == ENDPOINT_COLUMNS
    at_risk = e.filter(pl.col("at_risk"))
    assert (at_risk["stop_day"] > at_risk["start_day"]).all()
    assert (at_risk["exit_age"] > at_risk["entry_age"]).all()
    assert e.filter(~pl.col("at_risk"))["status"].null_count() == e.filter(~pl.col("at_risk")).height
    # P11 has first-degree block on the index ECG: not at risk, not an event.
    r = _row(f, "P11", "first_degree")
    assert (r["at_risk"], r["not_at_risk"], r["status"]) == (False, "event_before_entry", None)
    # P01: first-degree block on 2014-05-01, index 2012-01-10.
    r = _row(f, "P01", "first_degree")
    assert (r["status"], r["stop_day"]) == (1, _days("2012-01-10", "2014-05-01"))


def test_sources_of_higher_grade_block(scenario):
    f = _build(scenario)
    assert f.spec.endpoints["hgb"].source == "either"
    # P09: diagnosis code on 2012-01-01 precedes the block ECG of 2012-06-01 (source either).
    r = _row(f, "P09", "hgb")
    assert (r["status"], r["stop_day"]) == (1, _days("2011-01-01", "2012-01-01"))
    body = ("[population]\nindex = \"first_ecg\"\n[endpoints.hgb]\nevent = \"higher_grade_block\"\n"
            "source = \"ecg\"\n")
    g = build(scenario.con, body, '[[analyses]]\nkind = "incidence"\n')
    r = _row(g, "P09", "hgb")
    assert (r["status"], r["stop_day"]) == (1, _days("2011-01-01", "2012-06-01"))


def test_competing_censoring_composites_and_ties(scenario):
    f = _build(scenario)
    # P10 dies 2015-01-01 without an event: competing (status 2) for hgb and pm.
    for ep in ("hgb", "pm", "combo"):
        r = _row(f, "P10", ep)
        assert (r["status"], r["stop_day"]) == (2, _days("2012-01-01", "2015-01-01")), ep
    # Death is an event of the death endpoint itself.
    assert _row(f, "P10", "death")["status"] == 1
    # P12: implant 2013-01-01 censors hgb (block on 2014-01-01 not counted) ...
    r = _row(f, "P12", "hgb")
    assert (r["status"], r["stop_day"]) == (0, _days("2012-01-01", "2013-01-01"))
    # ... and is the event of pm and of the composite.
    assert _row(f, "P12", "pm")["status"] == 1
    r = _row(f, "P12", "combo")
    assert (r["status"], r["stop_day"]) == (1, _days("2012-01-01", "2013-01-01"))
    # P14: implant on the day of death: the endpoint's own event wins the tie.
    r = _row(f, "P14", "pm")
    assert (r["status"], r["stop_day"]) == (1, _days("2012-01-01", "2015-05-05"))
    # Censored persons end at their follow-up end (2024-12-31).
    r = _row(f, "P01", "pm")
    assert (r["status"], r["stop_day"]) == (0, _days("2012-01-10", "2024-12-31"))


def test_lag_period_removes_early_events(scenario):
    no_lag = _row(_build(scenario), "P13", "hgb")
    assert (no_lag["status"], no_lag["stop_day"]) == (1, 20)
    lag = _build(scenario, follow_up="[follow_up]\nlag_days = 30\n")
    r = _row(lag, "P13", "hgb")
    assert (r["at_risk"], r["not_at_risk"]) == (False, "event_before_entry")
    at_risk = lag.endpoints.filter(pl.col("at_risk"))
    assert (at_risk["start_day"] == 30).all()
    assert (at_risk["stop_day"] > 30).all()


def test_horizon_and_end_date_truncate_follow_up(scenario):
    f = _build(scenario, follow_up="[follow_up]\nhorizon_years = 2\n")
    horizon = round(2 * 365.25)
    at_risk = f.endpoints.filter(pl.col("at_risk"))
    assert at_risk["stop_day"].max() <= horizon
    # P01's first-degree block came 842 days after index, beyond 2 years: censored at 731.
    r = _row(f, "P01", "first_degree")
    assert (r["status"], r["stop_day"]) == (0, horizon)
    g = _build(scenario, follow_up="[follow_up]\nend_date = 2013-01-01\n")
    r = _row(g, "P01", "pm")
    assert (r["status"], r["stop_day"]) == (0, _days("2012-01-10", "2013-01-01"))


def test_age_time_scale_has_late_entry(scenario):
    f = _build(scenario, follow_up="[follow_up]\ntime_scale = \"age\"\nlag_days = 10\n")
    ef = f.endpoint_frame("pm")
    expected_entry = (ef["age"] * 365.25 + 10) / 365.25
    assert np.allclose(ef["entry"].to_numpy(), expected_entry.to_numpy())
    assert (ef["exit"] > ef["entry"]).all()
    assert np.allclose((ef["exit"] - ef["entry"]).to_numpy(), ef["person_years"].to_numpy())


def test_counting_process_intervals_are_contiguous(scenario):
    body = ("[population]\nindex = \"first_assessable_pr\"\n[exposure]\nkind = \"pr_time_updated\"\n"
            + ENDPOINTS)
    f = build(scenario.con, body, '[[analyses]]\nkind = "incidence"\n')
    for ep in ("hgb", "first_degree", "combo"):
        cp = f.counting_process(ep)
        assert tuple(cp.columns) == COUNTING_COLUMNS
        spans = f.endpoints.filter((pl.col("endpoint") == ep) & pl.col("at_risk"))
        assert set(cp["person_key"]) == set(spans["person_key"])
        for (key,), part in cp.partition_by("person_key", as_dict=True).items():
            span = spans.filter(pl.col("person_key") == key).row(0, named=True)
            start, stop = part["start_day"].to_list(), part["stop_day"].to_list()
            assert start[0] == span["start_day"] and stop[-1] == span["stop_day"]
            assert start[1:] == stop[:-1]  # contiguous, no overlap
            assert all(a < b for a, b in zip(start, stop, strict=True))
            assert part["event"].to_list()[:-1] == [0] * (part.height - 1)
            assert part["event"][-1] == span["status"]
    # P01: PR 160 at index, 230 on 2014-05-01 (day 842); block on day 1634 is the last stop.
    p01 = f.counting_process("hgb").filter(pl.col("person_key") == "P01")
    assert p01["start_day"].to_list() == [0, 842]
    assert p01["pr_ms"].to_list() == [160.0, 230.0]
    assert p01["exposure"].to_list() == [0.0, 3.5]  # (PR - 160) / 20


def test_index_kinds_and_population_filters(scenario):
    # P05's first ECG is atrial fibrillation: with first_assessable_pr its index moves on.
    f = build(scenario.con, "[population]\nindex = \"first_assessable_pr\"\n")
    p05 = f.persons.filter(pl.col("person_key") == "P05").row(0, named=True)
    assert p05["index_date"] == dt.date(2014, 3, 3) and p05["pr_usable"]
    # P04 has only a block ECG (no measurable PR): no index ECG.
    assert "P04" not in f.persons["person_key"].to_list()
    g = build(scenario.con, "[population]\nindex = \"first_ecg_in_window\"\n"
              "index_window = [2014-01-01, 2014-12-31]\nsex = [\"F\"]\n")
    assert sorted(g.persons["person_key"]) == ["P01", "P05", "P12"]
    steps = dict(zip(g.attrition["criterion"], g.attrition["n_excluded"], strict=True))
    assert steps["sex"] == 0  # P09 (male) has no ECG in 2014: excluded earlier, at index_ecg
    assert (g.persons["index_date"] >= dt.date(2014, 1, 1)).all()
    h = build(scenario.con, "[population]\ncalendar_window = [2012-01-01, 2012-12-31]\nage_below = 70\n")
    assert (h.persons["index_year"] == 2012).all()
    assert (h.persons["age_completed"] < 70).all()


def test_exposure_categories_and_missing_exposure_step(scenario):
    body = ("[exposure]\nkind = \"pr_category\"\n"
            "levels = { normal = [\"normal_pr\"], prolonged = [\"first_degree\", \"marked_first_degree\"] }\n"
            "reference = \"normal\"\n")
    f = build(scenario.con, body)
    assert f.attrition["criterion"][-1] == "exposure_missing"
    mapping = dict(zip(f.persons["person_key"], f.persons["exposure"], strict=True))
    assert mapping["P11"] == "prolonged" and mapping["P01"] == "normal"
    # P04 (block at index) and P05 (AF at index) have no PR category: excluded at that step.
    assert "P04" not in mapping and "P05" not in mapping
    assert f.exposure.levels == ("normal", "prolonged") and f.exposure.reference == "normal"


def test_run_refuses_a_cohort_without_persons(scenario, tmp_path):
    from cohort.errors import DataError
    from cohort.study import parse_spec, run_spec

    from .conftest import spec_text

    spec = parse_spec(spec_text('[population]\nsites = ["Nowhere Clinic"]\n'))
    with pytest.raises(DataError, match=r"no person of the registry.s 15 .*index_ecg -1, site -14"):
        run_spec(spec, scenario.con, tmp_path / "out")
