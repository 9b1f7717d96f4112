"""Machine and confirmed (physician overread) reads of each tracing: values and statements.

A read's statements are chosen as concepts in fixed slots (rhythm, AV, two ventricular
conduction slots, axis, serial comparison, three other findings, summary); the text is
rendered later (statements.py). Machine statements follow the machine's own measurements and
a documented confusion table (data/parameters.toml [machine]); confirmed statements follow
the truth with a small physician error rate.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from synthetic_registry.config import Config
from synthetic_registry.ecgs import AV, R, Tracings, wrap_axis
from synthetic_registry.population import VC, Persons

SLOTS: tuple[str, ...] = (
    "rhythm",
    "av",
    "vc_a",
    "vc_b",
    "axis",
    "serial",
    "other_1",
    "other_2",
    "other_3",
    "summary",
)
S = {c: i for i, c in enumerate(SLOTS)}
NONE = -1

ABNORMAL = (
    "af",
    "af_slow",
    "af_rapid",
    "flutter",
    "junctional",
    "junctional_brady",
    "accelerated_junctional",
    "paced_v",
    "paced_av",
    "wide_qrs_rhythm",
    "first_degree",
    "marked_first_degree",
    "mobitz_i",
    "mobitz_ii",
    "two_to_one",
    "second_unspecified",
    "high_grade",
    "third_degree",
    "av_dissociation",
    "rbbb",
    "lbbb",
    "bifascicular",
    "rbbb_lafb",
    "rbbb_lpfb",
    "lafb",
    "lpfb",
    "nonspecific_ivcd",
    "lvh",
    "qt_long",
    "marked_sinus_brady",
    "ventricular_escape",
    "sinus_first_degree",
    "irregular_rhythm",
    "blocked_pac",
)
BORDERLINE = (
    "borderline_first_degree",
    "short_pr",
    "incomplete_rbbb",
    "incomplete_lbbb",
    "lad",
    "rad",
    "nonspecific_t",
    "low_voltage",
    "sinus_brady",
    "sinus_tachy",
    "pac",
    "pvc",
    "sinus_pauses",
    "sinus_arrhythmia",
)


@dataclass
class Read:
    """Values and statement concepts of one read kind for all tracings (NaN = empty)."""

    vent_rate: np.ndarray
    atrial_rate: np.ndarray
    pr: np.ndarray
    qrs: np.ndarray
    qt: np.ndarray
    qtc: np.ndarray
    p_axis: np.ndarray
    qrs_axis: np.ndarray
    t_axis: np.ndarray
    slots: np.ndarray  # (n, len(SLOTS)) concept indices, -1 = empty


@dataclass
class Reads:
    machine: Read
    confirmed: Read
    has_confirmed: np.ndarray
    machine_av_concept: np.ndarray  # concept index in the AV slot of the machine read (or -1)


class _Concepts:
    """Concept name -> lexicon index, with vectorized helpers."""

    def __init__(self, cfg: Config) -> None:
        self.ix = cfg.lexicon.index

    def __getitem__(self, name: str) -> int:
        return self.ix[name]

    def ids(self, names: tuple[str, ...]) -> np.ndarray:
        return np.array([self.ix[c] for c in names])


def make_reads(cfg: Config, rng: np.random.Generator, p: Persons, tr: Tracings) -> Reads:
    """Machine read of every tracing and confirmed read of a share of them."""
    c = _Concepts(cfg)
    machine, missed_rate = _machine_values(cfg, rng, tr)
    m_slots = _machine_slots(cfg, rng, c, tr, machine, missed_rate)
    machine.slots = m_slots
    has_conf = _overread_mask(cfg, rng, tr)
    confirmed = _confirmed_values(cfg, rng, tr, machine)
    confirmed.slots = _confirmed_slots(cfg, rng, c, tr, m_slots)
    return Reads(
        machine=machine,
        confirmed=confirmed,
        has_confirmed=has_conf,
        machine_av_concept=m_slots[:, S["av"]],
    )


# ---------------------------------------------------------------- machine


def _round(x: np.ndarray) -> np.ndarray:
    return np.round(x)


def _machine_values(cfg: Config, rng: np.random.Generator, tr: Tracings) -> tuple[Read, np.ndarray]:
    """Machine measurements: truth plus noise, gross PR errors, garbage PR in dissociation."""
    v = cfg.value
    n = tr.n
    u = rng.random((6, n))
    vent = np.clip(_round(tr.vent_rate + rng.normal(0.0, 1.0, n)), 20.0, 250.0)
    atrial = _round(tr.atrial_rate + rng.normal(0.0, 1.0, n))
    af = tr.rhythm == R["atrial_fibrillation"]
    fib = af & (u[0] < v("measurement", "af_fibrillatory_rate_share"))
    atrial = np.where(fib, _round(rng.uniform(*v("machine", "fibrillatory_rate_range"), n)), atrial)
    sign = np.where(u[1] < 0.5, -1.0, 1.0)
    gross = u[2] < v("machine", "pr_gross_error_share")
    pr = (
        tr.pr
        + rng.normal(0.0, v("machine", "pr_noise_sd"), n)
        + gross * sign * v("machine", "pr_gross_error_ms")
    )
    dissociated = np.isin(tr.av, (AV["third_degree"], AV["av_dissociation"]))
    garbage = dissociated & (u[3] < v("machine", "dissociated_pr_share"))
    pr = np.where(garbage, rng.uniform(*v("machine", "dissociated_pr_range"), n), pr)
    delay = tr.paced_dual & (u[4] < v("machine", "paced_av_delay_share"))
    pr = np.where(delay, rng.uniform(*v("machine", "paced_av_delay_range"), n), pr)
    qrs = tr.qrs + rng.normal(0.0, v("machine", "qrs_noise_sd"), n)
    qt = tr.qt + rng.normal(0.0, v("machine", "qt_noise_sd"), n)
    sd = v("machine", "axis_noise_sd")
    read = Read(
        vent_rate=vent,
        atrial_rate=atrial,
        pr=_round(pr),
        qrs=_round(qrs),
        qt=_round(qt),
        qtc=np.zeros(n),
        p_axis=_round(wrap_axis(tr.p_axis + rng.normal(0.0, sd, n))),
        qrs_axis=_round(wrap_axis(tr.qrs_axis + rng.normal(0.0, sd, n))),
        t_axis=_round(wrap_axis(tr.t_axis + rng.normal(0.0, sd, n))),
        slots=np.zeros((0, 0), dtype=np.int64),
    )
    read.qtc = _round(read.qt / np.sqrt(60.0 / read.vent_rate))  # Bazett (1920)
    return read, gross


def _pick(rng: np.random.Generator, table: dict[str, float], n: int) -> np.ndarray:
    """Indices into ``list(table)`` for n draws."""
    w = np.array(list(table.values()), dtype=float)
    return rng.choice(w.size, size=n, p=w / w.sum())


def _machine_slots(
    cfg: Config, rng: np.random.Generator, c: _Concepts, tr: Tracings, m: Read, gross: np.ndarray
) -> np.ndarray:
    v = cfg.value
    n = tr.n
    slots = np.full((n, len(SLOTS)), NONE, dtype=np.int64)
    u = rng.random((12, n))
    rh = tr.rhythm

    # AV outcome of the machine for blocks, dissociation and blocked PACs (confusion table).
    confusion = v("machine", "av_confusion")
    outcome = np.full(n, "", dtype=object)
    for true_name, table in confusion.items():
        mask = (
            tr.blocked_pac
            if true_name == "blocked_pac"
            else (tr.av == AV[true_name]) & (rh != R["paced"])
        )
        if true_name != "blocked_pac":
            mask &= ~tr.blocked_pac
        k = int(mask.sum())
        if k:
            outcome[mask] = np.array(list(table), dtype=object)[_pick(rng, table, k)]
    missed_rate = np.isin(tr.av, (AV["two_to_one"], AV["high_grade"])) & (outcome == "missed")
    m.atrial_rate = np.where(missed_rate, m.vent_rate, m.atrial_rate)  # only conducted P counted
    m.pr = np.where(outcome == "junctional", np.nan, m.pr)  # no P seen, no PR reported

    slots[:, S["rhythm"]] = _machine_rhythm(cfg, c, tr, m, outcome, u)
    slots[:, S["av"]] = _machine_av(cfg, c, tr, m, outcome, u)
    blocked_called = outcome == "blocked_pac"
    slots[blocked_called, S["other_1"]] = c["blocked_pac"]
    third_ok = (outcome == "third_degree") & ~tr.escape_ventricular & (u[5] < 0.3)
    slots[third_ok, S["other_1"]] = c["escape_junctional"]
    # Combined phrase "Sinus rhythm with 1st degree A-V block" in the rhythm slot.
    combine = (
        np.isin(slots[:, S["rhythm"]], c.ids(("sinus", "sinus_brady")))
        & (slots[:, S["av"]] == c["first_degree"])
        & (u[6] < 0.5)
    )
    slots[combine, S["rhythm"]] = c["sinus_first_degree"]
    slots[combine, S["av"]] = NONE
    _machine_vc(cfg, rng, c, tr, m, slots)
    _axis_slot(cfg, c, m.qrs_axis, slots)
    _other_findings(cfg, rng, c, tr, m, slots)
    _serial(cfg, c, tr, slots, u[8])
    slots[:, S["summary"]] = _summary(c, slots, u[9], machine=True)
    return slots


def _machine_rhythm(
    cfg: Config, c: _Concepts, tr: Tracings, m: Read, outcome: np.ndarray, u: np.ndarray
) -> np.ndarray:
    v = cfg.value
    rh = tr.rhythm
    rate = np.where(np.isfinite(m.atrial_rate), m.atrial_rate, m.vent_rate)
    sinus_c = np.where(
        u[0] < v("machine", "sinus_arrhythmia_share"),
        c["sinus_arrhythmia"],
        _sinus_concept(cfg, c, rate),
    )
    sinus_c = np.where(outcome == "pauses", c["sinus_pauses"], sinus_c)
    sinus_c = np.where(u[1] < v("machine", "sinus_called_af"), c["af"], sinus_c)
    af_c = _af_concept(cfg, c, m.vent_rate)
    af_c = np.where(
        u[2] < v("machine", "af_correct"),
        af_c,
        np.where(u[3] < 0.6, c["irregular_rhythm"], c["sinus"]),
    )
    fl_ok = v("machine", "flutter_correct")
    fl_c = np.select([u[2] < fl_ok, u[2] < fl_ok + 0.2], [c["flutter"], c["af"]], c["sinus_tachy"])
    paced_c = np.where(tr.paced_dual, c["paced_av"], c["paced_v"])
    paced_c = np.where(u[4] < v("machine", "paced_correct"), paced_c, c["wide_qrs_rhythm"])
    junc_c = _junctional_concept(c, m.vent_rate, u[5])
    out = np.select(
        [
            rh == R["paced"],
            rh == R["atrial_fibrillation"],
            rh == R["atrial_flutter"],
            rh == R["junctional"],
        ],
        [paced_c, af_c, fl_c, junc_c],
        sinus_c,
    )
    return np.where(outcome == "junctional", junc_c, out)


def _sinus_concept(cfg: Config, c: _Concepts, rate: np.ndarray) -> np.ndarray:
    """Sinus rhythm wording by rate: (marked) bradycardia, tachycardia or plain."""
    k = cfg.params["criteria"]
    return np.select(
        [
            rate < k["marked_bradycardia_bpm"]["value"],
            rate < k["bradycardia_bpm"]["value"],
            rate > k["tachycardia_bpm"]["value"],
        ],
        [c["marked_sinus_brady"], c["sinus_brady"], c["sinus_tachy"]],
        c["sinus"],
    )


def _af_concept(cfg: Config, c: _Concepts, vent: np.ndarray) -> np.ndarray:
    """AF wording by ventricular response: slow, rapid or plain."""
    k = cfg.params["criteria"]
    slow, fast = k["bradycardia_bpm"]["value"], k["tachycardia_bpm"]["value"]
    return np.select([vent < slow, vent > fast], [c["af_slow"], c["af_rapid"]], c["af"])


def _junctional_concept(c: _Concepts, rate: np.ndarray, u: np.ndarray) -> np.ndarray:
    """Junctional rhythm wording by rate: bradycardia below 50, accelerated above 60 bpm."""
    return np.select(
        [rate > 60, (rate < 50) & (u < 0.6)],
        [c["accelerated_junctional"], c["junctional_brady"]],
        c["junctional"],
    )


def _machine_av(
    cfg: Config, c: _Concepts, tr: Tracings, m: Read, outcome: np.ndarray, u: np.ndarray
) -> np.ndarray:
    """AV statement from the confusion outcome, else from the machine's own PR."""
    rules = cfg.value("machine", "first_degree_statement")
    cut = cfg.value("machine", "pr_statement_cuts")
    marked, sure, first, low = cut["marked"], cut["sure"], cut["first"], cut["borderline_low"]
    pr = m.pr
    x = u[10]
    pr_c = np.select(
        [
            pr > marked,
            (pr > sure) & (x < rules["above_220"]),
            (pr > first) & (pr <= sure) & (x < rules["from_201_to_220"]),
            (pr > first)
            & (pr <= sure)
            & (x < rules["from_201_to_220"] + rules["borderline_201_to_220"]),
            (pr >= low) & (pr <= first) & (x < rules["borderline_195_to_200"]),
            (pr < cut["short"]) & (x < cfg.value("machine", "short_pr_statement")),
        ],
        [
            np.where(
                u[11] < cfg.value("machine", "marked_statement"),
                c["marked_first_degree"],
                c["first_degree"],
            ),
            c["first_degree"],
            c["first_degree"],
            c["borderline_first_degree"],
            c["borderline_first_degree"],
            c["short_pr"],
        ],
        NONE,
    )
    names = (
        "mobitz_i",
        "mobitz_ii",
        "two_to_one",
        "high_grade",
        "third_degree",
        "av_dissociation",
        "second_unspecified",
        "first_degree",
    )
    out = pr_c
    for name in names:
        out = np.where(outcome == name, c[name], out)
    out = np.where(outcome == "junctional", NONE, out)
    sinus_like = np.isin(tr.rhythm, (R["sinus"], R["junctional"]))
    return np.where(sinus_like, out, NONE)


