"""Beat-level rhythm strips: P-wave and QRS onset times for a named AV conduction pattern.

Standalone on purpose: it imports nothing from the rest of the generator, so the beat
classifier's tests can build strips with it alone. Every time is in ms from the strip start.

Model (all rates and probabilities invented unless stated; the patterns follow the textbook
descriptions, common practice, no source):

- The atrial (sinus) rhythm varies slowly: a respiratory sinus arrhythmia (sine, 2-5 %,
  period 3-6 s) on top of a bounded random walk of the P-P interval.
- Conducted P waves are followed by a QRS after the PR interval; non-conducted P waves are not.
- Detection adds independent jitter, uniform in [-jitter_ms, +jitter_ms], to every onset.
- With ``artefacts=True`` a strip may also carry a missed P detection, a spurious extra P, a
  premature ventricular complex (QRS without P; the sinus P it buries is not detected) or, in
  dissociated rhythms, P waves hidden inside a QRS. ``StripTruth.artefacts`` names them.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from cohort.errors import DataError
from cohort.vocabulary import BEAT_PATTERNS

PATTERNS: tuple[str, ...] = tuple(k for k in BEAT_PATTERNS if k != "indeterminate")

MIN_DURATION_MS = 6_000.0
MAX_DURATION_MS = 600_000.0

# Default atrial rate ranges (bpm) per pattern: invented, typical of each rhythm.
_ATRIAL_RATE_RANGE: dict[str, tuple[float, float]] = {
    "normal": (55.0, 95.0),
    "first_degree": (55.0, 90.0),
    "mobitz_i": (60.0, 95.0),
    "mobitz_ii": (60.0, 95.0),
    "two_to_one": (64.0, 100.0),
    "high_grade": (66.0, 105.0),
    "third_degree": (62.0, 100.0),
    "blocked_pac": (58.0, 90.0),
    "av_dissociation": (50.0, 72.0),
}

# Default PR ranges (ms) for the conducted beats (first PR of a group for Mobitz I).
_PR_RANGE: dict[str, tuple[float, float]] = {
    "normal": (125.0, 195.0),
    "first_degree": (210.0, 340.0),
    "mobitz_i": (170.0, 250.0),
    "mobitz_ii": (140.0, 250.0),
    "two_to_one": (150.0, 280.0),
    "high_grade": (150.0, 260.0),
    "blocked_pac": (125.0, 200.0),
}

# Artefact probabilities per strip (invented).
_P_MISSED_P = 0.15
_P_SPURIOUS_P = 0.10
_P_PVC = 0.10
_P_HIDE_P_IN_QRS = 0.6  # dissociated rhythms: P onset inside a QRS is often not seen


@dataclass(frozen=True)
class StripTruth:
    """A simulated rhythm strip and the truth behind it.

    Attributes
    ----------
    p_ms, qrs_ms
        Detected P and QRS onsets (sorted, ms from strip start), what an export would carry.
    pattern
        The generating pattern (a key of ``cohort.vocabulary.BEAT_PATTERNS``).
    ratio
        Conduction ratio P:QRS of the generating process ("4:3", "2:1", "3:1", "variable"),
        None where no ratio applies (1:1 conduction, blocked PACs, dissociation).
    conducted
        Per detected P: True if it conducted to a QRS.
    escape_rate_bpm
        Rate of the independent subsidiary pacemaker (escape rhythm in third-degree block,
        accelerated junctional rhythm in AV dissociation); None otherwise.
    pr_ms
        Per detected P: detected QRS onset minus detected P onset of its conducted beat;
        NaN if not conducted or its QRS lies beyond the strip.
    p_kind
        Per detected P: "sinus" (on time), "premature" (early atrial complex) or "spurious"
        (a false detection, no atrial event).
    qrs_kind
        Per detected QRS: "conducted", "escape" (or accelerated junctional) or "pvc".
    qrs_p_index
        Per detected QRS: index into ``p_ms`` of the P that conducted it, -1 if none or not
        detected.
    missed_p_ms
        True P onsets that the detector did not report.
    duration_ms, atrial_rate_bpm, ventricular_rate_bpm
        Strip length, mean generating atrial rate, QRS count per minute of strip.
    artefacts
        Names of the artefacts applied, e.g. ("missed_p", "pvc").
    """

    p_ms: np.ndarray
    qrs_ms: np.ndarray
    pattern: str
    ratio: str | None
    conducted: np.ndarray
    escape_rate_bpm: float | None
    pr_ms: np.ndarray
    p_kind: np.ndarray
    qrs_kind: np.ndarray
    qrs_p_index: np.ndarray
    missed_p_ms: np.ndarray
    duration_ms: float
    atrial_rate_bpm: float
    ventricular_rate_bpm: float
    artefacts: tuple[str, ...] = field(default=())


@dataclass
class _Beats:
    """Mutable working set of true events before detection."""

    p_t: np.ndarray
    p_kind: np.ndarray
    p_qrs: np.ndarray  # per P: index of its QRS, -1 if not conducted
    qrs_t: np.ndarray
    qrs_kind: np.ndarray
    ratio: str | None = None
    escape_rate: float | None = None
    hidden_p: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=bool))
    artefacts: list[str] = field(default_factory=list)


def simulate_strip(
    pattern: str,
    rng: np.random.Generator,
    *,
    duration_ms: float = 10_000.0,
    atrial_rate_bpm: float | None = None,
    pr_ms: float | None = None,
    jitter_ms: float = 10.0,
    artefacts: bool = True,
    escape_rate_bpm: float | None = None,
) -> StripTruth:
    """Simulate the P and QRS onset times of one rhythm strip.

    Parameters
    ----------
    pattern
        One of ``PATTERNS``.
    rng
        Source of randomness (the only one used).
    duration_ms
        Strip length, 6 s to 10 min.
    atrial_rate_bpm
        Mean sinus rate; drawn from a pattern-typical range when None.
    pr_ms
        PR of conducted beats (first PR of each group for Mobitz I); drawn when None;
        ignored for third-degree block and AV dissociation (no conduction).
    jitter_ms
        Half-width of the uniform detection jitter added to every onset.
    artefacts
        Allow detection artefacts (missed or spurious P, premature ventricular complex).
    escape_rate_bpm
        Rate of the independent ventricular rhythm for third_degree (30-55 bpm) and
        av_dissociation (at or above the atrial rate); drawn when None; ignored otherwise.

    Returns
    -------
    StripTruth
    """
    _validate(pattern, duration_ms, atrial_rate_bpm, pr_ms, jitter_ms)
    _validate_escape(pattern, escape_rate_bpm)
    rate = (
        atrial_rate_bpm
        if atrial_rate_bpm is not None
        else rng.uniform(*_ATRIAL_RATE_RANGE[pattern])
    )
    pr = (
        pr_ms
        if pr_ms is not None
        else (rng.uniform(*_PR_RANGE[pattern]) if pattern in _PR_RANGE else 0.0)
    )
    beats = _BUILDERS[pattern](rng, duration_ms, float(rate), float(pr), escape_rate_bpm)
    if artefacts:
        _add_artefacts(beats, pattern, rng, duration_ms)
    return _detect(beats, pattern, rng, duration_ms, float(rate), jitter_ms)


def _validate(
    pattern: str,
    duration_ms: float,
    atrial_rate_bpm: float | None,
    pr_ms: float | None,
    jitter_ms: float,
) -> None:
    """Raise DataError for arguments no strip can honour."""
    if pattern not in PATTERNS:
        raise DataError(f"unknown strip pattern {pattern!r}; use one of: {', '.join(PATTERNS)}")
    if not MIN_DURATION_MS <= duration_ms <= MAX_DURATION_MS:
        raise DataError(
            f"duration_ms={duration_ms} is outside {MIN_DURATION_MS:.0f}-{MAX_DURATION_MS:.0f} ms; "
            "pass a strip length between 6 s and 10 min"
        )
    if atrial_rate_bpm is not None and not 40.0 <= atrial_rate_bpm <= 180.0:
        raise DataError(f"atrial_rate_bpm={atrial_rate_bpm} is outside 40-180 bpm")
    if pattern == "third_degree" and atrial_rate_bpm is not None and atrial_rate_bpm < 50.0:
        raise DataError("third_degree needs atrial_rate_bpm >= 50 so P waves outnumber the escape")
    if pr_ms is not None:
        if not 60.0 <= pr_ms <= 600.0:
            raise DataError(f"pr_ms={pr_ms} is outside 60-600 ms")
        if pattern == "first_degree" and pr_ms <= 200.0:
            raise DataError(f"first_degree needs pr_ms > 200 ms (got {pr_ms})")
        if pattern == "normal" and pr_ms > 200.0:
            raise DataError(f"normal needs pr_ms <= 200 ms (got {pr_ms}); use first_degree")
    if not 0.0 <= jitter_ms <= 40.0:
        raise DataError(f"jitter_ms={jitter_ms} is outside 0-40 ms")


def _validate_escape(pattern: str, escape_rate_bpm: float | None) -> None:
    """Raise DataError for an escape rate outside the pattern's range."""
    if escape_rate_bpm is None:
        return
    if pattern == "third_degree" and not 25.0 <= escape_rate_bpm <= 60.0:
        raise DataError(f"third_degree needs escape_rate_bpm in 25-60 (got {escape_rate_bpm})")
    if pattern == "av_dissociation" and not 40.0 <= escape_rate_bpm <= 150.0:
        raise DataError(f"av_dissociation needs escape_rate_bpm in 40-150 (got {escape_rate_bpm})")


