"""Study specs: parse and validate a study TOML file into a frozen :class:`Spec`.

A spec names the rule set, the population (index event, age, sex, sites, calendar window),
exclusions (applied in the order written), the exposure, follow-up rules, endpoints with their
competing and censoring events, covariates, sensitivity variants and the analyses to run.
Every key is documented in ``docs/study-spec.md``. Any problem raises
:class:`cohort.errors.SpecError` naming the key, the line of the file and the nearest valid
key, or, for impossible combinations, the reason and the fix.
"""

from __future__ import annotations

import copy
import datetime as dt
import hashlib
import re
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from cohort.errors import RuleSetError, SpecError
from cohort.study.schema import (
    REQUIRED,
    Key,
    KeyPath,
    SpecSource,
    check_table,
    date_window,
    distinct,
    dotted,
    increasing,
    nearest,
    non_negative,
    positive,
)
from cohort.vocabulary import AV_CATEGORIES, AV_GRADE, SEXES

INDEX_KINDS = ("first_ecg", "first_assessable_pr", "first_ecg_in_window")
EXPOSURE_KINDS = ("pr_category", "pr_percentile", "pr_continuous", "pr_spline", "pr_time_updated")
CATEGORICAL_EXPOSURES = ("pr_category", "pr_percentile")
MEASURES = ("pr", "pr_corrected")
CORRECTION_FORMULAS = ("linear", "regression")
TIME_SCALES = ("time_since_index", "age")
HIGHER_GRADE_SOURCES = ("ecg", "diagnosis", "either")

#: AV categories with 1:1 conduction, where the PR interval is a measurement of AV conduction
#: (grades 0 and 1 of the project vocabulary): the only ones a PR exposure is read from.
PR_MEASURABLE_CATEGORIES: tuple[str, ...] = tuple(c for c, g in AV_GRADE.items() if g in (0, 1))

#: Event kinds an endpoint can be built from, with the sources each has (sql/study/person_event.sql).
EVENT_SOURCES: dict[str, tuple[str, ...]] = {
    "first_degree_block": ("ecg", "diagnosis"),
    "higher_grade_block": ("ecg", "diagnosis"),
    "third_degree_block": ("ecg", "diagnosis"),
    "av_block": ("ecg", "diagnosis"),
    "pacemaker": ("procedure", "ecg"),
    "death": ("registry",),
}
DEFAULT_SOURCE = {
    "first_degree_block": "ecg",
    "higher_grade_block": "ecg",
    "third_degree_block": "ecg",
    "av_block": "ecg",
    "pacemaker": "any",
    "death": "registry",
}
ALL_SOURCES = ("either", "any")  # both mean: the earliest date of every source of the kind

COVARIATES_FILE = Path(__file__).resolve().parent / "covariates.toml"


def _load_covariates(path: Path = COVARIATES_FILE) -> dict[str, dict[str, Any]]:
    """The covariate catalogue (cohort/study/covariates.toml): name -> kind, description, ..."""
    return tomllib.loads(path.read_text(encoding="utf-8"))


COVARIATE_CATALOGUE: dict[str, dict[str, Any]] = _load_covariates()
#: Covariates measured at index and their kind (categorical or continuous).
COVARIATES: dict[str, str] = {name: c["kind"] for name, c in COVARIATE_CATALOGUE.items()}
DEFAULT_PR_LEVELS: dict[str, tuple[str, ...]] = {
    "short_pr": ("short_pr",),
    "normal_pr": ("normal_pr",),
    "first_degree": ("first_degree", "marked_first_degree"),
}
DAYS_PER_YEAR = 365.25
_NAME = re.compile(r"^[a-z][a-z0-9_]*$")
_STUDY_ID = re.compile(r"^[a-z][a-z0-9_\-]*$")
_NUM = (int, float)


def _higher_grade_value(value: Any) -> str | None:
    if isinstance(value, str) and value not in HIGHER_GRADE_SOURCES:
        return f"must be true, false or one of {', '.join(HIGHER_GRADE_SOURCES)}, got {value!r}"
    return None