def _machine_vc(
    cfg: Config, rng: np.random.Generator, c: _Concepts, tr: Tracings, m: Read, slots: np.ndarray
) -> None:
    """Ventricular conduction statements from the machine QRS and axis and the true morphology."""
    v = cfg.value
    n = tr.n
    u = rng.random((4, n))
    q, ax = m.qrs, m.qrs_axis
    vc = tr.vc
    right = np.isin(vc, (VC["rbbb"], VC["incomplete_rbbb"]))
    left = np.isin(vc, (VC["lbbb"], VC["incomplete_lbbb"]))
    bif = vc == VC["bifascicular"]
    ivcd = vc == VC["nonspecific_ivcd"]
    other = ~(right | left | bif | ivcd) & ~np.isin(vc, (VC["paced"], VC["not_assessable"]))
    k = {name: x["value"] for name, x in cfg.params["criteria"].items()}
    full, part = k["complete_bbb_qrs_ms"], k["incomplete_bbb_qrs_ms"]
    a = np.full(n, NONE)
    b = np.full(n, NONE)
    a = np.where(right & (q >= full), c["rbbb"], a)
    a = np.where(right & (q >= part) & (q < full), c["incomplete_rbbb"], a)
    a = np.where(left & (q >= full), c["lbbb"], a)
    a = np.where(left & (q >= part) & (q < full), c["incomplete_lbbb"], a)
    ivcd_call = (
        (ivcd | other)
        & (q > k["ivcd_qrs_ms"])
        & ((q >= full) | (u[0] < v("machine", "ivcd_call_share")))
    )
    a = np.where(ivcd_call, c["nonspecific_ivcd"], a)
    wrong = np.isin(a, c.ids(("rbbb", "lbbb"))) & (u[1] >= v("machine", "morphology_correct"))
    a = np.where(wrong, c["nonspecific_ivcd"], a)
    # Bifascicular: one statement, a combined phrase, or RBBB plus a fascicular statement.
    lp = ax > k["lpfb_axis"][0]
    form = u[2]
    a = np.where(bif & (form < 0.2), c["bifascicular"], a)
    a = np.where(
        bif & (form >= 0.2) & (form < 0.5), np.where(lp, c["rbbb_lpfb"], c["rbbb_lafb"]), a
    )
    a = np.where(bif & (form >= 0.5), c["rbbb"], a)
    b = np.where(bif & (form >= 0.5), np.where(lp, c["lpfb"], c["lafb"]), b)
    narrow = q < full
    lafb_call = (
        ~bif
        & narrow
        & (ax <= k["lafb_axis"][1])
        & (ax >= k["lafb_axis"][0])
        & (u[3] < v("machine", "lafb_called"))
        & ~np.isin(vc, (VC["paced"], VC["not_assessable"]))
    )
    lpfb_call = (
        ~bif
        & narrow
        & (vc == VC["lpfb"])
        & (ax >= k["lpfb_axis"][0])
        & (u[3] < v("machine", "lpfb_called"))
    )
    b = np.where(lafb_call, c["lafb"], b)
    b = np.where(lpfb_call, c["lpfb"], b)
    slots[:, S["vc_a"]] = a
    slots[:, S["vc_b"]] = b


