"""Tests of the beat-level strip simulator (synthetic_registry.strips).

The pattern checks are the textbook descriptions of each rhythm ("facts of the trade",
common practice, no source) unless a source is named beside them.
"""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest

from cohort.errors import DataError
from cohort.vocabulary import BEAT_PATTERNS
from synthetic_registry.strips import PATTERNS, StripTruth, simulate_strip

SEEDS = range(40)


def clean(pattern: str, seed: int, **kw) -> StripTruth:
    """A strip without artefacts, default jitter (10 ms), from a fixed seed."""
    return simulate_strip(pattern, np.random.default_rng(seed), artefacts=False, **kw)


def sinus_pp(s: StripTruth) -> float:
    """Median interval between consecutive on-time P waves."""
    t = s.p_ms[s.p_kind == "sinus"]
    return float(np.median(np.diff(t)))


def runs_of_drops(conducted: np.ndarray) -> list[np.ndarray]:
    """Index arrays of maximal runs of non-conducted P waves."""
    idx = np.flatnonzero(~conducted)
    if idx.size == 0:
        return []
    return np.split(idx, np.flatnonzero(np.diff(idx) > 1) + 1)


def test_patterns_are_vocabulary_keys_without_indeterminate():
    assert set(PATTERNS) == set(BEAT_PATTERNS) - {"indeterminate"}


@pytest.mark.parametrize("pattern", PATTERNS)
def test_same_seed_same_strip_and_consistent_truth(pattern):
    a = simulate_strip(pattern, np.random.default_rng(7), duration_ms=30_000.0)
    b = simulate_strip(pattern, np.random.default_rng(7), duration_ms=30_000.0)
    np.testing.assert_array_equal(a.p_ms, b.p_ms)
    np.testing.assert_array_equal(a.qrs_ms, b.qrs_ms)
    for s in (a, clean(pattern, 3)):
        assert s.pattern == pattern
        assert s.conducted.shape == s.p_ms.shape == s.pr_ms.shape == s.p_kind.shape
        assert s.qrs_kind.shape == s.qrs_p_index.shape == s.qrs_ms.shape
        assert np.all(np.diff(s.p_ms) >= 0) and np.all(np.diff(s.qrs_ms) >= 0)
        assert s.p_ms.min() >= 0 and s.qrs_ms.max() <= s.duration_ms
        linked = s.qrs_p_index >= 0
        np.testing.assert_allclose(
            s.qrs_ms[linked] - s.p_ms[s.qrs_p_index[linked]], s.pr_ms[s.qrs_p_index[linked]]
        )
        assert np.isnan(s.pr_ms[~s.conducted]).all()


@pytest.mark.parametrize("seed", SEEDS)
def test_normal_and_first_degree_conduct_every_p(seed):
    # Normal PR 120-200 ms, first degree PR > 200 ms with 1:1 conduction (Kusumoto FM et al.
    # 2018 ACC/AHA/HRS bradycardia guideline, as quoted in shared/references.md).
    n = clean("normal", seed, jitter_ms=0.0)
    assert n.conducted.all() and n.qrs_ms.size == n.p_ms.size
    assert ((n.pr_ms >= 120) & (n.pr_ms <= 200)).all()
    f = clean("first_degree", seed, jitter_ms=0.0)
    assert f.conducted.all() and (f.pr_ms > 200).all()


@pytest.mark.parametrize("seed", SEEDS)
def test_mobitz_i_groups(seed):
    s = clean("mobitz_i", seed, duration_ms=20_000.0)
    drops = np.flatnonzero(~s.conducted)
    assert drops.size >= 1
    pp = sinus_pp(s)
    for d in drops:
        # The dropped P is on time, the PR after it is shorter than the PR before it.
        assert abs((s.p_ms[d] - s.p_ms[d - 1]) - pp) < 0.2 * pp
        if d + 1 < s.p_ms.size:
            assert s.pr_ms[d + 1] < s.pr_ms[d - 1]
    for a, b in zip(drops[:-1], drops[1:], strict=True):
        # Each full group has one more P than QRS, and the PR lengthens within the group.
        window = (s.qrs_ms > s.p_ms[a]) & (s.qrs_ms < s.p_ms[b])
        assert (b - a) == window.sum() + 1
        prs = s.pr_ms[a + 1 : b]
        assert prs[-1] > prs[0]


@pytest.mark.parametrize("seed", SEEDS)
def test_mobitz_ii_constant_pr_single_drops(seed):
    s = clean("mobitz_ii", seed, duration_ms=20_000.0)
    runs = runs_of_drops(s.conducted)
    assert runs and all(r.size == 1 for r in runs)
    prs = s.pr_ms[s.conducted]
    # Detection jitter of +-10 ms on P and on QRS: a fixed PR spreads over at most 40 ms.
    assert prs.max() - prs.min() <= 4 * 10.0 + 8.0
    exact = clean("mobitz_ii", seed, duration_ms=20_000.0, jitter_ms=0.0)
    prs = exact.pr_ms[exact.conducted]
    assert prs.max() - prs.min() <= 8.0
    pp = sinus_pp(s)
    for r in runs:
        d = r[0]
        assert abs((s.p_ms[d] - s.p_ms[d - 1]) - pp) < 0.2 * pp


