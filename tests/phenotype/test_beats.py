"""Beat-level AV conduction classifier on hand-built strips (cohort.phenotype.beats).

The strips are built here from first principles (P every P-P ms, a QRS at P + PR when the P
conducts), not with the project's strip simulator, so that these tests check the classifier
against the clinical definitions rather than against another piece of project code.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from cohort.errors import DataError, RuleSetError
from cohort.phenotype.beats import (
    DEFAULT_RULES_PATH,
    FATES,
    QRS_ROLES,
    StripResult,
    classify_strip,
    load_rules,
)
from cohort.vocabulary import BEAT_PATTERNS


# --------------------------------------------------------------------------------------------
# Builders (times in ms)
# --------------------------------------------------------------------------------------------
def from_prs(prs: list[float | None], pp: float = 800.0, t0: float = 100.0) -> tuple[list, list]:
    """P every ``pp`` ms; ``prs[i]`` is the PR of P i, or None when P i is not conducted."""
    p = [t0 + i * pp for i in range(len(prs))]
    q = [t + pr for t, pr in zip(p, prs, strict=True) if pr is not None]
    return p, q


def sinus(n: int, pp: float = 800.0, pr: float = 160.0, t0: float = 100.0) -> tuple[list, list]:
    """1:1 conduction with a constant PR."""
    return from_prs([pr] * n, pp, t0)


def wenckebach(groups: list[int], pp: float = 800.0, pr0: float = 180.0,
               steps: tuple[float, ...] = (80.0, 40.0, 20.0, 10.0, 5.0)) -> tuple[list, list]:
    """Mobitz I: in each group of n P waves the PR lengthens by shrinking steps, the last P is
    blocked, and the next group restarts at ``pr0``."""
    prs: list[float | None] = []
    for n in groups:
        pr = pr0
        for k in range(n - 1):
            prs.append(pr)
            pr += steps[min(k, len(steps) - 1)]
        prs.append(None)
    return from_prs(prs, pp)


def mobitz_ii(groups: list[int], pp: float = 800.0, pr: float = 180.0) -> tuple[list, list]:
    """Mobitz II: constant PR, the last P of each group of n blocked."""
    prs: list[float | None] = []
    for n in groups:
        prs += [pr] * (n - 1) + [None]
    return from_prs(prs, pp)


def k_to_one(k: int, n_groups: int, pp: float = 700.0, pr: float = 200.0) -> tuple[list, list]:
    """k:1 conduction: the first P of every k conducts, the other k-1 are blocked."""
    return from_prs(([pr] + [None] * (k - 1)) * n_groups, pp)


def independent(duration: float, pp: float, rr: float, p0: float, q0: float) -> tuple[list, list]:
    """Independent atrial and ventricular rhythms (complete block or AV dissociation)."""
    return list(np.arange(p0, duration, pp)), list(np.arange(q0, duration, rr))


def with_pacs(n: int, pp: float, pr: float, at: dict[int, float], *, conduct: bool = False,
              pause: float = 1.05) -> tuple[list, list]:
    """Sinus rhythm with premature atrial complexes after the sinus P waves listed in ``at``
    (index -> coupling as a fraction of P-P); each PAC resets the sinus node (pause * P-P)."""
    p, q, t = [], [], 100.0
    for i in range(n):
        p.append(t)
        q.append(t + pr)
        if i in at:
            pac = t + at[i] * pp
            p.append(pac)
            if conduct:
                q.append(pac + pr + 40)  # a premature P conducts with a slightly longer PR
            t = pac + pause * pp
        else:
            t += pp
    return p, q


def jitter(p: list, q: list, seed: int, ms: float = 10.0) -> tuple[list, list]:
    rng = np.random.default_rng(seed)
    return ([x + rng.uniform(-ms, ms) for x in p], [x + rng.uniform(-ms, ms) for x in q])


def not_conducted(res: StripResult) -> list:
    return [w for w in res.p_waves if w.conducted is False]


# --------------------------------------------------------------------------------------------
# One test per pattern, each with at least three strips (rationale beside each strip)
# --------------------------------------------------------------------------------------------
PATTERN_CASES = {
    "normal": [
        # 75 bpm, PR 160: the textbook normal strip
        sinus(12, 800, 160),
        # 100 bpm, PR 130: fast sinus rhythm, PR still in the normal band
        sinus(16, 600, 130),
        # 52 bpm, PR 196: slow rhythm, PR just under 200 ms
        sinus(8, 1150, 196),
    ],
    "first_degree": [
        # PR 240 ms at 75 bpm: classic first-degree AV block
        sinus(12, 800, 240),
        # PR 330 ms: marked first-degree block, still 1:1
        sinus(12, 850, 330),
        # PR 420 ms at 100 bpm: PR longer than half the cycle, the next P falls after the QRS
        sinus(16, 600, 420),
    ],
    "mobitz_i": [
        # 4:3 Wenckebach: PR 180 -> 260 -> 300, drop, reset
        wenckebach([4, 4, 4]),
        # 3:2 Wenckebach (group beating in pairs)
        wenckebach([3, 3, 3, 3, 3], pp=700, pr0=160, steps=(120.0,)),
        # variable ratio 5:4 / 3:2 / 4:3 at 90 bpm
        wenckebach([5, 3, 4], pp=667, pr0=200, steps=(60.0, 30.0, 15.0, 8.0)),
    ],
    "mobitz_ii": [
        # 4:3 with constant PR 180
        mobitz_ii([4, 4, 4]),
        # 3:2 with a long but constant PR 280
        mobitz_ii([3, 3, 3, 3], pp=750, pr=280),
        # variable 5:4 / 3:2 / 6:5 / 4:3 at 70 bpm
        mobitz_ii([5, 3, 6, 4], pp=857, pr=200),
    ],
    "two_to_one": [
        # 2:1 with normal PR at atrial 86 bpm
        k_to_one(2, 8, pp=700, pr=160),
        # 2:1 with a long PR (320 ms): still a fixed relation
        k_to_one(2, 8, pp=650, pr=320),
        # 2:1 at atrial 120 bpm (ventricular 60)
        k_to_one(2, 10, pp=500, pr=180),
    ],
    "high_grade": [
        # 3:1 block
        k_to_one(3, 5, pp=650, pr=200),
        # 4:1 block
        k_to_one(4, 4, pp=600, pr=180),
        # variable 3:1 and 2:1
        from_prs([200, None, None, 200, None, 200, None, None, 200, None, None, 200], pp=650),
    ],
    "third_degree": [
        # atrial 80 bpm, escape 38 bpm, independent
        independent(12_000, 750, 1579, 100, 450),
        # atrial 75, junctional escape 55
        independent(12_000, 800, 1091, 0, 200),
        # atrial 100, ventricular escape 33
        independent(15_000, 600, 1818, 50, 700),
    ],
    "blocked_pac": [
        # one early P (coupling 55 %) not conducted, sinus 1:1 otherwise
        with_pacs(12, 800, 160, {5: 0.55}),
        # two blocked PACs
        with_pacs(14, 750, 150, {3: 0.5, 9: 0.6}),
        # blocked atrial bigeminy: mimics 2:1 block, but the blocked P waves come early
        with_pacs(8, 900, 170, {i: 0.5 for i in range(7)}),
    ],
    "av_dissociation": [
        # accelerated junctional rhythm 80 bpm with sinus 67 bpm
        independent(10_000, 900, 750, 100, 300),
        # ventricular rhythm 100 bpm with sinus 62 bpm
        independent(10_000, 970, 600, 300, 120),
        # near-isorhythmic: junctional 72 vs sinus 70, P waves march through the QRS
        independent(12_000, 857, 833, 500, 640),
    ],
    "indeterminate": [
        # three P waves and two QRS: too few beats
        sinus(3, 800, 160),
        # QRS without P waves (atrial fibrillation read as no P)
        ([], [100, 900, 1500, 2400, 3100]),
        # chaotic atrial and ventricular activity (P-P 250-1400 ms, R-R 400-1300 ms at random)
        ([983, 1543, 1840, 2109, 3294, 4594, 5541, 6630, 7506, 8831, 10019, 10272, 11508, 11797],
         [1057, 1615, 2792, 3679, 4349, 5129, 5555, 6066, 7070, 8052, 9006, 9752]),
    ],
}


@pytest.mark.parametrize("pattern", list(PATTERN_CASES))
@pytest.mark.parametrize("case", range(3))
def test_hand_built_strips(pattern, case):
    p, q = PATTERN_CASES[pattern][case]
    res = classify_strip(p, q)
    assert res.pattern == pattern, (res.reasons, res.sentence)
    assert res.evidence[-1] == res.sentence and res.sentence
    assert res.reasons, "the decision must name its reasons"


def test_every_pattern_code_is_covered():
    assert set(PATTERN_CASES) == set(BEAT_PATTERNS)


@pytest.mark.parametrize("pattern", [k for k in PATTERN_CASES if k != "indeterminate"])
@pytest.mark.parametrize("seed", [1, 2, 3])
def test_patterns_survive_10ms_jitter(pattern, seed):
    # onset detection jitter of +-10 ms on every P and QRS
    for case, (p, q) in enumerate(PATTERN_CASES[pattern]):
        res = classify_strip(*jitter(p, q, seed * 10 + case))
        assert res.pattern == pattern, (case, res.reasons)


# --------------------------------------------------------------------------------------------
# Facts of the trade
# --------------------------------------------------------------------------------------------
def test_normal_pr_is_120_to_200_ms():
    # common practice, no source: normal PR 120-200 ms; above 200 ms with 1:1 conduction is
    # first-degree AV block (Kusumoto FM et al. 2018 ACC/AHA/HRS guideline, as quoted)
    for pr in (120, 150, 180, 200):
        res = classify_strip(*sinus(12, 800, pr))
        assert res.pattern == "normal" and 120 <= res.pr_median_ms <= 200
    for pr in (205, 250):
        assert classify_strip(*sinus(12, 800, pr)).pattern == "first_degree"


def test_mason_2007_normal_pr_range_is_not_block():
    # Mason JW et al. 2007 J Electrocardiol 40:228 (abstract): PR 2nd-98th percentile 113-212 ms
    # in 79,743 adults; a 1:1 strip anywhere in that range is normal or first degree, never block
    for pr in (113, 160, 212):
        assert classify_strip(*sinus(12, 800, pr)).pattern in ("normal", "first_degree")


@pytest.mark.parametrize("case", range(3))
def test_mobitz_i_pr_shortens_after_the_drop_and_groups_have_one_more_p(case):
    # common practice, no source: in Mobitz I the PR after the non-conducted P is shorter than
    # the PR before it, and each group has one more P wave than QRS complexes
    res = classify_strip(*PATTERN_CASES["mobitz_i"][case])
    waves = res.p_waves
    for i, w in enumerate(waves[1:-1], start=1):
        if w.fate == "not_conducted":
            assert waves[i + 1].pr_ms < waves[i - 1].pr_ms
    assert res.group_ratios
    for ratio in res.group_ratios:
        n_p, n_qrs = map(int, ratio.split(":"))
        assert n_p == n_qrs + 1


@pytest.mark.parametrize("case", range(3))
def test_mobitz_ii_pr_is_constant(case):
    # common practice, no source: in Mobitz II the PR of the conducted beats is constant
    res = classify_strip(*jitter(*PATTERN_CASES["mobitz_ii"][case], seed=case))
    assert max(res.pr_series_ms) - min(res.pr_series_ms) <= 40  # 4 x the 10 ms jitter


@pytest.mark.parametrize("case", range(3))
def test_complete_block_escape_rate_is_30_to_60_bpm(case):
    # common practice, no source: the escape rhythm of complete heart block beats at 30-60 bpm
    p, q = PATTERN_CASES["third_degree"][case]
    res = classify_strip(p, q)
    assert 30 <= res.escape_rate_bpm <= 60
    assert res.escape_rate_bpm == pytest.approx(60_000 / np.median(np.diff(q)), rel=1e-9)
    assert res.atrial_rate_bpm > res.escape_rate_bpm  # more P waves than QRS complexes
    assert res.ratio is None  # no conduction ratio without conduction


@pytest.mark.parametrize("case", range(3))
def test_blocked_pacs_come_early_but_av_block_drops_come_on_time(case):
    # common practice, no source: a blocked premature atrial complex is an early P, whereas
    # the non-conducted P waves of AV block come on time
    res = classify_strip(*PATTERN_CASES["blocked_pac"][case])
    assert all(w.on_time is False for w in not_conducted(res))
    for pattern in ("mobitz_i", "mobitz_ii", "two_to_one", "high_grade"):
        block = classify_strip(*PATTERN_CASES[pattern][case])
        assert all(w.on_time for w in not_conducted(block)), pattern


def test_two_to_one_has_alternate_blocked_p_waves():
    # common practice, no source: in 2:1 block every other P is blocked and the type (Mobitz
    # I or II) cannot be told from 2:1 conduction alone
    res = classify_strip(*PATTERN_CASES["two_to_one"][0])
    fates = [w.fate for w in res.p_waves if w.fate in ("conducted", "not_conducted")]
    assert all(a != b for a, b in zip(fates, fates[1:], strict=False))
    assert res.ratio == "2:1" and "cannot be determined" in res.sentence


# --------------------------------------------------------------------------------------------
# Ratios, rates, evidence and the per-P table
# --------------------------------------------------------------------------------------------
def test_wenckebach_evidence_reads_like_the_strip():
    res = classify_strip(*wenckebach([4, 4, 4]))
    assert res.sentence.startswith("PR 180->260->300 ms then on-time P 4 not conducted")
    assert "PR after the pause 180 ms < 300 ms" in res.sentence
    assert "wenckebach_drop=P4:180>260>300|180>260>300" in res.reasons
    assert res.ratio == "4:3"
    assert all(" " not in reason for reason in res.reasons)  # machine-readable codes


def test_variable_ratio_is_reported_as_variable():
    res = classify_strip(*PATTERN_CASES["mobitz_ii"][2])
    assert res.ratio == "variable" and len(set(res.group_ratios)) > 1


def test_high_grade_ratio_and_run():
    res = classify_strip(*PATTERN_CASES["high_grade"][0])
    assert res.ratio == "3:1" and "consecutive_drops=2" in res.reasons


def test_rates_are_in_bpm():
    res = classify_strip(*k_to_one(2, 10, pp=500, pr=180))
    assert res.atrial_rate_bpm == pytest.approx(120.0)
    assert res.ventricular_rate_bpm == pytest.approx(60.0)
    assert res.escape_rate_bpm is None


def test_per_p_table_is_complete_and_ordered():
    p, q = with_pacs(12, 800, 160, {5: 0.55})
    res = classify_strip(list(reversed(p)), q[::-1])  # any input order
    assert [w.index for w in res.p_waves] == list(range(1, len(p) + 1))
    assert [w.t_ms for w in res.p_waves] == sorted(p)
    assert {w.fate for w in res.p_waves} <= set(FATES)
    assert set(res.qrs_roles) <= set(QRS_ROLES)
    assert res.n_p == len(p) and res.n_qrs == len(q) and res.n_not_conducted == 1
    conducted = [w for w in res.p_waves if w.fate == "conducted"]
    assert all(w.pr_ms == pytest.approx(160) for w in conducted)
    assert list(res.pr_series_ms) == [w.pr_ms for w in conducted]


def test_conducted_pac_is_not_a_block():
    res = classify_strip(*with_pacs(12, 800, 160, {4: 0.6}, conduct=True))
    assert res.pattern == "normal"
    pac = [w for w in res.p_waves if w.fate == "premature"]
    assert len(pac) == 1 and pac[0].conducted and pac[0].on_time is False


def test_to_dict_is_json_ready():
    import json

    res = classify_strip(*wenckebach([4, 4]))
    data = json.loads(json.dumps(res.to_dict()))
    assert data["pattern"] == "mobitz_i" and data["label"] == BEAT_PATTERNS["mobitz_i"]
    assert len(data["p_waves"]) == len(res.p_waves) and data["evidence"][-1] == res.sentence


# --------------------------------------------------------------------------------------------
# Precedence when several features appear
# --------------------------------------------------------------------------------------------
def test_av_block_outranks_blocked_pac():
    # Mobitz II drops plus one blocked PAC: the AV block is the pattern
    p, q = mobitz_ii([4, 4, 4, 4])
    p = sorted([*p, p[1] + 400])  # an early P between P2 and P3, not conducted
    res = classify_strip(p, q)
    assert res.pattern == "mobitz_ii"


def test_blocked_pac_is_reported_with_prolonged_pr_in_evidence():
    res = classify_strip(*with_pacs(12, 800, 250, {5: 0.55}))
    assert res.pattern == "blocked_pac"
    assert res.pr_median_ms == pytest.approx(250) and "pr_gt_200" in res.reasons


def test_consecutive_drops_outrank_single_drops():
    prs = [180, 180, 180, None, 180, 180, None, None, 180, 180, 180, None]
    assert classify_strip(*from_prs(prs)).pattern == "high_grade"


# --------------------------------------------------------------------------------------------
# Robustness
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("missing", [3, 6])
def test_missed_p_detection(missing):
    # the detector misses one P: the cadence says where it was
    for p, q, expected in [(*sinus(12), "normal"), (*mobitz_ii([4, 4, 4]), "mobitz_ii"),
                           (*k_to_one(2, 8), "two_to_one")]:
        res = classify_strip(p[:missing] + p[missing + 1:], q)
        assert res.pattern == expected, (expected, res.reasons)
        assert "inferred_p=1" in res.reasons


@pytest.mark.parametrize("where", [0.3, 0.55, 0.8])
def test_extra_p_detection(where):
    # a spurious P between two real ones leaves the cadence intact: it is an artefact
    for p, q, expected in [(*sinus(12), "normal"), (*wenckebach([4, 4, 4]), "mobitz_i"),
                           (*independent(12_000, 750, 1579, 100, 450), "third_degree")]:
        extra = p[4] + where * (p[5] - p[4])
        res = classify_strip(sorted([*p, extra]), q)
        assert res.pattern == expected, (expected, res.reasons)
        assert [w.fate for w in res.p_waves].count("artefact") == 1


def test_premature_ventricular_beats():
    # a PVC (QRS without a P in the PR window) with a compensatory pause is not AV block
    p, q = sinus(12)
    q_pvc = sorted([x for x in q if x != q[5]] + [q[4] + 450])  # PVC preempts P 6
    res = classify_strip(p, q_pvc)
    assert res.pattern == "normal" and "ectopic_qrs=1" in res.reasons
    # PVCs added to Mobitz II and 2:1 strips
    p, q = mobitz_ii([4, 4, 4, 4])
    assert classify_strip(p, sorted([*q, q[1] + 420])).pattern == "mobitz_ii"
    p, q = k_to_one(2, 8)
    assert classify_strip(p, sorted([*q, q[3] + 560])).pattern == "two_to_one"


def test_varying_sinus_rate():
    # sinus rate ramping 60 -> 100 bpm, and respiratory sinus arrhythmia of +-10 %
    pp = np.linspace(1000, 600, 20)
    p = list(100 + np.concatenate(([0], np.cumsum(pp[:-1]))))
    assert classify_strip(p, [t + 170 for t in p]).pattern == "normal"
    pp = 800 * (1 + 0.10 * np.sin(np.arange(20) * 2 * np.pi / 5))
    p = list(100 + np.concatenate(([0], np.cumsum(pp[:-1]))))
    assert classify_strip(p, [t + 170 for t in p]).pattern == "normal"
    prs = [200, 200, None] * 7
    q = [t + pr for t, pr in zip(p, prs, strict=False) if pr is not None]
    assert classify_strip(p, q).pattern == "mobitz_ii"


def test_six_second_strip():
    # the shortest usual rhythm strip
    assert classify_strip(*sinus(8, 750, 150)).pattern == "normal"
    assert classify_strip(*wenckebach([4, 4], pp=750)).pattern == "mobitz_i"
    assert classify_strip(*independent(6_000, 700, 1500, 100, 400)).pattern == "third_degree"


def test_three_minute_strip():
    # long strips: same patterns, many groups
    assert classify_strip(*jitter(*sinus(225, 800, 170), seed=4)).pattern == "normal"
    res = classify_strip(*jitter(*wenckebach([4] * 56), seed=5))
    assert res.pattern == "mobitz_i" and res.ratio == "4:3"
    res = classify_strip(*jitter(*independent(180_000, 750, 1579, 100, 450), seed=6))
    assert res.pattern == "third_degree" and res.escape_rate_bpm == pytest.approx(38, abs=1)


def test_non_finite_values_are_dropped_with_a_note():
    p, q = sinus(12)
    res = classify_strip([*p, float("nan")], [*q, float("inf")])
    assert res.pattern == "normal" and "nonfinite_dropped=2" in res.reasons


def test_non_numeric_input_is_a_data_error():
    with pytest.raises(DataError, match="p_ms must be numbers"):
        classify_strip(["a", "b"], [1.0])


# --------------------------------------------------------------------------------------------
# Rules come from the rule file
# --------------------------------------------------------------------------------------------
def test_default_rules_file():
    rules = load_rules()
    assert rules.rules_id == "beats-v1" and rules.pr_normal_max_ms == 200.0
    assert classify_strip(*sinus(12)).rules_id == "beats-v1"


def test_thresholds_are_read_from_the_rules():
    strict = dataclasses.replace(load_rules(), pr_normal_max_ms=220.0, rules_id="test-220")
    res = classify_strip(*sinus(12, 800, 210), rules=strict)
    assert res.pattern == "normal" and res.rules_id == "test-220"


def _write_rules(tmp_path, text: str):
    path = tmp_path / "beats-test.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_rule_file_errors_name_the_key(tmp_path):
    text = DEFAULT_RULES_PATH.read_text(encoding="utf-8")
    with pytest.raises(RuleSetError, match=r"missing \[pr\] max_ms"):
        load_rules(_write_rules(tmp_path, text.replace("max_ms = 600.0", "")))
    with pytest.raises(RuleSetError, match=r"unknown key.*\[pr\] maxx_ms"):
        load_rules(_write_rules(tmp_path, text.replace("max_ms = 600.0", "maxx_ms = 600.0")))
    with pytest.raises(RuleSetError, match="must be a positive number"):
        load_rules(_write_rules(tmp_path, text.replace("max_ms = 600.0", "max_ms = -1")))
    with pytest.raises(RuleSetError, match="not found"):
        load_rules(tmp_path / "absent.toml")


def test_missed_last_p_is_inferred_from_its_qrs():
    # 3:1 block whose last conducted P was missed: the orphan QRS at the usual PR after the
    # empty cadence slot shows where it was
    p, q = k_to_one(3, 5, pp=650, pr=200)
    res = classify_strip(p[:12], q)
    assert res.pattern == "high_grade" and "inferred_p=1" in res.reasons


def test_sinus_p_hidden_in_a_pvc_then_blocked_pac():
    # the sinus P falls inside a PVC (not detected); 480 ms later a PAC is blocked; the sinus
    # node resets after the PAC
    p, q, t = [], [], 100.0
    for _ in range(5):
        p.append(t)
        q.append(t + 160)
        t += 1000
    q.append(t - 250)  # PVC; the sinus P at t hides in it and does not conduct
    pac = t + 480
    p.append(pac)
    t = pac + 1050
    for _ in range(5):
        p.append(t)
        q.append(t + 160)
        t += 1000
    res = classify_strip(p, q)
    assert res.pattern == "blocked_pac", res.reasons
    assert [w for w in res.p_waves if w.source == "inferred"]


def test_extra_detection_next_to_a_premature_p():
    # an extra detection shortly after a blocked PAC, and one shortly after a sinus P that is
    # followed by a blocked PAC: the PR of the real P waves tells which detection is extra
    p, q = with_pacs(12, 800, 150, {4: 0.55})
    pac = p[5]
    res = classify_strip(sorted([*p, pac + 200]), q)
    assert res.pattern == "blocked_pac" and "extra_p_ignored=1" in res.reasons
    p, q = with_pacs(12, 800, 150, {5: 0.5})
    res = classify_strip(sorted([*p, p[5] - 350]), q)
    assert res.pattern == "blocked_pac" and "extra_p_ignored=1" in res.reasons


def test_wenckebach_with_small_increments():
    # 3:2 Wenckebach whose second PR is only 45 ms longer: the early second QRS of each pair
    # (group beating) must not be mistaken for an ectopic beat
    p, q = wenckebach([3] * 6, pp=730, pr0=220, steps=(45.0,))
    assert classify_strip(*jitter(p, q, seed=8)).pattern == "mobitz_i"


def test_pvc_in_the_pause_of_mobitz_ii():
    # a PVC in the pause, 270 ms after the blocked P, does not hide the block
    p, q = mobitz_ii([4, 4, 4], pp=800, pr=180)
    blocked = p[3]
    res = classify_strip(p, sorted([*q, blocked + 270]))
    assert res.pattern == "mobitz_ii", res.reasons


def test_complete_block_with_p_waves_hidden_in_the_qrs():
    # P waves that coincide with a QRS are not detected; the others still march through
    p, q = independent(12_000, 750, 1579, 100, 450)
    visible = [t for t in p if min(abs(t - x) for x in q) > 60]
    assert len(visible) < len(p)
    assert classify_strip(visible, q).pattern == "third_degree"
