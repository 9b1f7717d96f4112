"""Persons and their latent conduction course, vectorized over one block of persons.

Time is in days since 1970-01-01 (float); ``np.inf`` means "not within follow-up".
Hazards are cause-specific and Gompertz in attained age (see data/parameters.toml):
``h(t) = lambda70 * exp(gamma * (age(t) - 70)) * exp(lp)``, sampled by inversion.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from cohort.vocabulary import VENTRICULAR_CONDUCTION
from synthetic_registry.config import Config
from synthetic_registry.sampling import truncated_normal

YEAR = 365.25
VC_CODES: tuple[str, ...] = tuple(VENTRICULAR_CONDUCTION)
VC = {c: i for i, c in enumerate(VC_CODES)}
HG_TYPES: tuple[str, ...] = ("mobitz_i", "mobitz_ii", "two_to_one", "high_grade", "third_degree")
BBB_FOR_HAZARD = np.array([c in ("rbbb", "lbbb", "bifascicular") for c in VC_CODES])
DEVICES: tuple[str, ...] = ("single", "single_rate_responsive", "dual", "crt")
SEXES = np.array(["F", "M", "U"])
END_REASONS = np.array(["death", "moved", "cutoff"])
PM_INDICATIONS = np.array(["", "block", "other", "prevalent"])


@dataclass
class Persons:
    """One block of persons: demography, latent PR, onsets (days) and linear predictors."""

    n: int
    index: np.ndarray
    sex: np.ndarray
    male: np.ndarray
    site: np.ndarray
    entry: np.ndarray
    birth: np.ndarray
    age0: np.ndarray
    pr0: np.ndarray
    pr_slope: np.ndarray
    care: np.ndarray
    rate_mean: np.ndarray
    axis0: np.ndarray
    vc0: np.ndarray
    vc1: np.ndarray
    vc_change: np.ndarray
    af_onset: np.ndarray
    af_persistent: np.ndarray
    first_onset: np.ndarray
    marked_onset: np.ndarray
    hg_onset: np.ndarray
    hg_type: np.ndarray
    advanced_onset: np.ndarray
    third_onset: np.ndarray
    escape_junctional: np.ndarray
    pm_date: np.ndarray
    pm_indication: np.ndarray
    pm_device: np.ndarray
    pm_recorded: np.ndarray
    icd_date: np.ndarray
    death: np.ndarray
    end: np.ndarray
    end_reason: np.ndarray
    lp_hg: np.ndarray
    lp_pmo: np.ndarray
    lp_death: np.ndarray
    lp_af: np.ndarray


def gompertz_years(
    rng: np.random.Generator, lam70: float, gamma: float, age: np.ndarray, lp: np.ndarray
) -> np.ndarray:
    """Years until an event with hazard ``lam70 * exp(gamma*(age+t-70)) * exp(lp)``."""
    e = rng.standard_exponential(age.shape)
    scale = lam70 * np.exp(gamma * (age - 70.0) + lp)
    return np.log1p(gamma * e / scale) / gamma


def _choice(rng: np.random.Generator, shares: dict[str, float], n: int) -> np.ndarray:
    """Indices into ``list(shares)`` drawn with the given shares."""
    p = np.array(list(shares.values()), dtype=float)
    return rng.choice(p.size, size=n, p=p / p.sum())


def simulate_persons(
    cfg: Config, rng: np.random.Generator, first_index: int, n: int, start: float, cutoff: float
) -> Persons:
    """Draw ``n`` persons entering follow-up between ``start`` and ``cutoff`` (days)."""
    v = cfg.value
    sex_i = _choice(rng, v("population", "sex_share"), n)
    sex = SEXES[sex_i]
    male = sex == "M"
    site = rng.choice(cfg.sites.name.size, size=n, p=cfg.sites.share)
    entry = _entry_dates(cfg, rng, n, start, cutoff)
    a, b = v("population", "entry_age_beta")
    lo, hi = v("population", "entry_age_min"), v("population", "entry_age_max")
    age0 = lo + (hi - lo) * rng.beta(a, b, n)
    birth = np.floor(entry - age0 * YEAR)
    age0 = (entry - birth) / YEAR

    pr0, slope = _latent_pr(cfg, rng, sex, age0)
    vc0 = _baseline_vc(cfg, rng, age0, male)
    bbb = BBB_FOR_HAZARD[vc0].astype(float)
    dpr = (pr0 - v("pr", "reference_ms")) / 20.0
    lp = {
        name: v("hazard", name, "log_hr_pr_per_20ms") * dpr
        + v("hazard", name, "log_hr_male") * male
        + v("hazard", name, "log_hr_bbb") * bbb
        for name in ("higher_grade", "pacemaker_other", "death")
    }
    lp_af = v("hazard", "af", "log_hr_pr_per_20ms") * dpr + v("hazard", "af", "log_hr_male") * male

    p = Persons(
        n=n,
        index=np.arange(first_index, first_index + n, dtype=np.int64),
        sex=sex,
        male=male,
        site=site,
        entry=entry,
        birth=birth,
        age0=age0,
        pr0=pr0,
        pr_slope=slope,
        care=rng.gamma(
            v("ecg_timing", "care_gamma_shape"), 1.0 / v("ecg_timing", "care_gamma_shape"), n
        ),
        rate_mean=rng.normal(*v("measurement", "atrial_rate_person"), n),
        axis0=_person_axis(cfg, rng, age0),
        vc0=vc0,
        vc1=vc0.copy(),
        vc_change=np.full(n, np.inf),
        af_onset=np.full(n, np.inf),
        af_persistent=rng.random(n) < v("hazard", "af", "persistent_share"),
        first_onset=np.full(n, np.inf),
        marked_onset=np.full(n, np.inf),
        hg_onset=np.full(n, np.inf),
        hg_type=np.full(n, -1, dtype=np.int64),
        advanced_onset=np.full(n, np.inf),
        third_onset=np.full(n, np.inf),
        escape_junctional=rng.random(n) < v("higher_grade", "junctional_escape_share"),
        pm_date=np.full(n, np.inf),
        pm_indication=np.zeros(n, dtype=np.int64),
        pm_device=np.full(n, -1, dtype=np.int64),
        pm_recorded=rng.random(n) >= v("pacemaker", "procedure_missing_share"),
        icd_date=np.full(n, np.inf),
        death=np.full(n, np.inf),
        end=np.zeros(n),
        end_reason=np.zeros(n, dtype=np.int64),
        lp_hg=lp["higher_grade"],
        lp_pmo=lp["pacemaker_other"],
        lp_death=lp["death"],
        lp_af=lp_af,
    )
    _course(cfg, rng, p, cutoff)
    return p


def _entry_dates(
    cfg: Config, rng: np.random.Generator, n: int, start: float, cutoff: float
) -> np.ndarray:
    """Entry day: a share already in care in the first year, the rest uniform over the window."""
    early = rng.random(n) < cfg.value("population", "entry_in_first_year_share")
    last = cutoff - 30.0
    day = np.where(early, start + rng.uniform(0.0, 365.0, n), rng.uniform(start, last, n))
    return np.floor(np.minimum(day, last))


def _latent_pr(
    cfg: Config, rng: np.random.Generator, sex: np.ndarray, age0: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Latent PR at entry (ms) and its yearly drift (ms/year)."""
    v = cfg.value
    means = v("pr", "mean_at_50")
    base = np.select([sex == "F", sex == "M"], [means["F"], means["M"]], means["U"])
    slope_pop = v("pr", "age_slope_ms_per_year")
    mu = base + slope_pop * (age0 - 50.0)
    sigma = v("pr", "lognormal_sigma")
    pr = mu * np.exp(rng.normal(-0.5 * sigma**2, sigma, age0.size))
    share = v("pr", "disease_share_at_70") * np.exp(
        v("pr", "disease_age_log_slope") * (age0 - 70.0)
    )
    diseased = rng.random(age0.size) < np.minimum(share, 0.5)
    k, theta = v("pr", "disease_excess_gamma")
    pr = pr + diseased * rng.gamma(k, theta, age0.size)
    slope = slope_pop + rng.normal(0.0, v("pr", "drift_sd_ms_per_year"), age0.size)
    return pr, slope