@pytest.mark.parametrize("seed", SEEDS)
def test_two_to_one_alternates(seed):
    s = clean("two_to_one", seed)
    assert s.ratio == "2:1"
    assert np.all(s.conducted[1:] != s.conducted[:-1])


@pytest.mark.parametrize("seed", SEEDS)
def test_high_grade_two_or_more_consecutive_drops_while_some_conduct(seed):
    s = clean("high_grade", seed)
    assert s.conducted.sum() >= 1
    inner = [r for r in runs_of_drops(s.conducted) if r[0] > 0 and r[-1] < s.p_ms.size - 1]
    assert any(r.size >= 2 for r in inner)
    pp = sinus_pp(s)
    assert np.all(np.abs(np.diff(s.p_ms) - pp) < 0.2 * pp)  # dropped P waves are on time


@pytest.mark.parametrize("seed", SEEDS)
def test_third_degree_independent_slow_regular_escape(seed):
    s = clean("third_degree", seed, duration_ms=20_000.0)
    assert not s.conducted.any()
    assert s.p_ms.size > s.qrs_ms.size
    rr = np.diff(s.qrs_ms)
    rate = 60_000.0 / np.median(rr)
    # Escape rhythm of complete heart block 30-60 bpm (common practice, no source).
    assert 30.0 <= rate <= 60.0
    assert abs(rate - s.escape_rate_bpm) < 3.0
    assert rr.std() / rr.mean() < 0.05
    # No fixed P-QRS relation: the interval from the preceding P to each QRS scatters widely.
    before = np.searchsorted(s.p_ms, s.qrs_ms) - 1
    ok = before >= 0
    apparent_pr = s.qrs_ms[ok] - s.p_ms[before[ok]]
    assert apparent_pr.std() > 40.0


@pytest.mark.parametrize("seed", SEEDS)
def test_blocked_pac_is_early_and_not_conducted(seed):
    s = clean("blocked_pac", seed)
    pac = np.flatnonzero(s.p_kind == "premature")
    assert pac.size >= 1
    assert not s.conducted[pac].any()
    assert s.conducted[s.p_kind == "sinus"].all()
    on_time = s.p_ms[s.p_kind == "sinus"]
    pp = np.median(np.diff(on_time))
    for i in pac:
        assert s.p_ms[i] - s.p_ms[i - 1] < 0.8 * pp


@pytest.mark.parametrize("seed", SEEDS)
def test_av_dissociation_ventricular_rate_at_or_above_atrial(seed):
    s = clean("av_dissociation", seed)
    assert not s.conducted.any()
    assert s.qrs_ms.size >= s.p_ms.size
    assert s.escape_rate_bpm >= s.atrial_rate_bpm * 0.98


def test_artefacts_occur_and_are_recorded():
    rng = np.random.default_rng(11)
    seen: set[str] = set()
    for i in range(600):
        s = simulate_strip(PATTERNS[i % len(PATTERNS)], rng)
        seen.update(s.artefacts)
        if "missed_p" in s.artefacts or "pvc" in s.artefacts:
            assert s.missed_p_ms.size >= 1
        if "pvc" in s.artefacts:
            assert "pvc" in set(s.qrs_kind) and (s.qrs_p_index[s.qrs_kind == "pvc"] == -1).all()
        if "spurious_p" in s.artefacts:
            assert "spurious" in set(s.p_kind)
    assert {"missed_p", "spurious_p", "pvc", "p_hidden_in_qrs"} <= seen


def test_no_artefacts_when_switched_off():
    rng = np.random.default_rng(5)
    for i in range(200):
        s = simulate_strip(PATTERNS[i % len(PATTERNS)], rng, artefacts=False)
        assert s.artefacts == () and s.missed_p_ms.size == 0
        assert set(s.p_kind) <= {"sinus", "premature"}


def test_long_strip_and_given_rates():
    s = simulate_strip(
        "two_to_one",
        np.random.default_rng(2),
        duration_ms=300_000.0,
        atrial_rate_bpm=80.0,
        pr_ms=240.0,
        jitter_ms=0.0,
        artefacts=False,
    )
    assert abs(s.atrial_rate_bpm - 80.0) < 6.0
    assert np.allclose(s.pr_ms[s.conducted], 240.0, atol=4.5)
    assert abs(s.ventricular_rate_bpm - 40.0) < 4.0


@pytest.mark.parametrize(
    "kwargs",
    [
        {"pattern": "wenckebach"},
        {"pattern": "indeterminate"},
        {"pattern": "first_degree", "pr_ms": 180.0},
        {"pattern": "normal", "pr_ms": 240.0},
        {"pattern": "normal", "duration_ms": 2_000.0},
        {"pattern": "normal", "jitter_ms": -1.0},
    ],
)
def test_bad_arguments_raise_data_error(kwargs):
    kw = dict(kwargs)
    pattern = kw.pop("pattern")
    with pytest.raises(DataError):
        simulate_strip(pattern, np.random.default_rng(0), **kw)


def test_module_imports_alone():
    code = (
        "import sys, synthetic_registry.strips as s; "
        "heavy = [m for m in ('polars', 'pyarrow', 'synthetic_registry.generator') if m in sys.modules]; "
        "print(heavy); sys.exit(1 if heavy else 0)"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert out.returncode == 0, out.stdout + out.stderr
