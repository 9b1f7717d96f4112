"""Benchmark: synthetic registry generation (CSV) at scale.

Generates ``--persons`` persons (default 1,000,000) into a temporary directory, ``--runs``
times, and prints the median wall time, persons and ECG reads per second, rows written per
file, peak resident memory (resource.getrusage) and the ratios to the targets: 5 minutes and
4 GiB for 1M persons.

    /work/venv/bin/python benchmarks/bench_synth.py --persons 1000000
    /work/venv/bin/python benchmarks/bench_synth.py --persons 100000 --runs 3
"""

from __future__ import annotations

import argparse
import resource
import statistics
import sys
import tempfile
import time
from pathlib import Path

from synthetic_registry import generate

TARGET_SECONDS_PER_MILLION = 300.0
TARGET_RSS_GIB = 4.0


def peak_rss_gib() -> float:
    """Peak resident set size of this process (Linux reports KiB)."""
    kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return kib / (1024.0 * 1024.0) if sys.platform != "darwin" else kib / 1024.0**3


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--persons", type=int, default=1_000_000)
    ap.add_argument("--runs", type=int, default=1)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--defects", type=float, default=0.0)
    args = ap.parse_args()

    times = []
    manifest: dict = {}
    for run in range(args.runs):
        with tempfile.TemporaryDirectory(prefix="bench_synth_") as tmp:
            t0 = time.perf_counter()
            manifest = generate(
                Path(tmp), persons=args.persons, seed=args.seed, defects=args.defects
            )
            times.append(time.perf_counter() - t0)
            size = sum(f["bytes"] for f in manifest["files"])
        print(f"run {run + 1}: {times[-1]:.1f} s", flush=True)

    median = statistics.median(times)
    rows = {f["path"]: f["rows"] for f in manifest["files"]}
    reads = rows["ecgs.csv"]
    print(f"persons: {args.persons:,}   runs: {args.runs}   median wall time: {median:.1f} s")
    print(f"throughput: {args.persons / median:,.0f} persons/s, {reads / median:,.0f} ECG reads/s")
    for path, n in rows.items():
        if n is not None:
            print(f"  {path:<30} {n:>12,} rows")
    print(f"bytes written: {size / 1e9:.2f} GB")
    rss = peak_rss_gib()
    target = TARGET_SECONDS_PER_MILLION * args.persons / 1_000_000
    print(
        f"peak RSS: {rss:.2f} GiB (ratio to {TARGET_RSS_GIB:.0f} GiB target: {rss / TARGET_RSS_GIB:.2f})"
    )
    print(
        f"time ratio to target ({target:.0f} s for {args.persons:,} persons): {median / target:.2f}"
    )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
