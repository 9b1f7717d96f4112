"""Vectorized beat patterns of 1:1 strips, over all strips of the registry at once.

``vectorized_rows(strips, r)`` settles the strips whose per-strip classification
(``cohort.phenotype.beats.classify_sorted``) is provably a clean 1:1 result, in numpy passes
over the concatenated event arrays, and returns their beat_pattern rows; every other strip is
left to the per-strip classifier. Two kinds of strip qualify:

- **plain 1:1**: every P conducts the QRS before the next P. A strip may open with a QRS whose
  P precedes it and close with a P whose QRS follows it (both unassessable per strip).
- **one missed P**: the same, except that one P-P interval holds two QRS complexes and spans
  about two cycles. The per-strip classifier infers the missed P in the middle of that interval
  (``_infer_missed``: ``start + gap / 2``), matches it to the QRS, keeps its PR out of the PR
  series, and notes ``inferred_p=1``.

The conditions keep every quantity strictly inside the per-strip thresholds, with margins, so
that each step of ``classify_sorted`` takes the branch a 1:1 strip takes: the atrial walk finds
no premature, extra or (further) missed P and no bigeminy; every QRS is matched to its own P
(greedy and consistency passes agree); no QRS is set aside; the PR is fixed without drift.
``tests/phenotype/test_beats_fast_paths.py`` checks each path against ``classify_sorted``.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np

from cohort.phenotype.beats import BeatRules, one_to_one_evidence

COLUMNS = ("pattern", "ratio", "atrial_rate", "ventricular_rate", "escape_rate", "pr_median_ms",
           "n_p", "n_qrs", "n_not_conducted", "evidence")

# Margins that keep the vectorized path strictly inside the per-strip classifier's thresholds.
# P-P within +-10 % of the median keeps every interval within [0.82, 1.22] of any local
# expected P-P, inside the premature (0.80) and on-time (1.25) limits; the drift margin absorbs
# floating-point differences between the two least-squares computations.
_PP_BAND = 0.10
_DRIFT_MARGIN = 0.9
# Strips whose sinus rate wanders beyond the +-10 % band (long strips) qualify when every P-P is
# within the on-time limits of its own local median (the expected P-P the per-strip classifier
# computes), with this relative margin, neighbouring P-P intervals are too alike for atrial
# bigeminy, and no P-P is shorter than the band allows at the fastest accepted atrial rate.
_LOCAL_MARGIN = 1.02
# PR spread below twice the fixed-PR tolerance puts every PR within the tolerance of the
# cluster centre, so no beat is set aside as ectopic; 2 % margin for rounding of the centre.
_SPREAD_MARGIN = 0.98


@dataclass
class StripRuns:
    """Per-strip views into the concatenated, ordered event arrays (QRS run, then P run)."""

    keys: list[str]
    t: np.ndarray
    q_start: np.ndarray
    q_end: np.ndarray
    p_start: np.ndarray
    p_end: np.ndarray


@dataclass
class _OneToOne:
    """Candidate strips laid out as 1:1 runs: core P k (detected or inferred) conducts core QRS k.

    ``p``/``q``/``inferred`` are concatenated over the candidates (``size`` each, group numbers
    ``group``); the optional leading QRS and trailing P are the strip-edge events.
    """

    index: np.ndarray       # strip numbers
    size: np.ndarray        # core P (= core QRS) per candidate
    group: np.ndarray
    p: np.ndarray
    q: np.ndarray
    inferred: np.ndarray
    lead: np.ndarray        # 1 if the strip opens with a QRS before its first P
    lead_t: np.ndarray      # that QRS (first QRS of the strip)
    trail: np.ndarray       # 1 if the strip closes with a P after its last QRS
    trail_t: np.ndarray     # that P (last P of the strip)
    n_p: np.ndarray         # detected P and QRS of the strip
    n_q: np.ndarray

    @cached_property
    def pp(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """P-P intervals of the analysed P waves (core, then the trailing P), groups, counts."""
        start = np.cumsum(self.size) - self.size
        p_all, groups = _with_edges(self.p, self.trail_t, self.trail, start, self.size, after=True)
        pp, pp_group = _inner_diffs(p_all, groups)
        return pp, pp_group, self.size - 1 + self.trail

    @cached_property
    def pp_median(self) -> np.ndarray:
        """Median P-P per candidate: the on-time cycle of the per-strip classifier."""
        return _group_median(*self.pp)


def vectorized_rows(strips: StripRuns, r: BeatRules) -> dict:
    """beat_pattern rows (``index`` = strip numbers, then COLUMNS) of the strips settled here."""
    found = [path(strips, r) for path in (_plain_candidates, _missed_p_candidates)]
    parts = [_rows(c, ok & _conduction_ok(c, r), r) for c, ok in filter(None, found)]
    out = {"index": np.concatenate([p["index"] for p in parts] or [np.zeros(0, np.int64)])}
    for c in COLUMNS:
        out[c] = [v for p in parts for v in p[c]]
    return out


def may_settle(strips: StripRuns, r: BeatRules) -> np.ndarray:
    """Strips whose shape lets a vectorized path settle them (the others are never settled
    here): as many core QRS as core P (plain 1:1) or one more (one missed P), and enough beats.
    """
    n_q, n_p, lead, trail = _edges(strips)
    extra_qrs = (n_q - lead) - (n_p - trail)
    return ((extra_qrs == 0) | (extra_qrs == 1)) & _enough_beats(n_p - trail, r)


def _enough_beats(core: np.ndarray, r: BeatRules) -> np.ndarray:
    return core >= max(r.min_p, r.min_qrs, 3)


# --------------------------------------------------------------------------------------------
# Candidates
# --------------------------------------------------------------------------------------------
def _edges(strips: StripRuns) -> tuple[np.ndarray, ...]:
    """Counts of detected QRS and P per strip, and the leading-QRS and trailing-P flags."""
    n_q = strips.q_end - strips.q_start
    n_p = strips.p_end - strips.p_start
    has = np.flatnonzero((n_q >= 1) & (n_p >= 1))
    t = strips.t
    lead = np.zeros(len(n_q), dtype=np.int64)
    trail = np.zeros(len(n_q), dtype=np.int64)
    lead[has] = t[strips.q_start[has]] < t[strips.p_start[has]]
    trail[has] = t[strips.p_end[has] - 1] > t[strips.q_end[has] - 1]
    return n_q, n_p, lead, trail


def _runs(strips: StripRuns, cand: np.ndarray, starts: np.ndarray, sizes: np.ndarray
          ) -> tuple[np.ndarray, np.ndarray]:
    """Concatenated events ``t[start : start + size]`` of each candidate, and group numbers."""
    group = np.repeat(np.arange(len(cand)), sizes)
    offset = np.arange(int(sizes.sum())) - np.repeat(np.cumsum(sizes) - sizes, sizes)
    return strips.t[starts[group] + offset], group


def _layout(strips: StripRuns, cand: np.ndarray, p: np.ndarray, inferred: np.ndarray,
            size: np.ndarray, lead: np.ndarray, trail: np.ndarray, n_p: np.ndarray,
            n_q: np.ndarray) -> _OneToOne:
    q, group = _runs(strips, cand, strips.q_start[cand] + lead[cand], size)
    return _OneToOne(cand, size, group, p, q, inferred, lead[cand], strips.t[strips.q_start[cand]],
                     trail[cand], strips.t[strips.p_end[cand] - 1], n_p[cand], n_q[cand])


def _plain_candidates(strips: StripRuns, r: BeatRules) -> tuple[_OneToOne, np.ndarray] | None:
    """Strips with as many core P as core QRS, and whether their P-P cadence qualifies."""
    n_q, n_p, lead, trail = _edges(strips)
    core = n_p - trail
    cand = np.flatnonzero((n_q - lead == core) & _enough_beats(core, r))
    if len(cand) == 0:
        return None
    p, _ = _runs(strips, cand, strips.p_start[cand], core[cand])
    c = _layout(strips, cand, p, np.zeros(len(p), dtype=bool), core[cand], lead, trail, n_p, n_q)
    pp, pp_group, n_pp = c.pp
    ratio = pp / c.pp_median[pp_group]
    in_band = _all_per_group((ratio >= 1 - _PP_BAND) & (ratio <= 1 + _PP_BAND), pp_group, len(cand))
    in_band &= _band_inside_on_time(r)
    # the local test needs the strip's finite P-P; non-finite strips fail _conduction_ok anyway
    check = ~in_band & _all_per_group(np.isfinite(pp), pp_group, len(cand))
    return c, in_band | _local_cadence_ok(pp, pp_group, n_pp, check, r)


def _missed_p_candidates(strips: StripRuns, r: BeatRules) -> tuple[_OneToOne, np.ndarray] | None:
    """Strips with one core QRS more than core P whose longest P-P holds a missed P.

    The inferred P is placed as the per-strip classifier places it; the atrial conditions are
    those of ``_missed_cadence_ok`` on the detected P-P intervals.
    """
    n_q, n_p, lead, trail = _edges(strips)
    core = n_p - trail
    cand = np.flatnonzero((n_q - lead == core + 1) & _enough_beats(core, r))
    if len(cand) == 0:
        return None
    detected, group = _runs(strips, cand, strips.p_start[cand], n_p[cand])
    iv, iv_group = _inner_diffs(detected, group)
    n_iv = n_p[cand] - 1
    iv_start = np.cumsum(n_iv) - n_iv
    finite = _all_per_group(np.isfinite(iv), iv_group, len(cand))
    gap = _group_argmax(np.where(np.isfinite(iv), iv, -np.inf), iv_start, n_iv)
    # the gap may be any interval: the inferred P then conducts the extra core QRS
    ok = finite & _missed_cadence_ok(iv, iv_group, n_iv, gap, r)
    p_start = np.cumsum(n_p[cand]) - n_p[cand]
    before = p_start + (gap - iv_start)  # P opening the gap, in ``detected``
    start = detected[before]
    inferred_t = start + (detected[before + 1] - start) / 2  # _infer_missed, k = 2
    p = np.insert(detected, before + 1, inferred_t)
    inferred = np.insert(np.zeros(len(detected), dtype=bool), before + 1, True)
    # drop the trailing P from the core runs (it is an edge event)
    keep = np.ones(len(p), dtype=bool)
    virtual_end = np.cumsum(n_p[cand] + 1)
    keep[(virtual_end - 1)[trail[cand] == 1]] = False
    c = _layout(strips, cand, p[keep], inferred[keep], core[cand] + 1, lead, trail, n_p, n_q)
    return c, ok


def _group_argmax(values: np.ndarray, start: np.ndarray, sizes: np.ndarray) -> np.ndarray:
    """Position (in ``values``) of each group's first maximum (groups contiguous, sizes >= 1)."""
    group = np.repeat(np.arange(len(sizes)), sizes)
    order = np.lexsort((np.arange(len(values)), -values, group))
    return order[start]


