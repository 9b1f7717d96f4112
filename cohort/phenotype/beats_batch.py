"""Beat-level AV conduction pattern of every strip in the registry (table ``beat_pattern``).

``classify_registry(con)`` numbers the strips (``sql/phenotype/beat_strips.sql``), reads
``wave_event`` through DuckDB as Arrow columns (one query, ordered by strip number, kind and
time; ``sql/phenotype/beat_events.sql``), splits them into per-strip QRS and P runs with numpy,
and writes one row per ``ecg_key`` into ``beat_pattern``
(``sql/phenotype/beat_pattern_table.sql``).

Speed: many registry strips are clean 1:1 conduction, some with one missed P detection. Those
are recognised and classified in vectorized passes over the concatenated arrays
(``cohort.phenotype.beats_vector``), under conditions strict enough that the per-strip
classifier provably reaches the same result; every other strip goes through
``cohort.phenotype.beats.classify_sorted``.
"""

from __future__ import annotations

import dataclasses
import hashlib
import multiprocessing
import os
from collections.abc import Callable
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa

from cohort.phenotype.beats import BeatRules, classify_sorted, resolve_rules
from cohort.phenotype.beats_vector import COLUMNS, StripRuns, may_settle, vectorized_rows
from cohort.sqlfiles import read_sql

ProgressFn = Callable[[int, int], None]

# Below this many per-strip cases, starting worker processes costs more than it saves.
_MIN_PARALLEL = 2_000
# More workers than this gain little: the vectorized paths, reading and writing stay serial.
_MAX_AUTO_WORKERS = 8
# The strips, onsets and rules forked workers classify, inherited from the parent (not pickled).
_FORKED_WORK: tuple[StripRuns, _FiniteOnsets, BeatRules] | None = None



def classify_registry(con, *, rules: BeatRules | str | None = None,
                      progress: ProgressFn | None = None, workers: int | None = None) -> int:
    """Classify every strip of ``wave_event`` and (re)create ``beat_pattern``; rows written.

    Parameters
    ----------
    con
        An open DuckDB connection to the registry.
    rules
        A BeatRules, a rule-file path, or None for ``beats-v1``.
    progress
        Optional callable ``progress(done, total)`` called as strips are classified.
    workers
        Processes for the strips that need the per-strip classifier; None: the usable cores
        (at most 8) where processes can be forked, else 1 (in-process). Results do not depend
        on it.
    """
    r = resolve_rules(rules)
    with _strip_digests(con):
        return _classify(con, r, progress, workers, changed_only=False)[0]


def refresh_registry(con, *, rules: BeatRules | str | None = None,
                     progress: ProgressFn | None = None, workers: int | None = None
                     ) -> tuple[int, int]:
    """Bring ``beat_pattern`` up to date with ``wave_event``; (rows, strips classified now).

    Nothing is classified while beat_run says the rows were computed from the same wave events
    (fingerprint), thresholds and classifier source, so re-running the phenotype (a second
    rule set, a sensitivity analysis) is cheap. When only wave events changed (a new load),
    only new strips and strips whose events changed (``beat_strip`` digests) are classified;
    rows of strips no longer in wave_event are dropped. Other changes classify every strip.
    """
    r = resolve_rules(rules)
    n = _up_to_date_rows(con, r)
    if n is not None:
        return n, 0
    if not _same_classification(con, r):
        n = classify_registry(con, rules=r, progress=progress, workers=workers)
        return n, n
    with _strip_digests(con):
        return _classify(con, r, progress, workers, changed_only=True)


@contextmanager
def _strip_digests(con):
    """Temporary table phen_beat_digest: the digest of each strip of wave_event now."""
    con.execute("CREATE OR REPLACE TEMP TABLE phen_beat_digest AS "
                + read_sql("phenotype/beat_strip_digest.sql"))
    try:
        yield
    finally:
        con.execute("DROP TABLE IF EXISTS phen_beat_digest")