def _axis_slot(cfg: Config, c: _Concepts, axis: np.ndarray, slots: np.ndarray) -> None:
    """Left / right axis deviation where no fascicular or paced statement explains the axis."""
    k = {name: x["value"] for name, x in cfg.params["criteria"].items()}
    explained = np.isin(
        slots[:, S["vc_a"]], c.ids(("bifascicular", "rbbb_lafb", "rbbb_lpfb"))
    ) | np.isin(slots[:, S["vc_b"]], c.ids(("lafb", "lpfb")))
    paced = np.isin(slots[:, S["rhythm"]], c.ids(("paced_v", "paced_av", "wide_qrs_rhythm")))
    lad = (axis < k["lad_axis_deg"]) & (axis >= k["lafb_axis"][0])
    # From +90 inclusive: the LPFB axis range (+90 to +180) starts there, so an axis of
    # exactly +90 is not left unexplained by the machine's statements.
    rad = (axis >= k["rad_axis_deg"]) & (axis <= k["lpfb_axis"][1])
    free = ~explained & ~paced
    slots[:, S["axis"]] = np.select([free & lad, free & rad], [c["lad"], c["rad"]], NONE)


def _other_findings(
    cfg: Config, rng: np.random.Generator, c: _Concepts, tr: Tracings, m: Read, slots: np.ndarray
) -> None:
    """Non-conduction statements (T wave, LVH, voltage, ectopy, long QT) after other_1's content."""
    shares = cfg.value("statements", "other_findings")
    picks = [slots[:, S["other_1"]]]
    for name, share in shares.items():
        long_qt = m.qtc > cfg.value("criteria", "long_qtc_ms")
        hit = long_qt if name == "qt_long" else rng.random(tr.n) < share
        picks.append(np.where(hit, c[name], NONE))
    stack = np.stack(picks, axis=1)
    order = np.argsort(stack == NONE, axis=1, kind="stable")  # compact to the left, order kept
    stack = np.take_along_axis(stack, order, axis=1)
    slots[:, S["other_1"] : S["other_3"] + 1] = stack[:, :3]