# --------------------------------------------------------------------------------------------
# Atrial cadence
# --------------------------------------------------------------------------------------------
def _on_time_band(r: BeatRules) -> tuple[float, float]:
    """P-P / expected P-P strictly on time: not premature, explained as one cycle, clean, and
    short of the 1.5 cycles from which a missed P is looked for."""
    lo = r.premature_fraction * _LOCAL_MARGIN
    hi = min(1 / r.premature_fraction, 1.3) / _LOCAL_MARGIN
    return lo, hi


def _band_inside_on_time(r: BeatRules) -> bool:
    """Whether every P-P within +-_PP_BAND of the strip median is on time against any local
    expected P-P under these rules (true for the default rules; a rule file with another
    premature fraction leaves such strips to the local test)."""
    lo, hi = _on_time_band(r)
    return lo < (1 - _PP_BAND) / (1 + _PP_BAND) and hi > (1 + _PP_BAND) / (1 - _PP_BAND)


def _local_cadence_ok(pp: np.ndarray, group: np.ndarray, sizes: np.ndarray, check: np.ndarray,
                      r: BeatRules) -> np.ndarray:
    """Per group: every P-P on time against its local median P-P (see ``_LOCAL_MARGIN``).

    For such a strip the per-strip classifier keeps the local median as expected P-P (every
    interval is explained), finds no premature, extra or missed P and no bigeminy, exactly as
    for a strip inside the +-10 % band. Only groups flagged in ``check`` are examined.
    """
    out = np.zeros(len(sizes), dtype=bool)
    chosen = np.flatnonzero(check)
    if len(chosen) == 0:
        return out
    rows = np.flatnonzero(check[group])
    values, sub_group = pp[rows], np.searchsorted(chosen, group[rows])
    ratio = values / _group_local_median(values, sub_group, sizes[chosen], r.atrial_window)
    lo, hi = _on_time_band(r)
    shortest = (1 - _PP_BAND) * 60_000.0 / r.atrial_rate_max_bpm
    ok = _all_per_group((ratio >= lo) & (ratio <= hi) & (values >= shortest), sub_group,
                        len(chosen))
    ok &= _alike_neighbours(values, sub_group, np.ones(len(values), dtype=bool), len(chosen), lo)
    out[chosen] = ok
    return out


