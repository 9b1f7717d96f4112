"""Throughput of the beat classifier in registry batch mode (strips per second).

Builds an in-memory DuckDB registry whose ``wave_event`` table holds ``--strips`` simulated
10 s strips (``synthetic_registry.strips.simulate_strip``, artefacts on), then times
``classify_registry`` (read via Arrow, classify, write ``beat_pattern``) ``--runs`` times and
prints the median. Two pattern mixes:

- ``registry``: mostly 1:1 conduction, as in a population ECG registry (invented mix: 80 %
  normal, 12 % first degree, the other seven patterns 8 % together);
- ``uniform``: every pattern equally often (the worst case: few strips take the vectorized
  1:1 path).

    python benchmarks/bench_beats.py --strips 100000 --runs 3      # target >= 5,000 strips/s

Each mix is timed with 1 and 2 worker processes for the per-strip path (``--workers``); the
vectorized paths (``cohort/phenotype/beats_vector.py``) and the SQL always run in the main
process. ``--new-share`` also times ``refresh_registry`` after a load that adds that share of
the strips (only those are classified), beside a full classification in the same run.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time

import duckdb
import numpy as np
import pyarrow as pa

from cohort.phenotype.beats import load_rules
from cohort.phenotype.beats_batch import _read_strips, classify_registry, refresh_registry
from cohort.phenotype.beats_vector import vectorized_rows
from cohort.registry import ensure_schema
from synthetic_registry.strips import PATTERNS, simulate_strip

TARGET = 5_000.0
REGISTRY_MIX = {"normal": 0.80, "first_degree": 0.12}


def mix_weights(mix: str) -> np.ndarray:
    """Probability of each simulated pattern in the chosen mix."""
    if mix == "uniform":
        return np.full(len(PATTERNS), 1 / len(PATTERNS))
    rest = (1 - sum(REGISTRY_MIX.values())) / (len(PATTERNS) - len(REGISTRY_MIX))
    return np.array([REGISTRY_MIX.get(p, rest) for p in PATTERNS])


def build_registry(n: int, mix: str, seed: int) -> duckdb.DuckDBPyConnection:
    """In-memory registry with n simulated strips in wave_event."""
    rng = np.random.default_rng(seed)
    patterns = rng.choice(len(PATTERNS), size=n, p=mix_weights(mix))
    keys, times, kinds = [], [], []
    for i, k in enumerate(patterns.tolist()):
        truth = simulate_strip(PATTERNS[k], rng)
        key = f"ECG{i:07d}"
        keys.append(np.full(len(truth.p_ms) + len(truth.qrs_ms), key, dtype=object))
        times.append(np.concatenate([truth.p_ms, truth.qrs_ms]))
        kinds.append(np.array(["P"] * len(truth.p_ms) + ["QRS"] * len(truth.qrs_ms), dtype=object))
    con = duckdb.connect()
    ensure_schema(con)
    table = pa.table({"ecg_key": np.concatenate(keys), "t_ms": np.concatenate(times),
                      "kind": np.concatenate(kinds)})
    con.register("_events", table)
    con.execute("INSERT INTO wave_event SELECT ecg_key, t_ms, kind, 'bench' FROM _events")
    con.unregister("_events")
    return con


def time_runs(con, runs: int, workers: int) -> list[float]:
    """Seconds per classify_registry run."""
    out = []
    for _ in range(runs):
        start = time.perf_counter()
        classify_registry(con, workers=workers)
        out.append(time.perf_counter() - start)
    return out


def time_new_load(con, share: float, runs: int, workers: int) -> list[float]:
    """Seconds of refresh_registry after the events of ``share`` of the strips are loaded anew
    (held back, patterns of the rest brought up to date, then the events added again)."""
    held = f"hash(ecg_key) % 1000 < {round(share * 1000)}"
    con.execute(f"CREATE OR REPLACE TEMP TABLE bench_held AS SELECT * FROM wave_event WHERE {held}")
    out = []
    for _ in range(runs):
        con.execute(f"DELETE FROM wave_event WHERE {held}")
        refresh_registry(con, workers=workers)
        con.execute("INSERT INTO wave_event SELECT * FROM bench_held")
        start = time.perf_counter()
        refresh_registry(con, workers=workers)
        out.append(time.perf_counter() - start)
    con.execute("DROP TABLE bench_held")
    return out


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--strips", type=int, default=100_000)
    parser.add_argument("--runs", type=int, default=3)
    parser.add_argument("--seed", type=int, default=20240601)
    parser.add_argument("--mix", choices=("registry", "uniform", "both"), default="both")
    parser.add_argument("--workers", type=int, nargs="+", default=[1, 2],
                        help="worker processes for the per-strip path (each value is timed)")
    parser.add_argument("--new-share", type=float, default=None,
                        help="also time a refresh after a load adding this share of the strips")
    args = parser.parse_args(argv)
    mixes = ("registry", "uniform") if args.mix == "both" else (args.mix,)
    for mix in mixes:
        t0 = time.perf_counter()
        con = build_registry(args.strips, mix, args.seed)
        built = time.perf_counter() - t0
        n_events = con.execute("SELECT count(*) FROM wave_event").fetchall()[0][0]
        fast = vectorized_rows(_read_strips(con), load_rules())
        missed = sum(any(e.startswith("inferred_p=") for e in ev) for ev in fast["evidence"])
        print(f"{mix}: {args.strips:,} strips ({n_events:,} events, built in {built:.0f} s); "
              f"vectorized paths {len(fast['index']) / args.strips:.0%} "
              f"(one missed P {missed / args.strips:.0%})")
        for workers in args.workers:
            seconds = time_runs(con, args.runs, workers)
            med = statistics.median(seconds)
            rate = args.strips / med
            print(f"  workers={workers}: runs {', '.join(f'{s:.2f}' for s in seconds)} s; median "
                  f"{med:.2f} s = {rate:,.0f} strips/s ({rate / TARGET:.2f} x target {TARGET:,.0f})")
            if args.new_share:
                new = statistics.median(time_new_load(con, args.new_share, args.runs, workers))
                print(f"    after a load adding {args.new_share:.0%} of the strips: median "
                      f"{new:.2f} s ({new / med:.2f} x the full classification)")
        con.close()
    return 0


if __name__ == "__main__":
    sys.exit(main())
