"""Beat-level AV conduction pattern of one strip from its P and QRS onset times.

``classify_strip(p_ms, qrs_ms)`` decides, for every P wave, whether it conducted (and its PR),
whether it came on time or early, and from that the strip's pattern: one code of
``cohort.vocabulary.BEAT_PATTERNS``, with the evidence that decided it.

Method (thresholds in ``cohort/rules/beats-v1.toml``)
-----------------------------------------------------
1. **Atrium.** The expected P-P at each P is a local robust statistic of the P-P intervals
   (window of +-``window_intervals``): the local median, or, when it explains more intervals,
   the local upper quartile (frequent premature P waves); in atrial bigeminy the long
   intervals. A P is *premature* when its P-P is below
   ``premature_fraction`` of the expected P-P and below ``premature_next_fraction`` of the next
   P-P (premature atrial complexes reset the sinus node, so a pause follows; gradual sinus
   arrhythmia does not qualify). An early P whose removal restores the cadence (previous to next
   P within ``extra_tolerance`` of one cycle) is an *extra detection* (artefact) and is ignored.
   A gap of about k cycles (k = 2, 3) holds k-1 *missed* P waves, inferred at even spacing; so
   does an empty cadence slot that explains a QRS without a P (the missed P conducted it, or
   hid in it).
2. **Matching.** A QRS is conducted by a P that precedes it by ``pr_min..pr_max``: the latest
   such P first, then, where several fit, the one whose PR agrees with the neighbouring beats.
   On a strip whose PRs mostly agree, a premature QRS with a PR that does not fit (or any QRS
   with a much longer PR) is set aside as ectopic; inside conducted runs, an abrupt PR
   shortening without a drop marks one of the two beats as ectopic (the earlier one when the
   later PR is the strip's reset PR). QRS complexes without a conducting P are ectopic
   (premature) or escape beats; P waves in their refractory period are *preempted*, not blocked.
3. **Relation.** P and QRS are *related* when (a) at least ``fixed_fraction`` of the non-ectopic
   QRS complexes follow an on-time P with the same PR (densest cluster, +-``fixed_tolerance_ms``)
   and the PR does not drift, or (b) every on-time P conducts 1:1 without PR drift, or (c) single
   non-conducted P waves sit in conduction pauses with the PR behaviour of Mobitz I (PR
   lengthening, shorter after the pause) or Mobitz II (constant), with no two drops in a row
   and few escape beats. Otherwise the rhythms are *dissociated*.
4. **Decision**, in this precedence (first that applies):

   1. ``indeterminate``: too few beats, no P waves, irregular or very fast atrial rhythm, or
      drops that cannot be typed or contradict each other (the evidence says which).
   2. dissociated with a regular ventricular rhythm: ``third_degree`` when the atrial rate
      exceeds the ventricular rate by ``rate_margin`` (escape rate reported), else
      ``av_dissociation``; P waves locked just before/after every QRS (retrograde P waves) or
      an irregular ventricular rhythm: ``indeterminate``.
   3. ``high_grade``: two or more consecutive on-time P waves not conducted while the others
      conduct with a fixed PR.
   4. single on-time non-conducted P waves: ``two_to_one`` when every other P is blocked
      throughout; otherwise each drop is judged from the PRs of the groups before and after it
      and the majority of strongly judged drops (else of weakly judged ones) gives
      ``mobitz_i`` or ``mobitz_ii``.
   5. ``blocked_pac``: only premature P waves are non-conducted (AV block patterns above win;
      a prolonged sinus PR still shows in ``pr_median_ms`` and the evidence).
   6. ``first_degree`` (median PR > ``normal_max_ms``) or ``normal``.

Per-P fates: ``conducted``, ``not_conducted``, ``premature`` (early P, conducted or not: see
``PWave.conducted``), and two for P waves that cannot count: ``artefact`` (extra detection) and
``unassessable`` (the strip ends before its QRS could come). In ``third_degree`` and
``av_dissociation`` no P conducts (apparent PRs are coincidences), so no PR is reported.

Evidence codes (``StripResult.reasons``) are short ``key`` or ``key=value`` strings; the last item
of ``StripResult.evidence`` is one human sentence.
"""

from __future__ import annotations

import math
import tomllib
from bisect import bisect_left, bisect_right, insort
from dataclasses import dataclass, fields
from functools import cache, cached_property
from operator import sub
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np

from cohort.errors import DataError, RuleSetError
from cohort.vocabulary import BEAT_PATTERNS

DEFAULT_RULES_PATH = Path(__file__).resolve().parents[1] / "rules" / "beats-v1.toml"

FATES = ("conducted", "not_conducted", "premature", "artefact", "unassessable")
QRS_ROLES = ("conducted", "ectopic", "escape", "unassessable")


# --------------------------------------------------------------------------------------------
# Rules
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class BeatRules:
    """Thresholds of the classifier, read from a rule file (see beats-v1.toml for meanings)."""

    rules_id: str
    p_duplicate_ms: float
    qrs_duplicate_ms: float
    min_p: int
    min_qrs: int
    atrial_window: int
    premature_fraction: float
    premature_next_fraction: float
    extra_tolerance: float
    infer_tolerance: float
    max_inferred_per_gap: int
    irregular_fraction: float
    max_premature_fraction: float
    atrial_rate_max_bpm: float
    pr_min_ms: float
    pr_max_ms: float
    pr_normal_max_ms: float
    pr_fixed_tolerance_ms: float
    pr_fixed_fraction: float
    pr_drift_max_ms: float
    pr_drop_tolerance_ms: float
    wenckebach_min_shortening_ms: float
    wenckebach_min_progression_ms: float
    wenckebach_pause_ratio: float
    ventricular_window: int
    qrs_premature_fraction: float
    refractory_ms: float
    rr_regular_tolerance: float
    rr_outlier_fraction: float
    dissociation_rate_margin: float
    locked_window_ms: float


# (section, key) in the TOML file -> attribute of BeatRules
_RULE_KEYS: dict[tuple[str, str], str] = {
    ("rules", "id"): "rules_id",
    ("input", "p_duplicate_ms"): "p_duplicate_ms",
    ("input", "qrs_duplicate_ms"): "qrs_duplicate_ms",
    ("minimum", "p_waves"): "min_p",
    ("minimum", "qrs_complexes"): "min_qrs",
    ("atrial", "window_intervals"): "atrial_window",
    ("atrial", "premature_fraction"): "premature_fraction",
    ("atrial", "premature_next_fraction"): "premature_next_fraction",
    ("atrial", "extra_tolerance"): "extra_tolerance",
    ("atrial", "infer_tolerance"): "infer_tolerance",
    ("atrial", "max_inferred_per_gap"): "max_inferred_per_gap",
    ("atrial", "irregular_fraction"): "irregular_fraction",
    ("atrial", "max_premature_fraction"): "max_premature_fraction",
    ("atrial", "rate_max_bpm"): "atrial_rate_max_bpm",
    ("pr", "min_ms"): "pr_min_ms",
    ("pr", "max_ms"): "pr_max_ms",
    ("pr", "normal_max_ms"): "pr_normal_max_ms",
    ("pr", "fixed_tolerance_ms"): "pr_fixed_tolerance_ms",
    ("pr", "fixed_fraction"): "pr_fixed_fraction",
    ("pr", "drift_max_ms"): "pr_drift_max_ms",
    ("pr", "drop_tolerance_ms"): "pr_drop_tolerance_ms",
    ("wenckebach", "min_shortening_ms"): "wenckebach_min_shortening_ms",
    ("wenckebach", "min_progression_ms"): "wenckebach_min_progression_ms",
    ("wenckebach", "pause_ratio"): "wenckebach_pause_ratio",
    ("ventricular", "window_intervals"): "ventricular_window",
    ("ventricular", "premature_fraction"): "qrs_premature_fraction",
    ("ventricular", "refractory_ms"): "refractory_ms",
    ("ventricular", "regular_tolerance"): "rr_regular_tolerance",
    ("ventricular", "outlier_fraction"): "rr_outlier_fraction",
    ("dissociation", "rate_margin"): "dissociation_rate_margin",
    ("dissociation", "locked_window_ms"): "locked_window_ms",
}


def load_rules(path: str | Path | None = None) -> BeatRules:
    """Read a beat rule file (default ``beats-v1``); RuleSetError names the file and key."""
    return _load_rules_cached(str(Path(path).resolve()) if path else str(DEFAULT_RULES_PATH))


@cache
def _load_rules_cached(path: str) -> BeatRules:
    try:
        data = tomllib.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError as exc:
        raise RuleSetError(f"beat rule file {path} not found; pass an existing TOML file") from exc
    except tomllib.TOMLDecodeError as exc:
        raise RuleSetError(f"beat rule file {path} is not valid TOML: {exc}") from exc
    known = {(s, k) for s, k in _RULE_KEYS}
    unknown = sorted(
        f"[{s}] {k}" for s, table in data.items() if isinstance(table, dict) for k in table
        if (s, k) not in known
    )
    if unknown:
        raise RuleSetError(f"beat rule file {path}: {len(unknown)} unknown key(s): "
                           f"{', '.join(unknown)}; remove or correct them (see {DEFAULT_RULES_PATH})")
    types = {f.name: f.type for f in fields(BeatRules)}
    values: dict[str, Any] = {}
    for (section, key), attr in _RULE_KEYS.items():
        try:
            raw = data[section][key]
        except (KeyError, TypeError):
            raise RuleSetError(f"beat rule file {path}: missing [{section}] {key}; "
                               f"copy it from {DEFAULT_RULES_PATH}") from None
        values[attr] = _coerce_rule(raw, types[attr], path, section, key)
    return BeatRules(**values)


def _coerce_rule(raw: Any, kind: str, path: str, section: str, key: str) -> Any:
    """Check one rule value's type and sign; numbers must be positive."""
    if kind == "str":
        if not isinstance(raw, str) or not raw:
            raise RuleSetError(f"beat rule file {path}: [{section}] {key} must be a non-empty string")
        return raw
    ok = isinstance(raw, int) if kind == "int" else isinstance(raw, int | float)
    if isinstance(raw, bool) or not ok or not raw > 0:
        raise RuleSetError(f"beat rule file {path}: [{section}] {key} = {raw!r} must be a "
                           f"positive {'integer' if kind == 'int' else 'number'}")
    return int(raw) if kind == "int" else float(raw)