def _person_axis(cfg: Config, rng: np.random.Generator, age0: np.ndarray) -> np.ndarray:
    """A person's frontal QRS axis with normal conduction (degrees), leftward with age.

    Truncated to the normal range of [measurement.qrs_axis] normal_clip: an axis beyond +90
    with a narrow QRS meets the LPFB criteria (Surawicz 2009), so a person of category
    "normal" cannot have one. Clipping instead would leave about one person in ten a degree
    below +90, read as LPFB on half of their tracings once measurement noise is added.
    """
    mean, sd = cfg.value("measurement", "qrs_axis_normal")
    slope = cfg.value("measurement", "qrs_axis_age_slope")
    lo, hi = cfg.params["measurement"]["qrs_axis"]["normal_clip"]["value"]
    return truncated_normal(rng, mean + slope * (age0 - 50.0), sd, lo, hi, age0.size)


def _baseline_vc(
    cfg: Config, rng: np.random.Generator, age0: np.ndarray, male: np.ndarray
) -> np.ndarray:
    """Ventricular conduction category at entry (index into VC_CODES)."""
    table = cfg.value("ventricular_conduction", "baseline")
    names = list(table)
    probs = np.stack(
        [
            table[c][0] * np.exp(table[c][1] * (age0 - 70.0)) * np.where(male, table[c][2], 1.0)
            for c in names
        ],
        axis=1,
    )
    total = probs.sum(axis=1, keepdims=True)
    probs = np.where(total > 0.6, probs * 0.6 / total, probs)
    cum = np.cumsum(probs, axis=1)
    u = rng.random(age0.size)[:, None]
    pick = (u > cum).sum(axis=1)
    codes = np.array([VC[c] for c in names] + [VC["normal"]])
    return codes[pick]


