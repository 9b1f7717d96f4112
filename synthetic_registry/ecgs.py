"""ECG tracings of one block: when they are taken, the true state and the true measurements.

Timing: a Poisson process per person whose rate rises with age and with known conduction
disease (surveillance), sampled by thinning, plus event ECGs (entry, block onset, around an
implant, AF onset) and short-interval repeats. Every tracing lies within follow-up.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from cohort.vocabulary import AV_CATEGORIES, RHYTHM_CLASSES
from synthetic_registry.config import Config
from synthetic_registry.population import DEVICES, HG_TYPES, VC, YEAR, Persons
from synthetic_registry.sampling import truncated_normal

RHYTHM_CODES: tuple[str, ...] = tuple(RHYTHM_CLASSES)
AV_CODES: tuple[str, ...] = tuple(AV_CATEGORIES)
R = {c: i for i, c in enumerate(RHYTHM_CODES)}
AV = {c: i for i, c in enumerate(AV_CODES)}
EVENTS: tuple[str, ...] = (
    "routine",
    "entry",
    "block_onset",
    "third_degree_onset",
    "pre_implant",
    "post_implant",
    "af_onset",
    "repeat",
)
EV = {c: i for i, c in enumerate(EVENTS)}
SURVEILLED_VC = np.array([c not in ("normal", "incomplete_rbbb", "not_assessable") for c in VC])
HG_AV = np.array([AV[t] for t in HG_TYPES])


@dataclass
class Tracings:
    """Per tracing arrays (sorted by person, then time); NaN = not applicable."""

    n: int
    person: np.ndarray  # row index into the block's Persons
    t: np.ndarray  # days since 1970-01-01, with time of day
    event: np.ndarray
    age: np.ndarray
    rhythm: np.ndarray
    av: np.ndarray
    vc: np.ndarray
    blocked_pac: np.ndarray
    paced_dual: np.ndarray
    escape_ventricular: np.ndarray
    atrial_rate: np.ndarray
    vent_rate: np.ndarray
    pr: np.ndarray
    qrs: np.ndarray
    qt: np.ndarray
    qtc: np.ndarray
    p_axis: np.ndarray
    qrs_axis: np.ndarray
    t_axis: np.ndarray
    site: np.ndarray


def simulate_tracings(cfg: Config, rng: np.random.Generator, p: Persons) -> Tracings:
    """Times, true categories and true measurements of every tracing of the block."""
    person, t, event = _timing(cfg, rng, p)
    n = person.size
    tr = Tracings(
        n=n,
        person=person,
        t=t,
        event=event,
        age=(t - p.birth[person]) / YEAR,
        rhythm=np.zeros(n, dtype=np.int64),
        av=np.full(n, AV["not_assessable"]),
        vc=np.zeros(n, dtype=np.int64),
        blocked_pac=np.zeros(n, dtype=bool),
        paced_dual=np.zeros(n, dtype=bool),
        escape_ventricular=np.zeros(n, dtype=bool),
        atrial_rate=np.full(n, np.nan),
        vent_rate=np.full(n, np.nan),
        pr=np.full(n, np.nan),
        qrs=np.full(n, np.nan),
        qt=np.full(n, np.nan),
        qtc=np.full(n, np.nan),
        p_axis=np.full(n, np.nan),
        qrs_axis=np.full(n, np.nan),
        t_axis=np.full(n, np.nan),
        site=_sites(cfg, rng, p, person),
    )
    _states(cfg, rng, p, tr)
    _rates(cfg, rng, p, tr)
    return tr


# ---------------------------------------------------------------- timing


def _rate_factor(cfg: Config, p: Persons, person: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Surveillance multiplier of the ECG rate at time ``t`` (days)."""
    m = cfg.value("ecg_timing", "rate_multiplier")
    vc_now = np.where(t >= p.vc_change[person], p.vc1[person], p.vc0[person])
    f = np.ones(t.size)
    f *= np.where(t >= p.first_onset[person], m["first_degree"], 1.0)
    f *= np.where(SURVEILLED_VC[vc_now], m["bbb"], 1.0)
    f *= np.where(t >= p.af_onset[person], m["af"], 1.0)
    f *= np.where((t >= p.hg_onset[person]) & (t < p.pm_date[person]), m["higher_grade"], 1.0)
    f *= np.where(t >= p.pm_date[person], m["paced"], 1.0)
    return f