def _serial(cfg: Config, c: _Concepts, tr: Tracings, slots: np.ndarray, u: np.ndarray) -> None:
    """'No longer present' when the previous tracing of the person carried the finding."""
    share = cfg.value("statements", "resolution_statement_share")
    same = np.zeros(tr.n, dtype=bool)
    same[1:] = tr.person[1:] == tr.person[:-1]
    prev = np.roll(slots, 1, axis=0)
    first = np.isin(prev[:, S["av"]], c.ids(("first_degree", "marked_first_degree"))) | (
        prev[:, S["rhythm"]] == c["sinus_first_degree"]
    )
    now_first = np.isin(
        slots[:, S["av"]], c.ids(("first_degree", "marked_first_degree", "borderline_first_degree"))
    ) | (slots[:, S["rhythm"]] == c["sinus_first_degree"])
    af_prev = np.isin(prev[:, S["rhythm"]], c.ids(("af", "af_slow", "af_rapid")))
    af_now = np.isin(slots[:, S["rhythm"]], c.ids(("af", "af_slow", "af_rapid", "flutter")))
    rbbb_prev = np.isin(prev[:, S["vc_a"]], c.ids(("rbbb", "rbbb_lafb", "rbbb_lpfb")))
    rbbb_now = np.isin(
        slots[:, S["vc_a"]], c.ids(("rbbb", "rbbb_lafb", "rbbb_lpfb", "bifascicular"))
    )
    hit = same & (u < share)
    sinus_now = np.isin(
        slots[:, S["rhythm"]],
        c.ids(("sinus", "sinus_brady", "sinus_tachy", "sinus_arrhythmia", "marked_sinus_brady")),
    )
    out = np.select(
        [
            hit & first & ~now_first & sinus_now,
            hit & af_prev & ~af_now,
            hit & rbbb_prev & ~rbbb_now,
        ],
        [c["resolved_first_degree"], c["resolved_af"], c["resolved_rbbb"]],
        NONE,
    )
    slots[:, S["serial"]] = out


