"""Validation: does the cause-specific Cox model recover the generator's true log hazard ratios?

For each seed, a synthetic registry is generated and the cause-specific Cox model
(``cohort.stats.CoxPH``, Efron ties) is fitted to the TRUE event times of
``truth/persons_truth.parquet``, with exactly the model the generator used (see
``truth/parameters.json`` -> ``true_effects``): time since entry, covariates latent PR at entry
per 20 ms, male sex, baseline bundle branch block and age at entry (the Gompertz baseline in
attained age makes age at entry a proportional covariate). Competing events (the other causes,
death) censor. Reports bias and the coverage of the 95% intervals over the seeds (target
90-99% with 20 seeds).

    python benchmarks/validate_survival_recovery.py --seeds 20 --persons 20000
"""

from __future__ import annotations

import argparse
import json
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

from cohort.stats import CoxPH
from synthetic_registry import generate

ENDPOINTS = ("higher_grade", "pacemaker_other", "death")
TERMS = ("pr_per_20ms", "male", "baseline_bbb")


def analysis_frame(truth: pd.DataFrame) -> pd.DataFrame:
    """Time from entry to the first of block / pacemaker / death / end, with its cause (1..3)."""
    frame = truth[~truth["pacemaker_prevalent"]].copy()
    entry = pd.to_datetime(frame["entry_date"])
    candidates = {
        1: pd.to_datetime(frame["higher_grade_onset"]),
        2: pd.to_datetime(frame["pacemaker_date"]).where(frame["pacemaker_indication"] == "other"),
        3: pd.to_datetime(frame["death_date"]),
    }
    # An implant after a block is a consequence of the block (the block came first).
    end = pd.to_datetime(frame["followup_end"])
    stacked = pd.DataFrame(candidates)
    first_time = stacked.min(axis=1)
    cause = pd.Series(0, index=frame.index)
    for code in (3, 2, 1):  # ties: the lower code (block before implant before death) wins
        cause = cause.mask(stacked[code].notna() & (stacked[code] == first_time), code)
    observed = first_time.notna() & (first_time <= end)
    stop = first_time.where(observed, end)
    cause = cause.where(observed, 0)
    frame["time_years"] = (stop - entry).dt.days / 365.25
    frame["cause"] = cause
    frame["pr_per_20ms"] = (frame["true_pr_baseline_ms"] - 160.0) / 20.0
    frame["male"] = (frame["sex"] == "M").astype(float)
    frame["baseline_bbb"] = frame["vc_baseline"].isin(["rbbb", "lbbb", "bifascicular"]).astype(float)
    frame["age_at_entry_10y"] = frame["age_at_entry"] / 10.0
    return frame[frame["time_years"] > 0]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=20)
    parser.add_argument("--persons", type=int, default=20_000)
    args = parser.parse_args()
    rows = []
    with tempfile.TemporaryDirectory(prefix="dromos-recovery-") as tmp:
        for seed in range(1, args.seeds + 1):
            out = Path(tmp) / f"s{seed}"
            generate(out, persons=args.persons, seed=seed, fmt="parquet")
            truth = pd.read_parquet(out / "truth" / "persons_truth.parquet")
            effects = json.loads((out / "truth" / "parameters.json").read_text())["true_effects"]
            frame = analysis_frame(truth)
            for cause, endpoint in enumerate(ENDPOINTS, start=1):
                model = CoxPH(event_of_interest=cause).fit(
                    frame, duration="time_years", event="cause",
                    covariates=[*TERMS, "age_at_entry_10y"],
                )
                summary = model.summary.set_index("term")
                for effect in effects:
                    if effect["endpoint"] != endpoint or effect["term"] not in TERMS:
                        continue
                    row = summary.loc[effect["term"]]
                    lower, upper = np.log(row["lower"]), np.log(row["upper"])
                    rows.append({
                        "seed": seed, "endpoint": endpoint, "term": effect["term"], "true": effect["log_hr"],
                        "estimate": row["estimate"], "se": row["se"], "covered": lower <= effect["log_hr"] <= upper,
                        "events": int(row["events"]),
                    })
            print(f"seed {seed} done", flush=True)
            for path in out.rglob("*"):
                if path.is_file():
                    path.unlink()
    result = pd.DataFrame(rows)
    table = result.groupby(["endpoint", "term"]).agg(
        true=("true", "first"), mean_estimate=("estimate", "mean"), mean_se=("se", "mean"),
        empirical_sd=("estimate", "std"), coverage=("covered", "mean"), seeds=("seed", "nunique"),
        mean_events=("events", "mean"),
    )
    table["bias"] = table["mean_estimate"] - table["true"]
    print(table.round(4).to_string())


if __name__ == "__main__":
    main()
