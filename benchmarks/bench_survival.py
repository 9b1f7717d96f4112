"""Speed of the survival estimators at registry scale, with lifelines as the yardstick.

Run on demand (not part of the test suite):

    /work/venv/bin/python benchmarks/bench_survival.py            # 1M persons, 1M + 5M intervals
    /work/venv/bin/python benchmarks/bench_survival.py --quick    # 100k, for a smoke run

Each task runs in a fresh process so that its peak RSS is its own. Reported: median wall time
of ``--repeats`` runs, peak RSS, the same fit with lifelines in the same run and the ratio
(lifelines / ours), and max |coefficient difference| to lifelines. Data are simulated here
(fictional registry: integer days, ~20% events, many ties). Targets: Cox 1M x 5 <= 4 s;
Aalen-Johansen with variance 1M <= 2 s; counting-process Cox 1M intervals <= 15 s, 5M <= 75 s.
lifelines is slow at these sizes, so its Aalen-Johansen runs on ``--lifelines-aj-n`` persons
(it jitters every tied time and loops over rows for the variance) and its
CoxTimeVaryingFitter on ``--lifelines-ctv-n`` intervals; ours is timed on the same subsets
for the ratio.
"""

from __future__ import annotations

import argparse
import multiprocessing as mp
import resource
import statistics
import time
import warnings
from collections.abc import Callable
from typing import Any

import numpy as np
import pandas as pd

COVARIATES = ["x1", "x2", "x3", "x4", "x5"]
BETA = np.array([0.3, -0.2, 0.1, 0.0, 0.5])