def _summary(c: _Concepts, slots: np.ndarray, u: np.ndarray, machine: bool) -> np.ndarray:
    """Overall statement: abnormal, otherwise normal / borderline, or normal ECG."""
    body = slots[:, : S["summary"]]
    abnormal = np.isin(body, c.ids(ABNORMAL)).any(axis=1)
    borderline = np.isin(body, c.ids(BORDERLINE)).any(axis=1)
    p_abn = 0.95 if machine else 0.6
    return np.select(
        [
            abnormal & (u < p_abn),
            ~abnormal & borderline & (u < 0.5),
            ~abnormal & borderline & (u < 0.8),
            ~abnormal & ~borderline & (u < 0.9),
        ],
        [c["abnormal_ecg"], c["otherwise_normal"], c["borderline_ecg"], c["normal_ecg"]],
        NONE,
    )


# ---------------------------------------------------------------- confirmed


def _overread_mask(cfg: Config, rng: np.random.Generator, tr: Tracings) -> np.ndarray:
    """Tracings with a physician overread: per-site share, more often when abnormal."""
    mult = cfg.value("overread", "abnormal_multiplier")
    base = cfg.sites.overread_share[tr.site]
    f = np.ones(tr.n)
    f *= np.where(
        np.isin(
            tr.av,
            (
                AV["mobitz_i"],
                AV["mobitz_ii"],
                AV["two_to_one"],
                AV["high_grade"],
                AV["third_degree"],
            ),
        ),
        mult["higher_grade"],
        1.0,
    )
    f *= np.where(
        np.isin(tr.av, (AV["first_degree"], AV["marked_first_degree"])), mult["first_degree"], 1.0
    )
    f *= np.where(np.isin(tr.vc, (VC["rbbb"], VC["lbbb"], VC["bifascicular"])), mult["bbb"], 1.0)
    f *= np.where(
        np.isin(tr.rhythm, (R["atrial_fibrillation"], R["atrial_flutter"])), mult["af"], 1.0
    )
    f *= np.where(tr.rhythm == R["paced"], mult["paced"], 1.0)
    return rng.random(tr.n) < np.minimum(base * f, 0.95)


