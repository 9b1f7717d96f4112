"""Validation, end to end: does the tool's Cox model recover the generator's log HR per 20 ms?

For each seed a synthetic registry is generated, ingested and phenotyped (rule set
default-v1), and a study spec with two ``cox`` analyses (``cohort.study.survival_kinds``) is
run through ``run_spec``: the cause-specific hazard of higher-grade AV block (first seen on an
ECG; death competing, pacemaker censoring) and of pacemaker implantation (procedure code or
first paced ECG; death competing), per 20 ms of PR measured on the first ECG with a
measurable PR, adjusted for age, sex and bundle branch block at index. The tool's estimate of
the log HR per 20 ms is set beside three references computed from the truth files:

- ``truth``: the generating value of ``truth/parameters.json`` -> ``true_effects`` (higher-
  grade block, log 1.30). All-cause pacemaker has no single generating value (a mixture of
  implants after a block and for other reasons, docs/export-format.md "True effects"); its
  target is the mean over seeds of the ``oracle`` fit below.
- ``oracle``: the Cox model the generator defines (as benchmarks/validate_survival_recovery.py):
  true event times from entry, latent PR at entry, male sex, baseline bundle branch block,
  age at entry; higher-grade block includes Mobitz I as in the truth.
- ``measured_pr``: the oracle model with latent PR replaced by the tool's measured PR at index
  (same persons, true event times): the dilution due to PR measurement alone.

It also reports the regression-calibration factor lambda = cov(latent, measured) /
var(measured) of PR at index (Carroll RJ et al. 2006, Measurement Error in Nonlinear Models,
2nd ed., ch. 4; recalled from memory): under classical measurement error a log HR is
attenuated by about that factor.

    python benchmarks/validate_survival_coverage.py --seeds 20 --persons 50000
"""

from __future__ import annotations

import argparse
import json
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import polars as pl

import cohort.study.survival_kinds  # noqa: F401  (registers the survival kinds)
from cohort.ingest import ingest
from cohort.phenotype import run_phenotype
from cohort.registry import connect
from cohort.stats import CoxPH
from cohort.study import build_cohort, load_spec, run_spec
from synthetic_registry import generate

SPEC = """
[study]
id = "coverage"
rule_set = "default-v1"

[population]
index = "first_assessable_pr"
age_from = 18

[exclusions]
pacemaker_before_index = true
higher_grade_before_index = "either"
min_followup_days = 1

[exposure]
kind = "pr_continuous"
per = 20
center = 160

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

[[analyses]]
kind = "cox"
name = "cox_higher_grade"
endpoint = "higher_grade"
exposure = "per_ms"
covariates = ["age", "sex", "bundle_branch_block"]

[[analyses]]
kind = "cox"
name = "cox_pacemaker"
endpoint = "pacemaker"
exposure = "per_ms"
covariates = ["age", "sex", "bundle_branch_block"]
"""
ENDPOINTS = ("higher_grade", "pacemaker")
BBB = ("rbbb", "lbbb", "bifascicular")
Z = 1.959963984540054


def truth_frame(truth: pd.DataFrame) -> pd.DataFrame:
    """Persons without a prevalent pacemaker with the oracle covariates (truth files)."""
    frame = truth[~truth["pacemaker_prevalent"]].copy()
    frame["entry"] = pd.to_datetime(frame["entry_date"])
    frame["end"] = pd.to_datetime(frame["followup_end"])
    frame["pr_latent_per_20ms"] = (frame["true_pr_baseline_ms"] - 160.0) / 20.0
    frame["male"] = (frame["sex"] == "M").astype(float)
    frame["baseline_bbb"] = frame["vc_baseline"].isin(BBB).astype(float)
    frame["age10"] = frame["age_at_entry"] / 10.0
    return frame


def endpoint_times(frame: pd.DataFrame, endpoint: str) -> pd.DataFrame:
    """True time (years from entry) to the endpoint, and 1 = event, 0 = censored.

    higher_grade: the truth's second-degree-or-higher onset; death and an implant without a
    preceding block end follow-up. pacemaker: any implant; death ends follow-up.
    """
    death = pd.to_datetime(frame["death_date"])
    pm = pd.to_datetime(frame["pacemaker_date"])
    if endpoint == "higher_grade":
        event = pd.to_datetime(frame["higher_grade_onset"])
        other = pm.where(frame["pacemaker_indication"] == "other")
        stop = pd.concat([event, other, death, frame["end"]], axis=1).min(axis=1)
    else:
        event = pm
        stop = pd.concat([event, death, frame["end"]], axis=1).min(axis=1)
    out = frame.copy()
    out["event"] = (event.notna() & (event == stop)).astype(int)
    out["time"] = (stop - frame["entry"]).dt.days / 365.25
    return out[out["time"] > 0]


def fit_log_hr(frame: pd.DataFrame, pr: str) -> tuple[float, float, int]:
    """Cox log HR (and se) of ``pr`` adjusted for sex, baseline BBB and age at entry."""
    model = CoxPH().fit(frame, duration="time", event="event",
                        covariates=[pr, "male", "baseline_bbb", "age10"])
    row = model.summary.set_index("term").loc[pr]
    return float(row["estimate"]), float(row["se"]), int(row["events"])


def tool_estimates(out_dir: Path) -> dict[str, dict[str, float]]:
    """The tool's pr_per_20ms rows of tables/cox_<endpoint>.csv."""
    result = {}
    for endpoint in ENDPOINTS:
        table = pd.read_csv(out_dir / "tables" / f"cox_{endpoint}.csv")
        row = table.set_index("term").loc["pr_per_20ms"]
        result[endpoint] = {"estimate": float(row["estimate"]), "se": float(row["se"]),
                            "lower": float(np.log(row["lower"])), "upper": float(np.log(row["upper"])),
                            "events": int(row["events"])}
    return result


