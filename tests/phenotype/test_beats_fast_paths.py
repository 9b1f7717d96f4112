"""The vectorized 1:1 paths (cohort/phenotype/beats_vector.py) against the per-strip classifier.

Every strip a vectorized path settles must get exactly the row ``classify_sorted`` gives it;
each feature the paths vectorize (plain 1:1, a sinus rate that wanders beyond the +-10 % band,
one missed P anywhere in the strip, strip-edge QRS and P) is covered by built strips and by
generated ones, and strips just outside the conditions must be left to the per-strip path.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from cohort.phenotype.beats import classify_sorted, load_rules
from cohort.phenotype.beats_vector import (
    COLUMNS,
    StripRuns,
    _missed_p_candidates,
    _plain_candidates,
    vectorized_rows,
)
from synthetic_registry.strips import simulate_strip
from tests.phenotype.test_beats import jitter, sinus

RULES = load_rules()
PROPERTY = settings(max_examples=60, deadline=None, derandomize=True,
                    suppress_health_check=[HealthCheck.too_slow])


def runs(strips: list[tuple[list, list]]) -> StripRuns:
    """Concatenated event arrays as the batch reads them: per strip its QRS run, then its P run."""
    t: list[float] = []
    bounds = []
    for p, q in strips:
        q_start = len(t)
        t += sorted(q)
        p_start = len(t)
        t += sorted(p)
        bounds.append((q_start, p_start, p_start, len(t)))
    b = np.asarray(bounds, dtype=np.int64).reshape(-1, 4)
    return StripRuns([str(i) for i in range(len(strips))], np.asarray(t, dtype=float),
                     b[:, 0], b[:, 1], b[:, 2], b[:, 3])


def per_strip_row(p: list, q: list) -> tuple:
    res = classify_sorted(sorted(p), sorted(q), RULES, p_table=False)
    return (res.pattern, res.ratio, res.atrial_rate_bpm, res.ventricular_rate_bpm,
            res.escape_rate_bpm, res.pr_median_ms, res.n_p, res.n_qrs, res.n_not_conducted,
            list(res.evidence))


def vectorized(strips: list[tuple[list, list]]) -> dict[int, tuple]:
    """Rows the vectorized paths give, by strip number; each checked against classify_sorted."""
    out = vectorized_rows(runs(strips), RULES)
    rows = {i: tuple(out[c][pos] for c in COLUMNS) for pos, i in enumerate(out["index"].tolist())}
    for i, row in rows.items():
        assert row == per_strip_row(*strips[i]), f"strip {i}: {strips[i]}"
    return rows


def taken_by(path, strips: list[tuple[list, list]]) -> set[int]:
    """Strips a path's candidate and cadence conditions accept (before the conduction checks)."""
    found = path(runs(strips), RULES)
    if found is None:
        return set()
    candidates, ok = found
    return set(candidates.index[ok].tolist())


def drop_p(strip: tuple[list, list], k: int) -> tuple[list, list]:
    p, q = strip
    return [x for i, x in enumerate(p) if i != k], q


def wandering_sinus(n: int, pp: float, swing: float, pr: float = 170.0) -> tuple[list, list]:
    """1:1 strip whose P-P drifts slowly from pp to pp * (1 + swing): beyond the +-10 % band of
    the strip median, yet every P-P close to its neighbours (common practice, no source)."""
    intervals = pp * (1 + swing * np.arange(n) / (n - 1))
    p = (100.0 + np.concatenate(([0.0], np.cumsum(intervals[:-1])))).tolist()
    return p, [x + pr for x in p]


def test_plain_strips_match_and_are_taken():
    strips = [jitter(*sinus(14, 800, 160), seed=1), jitter(*sinus(10, 600, 260), seed=2)]
    assert set(vectorized(strips)) == {0, 1}


