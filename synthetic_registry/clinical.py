"""Diagnosis (ICD-10-CM) and procedure (ICD-10-PCS) records of one block.

Diagnoses follow what the ECGs of the export show (sometimes before the ECG, sometimes
months after, often never), plus conditions coded from monitoring without an ECG in the
export and a few miscoded persons. Procedures record device implants on their true date;
a share of implants happened outside the network and has no record.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from synthetic_registry.config import Config
from synthetic_registry.ecgs import AV, Tracings
from synthetic_registry.population import DEVICES, HG_TYPES, VC, YEAR, Persons

# Condition -> ICD-10-CM codes with their shares (codes.csv lists their meaning).
_CODES: dict[str, dict[str, float]] = {
    "first_degree": {"I44.0": 1.0},
    "second_degree": {"I44.1": 1.0},
    "high_grade": {"I44.39": 0.5, "I44.30": 0.5},
    "third_degree": {"I44.2": 1.0},
    "lafb": {"I44.4": 1.0},
    "lpfb": {"I44.5": 1.0},
    "lbbb": {"I44.7": 1.0},
    "incomplete_rbbb": {"I45.19": 1.0},
    "bifascicular": {"I45.2": 1.0},
    "trifascicular": {"I45.3": 1.0},
}
_GENERATOR_DEVICE_VALUE = {"single": "4", "single_rate_responsive": "5", "dual": "6", "crt": "7"}
_LEADS = {
    "single": ("02HK3JZ",),
    "single_rate_responsive": ("02HK3JZ",),
    "dual": ("02H63JZ", "02HK3JZ"),
    "crt": ("02H63JZ", "02HK3JZ", "02H43JZ"),
}


@dataclass
class Records:
    """Rows of diagnoses.csv or procedures.csv for one block (person row index, day, code)."""

    person: np.ndarray
    day: np.ndarray
    code: np.ndarray


def _empty() -> Records:
    return Records(np.zeros(0, dtype=np.int64), np.zeros(0), np.zeros(0, dtype=object))


def _concat(parts: list[Records]) -> Records:
    parts = [r for r in parts if r.person.size]
    if not parts:
        return _empty()
    person = np.concatenate([r.person for r in parts])
    day = np.concatenate([r.day for r in parts])
    code = np.concatenate([r.code for r in parts])
    order = np.lexsort((code.astype(str), day, person))
    return Records(person[order], day[order], code[order])


def _first_seen(n: int, tr: Tracings, mask: np.ndarray) -> np.ndarray:
    """Earliest tracing day per person among tracings in ``mask`` (inf if none)."""
    out = np.full(n, np.inf)
    np.minimum.at(out, tr.person[mask], np.floor(tr.t[mask]))
    return out


def _pick_codes(rng: np.random.Generator, shares: dict[str, float], n: int) -> np.ndarray:
    codes = np.array(list(shares), dtype=object)
    w = np.array(list(shares.values()))
    return codes[rng.choice(codes.size, size=n, p=w / w.sum())]


def simulate_diagnoses(cfg: Config, rng: np.random.Generator, p: Persons, tr: Tracings) -> Records:
    """ICD-10-CM diagnosis rows with dates within follow-up."""
    v = cfg.value
    seen_p = v("diagnoses", "code_probability_seen")
    unseen_p = v("diagnoses", "code_probability_unseen")
    codes = dict(_CODES)
    codes["rbbb"] = v("diagnoses", "rbbb_code_share")
    seen = _seen_conditions(p, tr)
    latent = {
        "first_degree": p.first_onset,
        "second_degree": np.where(
            np.isin(
                p.hg_type, [HG_TYPES.index(t) for t in ("mobitz_i", "mobitz_ii", "two_to_one")]
            ),
            p.hg_onset,
            np.inf,
        ),
        "third_degree": p.third_onset,
    }
    parts = []
    for cond, first in seen.items():
        has = np.isfinite(first) & (rng.random(p.n) < seen_p[cond])
        parts.append(_coded(cfg, rng, p, has, first, codes[cond], lag=True))
        if cond in unseen_p:
            unseen = (
                np.isfinite(latent[cond]) & ~np.isfinite(first) & (rng.random(p.n) < unseen_p[cond])
            )
            parts.append(
                _coded(
                    cfg,
                    rng,
                    p,
                    unseen,
                    latent[cond] + rng.uniform(0.0, 14.0, p.n),
                    codes[cond],
                    lag=False,
                )
            )
    parts.append(_z950(cfg, rng, p))
    parts.append(_false_codes(cfg, rng, p))
    return _concat(parts)


def _seen_conditions(p: Persons, tr: Tracings) -> dict[str, np.ndarray]:
    """First day each condition shows on a tracing of the person."""
    av, vc = tr.av, tr.vc
    first = _first_seen(p.n, tr, np.isin(av, (AV["first_degree"], AV["marked_first_degree"])))
    bif = _first_seen(p.n, tr, vc == VC["bifascicular"])
    return {
        "first_degree": first,
        "second_degree": _first_seen(
            p.n, tr, np.isin(av, (AV["mobitz_i"], AV["mobitz_ii"], AV["two_to_one"]))
        ),
        "high_grade": _first_seen(p.n, tr, av == AV["high_grade"]),
        "third_degree": _first_seen(p.n, tr, av == AV["third_degree"]),
        "lafb": _first_seen(p.n, tr, vc == VC["lafb"]),
        "lpfb": _first_seen(p.n, tr, vc == VC["lpfb"]),
        "lbbb": _first_seen(p.n, tr, vc == VC["lbbb"]),
        "rbbb": _first_seen(p.n, tr, vc == VC["rbbb"]),
        "incomplete_rbbb": _first_seen(p.n, tr, vc == VC["incomplete_rbbb"]),
        "bifascicular": bif,
        "trifascicular": np.where(
            np.isfinite(first) & np.isfinite(bif), np.maximum(first, bif), np.inf
        ),
    }


def _coded(
    cfg: Config,
    rng: np.random.Generator,
    p: Persons,
    has: np.ndarray,
    day: np.ndarray,
    shares: dict[str, float],
    lag: bool,
) -> Records:
    """First code at ``day`` (+ lag), then Poisson repeats later in follow-up."""
    idx = np.flatnonzero(has)
    if idx.size == 0:
        return _empty()
    d = day[idx]
    if lag:
        d = d + _lags(cfg, rng, idx.size)
    d = np.clip(np.floor(d), p.entry[idx], p.end[idx])
    code = _pick_codes(rng, shares, idx.size)
    reps = rng.poisson(cfg.value("diagnoses", "repeat_mean"), idx.size)
    r_idx = np.repeat(np.arange(idx.size), reps)
    r_day = np.floor(d[r_idx] + rng.random(r_idx.size) * (p.end[idx][r_idx] - d[r_idx] + 1.0))
    r_day = np.minimum(r_day, p.end[idx][r_idx])
    return Records(
        person=np.concatenate((idx, idx[r_idx])),
        day=np.concatenate((d, r_day)),
        code=np.concatenate((code, code[r_idx])),
    )


def _lags(cfg: Config, rng: np.random.Generator, n: int) -> np.ndarray:
    """Days from the first ECG showing a finding to its first code (negative: code first)."""
    shares = cfg.value("diagnoses", "lag_share")
    kind = rng.choice(
        3, size=n, p=np.array([shares["within_30_days"], shares["later"], shares["before"]])
    )
    return np.select(
        [kind == 0, kind == 1],
        [rng.uniform(0.0, 30.0, n), rng.uniform(30.0, 365.0, n)],
        -rng.uniform(1.0, 180.0, n),
    )


def _z950(cfg: Config, rng: np.random.Generator, p: Persons) -> Records:
    """Z95.0 (presence of cardiac pacemaker) after an implant, or from entry if prevalent."""
    has = np.isfinite(p.pm_date) & (p.pm_date <= p.end)
    idx = np.flatnonzero(has)
    start = np.maximum(p.pm_date[idx], p.entry[idx])
    first = np.minimum(start + rng.uniform(0.0, 60.0, idx.size), p.end[idx])
    reps = rng.poisson(cfg.value("diagnoses", "z950_repeat_mean"), idx.size)
    r_idx = np.repeat(np.arange(idx.size), reps)
    r_day = first[r_idx] + rng.random(r_idx.size) * (p.end[idx][r_idx] - first[r_idx])
    day = np.floor(np.concatenate((first, r_day)))
    person = np.concatenate((idx, idx[r_idx]))
    return Records(person, day, np.full(person.size, "Z95.0", dtype=object))


def _false_codes(cfg: Config, rng: np.random.Generator, p: Persons) -> Records:
    """A few persons carry a conduction code without the condition (miscoding)."""
    idx = np.flatnonzero(rng.random(p.n) < cfg.value("diagnoses", "false_code_share"))
    codes = np.array(["I44.0", "I44.1", "I45.10", "I44.7", "I44.4"], dtype=object)
    day = np.floor(p.entry[idx] + rng.random(idx.size) * (p.end[idx] - p.entry[idx]))
    return Records(idx, day, codes[rng.integers(0, codes.size, idx.size)])


def simulate_procedures(cfg: Config, rng: np.random.Generator, p: Persons) -> Records:
    """ICD-10-PCS rows: pacemaker and defibrillator implants with leads, generator changes."""
    v = cfg.value
    perc = v("pacemaker", "percutaneous_approach_share")
    parts = []
    new = np.isfinite(p.pm_date) & (p.pm_date >= p.entry) & (p.pm_date <= p.end) & p.pm_recorded
    parts.append(_implants(rng, np.flatnonzero(new), p.pm_date, p.pm_device, perc, leads=True))
    change_day = (
        p.pm_date
        + v("pacemaker", "generator_change_after_years") * YEAR
        + rng.uniform(0.0, 2.0 * YEAR, p.n)
    )
    change = np.isfinite(p.pm_date) & (change_day >= p.entry) & (change_day <= p.end)
    change &= rng.random(p.n) < v("pacemaker", "generator_change_probability")
    idx = np.flatnonzero(change)
    parts.append(
        Records(idx, np.floor(change_day[idx]), np.full(idx.size, "0JPT0PZ", dtype=object))
    )
    parts.append(_implants(rng, idx, np.floor(change_day), p.pm_device, perc, leads=False))
    icd = np.flatnonzero(np.isfinite(p.icd_date) & (p.icd_date <= p.end))
    gen = np.where(rng.random(icd.size) < 0.8, "0JH608Z", "0JH609Z").astype(object)
    parts.append(Records(icd, p.icd_date[icd], gen))
    parts.append(Records(icd, p.icd_date[icd], np.full(icd.size, "02HK3KZ", dtype=object)))
    return _concat(parts)


def _implants(
    rng: np.random.Generator,
    idx: np.ndarray,
    day: np.ndarray,
    device: np.ndarray,
    perc: float,
    leads: bool,
) -> Records:
    """Generator code from table 0JH6 (device value 4-7; approach 0 or 3) and lead codes."""
    if idx.size == 0:
        return _empty()
    names = np.array(DEVICES, dtype=object)[device[idx]]
    approach = np.where(rng.random(idx.size) < perc, "3", "0")
    gen = np.array(
        [f"0JH6{a}{_GENERATOR_DEVICE_VALUE[d]}Z" for a, d in zip(approach, names, strict=True)],
        dtype=object,
    )
    person, days, codes = [idx], [day[idx]], [gen]
    if leads:
        for k, d in enumerate(names):
            for lead in _LEADS[d]:
                person.append(idx[k : k + 1])
                days.append(day[idx[k : k + 1]])
                codes.append(np.array([lead], dtype=object))
    return Records(np.concatenate(person), np.floor(np.concatenate(days)), np.concatenate(codes))