def persons(n: int, seed: int = 1) -> pd.DataFrame:
    """One row per person: 5 covariates, days to event or censoring, 2 competing causes."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, 5))
    t = rng.exponential(18000 / np.exp(x @ BETA))
    c = rng.uniform(0, 3650 * 2, n)
    days = np.ceil(np.minimum(t, c))
    event = (t <= c).astype(np.int64)
    df = pd.DataFrame(x, columns=COVARIATES)
    df["days"] = days
    df["event"] = event
    df["cause"] = np.where(event == 1, rng.integers(1, 3, n), 0)
    return df


def intervals(n_rows: int, per_person: int = 5, seed: int = 2) -> pd.DataFrame:
    """Counting-process rows (start, stop]: time-updated PR (per 20 ms), age, sex."""
    rng = np.random.default_rng(seed)
    n = n_rows // per_person
    cuts = np.sort(rng.integers(1, 3650, (n, per_person - 1)), axis=1).astype(float)
    exit_ = np.maximum(cuts[:, -1] + 1, rng.integers(1, 4000, n)).astype(float)
    starts = np.column_stack([np.zeros(n), cuts])
    stops = np.column_stack([cuts, exit_])
    keep = stops > starts
    pid = np.repeat(np.arange(n), per_person)[keep.ravel()]
    start, stop = starts[keep], stops[keep]
    pr = (rng.normal(160, 25, n)[:, None] + np.cumsum(rng.normal(2, 4, (n, per_person)),
                                                       axis=1)) / 20
    age = rng.normal(0, 1, n)[pid]
    sex = rng.integers(0, 2, n)[pid].astype(float)
    pr = pr[keep]
    # Cumulative hazard over each person's rows; the event (if any) ends the last row.
    hazard = (stop - start) * 8e-5 * np.exp(0.2 * (pr - 8) + 0.4 * age + 0.2 * sex)
    total = np.bincount(pid, weights=hazard, minlength=n)
    last = np.r_[pid[1:] != pid[:-1], True]
    hit = rng.uniform(size=n) < 1 - np.exp(-total)
    event = (last & hit[pid]).astype(np.int64)
    return pd.DataFrame({"id": pid, "start": start, "stop": stop, "event": event, "pr20": pr,
                         "age": age, "sex": sex})


# --------------------------------------------------------------------------- tasks (children)
def _timed(fn: Callable[[], Any], repeats: int) -> tuple[float, Any]:
    times, out = [], None
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times), out


def task_cox(n: int, repeats: int, with_lifelines: bool) -> dict:
    from cohort.stats import CoxPH

    df = persons(n)
    wall, fit = _timed(lambda: CoxPH().fit(df, duration="days", event="event",
                                           covariates=COVARIATES), repeats)
    res = {"ours_s": wall, "events": float(df["event"].mean()), "n_iter": fit.n_iter_}
    if with_lifelines:
        from lifelines import CoxPHFitter

        lw, ref = _timed(lambda: CoxPHFitter().fit(df[COVARIATES + ["days", "event"]], "days",
                                                   "event", batch_mode=True), 1)
        res.update(lifelines_s=lw, max_coef_diff=float(np.max(np.abs(
            ref.params_[COVARIATES].to_numpy() - fit.params_.to_numpy()))))
    return res


def task_aj(n: int, repeats: int, with_lifelines: bool, lifelines_n: int) -> dict:
    from cohort.stats import AalenJohansen

    df = persons(n)
    wall, _ = _timed(lambda: AalenJohansen().fit(df, duration="days", event="cause"), repeats)
    res = {"ours_s": wall}
    if with_lifelines:
        from lifelines import AalenJohansenFitter

        sub = df.iloc[:lifelines_n]
        ow, ours = _timed(lambda: AalenJohansen().fit(sub, duration="days", event="cause"),
                          repeats)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # lifelines warns that it jitters the ties
            lw, ref = _timed(lambda: AalenJohansenFitter(calculate_variance=True, seed=0).fit(
                sub["days"], sub["cause"], event_of_interest=1), 1)
        h = 1825.0
        ours_f = ours.cumulative_incidence_at([h]).query("term == 'cause_1'")["estimate"].iloc[0]
        ref_f = float(ref.cumulative_density_.iloc[:, 0].loc[:h].iloc[-1])
        res.update(subset_n=lifelines_n, ours_subset_s=ow, lifelines_s=lw,
                   cif_5y_diff_vs_jittered=abs(ours_f - ref_f))
    return res


def task_ctv(n_rows: int, repeats: int, with_lifelines: bool, lifelines_n: int) -> dict:
    from cohort.stats import CoxPH

    cols = ["pr20", "age", "sex"]
    df = intervals(n_rows)

    def ours(frame: pd.DataFrame) -> Any:
        return CoxPH().fit(frame, duration="stop", event="event", covariates=cols,
                           start="start", id="id")

    wall, fit = _timed(lambda: ours(df), repeats)
    res = {"ours_s": wall, "rows": len(df), "events": int(df["event"].sum())}
    if with_lifelines:
        from lifelines import CoxTimeVaryingFitter

        sub = df[df["id"] < df["id"].iloc[min(lifelines_n, len(df)) - 1]]
        ow, small = _timed(lambda: ours(sub), repeats)
        lw, ref = _timed(lambda: CoxTimeVaryingFitter().fit(
            sub[["id", "start", "stop", "event", *cols]], id_col="id", event_col="event",
            start_col="start", stop_col="stop"), 1)
        res.update(subset_rows=len(sub), ours_subset_s=ow, lifelines_s=lw,
                   max_coef_diff=float(np.max(np.abs(ref.params_[cols].to_numpy()
                                                     - small.params_.to_numpy()))))
    return res


def _child(args: tuple) -> dict:
    name, fn, kwargs = args
    out = fn(**kwargs)
    out["task"] = name
    out["peak_rss_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return out


def run(tasks: list[tuple[str, Callable, dict]]) -> pd.DataFrame:
    """Run each task in its own spawned process (peak RSS per task)."""
    ctx = mp.get_context("spawn")
    rows = []
    for task in tasks:
        with ctx.Pool(1) as pool:
            rows.append(pool.apply(_child, (task,)))
        print(rows[-1], flush=True)
    return pd.DataFrame(rows)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true", help="100k persons / intervals only")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--no-lifelines", action="store_true")
    ap.add_argument("--lifelines-aj-n", type=int, default=100_000)
    ap.add_argument("--lifelines-ctv-n", type=int, default=100_000)
    ap.add_argument("--skip-5m", action="store_true")
    args = ap.parse_args()
    n = 100_000 if args.quick else 1_000_000
    lif = not args.no_lifelines
    tasks = [
        ("cox_1M_x5", task_cox, {"n": n, "repeats": args.repeats, "with_lifelines": lif}),
        ("aalen_johansen_1M", task_aj, {"n": n, "repeats": args.repeats, "with_lifelines": lif,
                                        "lifelines_n": min(args.lifelines_aj_n, n)}),
        ("cox_counting_1M_rows", task_ctv, {"n_rows": n, "repeats": args.repeats,
                                            "with_lifelines": lif,
                                            "lifelines_n": min(args.lifelines_ctv_n, n)}),
    ]
    if not (args.quick or args.skip_5m):
        tasks.append(("cox_counting_5M_rows", task_ctv, {"n_rows": 5 * n, "repeats": args.repeats,
                                                         "with_lifelines": False,
                                                         "lifelines_n": 0}))
    table = run(tasks)
    if "lifelines_s" in table:
        base = table["ours_subset_s"].fillna(table["ours_s"]) if "ours_subset_s" in table \
            else table["ours_s"]
        table["ratio_lifelines_over_ours"] = table["lifelines_s"] / base
    with pd.option_context("display.width", 200, "display.max_columns", 30):
        print(table)


if __name__ == "__main__":
    main()