def _course(cfg: Config, rng: np.random.Generator, p: Persons, cutoff: float) -> None:
    """Fill onsets, pacemaker, death and follow-up end (days), in place."""
    v = cfg.value
    n = p.n
    prevalent_pm = rng.random(n) < np.minimum(
        v("pacemaker", "prevalent_at_70")
        * np.exp(v("pacemaker", "prevalent_age_log_slope") * (p.age0 - 70.0)),
        0.3,
    )
    t_hg = _hazard_years(cfg, rng, "higher_grade", p.age0, p.lp_hg)
    t_pmo = _hazard_years(cfg, rng, "pacemaker_other", p.age0, p.lp_pmo)
    t_hg[prevalent_pm] = np.inf
    t_pmo[prevalent_pm] = np.inf
    lp_d0 = p.lp_death + np.log(v("hazard", "death", "hr_after_pacemaker")) * prevalent_pm
    t_d = _hazard_years(cfg, rng, "death", p.age0, lp_d0)

    # Higher-grade block (second degree or worse) as the first event before death.
    hg = (t_hg < t_pmo) & (t_hg < t_d)
    hg_type = _choice(rng, v("higher_grade", "type_share"), n)
    t_pm, t_third, indication = _after_block(cfg, rng, hg, hg_type, t_hg)
    pmo = (t_pmo <= t_hg) & (t_pmo < t_d)
    t_pm = np.where(pmo, t_pmo, t_pm)
    indication = np.where(pmo, 2, indication)

    # Death hazard changes after block or implant: redraw the residual time from then on.
    t_d = _redraw_death(cfg, rng, p, t_d, hg, t_hg, v("hazard", "death", "hr_after_higher_grade"))
    t_d = _redraw_death(cfg, rng, p, t_d, pmo, t_pmo, v("hazard", "death", "hr_after_pacemaker"))

    t_move = rng.standard_exponential(n) / v("population", "move_away_rate")
    t_cut = (cutoff - p.entry) / YEAR
    t_end = np.minimum(np.minimum(t_d, t_move), t_cut)
    p.end_reason = np.select([t_d <= t_end, t_move <= t_end], [0, 1], 2)
    p.end = np.floor(p.entry + t_end * YEAR)
    p.death = np.where(p.end_reason == 0, p.end, np.inf)

    def seen(t_years: np.ndarray) -> np.ndarray:
        day = p.entry + t_years * YEAR
        return np.where(t_years <= t_end, day, np.inf)

    p.hg_onset = seen(np.where(hg, t_hg, np.inf))
    p.hg_type = np.where(np.isfinite(p.hg_onset), hg_type, -1)
    p.third_onset = seen(t_third)
    adv = np.where(hg_type == HG_TYPES.index("mobitz_i"), t_third, t_hg)
    p.advanced_onset = seen(np.where(hg, adv, np.inf))
    pm_day = seen(t_pm)
    prev_day = p.entry - rng.uniform(0.1, 8.0, n) * YEAR
    p.pm_date = np.where(prevalent_pm, np.floor(prev_day), np.floor(pm_day))
    p.pm_indication = np.where(prevalent_pm, 3, np.where(np.isfinite(p.pm_date), indication, 0))
    p.pm_device = _devices(cfg, rng, p)
    p.icd_date = np.floor(seen(_icd_years(cfg, rng, p)))
    p.icd_date[np.isfinite(p.pm_date) & (p.pm_date <= p.icd_date)] = np.inf
    _pr_onsets(cfg, p, t_end)
    _vc_change(cfg, rng, p, t_end)
    _af(cfg, rng, p, t_end)