def _classify(con, r: BeatRules, progress: ProgressFn | None, workers: int | None, *,
              changed_only: bool) -> tuple[int, int]:
    """Classify every strip, or only new and changed ones (keeping the stored rows of the
    others), and write beat_pattern; (rows, strips classified)."""
    strips = _read_strips(con, "phenotype/beat_strips_changed.sql" if changed_only
                          else "phenotype/beat_strips.sql")
    columns = classify_strips(strips, r, progress=progress, workers=workers)
    rows = _write(con, strips.keys, columns, r, keep_stored=changed_only)
    return rows, len(strips.keys)


def _run_row(con, r: BeatRules, n_strips: int) -> dict:
    """The beat_run row describing beat patterns computed now from ``wave_event``."""
    waves, fingerprint = con.execute(read_sql("phenotype/wave_fingerprint.sql")).fetchone()
    return {
        "rules_id": r.rules_id,
        "rules_fingerprint": _rules_fingerprint(r),
        "classifier_fingerprint": _classifier_fingerprint(),
        "wave_events": waves, "wave_fingerprint": fingerprint, "n_strips": n_strips,
    }


def _rules_fingerprint(r: BeatRules) -> str:
    """sha256 of every beat threshold (a changed value under the same rule id invalidates)."""
    rules_text = repr(sorted(dataclasses.asdict(r).items()))
    return hashlib.sha256(rules_text.encode("utf-8")).hexdigest()


def _classifier_fingerprint() -> str:
    """sha256 of the classifier's source (this module, beats.py, beats_vector.py): code changes
    invalidate."""
    here = Path(__file__).resolve().parent
    digest = hashlib.sha256()
    for name in ("beats.py", "beats_batch.py", "beats_vector.py"):
        digest.update((here / name).read_bytes())
    return digest.hexdigest()


def _stored_run(con, *tables: str) -> dict | None:
    """The beat_run row, when beat_pattern, beat_run and ``tables`` exist (else None)."""
    wanted = {"beat_pattern", "beat_run", *tables}
    present = {row[0] for row in con.execute(
        "SELECT table_name FROM information_schema.tables WHERE table_schema = current_schema() "
        "AND table_name IN (SELECT unnest($names))", {"names": sorted(wanted)}).fetchall()}
    if present != wanted:
        return None
    cur = con.execute("SELECT * FROM beat_run")
    rows = cur.fetchall()
    names = [d[0] for d in cur.description]
    return dict(zip(names, rows[0], strict=True)) if len(rows) == 1 else None


def _up_to_date_rows(con, r: BeatRules) -> int | None:
    """Rows of beat_pattern when beat_run says they were computed from what is there now."""
    stored = _stored_run(con)
    if stored is None:
        return None
    n = con.execute("SELECT count(*) FROM beat_pattern").fetchone()[0]
    now = _run_row(con, r, n)
    return n if all(stored[k] == v for k, v in now.items()) else None


def _same_classification(con, r: BeatRules) -> bool:
    """Whether the stored rows came from these beat rules and this classifier, with per-strip
    digests (``beat_strip``) to tell which strips changed."""
    stored = _stored_run(con, "beat_strip")
    return stored is not None and (
        stored["rules_id"], stored["rules_fingerprint"], stored["classifier_fingerprint"]
    ) == (r.rules_id, _rules_fingerprint(r), _classifier_fingerprint())