def _confirmed_values(cfg: Config, rng: np.random.Generator, tr: Tracings, m: Read) -> Read:
    """Overread values: the machine's, with wrong PR corrected and dissociated PR cleared."""
    n = tr.n
    wrong_pr = np.abs(m.pr - tr.pr) >= cfg.value("overread", "pr_wrong_ms")
    thr = cfg.value("pr", "first_degree_threshold_ms")
    missed_first = (tr.pr > thr) & (m.pr <= thr)
    fix = np.isfinite(tr.pr) & (wrong_pr | missed_first)
    pr = np.where(fix, np.round(tr.pr + rng.normal(0.0, 2.0, n)), m.pr)
    nudge = np.isfinite(pr) & ~fix & (rng.random(n) < cfg.value("overread", "pr_edit_small_share"))
    pr = np.where(nudge, pr + np.round(rng.normal(0.0, 4.0, n)), pr)
    pr = np.where(np.isnan(tr.pr) & ~tr.paced_dual, np.nan, pr)
    atrial = np.where(
        np.isfinite(tr.atrial_rate) & (tr.rhythm != R["atrial_fibrillation"]),
        np.round(tr.atrial_rate),
        m.atrial_rate,
    )
    return Read(
        vent_rate=m.vent_rate.copy(),
        atrial_rate=atrial,
        pr=pr,
        qrs=m.qrs.copy(),
        qt=m.qt.copy(),
        qtc=m.qtc.copy(),
        p_axis=m.p_axis.copy(),
        qrs_axis=m.qrs_axis.copy(),
        t_axis=m.t_axis.copy(),
        slots=np.zeros((0, 0), dtype=np.int64),
    )


_ERROR_NEIGHBOUR = {
    "first_degree": "borderline_first_degree",
    "marked_first_degree": "first_degree",
    "mobitz_i": "second_unspecified",
    "mobitz_ii": "mobitz_i",
    "two_to_one": "mobitz_i",
    "high_grade": "two_to_one",
    "third_degree": "high_grade",
}