def test_wandering_sinus_rate_takes_the_local_cadence_path():
    strips = [wandering_sinus(60, 700, 0.5), jitter(*wandering_sinus(120, 650, 0.6), seed=4)]
    pp = np.diff(strips[0][0])
    assert pp.max() / np.median(pp) > 1.1  # outside the global band
    assert set(vectorized(strips)) == {0, 1}


@pytest.mark.parametrize("k", [1, 2, 6, 11, 12])
def test_one_missed_p_is_inferred_as_per_strip(k):
    # k = 1: the gap opens the strip; k = 12: the gap ends at the trailing P (QRS of P 12 cut)
    p, q = jitter(*sinus(14, 800, 170), seed=k)
    strip = drop_p((p, q[:-1] if k == 12 else q), k)
    rows = vectorized([strip])
    assert set(rows) == {0}
    assert "inferred_p=1" in rows[0][-1]


def test_missed_p_with_edge_events():
    p, q = sinus(13, 750, 150)
    q = [p[0] - 750 + 150, *q[:-1]]  # QRS of a P before the strip; last QRS cut off
    assert set(vectorized([drop_p((p, q), 5)])) == {0}


def test_strips_outside_the_conditions_are_left_to_the_per_strip_classifier():
    base = sinus(14, 800, 170)
    two_missed = drop_p(drop_p(base, 8), 4)
    early_gap = (sorted([*drop_p(base, 6)[0][:6], base[0][5] + 1.55 * 800, *base[0][7:]]), base[1])
    bigeminy_like = ([100.0 + sum(([560.0, 1040.0] * 8)[:i]) for i in range(14)],
                     [100.0 + sum(([560.0, 1040.0] * 8)[:i]) + 170 for i in range(14)])
    ectopic = (base[0], sorted([*base[1], base[0][6] + 450]))
    strips = [two_missed, early_gap, bigeminy_like, ectopic]
    assert not vectorized(strips)


def test_each_path_takes_its_own_strips():
    strips = [sinus(12), drop_p(sinus(12), 5)]
    assert taken_by(_plain_candidates, strips) == {0}
    assert taken_by(_missed_p_candidates, strips) == {1}


@PROPERTY
@given(pp=st.floats(300, 1400), pr=st.floats(90, 380), n=st.integers(3, 40),
       spread=st.floats(0, 60), wander=st.floats(-0.4, 0.6), noise=st.floats(0, 0.25),
       missed=st.integers(-1, 39), shift=st.floats(-0.3, 0.3), lead=st.booleans(),
       cut=st.booleans(), seed=st.integers(0, 2**16))
def test_generated_near_1_to_1_strips_match_the_per_strip_classifier(
        pp, pr, n, spread, wander, noise, missed, shift, lead, cut, seed):
    # P-P noise, PR spread and the shifted P next to a missed one reach every margin
    rng = np.random.default_rng(seed)
    intervals = pp * (1 + wander * np.arange(n) / max(n - 1, 1)) * rng.uniform(1 - noise, 1 + noise, n)
    p = (100.0 + np.cumsum(intervals)).tolist()
    q = [t + pr + rng.uniform(-spread, spread) for t in p]
    if 0 <= missed < n:
        del p[missed]
        if missed < len(p):
            p[missed] += shift * pp
    if lead:
        q.insert(0, p[0] - pp + pr)
    if cut:
        q.pop()
    strip = (sorted(p), sorted(q))
    if all(math.isfinite(x) for x in strip[0] + strip[1]):
        vectorized([strip])


def test_simulated_registry_strips_match_the_per_strip_classifier():
    rng = np.random.default_rng(5)
    strips = []
    for i in range(400):
        truth = simulate_strip(("normal", "first_degree")[i % 2], rng,
                               duration_ms=(10_000.0, 60_000.0)[i % 5 == 0])
        strips.append((truth.p_ms.tolist(), truth.qrs_ms.tolist()))
    rows = vectorized(strips)
    inferred = [i for i, row in rows.items() if "inferred_p=1" in row[-1]]
    assert len(rows) >= 200 and inferred  # both paths are exercised