# ---------------------------------------------------------------- atrial and escape trains


def _sinus_train(rng: np.random.Generator, duration_ms: float, rate_bpm: float) -> np.ndarray:
    """On-time sinus P onsets in [0, duration): slow sinus arrhythmia plus a bounded walk."""
    pp = 60_000.0 / rate_bpm
    n = int(np.ceil(duration_ms / pp * 1.15)) + 4
    k = np.arange(n)
    amp = rng.uniform(0.02, 0.05)
    period = rng.uniform(3_000.0, 6_000.0)
    walk = np.clip(np.cumsum(rng.normal(0.0, 0.006, n)), -0.06, 0.06)
    mod = amp * np.sin(2.0 * np.pi * k * pp / period + rng.uniform(0.0, 2.0 * np.pi)) + walk
    intervals = pp * (1.0 + mod)
    start = rng.uniform(0.05, 0.95) * pp
    t = start + np.concatenate(([0.0], np.cumsum(intervals[:-1])))
    return t[t < duration_ms]


def _regular_train(
    rng: np.random.Generator, duration_ms: float, rate_bpm: float, start: float
) -> np.ndarray:
    """A regular subsidiary rhythm (escape or junctional): about 1 % beat-to-beat variation."""
    rr = 60_000.0 / rate_bpm
    n = int(np.ceil(duration_ms / rr)) + 3
    intervals = rr * (1.0 + rng.normal(0.0, 0.01, n))
    t = start + np.concatenate(([0.0], np.cumsum(intervals[:-1])))
    return t[t < duration_ms]


