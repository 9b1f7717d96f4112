"""The report's methods text, generated from the spec: each method named with its reference.

:func:`methods_sections` returns (heading, paragraph) pairs in plain text with citation keys
as ``[key]``; :func:`cite` turns a paragraph into HTML with author-year links to the reference
list (``references.toml``), and :func:`references_used` lists the cited entries in order.
Text is built from the spec's own settings (population, exclusions, follow-up, each
analysis's options), so the paragraph changes when the spec does.
"""

from __future__ import annotations

import html
import re
import tomllib
from pathlib import Path
from typing import Any

from cohort.study.spec import Spec

REFERENCES_FILE = Path(__file__).resolve().parent / "references.toml"
REFERENCES: dict[str, str] = tomllib.loads(REFERENCES_FILE.read_text(encoding="utf-8"))["refs"]
_CITE = re.compile(r"\[([a-z0-9]+)\]")
STANDARD_REFS = {"who_2000_2025": ("WHO World Standard 2000-2025", "ahmad2001"),
                 "european_2013": ("European Standard Population 2013", "eurostat2013"),
                 "us_2000": ("US 2000 standard population", "klein2001")}
INTERVAL_REFS = {"wilson": ("Wilson score", "wilson1927"),
                 "clopper_pearson": ("Clopper-Pearson exact", "clopper1934")}


def _words(items: list[str]) -> str:
    if len(items) <= 1:
        return "".join(items)
    return ", ".join(items[:-1]) + " and " + items[-1]


def _pct(alpha: float) -> str:
    return f"{100 * (1 - alpha):g}%"


def population_text(spec: Spec) -> str:
    """Who entered, the index date, the exclusions and follow-up, in words."""
    pop = spec.population
    index = {"first_ecg": "each person's first ECG",
             "first_assessable_pr": "each person's first ECG with a measurable PR interval "
                                    "(1:1 AV conduction)",
             "first_ecg_in_window": "each person's first ECG inside the index window"}[pop.index]
    parts = [f"The index date was the date of {index}; persons aged {pop.age_from}"
             + (f" to {pop.age_below - 1}" if pop.age_below else " or more")
             + " (completed years) at index entered"]
    if pop.calendar_window:
        parts.append(f" if the index fell between {pop.calendar_window[0]} and {pop.calendar_window[1]}")
    text = "".join(parts) + ". "
    excl = [k.replace("_", " ") for k, _ in spec.main.exclusions]
    if excl:
        text += f"Exclusions were applied in this order: {_words(excl)}. "
    text += ("The flow of persons is shown as a STROBE-style diagram [vonelm2007], each person "
             "counted at the first criterion they failed. ")
    fu = spec.follow_up
    if spec.endpoints:
        text += ("Follow-up ran from index on the "
                 + ("attained-age scale with late entry" if fu.time_scale == "age" else "time-since-index scale")
                 + (f", events in the first {fu.lag_days} days not counted" if fu.lag_days else "")
                 + (f", for at most {fu.horizon_days / 365.25:g} years" if fu.horizon_days else "")
                 + (f", until {fu.end_date} at the latest" if fu.end_date else "")
                 + "; it ended at death, moving away or the data cut-off. ")
        comp = sorted({c for e in spec.endpoints.values() for c in e.competing})
        if comp:
            text += f"{_words(comp).capitalize()} was treated as a competing event where declared. "
    if len(spec.variants) > 1:
        text += ("Sensitivity variants were run beside the main analysis: "
                 + "; ".join(f"{v.name} ({v.description})" for v in spec.variants[1:]) + ". ")
    return text.strip()