def _read_strips(con, strips_sql: str = "phenotype/beat_strips.sql") -> StripRuns:
    """Ordered events as numpy arrays with the QRS and P run boundaries of each strip.

    The strips (every strip: ``beat_strips.sql``; or those ``strips_sql`` names) are numbered
    first (temporary table phen_beat_strip, one row per ecg_key), so the events are sorted by
    integers and the keys are read once per strip, not per event.
    """
    con.execute("CREATE OR REPLACE TEMP TABLE phen_beat_strip AS "
                + read_sql(strips_sql))
    try:
        rows = con.execute("SELECT ecg_key FROM phen_beat_strip ORDER BY strip_no").fetchall()
        table = _arrow(con.sql(read_sql("phenotype/beat_events.sql")))
    finally:
        con.execute("DROP TABLE IF EXISTS phen_beat_strip")
    keys = [row[0] for row in rows]
    strip_no = table.column("strip_no").to_numpy().astype(np.int64)
    t = table.column("t_ms").to_numpy().astype(np.float64)
    is_p = table.column("is_p").to_numpy().astype(np.int64)
    n = len(keys)
    # rows are ordered by (strip, is_p, t): the run boundaries of key 2*strip + is_p
    bounds = np.searchsorted(2 * strip_no + is_p, np.arange(2 * n + 1))
    return StripRuns(keys, t, bounds[0:2 * n:2], bounds[1:2 * n + 1:2], bounds[1:2 * n + 1:2],
                   bounds[2:2 * n + 2:2])


def _arrow(relation) -> pa.Table:
    """A DuckDB relation as an Arrow table (``to_arrow_table`` in DuckDB 2, ``arrow`` before)."""
    to_table = getattr(relation, "to_arrow_table", None)
    out = to_table() if to_table else relation.arrow()
    return out.read_all() if isinstance(out, pa.RecordBatchReader) else out


def classify_strips(strips: StripRuns, r: BeatRules, *, progress: ProgressFn | None = None,
                    workers: int | None = None) -> dict:
    """Column lists of beat_pattern (without keys) for all strips (workers: see
    :func:`classify_registry`).

    The strips no vectorized path can settle (by shape, ``may_settle``) go to the per-strip
    classifier first, so worker processes work on them while the vectorized passes run here;
    the candidates those passes leave follow.
    """
    n = len(strips.keys)
    cols: dict[str, list] = {c: [None] * n for c in COLUMNS}
    workers = default_workers() if workers is None else workers
    with _SlowStrips(strips, r, workers) as slow:
        settle = may_settle(strips, r)
        slow.submit(np.flatnonzero(~settle))
        fast = vectorized_rows(strips, r)
        for c, values in fast.items():
            if c != "index":
                for i, v in zip(fast["index"], values, strict=True):
                    cols[c][i] = v
        left = settle.copy()
        left[fast["index"]] = False
        slow.submit(np.flatnonzero(left))
        n_done = len(fast["index"])
        for index, rows in slow.results():
            for i, row in zip(index.tolist(), rows, strict=True):
                for c, v in zip(COLUMNS, row, strict=True):
                    cols[c][i] = v
            n_done += len(index)
            if progress:
                progress(n_done, n)
    if progress:
        progress(n, n)
    return cols


@dataclass
class _FiniteOnsets:
    """The finite onsets of all strips in event order, and how many precede each event.

    Non-finite onsets (NaN sorts last in DuckDB, -inf first) are dropped for all strips at
    once: the runs stay contiguous in ``t``, at positions counted by ``kept``.
    """

    t: np.ndarray
    kept: np.ndarray

    @classmethod
    def of(cls, strips: StripRuns) -> _FiniteOnsets:
        finite = np.isfinite(strips.t)
        return cls(strips.t[finite], np.concatenate(([0], np.cumsum(finite))))


def _slow_items(strips: StripRuns, onsets: _FiniteOnsets, index: np.ndarray
                ) -> list[tuple[list, list, int]]:
    """(P onsets, QRS onsets, non-finite onsets dropped) of the given strips (ascending strip
    numbers), as Python lists."""
    if len(index) == 0:
        return []
    kept = onsets.kept
    ps, pe = kept[strips.p_start[index]], kept[strips.p_end[index]]
    qs, qe = kept[strips.q_start[index]], kept[strips.q_end[index]]
    raw = (strips.p_end[index] - strips.p_start[index]) + (strips.q_end[index] - strips.q_start[index])
    dropped = raw - (pe - ps) - (qe - qs)
    # one list of the events the strips span (QRS runs come first in a strip)
    lo, hi = int(qs[0]), int(pe[-1])
    t = onsets.t[lo:hi].tolist()
    return [(t[a:b], t[c:d], k) for a, b, c, d, k in zip(
        (ps - lo).tolist(), (pe - lo).tolist(), (qs - lo).tolist(), (qe - lo).tolist(),
        dropped.tolist(), strict=True)]


