"""Benchmark: ingest of a synthetic registry vs a bare DuckDB ``read_csv`` of the same files.

Run on demand (not a test):

    python benchmarks/bench_ingest.py --persons 1000000 --repeats 3
    python benchmarks/bench_ingest.py --exports DIR          # reuse exports written before

Each measurement runs in its own subprocess (fresh registry file, peak RSS of that process).
Prints the median wall time of each, their ratio (target: ingest <= 2x bare read_csv), the
median of the per-run ratios and the CPU seconds of each (steadier on a shared machine), the
rows loaded and the peak RSS (target < 4 GiB at 5M ECG rows).
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

_BARE = """
import json, resource, sys, time, duckdb
from pathlib import Path
files = sorted(Path(sys.argv[1]).glob('*.csv'))
con = duckdb.connect(sys.argv[2])
def cpu():
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime
start, cpu_start = time.perf_counter(), cpu()
rows = 0
for i, f in enumerate(files):
    con.execute(f"CREATE TABLE t{i} AS SELECT * FROM read_csv('{f}', header=true)")
    rows += con.execute(f"SELECT count(*) FROM t{i}").fetchone()[0]
con.execute("CHECKPOINT")
seconds = time.perf_counter() - start
print(json.dumps({"seconds": seconds, "cpu_seconds": cpu() - cpu_start, "rows": rows,
                  "peak_rss_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
"""

_INGEST = """
import json, resource, sys, time
from cohort.ingest.loader import ingest
from cohort.registry import connect
con = connect(sys.argv[2])
def cpu():
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime
start, cpu_start = time.perf_counter(), cpu()
results = ingest(con, [sys.argv[1]])
con.execute("CHECKPOINT")
seconds = time.perf_counter() - start
print(json.dumps({"seconds": seconds, "cpu_seconds": cpu() - cpu_start, "rows": sum(r.rows_read for r in results),
                  "loaded": sum(r.rows_loaded for r in results),
                  "ecg_rows": sum(r.rows_read for r in results if r.table == "ecg"),
                  "reconciles": all(r.reconciles for r in results),
                  "peak_rss_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
"""


def _run(script: str, exports: Path, work: Path, tag: str) -> dict:
    db = work / f"{tag}.duckdb"
    db.unlink(missing_ok=True)
    out = subprocess.run([sys.executable, "-c", script, str(exports), str(db)], check=True, capture_output=True, text=True)
    db.unlink(missing_ok=True)
    Path(str(db) + ".wal").unlink(missing_ok=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--persons", type=int, default=1_000_000)
    parser.add_argument("--seed", type=int, default=11)
    parser.add_argument("--exports", type=Path, help="folder of CSV exports (skips generation)")
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="dromos-bench-") as tmp:
        work = Path(tmp)
        exports = args.exports
        if exports is None:
            from synthetic_registry import generate

            exports = work / "exports"
            start = time.perf_counter()
            generate(exports, persons=args.persons, seed=args.seed, fmt="csv")
            print(f"generated {args.persons:,} persons in {time.perf_counter() - start:.1f} s")
        size = sum(f.stat().st_size for f in exports.glob("*.csv")) / 2**20
        print(f"exports: {exports} ({size:,.0f} MiB of CSV)")
        bare, ours = [], []
        for i in range(args.repeats):  # alternate so that machine noise hits both alike
            bare.append(_run(_BARE, exports, work, f"bare{i}"))
            ours.append(_run(_INGEST, exports, work, f"ingest{i}"))
            print(f"run {i + 1}: bare read_csv {bare[-1]['seconds']:.2f} s, ingest {ours[-1]['seconds']:.2f} s "
                  f"(ratio {ours[-1]['seconds'] / bare[-1]['seconds']:.2f}; CPU {bare[-1]['cpu_seconds']:.1f} "
                  f"vs {ours[-1]['cpu_seconds']:.1f} s)")
        bare_median = statistics.median(r["seconds"] for r in bare)
        ours_median = statistics.median(r["seconds"] for r in ours)
        # steadier on a shared machine: the median of each run's own ratio, and CPU seconds
        per_run = statistics.median(o["seconds"] / b["seconds"] for o, b in zip(ours, bare, strict=True))
        bare_cpu = statistics.median(r["cpu_seconds"] for r in bare)
        ours_cpu = statistics.median(r["cpu_seconds"] for r in ours)
        print(json.dumps({
            "rows_read": ours[0]["rows"], "ecg_rows": ours[0]["ecg_rows"], "rows_loaded": ours[0]["loaded"],
            "reconciles": all(r["reconciles"] for r in ours),
            "bare_read_csv_median_s": round(bare_median, 2), "ingest_median_s": round(ours_median, 2),
            "ratio_ingest_to_bare": round(ours_median / bare_median, 2),
            "median_ratio_per_run": round(per_run, 2),
            "bare_cpu_median_s": round(bare_cpu, 1), "ingest_cpu_median_s": round(ours_cpu, 1),
            "cpu_ratio": round(ours_cpu / bare_cpu, 2),
            "ingest_peak_rss_mib": round(max(r["peak_rss_mib"] for r in ours)),
            "bare_peak_rss_mib": round(max(r["peak_rss_mib"] for r in bare)),
        }, indent=2))


if __name__ == "__main__":
    main()
