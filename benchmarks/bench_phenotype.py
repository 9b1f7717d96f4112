"""Benchmark: phenotyping time on a registry with millions of ECGs.

Builds (or reuses, or takes via --db) a registry whose ``ecg`` table holds ``--n-ecg`` machine
reads plus a share of confirmed overreads, with random measurements and statements drawn from
a realistic list (invented frequencies), then times ``run_phenotype`` and prints the median of
the runs, ECGs per second, the median of each step, and the ratio to a floor of ingest time
(loading the same ``ecg`` rows from Parquet into a table, which any ingest must at least do).

    /work/venv/bin/python benchmarks/bench_phenotype.py --n-ecg 5000000 --runs 3
"""

from __future__ import annotations

import argparse
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np
import pyarrow as pa

from cohort.phenotype import run_phenotype
from cohort.registry import connect

# Statement lists of machine reads with invented relative frequencies.
MACHINE_STATEMENTS: list[tuple[float, list[str]]] = [
    (30, ["Normal sinus rhythm", "Normal ECG"]),
    (10, ["Sinus rhythm", "Otherwise normal ECG"]),
    (8, ["Sinus bradycardia", "Otherwise normal ECG"]),
    (6, ["Sinus tachycardia", "Nonspecific ST and T wave abnormality", "Abnormal ECG"]),
    (5, ["Sinus rhythm with 1st degree A-V block", "Otherwise normal ECG"]),
    (1, ["Sinus rhythm with marked 1st degree A-V block", "Abnormal ECG"]),
    (5, ["Atrial fibrillation with rapid ventricular response", "Abnormal ECG"]),
    (3, ["Atrial fibrillation", "Left axis deviation", "Abnormal ECG"]),
    (1, ["Atrial flutter with 2:1 A-V conduction", "Abnormal ECG"]),
    (3, ["Sinus rhythm", "Right bundle branch block", "Abnormal ECG"]),
    (2, ["Sinus rhythm", "Left bundle branch block", "Abnormal ECG"]),
    (2, ["Sinus rhythm", "Incomplete right bundle branch block", "Borderline ECG"]),
    (2, ["Sinus rhythm", "Left anterior fascicular block", "Abnormal ECG"]),
    (1, ["Sinus rhythm with 1st degree A-V block", "Right bundle branch block",
         "Left anterior fascicular block", "** Bifascicular block **", "Abnormal ECG"]),
    (2, ["Sinus rhythm", "Nonspecific intraventricular conduction delay", "Abnormal ECG"]),
    (2, ["Electronic ventricular pacemaker"]),
    (0.3, ["Sinus rhythm with 2nd degree A-V block, Mobitz I (Wenckebach)", "Abnormal ECG"]),
    (0.1, ["Sinus rhythm with 2:1 A-V block", "Abnormal ECG"]),
    (0.1, ["Complete heart block", "Junctional escape rhythm", "Abnormal ECG"]),
    (3, ["Sinus rhythm", "Left ventricular hypertrophy with repolarization abnormality", "Abnormal ECG"]),
    (3, ["Sinus rhythm", "Inferior infarct, age undetermined", "Abnormal ECG"]),
    (2, ["Sinus rhythm", "Possible left atrial enlargement", "Borderline ECG"]),
    (1, ["Sinus rhythm with premature ventricular complexes", "Borderline ECG"]),
    (1, ["Junctional rhythm", "Abnormal ECG"]),
    (1, ["Sinus rhythm", "Low voltage QRS", "Borderline ECG"]),
    (0.5, ["Sinus rhythm", "Prolonged QT", "Abnormal ECG"]),
    (0.5, ["Sinus rhythm", "Cannot rule out anterior infarct, age undetermined"]),
    (0.2, ["Sinus rhythm", "Lead placement check suggested", "Unusual P axis"]),
]
CONFIRMED_EXTRA = [
    ["Sinus rhythm", "First degree AV block", "No longer RBBB"],
    ["Sinus rhythm", "No significant change"],
    ["Atrial fibrillation", "Controlled ventricular response"],
    ["Sinus rhythm with 1st degree AVB", "RBBB and LAFB"],
    ["Normal sinus rhythm", "Within normal limits"],
]
N_READERS = 2000  # distinct "Confirmed by ..." signatures, so distinct statements number thousands