def _confirmed_slots(
    cfg: Config, rng: np.random.Generator, c: _Concepts, tr: Tracings, m_slots: np.ndarray
) -> np.ndarray:
    n = tr.n
    u = rng.random((8, n))
    slots = np.full((n, len(SLOTS)), NONE, dtype=np.int64)
    rh = tr.rhythm
    sinus_c = _sinus_concept(cfg, c, tr.atrial_rate)
    af_c = _af_concept(cfg, c, tr.vent_rate)
    paced_c = np.where(tr.paced_dual, c["paced_av"], c["paced_v"])
    slots[:, S["rhythm"]] = np.select(
        [
            rh == R["paced"],
            rh == R["atrial_fibrillation"],
            rh == R["atrial_flutter"],
            rh == R["junctional"],
        ],
        [paced_c, af_c, c["flutter"], _junctional_concept(c, tr.vent_rate, u[6])],
        sinus_c,
    )
    av_names = (
        "first_degree",
        "marked_first_degree",
        "mobitz_i",
        "mobitz_ii",
        "two_to_one",
        "high_grade",
        "third_degree",
        "av_dissociation",
    )
    av_c = np.full(n, NONE)
    for name in av_names:
        av_c = np.where(tr.av == AV[name], c[name], av_c)
    av_c = np.where((tr.av == AV["short_pr"]) & (u[0] < 0.5), c["short_pr"], av_c)
    err = u[1] < cfg.value("overread", "physician_error")
    for name, neighbour in _ERROR_NEIGHBOUR.items():
        av_c = np.where(err & (av_c == c[name]), c[neighbour], av_c)
    near = tr.pr > cfg.value("pr", "first_degree_threshold_ms") - 10.0  # a near-threshold PR
    av_c = np.where(err & (tr.av == AV["normal_pr"]) & near, c["borderline_first_degree"], av_c)
    slots[:, S["av"]] = av_c
    combine = (slots[:, S["rhythm"]] == c["sinus"]) & (av_c == c["first_degree"]) & (u[2] < 0.4)
    slots[combine, S["rhythm"]] = c["sinus_first_degree"]
    slots[combine, S["av"]] = NONE
    slots[tr.blocked_pac, S["other_1"]] = c["blocked_pac"]
    slots[tr.escape_ventricular, S["other_1"]] = c["ventricular_escape"]
    junc_escape = (tr.av == AV["third_degree"]) & ~tr.escape_ventricular & (u[3] < 0.3)
    slots[junc_escape, S["other_1"]] = c["escape_junctional"]
    _confirmed_vc(cfg, c, tr, slots, u[4])
    normal_vc = tr.vc == VC["normal"]
    lad, rad = cfg.value("criteria", "lad_axis_deg"), cfg.value("criteria", "rad_axis_deg")
    slots[:, S["axis"]] = np.select(
        [normal_vc & (tr.qrs_axis < lad), normal_vc & (tr.qrs_axis >= rad)],
        [c["lad"], c["rad"]],
        NONE,
    )
    keep = u[5:8].T < 0.85
    for k, slot in enumerate(("other_1", "other_2", "other_3")):
        src = m_slots[:, S[slot]]
        src = np.where(np.isin(src, c.ids(("blocked_pac", "escape_junctional"))), NONE, src)
        take = (slots[:, S[slot]] == NONE) & keep[:, k]
        slots[take, S[slot]] = src[take]
    slots[:, S["summary"]] = _summary(c, slots, rng.random(n), machine=False)
    return slots


def _confirmed_vc(
    cfg: Config, c: _Concepts, tr: Tracings, slots: np.ndarray, u: np.ndarray
) -> None:
    vc = tr.vc
    a = np.full(tr.n, NONE)
    b = np.full(tr.n, NONE)
    for name in ("incomplete_rbbb", "rbbb", "incomplete_lbbb", "lbbb", "nonspecific_ivcd"):
        a = np.where(vc == VC[name], c[name], a)
    b = np.where(vc == VC["lafb"], c["lafb"], b)
    b = np.where(vc == VC["lpfb"], c["lpfb"], b)
    bif = vc == VC["bifascicular"]
    lp = tr.qrs_axis > cfg.value("criteria", "rad_axis_deg")
    a = np.where(bif & (u < 0.4), c["bifascicular"], a)
    a = np.where(bif & (u >= 0.4) & (u < 0.8), np.where(lp, c["rbbb_lpfb"], c["rbbb_lafb"]), a)
    a = np.where(bif & (u >= 0.8), c["rbbb"], a)
    b = np.where(bif & (u >= 0.8), np.where(lp, c["lpfb"], c["lafb"]), b)
    slots[:, S["vc_a"]] = a
    slots[:, S["vc_b"]] = b