def one_seed(seed: int, persons: int, root: Path) -> list[dict]:
    exports = root / "exports"
    generate(exports, persons=persons, seed=seed, fmt="parquet")
    db = root / "registry.duckdb"
    con = connect(db)
    try:
        ingest(con, [exports])
        run_phenotype(con, "default-v1")
    finally:
        con.close()
    spec_path = root / "coverage.toml"
    spec_path.write_text(SPEC, encoding="utf-8")
    run_spec(spec_path, db, root / "out")
    tool = tool_estimates(root / "out")
    truth = pd.read_parquet(exports / "truth" / "persons_truth.parquet")
    effects = json.loads((exports / "truth" / "parameters.json").read_text())["true_effects"]
    generating = {e["endpoint"]: e["log_hr"] for e in effects if e["term"] == "pr_per_20ms"}
    measured, lam = measured_pr(db, spec_path, truth)
    frame = truth_frame(truth).merge(measured, on="person_id", how="left")
    rows = []
    for endpoint in ENDPOINTS:
        times = endpoint_times(frame, endpoint)
        oracle = fit_log_hr(times, "pr_latent_per_20ms")
        diluted = fit_log_hr(times.dropna(subset=["pr_measured_per_20ms"]), "pr_measured_per_20ms")
        rows.append({"seed": seed, "endpoint": endpoint, "truth": generating.get(endpoint, np.nan),
                     "oracle": oracle[0], "oracle_se": oracle[1], "oracle_events": oracle[2],
                     "measured_pr": diluted[0], "measured_pr_se": diluted[1], "lambda": lam,
                     "tool": tool[endpoint]["estimate"], "tool_se": tool[endpoint]["se"],
                     "tool_lower": tool[endpoint]["lower"], "tool_upper": tool[endpoint]["upper"],
                     "tool_events": tool[endpoint]["events"]})
    return rows


def measured_pr(db: Path, spec_path: Path, truth: pd.DataFrame) -> tuple[pd.DataFrame, float]:
    """The tool's PR at index per person (study frames) and the calibration factor lambda."""
    con = connect(db, create=False, read_only=True)
    try:
        frames = build_cohort(con, load_spec(spec_path))
        persons = frames.persons.select(pl.col("person_key").alias("person_id"), "pr_ms").to_pandas()
    finally:
        con.close()
    persons["pr_measured_per_20ms"] = (persons["pr_ms"] - 160.0) / 20.0
    both = persons.merge(truth[["person_id", "true_pr_baseline_ms"]], on="person_id")
    cov = np.cov(both["true_pr_baseline_ms"], both["pr_ms"], ddof=1)
    return persons[["person_id", "pr_measured_per_20ms"]], float(cov[0, 1] / cov[1, 1])


def coverage(estimate: pd.Series, se: pd.Series, target: float) -> float:
    """Share of Wald 95% intervals holding ``target``."""
    return float(((estimate - Z * se <= target) & (target <= estimate + Z * se)).mean())


def summarize(result: pd.DataFrame) -> pd.DataFrame:
    """Bias and 95% coverage of the tool (and the references) against the target."""
    rows = []
    for endpoint, part in result.groupby("endpoint", sort=False):
        target = part["truth"].iloc[0]
        source = "generator true_effects"
        if not np.isfinite(target):
            target = part["oracle"].mean()
            source = "mean oracle fit (no single generating value)"
        rows.append({
            "endpoint": endpoint, "target": target, "target_is": source, "seeds": len(part),
            "oracle_mean": part["oracle"].mean(), "oracle_coverage": coverage(part["oracle"], part["oracle_se"], target),
            "measured_pr_mean": part["measured_pr"].mean(),
            "lambda_mean": part["lambda"].mean(), "lambda_x_target": part["lambda"].mean() * target,
            "tool_mean": part["tool"].mean(), "tool_bias": part["tool"].mean() - target,
            "tool_mean_se": part["tool_se"].mean(), "tool_empirical_sd": part["tool"].std(ddof=1),
            "tool_coverage": float(((part["tool_lower"] <= target) & (target <= part["tool_upper"])).mean()),
            "tool_minus_oracle": (part["tool"] - part["oracle"]).mean(),
            "tool_events": part["tool_events"].mean(), "oracle_events": part["oracle_events"].mean(),
        })
    return pd.DataFrame(rows).set_index("endpoint")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=20)
    parser.add_argument("--persons", type=int, default=50_000)
    parser.add_argument("--first-seed", type=int, default=1)
    parser.add_argument("--out", type=Path, default=None, help="write the per-seed rows (CSV)")
    args = parser.parse_args()
    rows = []
    started = time.perf_counter()
    for seed in range(args.first_seed, args.first_seed + args.seeds):
        with tempfile.TemporaryDirectory(prefix="dromos-coverage-") as tmp:
            rows.extend(one_seed(seed, args.persons, Path(tmp)))
        print(f"seed {seed} done ({time.perf_counter() - started:.0f} s)", flush=True)
    result = pd.DataFrame(rows)
    if args.out is not None:
        result.to_csv(args.out, index=False)
    with pd.option_context("display.width", 200, "display.max_columns", 30):
        print(summarize(result).round(4).T.to_string())


if __name__ == "__main__":
    main()