def _percentiles(value: list) -> str | None:
    problem = increasing(value)
    if problem:
        return problem
    return None if all(0 < v < 100 for v in value) else "must lie strictly between 0 and 100"


def _knots(value: list) -> str | None:
    if len(value) < 3:
        return f"needs at least 3 knots for a restricted cubic spline, got {len(value)}"
    return increasing(value)


def _per_value(value: Any) -> str | None:
    if isinstance(value, str):
        return None if value == "sd" else f"must be a number of ms or \"sd\", got {value!r}"
    return positive(value)


def _age(value: Any) -> str | None:
    return None if 0 <= value <= 130 else f"must be an age in years (0-130), got {value}"


SCHEMA_STUDY: dict[str, Key] = {
    "id": Key((str,), REQUIRED, doc="short identifier of the study",
              check=lambda v: None if _STUDY_ID.match(v)
              else "must be lower-case letters, digits, '_' or '-', starting with a letter"),
    "title": Key((str,), "", doc="one-line title"),
    "description": Key((str,), "", doc="free text"),
    "rule_set": Key((str,), "default-v1", doc="phenotype rule set id (cohort/rules) or a path"),
    "seed": Key((int,), 0, doc="seed of any random step (numpy Generator)", check=non_negative),
}
SCHEMA_POPULATION: dict[str, Key] = {
    "index": Key((str,), "first_ecg", INDEX_KINDS, "index event"),
    "index_window": Key((list,), None, items=(dt.date,), check=date_window,
                        doc="[start, end] dates of first_ecg_in_window"),
    "calendar_window": Key((list,), None, items=(dt.date,), check=date_window,
                           doc="[start, end]: the index date must fall inside"),
    "age_from": Key((int,), 18, doc="youngest age at index (completed years)", check=_age),
    "age_below": Key((int,), None, doc="age at index must be below this (completed years)",
                     check=_age),
    "sex": Key((list,), None, tuple(SEXES), "sexes included", items=(str,), check=distinct),
    "sites": Key((list,), None, doc="sites included (person's site)", items=(str,), check=distinct),
}
SCHEMA_EXCLUSIONS: dict[str, Key] = {
    "pacemaker_before_index": Key((bool,), False, doc="pacemaker on or before the index date"),
    "higher_grade_before_index": Key((bool, str), False, check=_higher_grade_value,
                                     doc="higher-grade AV block on or before index (source)"),
    "af_at_index": Key((bool,), False, doc="atrial fibrillation on the index ECG"),
    "qrs_at_least_ms": Key(_NUM, None, check=positive, doc="QRS >= this on the index ECG"),
    "min_followup_days": Key((int,), None, check=positive,
                             doc="fewer than this many days of possible follow-up"),
}
SCHEMA_CORRECTION: dict[str, Key] = {
    "formula": Key((str,), REQUIRED, CORRECTION_FORMULAS, "linear or regression"),
    "slope_ms_per_bpm": Key(_NUM, None, doc="dPR/dHR for the linear formula"),
    "reference_hr_bpm": Key(_NUM, 60, check=positive, doc="heart rate PR is corrected to"),
}
SCHEMA_EXPOSURE: dict[str, Key] = {
    "kind": Key((str,), REQUIRED, EXPOSURE_KINDS, "how PR enters the analyses"),
    "measure": Key((str,), "pr", MEASURES, "pr or pr_corrected (heart-rate corrected)"),
    "levels": Key((dict,), None, doc="pr_category: level name -> list of AV categories"),
    "reference": Key((str, int, float), None, doc="reference level (or value for pr_spline)"),
    "percentiles": Key((list,), [20, 80], items=_NUM, check=_percentiles,
                       doc="pr_percentile: cut points, sex-specific"),
    "per": Key((int, float, str), 20, check=_per_value, doc="ms per unit, or \"sd\""),
    "center": Key(_NUM, 160, doc="PR value (ms) where the continuous exposure is 0"),
    "knots": Key((list,), None, items=_NUM, check=_knots, doc="pr_spline knots (ms)"),
    "n_knots": Key((int,), 4, (3, 4, 5, 6, 7), "pr_spline: knots at Harrell's quantiles"),
    "correction": Key((dict,), None, doc="heart-rate correction of PR"),
}
SCHEMA_FOLLOW_UP: dict[str, Key] = {
    "time_scale": Key((str,), "time_since_index", TIME_SCALES, "time since index or age"),
    "lag_days": Key((int,), 0, check=non_negative, doc="events in the first N days do not count"),
    "horizon_years": Key(_NUM, None, check=positive, doc="follow-up stops this long after index"),
    "end_date": Key((dt.date,), None, doc="administrative end of follow-up"),
}
SCHEMA_ENDPOINT: dict[str, Key] = {
    "event": Key((str,), None, tuple(EVENT_SOURCES), "event kind"),
    "source": Key((str,), None, doc="source of the event date"),
    "any_of": Key((list,), None, items=(str,), check=distinct, doc="composite of endpoints"),
    "competing": Key((list,), [], items=(str,), check=distinct, doc="competing endpoints"),
    "censor_at": Key((list,), [], items=(str,), check=distinct, doc="endpoints that censor"),
    "description": Key((str,), "", doc="free text"),
}
SCHEMA_COVARIATES: dict[str, Key] = {
    "at_index": Key((list,), [], tuple(COVARIATES), "covariates measured at index", items=(str,),
                    check=distinct),
}
SCHEMA_VARIANT: dict[str, Key] = {
    "description": Key((str,), "", doc="what the variant changes"),
    "rule_set": Key((str,), None, doc="alternative rule set"),
    "lag_days": Key((int,), None, check=non_negative, doc="alternative lag"),
    "horizon_years": Key(_NUM, None, check=positive, doc="alternative horizon"),
    "exclusions": Key((dict,), None, doc="exclusions added to (or switched off in) the main ones"),
}
SCHEMA_TOP: dict[str, Key] = {
    "study": Key((dict,), REQUIRED, doc="[study] table"),
    "population": Key((dict,), {}),
    "exclusions": Key((dict,), {}),
    "exposure": Key((dict,), None),
    "follow_up": Key((dict,), {}),
    "endpoints": Key((dict,), {}),
    "covariates": Key((dict,), {}),
    "variants": Key((dict,), {}),
    "analyses": Key((list,), REQUIRED, doc="at least one [[analyses]] table"),
}