def _max_factor(cfg: Config, p: Persons) -> np.ndarray:
    """Upper bound of the surveillance multiplier over each person's follow-up."""
    m = cfg.value("ecg_timing", "rate_multiplier")
    f = np.ones(p.n)
    f *= np.where(np.isfinite(p.first_onset), m["first_degree"], 1.0)
    f *= np.where(SURVEILLED_VC[p.vc0] | SURVEILLED_VC[p.vc1], m["bbb"], 1.0)
    f *= np.where(np.isfinite(p.af_onset), m["af"], 1.0)
    f *= np.where(np.isfinite(p.hg_onset), m["higher_grade"], 1.0)
    f *= np.where(np.isfinite(p.pm_date), m["paced"], 1.0)
    return f


def _timing(
    cfg: Config, rng: np.random.Generator, p: Persons
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    v = cfg.value
    span = p.end + 1.0 - p.entry  # days, the end day included
    base = v("ecg_timing", "routine_rate_per_year") * p.care
    slope = v("ecg_timing", "age_log_slope")
    age_end = p.age0 + span / YEAR
    r_max = base * np.exp(slope * (age_end - 60.0)) * _max_factor(cfg, p)
    count = rng.poisson(r_max * span / YEAR)
    person = np.repeat(np.arange(p.n), count)
    t = p.entry[person] + rng.random(person.size) * span[person]
    age = p.age0[person] + (t - p.entry[person]) / YEAR
    r = base[person] * np.exp(slope * (age - 60.0)) * _rate_factor(cfg, p, person, t)
    keep = rng.random(t.size) * r_max[person] < r
    person, t = person[keep], t[keep]
    t = np.floor(t) + _time_of_day(cfg, rng, t.size)
    parts = [(person, t, np.full(t.size, EV["routine"]))]
    parts += _event_ecgs(cfg, rng, p)
    person = np.concatenate([x[0] for x in parts])
    t = np.concatenate([x[1] for x in parts])
    event = np.concatenate([x[2] for x in parts])
    rep = rng.random(t.size) < v("ecg_timing", "repeat_probability")
    person = np.concatenate((person, person[rep]))
    event = np.concatenate((event, np.full(int(rep.sum()), EV["repeat"])))
    t = np.concatenate(
        (t, t[rep] + rng.uniform(*v("ecg_timing", "repeat_window_days"), int(rep.sum())))
    )
    inside = (np.floor(t) <= p.end[person]) & (t >= p.entry[person])
    person, t, event = person[inside], t[inside], event[inside]
    order = np.lexsort((event, t, person))
    return person[order], t[order], event[order]


def _time_of_day(cfg: Config, rng: np.random.Generator, n: int) -> np.ndarray:
    """Fraction of a day: mostly office hours, else any time."""
    day = rng.random(n) < cfg.value("ecg_timing", "daytime_share")
    start, stop = cfg.value("ecg_timing", "daytime_hours")
    return np.where(day, rng.uniform(start / 24.0, stop / 24.0, n), rng.random(n))


def _event_ecgs(
    cfg: Config, rng: np.random.Generator, p: Persons
) -> list[tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """ECGs at entry, block onset, third-degree onset, around an implant and at AF onset."""
    v = cfg.value
    out = []
    idx = np.arange(p.n)

    def add(mask: np.ndarray, t: np.ndarray, name: str) -> None:
        out.append((idx[mask], t[mask], np.full(int(mask.sum()), EV[name])))

    u = rng.random((6, p.n))
    add(
        u[0] < v("ecg_timing", "entry_ecg_probability"),
        p.entry + _time_of_day(cfg, rng, p.n),
        "entry",
    )
    onset_p = v("higher_grade", "onset_ecg_probability")
    onset_w = v("ecg_timing", "onset_window_days")
    add(
        np.isfinite(p.hg_onset) & (u[1] < onset_p),
        p.hg_onset + rng.uniform(*onset_w, p.n),
        "block_onset",
    )
    later_third = np.isfinite(p.third_onset) & (p.third_onset > p.hg_onset + 1.0)
    add(
        later_third & (u[2] < onset_p),
        p.third_onset + rng.uniform(*onset_w, p.n),
        "third_degree_onset",
    )
    implant = np.isfinite(p.pm_date) & (p.pm_date >= p.entry)
    pi = v("ecg_timing", "implant_ecg_probability")
    pre = p.pm_date + 0.5 - rng.uniform(*v("ecg_timing", "pre_implant_window_days"), p.n)
    add(implant & (u[3] < pi) & (pre >= p.hg_onset), pre, "pre_implant")
    post = p.pm_date + rng.uniform(*v("ecg_timing", "post_implant_window_days"), p.n)
    add(implant & (u[4] < pi), post, "post_implant")
    af_new = np.isfinite(p.af_onset) & (p.af_onset > p.entry)
    add(
        af_new & (u[5] < v("ecg_timing", "af_onset_ecg_probability")),
        p.af_onset + rng.uniform(0.0, 1.0, p.n),
        "af_onset",
    )
    return out


def _sites(cfg: Config, rng: np.random.Generator, p: Persons, person: np.ndarray) -> np.ndarray:
    """Home site for most ECGs, another site of the network for the rest."""
    away = rng.random(person.size) >= cfg.value("population", "home_site_share")
    other = rng.choice(cfg.sites.name.size, size=person.size, p=cfg.sites.share)
    return np.where(away, other, p.site[person])


# ---------------------------------------------------------------- states


def _states(cfg: Config, rng: np.random.Generator, p: Persons, tr: Tracings) -> None:
    """True rhythm, AV and ventricular conduction category of each tracing."""
    v = cfg.value
    i, t, n = tr.person, tr.t, tr.n
    u = rng.random((8, n))
    ev = tr.event

    implanted = t >= p.pm_date[i] + 0.5
    paced = implanted & (
        (u[0] < v("pacemaker", "paced_ecg_probability")) | (ev == EV["post_implant"])
    )
    af_state = t >= p.af_onset[i]
    af_share = np.where(
        p.af_persistent[i],
        v("hazard", "af", "ecg_share_persistent"),
        v("hazard", "af", "ecg_share_paroxysmal"),
    )
    af_show = af_state & ((u[1] < af_share) | (ev == EV["af_onset"])) & ~paced
    flutter = af_show & (u[2] < v("hazard", "af", "flutter_share"))
    rhythm = np.full(n, R["sinus"])
    rhythm[af_show] = R["atrial_fibrillation"]
    rhythm[flutter] = R["atrial_flutter"]
    rhythm[paced] = R["paced"]
    sinus = rhythm == R["sinus"]

    av = _av_states(cfg, rng, p, tr, sinus, implanted, u)
    junc_u = u[6]
    js, ds = v("measurement", "junctional_share"), v("measurement", "av_dissociation_share")
    plain = sinus & ~np.isin(av, HG_AV)
    junctional = plain & (junc_u < js)
    dissoc = plain & (junc_u >= js) & (junc_u < js + ds)
    rhythm[junctional | dissoc] = R["junctional"]
    av[junctional] = AV["not_assessable"]
    av[dissoc] = AV["av_dissociation"]
    av[~(sinus | dissoc)] = AV["not_assessable"]

    age_factor = np.exp(v("measurement", "blocked_pac_age_log_slope") * (tr.age - 70.0))
    tr.blocked_pac = (
        (rhythm == R["sinus"])
        & ~np.isin(av, HG_AV)
        & (u[7] < v("measurement", "blocked_pac_share") * age_factor)
    )
    third = av == AV["third_degree"]
    tr.escape_ventricular = third & ~p.escape_junctional[i]
    vc = np.where(t >= p.vc_change[i], p.vc1[i], p.vc0[i])
    vc = np.where(paced, VC["paced"], vc)
    vc = np.where(tr.escape_ventricular, VC["not_assessable"], vc)
    dev = p.pm_device[i]
    tr.paced_dual = paced & (dev >= DEVICES.index("dual")) & ~af_state
    tr.rhythm, tr.av, tr.vc = rhythm, av, vc


def _av_states(
    cfg: Config,
    rng: np.random.Generator,
    p: Persons,
    tr: Tracings,
    sinus: np.ndarray,
    implanted: np.ndarray,
    u: np.ndarray,
) -> np.ndarray:
    """AV category for sinus tracings: a visible block episode, else from the true PR."""
    v = cfg.value
    i, t = tr.person, tr.t
    lat = p.pr0[i] + p.pr_slope[i] * (t - p.entry[i]) / YEAR
    pr = lat + rng.normal(0.0, v("pr", "day_sd_ms"), tr.n)
    tr.pr = pr
    av = np.select(
        [
            pr < v("pr", "short_pr_ms"),
            pr <= v("pr", "first_degree_threshold_ms"),
            pr < v("pr", "marked_first_degree_ms"),  # marked from 300 ms inclusive, as default-v1
        ],
        [AV["short_pr"], AV["normal_pr"], AV["first_degree"]],
        AV["marked_first_degree"],
    )
    show_p = v("higher_grade", "ecg_show_probability")
    types = np.maximum(p.hg_type[i], 0)
    p_show = np.array([show_p[k] for k in HG_TYPES])[types]
    forced = np.isin(tr.event, (EV["block_onset"], EV["third_degree_onset"]))
    pre = tr.event == EV["pre_implant"]
    p_show = np.where(pre, np.minimum(1.0, 1.5 * p_show), p_show)
    in_hg = sinus & (t >= p.hg_onset[i]) & ~implanted
    show = in_hg & (forced | (u[3] < p_show))
    av = np.where(show, HG_AV[types], av)
    in_third = sinus & (t >= p.third_onset[i]) & ~implanted
    third_show = in_third & (forced | (u[4] < show_p["third_degree"]))
    av = np.where(third_show, AV["third_degree"], av)
    return av


# ---------------------------------------------------------------- measurements


def draw(rng: np.random.Generator, spec: list, n: int) -> np.ndarray:
    """Draws from a parameter spec ["uniform", lo, hi] or ["normal", mean, sd, lo, hi].

    The normal is truncated to [lo, hi], not clipped: clipping would put an atom of draws
    exactly on the limit, which is a diagnostic threshold for QRS duration and axis.
    """
    if spec[0] == "uniform":
        return rng.uniform(spec[1], spec[2], n)
    return truncated_normal(rng, spec[1], spec[2], spec[3], spec[4], n)


def choose(rng: np.random.Generator, table: dict[str, float], n: int) -> np.ndarray:
    """Numeric keys of ``table`` drawn with its shares (a non-numeric key gives 0.0)."""
    keys = np.array([float(k) if k.replace(".", "").isdigit() else 0.0 for k in table])
    w = np.array(list(table.values()), dtype=float)
    return keys[rng.choice(keys.size, size=n, p=w / w.sum())]


def _rates(cfg: Config, rng: np.random.Generator, p: Persons, tr: Tracings) -> None:
    """True atrial and ventricular rates (bpm); PR only where P waves conduct."""
    v = cfg.value
    r = cfg.params["measurement"]["rates"]

    def rv(key: str):
        return r[key]["value"]

    n = tr.n
    atrial = np.clip(
        p.rate_mean[tr.person] + rng.normal(0.0, v("measurement", "atrial_rate_ecg_sd"), n),
        *rv("atrial_clip"),
    )
    vent = atrial.copy()
    av, rh = tr.av, tr.rhythm
    ratio_i = choose(rng, rv("mobitz_i_group"), n)
    ratio_ii = choose(rng, rv("mobitz_ii_group"), n)
    vent = np.where(av == AV["mobitz_i"], atrial * (ratio_i - 1) / ratio_i, vent)
    vent = np.where(av == AV["mobitz_ii"], atrial * (ratio_ii - 1) / ratio_ii, vent)
    vent = np.where(av == AV["two_to_one"], atrial / 2.0, vent)
    vent = np.where(av == AV["high_grade"], atrial / choose(rng, rv("high_grade_ratio"), n), vent)
    escape = np.where(
        tr.escape_ventricular,
        rng.uniform(*rv("escape_ventricular"), n),
        rng.uniform(*rv("escape_junctional"), n),
    )
    vent = np.where(
        av == AV["third_degree"],
        np.minimum(escape, rv("escape_max_share_of_atrial") * atrial),
        vent,
    )
    vent = np.where(
        av == AV["av_dissociation"],
        atrial * rng.uniform(*rv("accelerated_junctional_ratio"), n),
        vent,
    )
    vent = np.where(tr.blocked_pac, atrial * rv("blocked_pac_vent_factor"), vent)

    junc = (rh == R["junctional"]) & (av == AV["not_assessable"])
    vent = np.where(junc, rng.uniform(*rv("junctional"), n), vent)
    atrial = np.where(junc, np.nan, atrial)
    af = rh == R["atrial_fibrillation"]
    vent = np.where(
        af, np.clip(rng.normal(*v("measurement", "af_ventricular_rate"), n), *rv("af_clip")), vent
    )
    atrial = np.where(af, np.nan, atrial)
    fl = rh == R["atrial_flutter"]
    fl_atrial = rng.uniform(*rv("flutter_atrial"), n)
    fl_ratio = choose(rng, rv("flutter_conduction"), n)
    fl_ratio = np.where(fl_ratio == 0.0, rng.uniform(*rv("flutter_variable_ratio"), n), fl_ratio)
    atrial = np.where(fl, fl_atrial, atrial)
    vent = np.where(fl, fl_atrial / fl_ratio, vent)
    paced = rh == R["paced"]
    lower = rng.choice(np.array(v("measurement", "paced_lower_rate")), size=n, p=[0.7, 0.3])
    af_state = tr.t >= p.af_onset[tr.person]
    vent = np.where(paced, np.where(tr.paced_dual, np.maximum(lower, atrial), lower), vent)
    atrial = np.where(paced & af_state, np.nan, atrial)
    tr.atrial_rate, tr.vent_rate = atrial, vent
    conducts = (rh == R["sinus"]) & ~np.isin(
        av, (AV["third_degree"], AV["not_assessable"], AV["av_dissociation"])
    )
    tr.pr = np.where(conducts, tr.pr, np.nan)


def finish_measurements(cfg: Config, rng: np.random.Generator, p: Persons, tr: Tracings) -> None:
    """True QRS, axes and QT/QTc once the ventricular rate is final (after strips)."""
    v = cfg.value
    r = cfg.params["measurement"]["rates"]
    n = tr.n
    vc_name = np.array(list(VC))[tr.vc]
    qrs, axis = _qrs_and_axis(cfg, rng, p, tr, vc_name)
    tr.qrs, tr.qrs_axis = qrs, axis
    has_p = (
        np.isfinite(tr.atrial_rate)
        & (tr.rhythm != R["atrial_flutter"])
        & ~((tr.rhythm == R["paced"]) & ~tr.paced_dual)
    )
    pm, psd = v("measurement", "p_axis")
    tr.p_axis = np.where(has_p, np.clip(rng.normal(pm, psd, n), *r["p_axis_clip"]["value"]), np.nan)
    tm, tsd = v("measurement", "t_axis")
    discordant = np.isin(vc_name, ("lbbb", "paced")) | tr.escape_ventricular
    t_axis = np.where(discordant, axis + 180.0 + rng.normal(0.0, 20.0, n), rng.normal(tm, tsd, n))
    tr.t_axis = wrap_axis(t_axis)
    qtc_mean = v("measurement", "qtc_mean")
    sexes = p.sex[tr.person]
    base = np.select([sexes == "F", sexes == "M"], [qtc_mean["F"], qtc_mean["M"]], qtc_mean["U"])
    qtc = rng.normal(
        base + r["qtc_age_slope"]["value"] * (tr.age - 50.0), v("measurement", "qtc_sd")
    )
    qtc = qtc + r["qtc_wide_qrs_factor"]["value"] * np.maximum(qrs - 100.0, 0.0)
    rr = 60.0 / tr.vent_rate
    tr.qt = np.clip(qtc * np.sqrt(rr), *r["qt_clip"]["value"])
    tr.qtc = tr.qt / np.sqrt(rr)  # Bazett HC (1920): QTc = QT / sqrt(RR in s)


def wrap_axis(a: np.ndarray) -> np.ndarray:
    """Frontal axis in (-180, 180] degrees."""
    return 180.0 - np.mod(180.0 - a, 360.0)


def _qrs_and_axis(
    cfg: Config, rng: np.random.Generator, p: Persons, tr: Tracings, vc_name: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """QRS duration (ms) and axis (degrees) consistent with the AHA/ACCF/HRS 2009 criteria.

    Surawicz B et al. 2009 (Circulation 119:e235): complete BBB QRS >= 120 ms, incomplete
    110-119 ms, LAFB axis -45 to -90 with QRS < 120, LPFB +90 to +180 with QRS < 120,
    nonspecific IVCD QRS > 110 ms, normal axis -30 to +90 (as quoted in shared/references.md).
    The distributions are in data/parameters.toml [measurement.qrs_ms] / [measurement.qrs_axis].
    """
    n = tr.n
    q = {k: x["value"] for k, x in cfg.params["measurement"]["qrs_ms"].items()}
    a = {k: x["value"] for k, x in cfg.params["measurement"]["qrs_axis"].items()}
    male = p.male[tr.person]
    qm, qsd = cfg.value("measurement", "qrs_normal")
    # Truncated, not clipped: a clipped draw piles about a tenth of men onto the upper limit,
    # 1-2 ms below the nonspecific IVCD threshold (QRS > 110 ms, Surawicz 2009).
    normal_q = truncated_normal(
        rng, qm + cfg.value("measurement", "qrs_male_excess") * male, qsd, *q["normal_clip"], n
    )
    narrow_q = draw(rng, q["narrow_fascicular"], n)
    draws = {"normal": normal_q, "lafb": narrow_q, "lpfb": narrow_q}
    for cat in (
        "incomplete_rbbb",
        "incomplete_lbbb",
        "rbbb",
        "lbbb",
        "bifascicular",
        "nonspecific_ivcd",
        "paced",
    ):
        draws[cat] = draw(rng, q[cat], n)
    draws["not_assessable"] = draw(rng, q["ventricular_escape"], n)
    qrs = np.select([vc_name == k for k in draws], list(draws.values()), normal_q)
    # The person's latent axis lies inside the normal range (population.py); the tracing's
    # axis varies around it, truncated to the same range so no tracing sits on the LPFB limit.
    person_axis = truncated_normal(
        rng, p.axis0[tr.person], a["person_sd"], *a["normal_clip"], n
    )
    lafb_axis = draw(rng, a["lafb"], n)
    lpfb_axis = draw(rng, a["lpfb"], n)
    bif_lpfb = p.axis0[tr.person] > a["bifascicular_lpfb_axis0"]  # a person's bifascicular subtype
    axes = {
        "lafb": lafb_axis,
        "lpfb": lpfb_axis,
        "bifascicular": np.where(bif_lpfb, lpfb_axis, lafb_axis),
        "lbbb": draw(rng, a["lbbb"], n),
        "incomplete_lbbb": draw(rng, a["incomplete_lbbb"], n),
        "paced": draw(rng, a["paced"], n),
        "not_assessable": draw(rng, a["ventricular_escape"], n),
    }
    axis = np.select([vc_name == k for k in axes], list(axes.values()), person_axis)
    return qrs, axis