def _missed_cadence_ok(iv: np.ndarray, group: np.ndarray, sizes: np.ndarray, gap: np.ndarray,
                       r: BeatRules) -> np.ndarray:
    """Per group: the P-P intervals are on time except ``gap``, which spans two cycles.

    Both expected P-P series of ``beats._expected_pp`` are checked: the local median of all
    intervals (every interval explained, so it is kept; the gap is not clean) and the local
    median of the clean ones (the walk's expected P-P: the gap gets one inferred P, the other
    intervals and both halves of the gap are on time). Neighbouring non-gap intervals are alike
    (no bigeminy), and no interval is shorter than the band allows at the fastest rate.
    """
    n = len(sizes)
    is_gap = np.zeros(len(iv), dtype=bool)
    is_gap[gap] = True
    lo, hi = _on_time_band(r)
    tol = r.infer_tolerance
    two_lo = max(2 - tol, 1.5, 1.3) * _LOCAL_MARGIN
    two_hi = min(2 + tol, 2.5) / _LOCAL_MARGIN
    shortest = (1 - _PP_BAND) * 60_000.0 / r.atrial_rate_max_bpm
    ok = np.ones(n, dtype=bool)
    for keep in (None, ~is_gap):
        ratio = iv / _group_local_median(iv, group, sizes, r.atrial_window, keep)
        ok &= _all_per_group(np.where(is_gap, (ratio >= two_lo) & (ratio <= two_hi),
                                      (ratio >= lo) & (ratio <= hi)), group, n)
        if keep is not None:
            half = ratio[gap] / 2  # (inferred - start) and (end - inferred), each about gap / 2
            ok &= (half >= lo * 1.001) & (half <= hi / 1.001)
    ok &= _all_per_group(is_gap | (iv >= shortest), group, n)
    ok &= _alike_neighbours(iv, group, ~is_gap, n, lo)
    return ok


