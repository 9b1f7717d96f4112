"""Registry batch mode of the beat classifier (table beat_pattern) on a tiny DuckDB."""

from __future__ import annotations

import re

import duckdb
import numpy as np
import pyarrow as pa
import pytest

from cohort.phenotype.beats import DEFAULT_RULES_PATH, classify_strip, load_rules
from cohort.phenotype.beats_batch import (
    _read_strips,
    classify_registry,
    refresh_registry,
)
from cohort.phenotype.beats_vector import vectorized_rows
from cohort.registry import ensure_schema
from cohort.sqlfiles import read_sql
from cohort.vocabulary import BEAT_PATTERNS
from tests.phenotype.test_beats import (
    PATTERN_CASES,
    independent,
    jitter,
    mobitz_ii,
    sinus,
    wenckebach,
)

EXPECTED_COLUMNS = [
    ("ecg_key", "VARCHAR"), ("pattern", "VARCHAR"), ("ratio", "VARCHAR"),
    ("atrial_rate", "DOUBLE"), ("ventricular_rate", "DOUBLE"), ("escape_rate", "DOUBLE"),
    ("pr_median_ms", "DOUBLE"), ("n_p", "INTEGER"), ("n_qrs", "INTEGER"),
    ("n_not_conducted", "INTEGER"), ("evidence", "VARCHAR[]"), ("rules_id", "VARCHAR"),
]


def _registry(strips: dict[str, tuple[list, list]]):
    con = duckdb.connect()
    ensure_schema(con)
    _add_events(con, strips)
    return con


def _add_events(con, strips: dict[str, tuple[list, list]]) -> None:
    keys, ts, kinds = [], [], []
    for key, (p, q) in strips.items():
        keys += [key] * (len(p) + len(q))
        ts += list(p) + list(q)
        kinds += ["P"] * len(p) + ["QRS"] * len(q)
    con.register("_events", pa.table({"ecg_key": keys, "t_ms": np.asarray(ts, float), "kind": kinds}))
    con.execute("INSERT INTO wave_event SELECT ecg_key, t_ms, kind, 'test' FROM _events")
    con.unregister("_events")


def _row(res, key: str) -> tuple:
    return (key, res.pattern, res.ratio, res.atrial_rate_bpm, res.ventricular_rate_bpm,
            res.escape_rate_bpm, res.pr_median_ms, res.n_p, res.n_qrs, res.n_not_conducted,
            list(res.evidence), res.rules_id)


@pytest.fixture
def strips():
    out = {f"{pattern}-{i}": case for pattern, cases in PATTERN_CASES.items()
           for i, case in enumerate(cases)}
    out["jittered-normal"] = jitter(*sinus(14), seed=3)
    out["nan-onsets"] = ([*sinus(12)[0], float("nan")], sinus(12)[1])
    out["only-p"] = (sinus(10)[0], [])
    return out


def test_batch_rows_equal_per_strip_results(strips):
    con = _registry(strips)
    assert classify_registry(con) == len(strips)
    rows = con.execute("SELECT * FROM beat_pattern ORDER BY ecg_key").fetchall()
    assert [r[0] for r in rows] == sorted(strips)
    for row in rows:
        p, q = strips[row[0]]
        assert tuple(row) == _row(classify_strip(p, q), row[0])


def test_beat_pattern_table_columns_and_types(strips):
    con = _registry(strips)
    classify_registry(con)
    described = con.execute("DESCRIBE beat_pattern").fetchall()
    assert [(c[0], c[1]) for c in described] == EXPECTED_COLUMNS


def test_rerun_replaces_the_table_and_records_the_rules(strips, tmp_path):
    con = _registry(strips)
    classify_registry(con)
    n = classify_registry(con)
    assert con.execute("SELECT count(*), count(DISTINCT ecg_key) FROM beat_pattern").fetchall() == [(n, n)]
    text = DEFAULT_RULES_PATH.read_text(encoding="utf-8")
    path = tmp_path / "beats-alt.toml"
    path.write_text(text.replace('id = "beats-v1"', 'id = "beats-alt"'), encoding="utf-8")
    classify_registry(con, rules=path)
    assert con.execute("SELECT DISTINCT rules_id FROM beat_pattern").fetchall() == [("beats-alt",)]


