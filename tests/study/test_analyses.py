"""Wiring of the analysis kinds, checked against reference libraries and published formulas
on a small synthetic registry (the estimators themselves are tested in tests/stats)."""

from __future__ import annotations

from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import polars as pl
import pytest
import statsmodels.api as sm
from lifelines.utils import add_covariate_to_timeline, to_long_format
from scipy import stats
from statsmodels.stats import rates as sm_rates
from statsmodels.stats.proportion import proportion_confint

from cohort.study import build_cohort, parse_spec
from cohort.study.analyses import (
    ANALYSIS_KINDS,
    AnalysisContext,
    AnalysisKind,
    clipped_standard,
    register_kind,
    run_analysis,
)
from cohort.study.schema import REQUIRED, Key
from cohort.study.spec import PR_MEASURABLE_CATEGORIES

from .conftest import spec_text

SPEC = """
[population]
index = "first_assessable_pr"
[exclusions]
pacemaker_before_index = true
[exposure]
kind = "pr_category"
[follow_up]
horizon_years = 10
[endpoints.pacemaker]
event = "pacemaker"
competing = ["death"]
[endpoints.higher_grade]
event = "higher_grade_block"
source = "either"
competing = ["death"]
[endpoints.death]
event = "death"
[covariates]
at_index = ["age", "sex", "qrs_ms", "bundle_branch_block"]
"""
ANALYSES = """
[[analyses]]
kind = "prevalence"
name = "prev"
standards = ["european_2013"]
[[analyses]]
kind = "prevalence"
name = "prev_year"
basis = "calendar_year"
axes = ["av"]
strata = ["overall"]
standards = []
[[analyses]]
kind = "incidence"
name = "inc"
by = ["exposure", "age_band"]
ratios = ["exposure", "sex"]
[[analyses]]
kind = "table_one"
name = "t1"
"""


@pytest.fixture(scope="module")
def study(synthetic_db):
    con = duckdb.connect(str(synthetic_db["db"]), read_only=True)
    spec = parse_spec(spec_text(SPEC, ANALYSES), Path("wiring.toml"))
    frames = build_cohort(con, spec)
    out = {a.name: run_analysis(AnalysisContext(frames, a)) for a in spec.analyses}
    yield frames, out, con
    con.close()


def test_prevalence_intervals_match_statsmodels(study):
    frames, out, _ = study
    est = out["prev"]["estimates"]
    persons = frames.persons
    for method, sm_method in (("wilson", "wilson"), ("clopper_pearson", "beta")):
        rows = est.filter((pl.col("stratum") == "sex") & (pl.col("method") == method)
                          & (pl.col("axis") == "av"))
        for r in rows.iter_rows(named=True):
            # Independent count from the person frame.
            group = persons.filter(pl.col("sex") == r["sex"])
            assert r["n"] == group.height
            assert r["events"] == group.filter(pl.col("av_category") == r["category"]).height
            # Wilson EB 1927 / Clopper CJ & Pearson ES 1934, statsmodels proportion_confint.
            lo, hi = proportion_confint(r["events"], r["n"], alpha=0.05, method=sm_method)
            assert (r["lower"], r["upper"]) == pytest.approx((lo, hi), abs=1e-9)


def test_standardized_prevalence_matches_fay_feuer_by_hand(study):
    """European Standard Population 2013 (Eurostat 2013, per 100,000; references.md) restricted
    to 18+: 15-19 keeps 2/5 of 5500 (ages 18-19), 85+ = 1500 + 1000. Fay MP & Feuer EJ (1997)
    Stat Med 16:791-801 gamma limits computed here with scipy."""
    frames, out, _ = study
    esp = {15: 5500 * 2 / 5, 20: 6000, 25: 6000, 30: 6500, 35: 7000, 40: 7000, 45: 7000,
           50: 7000, 55: 6500, 60: 6000, 65: 5500, 70: 5000, 75: 4000, 80: 2500, 85: 2500}
    std, coverage, note = clipped_standard("european_2013", 85, 18, None)
    assert coverage == pytest.approx(sum(esp.values()) / 100_000)
    assert "15-19 cut to 18-19" in note
    p = frames.persons.with_columns(
        pl.col("age_completed").clip(upper_bound=85).alias("a"))
    lowers = np.array(sorted(esp))
    band = lowers[np.searchsorted(lowers, np.maximum(p["a"].to_numpy(), 18), side="right") - 1]
    p = p.with_columns(pl.Series("band", band))
    n = p.group_by("band").len().sort("band")
    x = p.filter(pl.col("av_category") == "first_degree").group_by("band").len()
    x = dict(x.iter_rows())
    s = np.array([esp[b] for b in n["band"]]) / sum(esp.values())
    nn = n["len"].to_numpy().astype(float)
    xx = np.array([x.get(b, 0) for b in n["band"]], dtype=float)
    w = s / nn
    y, v, wm = (w * xx).sum(), (w**2 * xx).sum(), w.max()
    lower = stats.gamma.ppf(0.025, y * y / v, scale=v / y)
    upper = stats.gamma.ppf(0.975, (y + wm) ** 2 / (v + wm**2), scale=(v + wm**2) / (y + wm))
    row = out["prev"]["standardized"].filter((pl.col("category") == "first_degree")
                                             & (pl.col("sex") == "all")).row(0, named=True)
    assert (row["estimate"], row["lower"], row["upper"]) == pytest.approx((y, lower, upper), rel=1e-9)
    assert row["coverage"] == pytest.approx(coverage)