def _alike_neighbours(values: np.ndarray, group: np.ndarray, use: np.ndarray, n: int,
                      lo: float) -> np.ndarray:
    """Per group: every two neighbouring used intervals differ by less than the premature
    fraction (so ``beats._bigeminy_cycle`` finds a short interval that is not early)."""
    pair = (group[1:] == group[:-1]) & use[1:] & use[:-1]
    a, b = values[:-1][pair], values[1:][pair]
    return _all_per_group(np.minimum(a, b) >= lo * np.maximum(a, b), group[1:][pair], n)


def _group_local_median(values: np.ndarray, group: np.ndarray, sizes: np.ndarray, w: int,
                        keep: np.ndarray | None = None) -> np.ndarray:
    """Median of the kept values in each value's window of 2w+1 positions, as ``beats._local``
    takes it: windows slide inwards at the group's edges, a short group is one window.
    Every window must hold a kept value."""
    start = (np.cumsum(sizes) - sizes)[group]
    n = sizes[group]
    size = np.minimum(n, 2 * w + 1)
    first = start + np.clip(np.arange(len(values)) - start - w, 0, n - size)
    cols = np.arange(2 * w + 1)
    index = np.minimum(first[:, None] + cols, len(values) - 1)
    valid = cols < size[:, None]
    if keep is not None:
        valid &= keep[index]
    windows = np.where(valid, values[index], np.inf)
    windows.sort(axis=1)
    count = valid.sum(axis=1)
    rows, mid = np.arange(len(values)), count // 2
    even = (windows[rows, np.maximum(mid - 1, 0)] + windows[rows, mid]) / 2
    return np.where(count % 2 == 1, windows[rows, mid], even)