def _pr_noise(rng: np.random.Generator, n: int) -> np.ndarray:
    """Small physiological PR variation of a fixed-PR rhythm (sd 1.5 ms, within +-4 ms)."""
    return np.clip(rng.normal(0.0, 1.5, n), -4.0, 4.0)


def _conduct(p_t: np.ndarray, conducts: np.ndarray, pr: np.ndarray, duration_ms: float) -> _Beats:
    """Beats where P waves marked in ``conducts`` are followed by a QRS after ``pr``.

    A conducted P whose QRS would fall beyond the strip end is removed, so that a missing
    QRS at the end never looks like a dropped beat.
    """
    qrs = p_t + pr
    keep = ~(conducts & (qrs >= duration_ms))
    p_t, conducts, qrs = p_t[keep], conducts[keep], qrs[keep]
    p_qrs = np.full(p_t.size, -1, dtype=np.int64)
    p_qrs[conducts] = np.arange(int(conducts.sum()))
    return _Beats(
        p_t=p_t,
        p_kind=np.full(p_t.size, "sinus", dtype=object),
        p_qrs=p_qrs,
        qrs_t=qrs[conducts],
        qrs_kind=np.full(int(conducts.sum()), "conducted", dtype=object),
    )


# ---------------------------------------------------------------- pattern builders