# --------------------------------------------------------------------------- frozen results


@dataclass(frozen=True)
class Population:
    """Who enters the study and on which date (the index date)."""

    index: str
    index_window: tuple[dt.date, dt.date] | None
    calendar_window: tuple[dt.date, dt.date] | None
    age_from: int
    age_below: int | None
    sexes: tuple[str, ...] | None
    sites: tuple[str, ...] | None


@dataclass(frozen=True)
class Correction:
    """Heart-rate correction PRc = PR - slope * (HR - reference_hr)."""

    formula: str
    slope_ms_per_bpm: float | None
    reference_hr_bpm: float


@dataclass(frozen=True)
class Exposure:
    """How PR enters the analyses (see docs/study-spec.md, [exposure])."""

    kind: str
    measure: str
    levels: dict[str, tuple[str, ...]] | None
    reference: Any
    percentiles: tuple[float, ...] | None
    per: float | str | None
    center: float | None
    knots: tuple[float, ...] | None
    n_knots: int | None
    correction: Correction | None

    @property
    def categorical(self) -> bool:
        return self.kind in CATEGORICAL_EXPOSURES

    @property
    def time_updated(self) -> bool:
        return self.kind == "pr_time_updated"

    def level_names(self) -> list[str]:
        """Levels of a categorical exposure, in order (percentile groups as pLO-HI)."""
        if self.kind == "pr_category":
            return list(self.levels or {})
        if self.kind == "pr_percentile":
            cuts = [0, *self.percentiles, 100]
            return [f"p{_num(cuts[i])}-{_num(cuts[i + 1])}" for i in range(len(cuts) - 1)]
        return []


def _num(v: float) -> str:
    return str(int(v)) if float(v).is_integer() else str(v)