# --------------------------------------------------------------------------------------------
# Conduction
# --------------------------------------------------------------------------------------------
def _conduction_ok(c: _OneToOne, r: BeatRules) -> np.ndarray:
    """Per candidate: every core P conducts its QRS before the next P with a fixed PR.

    PRs of inferred P waves count for the matching (PR window, order) but not for the PR
    spread, median and drift, as in the per-strip classifier.
    """
    n = len(c.index)
    pr = c.q - c.p
    start = np.cumsum(c.size) - c.size
    last = start + c.size - 1
    ok = _all_per_group(np.isfinite(c.p) & np.isfinite(c.q) & (pr >= r.pr_min_ms)
                        & (pr <= r.pr_max_ms), c.group, n)
    pp, pp_group, n_pp = c.pp
    q_all = _with_edges(c.q, c.lead_t, c.lead, start, c.size, after=False)
    rr, rr_group = _inner_diffs(*q_all)
    inner = np.ones(len(c.p), dtype=bool)
    inner[last] = False
    nxt = np.flatnonzero(inner)
    ok &= _all_per_group(c.q[nxt] < c.p[nxt + 1], c.group[nxt], n)
    ok &= _all_per_group(np.isfinite(pp) & (pp >= r.p_duplicate_ms), pp_group, n)
    ok &= _all_per_group(np.isfinite(rr) & (rr >= r.qrs_duplicate_ms), rr_group, n)
    lo, hi = _pr_range(pr, c.inferred, start)
    ok &= hi - lo <= _SPREAD_MARGIN * 2 * r.pr_fixed_tolerance_ms
    # an earlier P could only win the consistency pass with a PR near its neighbours' PRs
    lo_all, hi_all = np.minimum.reduceat(pr, start), np.maximum.reduceat(pr, start)
    shortest_pp = np.minimum.reduceat(np.where(np.isfinite(pp), pp, -np.inf),
                                      np.cumsum(n_pp) - n_pp)
    ok &= shortest_pp > (hi_all - lo_all) + r.pr_fixed_tolerance_ms
    ok &= 60_000.0 / c.pp_median <= r.atrial_rate_max_bpm
    real = ~c.inferred
    ok &= _group_drift(c.p[real], pr[real], c.group[real], c.size - _count(c)) \
        <= _DRIFT_MARGIN * r.pr_drift_max_ms
    return ok


def _count(c: _OneToOne) -> np.ndarray:
    """Inferred P waves per candidate."""
    return np.bincount(c.group[c.inferred], minlength=len(c.index))


def _pr_range(pr: np.ndarray, inferred: np.ndarray, start: np.ndarray
              ) -> tuple[np.ndarray, np.ndarray]:
    """Shortest and longest PR of the detected P waves of each candidate."""
    return (np.minimum.reduceat(np.where(inferred, np.inf, pr), start),
            np.maximum.reduceat(np.where(inferred, -np.inf, pr), start))