def _build_one_to_one(
    rng: np.random.Generator,
    duration_ms: float,
    rate: float,
    pr: float,
    escape: float | None = None,
) -> _Beats:
    p_t = _sinus_train(rng, duration_ms, rate)
    return _conduct(p_t, np.ones(p_t.size, dtype=bool), pr + _pr_noise(rng, p_t.size), duration_ms)


def _group_layout(
    rng: np.random.Generator, n_p: int, sizes: list[int], drops_per_group: int
) -> tuple[np.ndarray, np.ndarray]:
    """Position-in-group and conducted flags for ``n_p`` P waves in repeating groups.

    Each group of size n ends with ``drops_per_group`` non-conducted P waves. The strip starts
    at a random point of the first group, chosen so that at least one run of drops lies
    strictly inside the strip, with conducted P waves before and after it.
    """
    seq_pos: list[int] = []
    seq_drop: list[bool] = []
    gi = 0
    while len(seq_pos) < n_p + 2 * max(sizes) + 2:
        n = sizes[gi % len(sizes)]
        for j in range(n):
            seq_pos.append(j)
            seq_drop.append(j >= n - drops_per_group)
        gi += 1
    pos = np.asarray(seq_pos)
    drop = np.asarray(seq_drop)
    first = sizes[0]
    valid = []
    for s in range(first):
        window = drop[s : s + n_p]
        idx = np.flatnonzero(window)
        if idx.size and idx[0] > 0 and not window[-1] and (~window[idx[0] :]).any():
            valid.append(s)
    s = int(rng.choice(valid)) if valid else 0
    return pos[s : s + n_p], ~drop[s : s + n_p]


def _group_sizes(
    rng: np.random.Generator, options: list[int], weights: list[float], n_groups: int
) -> tuple[list[int], str]:
    """Either one fixed group size (ratio "n:(n-d)") or a variable sequence."""
    if rng.random() < 0.75:
        n = int(rng.choice(options, p=np.asarray(weights) / np.sum(weights)))
        return [n], str(n)
    return [int(x) for x in rng.choice(options, size=n_groups)], "variable"


def _fit_group(n_p: int, sizes: list[int]) -> list[int]:
    """Shrink group sizes so that a whole group plus a drop fits into the strip."""
    limit = max(2, n_p - 2)
    return [min(n, limit) if n > limit else n for n in sizes]


def _build_mobitz_i(
    rng: np.random.Generator,
    duration_ms: float,
    rate: float,
    pr: float,
    escape: float | None = None,
) -> _Beats:
    p_t = _sinus_train(rng, duration_ms, rate)
    sizes, label = _group_sizes(rng, [3, 4, 5, 6], [0.35, 0.35, 0.2, 0.1], 64)
    sizes = [max(3, n) for n in _fit_group(p_t.size, sizes)]
    pos, conducts = _group_layout(rng, p_t.size, sizes, 1)
    # Decremental Wenckebach increments: the first is largest, each later one smaller.
    inc1 = rng.uniform(45.0, 110.0)
    decay = rng.uniform(0.45, 0.75)
    steps = np.maximum(inc1 * decay ** np.arange(8), 12.0)
    cum = np.concatenate(([0.0], np.cumsum(steps)))
    prs = pr + cum[pos] + _pr_noise(rng, p_t.size)
    beats = _conduct(p_t, conducts, prs, duration_ms)
    beats.ratio = f"{sizes[0]}:{sizes[0] - 1}" if label != "variable" else "variable"
    return beats