def test_trend_matches_a_person_level_robust_poisson_fit(study):
    """Modified Poisson regression with robust variance (Zou G 2004, Am J Epidemiol
    159:702-706) fitted with statsmodels on one row per person-year."""
    frames, out, _ = study
    rows = frames.ecg_year()
    y = (rows["av_category"] == "first_degree").cast(pl.Float64).to_numpy()
    t = rows["year"].to_numpy().astype(float)
    fit = sm.GLM(y, sm.add_constant(t - t.mean()), family=sm.families.Poisson()).fit(cov_type="HC0")
    row = out["prev_year"]["trend"].filter((pl.col("category") == "first_degree")
                                           & (pl.col("sex") == "all")).row(0, named=True)
    assert row["slope"] == pytest.approx(fit.params[1], rel=1e-6)
    assert row["se"] == pytest.approx(fit.bse[1], rel=1e-6)
    assert row["estimate"] == pytest.approx(100 * np.expm1(fit.params[1]), rel=1e-6)


def test_incidence_rates_and_ratios_match_references(study):
    frames, out, _ = study
    rates = out["inc"]["rates"]
    ef = frames.endpoint_frame("pacemaker")
    events = int((ef["status"] == 1).sum())
    days = int((ef["stop_day"] - ef["start_day"]).sum())
    r = rates.filter((pl.col("endpoint") == "pacemaker") & (pl.col("stratum") == "overall")).row(0, named=True)
    assert (r["events"], r["person_years"]) == (events, pytest.approx(days / 365.25))
    # Exact Poisson limits, Garwood F (1936) Biometrika 28:437 (formula in references.md).
    py = days / 365.25
    assert r["lower"] == pytest.approx(stats.chi2.ppf(0.025, 2 * events) / 2 / py * 1000)
    assert r["upper"] == pytest.approx(stats.chi2.ppf(0.975, 2 * events + 2) / 2 / py * 1000)
    ratios = out["inc"]["rate_ratios"].filter((pl.col("endpoint") == "pacemaker")
                                              & (pl.col("variable") == "exposure"))
    assert set(ratios["reference"]) == {"normal_pr"}
    for rr in ratios.iter_rows(named=True):
        e1, t1, e0, t0 = rr["events"], rr["person_years"], rr["events_reference"], rr["person_years_reference"]
        assert rr["estimate"] == pytest.approx((e1 / t1) / (e0 / t0))
        # p: statsmodels test_poisson_2indep, method "exact-cond" (conditional binomial test).
        p = sm_rates.test_poisson_2indep(e1, t1, e0, t0, method="exact-cond", compare="ratio").pvalue
        assert rr["p"] == pytest.approx(p, rel=1e-9)
        # Limits: Clopper-Pearson limits of the conditional binomial share e1 / (e1 + e0)
        # mapped to the ratio (Breslow NE & Day NE 1987, Vol. II), statsmodels "beta".
        lo, hi = proportion_confint(e1, e1 + e0, method="beta")
        assert rr["lower"] == pytest.approx(lo / (1 - lo) * t0 / t1, rel=1e-9)
        assert rr["upper"] == pytest.approx(hi / (1 - hi) * t0 / t1, rel=1e-9)


def test_table_one_smd_matches_austin_formula(study):
    """SMD of a continuous variable, Austin PC (2009) Stat Med 28:3083-3107."""
    frames, out, _ = study
    t1 = out["t1"]["table"]
    p = frames.persons
    ref = p.filter(pl.col("exposure") == "normal_pr")["age"]
    grp = p.filter(pl.col("exposure") == "first_degree")["age"]
    expected = (grp.mean() - ref.mean()) / np.sqrt((grp.var() + ref.var()) / 2)
    row = t1.filter((pl.col("variable") == "age") & (pl.col("group") == "first_degree")
                    & (pl.col("statistic") == "mean"))
    assert row["smd"][0] == pytest.approx(expected, rel=1e-9)


