"""Property tests of the beat classifier (hypothesis, derandomized so runs are reproducible)."""

from __future__ import annotations

import dataclasses
import math

from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from cohort.phenotype.beats import FATES, QRS_ROLES, classify_sorted, classify_strip, load_rules
from cohort.vocabulary import BEAT_PATTERNS
from tests.phenotype.test_beats import (
    independent,
    k_to_one,
    mobitz_ii,
    sinus,
    wenckebach,
    with_pacs,
)

PROPERTY = settings(max_examples=60, deadline=None, derandomize=True,
                    suppress_health_check=[HealthCheck.too_slow])

any_times = st.lists(
    st.one_of(st.floats(min_value=-1e5, max_value=1e6),
              st.sampled_from([math.nan, math.inf, -math.inf])),
    max_size=120,
)
intervals = st.lists(st.floats(min_value=1.0, max_value=2500.0), min_size=0, max_size=80)


def _check_valid(res, n_p_finite: int, n_q_finite: int) -> None:
    assert res.pattern in BEAT_PATTERNS
    assert res.sentence and res.evidence[-1] == res.sentence
    assert {w.fate for w in res.p_waves} <= set(FATES)
    assert set(res.qrs_roles) <= set(QRS_ROLES)
    assert res.n_p == n_p_finite and res.n_qrs == n_q_finite
    assert 0 <= res.n_not_conducted <= len(res.p_waves)
    for rate in (res.atrial_rate_bpm, res.ventricular_rate_bpm, res.escape_rate_bpm):
        assert rate is None or (math.isfinite(rate) and rate > 0)


@PROPERTY
@given(p=any_times, q=any_times)
def test_random_event_sequences_never_crash(p, q):
    res = classify_strip(p, q)
    _check_valid(res, sum(math.isfinite(x) for x in p), sum(math.isfinite(x) for x in q))


@PROPERTY
@given(pp=intervals, rr=intervals, start=st.floats(0, 3000))
def test_random_rhythms_never_crash(pp, rr, start):
    # cumulative intervals reach the deeper branches more often than raw random times
    p = [start + sum(pp[: i + 1]) for i in range(len(pp))]
    q = [start + 50 + sum(rr[: i + 1]) for i in range(len(rr))]
    _check_valid(classify_strip(p, q), len(p), len(q))


@PROPERTY
@given(pp=intervals, rr=intervals, start=st.floats(0, 3000))
def test_batch_result_without_p_table_matches_the_full_result(pp, rr, start):
    # the batch skips the per-P rows; the count of non-conducted P waves must still be theirs
    p = sorted(start + sum(pp[: i + 1]) for i in range(len(pp)))
    q = sorted(start + 50 + sum(rr[: i + 1]) for i in range(len(rr)))
    r = load_rules()
    full = classify_sorted(p, q, r)
    lean = classify_sorted(p, q, r, p_table=False)
    assert lean.p_waves == ()
    assert dataclasses.replace(lean, p_waves=full.p_waves) == full
    assert full.n_not_conducted == sum(1 for w in full.p_waves if w.conducted is False)


def _n(pp: float, duration: float = 10_000.0) -> int:
    return max(4, int(duration // pp))


# builder of a clean strip of each pattern at atrial cycle pp (ms)
CLEAN = {
    "normal": lambda pp: sinus(_n(pp), pp, 160),
    "first_degree": lambda pp: sinus(_n(pp), pp, 260),
    "mobitz_i": lambda pp: wenckebach([4] * max(2, _n(pp) // 4), pp, 180),
    "mobitz_ii": lambda pp: mobitz_ii([4] * max(2, _n(pp) // 4), pp, 180),
    "two_to_one": lambda pp: k_to_one(2, _n(pp) // 2, pp, 180),
    "high_grade": lambda pp: k_to_one(3, max(2, _n(pp, 12_000) // 3), pp, 180),
    "third_degree": lambda pp: independent(12_000, pp, 1579, 100, 450),
    "blocked_pac": lambda pp: with_pacs(_n(pp), pp, 160, {_n(pp) // 2: 0.55}),
    "av_dissociation": lambda pp: independent(10_000, pp, pp / 1.3, 100, 300),
}

# physiologic sinus rates: 50-110 bpm
sinus_cycle = st.floats(min_value=60_000 / 110, max_value=60_000 / 50)


def _clean_ok(pattern: str, pp: float) -> bool:
    """Exclude the timing coincidences that make complete block look like k:1 conduction."""
    if pattern != "third_degree":
        return True
    ratio = 1579 / pp
    return abs(ratio - round(ratio)) > 0.15


@PROPERTY
@given(pattern=st.sampled_from(sorted(CLEAN)), pp=sinus_cycle)
def test_sinus_rate_within_physiologic_bounds_keeps_the_pattern(pattern, pp):
    assume(_clean_ok(pattern, pp))
    p, q = CLEAN[pattern](pp)
    assert classify_strip(p, q).pattern == pattern


@PROPERTY
@given(pattern=st.sampled_from(sorted(CLEAN)), pp=sinus_cycle,
       shift=st.floats(min_value=-10_000, max_value=1_000_000))
def test_shifting_all_times_keeps_the_pattern(pattern, pp, shift):
    assume(_clean_ok(pattern, pp))
    p, q = CLEAN[pattern](pp)
    base = classify_strip(p, q)
    moved = classify_strip([t + shift for t in p], [t + shift for t in q])
    assert moved.pattern == base.pattern == pattern
    assert moved.ratio == base.ratio