def _prevalence(o: dict[str, Any]) -> str:
    methods = [f"{INTERVAL_REFS[m][0]} [{INTERVAL_REFS[m][1]}]" for m in o.get("methods", [])]
    basis = "on the index ECG" if o.get("basis") == "index" else "on each person's first ECG of each calendar year"
    text = (f"Prevalence of each category {basis} is the share of persons with it (the "
            f"categories of an axis add up to all persons), with {_words(methods)} "
            f"{_pct(o.get('alpha', 0.05))} intervals, overall, by sex, by age band and by age "
            "band and sex.")
    stds = o.get("standards", [])
    if stds:
        named = [f"the {STANDARD_REFS[s][0]} [{STANDARD_REFS[s][1]}]" for s in stds]
        text += (f" Direct age standardization used {_words(named)}, restricted to the study "
                 "ages, with gamma-distribution intervals [fay1997].")
    if o.get("trend"):
        text += (" Trends across calendar years are annual percent changes from modified Poisson "
                 "regression with robust variance [zou2004]."
                 if o.get("trend_method", "poisson") == "poisson" else
                 " Trends across calendar years are annual percent changes from log-binomial regression.")
    return text


def _incidence(o: dict[str, Any]) -> str:
    per = o.get("per", 1000)
    text = (f"Incidence rates are events per {per:,g} person-years with exact Poisson limits "
            "[garwood1936]; attained-age bands split each person's follow-up at birthdays "
            "(Lexis expansion).")
    if o.get("ratios"):
        text += (" Rate ratios compare each group with its reference with exact conditional "
                 "limits given the total count [breslow1987]."
                 if o.get("ratio_method", "exact") == "exact" else
                 " Rate ratios have Wald limits on the log scale.")
    return text


def _table_one(o: dict[str, Any]) -> str:
    return ("Baseline characteristics are means (SD), medians (quartiles) or counts (%) by "
            f"{o.get('group', 'group')}, with standardized mean differences against the "
            "reference group [austin2009].")


def _km(o: dict[str, Any]) -> str:
    return ("Event-free survival was estimated by Kaplan-Meier [kaplan1958] with Greenwood "
            f"variance [greenwood1926] and {o.get('ci', 'log-log')} intervals; under competing "
            "death 1 minus Kaplan-Meier overstates the risk and is shown only beside the "
            "cumulative incidence.")


def _cif(o: dict[str, Any]) -> str:
    return ("Cumulative incidence with death as a competing event was estimated by "
            "Aalen-Johansen [aalen1978], groups compared with Gray's test [gray1988].")


def _cox(o: dict[str, Any]) -> str:
    ties = o.get("ties", "efron")
    text = ("Cause-specific hazard ratios come from Cox regression [cox1972] with "
            + ("Efron's handling of tied event times [efron1977]" if ties == "efron" else "Breslow ties")
            + ("" if not o.get("robust") else ", robust (sandwich) variance")
            + "; proportional hazards were checked with scaled Schoenfeld residuals [grambsch1994].")
    if o.get("exposure") == "spline" or o.get("knots") or o.get("n_knots"):
        text += " PR entered as a restricted cubic spline with knots at fixed quantiles [harrell2015]."
    return text


def _fine_gray(o: dict[str, Any]) -> str:
    return ("Subdistribution hazard ratios come from the Fine-Gray model [fine1999], in the "
            "weighted counting-process form that also allows left truncation [geskus2011], with "
            "robust variance.")


def _time_updated(o: dict[str, Any]) -> str:
    return ("PR as a time-updated covariate, carried forward from each ECG, entered a Cox model "
            "in counting-process form [andersen1982] [cox1972] with Efron ties [efron1977] and "
            "variance robust to repeated intervals of one person.")


def _interval(o: dict[str, Any]) -> str:
    return ("Because a block is seen only when an ECG is taken, onset is interval-censored "
            "between the last ECG without and the first ECG with it; the nonparametric maximum "
            "likelihood estimate [turnbull1976] is shown beside Kaplan-Meier and Aalen-Johansen.")


def _multistate(o: dict[str, Any]) -> str:
    return ("Movement between conduction states was described by a multi-state model: transition "
            "counts, Nelson-Aalen hazards and Aalen-Johansen state occupation probabilities "
            "[aalen1978] with bootstrap intervals over persons.")


def _absolute(o: dict[str, Any]) -> str:
    return ("Absolute risks for covariate profiles combine the cause-specific Cox models of the "
            "event and of death [cox1972].")