def _rows(c: _OneToOne, ok: np.ndarray, r: BeatRules) -> dict:
    """beat_pattern rows of the candidates that passed (``ok``)."""
    pr = c.q - c.p
    start = np.cumsum(c.size) - c.size
    real = ~c.inferred
    n_real = c.size - _count(c)
    pr_med = _group_median(pr[real], c.group[real], n_real)
    lo, hi = _pr_range(pr, c.inferred, start)
    atrial = 60_000.0 / c.pp_median
    ventricular = 60_000.0 * (c.n_q - 1) / (c.q[start + c.size - 1] - c.lead_t)
    sel = np.flatnonzero(ok)
    out = {"index": c.index[sel], **{col: [] for col in COLUMNS}}
    for med, a, b, n, at, v, np_, nq, tr, inf in zip(
            pr_med[sel].tolist(), lo[sel].tolist(), hi[sel].tolist(), n_real[sel].tolist(),
            atrial[sel].tolist(), ventricular[sel].tolist(), c.n_p[sel].tolist(),
            c.n_q[sel].tolist(), c.trail[sel].tolist(), _count(c)[sel].tolist(), strict=True):
        pattern, reasons, sentence = one_to_one_evidence(med, a, b, n, r.pr_normal_max_ms)
        if inf:
            reasons.append(f"inferred_p={inf}")  # as the per-strip classifier notes
        if tr:
            reasons.append("unassessable_p=1")  # the closing P
        for col, value in zip(COLUMNS, (pattern, "1:1", at, v, None, med, np_, nq, 0,
                                        [*reasons, sentence]), strict=True):
            out[col].append(value)
    return out


# --------------------------------------------------------------------------------------------
# Grouped numpy helpers (groups contiguous)
# --------------------------------------------------------------------------------------------
def _group_median(values: np.ndarray, group: np.ndarray, sizes: np.ndarray) -> np.ndarray:
    """Median of ``values`` per group (sizes >= 1), as numpy.median."""
    order = np.lexsort((values, group))
    s = values[order]
    start = np.concatenate(([0], np.cumsum(sizes)[:-1]))
    lo = start + (sizes - 1) // 2
    hi = start + sizes // 2
    return np.where(sizes % 2 == 1, s[lo], (s[lo] + s[hi]) / 2)


def _with_edges(x: np.ndarray, edge: np.ndarray, has_edge: np.ndarray, start: np.ndarray,
                size: np.ndarray, *, after: bool) -> tuple[np.ndarray, np.ndarray]:
    """Insert each group's optional edge value before (or after) its run; values and groups."""
    group = np.repeat(np.arange(len(size)), size)
    extra = np.flatnonzero(has_edge)
    pos = (start + size)[extra] if after else start[extra]
    values = np.insert(x, pos, edge[extra])
    groups = np.insert(group, pos, extra)
    return values, groups


def _inner_diffs(values: np.ndarray, group: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Successive differences within groups and their group numbers."""
    same = group[1:] == group[:-1]
    return (values[1:] - values[:-1])[same], group[1:][same]


def _all_per_group(flags: np.ndarray, group: np.ndarray, n: int) -> np.ndarray:
    bad = np.bincount(group[~flags], minlength=n)
    return bad == 0


def _group_drift(t: np.ndarray, y: np.ndarray, group: np.ndarray, size: np.ndarray) -> np.ndarray:
    """Least-squares change of y over the span of t, per group (0 for fewer than 3 points)."""
    n = size.astype(float)
    mt = np.bincount(group, t, minlength=len(size)) / n
    my = np.bincount(group, y, minlength=len(size)) / n
    dt = t - mt[group]
    sxx = np.bincount(group, dt * dt, minlength=len(size))
    sxy = np.bincount(group, dt * (y - my[group]), minlength=len(size))
    start = np.cumsum(size) - size
    span = t[start + size - 1] - t[start]
    with np.errstate(divide="ignore", invalid="ignore"):
        drift = np.abs(np.where(sxx > 0, sxy / sxx, 0.0) * span)
    return np.where(size >= 3, drift, 0.0)
