"""Beat-level P and QRS onsets for a subset of tracings, from synthetic_registry.strips.

All tracings with second- or third-degree block, AV dissociation or blocked PACs get a strip
(so each pattern is well represented), plus a random share of the other sinus tracings.
The tracing's rates are then taken from its strip, as a machine would measure them.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from synthetic_registry.config import Config
from synthetic_registry.ecgs import AV, R, Tracings
from synthetic_registry.strips import simulate_strip

_PATTERN_OF_AV = {
    "short_pr": "normal",
    "normal_pr": "normal",
    "first_degree": "first_degree",
    "marked_first_degree": "first_degree",
    "mobitz_i": "mobitz_i",
    "mobitz_ii": "mobitz_ii",
    "two_to_one": "two_to_one",
    "high_grade": "high_grade",
    "third_degree": "third_degree",
    "av_dissociation": "av_dissociation",
}
_ALWAYS = (
    "mobitz_i",
    "mobitz_ii",
    "two_to_one",
    "high_grade",
    "third_degree",
    "av_dissociation",
    "blocked_pac",
)


@dataclass
class Strips:
    """Strip truth per tracing (pattern '' where none) and the wave events, tracing-indexed."""

    pattern: np.ndarray
    ratio: np.ndarray
    artefacts: np.ndarray
    duration_ms: np.ndarray
    event_tracing: np.ndarray  # tracing row index per wave event
    event_t_ms: np.ndarray
    event_is_p: np.ndarray


def simulate_waves(cfg: Config, rng: np.random.Generator, tr: Tracings) -> Strips:
    """Simulate strips for the selected tracings and overwrite their rates (in place)."""
    pattern = _patterns(tr)
    always = np.isin(pattern, _ALWAYS)
    random_pick = (pattern != "") & (rng.random(tr.n) < cfg.value("strips", "random_share"))
    chosen = np.flatnonzero(always | random_pick)
    durations = _durations(cfg, rng, chosen.size)
    pat_out = np.full(tr.n, "", dtype=object)
    ratio_out = np.full(tr.n, "", dtype=object)
    art_out = np.full(tr.n, "", dtype=object)
    dur_out = np.full(tr.n, np.nan)
    ev_tr, ev_t, ev_p = [], [], []
    for row, dur in zip(chosen, durations, strict=True):
        pat = pattern[row]
        s = simulate_strip(pat, rng, duration_ms=float(dur), **_strip_args(tr, row, pat))
        pat_out[row] = pat
        ratio_out[row] = s.ratio or ""
        art_out[row] = ";".join(s.artefacts)
        dur_out[row] = dur
        t = np.concatenate((s.p_ms, s.qrs_ms))
        is_p = np.concatenate(
            (np.ones(s.p_ms.size, dtype=bool), np.zeros(s.qrs_ms.size, dtype=bool))
        )
        order = np.argsort(t, kind="stable")
        ev_tr.append(np.full(t.size, row))
        ev_t.append(np.round(t[order]))
        ev_p.append(is_p[order])
        _rates_from_strip(tr, row, s.qrs_ms, s.atrial_rate_bpm, pat)
    return Strips(
        pattern=pat_out,
        ratio=ratio_out,
        artefacts=art_out,
        duration_ms=dur_out,
        event_tracing=np.concatenate(ev_tr) if ev_tr else np.zeros(0, dtype=np.int64),
        event_t_ms=np.concatenate(ev_t) if ev_t else np.zeros(0),
        event_is_p=np.concatenate(ev_p) if ev_p else np.zeros(0, dtype=bool),
    )


def _patterns(tr: Tracings) -> np.ndarray:
    """Beat pattern a strip of each tracing would show ('' if no strip applies)."""
    out = np.full(tr.n, "", dtype=object)
    av_names = np.array(list(AV), dtype=object)[tr.av]
    for av_name, pat in _PATTERN_OF_AV.items():
        out[av_names == av_name] = pat
    sinus = tr.rhythm == R["sinus"]
    out[~sinus & (tr.av != AV["av_dissociation"])] = ""
    out[tr.blocked_pac] = "blocked_pac"
    return out


def _durations(cfg: Config, rng: np.random.Generator, n: int) -> np.ndarray:
    """Strip lengths (ms): mostly the 10 s rhythm strip, some 30-60 s and 1-5 min."""
    shares = cfg.value("strips", "duration_share")
    kind = rng.choice(3, size=n, p=np.array([shares["s10"], shares["s30_60"], shares["s60_300"]]))
    return np.select(
        [kind == 0, kind == 1],
        [np.full(n, 10_000.0), rng.uniform(30_000.0, 60_000.0, n)],
        rng.uniform(60_000.0, 300_000.0, n),
    )


def _strip_args(tr: Tracings, row: int, pat: str) -> dict[str, float]:
    """Rates and PR of the tracing, clipped to what simulate_strip accepts for the pattern."""
    lo = 50.0 if pat == "third_degree" else 40.0
    args: dict[str, float] = {"atrial_rate_bpm": float(np.clip(tr.atrial_rate[row], lo, 180.0))}
    pr = tr.pr[row]
    if np.isfinite(pr):
        if pat == "normal":
            pr = min(pr, 200.0)
        elif pat == "first_degree":
            pr = max(pr, 201.0)
        args["pr_ms"] = float(np.clip(pr, 60.0, 600.0))
    if pat == "third_degree":
        args["escape_rate_bpm"] = float(np.clip(tr.vent_rate[row], 25.0, 60.0))
    elif pat == "av_dissociation":
        args["escape_rate_bpm"] = float(np.clip(tr.vent_rate[row], 40.0, 150.0))
    return args


def _rates_from_strip(
    tr: Tracings, row: int, qrs_ms: np.ndarray, atrial_bpm: float, pat: str
) -> None:
    """Ventricular rate from the strip's mean R-R, atrial rate from its sinus P waves."""
    if qrs_ms.size >= 2:
        tr.vent_rate[row] = 60_000.0 / float(np.mean(np.diff(qrs_ms)))
    tr.atrial_rate[row] = atrial_bpm