def test_progress_is_reported(strips):
    calls = []
    classify_registry(_registry(strips), progress=lambda done, total: calls.append((done, total)))
    assert calls[-1] == (len(strips), len(strips))
    assert all(d <= t for d, t in calls)


def test_vectorized_path_matches_the_per_strip_classifier():
    # clean 1:1 strips (with a leading QRS and a closing P cut by the strip edges) take the
    # vectorized path; its rows must equal those of classify_strip exactly
    rng = np.random.default_rng(11)
    strips = {}
    for i in range(40):
        pp, pr = rng.uniform(550, 1150), rng.uniform(110, 320)
        p, q = jitter(*sinus(int(10_000 // pp), pp, pr), seed=i)
        if i % 3 == 0:
            q = [p[0] - pp + pr, *q]  # QRS of a P before the strip
        if i % 4 == 0:
            q = q[:-1]  # strip ends before the last QRS
        strips[f"s{i:02d}"] = (p, q)
    strips["block"] = wenckebach([4, 4, 4])
    strips["m2"] = mobitz_ii([4, 4, 4])
    con = _registry(strips)
    fast = vectorized_rows(_read_strips(con), load_rules())
    keys = sorted(strips)
    taken = {keys[i] for i in fast["index"].tolist()}
    assert len(taken) >= 30 and not {"block", "m2"} & taken
    classify_registry(con)
    for row in con.execute("SELECT * FROM beat_pattern").fetchall():
        assert tuple(row) == _row(classify_strip(*strips[row[0]]), row[0])


def test_sql_pattern_check_matches_the_vocabulary():
    ddl = read_sql("phenotype/beat_pattern_table.sql")
    listed = re.findall(r"'([a-z_]+)'", ddl[ddl.index("CHECK"):])
    assert sorted(listed) == sorted(BEAT_PATTERNS)


def test_batch_works_inside_an_open_transaction():
    con = _registry({"a": sinus(12), "b": independent(12_000, 750, 1579, 100, 450)})
    con.execute("BEGIN TRANSACTION")
    assert classify_registry(con) == 2
    con.execute("ROLLBACK")
    tables = {r[0] for r in con.execute("SHOW TABLES").fetchall()}
    assert "beat_pattern" not in tables


def test_empty_wave_event_writes_an_empty_table():
    con = duckdb.connect()
    ensure_schema(con)
    assert classify_registry(con) == 0
    assert con.execute("SELECT count(*) FROM beat_pattern").fetchall() == [(0,)]


@pytest.mark.parametrize("start_method", ["fork", "spawn"])
def test_worker_processes_give_the_same_rows(strips, monkeypatch, start_method):
    import multiprocessing

    import cohort.phenotype.beats_batch as batch

    if start_method not in multiprocessing.get_all_start_methods():
        pytest.skip(f"no {start_method} start method on this platform")
    con = _registry(strips)
    classify_registry(con, workers=1)
    serial = con.execute("SELECT * FROM beat_pattern ORDER BY ecg_key").fetchall()
    monkeypatch.setattr(batch, "_MIN_PARALLEL", 1)
    if start_method == "spawn":  # as on a platform that cannot fork
        monkeypatch.setattr(multiprocessing, "get_all_start_methods", lambda: ["spawn"])
    classify_registry(con, workers=2)
    assert con.execute("SELECT * FROM beat_pattern ORDER BY ecg_key").fetchall() == serial
    # the registry is still usable and writable after the workers are gone
    con.execute("CREATE TABLE after_workers AS SELECT 1 AS x")
    assert con.execute("SELECT count(*) FROM after_workers").fetchone()[0] == 1


def test_default_workers_are_the_usable_cores_where_forking_is_possible(monkeypatch):
    import multiprocessing

    import cohort.phenotype.beats_batch as batch

    monkeypatch.setattr(multiprocessing, "get_all_start_methods", lambda: ["spawn"])
    assert batch.default_workers() == 1
    monkeypatch.setattr(multiprocessing, "get_all_start_methods", lambda: ["fork", "spawn"])
    assert 1 <= batch.default_workers() <= 8


def test_patterns_are_reused_only_while_waves_rules_and_classifier_are_unchanged(strips, tmp_path):
    """A second phenotype run (another rule set) must not classify every strip again, and any
    change to what the patterns were computed from must (common practice, no source)."""
    con = _registry(strips)
    assert refresh_registry(con) == (len(strips), len(strips))
    before = con.execute("SELECT * FROM beat_pattern ORDER BY ecg_key").fetchall()
    assert refresh_registry(con) == (len(strips), 0)
    assert con.execute("SELECT * FROM beat_pattern ORDER BY ecg_key").fetchall() == before
    # one event fewer: that strip alone is classified again
    con.execute("DELETE FROM wave_event WHERE rowid = (SELECT min(rowid) FROM wave_event)")
    assert refresh_registry(con) == (len(strips), 1)
    assert refresh_registry(con) == (len(strips), 0)
    # same rule id, other threshold: every strip recomputed
    text = DEFAULT_RULES_PATH.read_text(encoding="utf-8")
    changed = re.sub(r"(?m)^p_duplicate_ms = 40.0", "p_duplicate_ms = 45.0", text)
    assert changed != text
    path = tmp_path / "beats-v1.toml"
    path.write_text(changed, encoding="utf-8")
    assert refresh_registry(con, rules=path) == (len(strips), len(strips))
    # a classifier change (its source fingerprint) invalidates every strip too, even when wave
    # events changed as well
    con.execute("UPDATE beat_run SET classifier_fingerprint = 'older'")
    assert refresh_registry(con, rules=path) == (len(strips), len(strips))
    con.execute("UPDATE beat_run SET classifier_fingerprint = 'older'")
    con.execute("DELETE FROM wave_event WHERE rowid = (SELECT max(rowid) FROM wave_event)")
    assert refresh_registry(con, rules=path) == (len(strips), len(strips))


def _stored(con) -> list[tuple]:
    return con.execute("SELECT * FROM beat_pattern ORDER BY ecg_key").fetchall()


def test_new_and_changed_strips_alone_are_classified_and_rows_equal_a_full_run(strips):
    """After a new load only new strips and strips whose events changed are classified; the
    table equals a full classification (common practice, no source)."""
    keys = sorted(strips)
    first = {k: strips[k] for k in keys[: len(keys) // 2]}
    con = _registry(first)
    assert refresh_registry(con) == (len(first), len(first))
    # a new load: the other strips' events, one strip of the first load changed, one removed
    changed, removed = keys[0], keys[1]
    con.execute("DELETE FROM wave_event WHERE ecg_key IN (?, ?)", [changed, removed])
    p, q = strips[keys[-1]]  # the changed strip now holds another strip's events
    later = {k: strips[k] for k in keys[len(keys) // 2:]}
    later[changed] = (p, q)
    _add_events(con, later)
    n_now = len(keys) - 1
    assert refresh_registry(con) == (n_now, len(later))
    incremental = _stored(con)
    assert [row[0] for row in incremental] == sorted(set(keys) - {removed})
    assert con.execute("SELECT count(*) FROM beat_strip").fetchone()[0] == n_now
    classify_registry(con)
    assert _stored(con) == incremental
    assert refresh_registry(con) == (n_now, 0)
    # removing strips alone classifies nothing and drops their rows
    con.execute("DELETE FROM wave_event WHERE ecg_key = ?", [keys[-1]])
    assert refresh_registry(con) == (n_now - 1, 0)
    assert [row[0] for row in _stored(con)] == sorted(set(keys) - {removed, keys[-1]})


def test_a_registry_without_strip_digests_is_classified_in_full(strips):
    # beat_pattern written before beat_strip existed: no digests to compare, so everything
    con = _registry(strips)
    refresh_registry(con)
    con.execute("DROP TABLE beat_strip")
    con.execute("DELETE FROM wave_event WHERE rowid = (SELECT min(rowid) FROM wave_event)")
    assert refresh_registry(con) == (len(strips), len(strips))
    assert con.execute("SELECT count(*) FROM beat_strip").fetchone()[0] == len(strips)


def test_a_failed_incremental_write_leaves_the_stored_patterns(strips, monkeypatch):
    import cohort.phenotype.beats_batch as batch

    con = _registry(strips)
    refresh_registry(con)
    before = _stored(con)
    digests = con.execute("SELECT * FROM beat_strip ORDER BY ecg_key").fetchall()
    con.execute("DELETE FROM wave_event WHERE rowid = (SELECT min(rowid) FROM wave_event)")

    def fail(*args, **kwargs):
        raise RuntimeError("disk full")

    monkeypatch.setattr(batch, "_run_row", fail)
    with pytest.raises(RuntimeError, match="disk full"):
        refresh_registry(con)
    assert _stored(con) == before
    assert con.execute("SELECT * FROM beat_strip ORDER BY ecg_key").fetchall() == digests


def test_a_second_phenotype_run_reuses_the_beat_patterns(strips):
    from cohort.phenotype import run_phenotype

    con = _registry(strips)
    first = run_phenotype(con, "default-v1")
    again = run_phenotype(con, "default-v1")
    assert any("wrote" in note for note in first["notes"])
    assert any("reused" in note for note in again["notes"])
    assert first["av_category"] == again["av_category"]
    forced = run_phenotype(con, "default-v1", rebuild=True)
    assert any("wrote" in note for note in forced["notes"])


def test_the_phenotype_run_says_how_many_strips_it_classified_after_a_new_load(strips):
    from cohort.phenotype import run_phenotype

    keys = sorted(strips)
    con = _registry({k: strips[k] for k in keys[:-2]})
    run_phenotype(con, "default-v1")
    _add_events(con, {k: strips[k] for k in keys[-2:]})
    notes = run_phenotype(con, "default-v1")["notes"]
    assert any(f"2 new or changed strips classified, patterns of {len(keys) - 2} unchanged"
               in note for note in notes)


def test_vectorized_paths_settle_only_strips_of_the_shape_they_take(strips):
    # classify_strips sends the strips may_settle rejects to the per-strip classifier before
    # the vectorized passes run: those passes must never settle one of them
    from cohort.phenotype.beats_vector import may_settle

    con = _registry(strips)
    runs, r = _read_strips(con), load_rules()
    shape = may_settle(runs, r)
    settled = vectorized_rows(runs, r)["index"]
    assert len(settled) and shape[settled].all()
    assert (~shape).any()


@pytest.mark.parametrize("when", ["first batch", "second batch", "never"])
def test_rows_do_not_depend_on_when_the_worker_pool_starts(strips, monkeypatch, when):
    import multiprocessing

    import cohort.phenotype.beats_batch as batch
    from cohort.phenotype.beats_vector import may_settle

    if "fork" not in multiprocessing.get_all_start_methods():
        pytest.skip("no fork start method on this platform")
    con = _registry(strips)
    classify_registry(con, workers=1)
    serial = con.execute("SELECT * FROM beat_pattern ORDER BY ecg_key").fetchall()
    runs, r = _read_strips(con), load_rules()
    shape = may_settle(runs, r)
    left = shape.copy()
    left[vectorized_rows(runs, r)["index"]] = False
    n_first, n_second = int((~shape).sum()), int(left.sum())
    assert n_first >= 1 and n_second >= 1  # both batches are exercised
    threshold = {"first batch": n_first, "second batch": n_first + n_second,
                 "never": n_first + n_second + 1}[when]
    monkeypatch.setattr(batch, "_MIN_PARALLEL", threshold)
    started = []
    real_start = batch._SlowStrips._start
    monkeypatch.setattr(batch._SlowStrips, "_start",
                        lambda self: (started.append(True), real_start(self)))
    classify_registry(con, workers=2)
    assert bool(started) == (when != "never")
    assert con.execute("SELECT * FROM beat_pattern ORDER BY ecg_key").fetchall() == serial