def _hazard_years(
    cfg: Config, rng: np.random.Generator, name: str, age: np.ndarray, lp: np.ndarray
) -> np.ndarray:
    return gompertz_years(
        rng, cfg.value("hazard", name, "lambda70"), cfg.value("hazard", name, "gamma"), age, lp
    )


def _after_block(
    cfg: Config, rng: np.random.Generator, hg: np.ndarray, hg_type: np.ndarray, t_hg: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Implant time, third-degree onset (years) and indication code after a block onset."""
    v = cfg.value
    n = hg.size
    names = list(HG_TYPES)
    p_impl = np.array([v("higher_grade", "implant_probability")[k] for k in names])[hg_type]
    med = np.array([v("higher_grade", "implant_delay_median_days")[k] for k in names])
    sd = v("higher_grade", "implant_delay_log_sd")
    prog = v("higher_grade", "progression_to_third_per_year")
    rate = np.array([prog.get(k, 0.0) for k in names])[hg_type]
    third = hg_type == names.index("third_degree")
    with np.errstate(divide="ignore"):
        t_prog = np.where(third, 0.0, rng.standard_exponential(n) / rate)
    t_third = np.where(hg, t_hg + t_prog, np.inf)
    delay1 = med[hg_type] * np.exp(rng.normal(0.0, sd, n)) / YEAR
    t_pm = np.where(hg & (rng.random(n) < p_impl), t_hg + delay1, np.inf)
    delay3 = med[names.index("third_degree")] * np.exp(rng.normal(0.0, sd, n)) / YEAR
    after_third = np.where(
        (t_third < t_pm)
        & (rng.random(n) < v("higher_grade", "implant_probability")["third_degree"]),
        t_third + delay3,
        np.inf,
    )
    t_pm = np.minimum(t_pm, after_third)
    t_third = np.where(t_third < t_pm, t_third, np.inf)  # a pacemaker masks later block
    return t_pm, t_third, np.where(np.isfinite(t_pm), 1, 0)


def _redraw_death(
    cfg: Config,
    rng: np.random.Generator,
    p: Persons,
    t_d: np.ndarray,
    mask: np.ndarray,
    t_event: np.ndarray,
    hr: float,
) -> np.ndarray:
    """Residual time to death from ``t_event`` with the hazard multiplied by ``hr``."""
    idx = np.flatnonzero(mask & (t_event < t_d))
    if idx.size == 0:
        return t_d
    age = p.age0[idx] + t_event[idx]
    extra = _hazard_years(cfg, rng, "death", age, p.lp_death[idx] + np.log(hr))
    out = t_d.copy()
    out[idx] = t_event[idx] + extra
    return out


def _icd_years(cfg: Config, rng: np.random.Generator, p: Persons) -> np.ndarray:
    v = cfg.value
    lp = v("hazard", "defibrillator", "log_hr_male") * p.male
    return gompertz_years(
        rng,
        v("hazard", "defibrillator", "lambda70"),
        v("hazard", "defibrillator", "gamma"),
        p.age0,
        lp,
    )


def _devices(cfg: Config, rng: np.random.Generator, p: Persons) -> np.ndarray:
    """Pacemaker device type index (into DEVICES); single chamber where AF is persistent."""
    block = _choice(rng, cfg.value("pacemaker", "device_share_block"), p.n)
    other = _choice(rng, cfg.value("pacemaker", "device_share_other"), p.n)
    dev = np.where(p.pm_indication == 1, block, other)
    dev = np.where(np.isfinite(p.pm_date), dev, -1)
    return dev


def _pr_onsets(cfg: Config, p: Persons, t_end: np.ndarray) -> None:
    """Days when the latent PR first exceeds the first-degree and marked thresholds."""
    for attr, key in (
        ("first_onset", "first_degree_threshold_ms"),
        ("marked_onset", "marked_first_degree_ms"),
    ):
        thr = cfg.value("pr", key)
        with np.errstate(divide="ignore", invalid="ignore"):
            t = np.where(
                p.pr0 > thr, 0.0, np.where(p.pr_slope > 0, (thr - p.pr0) / p.pr_slope, np.inf)
            )
        setattr(p, attr, np.where(t <= t_end, p.entry + t * YEAR, np.inf))


def _vc_change(cfg: Config, rng: np.random.Generator, p: Persons, t_end: np.ndarray) -> None:
    """At most one move to a new or worse ventricular conduction category."""
    v = cfg.value
    t = gompertz_years(
        rng,
        v("ventricular_conduction", "change_rate_at_70"),
        v("ventricular_conduction", "change_age_log_slope"),
        p.age0,
        np.zeros(p.n),
    )
    table = v("ventricular_conduction", "change_to")
    new = p.vc0.copy()
    can = np.zeros(p.n, dtype=bool)
    for src, targets in table.items():
        m = p.vc0 == VC[src]
        if not m.any():
            continue
        names = list(targets)
        pick = _choice(rng, targets, int(m.sum()))
        new[m] = np.array([VC[c] for c in names])[pick]
        can |= m
    ok = can & (t <= t_end)
    p.vc1 = np.where(ok, new, p.vc0)
    p.vc_change = np.where(ok, p.entry + t * YEAR, np.inf)


def _af(cfg: Config, rng: np.random.Generator, p: Persons, t_end: np.ndarray) -> None:
    """Atrial fibrillation: prevalent at entry (onset = entry) or incident."""
    v = cfg.value
    prev = rng.random(p.n) < np.minimum(
        v("hazard", "af", "prevalent_at_70")
        * np.exp(v("hazard", "af", "prevalent_age_log_slope") * (p.age0 - 70.0)),
        0.4,
    )
    t = _hazard_years(cfg, rng, "af", p.age0, p.lp_af)
    t = np.where(prev, 0.0, t)
    p.af_onset = np.where(t <= t_end, p.entry + t * YEAR, np.inf)