def _build_mobitz_ii(
    rng: np.random.Generator,
    duration_ms: float,
    rate: float,
    pr: float,
    escape: float | None = None,
) -> _Beats:
    p_t = _sinus_train(rng, duration_ms, rate)
    sizes, label = _group_sizes(rng, [3, 4, 5, 6, 8], [0.25, 0.3, 0.2, 0.15, 0.1], 64)
    sizes = [max(3, n) for n in _fit_group(p_t.size, sizes)]
    _, conducts = _group_layout(rng, p_t.size, sizes, 1)
    beats = _conduct(p_t, conducts, pr + _pr_noise(rng, p_t.size), duration_ms)
    beats.ratio = f"{sizes[0]}:{sizes[0] - 1}" if label != "variable" else "variable"
    return beats


def _build_two_to_one(
    rng: np.random.Generator,
    duration_ms: float,
    rate: float,
    pr: float,
    escape: float | None = None,
) -> _Beats:
    p_t = _sinus_train(rng, duration_ms, rate)
    conducts = (np.arange(p_t.size) + int(rng.integers(2))) % 2 == 0
    beats = _conduct(p_t, conducts, pr + _pr_noise(rng, p_t.size), duration_ms)
    beats.ratio = "2:1"
    return beats


def _has_inner_run(conducts: np.ndarray, min_run: int) -> bool:
    """True if a run of >= ``min_run`` non-conducted P waves has conducted P waves on both sides."""
    c = conducts.astype(np.int8)
    edges = np.flatnonzero(np.diff(c) != 0) + 1
    runs = np.split(np.arange(c.size), edges)
    return any(
        (not conducts[r[0]]) and r.size >= min_run and r[0] > 0 and r[-1] < c.size - 1 for r in runs
    )


def _build_high_grade(
    rng: np.random.Generator,
    duration_ms: float,
    rate: float,
    pr: float,
    escape: float | None = None,
) -> _Beats:
    p_t = _sinus_train(rng, duration_ms, rate)
    u = rng.random()
    label = "3:1" if u < 0.55 else ("4:1" if u < 0.75 else "variable")
    n_groups = p_t.size + 8
    for _ in range(50):
        if label == "variable":  # mixes 2:1 and 3:1 groups
            sizes = rng.choice([2, 3, 3], size=n_groups)
        else:
            sizes = np.full(n_groups, int(label[0]))
        starts = np.zeros(int(sizes.sum()), dtype=bool)
        starts[np.concatenate(([0], np.cumsum(sizes)[:-1]))] = True
        shift = int(rng.integers(0, sizes[0]))
        conducts = starts[shift : shift + p_t.size]
        if _has_inner_run(conducts, 2) and conducts.sum() >= 2:
            break
    beats = _conduct(p_t, conducts, pr + _pr_noise(rng, p_t.size), duration_ms)
    beats.ratio = label
    return beats


def _build_independent(
    rng: np.random.Generator,
    duration_ms: float,
    rate: float,
    escape_rate: float,
    kind: str,
    more_p: bool,
) -> _Beats:
    """Atrial and subsidiary rhythms with no conduction; count order enforced by re-drawing."""
    for _ in range(50):
        p_t = _sinus_train(rng, duration_ms, rate)
        qrs_t = _regular_train(
            rng, duration_ms, escape_rate, rng.uniform(0.0, 60_000.0 / escape_rate)
        )
        if (p_t.size > qrs_t.size) if more_p else (qrs_t.size >= p_t.size):
            break
    return _Beats(
        p_t=p_t,
        p_kind=np.full(p_t.size, "sinus", dtype=object),
        p_qrs=np.full(p_t.size, -1, dtype=np.int64),
        qrs_t=qrs_t,
        qrs_kind=np.full(qrs_t.size, kind, dtype=object),
        escape_rate=float(escape_rate),
    )