def default_workers() -> int:
    """Worker processes used when none are asked for: the usable cores (at most 8) where the
    platform can fork, else 1. A spawned worker would re-import the caller's main script, which
    a script without a main guard does not survive, so spawning is only done on request."""
    if "fork" not in multiprocessing.get_all_start_methods():
        return 1
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    return max(1, min(_MAX_AUTO_WORKERS, cores or 1))


class _SlowStrips:
    """The strips for the per-strip classifier, classified in worker processes or in-process.

    ``submit`` hands over strip numbers; once ``_MIN_PARALLEL`` strips are waiting (and more
    than one worker is allowed) a pool starts and takes them in chunks while the caller goes
    on; ``results`` yields (strip numbers, rows) per chunk in submission order. Where the
    platform can fork, workers inherit the strips (nothing is pickled but strip numbers and the
    rows coming back) and run only the pure-Python classifier: they never touch DuckDB, and a
    forked worker leaves through ``os._exit``, so the parent's database is not closed or
    written by it. Elsewhere each chunk's onsets are sent to spawned processes.
    """

    def __init__(self, strips: StripRuns, r: BeatRules, workers: int) -> None:
        self.strips, self.r, self.workers = strips, r, workers
        self.onsets = _FiniteOnsets.of(strips)
        self.waiting: list[np.ndarray] = []
        self.chunks: list[tuple[np.ndarray, object]] = []  # (strip numbers, AsyncResult)
        self.pool = None
        self.fork = "fork" in multiprocessing.get_all_start_methods()

    def __enter__(self) -> _SlowStrips:
        return self

    def __exit__(self, *exc) -> None:
        global _FORKED_WORK
        if self.pool is not None:
            if exc[0] is None:
                self.pool.close()
            else:
                self.pool.terminate()
            self.pool.join()
        _FORKED_WORK = None

    def submit(self, index: np.ndarray) -> None:
        if len(index):
            self.waiting.append(index)
        if self.pool is None and self.workers > 1 and sum(map(len, self.waiting)) >= _MIN_PARALLEL:
            self._start()
        if self.pool is not None:
            for part in self.waiting:
                self._send(part)
            self.waiting = []

    def results(self):
        """(strip numbers, rows) per chunk, in submission order; waits for the workers."""
        for index, pending in self.chunks:
            yield index, pending.get()
        for index in self.waiting:  # in-process
            step = max(1, len(index) // 100)
            for a in range(0, len(index), step):
                part = index[a:a + step]
                yield part, [_row(item, self.r)
                             for item in _slow_items(self.strips, self.onsets, part)]

    def _start(self) -> None:
        global _FORKED_WORK
        if self.fork:
            _FORKED_WORK = (self.strips, self.onsets, self.r)
        method = "fork" if self.fork else "spawn"
        self.pool = multiprocessing.get_context(method).Pool(self.workers)

    def _send(self, index: np.ndarray) -> None:
        size = max(1, -(-len(index) // (self.workers * 8)))
        for a in range(0, len(index), size):
            part = index[a:a + size]
            if self.fork:
                pending = self.pool.apply_async(_rows_of_strips, (part,))
            else:
                items = _slow_items(self.strips, self.onsets, part)
                pending = self.pool.apply_async(_rows_of_items, (items, self.r))
            self.chunks.append((part, pending))


def _rows_of_strips(index: np.ndarray) -> list[tuple]:
    """Rows of the given strips of the work a forked worker inherited."""
    strips, onsets, r = _FORKED_WORK
    return [_row(item, r) for item in _slow_items(strips, onsets, index)]


def _rows_of_items(items: list, r: BeatRules) -> list[tuple]:
    return [_row(item, r) for item in items]


def _row(item: tuple[list, list, int], r: BeatRules) -> tuple:
    """beat_pattern values (without key and rules id) of one strip, in COLUMNS order.

    ``item`` holds the strip's finite P and QRS onsets and how many non-finite ones were
    dropped (see :func:`_slow_items`).
    """
    p, q, dropped = item
    res = classify_sorted(p, q, r, dropped=dropped, p_table=False)
    return (res.pattern, res.ratio, res.atrial_rate_bpm, res.ventricular_rate_bpm,
            res.escape_rate_bpm, res.pr_median_ms, res.n_p, res.n_qrs, res.n_not_conducted,
            list(res.evidence))


# --------------------------------------------------------------------------------------------
# Output
# --------------------------------------------------------------------------------------------
def _in_transaction(con) -> bool:
    """Whether the caller holds an open transaction on ``con``.

    DuckDB gives every autocommit statement its own transaction id but keeps one id inside an
    explicit transaction; a failed BEGIN would abort the caller's transaction, so we ask.
    """
    first = con.execute("SELECT txid_current()").fetchall()[0][0]
    return con.execute("SELECT txid_current()").fetchall()[0][0] == first


def _write(con, keys: list[str], cols: dict, r: BeatRules, *, keep_stored: bool) -> int:
    """Recreate beat_pattern with the new rows (and, when ``keep_stored``, the stored rows
    still valid: ``beat_pattern_kept.sql``), beat_strip and the beat_run row, in one
    transaction (the caller's, if open); rows of beat_pattern."""
    rules_id = r.rules_id
    table = pa.table({
        "ecg_key": pa.array(keys, pa.string()),
        "pattern": pa.array(cols["pattern"], pa.string()),
        "ratio": pa.array(cols["ratio"], pa.string()),
        "atrial_rate": pa.array(cols["atrial_rate"], pa.float64()),
        "ventricular_rate": pa.array(cols["ventricular_rate"], pa.float64()),
        "escape_rate": pa.array(cols["escape_rate"], pa.float64()),
        "pr_median_ms": pa.array(cols["pr_median_ms"], pa.float64()),
        "n_p": pa.array(cols["n_p"], pa.int32()),
        "n_qrs": pa.array(cols["n_qrs"], pa.int32()),
        "n_not_conducted": pa.array(cols["n_not_conducted"], pa.int32()),
        "evidence": pa.array(cols["evidence"], pa.list_(pa.string())),
        "rules_id": pa.array([rules_id] * len(keys), pa.string()),
    })
    own = not _in_transaction(con)
    if own:
        con.execute("BEGIN TRANSACTION")
    try:
        if keep_stored:  # copied aside: beat_pattern is created anew below
            con.execute("CREATE OR REPLACE TEMP TABLE phen_beat_kept AS "
                        + read_sql("phenotype/beat_pattern_kept.sql"))
        con.execute(read_sql("phenotype/beat_pattern_table.sql"))
        if keep_stored:
            con.execute("INSERT INTO beat_pattern SELECT * FROM phen_beat_kept")
            con.execute("DROP TABLE phen_beat_kept")
        con.register("_beat_pattern_rows", table)
        con.execute("INSERT INTO beat_pattern SELECT * FROM _beat_pattern_rows")
        con.unregister("_beat_pattern_rows")
        con.execute(read_sql("phenotype/beat_strip_table.sql"))
        con.execute("INSERT INTO beat_strip SELECT ecg_key, digest FROM phen_beat_digest")
        n_rows = con.execute("SELECT count(*) FROM beat_pattern").fetchone()[0]
        run = _run_row(con, r, n_rows)
        con.execute(read_sql("phenotype/beat_run_table.sql"))
        con.execute(
            "INSERT INTO beat_run VALUES ($rules_id, $rules_fingerprint, $classifier_fingerprint, "
            "$wave_events, $wave_fingerprint, $n_strips, current_timestamp::TIMESTAMP)", run)
        if own:
            con.execute("COMMIT")
    except Exception:
        if own:
            con.execute("ROLLBACK")
        raise
    return n_rows