def _statement_lists(rng: np.random.Generator) -> tuple[pa.Table, np.ndarray, int]:
    """Table of statement lists (id, statements) and the sampling weights of machine lists."""
    lists = [s for _, s in MACHINE_STATEMENTS]
    weights = np.array([w for w, _ in MACHINE_STATEMENTS], dtype=float)
    n_machine = len(lists)
    for i in range(N_READERS):
        base = CONFIRMED_EXTRA[i % len(CONFIRMED_EXTRA)]
        lists.append([*base, f"Confirmed by Dr. Reader {i:04d} on file"])
    table = pa.table({"sid": np.arange(len(lists), dtype=np.int32), "statements": lists})
    return table, weights / weights.sum(), n_machine


def build_registry(path: Path, n_ecg: int, seed: int = 20240611, confirmed_share: float = 0.1) -> float:
    """Create the benchmark registry at ``path``; returns the seconds it took."""
    t0 = time.perf_counter()
    rng = np.random.default_rng(seed)
    con = connect(path)
    n_person = max(1, n_ecg // 10)
    con.register("persons_arrow", pa.table({
        "person_key": [f"B{i:07d}" for i in range(n_person)],
        "birth_date": (np.datetime64("1925-01-01") + rng.integers(0, 70 * 365, n_person)).astype("datetime64[D]"),
        "sex": rng.choice(np.array(["F", "M"]), n_person),
    }))
    con.execute(
        "INSERT INTO person SELECT person_key, birth_date, sex, 'Benchmark Site', NULL, "
        "DATE '2024-12-31', 'bench' FROM persons_arrow"
    )
    lists, weights, n_machine = _statement_lists(rng)
    con.register("lists_arrow", lists)
    chunk = 1_000_000
    for start in range(0, n_ecg, chunk):
        n = min(chunk, n_ecg - start)
        confirmed = rng.random(n) < confirmed_share
        frame = pa.table({
            "i": np.arange(start, start + n, dtype=np.int64),
            "person": rng.integers(0, n_person, n),
            "day": rng.integers(0, 20 * 365, n),
            "vr": np.round(rng.normal(72, 16, n).clip(25, 180)),
            "ar_factor": np.where(rng.random(n) < 0.01, 2.0, 1.0),
            "pr": np.where(rng.random(n) < 0.12, np.nan, np.round(rng.normal(165, 28, n).clip(80, 420))),
            "qrs": np.round(rng.gamma(30, 3.2, n).clip(60, 220)),
            "axis": np.round(rng.normal(25, 40, n).clip(-120, 200)),
            "sid": rng.choice(n_machine, n, p=weights).astype(np.int32),
            "csid": (n_machine + rng.integers(0, N_READERS, n)).astype(np.int32),
            "confirmed": confirmed,
        })
        con.register("chunk_arrow", frame)
        con.execute(
            """
            INSERT INTO ecg BY NAME
            SELECT 'K' || c.i AS ecg_key, 'B' || lpad(CAST(c.person AS VARCHAR), 7, '0') AS person_key,
                   TIMESTAMP '2004-01-01 08:00:00' + to_days(CAST(c.day AS INTEGER)) AS acquired_at,
                   'Benchmark Site' AS site, 'machine' AS read_kind,
                   c.vr AS ventricular_rate, c.vr * c.ar_factor AS atrial_rate,
                   CASE WHEN isnan(c.pr) THEN NULL ELSE c.pr END AS pr_ms, c.qrs AS qrs_ms,
                   400.0 AS qt_ms, 420.0 AS qtc_ms, 50.0 AS p_axis, c.axis AS qrs_axis,
                   40.0 AS t_axis, l.statements, []::VARCHAR[] AS statement_codes,
                   'bench' AS source_id
            FROM chunk_arrow AS c JOIN lists_arrow AS l ON l.sid = c.sid
            """
        )
        con.execute(
            """
            INSERT INTO ecg BY NAME
            SELECT 'K' || c.i AS ecg_key, 'B' || lpad(CAST(c.person AS VARCHAR), 7, '0') AS person_key,
                   TIMESTAMP '2004-01-01 08:00:00' + to_days(CAST(c.day AS INTEGER)) AS acquired_at,
                   'Benchmark Site' AS site, 'confirmed' AS read_kind,
                   c.vr AS ventricular_rate, c.vr * c.ar_factor AS atrial_rate,
                   CASE WHEN isnan(c.pr) THEN NULL ELSE c.pr END AS pr_ms, c.qrs AS qrs_ms,
                   400.0 AS qt_ms, 420.0 AS qtc_ms, 50.0 AS p_axis, c.axis AS qrs_axis,
                   40.0 AS t_axis, l.statements, []::VARCHAR[] AS statement_codes,
                   'bench' AS source_id
            FROM chunk_arrow AS c JOIN lists_arrow AS l ON l.sid = c.csid
            WHERE c.confirmed
            """
        )
        con.unregister("chunk_arrow")
    con.execute(
        "INSERT INTO procedure SELECT person_key, DATE '2015-06-01', 'ICD-10-PCS', '0JH606Z', 'bench' "
        "FROM person WHERE hash(person_key) % 50 = 0"
    )
    con.close()
    return time.perf_counter() - t0


def ingest_floor_seconds(con, workdir: Path) -> float:
    """Seconds to load the ecg rows from Parquet into a new table: a floor for any ingest."""
    parquet = workdir / "ecg_floor.parquet"
    con.execute(f"COPY ecg TO '{parquet}' (FORMAT parquet)")
    t0 = time.perf_counter()
    con.execute(f"CREATE TABLE _ingest_floor AS SELECT * FROM read_parquet('{parquet}')")
    seconds = time.perf_counter() - t0
    con.execute("DROP TABLE _ingest_floor")
    parquet.unlink()
    return seconds


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--db", type=Path, help="existing registry to phenotype (else one is built)")
    parser.add_argument("--n-ecg", type=int, default=5_000_000, help="ECG tracings to build")
    parser.add_argument("--runs", type=int, default=3, help="timed runs (median reported)")
    parser.add_argument("--rules", default="default-v1")
    parser.add_argument("--workdir", type=Path, default=Path(tempfile.gettempdir()))
    args = parser.parse_args(argv)

    path = args.db or args.workdir / f"dromos_bench_{args.n_ecg}.duckdb"
    if args.db is None and not path.exists():
        print(f"building {path} with {args.n_ecg:,} tracings ...", flush=True)
        print(f"  built in {build_registry(path, args.n_ecg):.1f} s")
    con = connect(path)
    n_rows, n_keys = con.execute("SELECT count(*), count(DISTINCT ecg_key) FROM ecg").fetchall()[0]
    print(f"registry {path}: {n_rows:,} reads of {n_keys:,} tracings")
    floor = ingest_floor_seconds(con, args.workdir)
    times, steps = [], []
    for run in range(args.runs):
        # Run 1 starts from no phenotype tables (rebuild); later runs replace the rule set's rows.
        summary = run_phenotype(con, args.rules, beats=False, rebuild=run == 0)
        times.append(summary["seconds"])
        steps.append(summary["timings"])
        print(f"  run {run + 1} ({'fresh' if run == 0 else 'rerun'}): {summary['seconds']:.1f} s")
    median = statistics.median(times)
    print(f"phenotype {args.rules}: median {median:.1f} s over {args.runs} runs, "
          f"{n_keys / median:,.0f} ECGs/s")
    for step in steps[0]:
        print(f"  {step:<24}{statistics.median(s[step] for s in steps):8.2f} s")
    print(f"ingest floor (Parquet -> table of the same ecg rows): {floor:.1f} s; "
          f"phenotype / floor = {median / floor:.2f} (target for phenotype / ingest: <= 0.5)")
    print("av_category:", {k: v for k, v in summary["av_category"].items() if v})
    print("ventricular_conduction:", {k: v for k, v in summary["ventricular_conduction"].items() if v})
    print("rhythm_class:", {k: v for k, v in summary["rhythm_class"].items() if v})
    con.close()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