def _build_third_degree(
    rng: np.random.Generator,
    duration_ms: float,
    rate: float,
    pr: float,
    escape: float | None = None,
) -> _Beats:
    # Junctional escape 40-55 bpm or ventricular escape 30-40 bpm (common practice, no source).
    if escape is None:
        escape = rng.uniform(40.0, 55.0) if rng.random() < 0.55 else rng.uniform(30.0, 40.0)
    escape = min(escape, 0.8 * rate)
    return _build_independent(rng, duration_ms, rate, escape, "escape", more_p=True)


def _build_av_dissociation(
    rng: np.random.Generator,
    duration_ms: float,
    rate: float,
    pr: float,
    escape: float | None = None,
) -> _Beats:
    # Accelerated junctional rhythm at or slightly above the sinus rate: dissociation, no block.
    junctional = max(escape, rate) if escape is not None else rate * rng.uniform(1.02, 1.25)
    return _build_independent(rng, duration_ms, rate, junctional, "escape", more_p=False)


def _build_blocked_pac(
    rng: np.random.Generator,
    duration_ms: float,
    rate: float,
    pr: float,
    escape: float | None = None,
) -> _Beats:
    """Sinus rhythm with early non-conducted atrial complexes (about one per 8 s)."""
    pp = 60_000.0 / rate
    n_pac = max(1, int(rng.poisson(duration_ms / 8_000.0)))
    base = _sinus_train(rng, duration_ms + 4 * pp, rate)
    gaps = np.diff(base)
    times, kinds = [float(base[0])], ["sinus"]
    for gap in gaps:
        if times[-1] >= duration_ms:
            break
        if n_pac and kinds[-1] == "sinus" and len(times) >= 2 and rng.random() < 0.35:
            # A PAC falls soon after the previous QRS (in its T wave), well before the next P;
            # it resets the sinus node, so the next sinus P comes about one cycle after it.
            pac = min(times[-1] + pr + rng.uniform(200.0, 330.0), times[-1] + 0.72 * pp)
            times += [pac, pac + pp * rng.uniform(1.0, 1.15)]
            kinds += ["premature", "sinus"]
            n_pac -= 1
        else:
            times.append(times[-1] + float(gap))
            kinds.append("sinus")
    t = np.asarray(times)
    k = np.asarray(kinds, dtype=object)
    inside = t < duration_ms
    beats = _conduct(
        t[inside], k[inside] == "sinus", pr + _pr_noise(rng, int(inside.sum())), duration_ms
    )
    beats.p_kind = k[inside][np.isin(t[inside], beats.p_t)]
    if not _pac_inside(beats):
        return _force_pac(rng, duration_ms, rate, pr)
    return beats


def _pac_inside(beats: _Beats) -> bool:
    """True if some PAC has a conducted sinus P before and after it."""
    pac = np.flatnonzero(beats.p_kind == "premature")
    conducted = np.flatnonzero(beats.p_qrs >= 0)
    return bool(pac.size and conducted.size and conducted[0] < pac[0] < conducted[-1])