@dataclass(frozen=True)
class FollowUp:
    """Follow-up rules: time scale, lag, horizon and administrative end."""

    time_scale: str
    lag_days: int
    horizon_days: int | None
    end_date: dt.date | None


@dataclass(frozen=True)
class Endpoint:
    """An endpoint: an event kind from a source, or a composite of other endpoints."""

    name: str
    event: str | None
    source: str | None
    any_of: tuple[str, ...]
    competing: tuple[str, ...]
    censor_at: tuple[str, ...]
    description: str


@dataclass(frozen=True)
class Variant:
    """A sensitivity variant: the main study with a few settings replaced."""

    name: str
    description: str
    rule_set: str
    lag_days: int
    horizon_days: int | None
    exclusions: tuple[tuple[str, Any], ...]


@dataclass(frozen=True)
class AnalysisSpec:
    """One entry of [[analyses]]: its kind, output name and validated options."""

    kind: str
    name: str
    options: dict[str, Any]
    position: int


@dataclass(frozen=True)
class Spec:
    """A validated study spec; variants[0] is the main analysis ("main")."""

    path: Path | None
    sha256: str
    id: str
    title: str
    description: str
    seed: int
    population: Population
    exposure: Exposure | None
    follow_up: FollowUp
    endpoints: dict[str, Endpoint]
    covariates: tuple[str, ...]
    variants: tuple[Variant, ...]
    analyses: tuple[AnalysisSpec, ...]
    source: SpecSource = field(repr=False, compare=False, default=None)

    @property
    def main(self) -> Variant:
        return self.variants[0]

    def variant(self, name: str) -> Variant:
        """The variant called ``name`` (SpecError naming the known ones otherwise)."""
        for v in self.variants:
            if v.name == name:
                return v
        known = ", ".join(v.name for v in self.variants)
        raise SpecError(f"no variant '{name}' in study {self.id}; variants: {known}")

    def components(self, endpoint: str) -> list[tuple[str, str]]:
        """(event kind, source) pairs behind an endpoint, composites expanded."""
        ep = self.endpoints[endpoint]
        if ep.any_of:
            pairs: list[tuple[str, str]] = []
            for part in ep.any_of:
                pairs.extend(p for p in self.components(part) if p not in pairs)
            return pairs
        source = ep.source or DEFAULT_SOURCE[ep.event]
        sources = EVENT_SOURCES[ep.event] if source in ALL_SOURCES else (source,)
        return [(ep.event, s) for s in sources]


# --------------------------------------------------------------------------- loading


