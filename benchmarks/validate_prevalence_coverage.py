"""Empirical coverage of the 95% prevalence intervals against the generator's truth.

For each seed: generate a synthetic registry, ingest, phenotype (default-v1), run the
``prevalence_at_index`` analysis of ``analyses/prevalence.toml`` (main variant) and read
``truth/prevalence.csv`` (basis ``first_tracing``). Cells are (axis, category, age band, sex)
for sexes F and M.

``truth/prevalence.csv`` of a seed counts the TRUE categories of the same persons, so it is a
sample value, not the population prevalence an interval is meant to cover. The population
value of a cell is taken as the pooled prevalence of the other seeds (leave-one-out: n and
total summed over them), which adds its own small sampling error: with S seeds an exact 95%
interval covers it about P(|Z| < 1.96 / sqrt(1 + 1/(S-1))) of the time (94.7% for S = 25).
Four comparisons are reported:

- ``machine_vs_same_seed_truth``: the machine-read estimate's interval against the same seed's
  truth (what a naive check does);
- ``machine_vs_true_prevalence``: the machine-read interval against the pooled truth: misses
  here mix sampling with misclassification by the machine read;
- ``true_category_vs_true_prevalence`` (like with like): intervals from the TRUE category of each
  person's index ECG (ecg_truth joined on the tracing), same persons and age bands as the
  estimate, against the pooled truth;
- ``machine_vs_machine_prevalence`` (like with like): the machine-read interval against the
  pooled machine-read prevalence of the other seeds.

Run: ``python benchmarks/validate_prevalence_coverage.py --seeds 25 --persons 3000``.
"""

from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import polars as pl

ROOT = Path(__file__).resolve().parents[1]
SPEC = ROOT / "analyses" / "prevalence.toml"
KEYS = ["axis", "category", "age_band", "sex"]
AXIS_TRUTH = {"av": "av_category", "ventricular": "ventricular_conduction", "rhythm": "rhythm"}
AXIS_OURS = {"av": "av_category", "ventricular": "ventricular_conduction", "rhythm": "rhythm_class"}
METHODS = ("wilson", "clopper_pearson")


def one_seed(seed: int, persons: int, work: Path) -> dict[str, pl.DataFrame]:
    """Machine-read cells, true-category cells and the truth file of one synthetic registry."""
    from cohort.ingest import ingest
    from cohort.phenotype import run_phenotype
    from cohort.registry import connect
    from cohort.study import build_cohort, load_spec
    from cohort.study.analyses import AnalysisContext, run_analysis
    from synthetic_registry import generate

    folder = work / f"seed{seed}"
    if folder.exists():
        shutil.rmtree(folder)
    generate(folder / "exports", persons=persons, seed=seed)
    con = connect(folder / "registry.duckdb")
    try:
        ingest(con, [folder / "exports"])
        run_phenotype(con, "default-v1")
        spec = load_spec(SPEC)
        frames = build_cohort(con, spec, "main")
        analysis = next(a for a in spec.analyses if a.name == "prevalence_at_index")
        est = run_analysis(AnalysisContext(frames, analysis))["estimates"]
    finally:
        con.close()
    machine = est.filter((pl.col("stratum") == "age_band_sex") & pl.col("sex").is_in(["F", "M"]))
    truth = pl.read_csv(folder / "exports" / "truth" / "prevalence.csv").filter(
        (pl.col("basis") == "first_tracing") & pl.col("sex").is_in(["F", "M"]))
    true_cells = _true_category_cells(frames.persons, folder / "exports" / "truth" / "ecg_truth.parquet",
                                      analysis.options["age_bands"])
    shutil.rmtree(folder)
    return {"machine": machine, "truth": truth, "true_cells": true_cells}


def _true_category_cells(persons: pl.DataFrame, ecg_truth: Path, edges: list[int]) -> pl.DataFrame:
    """Counts of the TRUE categories of each included person's index ECG, in our age bands."""
    from cohort.study.analyses import AXES, add_age_band

    truth = pl.read_parquet(ecg_truth).select("tracing_id", *AXIS_TRUTH.values())
    p = add_age_band(persons.select("index_ecg_key", "sex", "age_completed"), edges).join(
        truth, left_on="index_ecg_key", right_on="tracing_id", how="left")
    p = p.filter(pl.col("sex").is_in(["F", "M"]))
    parts = []
    for axis, column in AXIS_TRUTH.items():
        cats = AXES[axis][1]
        denom = p.group_by("age_band", "sex").agg(pl.len().alias("n"))
        grid = denom.join(pl.DataFrame({"category": list(cats)}), how="cross")
        events = p.group_by("age_band", "sex", column).agg(pl.len().alias("events")).rename(
            {column: "category"})
        parts.append(grid.join(events, on=["age_band", "sex", "category"], how="left")
                     .with_columns(pl.col("events").fill_null(0), pl.lit(axis).alias("axis")))
    return pl.concat(parts).select(*KEYS, "events", "n")


def _intervals(frame: pl.DataFrame, method: str) -> pl.DataFrame:
    from cohort.stats.proportions import proportion_intervals

    res = proportion_intervals(frame["events"].to_numpy(), frame["n"].to_numpy(), 0.05, method)
    return frame.with_columns(pl.Series("lower", res.lower), pl.Series("upper", res.upper))


def coverage_study(seeds: list[int], persons: int, work: Path | None = None,
                   echo=print) -> dict[str, pl.DataFrame]:
    """Run every seed and return per-comparison coverage tables (overall and by expected count)."""
    own = work is None
    work = Path(tempfile.mkdtemp(prefix="dromos_cov_")) if own else work
    runs = []
    try:
        for seed in seeds:
            t0 = time.perf_counter()
            runs.append(one_seed(seed, persons, work))
            echo(f"seed {seed}: {time.perf_counter() - t0:.1f} s")
    finally:
        if own:
            shutil.rmtree(work, ignore_errors=True)
    return summarize(runs, seeds)