def _force_pac(
    rng: np.random.Generator,
    duration_ms: float,
    rate: float,
    pr: float,
    escape: float | None = None,
) -> _Beats:
    """A sinus strip with one blocked PAC after a beat near its middle."""
    pp = 60_000.0 / rate
    t = _sinus_train(rng, duration_ms, rate)
    j = max(1, t.size // 2 - 1)
    pac = min(t[j] + pr + rng.uniform(200.0, 330.0), t[j] + 0.7 * pp)
    after = pac + pp * rng.uniform(1.0, 1.15)
    rest = t[j + 1 :] - t[j + 1] + after
    full = np.concatenate((t[: j + 1], [pac], rest))
    kinds = np.array(["sinus"] * (j + 1) + ["premature"] + ["sinus"] * rest.size, dtype=object)
    inside = full < duration_ms
    full, kinds = full[inside], kinds[inside]
    beats = _conduct(full, kinds == "sinus", pr + _pr_noise(rng, full.size), duration_ms)
    beats.p_kind = kinds[np.isin(full, beats.p_t)]
    return beats


_BUILDERS = {
    "normal": _build_one_to_one,
    "first_degree": _build_one_to_one,
    "mobitz_i": _build_mobitz_i,
    "mobitz_ii": _build_mobitz_ii,
    "two_to_one": _build_two_to_one,
    "high_grade": _build_high_grade,
    "third_degree": _build_third_degree,
    "blocked_pac": _build_blocked_pac,
    "av_dissociation": _build_av_dissociation,
}


# ---------------------------------------------------------------- artefacts and detection


def _add_artefacts(
    beats: _Beats, pattern: str, rng: np.random.Generator, duration_ms: float
) -> None:
    """Mark hidden P waves and add PVCs / spurious P waves (truth of each kept in ``beats``)."""
    hidden = np.zeros(beats.p_t.size, dtype=bool)
    if pattern in ("third_degree", "av_dissociation") and beats.qrs_t.size:
        # A P onset from 30 ms before to 100 ms after a QRS onset is buried in that QRS.
        d = beats.p_t[:, None] - beats.qrs_t[None, :]
        inside = ((d > -30.0) & (d < 100.0)).any(axis=1)
        hidden |= inside & (rng.random(beats.p_t.size) < _P_HIDE_P_IN_QRS)
        if hidden.any():
            beats.artefacts.append("p_hidden_in_qrs")
    if pattern in ("normal", "first_degree", "blocked_pac") and rng.random() < _P_PVC:
        hidden |= _insert_pvc(beats, rng)
    # A missed detection hits a conducted P only, so the strip keeps its defining P waves.
    candidates = np.flatnonzero(~hidden & (beats.p_qrs >= 0))
    if candidates.size > 3 and rng.random() < _P_MISSED_P:
        hidden[int(rng.choice(candidates))] = True
        beats.artefacts.append("missed_p")
    beats.hidden_p = hidden
    if rng.random() < _P_SPURIOUS_P:
        _insert_spurious_p(beats, rng, duration_ms)


def _insert_pvc(beats: _Beats, rng: np.random.Generator) -> np.ndarray:
    """Insert one PVC after a conducted beat; the next sinus P is buried and not conducted.

    Returns the mask of P waves hidden by the PVC (full compensatory pause: the sinus rhythm
    is not reset, the buried P does not conduct).
    """
    hidden = np.zeros(beats.p_t.size, dtype=bool)
    conducted_p = np.flatnonzero(beats.p_qrs >= 0)
    if conducted_p.size < 3:
        return hidden
    k = int(rng.choice(conducted_p[:-2]))
    q = beats.p_qrs[k]
    nxt = k + 1
    rr = beats.p_t[nxt] - beats.p_t[k]
    pvc = beats.qrs_t[q] + rng.uniform(0.45, 0.6) * rr
    if beats.p_kind[nxt] != "sinus" or beats.p_qrs[nxt] < 0 or pvc >= beats.qrs_t[beats.p_qrs[nxt]]:
        return hidden
    # The buried P loses its QRS (refractory ventricles), then the PVC is added.
    lost = beats.p_qrs[nxt]
    keep = np.ones(beats.qrs_t.size, dtype=bool)
    keep[lost] = False
    new_index = np.cumsum(keep) - 1
    p_qrs = np.where(beats.p_qrs >= 0, new_index[np.maximum(beats.p_qrs, 0)], -1)
    p_qrs[nxt] = -1
    qrs_t = np.append(beats.qrs_t[keep], pvc)
    qrs_kind = np.append(beats.qrs_kind[keep], "pvc")
    order = np.argsort(qrs_t, kind="stable")
    rank = np.empty_like(order)
    rank[order] = np.arange(order.size)
    beats.qrs_t, beats.qrs_kind = qrs_t[order], qrs_kind[order]
    beats.p_qrs = np.where(p_qrs >= 0, rank[np.maximum(p_qrs, 0)], -1)
    hidden[nxt] = True
    beats.artefacts.append("pvc")
    return hidden


def _insert_spurious_p(beats: _Beats, rng: np.random.Generator, duration_ms: float) -> None:
    """Add a false P detection at least 150 ms from true P waves and outside QRS complexes."""
    for _ in range(20):
        t = rng.uniform(200.0, duration_ms - 200.0)
        far_p = np.all(np.abs(beats.p_t - t) > 150.0)
        far_qrs = np.all((t - beats.qrs_t < -40.0) | (t - beats.qrs_t > 140.0))
        if far_p and far_qrs:
            beats.p_t = np.append(beats.p_t, t)
            beats.p_kind = np.append(beats.p_kind, "spurious")
            beats.p_qrs = np.append(beats.p_qrs, -1)
            beats.hidden_p = np.append(beats.hidden_p, False)
            beats.artefacts.append("spurious_p")
            return


def _detect(
    beats: _Beats,
    pattern: str,
    rng: np.random.Generator,
    duration_ms: float,
    rate: float,
    jitter_ms: float,
) -> StripTruth:
    """Apply detection (jitter, hidden P waves), sort, and re-index the truth."""
    hidden = (
        beats.hidden_p
        if beats.hidden_p.size == beats.p_t.size
        else np.zeros(beats.p_t.size, dtype=bool)
    )
    seen = ~hidden
    p_obs = beats.p_t + rng.uniform(-jitter_ms, jitter_ms, beats.p_t.size)
    q_obs = beats.qrs_t + rng.uniform(-jitter_ms, jitter_ms, beats.qrs_t.size)
    p_obs = np.clip(p_obs, 0.0, duration_ms)
    q_obs = np.clip(q_obs, 0.0, duration_ms)

    p_idx = np.flatnonzero(seen)
    p_idx = p_idx[np.argsort(p_obs[p_idx], kind="stable")]
    q_order = np.argsort(q_obs, kind="stable")
    q_rank = np.empty_like(q_order)
    q_rank[q_order] = np.arange(q_order.size)

    p_det = p_obs[p_idx]
    p_qrs_true = beats.p_qrs[p_idx]
    conducted = p_qrs_true >= 0
    qrs_det = q_obs[q_order]
    pr_det = np.full(p_det.size, np.nan)
    pr_det[conducted] = q_obs[p_qrs_true[conducted]] - p_det[conducted]

    qrs_p_index = np.full(qrs_det.size, -1, dtype=np.int64)
    qrs_p_index[q_rank[p_qrs_true[conducted]]] = np.flatnonzero(conducted)
    real_rate = _mean_rate(beats.p_t[beats.p_kind == "sinus"], rate)
    return StripTruth(
        p_ms=p_det,
        qrs_ms=qrs_det,
        pattern=pattern,
        ratio=beats.ratio,
        conducted=conducted,
        escape_rate_bpm=beats.escape_rate,
        pr_ms=pr_det,
        p_kind=np.asarray(beats.p_kind[p_idx], dtype=str),
        qrs_kind=np.asarray(beats.qrs_kind[q_order], dtype=str),
        qrs_p_index=qrs_p_index,
        missed_p_ms=np.sort(beats.p_t[hidden]),
        duration_ms=float(duration_ms),
        atrial_rate_bpm=real_rate,
        ventricular_rate_bpm=float(qrs_det.size * 60_000.0 / duration_ms),
        artefacts=tuple(beats.artefacts),
    )


def _mean_rate(sinus_t: np.ndarray, fallback: float) -> float:
    """Mean atrial rate from consecutive on-time P waves (bpm)."""
    if sinus_t.size < 2:
        return float(fallback)
    d = np.diff(np.sort(sinus_t))
    return float(60_000.0 / np.median(d))