def resolve_rules(rules: BeatRules | str | Path | None) -> BeatRules:
    """Rules object from a BeatRules, a rule-file path, or None (the default rule set)."""
    if isinstance(rules, BeatRules):
        return rules
    return load_rules(rules)


# --------------------------------------------------------------------------------------------
# Results
# --------------------------------------------------------------------------------------------
class PWave(NamedTuple):
    """One row of the per-P table (immutable; a named tuple because strips have many rows).

    ``index`` is 1-based in time order (as read on the strip); ``fate`` is one of FATES;
    ``on_time`` is False for premature P waves and None for artefacts; ``source`` is
    ``detected`` or ``inferred`` (a missed P placed from the atrial cadence).
    """

    index: int
    t_ms: float
    fate: str
    pr_ms: float | None
    on_time: bool | None
    conducted: bool | None
    source: str
    note: str = ""


@dataclass(frozen=True)
class StripResult:
    """Pattern of one strip with its per-P table, rates, ratios and evidence."""

    pattern: str
    ratio: str | None
    group_ratios: tuple[str, ...]
    atrial_rate_bpm: float | None
    ventricular_rate_bpm: float | None
    escape_rate_bpm: float | None
    pr_series_ms: tuple[float, ...]
    pr_median_ms: float | None
    p_waves: tuple[PWave, ...]
    qrs_ms: tuple[float, ...]
    qrs_roles: tuple[str, ...]
    n_p: int
    n_qrs: int
    n_not_conducted: int
    reasons: tuple[str, ...]
    sentence: str
    rules_id: str

    @property
    def label(self) -> str:
        """Human label of the pattern (from BEAT_PATTERNS)."""
        return BEAT_PATTERNS[self.pattern]

    @property
    def evidence(self) -> tuple[str, ...]:
        """Machine-readable reasons followed by the human sentence."""
        return (*self.reasons, self.sentence)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready dictionary."""
        return {
            "pattern": self.pattern, "label": self.label, "ratio": self.ratio,
            "group_ratios": list(self.group_ratios),
            "atrial_rate_bpm": self.atrial_rate_bpm, "ventricular_rate_bpm": self.ventricular_rate_bpm,
            "escape_rate_bpm": self.escape_rate_bpm, "pr_series_ms": list(self.pr_series_ms),
            "pr_median_ms": self.pr_median_ms, "n_p": self.n_p, "n_qrs": self.n_qrs,
            "n_not_conducted": self.n_not_conducted, "evidence": list(self.evidence),
            "rules_id": self.rules_id,
            "p_waves": [
                {"index": w.index, "t_ms": w.t_ms, "fate": w.fate, "pr_ms": w.pr_ms,
                 "on_time": w.on_time, "conducted": w.conducted, "source": w.source, "note": w.note}
                for w in self.p_waves
            ],
            "qrs": [{"t_ms": t, "role": role} for t, role in zip(self.qrs_ms, self.qrs_roles, strict=True)],
        }


# --------------------------------------------------------------------------------------------
# Small numeric helpers (pure Python: strips are short, list code beats numpy call overhead)
# --------------------------------------------------------------------------------------------
def _median(xs: list[float]) -> float:
    """Median as numpy computes it (mean of the two middle values for even counts)."""
    return _median_sorted(sorted(xs))


def _median_sorted(s: list[float]) -> float:
    n = len(s)
    mid = n // 2
    return s[mid] if n % 2 else (s[mid - 1] + s[mid]) / 2


def _upper_quartile_sorted(s: list[float]) -> float:
    """Upper quartile of a sorted list (linear interpolation, as numpy's default)."""
    pos = 0.75 * (len(s) - 1)
    lo = int(pos)
    hi = min(lo + 1, len(s) - 1)
    return s[lo] + (s[hi] - s[lo]) * (pos - lo)


def _local(values: list[float], keep: list[bool] | None, w: int, stat) -> list[float]:
    """``stat`` (of a sorted list) of the kept values in a window of 2w+1 positions around each
    position (``keep=None``: every value is kept).

    At the edges the window slides inwards (keeps its size), so the first and last beats are
    judged against as many neighbours as the others; empty windows fall back to all kept values.
    The window is kept sorted while it slides (n - size + 1 distinct windows).
    """
    n = len(values)
    size = min(n, 2 * w + 1)
    if keep is None:
        if not values:
            return []
        stats = _sliding_all(values, size, stat)
        return stats * n if n == size else stats[:1] * w + stats + stats[-1:] * w
    window = sorted(v for v, k in zip(values[:size], keep[:size], strict=True) if k)
    stats = [stat(window) if window else None]
    for lo in range(1, n - size + 1):
        if keep[lo - 1]:
            del window[bisect_left(window, values[lo - 1])]
        if keep[lo + size - 1]:
            insort(window, values[lo + size - 1])
        stats.append(stat(window) if window else None)
    if None in stats:
        pool = sorted(v for v, k in zip(values, keep, strict=True) if k)
        fallback = stat(pool) if pool else stat(sorted(values))
        stats = [fallback if x is None else x for x in stats]
    if n == size:
        return stats * n
    # n > 2w+1: the first w positions share the first window, the last w the last one
    return stats[:1] * w + stats + stats[-1:] * w


# From this many windows on, numpy sorts all windows of a running median at once (same values).
_NUMPY_WINDOWS = 24


def _sliding_all(values: list[float], size: int, stat) -> list[float]:
    """``stat`` of every window of ``size`` consecutive values (all kept, so none is empty)."""
    if stat is _median_sorted and len(values) - size + 1 >= _NUMPY_WINDOWS:
        return _sliding_median_numpy(values, size)
    window = sorted(values[:size])
    stats = [stat(window)]
    for lo in range(1, len(values) - size + 1):
        del window[bisect_left(window, values[lo - 1])]
        insort(window, values[lo + size - 1])
        stats.append(stat(window))
    return stats


def _sliding_median_numpy(values: list[float], size: int) -> list[float]:
    """Running median of long strips: every window sorted by numpy, then ``_median_sorted``'s
    arithmetic on the middle columns (identical floats: the same values are picked and added)."""
    windows = np.sort(np.lib.stride_tricks.sliding_window_view(np.asarray(values), size), axis=1)
    mid = size // 2
    middle = windows[:, mid] if size % 2 else (windows[:, mid - 1] + windows[:, mid]) / 2
    return middle.tolist()


def _densest(xs: list[float], width: float) -> tuple[int, float]:
    """Most values inside any window of ``width``, and that window's centre (middle of its
    extreme values). Centring on the cluster, not on the median, keeps an asymmetric spread of
    jitter inside the tolerance."""
    s = sorted(xs)
    best, centre, lo = 0, math.nan, 0
    for hi in range(len(s)):
        while s[hi] - s[lo] > width:
            lo += 1
        if hi - lo + 1 > best:
            best, centre = hi - lo + 1, (s[lo] + s[hi]) / 2
    return best, centre


def _drift(ts: list[float], ys: list[float]) -> float:
    """Least-squares change of y over the span of t (0 for fewer than three points)."""
    n = len(ts)
    if n < 3:
        return 0.0
    mt = sum(ts) / n
    my = sum(ys) / n
    sxx = sum((t - mt) ** 2 for t in ts)
    if sxx <= 0:
        return 0.0
    sxy = sum((t - mt) * (y - my) for t, y in zip(ts, ys, strict=True))
    return abs(sxy / sxx * (ts[-1] - ts[0]))


def _ms(x: float) -> str:
    return f"{x:.0f}"


def _bpm(interval_ms: float | None) -> float | None:
    return 60_000.0 / interval_ms if interval_ms and interval_ms > 0 else None


# --------------------------------------------------------------------------------------------
# Input
# --------------------------------------------------------------------------------------------
def _prepare(values: Any, name: str) -> tuple[list[float], int]:
    """Finite onset times in ascending order, and how many non-finite values were dropped."""
    try:
        arr = np.asarray(values, dtype=float).ravel()
    except (TypeError, ValueError) as exc:
        raise DataError(f"{name} must be numbers (onset times in ms); got {exc}") from exc
    finite = np.isfinite(arr)
    dropped = int(arr.size - np.count_nonzero(finite))
    return np.sort(arr[finite]).tolist(), dropped


def _merge_close(times: list[float], min_gap: float) -> tuple[list[float], int]:
    """Keep the first of onsets closer than ``min_gap`` (one wave detected twice)."""
    if len(times) < 2 or min(map(sub, times[1:], times)) >= min_gap:
        return list(times), 0
    out: list[float] = []
    for t in times:
        if out and t - out[-1] < min_gap:
            continue
        out.append(t)
    return out, len(times) - len(out)


# --------------------------------------------------------------------------------------------
# Step 1: atrium
# --------------------------------------------------------------------------------------------
@dataclass
class _Atrium:
    t: list[float]           # analysed P waves (detected kept + inferred), ascending
    inferred: list[bool]
    premature: list[bool]
    expected: list[float]    # expected P-P ending at each analysed P
    artefacts: list[float]   # detections judged extra
    cycle_ms: float | None   # median on-time P-P
    unexplained: int         # P-P intervals neither on time, premature, pause nor multiple
    n_intervals: int


def _expected_pp(iv: list[float], r: BeatRules) -> list[float]:
    """Expected P-P for each raw interval.

    First pass: in atrial bigeminy (intervals alternating short-long throughout) the long
    intervals; otherwise whichever of the local median (robust to a few missed or premature P
    waves) and upper quartile (frequent premature P waves) explains more intervals as on time,
    premature-then-pause, or a multiple of the cycle (the median on ties). A lower-quartile
    candidate (for trains with many missed P waves) was tried and dropped: a single extra
    detection in a short strip then doubles the atrial rate; the sparser reading wins. Second pass: local median of the intervals
    left after dropping short ones and the pauses after them.
    """
    w = r.atrial_window
    long_cycle = _bigeminy_cycle(iv, r)
    local_median = None  # e1 when it is the local median of all intervals
    if long_cycle is not None:
        e1 = [long_cycle] * len(iv)
    else:
        e1 = local_median = _local(iv, None, w, _median_sorted)
        explained = _explained(iv, e1, r)
        if explained < len(iv):  # only then can another candidate do better
            cap = 1.5 * _upper_quartile_sorted(sorted(iv))
            candidate = _local(iv, [v <= cap for v in iv], w, _upper_quartile_sorted)
            if _explained(iv, candidate, r) > explained:
                e1 = candidate
    n = len(iv)
    short = [iv[i] < r.premature_fraction * e1[i] for i in range(n)]
    clean = [
        not short[i] and not (i > 0 and short[i - 1]) and iv[i] <= 1.3 * e1[i] for i in range(n)
    ]
    if not any(clean):
        return e1
    if local_median is not None and all(clean):
        return local_median  # the second pass would repeat the same computation
    e2 = _local(iv, clean, w, _median_sorted)
    # where the window holds no clean interval, _local fell back to the global clean median
    return e2


def _explained(iv: list[float], e: list[float], r: BeatRules) -> int:
    """How many P-P intervals a candidate expected P-P explains (on time, premature followed by
    a pause, or about k cycles for missed P waves)."""
    lo, hi, tol = r.premature_fraction, 1 / r.premature_fraction, r.infer_tolerance
    n = 0
    for i, (v, ei) in enumerate(zip(iv, e, strict=True)):
        x = v / ei
        if lo <= x <= hi:
            n += 1
        elif x < lo:
            nxt = iv[i + 1] / e[i + 1] if i + 1 < len(iv) else 1.0
            n += lo <= nxt <= 1 + 2 * tol  # premature, then a pause of about a cycle
        else:
            k = round(x)
            n += 2 <= k <= 1 + r.max_inferred_per_gap and abs(x - k) <= tol
    return n


def _bigeminy_cycle(iv: list[float], r: BeatRules) -> float | None:
    """Median long interval if the P-P intervals alternate short-long (atrial bigeminy).

    Every interval of the short parity must be below the premature fraction of both its
    neighbours; a train with missed P waves has irregularly placed long intervals instead.
    """
    if len(iv) < 4:
        return None
    even, odd = _median(iv[0::2]), _median(iv[1::2])
    short_first = even < odd
    f = r.premature_fraction
    for i in range(0 if short_first else 1, len(iv), 2):
        neighbours = [iv[j] for j in (i - 1, i + 1) if 0 <= j < len(iv)]
        if any(iv[i] >= f * x for x in neighbours):
            return None
    return odd if short_first else even


def _is_short(gap: float, e: float, nxt_gap: float | None, e_next: float, r: BeatRules) -> bool:
    if gap >= r.premature_fraction * e:
        return False
    if nxt_gap is None:
        return True
    return gap < r.premature_next_fraction * nxt_gap or nxt_gap < r.premature_fraction * e_next


def _analyse_atrium(p: list[float], r: BeatRules, q: list[float] | None = None,
                    forced: tuple[float, ...] = ()) -> _Atrium:
    """Roles of the P waves: on time, premature, extra detection, or inferred (missed).

    ``q`` (QRS onsets) breaks ties between equally good cadences: a detection followed by a
    QRS at the strip's typical PR is less likely to be the extra one. ``forced`` are inferred
    P waves (from orphan QRS complexes) that join the cadence as inferred.
    """
    if forced:
        p = sorted([*p, *forced])
    n = len(p)
    forced_set = set(forced)
    if n < 2:
        return _Atrium(list(p), [t in forced_set for t in p], [False] * n, [math.nan] * n, [],
                       None, 0, 0)
    iv = [p[i + 1] - p[i] for i in range(n - 1)]
    exp_iv = _expected_pp(iv, r)
    at = _Atrium([p[0]], [p[0] in forced_set], [False], [exp_iv[0]], [], None, 0, 0)
    ctx = _QrsContext(p, q or [], r)
    # the columns of ``at`` are appended to in place (hot loop: no helper call per P)
    times, inferred, premature, expected = at.t, at.inferred, at.premature, at.expected
    early = r.premature_fraction
    skip = False
    for i in range(1, n):
        if skip:
            skip = False
            continue
        t, e = p[i], exp_iv[i - 1]
        if forced_set and t in forced_set:
            _append(at, t, e, premature=False, inferred=True)
            continue
        gap = t - times[-1]
        # _is_short's first test inline: most P waves are not early
        if gap < early * e:
            nxt = p[i + 1] if i + 1 < n else None
            nxt_gap = None if nxt is None else nxt - t
            e_next = exp_iv[i] if i < n - 1 else e
            if _is_short(gap, e, nxt_gap, e_next, r):
                skip = _early_p(at, p, i, e, ctx)
                continue
        if not premature[-1] and gap / e >= 1.5:  # else round(gap / e) < 2: nothing missed
            _infer_missed(at, gap, e, r)
        times.append(t)
        inferred.append(False)
        premature.append(False)
        expected.append(e)
    _summarise_atrium(at, r)
    return at


def _early_p(at: _Atrium, p: list[float], i: int, e: float, ctx: _QrsContext) -> bool:
    """Place the early P ``p[i]``: premature (with the next detection extra), extra itself, or
    premature; True when the next detection was taken as extra (the walk skips it)."""
    t = p[i]
    if _extra_after_premature(at, t, p[i + 1: i + 4], e, ctx):
        _append(at, t, e, premature=True)
        at.artefacts.append(p[i + 1])
        return True
    if _resolve_extra(at, t, p[i + 1] if i + 1 < len(p) else None, e, ctx):
        return False
    _append(at, t, e, premature=True)
    return False


def _append(at: _Atrium, t: float, e: float, *, premature: bool, inferred: bool = False) -> None:
    at.t.append(t)
    at.inferred.append(inferred)
    at.premature.append(premature)
    at.expected.append(e)


class _QrsContext:
    """What the atrial walk may use of the QRS complexes: their onsets and a PR hint (computed
    only when an early P needs it)."""

    def __init__(self, p: list[float], q: list[float], r: BeatRules) -> None:
        self.p, self.q, self.r = p, q, r

    @cached_property
    def pr_hint(self) -> float | None:
        return _pr_hint(self.p, self.q, self.r)

    def typical(self, t: float) -> bool:
        """A QRS follows P ``t`` at about the strip's typical PR (it looks conducted)."""
        if self.pr_hint is None:
            return False
        tol = self.r.pr_drop_tolerance_ms
        k = bisect_left(self.q, t + self.pr_hint - tol)
        return k < len(self.q) and self.q[k] <= t + self.pr_hint + tol

    def penalty(self, removed: float) -> float:
        """Cost of calling a detection extra when it looks conducted."""
        return self.r.extra_tolerance if self.typical(removed) else 0.0


def _pr_hint(p: list[float], q: list[float], r: BeatRules) -> float | None:
    """Median interval from each QRS back to the latest P in its PR window (a rough PR)."""
    prs = []
    for t in q:
        k = bisect_right(p, t - r.pr_min_ms) - 1
        if k >= 0 and t - p[k] <= r.pr_max_ms:
            prs.append(t - p[k])
    return _median(prs) if prs else None


def _resolve_extra(at: _Atrium, t: float, nxt: float | None, e: float, ctx: _QrsContext) -> bool:
    """Drop an extra detection when removing it (or the previous P) restores the cadence."""
    r = ctx.r
    cost_this = abs((nxt - at.t[-1]) / e - 1) if nxt is not None else math.inf
    prev_ok = len(at.t) >= 2 and not at.inferred[-1] and not at.premature[-1]
    cost_prev = abs((t - at.t[-2]) / e - 1) if prev_ok else math.inf
    if len(at.t) == 1 and nxt is not None and not _can_conduct(at.t[0], t, ctx.q, r):
        # first pair: the first P has no predecessor; if it cannot conduct, judge it by
        # whether the second P keeps the cadence with the third
        cost_prev = abs((nxt - t) / e - 1)
    if min(cost_this, cost_prev) > r.extra_tolerance:
        return False
    cost_this += ctx.penalty(t)
    cost_prev += ctx.penalty(at.t[-1])
    if cost_this <= cost_prev:
        at.artefacts.append(t)
        return True
    at.artefacts.append(at.t.pop())
    at.inferred.pop()
    at.premature.pop()
    at.expected.pop()
    _append(at, t, e, premature=False)
    return True


def _extra_after_premature(at: _Atrium, t: float, ahead: list[float], e: float,
                           ctx: _QrsContext) -> bool:
    """Early P followed closely by another early detection: a premature P plus an extra one?

    Removing ``t`` (sinus cadence continues through the next detection, which may itself be
    followed by a premature P) competes with removing the next detection (``t`` is a premature
    complex followed by its pause, which resets the sinus node to about one cycle or a little
    more). Each premature complex an explanation needs costs the extra tolerance, and so does
    calling extra a detection that a QRS follows at the typical PR.
    """
    r = ctx.r
    if len(ahead) < 2 or ahead[0] - t >= r.premature_fraction * e:
        return False
    nxt, nxt2 = ahead[0], ahead[1]
    second = abs((nxt2 - nxt) / e - 1)
    if len(ahead) > 2 and nxt2 - nxt < r.premature_fraction * e:
        second = min(second, r.extra_tolerance + _pause_cost((ahead[2] - nxt2) / e, r))
    cost_sinus = abs((nxt - at.t[-1]) / e - 1) + second + ctx.penalty(t)
    cost_premature = _pause_cost((nxt2 - t) / e, r) + r.extra_tolerance + ctx.penalty(nxt)
    return cost_premature < cost_sinus


def _pause_cost(pause: float, r: BeatRules) -> float:
    """Distance of a post-premature pause (in cycles) from the band 1 to 1 + 2 extra_tolerance."""
    return max(0.0, 1 - pause, pause - (1 + 2 * r.extra_tolerance))


def _can_conduct(t: float, t_next: float, q: list[float], r: BeatRules) -> bool:
    """A QRS follows P ``t`` within the PR window, before the next P could conduct it."""
    k = bisect_left(q, t + r.pr_min_ms)
    return k < len(q) and q[k] <= t + r.pr_max_ms and q[k] < t_next + r.pr_min_ms


def _infer_missed(at: _Atrium, gap: float, e: float, r: BeatRules) -> None:
    """Insert k-1 inferred P waves into a gap of about k expected cycles."""
    k = round(gap / e)
    if k < 2 or k - 1 > r.max_inferred_per_gap or abs(gap / e - k) > r.infer_tolerance:
        return
    start = at.t[-1]
    for j in range(1, k):
        _append(at, start + j * gap / k, e, premature=False, inferred=True)


def _orphan_slots(at: _Atrium, q: list[float], r: BeatRules,
                  first_pass: tuple[list[int], float | None, bool]) -> tuple[float, ...]:
    """Cadence positions of P waves that orphan QRS complexes show were missed.

    An orphan QRS has no P in its PR window. If the next sinus P after the P before it
    (one expected P-P later, within ``infer_tolerance``) falls in an empty slot and either
    conducted this QRS (slot + reference PR = QRS) or was hidden in it (slot inside the QRS or
    its refractory period, as P waves hide in ectopic beats), that P was missed by the
    detector: it is inferred there. Handles the gaps the k-cycle rule cannot (after the last P,
    or a hidden sinus P followed by a premature one).
    """
    first, pr_ref, _ = first_pass
    slots: list[float] = []
    for j, t in enumerate(q):
        if first[j] >= 0:
            continue
        k = bisect_right(at.t, t) - 1
        if k < 0 or at.premature[k] or at.expected[k] != at.expected[k]:
            continue
        e = at.expected[k]
        s = at.t[k] + e
        if k + 1 < len(at.t) and abs(at.t[k + 1] - s) <= r.infer_tolerance * e:
            continue  # the slot is taken: the next P is near its expected time
        conducted = pr_ref is not None and abs(t - s - pr_ref) <= r.infer_tolerance * e
        hidden = t - r.pr_min_ms <= s <= t + r.refractory_ms
        if (conducted or hidden) and (not slots or s - slots[-1] > r.p_duplicate_ms):
            slots.append(s)
    return tuple(slots)


def _drop_leading_extra(at: _Atrium, q: list[float], r: BeatRules) -> None:
    """A first P off the cadence that no QRS can follow is an extra detection.

    The first P has no predecessor, so the cadence test of the walk cannot judge it; off the
    cadence and unable to conduct, it is more likely noise than a blocked P.
    """
    if len(at.t) < 3 or at.inferred[0] or at.inferred[1] or at.premature[1]:
        return
    t0, t1 = at.t[0], at.t[1]
    if abs((t1 - t0) / at.expected[1] - 1) <= r.extra_tolerance:
        return
    if _can_conduct(t0, t1, q, r):
        return
    at.artefacts.append(t0)
    for column in (at.t, at.inferred, at.premature, at.expected):
        del column[0]
    at.premature[0] = False  # the new first P has no predecessor to be early against
    _summarise_atrium(at, r)


def _summarise_atrium(at: _Atrium, r: BeatRules) -> None:
    """On-time cycle length and the count of unexplained P-P intervals."""
    on_time, unexplained = [], 0
    lo, hi = r.premature_fraction, 1 / r.premature_fraction
    for i in range(1, len(at.t)):
        gap, e = at.t[i] - at.t[i - 1], at.expected[i]
        if at.premature[i]:
            continue  # coupling interval of a premature P: explained
        if at.premature[i - 1]:
            unexplained += gap / e > 2 + r.infer_tolerance  # pause after a premature P
            continue
        if lo <= gap / e <= hi:
            on_time.append(gap)
        elif not (at.inferred[i] or at.inferred[i - 1]):
            unexplained += 1
    at.n_intervals = len(at.t) - 1
    at.unexplained = unexplained
    finite = [e for e in at.expected if e == e]
    at.cycle_ms = _median(on_time) if on_time else (_median(finite) if finite else None)


# --------------------------------------------------------------------------------------------
# Step 2: matching QRS complexes to conducting P waves
# --------------------------------------------------------------------------------------------
@dataclass
class _Match:
    p_of_q: list[int]        # analysed-P index conducting each QRS, or -1
    q_of_p: list[int]        # QRS index conducted by each analysed P, or -1
    role: list[str]          # role of each QRS (QRS_ROLES)
    premature_q: list[bool]  # QRS early against the local R-R
    preempted: list[bool]    # P in the refractory period of an ectopic/escape QRS
    unassessable: list[bool]  # P too close to the strip end to know whether it conducted
    pr_ref: float | None     # strip PR reference (median PR of on-time detected P waves)
    set_aside: set[int]      # QRS set aside as not conducted (ectopic, or PR off a fixed PR)
    doubtful: set[int]       # P waves whose only QRS was set aside for a long PR


def _candidates(pt: list[float], q: float, r: BeatRules, after: int) -> range:
    """Indices of analysed P waves that may conduct QRS ``q`` (latest first), beyond ``after``."""
    hi = bisect_right(pt, q - r.pr_min_ms) - 1
    lo = max(bisect_left(pt, q - r.pr_max_ms), after + 1)
    return range(hi, lo - 1, -1)


def _match(at: _Atrium, q: list[float], r: BeatRules,
           first_pass: tuple[list[int], float | None, bool] | None = None) -> _Match:
    """Assign conducting P waves to QRS complexes, after setting ectopic QRS complexes aside.

    ``first_pass`` (greedy assignment, reference PR, fixed) may be given when already computed
    for the same atrium.
    """
    pt = at.t
    premature = _premature_qrs_flags(q, r)
    first, pr_ref, fixed = first_pass or _first_pass(at, q, r)
    ectopic, doubtful = _ectopic_qrs(at, q, first, premature, pr_ref, fixed, r)
    first = _greedy(pt, q, r, ectopic)
    prs = {j: q[j] - pt[k] for j, k in enumerate(first) if k >= 0}
    p_of_q = _consistent(pt, q, r, first, prs, ectopic)
    _unmatch_pr_jumps(at, q, p_of_q, ectopic, r)
    q_of_p = [-1] * len(pt)
    for j, k in enumerate(p_of_q):
        if k >= 0:
            q_of_p[k] = j
    role = _qrs_roles(at, q, r, p_of_q, premature, ectopic)
    m = _Match(p_of_q, q_of_p, role, premature, [False] * len(pt), [False] * len(pt), pr_ref,
               ectopic, doubtful)
    _mark_preempted(at, q, r, m)
    return m


def _greedy(pt: list[float], q: list[float], r: BeatRules, skip: set[int]) -> list[int]:
    """Each QRS (not in ``skip``) takes the latest unused P within the PR window (monotone).

    The latest P at least pr_min before the QRS is the only candidate worth checking: if it is
    beyond pr_max (or already used), every earlier P is too.
    """
    out: list[int] = []
    add, last = out.append, -1
    lo, hi = r.pr_min_ms, r.pr_max_ms
    for j, t in enumerate(q):
        k = bisect_right(pt, t - lo) - 1
        if k > last and t - pt[k] <= hi and (not skip or j not in skip):
            add(k)
            last = k
        else:
            add(-1)
    return out


def _first_pass(at: _Atrium, q: list[float], r: BeatRules) -> tuple[list[int], float | None, bool]:
    """Greedy assignment of all QRS complexes and the reference PR it gives."""
    first = _greedy(at.t, q, r, set())
    return (first, *_pr_reference(at, q, first, r))


def _pr_reference(at: _Atrium, q: list[float], first: list[int],
                  r: BeatRules) -> tuple[float | None, bool]:
    """First-pass reference PR of on-time detected P waves (centre of the densest cluster when
    most PRs agree within the fixed-PR tolerance, else the median) and whether they agree."""
    prs = [q[j] - at.t[k] for j, k in enumerate(first)
           if k >= 0 and not at.premature[k] and not at.inferred[k]]
    if len(prs) < 3:
        return (_median(prs) if prs else None), False
    n_same, centre = _densest(prs, 2 * r.pr_fixed_tolerance_ms)
    fixed = n_same >= r.pr_fixed_fraction * len(prs)
    return (centre if fixed else _median(prs)), fixed


def _ectopic_qrs(at: _Atrium, q: list[float], first: list[int], premature: list[bool],
                 pr_ref: float | None, fixed: bool, r: BeatRules) -> tuple[set[int], set[int]]:
    """QRS complexes set aside as not conducted before the final matching.

    A premature QRS is set aside when no P can conduct it or, on a strip whose PR is mostly the
    same, when its PR does not fit; on such a strip any QRS whose PR is longer than the common
    one by more than twice the tolerance is set aside too (an escape or ectopic beat that
    happens to follow a P). A PR shorter than the common one is kept: it is what the reset
    beat after a Wenckebach drop looks like.
    P waves that are themselves premature may conduct with a longer PR, so they are exempt, and
    so is the last beat of a Wenckebach-shaped group. Returns the QRS set aside and the P
    waves whose only QRS was set aside for a long PR: whether such a P conducted is doubtful,
    so it counts neither as conducted nor as blocked. Within Wenckebach runs ectopic beats show
    as PR jumps instead: see _unmatch_pr_jumps.
    """
    tol = r.pr_fixed_tolerance_ms
    out: set[int] = set()
    doubtful: set[int] = set()
    q_of_p = {k: j for j, k in enumerate(first) if k >= 0}
    for j, k in enumerate(first):
        if k < 0:
            if premature[j]:
                out.add(j)
            continue
        if not fixed or pr_ref is None or at.premature[k] or at.inferred[k]:
            continue
        pr = q[j] - at.t[k]
        if pr - pr_ref > 2 * tol:
            out.add(j)
            doubtful.add(k)
        elif premature[j] and abs(pr - pr_ref) > tol and not _wenckebach_step(at, q, q_of_p, k):
            out.add(j)
    return out, doubtful


def _wenckebach_step(at: _Atrium, q: list[float], q_of_p: dict[int, int], k: int) -> bool:
    """P k lengthens the PR of the conducted P before it and the next P is not conducted: the
    shape of a Wenckebach group's last beat, whose QRS comes early by group beating."""
    prev, nxt = q_of_p.get(k - 1), q_of_p.get(k + 1)
    if prev is None or nxt is not None or k + 1 >= len(at.t):
        return False
    return q[q_of_p[k]] - at.t[k] > q[prev] - at.t[k - 1]


def _unmatch_pr_jumps(at: _Atrium, q: list[float], p_of_q: list[int], ectopic: set[int],
                      r: BeatRules) -> None:
    """Consecutive conducted P waves cannot shorten their PR abruptly without a drop between.

    Within a conducted run the PR is constant or lengthens (Wenckebach); a large shortening
    means one of the two QRS complexes was not conducted by its P. If the later PR equals the
    strip's shortest (reset) PR, the earlier P was really blocked and its QRS is ectopic (an
    ectopic beat in the pause); otherwise the later QRS is ectopic.
    """
    limit = 2 * r.pr_drop_tolerance_ms
    while True:
        q_of_p = {k: j for j, k in enumerate(p_of_q) if k >= 0}
        prs = {k: q[j] - at.t[k] for k, j in q_of_p.items() if not at.premature[k] and not at.inferred[k]}
        if len(prs) < 3:
            return
        k = next((k for k in sorted(prs) if k + 1 in prs and prs[k + 1] < prs[k] - limit), None)
        if k is None:
            return
        shortest = min(v for i, v in prs.items() if i != k + 1)
        if abs(prs[k + 1] - shortest) <= r.pr_drop_tolerance_ms:
            # the later PR is a reset PR: P k was not conducted and its QRS is ectopic
            ectopic.add(q_of_p[k])
            p_of_q[q_of_p[k]] = -1
        else:
            # too short, or neither reset nor run: the later QRS is not conducted by P k+1
            _set_aside(q_of_p[k + 1], k + 1, at, q, p_of_q, ectopic, r)


def _set_aside(j: int, k: int, at: _Atrium, q: list[float], p_of_q: list[int], ectopic: set[int],
               r: BeatRules) -> None:
    """Set QRS j aside as ectopic and let P k take a later unmatched QRS in its PR window."""
    ectopic.add(j)
    p_of_q[j] = -1
    nxt = next((i for i in range(j + 1, len(q)) if p_of_q[i] >= 0), len(q))
    for i in range(j + 1, nxt):
        if i not in ectopic and r.pr_min_ms <= q[i] - at.t[k] <= r.pr_max_ms:
            p_of_q[i] = k
            return


def _consistent(pt: list[float], q: list[float], r: BeatRules, first: list[int],
                prs: dict[int, float], skip: set[int]) -> list[int]:
    """Where several P waves fit a QRS, prefer the PR that agrees with the neighbouring beats."""
    out, last = [], -1
    keys = sorted(prs)
    tol = r.pr_fixed_tolerance_ms
    for j, t in enumerate(q):
        hi = bisect_right(pt, t - r.pr_min_ms) - 1
        if j in skip or hi <= last or t - pt[hi] > r.pr_max_ms:
            out.append(-1)
            continue
        k = hi
        if hi - 1 > last and t - pt[hi - 1] <= r.pr_max_ms:  # several P waves fit
            cands = list(_candidates(pt, t, r, last))
            k = first[j] if first[j] in cands else hi
            pos = bisect_left(keys, j)
            near = [prs[x] for x in keys[max(0, pos - 3): pos + 4] if x != j]
            if near:
                ref = _median(near)
                best = min(cands, key=lambda c: abs(t - pt[c] - ref))
                if abs(t - pt[k] - ref) > tol >= abs(t - pt[best] - ref):
                    k = best
        out.append(k)
        last = k
    return out


def _local_rr(q: list[float], r: BeatRules) -> list[float]:
    """Local median R-R before each QRS (NaN for the first)."""
    if len(q) < 2:
        return [math.nan] * len(q)
    rr = [q[i + 1] - q[i] for i in range(len(q) - 1)]
    loc = _local(rr, None, r.ventricular_window, _median_sorted)
    return [math.nan, *loc]


def _premature_qrs_flags(q: list[float], r: BeatRules) -> list[bool]:
    """QRS complexes that come early against the local median R-R.

    The beat after an interpolated premature beat is on time (its R-R from the beat before the
    premature one is normal), so it is not flagged.
    """
    rr_med = _local_rr(q, r)
    f = r.qrs_premature_fraction
    flags = [False] * len(q)
    for j in range(1, len(q)):
        if q[j] - q[j - 1] >= f * rr_med[j]:
            continue
        if j >= 2 and flags[j - 1] and q[j] - q[j - 2] >= f * rr_med[j]:
            continue
        flags[j] = True
    return flags


def _qrs_roles(at: _Atrium, q: list[float], r: BeatRules, p_of_q: list[int],
               premature: list[bool], ectopic: set[int]) -> list[str]:
    first_event = min(q[0], at.t[0]) if at.t else q[0]
    roles = []
    for j, k in enumerate(p_of_q):
        if k >= 0:
            roles.append("conducted")
        elif premature[j]:
            roles.append("ectopic")
        elif q[j] - r.pr_max_ms < first_event:
            roles.append("unassessable")  # its P may lie before the strip
        else:
            roles.append("escape")
    return roles


def _mark_preempted(at: _Atrium, q: list[float], r: BeatRules, m: _Match) -> None:
    """Non-conducted P waves refractory after an ectopic/escape QRS, or cut off by the strip end."""
    pt = at.t
    conducted_prs = [q[j] - pt[k] for j, k in enumerate(m.p_of_q) if k >= 0]
    horizon = (max(conducted_prs) + r.pr_fixed_tolerance_ms) if conducted_prs else r.pr_max_ms
    horizon = min(horizon, r.pr_max_ms)
    lead = (m.pr_ref if m.pr_ref is not None else r.pr_max_ms) - r.pr_fixed_tolerance_ms
    last_event = max(q[-1], pt[-1])
    ectopic = [q[j] for j, role in enumerate(m.role) if role in ("ectopic", "escape", "unassessable")]
    for i, t in enumerate(pt):
        if m.q_of_p[i] >= 0:
            continue
        lo = bisect_left(ectopic, t - r.refractory_ms)
        hi = bisect_right(ectopic, t + max(lead, 0.0))
        m.preempted[i] = hi > lo
        m.unassessable[i] = t + horizon > last_event


# --------------------------------------------------------------------------------------------
# Step 3: groups and drops
# --------------------------------------------------------------------------------------------
@dataclass
class _Drop:
    run: list[int]             # analysed-P indices of the consecutive non-conducted P waves
    before: list[int]          # conducted on-time P waves of the group before (may be empty)
    after_run: list[int]       # conducted on-time P waves of the group after (may be empty)
    kind: str = "u"            # W/F strong, w/f weak, u unclear


@dataclass
class _Features:
    status: list[str]          # per analysed P: c (conducted on time), d (drop), x (other)
    drops: list[_Drop]
    groups: list[tuple[int, int, bool]]  # (n P, n QRS, complete)
    blocked_premature: list[int]
    fixed: bool
    pr_all: list[float]        # PR of on-time detected conducted P waves
    pr_times: list[float]      # their P onset times
    pr_med: float | None
    drift: float               # least-squares PR change over the strip (ms)
    rr_regular: bool
    rr_med: float | None


def _status(at: _Atrium, m: _Match) -> list[str]:
    """Per analysed P: c (conducted on time), d (on-time drop), x (cannot count).

    A doubtful P (its only QRS set aside for a long PR) counts as a drop only between conducted
    P waves: next to another drop it could make a run of drops out of a coincidence.
    """
    out = []
    for i in range(len(at.t)):
        if at.premature[i] or (m.unassessable[i] and m.q_of_p[i] < 0):
            out.append("x")
        elif m.q_of_p[i] >= 0:
            out.append("c")
        elif m.preempted[i]:
            out.append("x")
        else:
            out.append("d")
    for i in m.doubtful:
        if out[i] == "d" and any(0 <= j < len(out) and out[j] != "c" for j in (i - 1, i + 1)):
            out[i] = "x"
    return out


def _runs(status: list[str]) -> list[list[tuple[str, list[int]]]]:
    """Segments (split at x) of runs of equal status: [[(status, [indices]), ...], ...]."""
    segments: list[list[tuple[str, list[int]]]] = [[]]
    for i, s in enumerate(status):
        if s == "x":
            if segments[-1]:
                segments.append([])
            continue
        seg = segments[-1]
        if seg and seg[-1][0] == s:
            seg[-1][1].append(i)
        else:
            seg.append((s, [i]))
    return [s for s in segments if s]


def _collect_drops(segments) -> tuple[list[_Drop], list[tuple[int, int, bool]]]:
    drops, groups = [], []
    for seg in segments:
        for pos, (s, idx) in enumerate(seg):
            if s != "d":
                continue
            before = seg[pos - 1][1] if pos >= 1 else []
            after = seg[pos + 1][1] if pos + 1 < len(seg) else []
            drops.append(_Drop(idx, before, after))
            if before:
                # complete: opened by an earlier drop run and closed by a conducted P
                groups.append((len(before) + len(idx), len(before), pos >= 2 and bool(after)))
    return drops, groups


def _judge_drop(d: _Drop, at: _Atrium, m: _Match, q: list[float], r: BeatRules,
                pr_of_p: list[float | None]) -> str:
    """W/F (strong Mobitz I/II evidence), w/f (weak), or u (unclear) for a single drop.

    The groups on both sides count: Mobitz I groups repeat, so the PR lengthening after the
    reset is as good evidence as the lengthening before the drop. ``pr_of_p`` is the PR of
    every analysed P (inferred ones included, None if not conducted).
    """
    before = [pr_of_p[i] for i in d.before]
    after = [pr_of_p[i] for i in d.after_run]
    if not d.after_run or not d.before:
        # a drop at the strip's edge: only a textbook Wenckebach run (PR lengthening by
        # shrinking steps) on its one side shows the type
        side = [x for x in (before or after) if x is not None]
        return "W" if _decelerating(side, r) else "u"
    if before[-1] is None or after[0] is None:
        return "u"
    j1, j2 = m.q_of_p[d.before[-1]], m.q_of_p[d.after_run[0]]
    if any(m.role[j] != "ectopic" and j not in m.set_aside for j in range(j1 + 1, j2)):
        return "u"  # another QRS in the pause: not a conduction pause
    tol = r.pr_drop_tolerance_ms
    delta = before[-1] - after[0]
    b = [x for x in before if x is not None]
    a = [x for x in after if x is not None]
    rr = _run_rr(d.before, m, q) + _run_rr(d.after_run, m, q)
    paused = not rr or q[j2] - q[j1] >= r.wenckebach_pause_ratio * _median(rr)
    shortened = delta >= r.wenckebach_min_shortening_ms
    if shortened and rr and paused and (_progressive(b, r) or _progressive(a, r)):
        return "W"
    if abs(delta) <= tol and len(b) + len(a) >= 3 and max(b + a) - min(b + a) <= tol:
        return "F"
    if shortened and paused:
        return "w"
    return "f" if abs(delta) <= tol else "u"


def _decelerating(prs: list[float], r: BeatRules) -> bool:
    """Classic Wenckebach run: three or more PRs lengthening by shrinking increments.

    Apparent PRs in complete block drift by a constant step (the R-R minus the P-P), so the
    shrinking of the steps, not the lengthening alone, is what marks decremental conduction.
    """
    if len(prs) < 3:
        return False
    steps = [b - a for a, b in zip(prs, prs[1:], strict=False)]
    m = r.wenckebach_min_progression_ms
    return (min(steps) > 0 and prs[-1] - prs[0] >= 2 * m and steps[0] - steps[-1] >= m)


def _run_rr(run: list[int], m: _Match, q: list[float]) -> list[float]:
    """R-R intervals between the QRS complexes of a run of consecutively conducted P waves."""
    js = [m.q_of_p[i] for i in run]
    return [q[b] - q[a] for a, b in zip(js, js[1:], strict=False)]


def _progressive(prs: list[float], r: BeatRules) -> bool:
    """PR lengthens across the run (by the Wenckebach minimum) without shortening steps."""
    if len(prs) < 2:
        return False
    tol = r.pr_drop_tolerance_ms
    steps_ok = all(b - a >= -tol for a, b in zip(prs, prs[1:], strict=False))
    return steps_ok and prs[-1] - prs[0] >= r.wenckebach_min_progression_ms


def _features(at: _Atrium, m: _Match, q: list[float], r: BeatRules) -> _Features:
    status = _status(at, m)
    drops, groups = _collect_drops(_runs(status))
    # PR of every analysed P that conducted. Inferred P waves sit where the cadence puts them
    # (error about the sinus irregularity): good enough to judge the PR around a drop, but
    # kept out of the PR series and the fixed-PR test.
    pr_of_p = [q[j] - t if j >= 0 else None for j, t in zip(m.q_of_p, at.t, strict=True)]
    for d in drops:
        if len(d.run) == 1:
            d.kind = _judge_drop(d, at, m, q, r, pr_of_p)
    blocked_prem = [i for i in range(len(at.t)) if at.premature[i] and m.q_of_p[i] < 0
                    and not m.preempted[i] and not m.unassessable[i]]
    pts, prs = [], []
    for t, pr, early, inferred in zip(at.t, pr_of_p, at.premature, at.inferred, strict=True):
        if pr is not None and not early and not inferred:
            pts.append(t)
            prs.append(pr)
    pr_med = _median(prs) if prs else None
    fixed, drift = _fixed_relation(pts, prs, pr_med, at, m, r)
    rr_regular, rr_med = _rr_regularity(q, m, r)
    return _Features(status, drops, groups, blocked_prem, fixed, prs, pts, pr_med, drift,
                     rr_regular, rr_med)


def _fixed_relation(pts: list[float], prs: list[float], pr_med: float | None, at: _Atrium,
                    m: _Match, r: BeatRules) -> tuple[bool, float]:
    """Most non-ectopic QRS follow an on-time P with the same PR, without drift."""
    if pr_med is None:
        return False, 0.0
    tol = r.pr_fixed_tolerance_ms
    _, centre = _densest(prs, 2 * tol)
    same = [(t, pr) for t, pr in zip(pts, prs, strict=True) if abs(pr - centre) <= tol]
    denominator = sum(
        1 for j, role in enumerate(m.role)
        if role == "escape" or (role == "conducted" and not at.premature[m.p_of_q[j]]
                                and not at.inferred[m.p_of_q[j]])
    )
    drift = _drift([t for t, _ in same], [pr for _, pr in same])
    fixed = (len(same) >= 2 and len(same) >= r.pr_fixed_fraction * denominator
             and drift <= r.pr_drift_max_ms)
    return fixed, drift


def _rr_regularity(q: list[float], m: _Match, r: BeatRules) -> tuple[bool, float | None]:
    """Whether the R-R between consecutive non-premature QRS is regular (nearly all near the
    median; at least two intervals), and that median R-R."""
    rr = [q[j + 1] - q[j] for j in range(len(q) - 1)
          if not m.premature_q[j] and not m.premature_q[j + 1]]
    if len(rr) < 2:
        return False, _median(rr) if rr else None
    med = _median(rr)
    out = sum(1 for x in rr if abs(x - med) > r.rr_regular_tolerance * med)
    return out <= r.rr_outlier_fraction * len(rr), med


# --------------------------------------------------------------------------------------------
# Step 4: decision
# --------------------------------------------------------------------------------------------
@dataclass
class _Decision:
    pattern: str
    reasons: list[str]
    sentence: str
    dissociated: bool = False
    escape_rate: float | None = None


def _decide(at: _Atrium, m: _Match, f: _Features, q: list[float], atrial: float | None,
            r: BeatRules, ix: list[int]) -> _Decision:
    """Related (fixed PR, 1:1, or Mobitz-type drops) first; otherwise the dissociation branch.

    Consecutive drops need a fixed PR to count as conduction (high-grade block): Wenckebach
    never blocks two P waves in a row, so Mobitz-type coincidences beside them do not relate.
    """
    if f.fixed or _one_to_one_association(f, m, r) or _mobitz_related(f, m, r):
        return _decide_related(at, m, f, q, r, ix)
    return _decide_unrelated(at, m, f, q, atrial, r)


def _one_to_one_association(f: _Features, m: _Match, r: BeatRules) -> bool:
    """Every on-time P conducts and every QRS is conducted, with no PR drift: related even
    when the PR wanders (a varying PR without drift or drops is not dissociation)."""
    if "d" in f.status or "escape" in m.role or len(f.pr_all) < 3 or f.blocked_premature:
        return False
    return _drift(f.pr_times, f.pr_all) <= r.pr_drift_max_ms


def _mobitz_related(f: _Features, m: _Match, r: BeatRules) -> bool:
    """A strong Mobitz-type drop, with Mobitz-type drops (strong or weak) making at least half of
    the judgeable drops, no two drops in a row (Wenckebach never blocks two P waves running)
    and nearly every non-ectopic QRS conducted: one coincidence in complete block or in AV
    dissociation does not make a conduction relation."""
    if any(len(d.run) > 1 for d in f.drops):
        return False
    escapes = m.role.count("escape")
    if escapes > (1 - r.pr_fixed_fraction) * (escapes + m.role.count("conducted")):
        return False
    strong = sum(1 for d in f.drops if d.kind in ("W", "F"))
    weak = sum(1 for d in f.drops if d.kind in ("w", "f"))
    judgeable = sum(1 for d in f.drops if len(d.run) > 1 or (d.before and d.after_run))
    return strong >= 1 and 2 * (strong + weak) >= judgeable


def _decide_unrelated(at: _Atrium, m: _Match, f: _Features, q: list[float],
                      atrial: float | None, r: BeatRules) -> _Decision:
    """No fixed or Mobitz relation: complete block, dissociation, or indeterminate."""
    spread = _apparent_pr_spread(at, q, r)
    reasons = ["no_fixed_pr" + (f"={_ms(spread[0])}-{_ms(spread[1])}" if spread else "")]
    if f.drift > r.pr_drift_max_ms:
        reasons.append(f"pr_drift_ms={_ms(f.drift)}")
    locked = _locked_offset(at, q, m, r)
    if locked is not None:
        reasons.append(f"p_locked_to_qrs={_ms(locked)}")
        return _Decision("indeterminate", reasons,
                         f"P waves sit at a fixed {_ms(locked)} ms from the QRS (PR below "
                         f"{_ms(r.pr_min_ms)} ms or retrograde): junctional rhythm or pre-excitation, "
                         "AV conduction not assessable from timing.")
    if not f.rr_regular or f.rr_med is None or atrial is None:
        reasons.append("rr_irregular")
        return _Decision("indeterminate", reasons,
                         "No fixed P-QRS relation and no regular ventricular rhythm: "
                         "pattern not assessable from timing.")
    v = 60_000.0 / f.rr_med
    reasons += [f"rr_regular={_ms(f.rr_med)}", f"atrial_rate_bpm={atrial:.0f}", f"ventricular_rate_bpm={v:.0f}"]
    pr_text = f" (apparent PR {_ms(spread[0])}-{_ms(spread[1])} ms)" if spread else ""
    if atrial > v * (1 + r.dissociation_rate_margin):
        reasons.append("atrial_faster_than_ventricular")
        return _Decision("third_degree", reasons,
                         f"No fixed P-QRS relation{pr_text}; atrial rate {atrial:.0f} bpm > "
                         f"ventricular rate {v:.0f} bpm with a regular escape at {v:.0f} bpm.",
                         dissociated=True, escape_rate=v)
    reasons.append("ventricular_at_or_above_atrial")
    return _Decision("av_dissociation", reasons,
                     f"No fixed P-QRS relation{pr_text}; ventricular rate {v:.0f} bpm >= atrial "
                     f"rate {atrial:.0f} bpm: AV dissociation without block.", dissociated=True)


def _apparent_pr_spread(at: _Atrium, q: list[float], r: BeatRules) -> tuple[float, float] | None:
    """Range of the interval from each QRS back to the nearest P within the PR window."""
    vals = []
    for t in q:
        k = bisect_right(at.t, t - r.pr_min_ms) - 1
        if k >= 0 and t - at.t[k] <= r.pr_max_ms:
            vals.append(t - at.t[k])
    return (min(vals), max(vals)) if vals else None


def _locked_offset(at: _Atrium, q: list[float], m: _Match, r: BeatRules) -> float | None:
    """Median P-minus-QRS offset if P waves sit at a fixed short distance around most QRS."""
    offs = []
    for j, t in enumerate(q):
        if m.role[j] == "ectopic":
            continue
        lo = bisect_left(at.t, t - r.pr_min_ms)
        hi = bisect_right(at.t, t + r.locked_window_ms)
        if hi > lo:
            offs.append(at.t[lo] - t)
    n = sum(1 for role in m.role if role != "ectopic")
    n_on_time = len(at.premature) - sum(at.premature)
    if abs(n_on_time - n) > (1 - r.pr_fixed_fraction) * n:
        return None  # retrograde P waves come one per QRS
    if len(offs) < 3 or len(offs) < r.pr_fixed_fraction * n:
        return None
    med = _median(offs)
    same = sum(1 for o in offs if abs(o - med) <= r.pr_fixed_tolerance_ms)
    return med if same >= r.pr_fixed_fraction * n else None


def _decide_related(at: _Atrium, m: _Match, f: _Features, q: list[float], r: BeatRules,
                    ix: list[int]) -> _Decision:
    pr_text = _pr_text(f)
    reasons = [f"pr_median_ms={_ms(f.pr_med)}"] if f.pr_med is not None else []
    if f.fixed:
        reasons.append("pr_fixed")
    runs = [d for d in f.drops if len(d.run) >= 2]
    if runs:
        return _high_grade(runs, f, reasons, pr_text, ix)
    if f.drops:
        return _second_degree(at, m, f, q, reasons, pr_text, ix)
    if f.blocked_premature:
        return _blocked_pac(at, f, reasons, ix, r)
    return _one_to_one(f, reasons, r)


def _pr_text(f: _Features) -> str:
    if not f.pr_all:
        return ""
    lo, hi = min(f.pr_all), max(f.pr_all)
    return f"PR {_ms(f.pr_med)} ms" + (f" ({_ms(lo)}-{_ms(hi)} ms)" if hi - lo >= 1 else "")


def _high_grade(runs: list[_Drop], f: _Features, reasons: list[str], pr_text: str,
                ix: list[int]) -> _Decision:
    longest = max(runs, key=lambda d: len(d.run))
    first, last = ix[longest.run[0]], ix[longest.run[-1]]
    reasons += [f"consecutive_drops={len(longest.run)}", f"drop_run=P{first}-P{last}"]
    return _Decision("high_grade", reasons,
                     f"{len(longest.run)} consecutive on-time P waves (P {first}-{last}) not conducted while "
                     f"other P waves conduct with {pr_text or 'a fixed PR'}.")


def _second_degree(at: _Atrium, m: _Match, f: _Features, q: list[float], reasons: list[str],
                   pr_text: str, ix: list[int]) -> _Decision:
    c_runs = [len(d.before) for d in f.drops if d.before]
    trailing = _trailing_conducted(f.status)
    reasons.append(f"drops_on_time={len(f.drops)}")
    if len(f.drops) >= 2 and all(n == 1 for n in c_runs) and trailing <= 1 and len(c_runs) >= 1:
        reasons.append("alternate_p_blocked")
        return _Decision("two_to_one", reasons,
                         f"Every other on-time P not conducted (2:1) with {pr_text or 'a fixed PR'}; "
                         "Mobitz type cannot be determined from 2:1 conduction alone.")
    kinds = [d.kind for d in f.drops]
    strong_w, strong_f = kinds.count("W"), kinds.count("F")
    weak_w, weak_f = kinds.count("w"), kinds.count("f")
    w, fx = (strong_w, strong_f) if strong_w + strong_f else (weak_w, weak_f)
    reasons.append(f"drop_kinds=W{strong_w},F{strong_f},w{weak_w},f{weak_f},u{kinds.count('u')}")
    if w > fx:
        d = next(x for x in f.drops if x.kind == ("W" if strong_w else "w"))
        return _Decision("mobitz_i", reasons + [_drop_code("wenckebach_drop", d, at, m, q, ix)],
                         _mobitz_i_sentence(d, at, m, q, ix))
    if fx > w:
        d = next(x for x in f.drops if x.kind == ("F" if strong_f else "f"))
        return _Decision("mobitz_ii", reasons + [_drop_code("fixed_pr_drop", d, at, m, q, ix)],
                         _mobitz_ii_sentence(d, at, m, q, ix))
    reasons.append("drops_contradictory" if w else "drops_unclear")
    return _Decision("indeterminate", reasons,
                     f"{len(f.drops)} on-time P wave(s) not conducted, but the PR around the "
                     + ("drops is contradictory (Mobitz I and II features in equal number)."
                        if w else "drops cannot be judged (pause holds another QRS, or PR unknown)."))


def _trailing_conducted(status: list[str]) -> int:
    n = 0
    for s in reversed(status):
        if s == "x" and n == 0:
            continue
        if s != "c":
            break
        n += 1
    return n


def _group_prs(d: _Drop, at: _Atrium, m: _Match, q: list[float]) -> tuple[list[float], list[float]]:
    """PRs of the conducted runs before and after a drop (inferred P waves included)."""
    def prs(run: list[int]) -> list[float]:
        return [q[m.q_of_p[i]] - at.t[i] for i in run]
    return prs(d.before), prs(d.after_run)


def _arrow(prs: list[float]) -> str:
    return "->".join(_ms(x) for x in prs)


def _drop_code(key: str, d: _Drop, at: _Atrium, m: _Match, q: list[float], ix: list[int]) -> str:
    before, after = _group_prs(d, at, m, q)
    return f"{key}=P{ix[d.run[0]]}:{'>'.join(_ms(x) for x in before)}|{'>'.join(_ms(x) for x in after)}"


def _mobitz_i_sentence(d: _Drop, at: _Atrium, m: _Match, q: list[float], ix: list[int]) -> str:
    before, after = _group_prs(d, at, m, q)
    p = ix[d.run[0]]
    if before and after:
        nxt = f" (next group {_arrow(after)} ms)" if len(after) > 1 else ""
        return (f"PR {_arrow(before)} ms then on-time P {p} not conducted; PR after the pause "
                f"{_ms(after[0])} ms < {_ms(before[-1])} ms{nxt}.")
    if before:
        return (f"PR {_arrow(before)} ms, lengthening by shrinking steps, then on-time P {p} "
                "not conducted (end of strip).")
    return (f"On-time P {p} not conducted, then PR {_arrow(after)} ms lengthening by shrinking "
            "steps (start of strip).")


def _mobitz_ii_sentence(d: _Drop, at: _Atrium, m: _Match, q: list[float], ix: list[int]) -> str:
    before, after = _group_prs(d, at, m, q)
    return (f"Constant PR ({_arrow(before)} ms before, {_arrow(after)} ms after) around on-time P "
            f"{ix[d.run[0]]} not conducted.")


def _blocked_pac(at: _Atrium, f: _Features, reasons: list[str], ix: list[int],
                 r: BeatRules) -> _Decision:
    i = f.blocked_premature[0]
    coupling = at.t[i] - at.t[i - 1] if i > 0 else math.nan
    reasons += [f"blocked_premature_p={len(f.blocked_premature)}", "drops_on_time=0"]
    tail = ""
    if f.pr_med is not None and f.pr_med > r.pr_normal_max_ms:
        reasons.append(f"pr_gt_{_ms(r.pr_normal_max_ms)}")
        tail = f" (their PR {_ms(f.pr_med)} ms is also prolonged)"
    return _Decision("blocked_pac", reasons,
                     f"P {ix[i]} came early (P-P {_ms(coupling)} ms vs {_ms(at.expected[i])} ms expected) "
                     f"and was not conducted, while on-time P waves conduct{tail}: blocked premature "
                     "atrial complex, not AV block.")


def one_to_one_evidence(pr_med: float, pr_lo: float, pr_hi: float, n_beats: int,
                        normal_max_ms: float) -> tuple[str, list[str], str]:
    """Pattern, reasons and sentence of a 1:1 strip (shared with the vectorized batch path)."""
    pattern = "first_degree" if pr_med > normal_max_ms else "normal"
    cmp = ">" if pattern == "first_degree" else "<="
    reasons = [f"pr_median_ms={_ms(pr_med)}", "pr_fixed", "conduction=1:1",
               f"pr_range_ms={_ms(pr_lo)}-{_ms(pr_hi)}",
               f"pr_{'gt' if cmp == '>' else 'le'}_{_ms(normal_max_ms)}"]
    sentence = (f"Every on-time P conducts (1:1) over {n_beats} beats with constant PR "
                f"{_ms(pr_med)} ms ({_ms(pr_lo)}-{_ms(pr_hi)} ms) {cmp} {_ms(normal_max_ms)} ms.")
    return pattern, reasons, sentence


def _one_to_one(f: _Features, reasons: list[str], r: BeatRules) -> _Decision:
    if not f.pr_all:
        return _Decision("indeterminate", reasons + ["no_conducted_pr"], "No measurable PR.")
    pattern, base, sentence = one_to_one_evidence(
        f.pr_med, min(f.pr_all), max(f.pr_all), len(f.pr_all), r.pr_normal_max_ms)
    if not f.fixed:
        base = [x for x in base if x != "pr_fixed"] + ["pr_variable"]
        sentence = sentence.replace("constant PR", "variable PR, median")
    return _Decision(pattern, base, sentence)


# --------------------------------------------------------------------------------------------
# Assembly
# --------------------------------------------------------------------------------------------
def _ratios(f: _Features, pattern: str) -> tuple[str | None, tuple[str, ...]]:
    groups = tuple(f"{n}:{c}" for n, c, complete in f.groups if complete)
    if pattern in ("normal", "first_degree", "blocked_pac"):
        return "1:1", groups
    if pattern in ("third_degree", "av_dissociation", "indeterminate"):
        return None, groups
    if not groups:
        return None, groups
    return (groups[0] if len(set(groups)) == 1 else "variable"), groups


def _p_table(at: _Atrium, m: _Match, q: list[float], dec: _Decision) -> list[PWave]:
    """Per-P rows (artefacts included) in time order."""
    rows = sorted([(t, i) for i, t in enumerate(at.t)] + [(t, -1) for t in at.artefacts])
    table = []
    for n, (t, i) in enumerate(rows, start=1):
        if i < 0:
            table.append(PWave(n, t, "artefact", None, None, None, "detected", "extra detection"))
        else:
            table.append(_p_row(n, t, i, at, m, q, dec))
    return table


def _p_row(n: int, t: float, i: int, at: _Atrium, m: _Match, q: list[float],
           dec: _Decision | None) -> PWave:
    source = "inferred" if at.inferred[i] else "detected"
    on_time = not at.premature[i]
    j = m.q_of_p[i]
    if dec is not None and dec.dissociated:
        fate = "premature" if not on_time else "not_conducted"
        return PWave(n, t, fate, None, on_time, False, source, "dissociated")
    pr = q[j] - t if j >= 0 else None
    if j < 0 and m.unassessable[i]:
        return PWave(n, t, "unassessable", None, on_time, None, source, "strip ends before its QRS")
    note = "preempted by ectopic/escape QRS" if j < 0 and m.preempted[i] else ""
    if j < 0 and i in m.doubtful:
        note = "followed by a QRS whose PR does not fit: conduction doubtful"
    if at.inferred[i]:
        note = (note + "; " if note else "") + "missed P inferred from the atrial cadence"
    fate = "premature" if not on_time else ("conducted" if j >= 0 else "not_conducted")
    return PWave(n, t, fate, pr, on_time, j >= 0, source, note)


def _insufficient(p: list[float], q: list[float], at: _Atrium | None, r: BeatRules) -> tuple[str, str] | None:
    if not p:
        return "no_p_waves", "No P waves: AV conduction not assessable (e.g. atrial fibrillation or junctional rhythm)."
    if len(p) < r.min_p or len(q) < r.min_qrs:
        return ("too_few_beats", f"Too few beats ({len(p)} P, {len(q)} QRS; need {r.min_p} P and "
                f"{r.min_qrs} QRS) to judge AV conduction.")
    if at is None:
        return None
    rate = _bpm(at.cycle_ms)
    if rate is not None and rate > r.atrial_rate_max_bpm:
        return ("atrial_rate_too_fast", f"Atrial rate {rate:.0f} bpm > {r.atrial_rate_max_bpm:.0f} bpm "
                "(tachycardia or flutter waves): AV block not graded from timing.")
    n_prem = sum(at.premature)
    if n_prem > r.max_premature_fraction * len(at.t) or at.unexplained > r.irregular_fraction * max(at.n_intervals, 1):
        return ("atrial_irregular", f"Atrial rhythm irregular ({n_prem} premature P, {at.unexplained} "
                f"unexplained P-P of {at.n_intervals}): AV conduction not assessable.")
    return None


def classify_strip(p_ms: Any, qrs_ms: Any, *, rules: BeatRules | str | Path | None = None) -> StripResult:
    """Classify one strip's AV conduction from P and QRS onset times (ms, any order).

    Parameters
    ----------
    p_ms, qrs_ms
        P-wave and QRS onset times in ms (lists or arrays; non-finite values are dropped).
    rules
        A BeatRules, a rule-file path, or None for ``beats-v1``.

    Returns
    -------
    StripResult
        ``pattern`` is a key of ``cohort.vocabulary.BEAT_PATTERNS``; see the module docstring for
        the method and the precedence of patterns.
    """
    r = resolve_rules(rules)
    p, p_bad = _prepare(p_ms, "p_ms")
    q, q_bad = _prepare(qrs_ms, "qrs_ms")
    return classify_sorted(p, q, r, dropped=p_bad + q_bad)


def classify_sorted(p: list[float], q: list[float], r: BeatRules, *, dropped: int = 0,
                    p_table: bool = True) -> StripResult:
    """``classify_strip`` on finite, ascending onset lists (the batch entry point).

    ``p_table=False`` leaves ``p_waves`` empty (the batch stores no per-P rows; building them
    is a noticeable share of the work); every other field is the same.
    """
    n_p_raw, n_q_raw = len(p), len(q)
    p, p_dup = _merge_close(p, r.p_duplicate_ms)
    q, q_dup = _merge_close(q, r.qrs_duplicate_ms)
    notes = _input_notes(dropped, p_dup, q_dup)
    short = _insufficient(p, q, None, r)
    if short:
        return _indeterminate(p, q, short, notes, r, n_p_raw, n_q_raw, p_table=p_table)
    at = _analyse_atrium(p, r, q)
    first_pass = _first_pass(at, q, r)
    slots = _orphan_slots(at, q, r, first_pass) if len(at.t) >= 2 else ()
    if slots:
        at = _analyse_atrium(p, r, q, forced=slots)
    n_before = len(at.t)
    _drop_leading_extra(at, q, r)
    if slots or len(at.t) != n_before:
        first_pass = _first_pass(at, q, r)
    short = _insufficient(p, q, at, r)
    if short:
        return _indeterminate(p, q, short, notes, r, n_p_raw, n_q_raw, at, p_table=p_table)
    m = _match(at, q, r, first_pass)
    f = _features(at, m, q, r)
    rates = (_bpm(at.cycle_ms), _ventricular_rate(q))
    ix = _index_rows(at)
    dec = _decide(at, m, f, q, rates[0], r, ix)
    table = _p_table(at, m, q, dec) if p_table else []
    ratio, groups = _ratios(f, dec.pattern)
    reasons = dec.reasons + notes + _artefact_notes(at, m, f)
    pr_series = () if dec.dissociated else tuple(f.pr_all)
    pr_med = None if dec.dissociated else f.pr_med
    not_conducted = _n_not_conducted(at, m, dec)
    return StripResult(
        pattern=dec.pattern, ratio=ratio, group_ratios=groups, atrial_rate_bpm=rates[0],
        ventricular_rate_bpm=rates[1], escape_rate_bpm=dec.escape_rate, pr_series_ms=pr_series,
        pr_median_ms=pr_med, p_waves=tuple(table), qrs_ms=tuple(q), qrs_roles=tuple(m.role),
        n_p=n_p_raw, n_qrs=n_q_raw, n_not_conducted=not_conducted, reasons=tuple(reasons),
        sentence=dec.sentence, rules_id=r.rules_id,
    )


def _n_not_conducted(at: _Atrium, m: _Match, dec: _Decision) -> int:
    """P waves whose per-P row (``_p_row``) says not conducted: every analysed P when the rhythms
    are dissociated, else those without a QRS that the strip end does not cut off (artefacts
    never count)."""
    if dec.dissociated:
        return len(at.t)
    return sum(1 for j, cut in zip(m.q_of_p, m.unassessable, strict=True) if j < 0 and not cut)


def _index_rows(at: _Atrium) -> list[int]:
    """1-based per-P table row of each analysed P (artefacts take rows too)."""
    rows = sorted([(t, i) for i, t in enumerate(at.t)] + [(t, -1) for t in at.artefacts])
    ix = [0] * len(at.t)
    for n, (_, i) in enumerate(rows, start=1):
        if i >= 0:
            ix[i] = n
    return ix


def _ventricular_rate(q: list[float]) -> float | None:
    """Mean ventricular rate over the strip (drops and pauses included)."""
    if len(q) < 2 or q[-1] <= q[0]:
        return None
    return 60_000.0 * (len(q) - 1) / (q[-1] - q[0])


def _input_notes(dropped: int, p_dup: int, q_dup: int) -> list[str]:
    notes = []
    if dropped:
        notes.append(f"nonfinite_dropped={dropped}")
    if p_dup:
        notes.append(f"duplicate_p_merged={p_dup}")
    if q_dup:
        notes.append(f"duplicate_qrs_merged={q_dup}")
    return notes


def _artefact_notes(at: _Atrium, m: _Match, f: _Features) -> list[str]:
    counts = {
        "extra_p_ignored": len(at.artefacts),
        "inferred_p": sum(at.inferred),
        "premature_p": sum(at.premature),
        "ectopic_qrs": m.role.count("ectopic"),
        "escape_qrs": m.role.count("escape"),
        "preempted_p": sum(1 for i, x in enumerate(m.preempted) if x and m.q_of_p[i] < 0
                           and not m.unassessable[i]),
        "unassessable_p": sum(1 for i, x in enumerate(m.unassessable) if x and m.q_of_p[i] < 0),
        "atrial_pauses": at.unexplained,
    }
    return [f"{k}={v}" for k, v in counts.items() if v]


def _indeterminate(p: list[float], q: list[float], why: tuple[str, str], notes: list[str],
                   r: BeatRules, n_p: int, n_q: int, at: _Atrium | None = None, *,
                   p_table: bool = True) -> StripResult:
    code, sentence = why
    table = tuple(PWave(i, t, "unassessable", None, None, None, "detected")
                  for i, t in enumerate(p, 1)) if p_table else ()
    return StripResult(
        pattern="indeterminate", ratio=None, group_ratios=(),
        atrial_rate_bpm=_bpm(at.cycle_ms) if at else None, ventricular_rate_bpm=_ventricular_rate(q),
        escape_rate_bpm=None, pr_series_ms=(), pr_median_ms=None, p_waves=table, qrs_ms=tuple(q),
        qrs_roles=tuple("unassessable" for _ in q), n_p=n_p, n_qrs=n_q, n_not_conducted=0,
        reasons=(code, *notes), sentence=sentence, rules_id=r.rules_id,
    )