def test_counting_process_matches_lifelines(study):
    """Time-updated PR against lifelines.utils.add_covariate_to_timeline (reference library):
    same intervals once consecutive intervals with equal PR are merged (lifelines splits only
    where the value changes)."""
    frames, _, con = study
    spec = parse_spec(spec_text(SPEC.replace('kind = "pr_category"', 'kind = "pr_time_updated"'),
                                '[[analyses]]\nkind = "incidence"\n'), Path("tu.toml"))
    f = build_cohort(con, spec)
    ours = f.counting_process("higher_grade").to_pandas()
    ef = f.endpoint_frame("higher_grade").to_pandas()
    base = pd.DataFrame({"id": ef["person_key"], "duration": ef["stop_day"], "event": ef["status"] > 0})
    con.register("tu_index", f.persons.select("person_key", "index_date").to_arrow())
    readings = con.sql(
        "SELECT e.person_key AS id, date_diff('day', i.index_date, CAST(e.acquired_at AS DATE)) AS t, "
        "e.pr_ms, e.acquired_at, e.ecg_key FROM ecg_conduction e JOIN tu_index i USING (person_key) "
        "WHERE e.rule_set_id = 'default-v1' AND e.pr_assessable AND e.pr_ms IS NOT NULL "
        "AND list_contains($cats, e.av_category)", params={"cats": list(PR_MEASURABLE_CATEGORIES)}
    ).df()
    con.unregister("tu_index")
    readings = (readings.sort_values(["id", "t", "acquired_at", "ecg_key"])
                .groupby(["id", "t"]).tail(1)[["id", "t", "pr_ms"]])
    theirs = add_covariate_to_timeline(to_long_format(base, duration_col="duration"), readings,
                                       id_col="id", duration_col="t", event_col="event")
    a = _merge_equal(theirs.rename(columns={"id": "person_key", "start": "start_day",
                                            "stop": "stop_day"}).assign(event=lambda d: d["event"].astype(int)))
    b = _merge_equal(ours.assign(event=lambda d: (d["event"] > 0).astype(int)))
    assert len(a) == len(b) > 1000
    assert (a.to_numpy() == b.to_numpy()).all()


def _merge_equal(df: pd.DataFrame) -> pd.DataFrame:
    df = df[["person_key", "start_day", "stop_day", "event", "pr_ms"]].sort_values(
        ["person_key", "start_day"]).reset_index(drop=True)
    df = df.astype({"start_day": int, "stop_day": int})
    new = (df["person_key"] != df["person_key"].shift()) | (df["pr_ms"] != df["pr_ms"].shift())
    df["run"] = new.cumsum()
    return df.groupby("run").agg(person_key=("person_key", "first"), start_day=("start_day", "first"),
                                 stop_day=("stop_day", "last"), event=("event", "last"),
                                 pr_ms=("pr_ms", "first")).reset_index(drop=True)


def test_lexis_split_matches_an_independent_birthday_count(study):
    """Person-days per attained-age band recomputed in plain Python from birthdays (Lexis
    expansion: Clayton D & Hills M 1993, Statistical Models in Epidemiology, ch. 6, recalled
    from memory)."""
    import datetime as dt

    frames, _, _ = study
    edges = [18, 40, 60, 80]
    lex = frames.lexis(edges).filter(pl.col("endpoint") == "death")
    ef = frames.endpoint_frame("death").head(300)
    got = {(r["person_key"], r["age_lower"]): r["days"] for r in lex.iter_rows(named=True)}
    for r in ef.iter_rows(named=True):
        start = r["index_date"] + dt.timedelta(days=r["start_day"])
        stop = r["index_date"] + dt.timedelta(days=r["stop_day"])
        birth = r["birth_date"]
        cuts = [_birthday(birth, e) for e in edges] + [dt.date.max]
        total = 0
        for i, e in enumerate(edges):
            days = (min(stop, cuts[i + 1]) - max(start, cuts[i])).days
            if days > 0:
                assert got[(r["person_key"], e)] == days
                total += days
        assert total == r["stop_day"] - r["start_day"]


def _birthday(birth, years: int):
    try:
        return birth.replace(year=birth.year + years)
    except ValueError:  # 29 February in a common year: 28 February (as DuckDB adds years)
        return birth.replace(year=birth.year + years, day=28)


def test_a_new_kind_plugs_in(study):
    frames, _, _ = study

    def persons_at_risk(ctx, options):
        ef = ctx.frames.endpoint_frame(options["endpoint"])
        return {"counts": pl.DataFrame({"endpoint": [options["endpoint"]], "persons": [ef.height]})}

    register_kind(AnalysisKind("at_risk_count", persons_at_risk, {"counts": ("endpoint", "persons")},
                               {"endpoint": Key((str,), REQUIRED, doc="endpoint")}))
    try:
        spec = parse_spec(spec_text(SPEC, '[[analyses]]\nkind = "at_risk_count"\nendpoint = "death"\n'))
        out = run_analysis(AnalysisContext(frames, spec.analyses[0]))
        assert out["counts"]["persons"][0] == frames.endpoint_frame("death").height
        with pytest.raises(Exception, match="lacks the required key 'endpoint'"):
            parse_spec(spec_text(SPEC, '[[analyses]]\nkind = "at_risk_count"\n'))
    finally:
        ANALYSIS_KINDS.pop("at_risk_count")