def _landmark(o: dict[str, Any]) -> str:
    return ("Landmark analyses refit Cox models [cox1972] among persons still at risk at each "
            "landmark, with PR and events measured at the landmark.")


def _site_quality(o: dict[str, Any]) -> str:
    period = o.get("period")
    window = f" from {period[0]} to {period[1]}" if period else ""
    return (f"Event rates per site{window} were compared with the network rate in funnel plots "
            "with exact Poisson 95% and 99.8% limits [spiegelhalter2005]; rates per calendar "
            f"{o.get('interval', 'quarter').replace('_', ' ')} were followed on u-charts with "
            f"limits at {o.get('sigma', 3):g} standard errors [montgomery]. Limits are for "
            "screening: overdispersion between sites is not modelled.")


KIND_TEXT = {"prevalence": _prevalence, "incidence": _incidence, "table_one": _table_one,
             "kaplan_meier": _km, "cumulative_incidence": _cif, "cox": _cox,
             "fine_gray": _fine_gray, "time_updated_cox": _time_updated,
             "interval_censored": _interval, "multistate": _multistate,
             "absolute_risk": _absolute, "landmark": _landmark, "site_quality": _site_quality}


def disclosure_text(enabled: bool, threshold: int) -> str:
    """The disclosure rule, as the methods section states it."""
    if not enabled:
        return ("Disclosure control was switched off for this run: tables hold exact small "
                "counts and are for internal use inside the analysis environment only.")
    return (f"Before export, counts of 1 to {threshold - 1} persons or events were suppressed, "
            "with the estimates computed from them, and further cells were suppressed so that "
            "no suppressed count can be recovered by subtraction from published totals, "
            "margins or sensitivity variants (cell suppression [hundepool2012]). Curves are "
            f"published at points where at least {threshold} events have accumulated.")


def methods_sections(spec: Spec, *, disclosure: bool = True, threshold: int = 11) -> list[tuple[str, str]]:
    """(heading, paragraph with [key] citations) for the population, each analysis kind, disclosure."""
    out = [("Population and follow-up", population_text(spec))]
    seen: dict[str, None] = {}
    for a in spec.analyses:
        fn = KIND_TEXT.get(a.kind)
        if fn is None:
            continue
        text = fn(a.options)
        if text in seen:
            continue
        seen[text] = None
        out.append((a.name.replace("_", " ").capitalize(), text))
    out.append(("Disclosure control", disclosure_text(disclosure, threshold)))
    return out


def _short(key: str) -> str:
    """Author-year label of a reference entry: 'Fine & Gray 1999', 'Ahmad et al. 2001'."""
    entry = REFERENCES[key]
    authors = entry.split(".")[0]
    years = re.findall(r"\b(?:19|20)\d\d\b", entry)  # the last one is the publication year
    names = [" ".join(t for t in a.split() if not (t.isupper() and len(t) <= 3) and t != "Jr")
             for a in authors.split(",") if a.strip()]
    if "et al" in authors or len(names) > 2:
        label = f"{names[0]} et al."
    elif len(names) == 2:
        label = f"{names[0]} & {names[1]}"
    else:
        label = names[0] if names else key
    return f"{label} {years[-1]}" if years else label


def cite(text: str) -> str:
    """HTML of a paragraph: [key] -> (Author year) linked to the reference list."""
    escaped = html.escape(text)
    return _CITE.sub(lambda m: f'(<a href="#ref-{m[1]}">{html.escape(_short(m[1]))}</a>)'
                     if m[1] in REFERENCES else m[0], escaped)


def references_used(sections: list[tuple[str, str]]) -> list[tuple[str, str]]:
    """(key, entry) of every reference cited in ``sections``, in order of first citation."""
    keys: dict[str, None] = {}
    for _h, text in sections:
        for key in _CITE.findall(text):
            if key in REFERENCES:
                keys[key] = None
    return [(k, REFERENCES[k]) for k in keys]


__all__ = ["REFERENCES", "cite", "disclosure_text", "methods_sections", "population_text",
           "references_used"]