def load_spec(path: str | Path) -> Spec:
    """Read, validate and freeze a study spec file; SpecError on any problem."""
    p = Path(path)
    if not p.is_file():
        raise SpecError(f"study spec {p} not found; pass the path of a .toml spec (see analyses/)")
    try:
        raw = p.read_bytes()
        text = raw.decode("utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise SpecError(f"{p.name}: cannot read the spec as UTF-8 text ({exc}); save it as UTF-8") from exc
    return parse_spec(text, p, hashlib.sha256(raw).hexdigest())


def parse_spec(text: str, path: Path | None = None, sha256: str | None = None) -> Spec:
    """Validate a spec given as TOML text (``path`` only names it in messages)."""
    source = SpecSource(path, text)
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        name = path.name if path else "spec"
        raise SpecError(f"{name}: not valid TOML: {exc}; fix the syntax at that line") from exc
    top = check_table(source, (), doc, SCHEMA_TOP)
    study = check_table(source, ("study",), top["study"], SCHEMA_STUDY)
    main_rule_set = _check_rule_set(source, ("study", "rule_set"), study["rule_set"])
    population = _population(source, top["population"])
    exclusions = _exclusions(source, ("exclusions",), top["exclusions"])
    exposure = _exposure(source, top["exposure"]) if top["exposure"] is not None else None
    follow_up = _follow_up(source, top["follow_up"])
    endpoints = _endpoints(source, top["endpoints"])
    covariates = check_table(source, ("covariates",), top["covariates"], SCHEMA_COVARIATES)
    main = Variant("main", "main analysis", main_rule_set, follow_up.lag_days,
                   follow_up.horizon_days, tuple(exclusions.items()))
    variants = (main, *_variants(source, top["variants"], main, follow_up))
    spec = Spec(
        path=path,
        sha256=sha256 or hashlib.sha256(text.encode("utf-8")).hexdigest(),
        id=study["id"],
        title=study["title"],
        description=study["description"],
        seed=study["seed"],
        population=population,
        exposure=exposure,
        follow_up=follow_up,
        endpoints=endpoints,
        covariates=tuple(covariates["at_index"]),
        variants=variants,
        analyses=(),
        source=source,
    )
    analyses = _analyses(source, top["analyses"], spec)
    return Spec(**{**spec.__dict__, "analyses": analyses})


def _check_rule_set(source: SpecSource, path: KeyPath, rule_set: str) -> str:
    """The rule set id after checking that the rule file exists and is valid."""
    from cohort.phenotype.rules import available_rule_sets, load_rule_set

    try:
        return load_rule_set(_rule_path(source, rule_set)).id
    except RuleSetError as exc:
        known = available_rule_sets()
        hint = nearest(rule_set, known)
        tip = f"did you mean '{hint}'? " if hint else ""
        raise source.fail(
            path, f"unknown or invalid rule set '{rule_set}' ({tip}known rule sets: "
            f"{', '.join(known)}): {exc}"
        ) from None


def _rule_path(source: SpecSource, rule_set: str) -> str:
    """A rule file path given relative to the spec is read from beside the spec."""
    if rule_set.endswith(".toml") and source.path is not None:
        beside = source.path.parent / rule_set
        if beside.is_file():
            return str(beside)
    return rule_set


def _population(source: SpecSource, table: dict) -> Population:
    path = ("population",)
    t = check_table(source, path, table, SCHEMA_POPULATION)
    if t["index"] == "first_ecg_in_window" and t["index_window"] is None:
        raise source.fail((*path, "index"), "index = \"first_ecg_in_window\" needs "
                          "population.index_window = [start, end]; add it")
    if t["index"] != "first_ecg_in_window" and t["index_window"] is not None:
        raise source.fail((*path, "index_window"), "population.index_window applies only to "
                          "index = \"first_ecg_in_window\"; remove it or change the index")
    if t["age_below"] is not None and t["age_below"] <= t["age_from"]:
        raise source.fail((*path, "age_below"), f"population.age_below ({t['age_below']}) must "
                          f"be above age_from ({t['age_from']}): no age would qualify")
    if t["sex"] == [] or t["sites"] == []:
        key = "sex" if t["sex"] == [] else "sites"
        raise source.fail((*path, key), f"population.{key} is an empty list: nobody would "
                          "qualify; remove the key to include everyone")
    return Population(
        index=t["index"],
        index_window=tuple(t["index_window"]) if t["index_window"] else None,
        calendar_window=tuple(t["calendar_window"]) if t["calendar_window"] else None,
        age_from=t["age_from"],
        age_below=t["age_below"],
        sexes=tuple(t["sex"]) if t["sex"] else None,
        sites=tuple(t["sites"]) if t["sites"] else None,
    )


def _exclusions(source: SpecSource, path: KeyPath, table: dict) -> dict[str, Any]:
    """Active exclusions in the order written (false / absent keys are not steps)."""
    checked = check_table(source, path, table, SCHEMA_EXCLUSIONS)
    active = {}
    for key in table:  # file order: the attrition steps follow it
        value = checked[key]
        if value is False or value is None:
            continue
        active[key] = "either" if value is True and key == "higher_grade_before_index" else value
    return active


def _exposure(source: SpecSource, table: dict) -> Exposure:
    path = ("exposure",)
    t = check_table(source, path, table, SCHEMA_EXPOSURE)
    kind = t["kind"]
    _refuse_keys(source, path, table, kind)
    correction = _correction(source, t)
    levels = _levels(source, t) if kind == "pr_category" else None
    exposure = Exposure(
        kind=kind,
        measure=t["measure"],
        levels=levels,
        reference=None,
        percentiles=tuple(float(v) for v in t["percentiles"]) if kind == "pr_percentile" else None,
        per=_per(t) if kind in ("pr_continuous", "pr_time_updated") else None,
        center=float(t["center"]) if kind in ("pr_continuous", "pr_time_updated") else None,
        knots=tuple(float(k) for k in t["knots"]) if kind == "pr_spline" and t["knots"] else None,
        n_knots=(len(t["knots"]) if t["knots"] else t["n_knots"]) if kind == "pr_spline" else None,
        correction=correction,
    )
    return Exposure(**{**exposure.__dict__, "reference": _reference(source, t, exposure)})


_KIND_KEYS = {
    "levels": ("pr_category",),
    "percentiles": ("pr_percentile",),
    "per": ("pr_continuous", "pr_time_updated"),
    "center": ("pr_continuous", "pr_time_updated"),
    "knots": ("pr_spline",),
    "n_knots": ("pr_spline",),
    "reference": ("pr_category", "pr_percentile", "pr_spline"),
}


def _refuse_keys(source: SpecSource, path: KeyPath, table: dict, kind: str) -> None:
    for key, kinds in _KIND_KEYS.items():
        if key in table and kind not in kinds:
            raise source.fail((*path, key), f"exposure.{key} applies only to kind "
                              f"{' or '.join(kinds)}, not {kind}; remove it")
    if "knots" in table and "n_knots" in table:
        raise source.fail((*path, "n_knots"), "give exposure.knots or exposure.n_knots, not both")


def _correction(source: SpecSource, t: dict) -> Correction | None:
    path = ("exposure", "correction")
    if t["measure"] != "pr_corrected":
        if t["correction"] is not None:
            raise source.fail(path, "exposure.correction needs measure = \"pr_corrected\"")
        return None
    if t["correction"] is None:
        raise source.fail(("exposure", "measure"), "measure = \"pr_corrected\" needs an "
                          "[exposure.correction] table (formula = \"linear\" or \"regression\")")
    c = check_table(source, path, t["correction"], SCHEMA_CORRECTION)
    if c["formula"] == "linear" and c["slope_ms_per_bpm"] is None:
        raise source.fail(path, "formula = \"linear\" needs slope_ms_per_bpm (dPR/dHR in ms per "
                          "bpm); or use formula = \"regression\" to estimate it in the cohort")
    if c["formula"] == "regression" and c["slope_ms_per_bpm"] is not None:
        raise source.fail((*path, "slope_ms_per_bpm"), "formula = \"regression\" estimates the "
                          "slope; remove slope_ms_per_bpm or use formula = \"linear\"")
    return Correction(c["formula"], c["slope_ms_per_bpm"], float(c["reference_hr_bpm"]))


def _levels(source: SpecSource, t: dict) -> dict[str, tuple[str, ...]]:
    if t["levels"] is None:
        return dict(DEFAULT_PR_LEVELS)
    path = ("exposure", "levels")
    out: dict[str, tuple[str, ...]] = {}
    seen: dict[str, str] = {}
    for level, cats in t["levels"].items():
        if not isinstance(cats, list) or not cats or not all(isinstance(c, str) for c in cats):
            raise source.fail((*path, level), f"exposure.levels.{level} must be a non-empty list "
                              "of AV category codes")
        for c in cats:
            if c not in AV_CATEGORIES:
                hint = nearest(c, list(AV_CATEGORIES))
                tip = f"did you mean '{hint}'?" if hint else f"codes: {', '.join(AV_CATEGORIES)}"
                raise source.fail((*path, level), f"exposure.levels.{level} has the unknown AV "
                                  f"category '{c}' ({tip})")
            if c in seen:
                raise source.fail((*path, level), f"AV category '{c}' is in levels "
                                  f"'{seen[c]}' and '{level}'; put it in one level")
            seen[c] = level
        out[level] = tuple(cats)
    if len(out) < 2:
        raise source.fail(path, "exposure.levels needs at least 2 levels to compare")
    return out


def _per(t: dict) -> float | str:
    return t["per"] if t["per"] == "sd" else float(t["per"])


def _reference(source: SpecSource, t: dict, exposure: Exposure) -> Any:
    path = ("exposure", "reference")
    ref = t["reference"]
    if exposure.kind == "pr_spline":
        if ref is not None and not isinstance(ref, int | float):
            raise source.fail(path, "exposure.reference of a pr_spline is a PR value in ms")
        return float(ref) if ref is not None else None
    if not exposure.categorical:
        return None
    levels = exposure.level_names()
    if ref is None:
        return "normal_pr" if "normal_pr" in levels else levels[len(levels) // 2]
    if ref not in levels:
        hint = nearest(str(ref), levels)
        tip = f"did you mean '{hint}'? " if hint else ""
        raise source.fail(path, f"reference {ref!r} is not among the exposure levels ({tip}"
                          f"levels: {', '.join(levels)})")
    return ref


def _horizon_days(years: float | None) -> int | None:
    return None if years is None else int(round(years * DAYS_PER_YEAR))


def _follow_up(source: SpecSource, table: dict) -> FollowUp:
    t = check_table(source, ("follow_up",), table, SCHEMA_FOLLOW_UP)
    horizon = _horizon_days(t["horizon_years"])
    _check_lag(source, ("follow_up", "lag_days"), t["lag_days"], horizon)
    return FollowUp(t["time_scale"], t["lag_days"], horizon, t["end_date"])


def _check_lag(source: SpecSource, path: KeyPath, lag: int, horizon: int | None) -> None:
    if horizon is not None and lag >= horizon:
        raise source.fail(path, f"the lag ({lag} days) is not shorter than the horizon "
                          f"({horizon} days): no follow-up would remain; shorten the lag")


def _endpoints(source: SpecSource, table: dict) -> dict[str, Endpoint]:
    out = {}
    for name, raw in table.items():
        path = ("endpoints", name)
        if not _NAME.match(name):
            raise source.fail(path, f"endpoint name '{name}' must be lower-case letters, digits "
                              "and '_', starting with a letter")
        t = check_table(source, path, raw, SCHEMA_ENDPOINT)
        out[name] = _endpoint(source, path, name, t)
    for ep in out.values():
        _check_references(source, ep, out)
    for name in out:
        _check_cycle(source, name, out, ())
    return out


def _endpoint(source: SpecSource, path: KeyPath, name: str, t: dict) -> Endpoint:
    if (t["event"] is None) == (t["any_of"] is None):
        raise source.fail(path, f"endpoint '{name}' needs exactly one of 'event' (an event "
                          f"kind: {', '.join(EVENT_SOURCES)}) or 'any_of' (a composite)")
    if t["any_of"] is not None:
        if t["source"] is not None:
            raise source.fail((*path, "source"), f"endpoint '{name}' is a composite: its "
                              "components carry their sources; remove 'source'")
        if len(t["any_of"]) < 2:
            raise source.fail((*path, "any_of"), f"composite '{name}' needs >= 2 endpoints")
    elif t["source"] is not None:
        valid = (*EVENT_SOURCES[t["event"]], *(ALL_SOURCES if len(EVENT_SOURCES[t["event"]]) > 1 else ()))
        if t["source"] not in valid:
            raise source.fail((*path, "source"), f"event '{t['event']}' has no source "
                              f"'{t['source']}'; sources: {', '.join(valid)}")
    return Endpoint(name, t["event"], t["source"], tuple(t["any_of"] or ()),
                    tuple(t["competing"]), tuple(t["censor_at"]), t["description"])


def _check_references(source: SpecSource, ep: Endpoint, endpoints: Mapping[str, Endpoint]) -> None:
    for key in ("any_of", "competing", "censor_at"):
        for other in getattr(ep, key):
            path = ("endpoints", ep.name, key)
            if other not in endpoints:
                hint = nearest(other, list(endpoints))
                tip = f"did you mean '{hint}'? " if hint else ""
                raise source.fail(path, f"endpoint '{ep.name}' names '{other}' in {key}, which "
                                  f"is not an endpoint ({tip}declare [endpoints.{other}])")
            if other == ep.name:
                raise source.fail(path, f"endpoint '{ep.name}' lists itself in {key}")
    both = set(ep.competing) & set(ep.censor_at)
    if both:
        raise source.fail(("endpoints", ep.name, "censor_at"), f"'{sorted(both)[0]}' is both "
                          f"competing and censoring for '{ep.name}'; choose one")


def _check_cycle(source: SpecSource, name: str, endpoints: Mapping[str, Endpoint],
                 chain: tuple[str, ...]) -> None:
    if name in chain:
        raise source.fail(("endpoints", chain[0], "any_of"), "composite endpoints form a "
                          f"cycle ({' -> '.join((*chain, name))})")
    for part in endpoints[name].any_of:
        _check_cycle(source, part, endpoints, (*chain, name))


def _variants(source: SpecSource, table: dict, main: Variant, follow_up: FollowUp) -> list[Variant]:
    out = []
    for name, raw in table.items():
        path = ("variants", name)
        if not _NAME.match(name) or name == "main":
            raise source.fail(path, f"variant name '{name}' must be lower-case letters, digits "
                              "and '_' (and not 'main')")
        t = check_table(source, path, raw, SCHEMA_VARIANT)
        rule_set = main.rule_set
        if t["rule_set"] is not None:
            rule_set = _check_rule_set(source, (*path, "rule_set"), t["rule_set"])
        lag = main.lag_days if t["lag_days"] is None else t["lag_days"]
        horizon = main.horizon_days if t["horizon_years"] is None else _horizon_days(t["horizon_years"])
        _check_lag(source, (*path, "lag_days"), lag, horizon)
        exclusions = dict(main.exclusions)
        if t["exclusions"] is not None:
            extra = check_table(source, (*path, "exclusions"), t["exclusions"], SCHEMA_EXCLUSIONS)
            for key in t["exclusions"]:  # replace in place, switch off (false) or append
                value = extra[key]
                if value is False or value is None:
                    exclusions.pop(key, None)
                else:
                    exclusions[key] = "either" if value is True and key == "higher_grade_before_index" else value
        if all(v is None for k, v in t.items() if k != "description"):
            raise source.fail(path, f"variant '{name}' changes nothing; set rule_set, lag_days, "
                              "horizon_years or exclusions")
        out.append(Variant(name, t["description"], rule_set, lag, horizon, tuple(exclusions.items())))
    return out


def _analyses(source: SpecSource, entries: list, spec: Spec) -> tuple[AnalysisSpec, ...]:
    from cohort.study.analyses import ANALYSIS_KINDS, check_analysis

    if not entries:
        raise source.fail(("analyses",), "the spec lists no analyses; add an [[analyses]] table "
                          f"with kind = one of {', '.join(ANALYSIS_KINDS)}")
    out: list[AnalysisSpec] = []
    names: dict[str, int] = {}
    for i, raw in enumerate(entries):
        path: KeyPath = ("analyses", i)
        if not isinstance(raw, dict):
            raise source.fail(path, f"analyses[{i + 1}] must be a table ([[analyses]])")
        raw = copy.deepcopy(raw)
        kind = raw.pop("kind", None)
        if kind is None:
            raise source.fail(path, f"{dotted(path)} lacks 'kind' (one of {', '.join(ANALYSIS_KINDS)})")
        if not isinstance(kind, str) or kind not in ANALYSIS_KINDS:
            hint = nearest(str(kind), list(ANALYSIS_KINDS))
            tip = f"did you mean '{hint}'? " if hint else ""
            raise source.fail((*path, "kind"), f"unknown analysis kind {kind!r} ({tip}kinds: "
                              f"{', '.join(ANALYSIS_KINDS)})")
        name = raw.pop("name", kind)
        if not isinstance(name, str) or not _NAME.match(name):
            raise source.fail((*path, "name"), f"analysis name {name!r} must be lower-case "
                              "letters, digits and '_' (it names the output files)")
        if name in names:
            raise source.fail((*path, "name"), f"two analyses are named '{name}' (entries "
                              f"{names[name] + 1} and {i + 1}); give each a distinct 'name'")
        names[name] = i
        options = check_analysis(source, path, kind, raw, spec)
        out.append(AnalysisSpec(kind, name, options, i))
    return tuple(out)
