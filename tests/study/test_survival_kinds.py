"""Wiring of the survival analysis kinds (cohort.study.survival_kinds): every kind runs on a
small synthetic registry with its documented columns and re-runs byte-identically; each kind
gives what its estimator (and, where one exists, a reference library) gives on the study
frames; hand-made registries pin the ECG intervals and the multi-state paths; impossible
options are refused with the key and line. The estimators are tested in tests/stats."""

from __future__ import annotations

import re
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import polars as pl
import pytest
from lifelines import CoxPHFitter, CoxTimeVaryingFitter, KaplanMeierFitter
from lifelines.utils import add_covariate_to_timeline

import cohort.study.survival_kinds as sk  # registers the kinds
from cohort.errors import SpecError
from cohort.stats import AalenJohansen, AbsoluteRisk, CoxPH, FineGray, rcs_basis
from cohort.study import build_cohort, parse_spec, run_spec
from cohort.study.analyses import ANALYSIS_KINDS, AnalysisContext, run_analysis
from cohort.study.spec import DAYS_PER_YEAR

from .conftest import build, spec_text

ROOT = Path(__file__).resolve().parents[2]

SPEC = """
[population]
index = "first_assessable_pr"
[exclusions]
pacemaker_before_index = true
higher_grade_before_index = "either"
min_followup_days = 1
[exposure]
kind = "pr_category"
[follow_up]
horizon_years = 10
[endpoints.higher_grade]
event = "higher_grade_block"
source = "ecg"
competing = ["death"]
censor_at = ["pacemaker"]
[endpoints.pacemaker]
event = "pacemaker"
competing = ["death"]
[endpoints.death]
event = "death"
[covariates]
at_index = ["age", "sex", "bundle_branch_block"]
[variants.lag90]
lag_days = 90
"""

EVERY_KIND = """
[[analyses]]
kind = "kaplan_meier"
name = "km"
endpoint = "higher_grade"
[[analyses]]
kind = "cumulative_incidence"
name = "cif"
endpoint = "pacemaker"
[[analyses]]
kind = "cox"
name = "cox_spline"
endpoint = "pacemaker"
exposure = "spline"
n_knots = 4
[[analyses]]
kind = "fine_gray"
name = "fine_gray"
endpoint = "pacemaker"
exposure = "spec"
[[analyses]]
kind = "time_updated_cox"
name = "time_updated"
endpoint = "pacemaker"
exposure = "per_ms"
time_updated_events = ["higher_grade_block"]
[[analyses]]
kind = "interval_censored"
name = "interval"
endpoint = "higher_grade"
group = "none"
n_boot = 5
[[analyses]]
kind = "multistate"
name = "states"
n_boot = 5
[[analyses]]
kind = "absolute_risk"
name = "risk"
endpoint = "pacemaker"
n_boot = 5
[[analyses]]
kind = "landmark"
name = "landmark"
endpoint = "pacemaker"
events_at_landmark = ["higher_grade_block"]
"""


@pytest.fixture(scope="module")
def registry(tmp_path_factory) -> dict:
    """A synthetic registry of 3,000 invented persons (seed 23), phenotyped with the rule sets
    the shipped specs use."""
    from cohort.ingest import ingest
    from cohort.phenotype import run_phenotype
    from cohort.registry import connect
    from synthetic_registry import generate

    root = tmp_path_factory.mktemp("survival_kinds")
    generate(root / "exports", persons=3000, seed=23, fmt="parquet")
    db = root / "registry.duckdb"
    con = connect(db)
    try:
        ingest(con, [root / "exports"])
        for rules in ("default-v1", "pr220-v1"):
            run_phenotype(con, rules)
    finally:
        con.close()
    return {"db": db, "root": root, "exports": root / "exports"}


@pytest.fixture(scope="module")
def frames(registry):
    con = duckdb.connect(str(registry["db"]), read_only=True)
    spec = parse_spec(spec_text(SPEC, EVERY_KIND), Path("test.toml"))
    yield build_cohort(con, spec, "main")
    con.close()