def _pooled(frames: list[pl.DataFrame], x: str, n: str, name: str) -> pl.DataFrame:
    both = pl.concat(frames).group_by(KEYS).agg(pl.col(x).sum().alias("_x"), pl.col(n).sum().alias("_n"))
    return both.select(*KEYS, (pl.col("_x") / pl.col("_n")).alias(name))


def summarize(runs: list[dict[str, pl.DataFrame]], seeds: list[int]) -> dict[str, pl.DataFrame]:
    """Coverage of each comparison, pooled over cells and seeds."""
    rows = []
    agreement = []
    for i, run in enumerate(runs):
        others = [r for j, r in enumerate(runs) if j != i]
        truth_ref = _pooled([r["truth"] for r in others], "n", "total", "ref_truth")
        machine_ref = _pooled([r["machine"].filter(pl.col("method") == "wilson") for r in others],
                              "events", "n", "ref_machine")
        same = run["truth"].select(*KEYS, pl.col("prevalence").alias("same_truth"),
                                   pl.col("n").alias("truth_events"), pl.col("total").alias("truth_n"))
        tc = run["true_cells"]
        agreement.append(tc.join(same, on=KEYS, how="inner").select(
            (pl.col("events") == pl.col("truth_events")).alias("eq")))
        for method in METHODS:
            m = run["machine"].filter(pl.col("method") == method).select(*KEYS, "events", "n", "lower", "upper")
            t = _intervals(tc, method)
            rows += _hits(m.join(same, on=KEYS), "same_truth", "machine_vs_same_seed_truth", method, seeds[i])
            rows += _hits(m.join(truth_ref, on=KEYS), "ref_truth", "machine_vs_true_prevalence", method, seeds[i])
            rows += _hits(t.join(truth_ref, on=KEYS), "ref_truth", "true_category_vs_true_prevalence", method, seeds[i])
            rows += _hits(m.join(machine_ref, on=KEYS), "ref_machine", "machine_vs_machine_prevalence", method, seeds[i])
    cells = pl.DataFrame(rows, schema=["comparison", "method", "seed", "axis", "category", "age_band",
                                       "sex", "expected", "covered"], orient="row")
    cells = cells.with_columns(pl.when(pl.col("expected") < 1).then(pl.lit("<1"))
                               .when(pl.col("expected") < 5).then(pl.lit("1-5"))
                               .when(pl.col("expected") < 20).then(pl.lit("5-20"))
                               .otherwise(pl.lit(">=20")).alias("expected_events"))
    overall = cells.group_by("comparison", "method").agg(
        pl.len().alias("cells"), pl.col("covered").mean().alias("coverage")).sort("comparison", "method")
    by_count = cells.group_by("comparison", "method", "expected_events").agg(
        pl.len().alias("cells"), pl.col("covered").mean().alias("coverage")).sort(
        "comparison", "method", "expected_events")
    by_category = cells.filter(pl.col("method") == "wilson").group_by("comparison", "axis", "category").agg(
        pl.len().alias("cells"), pl.col("covered").mean().alias("coverage")).sort("comparison", "axis", "category")
    eq = pl.concat(agreement)["eq"]
    definitions = pl.DataFrame({"cells": [eq.len()], "equal_counts": [int(eq.sum())]})
    return {"overall": overall, "by_expected_count": by_count, "by_category": by_category,
            "definitions": definitions, "cells": cells}


def _hits(frame: pl.DataFrame, ref: str, comparison: str, method: str, seed: int) -> list[tuple]:
    # Cells whose reference prevalence is 0 are left out: every interval covers 0 trivially.
    f = frame.filter((pl.col(ref) > 0) & (pl.col("n") > 0))
    covered = (f["lower"] <= f[ref]) & (f[ref] <= f["upper"])
    expected = f["n"] * f[ref]
    return [(comparison, method, seed, *r) for r in zip(
        f["axis"], f["category"], f["age_band"], f["sex"], expected, covered, strict=True)]


def expected_loo_coverage(n_seeds: int, level: float = 0.95) -> float:
    """Coverage of an exact interval against a leave-one-out pooled reference (normal approx.)."""
    from scipy import stats

    z = stats.norm.ppf(0.5 + level / 2)
    return float(2 * stats.norm.cdf(z / np.sqrt(1 + 1 / (n_seeds - 1))) - 1)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=25, help="number of seeds (default 25)")
    parser.add_argument("--first-seed", type=int, default=101)
    parser.add_argument("--persons", type=int, default=3000, help="persons per seed (default 3000)")
    args = parser.parse_args(argv)
    seeds = list(range(args.first_seed, args.first_seed + args.seeds))
    t0 = time.perf_counter()
    out = coverage_study(seeds, args.persons, echo=lambda s: print(s, file=sys.stderr))
    pl.Config.set_tbl_rows(200)
    pl.Config.set_tbl_width_chars(160)
    print(f"{len(seeds)} seeds x {args.persons} persons, {time.perf_counter() - t0:.0f} s")
    print(f"expected coverage of an exact 95% interval vs a leave-one-out reference: "
          f"{100 * expected_loo_coverage(len(seeds)):.1f}%")
    d = out["definitions"].row(0, named=True)
    print(f"true-category counts at our index ECG equal truth/prevalence.csv in "
          f"{d['equal_counts']} of {d['cells']} cells")
    print(out["overall"])
    print(out["by_expected_count"])
    print(out["by_category"].filter(pl.col("comparison") == "machine_vs_true_prevalence"))
    return 0


if __name__ == "__main__":
    sys.exit(main())