def kind_output(frames, analysis: str) -> dict[str, pl.DataFrame]:
    """Run one [[analyses]] entry (TOML text) on the built frames."""
    spec = parse_spec(spec_text(SPEC, analysis), Path("test.toml"))
    return run_analysis(AnalysisContext(frames, spec.analyses[0]))


def _files(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*.csv"))}


# --------------------------------------------------------------------------- every kind


@pytest.fixture(scope="module")
def every_kind_runs(registry, tmp_path_factory):
    path = tmp_path_factory.mktemp("spec") / "every_kind.toml"
    path.write_text(spec_text(SPEC, EVERY_KIND), encoding="utf-8")
    out = tmp_path_factory.mktemp("every_kind")
    first = run_spec(path, registry["db"], out / "a")
    second = run_spec(path, registry["db"], out / "b")
    return first, second


def test_every_kind_reruns_byte_identically(every_kind_runs):
    first, second = every_kind_runs
    a, b = _files(first.out_dir), _files(second.out_dir)
    assert a and a.keys() == b.keys()
    assert [k for k in a if a[k] != b[k]] == []


def test_every_kind_writes_its_declared_columns(every_kind_runs):
    result = every_kind_runs[0]
    for analysis in result.spec.analyses:
        kind = ANALYSIS_KINDS[analysis.kind]
        first_part = next(iter(kind.parts))
        for i, (part, columns) in enumerate(kind.parts.items()):
            name = f"{analysis.name}.csv" if i == 0 else f"{analysis.name}_{part}.csv"
            path = result.out_dir / "tables" / name
            if part == first_part or part != "hr_curve" or analysis.name == "cox_spline":
                assert path.is_file(), name
                header = path.read_text(encoding="utf-8").splitlines()[0].split(",")
                assert header == ["variant", *columns], name
                assert len(path.read_text(encoding="utf-8").splitlines()) > 1, f"{name} is empty"


def test_outputs_hold_no_person_identifiers(every_kind_runs, registry):
    ids = pl.read_parquet(registry["exports"] / "persons.parquet")["person_id"].to_list()
    text = "\n".join(p.read_text(encoding="utf-8")
                     for p in (every_kind_runs[0].out_dir / "tables").glob("*.csv"))
    assert not any(pid in text for pid in ids[::10])


def test_summary_warns_that_one_minus_km_overstates_risk(every_kind_runs):
    summary = "\n".join(every_kind_runs[0].summary)
    assert "risk_naive" in summary and "overstates the risk" in summary


@pytest.mark.parametrize("name", ["progression.toml", "pacemaker.toml"])
def test_shipped_specs_run(name, registry, tmp_path):
    """The shipped specs, with bootstrap replicates cut to 5 for speed."""
    text = re.sub(r"n_boot = \d+", "n_boot = 5", (ROOT / "analyses" / name).read_text("utf-8"))
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    result = run_spec(path, registry["db"], tmp_path / "out")
    for analysis in result.spec.analyses:
        table = result.out_dir / "tables" / f"{analysis.name}.csv"
        rows = table.read_text(encoding="utf-8").splitlines()
        assert len(rows) > 1
        assert {r.split(",")[0] for r in rows[1:]} == {v.name for v in result.spec.variants}


# --------------------------------------------------------------------------- regression wiring


def _manual_design(frames, endpoint: str) -> pd.DataFrame:
    """PR per 20 ms (centred at 160 ms), age and male sex, built here from the frame."""
    ef = frames.endpoint_frame(endpoint).filter(pl.col("sex") != "U").to_pandas()
    ef["pr_per_20ms"] = (ef["pr_ms"] - 160.0) / 20.0
    ef["sex[M]"] = (ef["sex"] == "M").astype(float)
    ef["event"] = (ef["status"] == 1).astype(int)
    return ef


def test_cox_kind_equals_coxph_and_lifelines_on_the_endpoint_frame(frames):
    out = kind_output(frames, '[[analyses]]\nkind = "cox"\nendpoint = "pacemaker"\n'
                              'exposure = "per_ms"\ncovariates = ["age", "sex"]\n')
    coef = out["coefficients"].to_pandas().set_index("term")
    ef = _manual_design(frames, "pacemaker")
    terms = ["pr_per_20ms", "age", "sex[M]"]
    direct = CoxPH(event_of_interest=1).fit(ef, duration="exit", event="status",
                                            covariates=terms).summary.set_index("term")
    assert list(coef.index) == terms
    np.testing.assert_allclose(coef["estimate"], direct["estimate"], rtol=0, atol=1e-12)
    np.testing.assert_allclose(coef["se"], direct["se"], rtol=0, atol=1e-12)
    # Reference library: lifelines CoxPHFitter (Efron ties), Davidson-Pilon C (2019) JOSS 4:1317.
    ll = CoxPHFitter().fit(ef[["exit", "event", *terms]], duration_col="exit", event_col="event")
    np.testing.assert_allclose(coef["estimate"], ll.params_[terms], rtol=0, atol=1e-6)
    np.testing.assert_allclose(coef["se"], ll.standard_errors_[terms], rtol=1e-5)
    assert (coef["n"] == len(ef)).all()
    assert (coef["events"] == ef["event"].sum()).all()


@pytest.mark.filterwarnings("ignore::lifelines.exceptions.ConvergenceWarning")  # no short-PR events
def test_cox_categories_use_the_spec_reference(frames):
    out = kind_output(frames, '[[analyses]]\nkind = "cox"\nendpoint = "pacemaker"\n'
                              'exposure = "spec"\ncovariates = ["age"]\n')
    coef = out["coefficients"].to_pandas()
    levels = coef.loc[coef["term"].str.startswith("exposure["), ["term", "reference"]]
    assert levels["reference"].eq("normal_pr").all()
    assert list(levels["term"]) == ["exposure[short_pr]", "exposure[first_degree]"]
    ef = frames.endpoint_frame("pacemaker").to_pandas()
    for level in ("short_pr", "first_degree"):
        ef[f"exposure[{level}]"] = (ef["exposure"] == level).astype(float)
    ef["event"] = (ef["status"] == 1).astype(int)
    cols = ["exposure[short_pr]", "exposure[first_degree]", "age"]
    ll = CoxPHFitter().fit(ef[["exit", "event", *cols]], duration_col="exit", event_col="event")
    est = coef.set_index("term")["estimate"]
    fitted = [c for c in cols if np.isfinite(est[c])]  # a level without events is blanked
    np.testing.assert_allclose(est[fitted], ll.params_[fitted], atol=1e-5)


def test_spline_curve_is_one_at_160_ms_and_matches_lifelines(frames):
    out = kind_output(frames, '[[analyses]]\nkind = "cox"\nendpoint = "pacemaker"\n'
                              'exposure = "spline"\nknots = [130, 150, 170, 210]\n'
                              'covariates = ["age"]\ncurve_range_ms = [120, 260]\n')
    curve = out["hr_curve"].to_pandas()
    at_ref = curve.loc[curve["pr_ms"] == 160]
    assert at_ref["hr"].item() == pytest.approx(1.0, abs=1e-12)  # HR(ref) = 1 by definition
    assert at_ref["se"].item() == pytest.approx(0.0, abs=1e-12)
    assert curve["pr_ms"].iloc[0] == 120 and curve["pr_ms"].iloc[-1] == 260
    ef = frames.endpoint_frame("pacemaker").to_pandas()
    knots = [130.0, 150.0, 170.0, 210.0]
    basis = rcs_basis(ef["pr_ms"], knots)
    names = ["b0", "b1", "b2"]
    for j, n in enumerate(names):
        ef[n] = basis[:, j]
    ef["event"] = (ef["status"] == 1).astype(int)
    ll = CoxPHFitter().fit(ef[["exit", "event", *names, "age"]], duration_col="exit",
                           event_col="event")
    contrast = rcs_basis(curve["pr_ms"], knots) - rcs_basis([160.0], knots)
    np.testing.assert_allclose(curve["log_hr"], contrast @ ll.params_[names].to_numpy(), atol=1e-5)


def test_fine_gray_kind_equals_finegray(frames):
    out = kind_output(frames, '[[analyses]]\nkind = "fine_gray"\nendpoint = "pacemaker"\n'
                              'exposure = "per_ms"\ncovariates = ["age", "sex"]\n')
    coef = out["coefficients"].to_pandas().set_index("term")
    ef = _manual_design(frames, "pacemaker")
    direct = FineGray(event_of_interest=1).fit(ef, duration="exit", event="status",
                                               covariates=["pr_per_20ms", "age", "sex[M]"])
    np.testing.assert_allclose(coef["estimate"], direct.summary["estimate"], atol=1e-12)
    np.testing.assert_allclose(coef["se"], direct.summary["se"], atol=1e-12)
    assert (coef["model"] == "fine_gray").all()


def test_time_updated_cox_matches_lifelines_time_varying_fit(frames):
    out = kind_output(frames, '[[analyses]]\nkind = "time_updated_cox"\nendpoint = "pacemaker"\n'
                              'exposure = "per_ms"\ncovariates = []\n'
                              'time_updated_events = ["first_degree_block"]\n')
    coef = out["coefficients"].to_pandas().set_index("term")
    # Independent split: lifelines.utils.add_covariate_to_timeline adds the block indicator
    # to the counting-process frame of the study (PR carried forward by sql/study). (A
    # higher-grade block would be a poor oracle case: its HR for pacemaker is in the hundreds
    # and lifelines' Newton steps overflow there.)
    cp = frames.counting_process("pacemaker").to_pandas()
    cp = cp.assign(start=cp["start_day"] / DAYS_PER_YEAR, stop=cp["stop_day"] / DAYS_PER_YEAR,
                   pr=(cp["pr_ms"] - 160.0) / 20.0, event=(cp["event"] == 1))
    base = cp[["person_key", "start", "stop", "pr", "event"]]
    onsets = sk._onset_days(AnalysisContext(frames, frames.spec.analyses[0]),
                            ["first_degree_block"]).to_pandas()
    onsets = onsets[onsets["person_key"].isin(set(base["person_key"]))]
    cv = pd.DataFrame({"person_key": onsets["person_key"],
                       "duration": np.maximum(onsets["day"], 0) / DAYS_PER_YEAR,
                       "block": 1.0})
    long = add_covariate_to_timeline(base, cv, id_col="person_key", duration_col="duration",
                                     event_col="event", start_col="start", stop_col="stop")
    long["block"] = long["block"].fillna(0.0)
    ll = CoxTimeVaryingFitter().fit(long[["person_key", "start", "stop", "event", "pr", "block"]],
                                    id_col="person_key", event_col="event", start_col="start",
                                    stop_col="stop")
    assert coef.loc["pr_per_20ms", "estimate"] == pytest.approx(ll.params_["pr"], abs=1e-5)
    assert coef.loc["first_degree_block", "estimate"] == pytest.approx(ll.params_["block"], abs=1e-5)
    assert coef.loc["pr_per_20ms", "se_naive"] == pytest.approx(ll.standard_errors_["pr"], rel=1e-4)
    assert coef.loc["pr_per_20ms", "n"] == cp["person_key"].nunique()  # clusters = persons


def test_split_at_events_switches_on_after_the_event_day():
    """(start, stop] intervals: an event on day d is 0 on (a, d] and 1 from d on (the
    predictable-covariate convention of counting processes, Andersen & Gill 1982)."""
    intervals = pl.DataFrame({"person_key": ["A", "A", "B"], "start_day": [0, 100, 0],
                              "stop_day": [100, 300, 50], "event": [0, 1, 0],
                              "pr_ms": [150.0, 170.0, 200.0], "heart_rate": [60.0, 61.0, 70.0]})
    onsets = pl.DataFrame({"person_key": ["A", "B"], "event_kind": ["pacemaker", "pacemaker"],
                           "day": [200, -5]})
    out = sk.split_at_events(intervals, onsets, ["pacemaker"])
    assert out.rows() == [
        ("A", 0, 100, 0, 150.0, 60.0, 0.0),
        ("A", 100, 200, 0, 170.0, 61.0, 0.0),
        ("A", 200, 300, 1, 170.0, 61.0, 1.0),
        ("B", 0, 50, 0, 200.0, 70.0, 1.0),
    ]


# --------------------------------------------------------------------------- curves


def test_km_kind_matches_lifelines_and_labels_the_risk_naive(frames):
    out = kind_output(frames, '[[analyses]]\nkind = "kaplan_meier"\nendpoint = "higher_grade"\n'
                              'group = "none"\ntimes = [1, 2, 5]\n')
    at = out["at_times"].to_pandas()
    assert set(at["term"]) == {"survival", "risk_naive"}
    ef = frames.endpoint_frame("higher_grade").to_pandas()
    # Reference: lifelines KaplanMeierFitter, log(-log) intervals (Kalbfleisch & Prentice).
    km = KaplanMeierFitter().fit(ef["exit"], ef["status"] == 1)
    days = sk.whole_days([1, 2, 5])
    surv = at[at["term"] == "survival"].sort_values("time")
    np.testing.assert_allclose(surv["estimate"], km.survival_function_at_times(days), atol=1e-12)
    ci = km.confidence_interval_survival_function_
    lower = [ci.iloc[ci.index.searchsorted(d, side="right") - 1, 0] for d in days]
    np.testing.assert_allclose(surv["lower"], lower, atol=1e-6)
    risk = at[at["term"] == "risk_naive"].sort_values("time")
    np.testing.assert_allclose(risk["estimate"], 1 - surv["estimate"].to_numpy(), atol=1e-15)
    table = out["at_risk"].to_pandas()
    expected = [int((ef["exit"] >= d).sum()) for d in days]
    assert table["n_at_risk"].astype(int).tolist() == expected


def test_cumulative_incidence_at_last_time_equals_aalen_johansen(frames):
    out = kind_output(frames, '[[analyses]]\nkind = "cumulative_incidence"\n'
                              'endpoint = "pacemaker"\ngroup = "exposure"\n')
    curve = out["curve"].to_pandas()
    ef = frames.endpoint_frame("pacemaker").to_pandas()
    aj = AalenJohansen(cause_names={1: "pacemaker", 2: "death"}).fit(
        ef, duration="exit", event="status", group="exposure")
    direct = aj.summary
    for (group, term), part in curve.groupby(["group", "term"]):
        last = part.sort_values("time").iloc[-1]
        ref = direct[(direct["group"] == group) & (direct["term"] == term)].iloc[-1]
        assert last["time"] == ref["time"]
        assert last["estimate"] == pytest.approx(ref["estimate"], abs=1e-14)
        assert last["se"] == pytest.approx(ref["se"], abs=1e-14)
    assert list(dict.fromkeys(curve["group"])) == ["short_pr", "normal_pr", "first_degree"]
    # All-cause identity of the Aalen-Johansen estimator (Aalen & Johansen 1978): the causes'
    # incidences add up to 1 - KM of any event; KM from lifelines as the reference.
    all_cause = KaplanMeierFitter().fit(ef["exit"], ef["status"] > 0)
    total = aj.cumulative_incidence_at([5.0]).groupby("group")["estimate"].sum()
    by_group = {g: KaplanMeierFitter().fit(p["exit"], p["status"] > 0).survival_function_at_times(5.0).item()
                for g, p in ef.groupby("exposure")}
    for g, value in total.items():
        assert value == pytest.approx(1 - by_group[g], abs=1e-12)
    assert all_cause.survival_function_at_times(5.0).item() > 0
    gray = out["gray_test"].to_pandas()
    assert list(gray["term"]) == ["pacemaker", "death"] and (gray["df"] == 2).all()


def test_multistate_competing_case_equals_cumulative_incidence(frames):
    ms = kind_output(frames, '[[analyses]]\nkind = "multistate"\nmodel = "competing"\n'
                             'endpoint = "higher_grade"\nn_boot = 0\n')["occupation"].to_pandas()
    cif = kind_output(frames, '[[analyses]]\nkind = "cumulative_incidence"\n'
                              'endpoint = "higher_grade"\ngroup = "none"\n')["curve"].to_pandas()
    for state in ("higher_grade", "death"):
        occ = ms[ms["state"] == state].sort_values("time")
        ref = cif[cif["term"] == state].sort_values("time")
        idx = np.searchsorted(ref["time"].to_numpy(), occ["time"].to_numpy(), side="right") - 1
        np.testing.assert_allclose(occ["estimate"], ref["estimate"].to_numpy()[idx], atol=1e-12)


def test_absolute_risk_kind_equals_absolute_risk(frames):
    out = kind_output(frames, '[[analyses]]\nkind = "absolute_risk"\nendpoint = "pacemaker"\n'
                              'profile_ages = [60, 75]\nprofile_pr_ms = [160, 240]\nn_boot = 0\n')
    risk = out["risk"].to_pandas()
    ef = _manual_design(frames, "pacemaker")
    profiles = pd.DataFrame({"pr_per_20ms": [0.0, 4.0], "age": [75.0, 75.0], "sex[M]": [1.0, 1.0]})
    direct = AbsoluteRisk(horizons=[5.0, 10.0], cause_names={1: "pacemaker", 2: "death"}).fit(
        ef, duration="exit", event="status", covariates=["pr_per_20ms", "age", "sex[M]"],
        profiles=profiles).summary
    mine = risk[(risk["age"] == 75) & (risk["sex"] == "M")].sort_values(["cause", "time", "pr_ms"])
    ref = direct.sort_values(["term", "time", "profile"])
    np.testing.assert_allclose(mine["estimate"], ref["estimate"], atol=1e-12)
    assert (mine.groupby(["cause", "pr_ms"])["estimate"].diff().dropna() >= 0).all()  # 10 y >= 5 y


def test_landmark_at_index_is_the_cox_model_with_pr_of_the_index_day(frames):
    """At landmark 0 with a window as long as the horizon, the landmark model is the Cox
    model of the endpoint frame, with PR as carried forward on day 0: the last measurable
    PR of the index day (sql/study/counting_process.sql), not always the index ECG's."""
    lm = kind_output(frames, '[[analyses]]\nkind = "landmark"\nlandmarks = [0]\n'
                             'window_years = 10\nendpoint = "pacemaker"\nexposure = "per_ms"\n'
                             'covariates = ["age", "sex"]\n')["coefficients"].to_pandas()
    cp = frames.counting_process("pacemaker").filter(pl.col("interval") == 1)
    ef = _manual_design(frames, "pacemaker").drop(columns=["pr_per_20ms"])
    day0 = cp.select("person_key", ((pl.col("pr_ms") - 160.0) / 20.0).alias("pr_per_20ms")).to_pandas()
    ef = ef.merge(day0, on="person_key", how="left")
    direct = CoxPH(event_of_interest=1).fit(ef, duration="exit", event="status",
                                            covariates=["pr_per_20ms", "age", "sex[M]"])
    np.testing.assert_allclose(lm["estimate"], direct.summary["estimate"], atol=1e-10)
    assert (lm["n"] == len(ef)).all()


# --------------------------------------------------------------------------- hand-made registries

TINY_BODY = """
[population]
index = "first_assessable_pr"
[endpoints.higher_grade]
event = "higher_grade_block"
source = "ecg"
competing = ["death"]
[endpoints.death]
event = "death"
"""


def test_ecg_intervals_from_last_ecg_without_to_first_ecg_with(tiny):
    a = tiny.person("A", end="2020-12-31")
    tiny.ecg(a, "2015-01-01")
    tiny.ecg(a, "2015-06-01")  # day 151: last gradable ECG without the block
    tiny.af(a, "2015-09-01")  # atrial fibrillation: AV conduction not gradable
    tiny.block(a, "2016-01-01")  # day 365: first ECG with the block
    b = tiny.person("B", end="2020-12-31")
    tiny.ecg(b, "2015-01-01")
    tiny.ecg(b, "2016-01-01")  # day 365: last ECG, never a block
    tiny.phenotype()
    frames = build(tiny.con, TINY_BODY, '[[analyses]]\nkind = "interval_censored"\n'
                   'endpoint = "higher_grade"\nn_boot = 0\n')
    ctx = AnalysisContext(frames, frames.spec.analyses[0])
    rows = sk._intervals(ctx, "higher_grade", "last_ecg").sort("person_key")
    assert rows.select("left_day", "right_day", "n_ecg").rows() == [(151, 365, 1), (365, None, 1)]
    to_end = sk._intervals(ctx, "higher_grade", "end_of_follow_up").sort("person_key")
    assert to_end["left"][1] == pytest.approx(2191 / DAYS_PER_YEAR)  # 2015-01-01 -> 2020-12-31
    out = run_analysis(ctx)
    summary = out["intervals"].row(0, named=True)
    assert (summary["persons"], summary["events_seen"], summary["right_censored"]) == (2, 1, 1)
    assert summary["median_width_years"] == pytest.approx((365 - 151) / DAYS_PER_YEAR)


def test_conduction_states_follow_the_worst_state_so_far(tiny):
    a = tiny.person("A", death="2016-02-05")  # day 400
    tiny.ecg(a, "2015-01-01")  # day 0: normal
    tiny.ecg(a, "2015-04-11", pr=240)  # day 100: first-degree block
    tiny.block(a, "2015-07-20")  # day 200: third-degree block
    tiny.implant(a, "2015-07-30")  # day 210: pacemaker
    b = tiny.person("B", end="2016-12-31")
    tiny.ecg(b, "2015-01-01")
    tiny.ecg(b, "2015-02-20", pr=230)  # day 50: first-degree
    tiny.ecg(b, "2015-03-22")  # day 80: normal again; the worst state so far stays
    tiny.phenotype()
    frames = build(tiny.con, TINY_BODY, '[[analyses]]\nkind = "multistate"\nn_boot = 0\n')
    ctx = AnalysisContext(frames, frames.spec.analyses[0])
    rows, left_out = sk._conduction_sojourns(ctx, {"mobitz_i_as": "first_degree"})
    got = rows.sort("person_key", "sojourn").select("person_key", "from_state", "to_state",
                                                     "start_day", "stop_day").rows()
    assert got == [
        ("A", "normal", "first_degree", 0, 100),
        ("A", "first_degree", "higher_grade", 100, 200),
        ("A", "higher_grade", "pacemaker", 200, 210),
        ("A", "pacemaker", "death", 210, 400),
        ("B", "normal", "first_degree", 0, 50),
        ("B", "first_degree", None, 50, 730),
    ]
    assert left_out == 0
    counts = run_analysis(ctx)["transitions"].to_pandas()
    assert counts.loc[(counts["from_state"] == "pacemaker") & (counts["to_state"] == "death"),
                      "count"].item() == 1


# --------------------------------------------------------------------------- refused options


def _line_of(text: str, needle: str) -> int:
    return next(i for i, line in enumerate(text.splitlines(), start=1) if needle in line)


REFUSED = [
    ("unknown option", SPEC, '[[analyses]]\nkind = "cox"\nendpoint = "pacemaker"\nknot = [1]\n',
     "knot = ", ["unknown key 'knot'", "did you mean 'knots'"]),
    ("fine_gray on the age scale", SPEC.replace("horizon_years = 10", 'time_scale = "age"'),
     '[[analyses]]\nkind = "fine_gray"\nendpoint = "pacemaker"\n', 'kind = "fine_gray"',
     ["no delayed entry", "time_since_index"]),
    ("spline of a categorical exposure", SPEC.replace('index = "first_assessable_pr"',
                                                      'index = "first_ecg"'),
     '[[analyses]]\nkind = "cox"\nendpoint = "pacemaker"\nexposure = "spline"\n',
     'exposure = "spline"', ["needs PR in ms", "categorical"]),
    ("knots with a categorical exposure", SPEC,
     '[[analyses]]\nkind = "cox"\nendpoint = "pacemaker"\nknots = [120, 160, 200]\n',
     "knots = ", ["knots applies only to exposure = 'spline'", "categorical (pr_category)"]),
    ("interval censoring of a diagnosis", SPEC.replace('source = "ecg"', 'source = "either"'),
     '[[analyses]]\nkind = "interval_censored"\nendpoint = "higher_grade"\n',
     'endpoint = "higher_grade"', ["not dated by an ECG", 'source = "ecg"']),
    ("an event that ends follow-up as a time-updated state", SPEC,
     '[[analyses]]\nkind = "time_updated_cox"\nendpoint = "pacemaker"\nexposure = "per_ms"\n'
     'time_updated_events = ["pacemaker"]\n', "time_updated_events", ["could never be 1"]),
    ("exposure groups of a continuous exposure", SPEC.replace('kind = "pr_category"',
                                                               'kind = "pr_continuous"'),
     '[[analyses]]\nkind = "kaplan_meier"\nendpoint = "pacemaker"\ngroup = "exposure"\n',
     'group = "exposure"', ["needs exposure groups", "pr_continuous"]),
    ("adjusting for follow-up length", SPEC,
     '[[analyses]]\nkind = "cox"\nendpoint = "pacemaker"\n'
     'covariates = ["age", "possible_followup_years"]\n', "covariates", ["conditions on the outcome"]),
    ("a time-updated exposure as baseline", SPEC.replace('kind = "pr_category"',
                                                          'kind = "pr_time_updated"'),
     '[[analyses]]\nkind = "cox"\nendpoint = "pacemaker"\n', "[[analyses]]",  # default key: its table
     ["time_updated_cox", "changes after index"]),
    ("conduction states on the age scale", SPEC.replace("horizon_years = 10", 'time_scale = "age"'),
     '[[analyses]]\nkind = "multistate"\n', 'kind = "multistate"', ["time_since_index"]),
    ("a profile younger than the population", SPEC,
     '[[analyses]]\nkind = "absolute_risk"\nendpoint = "pacemaker"\nprofile_ages = [10, 60]\n',
     "profile_ages", ["outside the study's ages", "extrapolate"]),
]


@pytest.mark.parametrize("body,analysis,needle,parts", [r[1:] for r in REFUSED],
                         ids=[r[0] for r in REFUSED])
def test_impossible_options_are_refused_with_key_and_line(body, analysis, needle, parts):
    text = spec_text(body, analysis)
    with pytest.raises(SpecError) as err:
        parse_spec(text, Path("test.toml"))
    message = str(err.value)
    lines = [i for i, line in enumerate(text.splitlines(), start=1) if needle in line]
    assert lines and message.startswith(f"test.toml, line {lines[-1]}:"), message
    for part in parts:
        assert part in message, message
