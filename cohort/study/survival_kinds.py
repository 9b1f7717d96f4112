"""Survival, competing-risks and progression analyses as study-spec analysis kinds.

Registers nine kinds with :func:`cohort.study.analyses.register_kind`, each a thin wiring of
an estimator of :mod:`cohort.stats` to the study frames (``docs/study-spec.md`` documents
every option and output column):

- ``kaplan_meier``: Kaplan-Meier by group with log-log Greenwood intervals; the risk term is
  ``risk_naive`` (with a summary warning) when the endpoint has competing events;
- ``cumulative_incidence``: Aalen-Johansen per cause (delta-method variance), Gray's test;
- ``cox``: cause-specific Cox (Efron) with PR as categories, per ms, per SD or a restricted
  cubic spline (``hr_curve`` part), covariates at index, robust variance, PH test;
- ``fine_gray``: subdistribution hazards with robust variance (no delayed entry);
- ``time_updated_cox``: counting-process Cox on PR carried forward from each ECG (and post-
  index events switched on when they happen), cluster-robust by person;
- ``interval_censored``: Turnbull NPMLE from (last ECG without, first ECG with] beside the
  right-censored Kaplan-Meier and Aalen-Johansen estimates;
- ``multistate``: normal -> first-degree -> higher-grade block -> pacemaker, death absorbing:
  transition counts, Nelson-Aalen hazards, Aalen-Johansen occupation with bootstrap limits;
- ``absolute_risk``: cumulative incidence at horizons for age / sex / PR profiles from the
  combined cause-specific Cox models;
- ``landmark``: Cox models from landmark times, with PR and events measured at the landmark.

Immortal time: every grouping variable and covariate of these kinds is measured at index
(``cohort/study/covariates.toml``). Events after index (a new block, an implant) never enter
as baseline values: they enter only as time-updated indicators (``time_updated_cox``
``time_updated_events``, switched on the day they happen) or as states measured at a landmark
among persons still at risk then (``landmark`` ``events_at_landmark``).
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import polars as pl

from cohort.errors import DataError
from cohort.stats import (
    AalenJohansen,
    AbsoluteRisk,
    CoxPH,
    FineGray,
    KaplanMeier,
    MultiState,
    Turnbull,
    harrell_knots,
    hr_curve,
    landmark,
    rcs_basis,
)
from cohort.stats.splines import rcs_names
from cohort.study.analyses import AnalysisContext, AnalysisKind, register_kind
from cohort.study.builder import query
from cohort.study.exposure import measure_values
from cohort.study.schema import (
    REQUIRED,
    Key,
    KeyPath,
    SpecSource,
    alpha_level,
    distinct,
    increasing,
    nearest,
    non_negative,
    positive,
)
from cohort.study.spec import (
    COVARIATES,
    DAYS_PER_YEAR,
    DEFAULT_PR_LEVELS,
    Spec,
)
from cohort.vocabulary import AV_CATEGORIES, RHYTHM_CLASSES, SEXES, VENTRICULAR_CONDUCTION

# --------------------------------------------------------------------------- output columns

CURVE_COLUMNS = ("endpoint", "group_by", "group", "term", "time", "estimate", "se", "lower",
                 "upper", "n_at_risk", "events", "censored")
AT_TIMES_COLUMNS = ("endpoint", "group_by", "group", "term", "time", "estimate", "se", "lower",
                    "upper")
AT_RISK_COLUMNS = ("endpoint", "group_by", "group", "time", "n_at_risk", "events", "censored")
GRAY_COLUMNS = ("endpoint", "group_by", "term", "statistic", "df", "p", "n", "events", "note")
COEFFICIENT_COLUMNS = ("endpoint", "model", "term", "reference", "unit", "estimate", "se",
                       "se_naive", "hr", "lower", "upper", "z", "p", "n", "events", "ph_p",
                       "ph_flag", "note")
PH_COLUMNS = ("endpoint", "model", "term", "statistic", "df", "p", "transform", "flag")
HR_CURVE_COLUMNS = ("endpoint", "model", "pr_ms", "reference_ms", "log_hr", "se", "hr", "lower",
                    "upper")
LANDMARK_COLUMNS = ("landmark", *COEFFICIENT_COLUMNS)
LANDMARK_COUNT_COLUMNS = ("landmark", "endpoint", "at_risk", "events", "competing", "censored",
                          "left_out")
INTERVAL_COLUMNS = ("endpoint", "group", "method", "term", "time", "estimate", "se", "lower",
                    "upper", "events")
INTERVAL_AT_TIMES_COLUMNS = ("endpoint", "group", "method", "term", "time", "estimate", "se",
                             "lower", "upper")
INTERVAL_SUMMARY_COLUMNS = ("endpoint", "group", "persons", "events_seen", "right_censored",
                            "median_width_years", "mean_width_years", "median_ecgs")
OCCUPATION_COLUMNS = ("model", "state", "time", "estimate", "se", "lower", "upper",
                      "n_at_risk", "events", "censored")
OCCUPATION_AT_TIMES_COLUMNS = ("model", "state", "time", "estimate", "se", "lower", "upper")
TRANSITION_COLUMNS = ("model", "from_state", "to_state", "count")
HAZARD_COLUMNS = ("model", "from_state", "to_state", "time", "cumulative_hazard", "se",
                  "n_at_risk", "events")
RISK_COLUMNS = ("endpoint", "cause", "profile", "age", "sex", "pr_ms", "bundle_branch_block",
                "time", "estimate", "se", "lower", "upper", "n", "events")

# --------------------------------------------------------------------------- vocabulary

CATEGORICAL_GROUPS = tuple(c for c, kind in COVARIATES.items() if kind == "categorical")
GROUP_CHOICES = ("exposure", "none", *CATEGORICAL_GROUPS)
_LEVEL_ORDER: dict[str, tuple[str, ...]] = {
    "sex": tuple(SEXES),
    "rhythm_class": tuple(RHYTHM_CLASSES),
    "av_category": tuple(AV_CATEGORIES),
    "ventricular_conduction": tuple(VENTRICULAR_CONDUCTION),
    "bundle_branch_block": ("no", "yes"),
}
# Reference level of categorical covariates in regression: female sex and "no bundle branch
# block" by convention; any other categorical covariate takes its most frequent level.
_REFERENCE_LEVEL = {"sex": "F", "bundle_branch_block": "no"}
# Regression units of the continuous covariates of cohort/study/covariates.toml.
_UNITS = {"age": "1 year", "index_year": "1 year", "pr_ms": "1 ms", "qrs_ms": "1 ms",
          "heart_rate": "1 bpm", "qrs_axis": "1 degree", "possible_followup_years": "1 year"}
#: Levels that are not categories to estimate an effect for: persons with them are left out
#: of a regression that adjusts for the variable (and counted in the note).
UNMODELLED_LEVELS = {"sex": ("U",)}
EXPOSURE_CHOICES = ("spec", "category", "per_ms", "per_sd", "spline", "none")
CI_CHOICES = ("log-log", "log", "plain")
#: Event kinds whose endpoint is seen only on an ECG (interval_censored needs source "ecg").
ECG_DETECTED_EVENTS = ("first_degree_block", "higher_grade_block", "third_degree_block",
                       "av_block")
#: Events after index that may enter as time-updated indicators or states at a landmark.
POST_INDEX_EVENTS = ("first_degree_block", "higher_grade_block", "third_degree_block",
                     "av_block", "pacemaker")
#: Covariates refused in regression: the length of possible follow-up ends at death or
#: moving away, so it is measured after index and conditions on the outcome.
FUTURE_COVARIATES = ("possible_followup_years",)
#: Covariates that restate the PR exposure (collinear with it).
EXPOSURE_COVARIATES = ("pr_ms", "av_category")
CONDUCTION_STATES = ("normal", "first_degree", "higher_grade", "pacemaker", "death")
CONDUCTION_TRANSITIONS = tuple((a, b) for i, a in enumerate(CONDUCTION_STATES[:-1])
                               for b in CONDUCTION_STATES[i + 1:])
DEFAULT_TIMES = {"time_since_index": [1.0, 2.0, 5.0, 10.0],
                 "age": [50.0, 60.0, 70.0, 80.0, 90.0]}

# --------------------------------------------------------------------------- option checks


def _fail(source: SpecSource, path: KeyPath, message: str) -> None:
    raise source.fail(path, message)


def _non_negative_list(value: list) -> str | None:
    problem = increasing(value)
    if problem:
        return problem
    return None if all(v >= 0 for v in value) else "must hold times >= 0"


def _positive_list(value: list) -> str | None:
    problem = increasing(value)
    if problem:
        return problem
    return None if all(v > 0 for v in value) else "must hold values > 0"


def _knots(value: list) -> str | None:
    if len(value) < 3:
        return f"needs at least 3 knots for a restricted cubic spline, got {len(value)}"
    return increasing(value)


def _curve_range(value: list) -> str | None:
    if len(value) != 2:
        return f"must be [from, to] in ms (two numbers), got {len(value)} value(s)"
    return increasing(value)


def _covariate_list(value: list) -> str | None:
    problem = distinct(value)
    if problem:
        return problem
    bad = [v for v in value if v not in COVARIATES]
    if bad:
        hint = nearest(bad[0], list(COVARIATES))
        tip = f"did you mean '{hint}'? " if hint else ""
        return f"has {bad[0]!r}, not a covariate ({tip}covariates: {', '.join(COVARIATES)})"
    return None


def _endpoint_key() -> Key:
    return Key((str,), REQUIRED, doc="endpoint name (an [endpoints.NAME] table)")


def _times_key(doc: str = "times (years on the spec's time scale) for the at_times and "
               "at_risk parts; default 1, 2, 5, 10 (age scale: 50 ... 90)") -> Key:
    return Key((list,), None, items=(int, float), check=_non_negative_list, doc=doc)


def _group_key() -> Key:
    return Key((str,), None, GROUP_CHOICES, "grouping: exposure (default with a categorical "
               "exposure), none, or a categorical covariate at index")


ALPHA_KEY = Key((float,), 0.05, doc="two-sided level", check=alpha_level)


def _exposure_keys() -> dict[str, Key]:
    """Options that say how PR enters a regression (shared by the regression kinds)."""
    return {
        "exposure": Key((str,), "spec", EXPOSURE_CHOICES, "PR as coded by the spec, as "
                        "categories, per ms, per SD, a restricted cubic spline, or none"),
        "reference": Key((str,), None, doc="category: reference level (default the spec's)"),
        "per_ms": Key((int, float), None, check=positive, doc="per_ms: ms per unit (default 20)"),
        "center_ms": Key((int, float), None, doc="per_ms / per_sd: PR (ms) at 0 (default 160)"),
        "knots": Key((list,), None, items=(int, float), check=_knots,
                     doc="spline: knots in ms (default Harrell's quantiles)"),
        "n_knots": Key((int,), None, (3, 4, 5, 6, 7), "spline: number of knots at Harrell's "
                       "quantiles of PR at index (default 4)"),
        "reference_ms": Key((int, float), None, check=positive,
                            doc="spline: PR (ms) of the hr_curve reference (default 160)"),
        "curve_range_ms": Key((list,), None, items=(int, float), check=_curve_range,
                              doc="spline: [from, to] PR (ms) of hr_curve (default 1st-99th "
                              "percentile, rounded to 5 ms)"),
        "curve_step_ms": Key((int, float), 5, check=positive, doc="spline: hr_curve step (ms)"),
    }


def _check_endpoint(source: SpecSource, path: KeyPath, name: str, spec: Spec) -> None:
    if not spec.endpoints:
        _fail(source, path, "this analysis needs [endpoints.<name>] tables")
    if name not in spec.endpoints:
        hint = nearest(name, list(spec.endpoints))
        tip = f"did you mean '{hint}'? " if hint else ""
        _fail(source, (*path, "endpoint"), f"'{name}' is not a declared endpoint ({tip}"
              f"endpoints: {', '.join(spec.endpoints)})")


def _refuse_age_scale(source: SpecSource, path: KeyPath, spec: Spec, reason: str) -> None:
    if spec.follow_up.time_scale == "age":
        _fail(source, (*path, "kind"), f"{reason}, but follow_up.time_scale is \"age\"; use "
              "time_scale = \"time_since_index\" for this analysis (or drop it)")


def _check_group(source: SpecSource, path: KeyPath, o: dict, spec: Spec) -> None:
    exp = spec.exposure
    grouped = exp is not None and exp.categorical
    if o["group"] is None:
        o["group"] = "exposure" if grouped else "none"
    if o["group"] == "exposure" and (exp is None or not exp.categorical):
        kind = "no [exposure] table" if exp is None else f"exposure.kind \"{exp.kind}\""
        _fail(source, (*path, "group"), f"group = \"exposure\" needs exposure groups, but "
              f"the spec has {kind}; use exposure.kind = \"pr_category\" or "
              "\"pr_percentile\", or another group")


def _check_times(o: dict, spec: Spec, key: str = "times") -> None:
    if o[key] is None:
        o[key] = list(DEFAULT_TIMES[spec.follow_up.time_scale])
    o[key] = [float(t) for t in o[key]]


def _pr_measured(spec: Spec) -> bool:
    """True when every study person has a measured PR at index (in ms)."""
    exp = spec.exposure
    if spec.population.index == "first_assessable_pr":
        return True
    return exp is not None and exp.kind != "pr_category"


def _resolved_exposure(o: dict, spec: Spec) -> str:
    """The coding the 'exposure' option asks for, with "spec" resolved."""
    if o["exposure"] != "spec":
        return o["exposure"]
    kind = spec.exposure.kind
    if kind in ("pr_category", "pr_percentile"):
        return "category"
    if kind == "pr_spline":
        return "spline"
    return "per_sd" if spec.exposure.per == "sd" else "per_ms"


_CODING_KEYS = {"reference": ("category",), "per_ms": ("per_ms",),
                "center_ms": ("per_ms", "per_sd"), "knots": ("spline",), "n_knots": ("spline",),
                "reference_ms": ("spline",), "curve_range_ms": ("spline",)}


def _check_exposure(source: SpecSource, path: KeyPath, o: dict, spec: Spec, *,
                    allowed: Sequence[str], time_updated: bool = False) -> None:
    """Refuse impossible exposure codings; fill the defaults of the resolved coding."""
    exp = spec.exposure
    if o["exposure"] not in allowed:
        _fail(source, (*path, "exposure"), f"exposure = \"{o['exposure']}\" is not available "
              f"in this analysis; use one of {', '.join(allowed)}")
    if o["exposure"] == "spec":
        if exp is None:
            _fail(source, (*path, "exposure"), "exposure = \"spec\" needs an [exposure] table; "
                  "add one or set exposure = \"per_ms\" (PR at index per 20 ms)")
        if exp.time_updated and not time_updated:
            _fail(source, (*path, "exposure"), "the spec's exposure is pr_time_updated (PR "
                  "changes after index); a baseline model would use later values as if known "
                  "at index. Use kind = \"time_updated_cox\", or exposure = \"per_ms\" for PR "
                  "at index")
    coding = _resolved_exposure(o, spec)
    if coding not in allowed and o["exposure"] == "spec":
        _fail(source, (*path, "exposure"), f"the spec's exposure ({exp.kind}) codes PR as "
              f"{coding}, which this analysis cannot use; set exposure to one of "
              f"{', '.join(a for a in allowed if a != 'spec')}")
    for key, codings in _CODING_KEYS.items():
        if o[key] is not None and coding not in codings:
            what = (f"the exposure is categorical ({exp.kind})" if coding == "category"
                    and o["exposure"] == "spec" else f"the exposure is coded as {coding}")
            _fail(source, (*path, key), f"{key} applies only to exposure = "
                  f"{' or '.join(repr(c) for c in codings)}, but {what}; remove {key} or "
                  "change exposure")
    if o["knots"] is not None and o["n_knots"] is not None:
        _fail(source, (*path, "n_knots"), "give knots or n_knots, not both")
    if coding in ("per_ms", "per_sd", "spline") and not (time_updated or _pr_measured(spec)):
        why = ("the spec's exposure is categorical (pr_category selects persons on their AV "
               "category, which a statement gives without a measured PR)" if exp is not None
               else "the spec has no [exposure] table, so the index ECG need not carry a PR")
        _fail(source, (*path, "exposure"), f"exposure coded as {coding} needs PR in ms for "
              f"every person, but {why}; set population.index = \"first_assessable_pr\", or "
              "use exposure = \"category\"")
    if coding == "category":
        _check_reference(source, path, o, spec)


def _check_reference(source: SpecSource, path: KeyPath, o: dict, spec: Spec) -> None:
    exp = spec.exposure
    levels = exp.level_names() if exp is not None and exp.categorical else list(DEFAULT_PR_LEVELS)
    if o["reference"] is None:
        o["reference"] = (exp.reference if exp is not None and exp.categorical
                          else "normal_pr")
    if o["reference"] not in levels:
        hint = nearest(o["reference"], levels)
        tip = f"did you mean '{hint}'? " if hint else ""
        _fail(source, (*path, "reference"), f"reference '{o['reference']}' is not an exposure "
              f"level ({tip}levels: {', '.join(levels)})")


def _check_covariates(source: SpecSource, path: KeyPath, o: dict, spec: Spec,
                      allowed: Sequence[str] | None = None) -> None:
    if o["covariates"] is None:
        o["covariates"] = ["age", "sex"]
    for name in o["covariates"]:
        if name in FUTURE_COVARIATES:
            _fail(source, (*path, "covariates"), f"'{name}' is measured after index (possible "
                  "follow-up ends at death or moving away): adjusting for it conditions on the "
                  "outcome; remove it")
        if name in EXPOSURE_COVARIATES and o.get("exposure", "none") != "none":
            _fail(source, (*path, "covariates"), f"'{name}' restates the PR exposure and would "
                  "be collinear with it; remove it or set exposure = \"none\"")
        if allowed is not None and name not in allowed:
            _fail(source, (*path, "covariates"), f"'{name}' cannot be given in profiles; "
                  f"covariates here: {', '.join(allowed)}")


# --------------------------------------------------------------------------- small helpers


def _years(days: Any) -> Any:
    return days / DAYS_PER_YEAR


def _entry_column(frame: pd.DataFrame | pl.DataFrame, column: str = "entry") -> str | None:
    """``column`` when entry times differ between rows (delayed entry), else None.

    A common entry time before every exit changes no risk set, so it is left out: Gray's test
    and Fine-Gray are defined without delayed entry.
    """
    values = np.asarray(frame[column], dtype=float)
    return column if values.size and np.ptp(values) > 0 else None


def whole_days(times: Sequence[float]) -> np.ndarray:
    """Times (years) moved to the nearest whole day, the resolution of the frames.

    Follow-up is counted in whole days and converted with 365.25 days per year, so a horizon
    of 10 years ends at 3652 days = 9.9986 years; evaluating a curve at exactly 10.0 would
    fall past the last follow-up time. Rounding as Python does (half to even) matches the
    horizon's own rounding.
    """
    return np.array([round(t * DAYS_PER_YEAR) / DAYS_PER_YEAR for t in times])


def at_requested(frame: pd.DataFrame, times: Sequence[float]) -> pd.DataFrame:
    """Label rows evaluated at :func:`whole_days` of ``times`` with the requested times."""
    back = dict(zip(whole_days(times).tolist(), [float(t) for t in times], strict=True))
    return frame.assign(time=frame["time"].map(back))


def _quietly(fit: Callable[[], Any]) -> tuple[Any, str]:
    """Run a fit; return (result or None, note) with warnings and DataError as the note."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            result = fit()
        except DataError as exc:
            return None, str(exc)
    return result, "; ".join(dict.fromkeys(str(w.message) for w in caught))


def _cause_names(spec: Spec, endpoint: str) -> dict[int, str]:
    ep = spec.endpoints[endpoint]
    return {1: endpoint, **{code: name for code, name in enumerate(ep.competing, start=2)}}


def _empty(columns: Sequence[str]) -> pd.DataFrame:
    return pd.DataFrame({c: pd.Series(dtype=object) for c in columns})


def _ordered(frame: pd.DataFrame, keys: list[str], ranks: dict[str, dict[Any, int]]) -> pd.DataFrame:
    """Stable sort by ``keys``; a key in ``ranks`` sorts by that declared order."""
    tmp = frame.copy()
    sort_cols = []
    for k in keys:
        if k in ranks:
            tmp[f"_r_{k}"] = tmp[k].map(ranks[k]).fillna(len(ranks[k])).astype(int)
            sort_cols.append(f"_r_{k}")
        else:
            sort_cols.append(k)
    out = tmp.sort_values(sort_cols, kind="stable")
    return out.drop(columns=[c for c in out.columns if c.startswith("_r_")]).reset_index(drop=True)


def _rank(values: Sequence[Any]) -> dict[Any, int]:
    return {v: i for i, v in enumerate(values)}


# --------------------------------------------------------------------------- groups


def _group_levels(ctx: AnalysisContext, frame: pl.DataFrame, group: str) -> tuple[pl.DataFrame, list[str]]:
    """Frame with a ``_group`` column (text) and the group levels in their declared order."""
    if group == "none":
        return frame.with_columns(pl.lit("all").alias("_group")), ["all"]
    values = frame[group].cast(pl.String)
    present = sorted(set(values.drop_nulls().to_list()))
    if group == "exposure":
        order = list(ctx.frames.exposure.levels)
    else:
        order = list(_LEVEL_ORDER.get(group, ()))
    levels = [v for v in order if v in present] + [v for v in present if v not in order]
    out = frame.with_columns(values.alias("_group")).filter(pl.col("_group").is_not_null())
    return out, levels


# --------------------------------------------------------------------------- coding


@dataclass(frozen=True)
class ExposureCoding:
    """How PR becomes design columns: categories, per unit, spline or none."""

    kind: str
    terms: tuple[str, ...] = ()
    units: tuple[str, ...] = ()
    references: tuple[str | None, ...] = ()
    levels: tuple[str, ...] = ()  # non-reference levels (category)
    center: float = 160.0
    per: float = 20.0
    knots: tuple[float, ...] = ()
    reference_ms: float = 160.0

    def columns(self, ms: np.ndarray | None, level: np.ndarray | None) -> np.ndarray:
        """Design columns (n x len(terms)) from PR values (ms) or exposure levels."""
        if self.kind == "category":
            return np.column_stack([(level == lv).astype(float) for lv in self.levels])
        if self.kind in ("per_ms", "per_sd"):
            return ((np.asarray(ms, dtype=float) - self.center) / self.per)[:, None]
        if self.kind == "spline":
            return rcs_basis(np.asarray(ms, dtype=float), self.knots)
        n = len(ms) if ms is not None else len(level)
        return np.empty((n, 0))


def _ms_and_level(ctx: AnalysisContext, frame: pl.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """PR (or heart-rate corrected PR) in ms and the PR category level of each row."""
    col = "exposure_ms" if "exposure_ms" in frame.columns else "pr_ms"
    ms = frame[col].cast(pl.Float64).fill_null(np.nan).to_numpy()
    exp = ctx.spec.exposure
    if exp is not None and exp.categorical:
        level = frame["exposure"].cast(pl.String)
    else:
        mapping = {c: lv for lv, cats in DEFAULT_PR_LEVELS.items() for c in cats}
        level = frame["av_category"].replace_strict(mapping, default=None, return_dtype=pl.String)
    return ms, np.asarray(level.to_list(), dtype=object)


def _round5(value: float, up: bool) -> float:
    return float(np.ceil(value / 5.0) * 5.0 if up else np.floor(value / 5.0) * 5.0)


def exposure_coding(ctx: AnalysisContext, o: dict, ms: np.ndarray, level: np.ndarray) -> ExposureCoding:
    """Resolve the exposure options into an :class:`ExposureCoding` for this cohort.

    ``ms`` and ``level`` are PR at index of the persons analysed: the SD of per_sd and the
    default spline knots (Harrell's quantiles) are taken from them.
    """
    coding = _coding(ctx, o, ms, level)
    exp = ctx.spec.exposure
    if exp is not None and exp.measure == "pr_corrected" and coding.kind != "category":
        units = tuple(f"{u} (heart-rate corrected PR)" for u in coding.units)
        coding = ExposureCoding(**{**coding.__dict__, "units": units})
    return coding


def _coding(ctx: AnalysisContext, o: dict, ms: np.ndarray, level: np.ndarray) -> ExposureCoding:
    spec, info = ctx.spec, ctx.frames.exposure
    kind = _resolved_exposure(o, spec)
    from_spec = o["exposure"] == "spec"
    if kind == "none":
        return ExposureCoding("none")
    if kind == "category":
        return _category_coding(o, level)
    if kind == "per_ms":
        per = info.per if from_spec else float(o["per_ms"] or 20.0)
        center = spec.exposure.center if from_spec else float(o["center_ms"] if o["center_ms"] is not None else 160.0)
        return ExposureCoding("per_ms", (f"pr_per_{per:g}ms",), (f"{per:g} ms",), (None,),
                              center=center, per=per)
    if kind == "per_sd" and from_spec:
        return ExposureCoding("per_sd", ("pr_per_sd",), (f"1 SD = {info.per:.4g} ms",), (None,),
                              center=spec.exposure.center, per=info.per)
    if kind == "per_sd":
        finite = ms[np.isfinite(ms)]
        if finite.size < 2 or np.std(finite, ddof=1) <= 0:
            raise DataError(f"per_sd needs PR values with some spread; {finite.size} persons "
                            "have PR at index. Use per_ms instead")
        sd = float(np.std(finite, ddof=1))
        center = spec.exposure.center if from_spec else float(o["center_ms"] if o["center_ms"] is not None else 160.0)
        return ExposureCoding("per_sd", ("pr_per_sd",), (f"1 SD = {sd:.4g} ms",), (None,),
                              center=center, per=sd)
    return _spline_coding(ctx, o, ms, from_spec)


def _category_coding(o: dict, level: np.ndarray) -> ExposureCoding:
    present = {v for v in level if v is not None}
    ref = o["reference"]
    if ref not in present:
        raise DataError(f"the reference level '{ref}' has no persons in this cohort; choose "
                        "another reference")
    order = list(dict.fromkeys([*(o.get("_levels") or []), *sorted(present)]))
    levels = tuple(v for v in order if v in present and v != ref)
    return ExposureCoding("category", tuple(f"exposure[{lv}]" for lv in levels),
                          tuple("vs reference" for _ in levels), tuple(ref for _ in levels),
                          levels=levels)


def _spline_coding(ctx: AnalysisContext, o: dict, ms: np.ndarray, from_spec: bool) -> ExposureCoding:
    info, spec = ctx.frames.exposure, ctx.spec
    finite = ms[np.isfinite(ms)]
    if o["knots"] is not None:
        knots = np.asarray(o["knots"], dtype=float)
    elif from_spec and info is not None and info.knots:
        knots = np.asarray(info.knots)
    else:
        knots = harrell_knots(finite, o["n_knots"] or 4)
    ref = o["reference_ms"]
    if ref is None:
        ref = spec.exposure.reference if from_spec and spec.exposure.reference is not None else 160.0
    names = tuple(rcs_names("pr", len(knots)))
    units = ("ms (linear part of the spline)",) + tuple("spline basis" for _ in names[1:])
    return ExposureCoding("spline", names, units, tuple(None for _ in names),
                          knots=tuple(float(k) for k in knots), reference_ms=float(ref))


@dataclass(frozen=True)
class CovariateCoding:
    """Covariates at index as design columns: continuous as is, categorical as indicators."""

    names: tuple[str, ...]
    terms: tuple[str, ...] = ()
    units: tuple[str, ...] = ()
    references: tuple[str | None, ...] = ()
    levels: dict[str, tuple[str, ...]] = field(default_factory=dict)

    def columns(self, frame: pd.DataFrame | pl.DataFrame) -> np.ndarray:
        """Design columns (n x len(terms)); categorical values compared as text."""
        cols = []
        for name in self.names:
            values = np.asarray(list(frame[name]), dtype=object)
            if name in self.levels:
                text = np.array([None if v is None else str(v) for v in values], dtype=object)
                unknown = np.isin(text, [None, *UNMODELLED_LEVELS.get(name, ())])
                cols.extend(np.where(unknown, np.nan, (text == lv).astype(float))
                            for lv in self.levels[name])
            else:
                cols.append(np.array([np.nan if v is None else v for v in values], dtype=float))
        n = len(frame)
        return np.column_stack(cols) if cols else np.empty((n, 0))


def covariate_coding(frame: pl.DataFrame, names: Sequence[str]) -> CovariateCoding:
    """Indicators against a reference level (female, no BBB, else the most frequent level)."""
    terms, units, refs, levels = [], [], [], {}
    for name in names:
        if COVARIATES[name] != "categorical":
            terms.append(name)
            units.append(_unit(name))
            refs.append(None)
            continue
        counts = frame[name].cast(pl.String).drop_nulls().value_counts()
        table = {r[name]: r["count"] for r in counts.iter_rows(named=True)
                 if r[name] not in UNMODELLED_LEVELS.get(name, ())}
        if not table:
            raise DataError(f"covariate '{name}' has no values in this cohort; remove it")
        ref = _REFERENCE_LEVEL.get(name)
        if ref not in table:
            ref = sorted(table, key=lambda v: (-table[v], v))[0]
        order = list(_LEVEL_ORDER.get(name, ()))
        others = [v for v in order if v in table and v != ref]
        others += sorted(v for v in table if v != ref and v not in order)
        levels[name] = tuple(others)
        terms.extend(f"{name}[{v}]" for v in others)
        units.extend("vs reference" for _ in others)
        refs.extend(ref for _ in others)
    return CovariateCoding(tuple(names), tuple(terms), tuple(units), tuple(refs), levels)


def _unit(name: str) -> str:
    return _UNITS.get(name, "1 unit")


@dataclass
class Design:
    """Model inputs: the analysed rows with the design columns, and what each term means."""

    frame: pd.DataFrame
    terms: list[str]
    units: dict[str, str]
    references: dict[str, str | None]
    exposure: ExposureCoding
    dropped: int
    term_notes: dict[str, str] = field(default_factory=dict)

    @property
    def note(self) -> str:
        if not self.dropped:
            return ""
        return (f"{self.dropped} rows without a value of the exposure or a covariate (or with "
                "unknown sex) left out")

    def add_terms(self, terms: Sequence[str], unit: str) -> None:
        """Append indicator terms already present as columns of ``frame``."""
        self.terms.extend(terms)
        self.units.update(dict.fromkeys(terms, unit))
        self.references.update(dict.fromkeys(terms))


CONSTANT_NOTE = ("constant in the analysed rows (no person, or every person, has it): no "
                 "hazard ratio; left out of the model")


MONOTONE_NOTE = ("no events on one side of this indicator: the partial likelihood has no "
                 "maximum (the estimate diverges), so no hazard ratio is reported")


def fit_design(design: Design, model: Any, **roles: Any) -> tuple[Any, str]:
    """Fit ``model`` on the design's terms, leaving out (and noting) constant terms.

    Indicators with no event among the rows where they are 1 (or 0) are kept in the model
    (the other estimates stay valid) but their diverging estimate is blanked.
    """
    frame = design.frame
    constant = [t for t in design.terms if len(frame) and np.ptp(frame[t].to_numpy()) == 0]
    design.term_notes.update(dict.fromkeys(constant, CONSTANT_NOTE))
    events = frame[roles["event"]].to_numpy() == 1 if len(frame) else np.zeros(0, bool)
    for t in design.terms:
        x = frame[t].to_numpy()
        if t not in constant and np.isin(x, (0.0, 1.0)).all() and (
                not (events & (x == 1)).any() or not (events & (x == 0)).any()):
            design.term_notes[t] = MONOTONE_NOTE
    used = [t for t in design.terms if t not in constant]
    if not len(frame):
        return None, "no rows to analyse"
    if not used:
        return None, "no term left to estimate"
    return _quietly(lambda: model.fit(frame, covariates=used, **roles))


def build_design(base: pd.DataFrame, exposure: ExposureCoding, covariates: CovariateCoding,
                 ms: np.ndarray, level: np.ndarray) -> Design:
    """Join exposure and covariate columns to ``base`` (same rows); drop incomplete rows."""
    x_e = exposure.columns(ms, level)
    x_c = covariates.columns(base)
    terms = [*exposure.terms, *covariates.terms]
    x = np.column_stack([x_e, x_c]) if terms else np.empty((len(base), 0))
    missing = ~np.isfinite(x).all(axis=1) if terms else np.zeros(len(base), bool)
    if exposure.kind == "category":
        missing |= np.array([v is None for v in level])
    out = base.loc[~missing].reset_index(drop=True).copy()
    for j, term in enumerate(terms):
        out[term] = x[~missing, j]
    units = dict(zip(terms, [*exposure.units, *covariates.units], strict=True))
    refs = dict(zip(terms, [*exposure.references, *covariates.references], strict=True))
    return Design(out, terms, units, refs, exposure, int(missing.sum()))


def _person_design(ctx: AnalysisContext, frame: pl.DataFrame, o: dict,
                   columns: Sequence[str]) -> Design:
    """Design of a person-level frame (one row per at-risk person)."""
    ms, level = _ms_and_level(ctx, frame)
    o = {**o, "_levels": ctx.frames.exposure.levels if ctx.frames.exposure is not None else ()}
    coding = exposure_coding(ctx, o, ms, level)
    base = frame.select(list(columns)).to_pandas()
    covs = covariate_coding(frame, o["covariates"])
    cov_frame = frame.select(list(o["covariates"])).to_pandas() if o["covariates"] else base
    base = pd.concat([base, cov_frame.drop(columns=[c for c in cov_frame if c in base])], axis=1)
    return build_design(base, coding, covs, ms, level)


# --------------------------------------------------------------------------- model rows


def coefficient_rows(model: Any, design: Design, endpoint: str, name: str, note: str,
                     ph_alpha: float) -> pd.DataFrame:
    """One tidy row per design term (estimates empty where a term or the fit failed)."""
    rows = pd.DataFrame({"term": design.terms or [""]})
    if model is not None:
        with np.errstate(all="ignore"):  # diverging terms are blanked below
            summary = model.summary
        summary["ph_flag"] = (summary["ph_p"] < ph_alpha).astype("boolean")
        rows = rows.merge(summary, on="term", how="left")
    for c in COEFFICIENT_COLUMNS:
        if c not in rows:
            rows[c] = np.nan
    blank = [t for t, n in design.term_notes.items() if n == MONOTONE_NOTE]
    numbers = ["estimate", "se", "se_naive", "hr", "lower", "upper", "z", "p"]
    rows.loc[rows["term"].isin(blank), numbers] = np.nan
    rows.loc[rows["term"].isin(blank), "ph_p"] = np.nan
    if "ph_flag" in rows and rows["ph_flag"].dtype == "boolean":
        rows.loc[rows["term"].isin(blank), "ph_flag"] = pd.NA
    common = [n for n in (design.note, note) if n]
    rows["note"] = ["; ".join([*common, *([design.term_notes[t]] if t in design.term_notes else [])])
                    for t in rows["term"]]
    rows["endpoint"] = endpoint
    rows["model"] = name
    rows["reference"] = rows["term"].map(design.references)
    rows["unit"] = rows["term"].map(design.units)
    out = rows[list(COEFFICIENT_COLUMNS)].copy()
    for c in ("n", "events"):
        out[c] = out[c].astype("Int64")
    out["ph_flag"] = out["ph_flag"].astype("boolean")
    return out


def ph_rows(model: Any, endpoint: str, name: str, ph_alpha: float) -> pd.DataFrame:
    """Grambsch-Therneau test per term and GLOBAL, flagged where p < ph_alpha."""
    if model is None:
        return _empty(PH_COLUMNS)
    test = model.ph_test_.copy()
    test["endpoint"] = endpoint
    test["model"] = name
    test["flag"] = test["p"] < ph_alpha
    test["df"] = test["df"].astype("Int64")
    return test[list(PH_COLUMNS)]


def curve_rows(model: Any, design: Design, endpoint: str, name: str, o: dict,
               alpha: float) -> pd.DataFrame | None:
    """HR vs PR relative to reference_ms with its band (spline codings only)."""
    coding = design.exposure
    if coding.kind != "spline" or model is None or not set(coding.terms) <= set(model.params_.index):
        return None
    if o["curve_range_ms"] is not None:
        lo, hi = (float(v) for v in o["curve_range_ms"])
    else:
        pr = design.frame[coding.terms[0]].to_numpy()  # the linear basis column is PR in ms
        lo, hi = _round5(np.quantile(pr, 0.01), False), _round5(np.quantile(pr, 0.99), True)
    grid = np.arange(lo, hi + 1e-9, float(o["curve_step_ms"]))
    curve = hr_curve(model, list(coding.terms), coding.knots, grid, coding.reference_ms, alpha)
    curve = curve.rename(columns={"value": "pr_ms"})
    curve.insert(0, "model", name)
    curve.insert(0, "endpoint", endpoint)
    curve["reference_ms"] = coding.reference_ms
    return curve[list(HR_CURVE_COLUMNS)]


def _coefficient_summary(frames: dict[str, pl.DataFrame]) -> list[str]:
    coef = frames.get("coefficients")
    if coef is None:
        return []
    lines = []
    for r in coef.filter(pl.col("term").str.starts_with("pr_per") | pl.col("term").str.starts_with("exposure[")).iter_rows(named=True):
        at = f" from landmark {r['landmark']:g}" if r.get("landmark") is not None else ""
        if r["hr"] is None or not math.isfinite(r["hr"]):
            lines.append(f"{r['endpoint']} ({r['model']}){at}: {r['term']} not estimable "
                         f"({r['events'] or 0} events)")
            continue
        lines.append(f"{r['endpoint']} ({r['model']}){at}: {r['term']} HR {r['hr']:.3f} "
                     f"({r['lower']:.3f}-{r['upper']:.3f}), {r['events']} events")
    flagged = coef.filter(pl.col("ph_flag").fill_null(False))["term"].to_list()
    if flagged:
        lines.append(f"proportional hazards questionable (Grambsch-Therneau p < ph_alpha) for: "
                     f"{', '.join(flagged)}")
    return lines


# --------------------------------------------------------------------------- kaplan_meier

KM_OPTIONS: dict[str, Key] = {
    "endpoint": _endpoint_key(),
    "group": _group_key(),
    "times": _times_key(),
    "ci": Key((str,), "log-log", CI_CHOICES, "interval transform (log-log: Kalbfleisch & "
              "Prentice; limits stay in [0, 1])"),
    "alpha": ALPHA_KEY,
}


def _check_km(source: SpecSource, path: KeyPath, o: dict, spec: Spec) -> None:
    _check_endpoint(source, path, o["endpoint"], spec)
    _check_group(source, path, o, spec)
    _check_times(o, spec)


def _curve_frame(ctx: AnalysisContext, o: dict) -> tuple[pd.DataFrame, list[str], str | None]:
    frame = ctx.frames.endpoint_frame(o["endpoint"])
    grouped, levels = _group_levels(ctx, frame, o["group"])
    data = grouped.select("entry", "exit", "status", "_group").to_pandas()
    return data, levels, _entry_column(data)


def _curve_parts(summary: pd.DataFrame, at_times: pd.DataFrame, at_risk: pd.DataFrame,
                 o: dict, levels: list[str], terms: list[str]) -> dict[str, pd.DataFrame]:
    head = {"endpoint": o["endpoint"], "group_by": o["group"]}
    ranks = {"group": _rank(levels), "term": _rank(terms)}
    out = {}
    for part, frame, cols, keys in (
        ("curve", summary, CURVE_COLUMNS, ["group", "term", "time"]),
        ("at_times", at_times, AT_TIMES_COLUMNS, ["group", "term", "time"]),
        ("at_risk", at_risk, AT_RISK_COLUMNS, ["group", "time"]),
    ):
        frame = frame.assign(**head)
        out[part] = _ordered(frame, keys, ranks)[list(cols)]
    return out


def run_kaplan_meier(ctx: AnalysisContext, o: dict) -> dict[str, pd.DataFrame]:
    """Kaplan-Meier per group; under competing events 1 - KM is labelled risk_naive."""
    data, levels, entry = _curve_frame(ctx, o)
    if data.empty:
        return {p: _empty(c) for p, c in (("curve", CURVE_COLUMNS), ("at_times", AT_TIMES_COLUMNS),
                                          ("at_risk", AT_RISK_COLUMNS))}
    competing = bool(ctx.spec.endpoints[o["endpoint"]].competing)
    km = KaplanMeier(alpha=o["alpha"], ci=o["ci"], event_of_interest=1,
                     competing_event_present=competing)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # reported as risk_naive and in the summary
        km.fit(data, duration="exit", event="status", entry=entry, group="_group")
    risk_term = "risk_naive" if km.competing_ else "risk"
    days = whole_days(o["times"])
    at = at_requested(km.survival_at(days), o["times"])
    risk = at.assign(term=risk_term, estimate=1 - at["estimate"], lower=1 - at["upper"],
                     upper=1 - at["lower"])
    at_times = pd.concat([at.assign(term="survival"), risk], ignore_index=True)
    return _curve_parts(km.summary, at_times, at_requested(km.at_risk_table(days), o["times"]), o, levels,
                        ["survival", "risk", "risk_naive"])


def _km_summary(frames: dict[str, pl.DataFrame]) -> list[str]:
    curve = frames.get("curve")
    if curve is None or curve.height == 0:
        return []
    lines = []
    if (curve["term"] == "risk_naive").any():
        lines.append(f"warning: {curve['endpoint'][0]} has competing events, which Kaplan-Meier "
                     "treats as censored: 1 - KM (risk_naive) overstates the risk; use "
                     "kind = \"cumulative_incidence\" (Aalen-Johansen) for the risk")
    return lines


# --------------------------------------------------------------------------- cumulative_incidence

CIF_OPTIONS: dict[str, Key] = {
    "endpoint": _endpoint_key(),
    "group": _group_key(),
    "times": _times_key(),
    "ci": Key((str,), "log-log", CI_CHOICES, "interval transform of the cumulative incidence"),
    "variance": Key((str,), "delta", ("delta", "aalen"), "delta method (Dinse & Larson) or "
                    "Aalen-type variance"),
    "gray_rho": Key((int, float), 0, doc="weight exponent of Gray's test", check=non_negative),
    "alpha": ALPHA_KEY,
}


def _check_cif(source: SpecSource, path: KeyPath, o: dict, spec: Spec) -> None:
    _check_km(source, path, o, spec)


def _gray_part(aj: AalenJohansen, o: dict, levels: list[str], entry: str | None) -> pd.DataFrame:
    head = {"endpoint": o["endpoint"], "group_by": o["group"]}
    if len(levels) < 2:
        return _empty(GRAY_COLUMNS)
    test, note = _quietly(lambda: aj.gray_test(rho=float(o["gray_rho"])))
    if test is None:
        return pd.DataFrame([{**head, "term": t, "note": note} for t in aj.cause_labels_],
                            columns=list(GRAY_COLUMNS))
    if entry is not None and not note:
        note = "delayed entry (age time scale): left-truncated risk sets plugged in"
    test = test.assign(**head, note=note)
    test["df"] = test["df"].astype("Int64")
    return test[list(GRAY_COLUMNS)]


def run_cumulative_incidence(ctx: AnalysisContext, o: dict) -> dict[str, pd.DataFrame]:
    """Aalen-Johansen cumulative incidence of the endpoint and each competing endpoint."""
    data, levels, entry = _curve_frame(ctx, o)
    names = _cause_names(ctx.spec, o["endpoint"])
    empty = {p: _empty(c) for p, c in (("curve", CURVE_COLUMNS), ("at_times", AT_TIMES_COLUMNS),
                                       ("at_risk", AT_RISK_COLUMNS), ("gray_test", GRAY_COLUMNS))}
    if data.empty or (data["status"] == 0).all():
        return empty  # no event of any cause: every curve is 0
    aj = AalenJohansen(alpha=o["alpha"], ci=o["ci"], variance=o["variance"], cause_names=names)
    aj.fit(data, duration="exit", event="status", entry=entry, group="_group")
    days = whole_days(o["times"])
    out = _curve_parts(aj.summary, at_requested(aj.cumulative_incidence_at(days), o["times"]),
                       at_requested(aj.at_risk_table(days), o["times"]), o, levels,
                       list(names.values()))
    out["gray_test"] = _gray_part(aj, o, levels, entry)
    return out


def _cif_summary(frames: dict[str, pl.DataFrame]) -> list[str]:
    at = frames.get("at_times")
    if at is None or at.height == 0:
        return []
    last = at["time"].max()
    rows = at.filter((pl.col("time") == last) & (pl.col("term") == pl.col("endpoint")))
    return [f"{r['endpoint']} at {last:g} years, {r['group']}: {100 * r['estimate']:.2f}% "
            f"({100 * r['lower']:.2f}-{100 * r['upper']:.2f})" for r in rows.iter_rows(named=True)]


# --------------------------------------------------------------------------- cox / fine_gray


def _regression_options(robust_default: bool) -> dict[str, Key]:
    return {
        "endpoint": _endpoint_key(),
        **_exposure_keys(),
        "covariates": Key((list,), None, items=(str,), check=_covariate_list,
                          doc="covariates at index (default age, sex)"),
        "robust": Key((bool,), robust_default, doc="robust (Lin-Wei sandwich) variance in se"),
        "ties": Key((str,), "efron", ("efron", "breslow"), "ties of the partial likelihood"),
        "ph_alpha": Key((float,), 0.05, check=alpha_level, doc="ph_flag where the PH test p < this"),
        "ph_transform": Key((str,), "km", ("km", "rank", "identity"), "time transform of the "
                            "Grambsch-Therneau test"),
        "alpha": ALPHA_KEY,
    }


COX_OPTIONS = _regression_options(False)
FINE_GRAY_OPTIONS = _regression_options(True)
_REGRESSION_EXPOSURES = ("spec", "category", "per_ms", "per_sd", "spline", "none")


def _check_cox(source: SpecSource, path: KeyPath, o: dict, spec: Spec) -> None:
    _check_endpoint(source, path, o["endpoint"], spec)
    _check_exposure(source, path, o, spec, allowed=_REGRESSION_EXPOSURES)
    _check_covariates(source, path, o, spec)


def _check_fine_gray(source: SpecSource, path: KeyPath, o: dict, spec: Spec) -> None:
    _check_cox(source, path, o, spec)
    _refuse_age_scale(source, path, spec, "Fine-Gray regression keeps persons with a competing "
                      "event in the risk set and has no delayed entry (late entry at the age at "
                      "index)")
    if not spec.endpoints[o["endpoint"]].competing:
        _fail(source, (*path, "endpoint"), f"endpoint '{o['endpoint']}' has no competing "
              "endpoints: its subdistribution hazard is the cause-specific one; use kind = "
              "\"cox\", or declare competing = [...] for the endpoint")


def _regression_parts(model: Any, design: Design, o: dict, name: str, note: str) -> dict[str, pd.DataFrame]:
    out = {"coefficients": coefficient_rows(model, design, o["endpoint"], name, note, o["ph_alpha"]),
           "ph_test": ph_rows(model, o["endpoint"], name, o["ph_alpha"])}
    curve = curve_rows(model, design, o["endpoint"], name, o, o["alpha"])
    if curve is not None:
        out["hr_curve"] = curve
    return out


def run_cox(ctx: AnalysisContext, o: dict) -> dict[str, pd.DataFrame]:
    """Cause-specific Cox model for the endpoint (other causes censored), Efron ties."""
    frame = ctx.frames.endpoint_frame(o["endpoint"])
    design = _person_design(ctx, frame, o, ["entry", "exit", "status"])
    entry = _entry_column(design.frame) if len(design.frame) else None
    model = CoxPH(alpha=o["alpha"], ties=o["ties"], robust=o["robust"], event_of_interest=1,
                  ph_transform=o["ph_transform"], ph_alpha=o["ph_alpha"])
    fitted, note = fit_design(design, model, duration="exit", event="status", entry=entry)
    return _regression_parts(fitted, design, o, "cause_specific_cox", note)


def run_fine_gray(ctx: AnalysisContext, o: dict) -> dict[str, pd.DataFrame]:
    """Fine-Gray subdistribution hazards of the endpoint, competing endpoints kept at risk."""
    frame = ctx.frames.endpoint_frame(o["endpoint"])
    design = _person_design(ctx, frame, o, ["exit", "status"])
    model = FineGray(event_of_interest=1, alpha=o["alpha"], ties=o["ties"], robust=o["robust"],
                     ph_transform=o["ph_transform"], ph_alpha=o["ph_alpha"])
    fitted, note = fit_design(design, model, duration="exit", event="status")
    return _regression_parts(fitted, design, o, "fine_gray", note)


_REGRESSION_PARTS = {"coefficients": COEFFICIENT_COLUMNS, "ph_test": PH_COLUMNS,
                     "hr_curve": HR_CURVE_COLUMNS}

# --------------------------------------------------------------------------- time_updated_cox

TIME_UPDATED_OPTIONS: dict[str, Key] = {
    **_regression_options(True),
    "exposure": Key((str,), "spec", ("spec", "per_ms", "per_sd", "spline", "none"),
                    "PR carried forward from each ECG: as the spec codes it, per ms, per SD, "
                    "a restricted cubic spline, or none"),
    "time_updated_events": Key((list,), [], POST_INDEX_EVENTS, "events after index entered "
                               "as indicators that switch on the day they happen",
                               items=(str,), check=distinct),
}


def _check_time_updated(source: SpecSource, path: KeyPath, o: dict, spec: Spec) -> None:
    _check_endpoint(source, path, o["endpoint"], spec)
    _check_exposure(source, path, o, spec, allowed=("spec", "per_ms", "per_sd", "spline", "none"),
                    time_updated=True)
    _check_covariates(source, path, o, spec)
    own = {kind for kind, _ in spec.components(o["endpoint"])}
    ep = spec.endpoints[o["endpoint"]]
    for other in (*ep.competing, *ep.censor_at):
        own |= {kind for kind, _ in spec.components(other)}
    clash = [e for e in o["time_updated_events"] if e in own]
    if clash:
        _fail(source, (*path, "time_updated_events"), f"'{clash[0]}' ends follow-up for "
              f"endpoint '{o['endpoint']}' (as its event, a competing or a censoring event), so "
              "its indicator could never be 1 while at risk; remove it")


def _onset_days(ctx: AnalysisContext, kinds: Sequence[str]) -> pl.DataFrame:
    """Earliest day since index of each event kind per person (any source)."""
    if not kinds:
        return pl.DataFrame(schema={"person_key": pl.String, "event_kind": pl.String,
                                    "day": pl.Int64})
    events = query(ctx.frames.con, "study/person_event.sql", {"rule_set_id": ctx.frames.rule_set})
    index = ctx.frames.persons.select("person_key", "index_date")
    return (events.filter(pl.col("event_kind").is_in(list(kinds)))
            .join(index, on="person_key", how="inner")
            .group_by("person_key", "event_kind")
            .agg(pl.min("event_date").alias("event_date"), pl.first("index_date"))
            .with_columns((pl.col("event_date") - pl.col("index_date")).dt.total_days().alias("day"))
            .select("person_key", "event_kind", "day"))


def split_at_events(intervals: pl.DataFrame, onsets: pl.DataFrame, kinds: Sequence[str]) -> pl.DataFrame:
    """Split (start_day, stop_day] intervals at event days; add one 0/1 column per kind.

    An event on day d sets its indicator to 1 on intervals starting at or after d: the
    interval (a, d] keeps 0 (an event at d is not known before d), so an endpoint on the same
    day as the event is counted with the indicator still 0.
    """
    spans = intervals.group_by("person_key").agg(pl.min("start_day").alias("first"),
                                                 pl.max("stop_day").alias("last"))
    cuts = [intervals.select("person_key", pl.col("start_day").alias("cut"))]
    inside = onsets.join(spans, on="person_key").filter(
        (pl.col("day") > pl.col("first")) & (pl.col("day") < pl.col("last")))
    cuts.append(inside.select("person_key", pl.col("day").cast(intervals["start_day"].dtype).alias("cut")))
    cut = pl.concat(cuts).unique().sort("person_key", "cut")
    cut = cut.join(spans, on="person_key").with_columns(
        pl.col("cut").shift(-1).over("person_key").fill_null(pl.col("last")).alias("stop_day"))
    last_event = intervals.filter(pl.col("stop_day") == pl.col("stop_day").max().over("person_key"))
    cut = cut.join(last_event.select("person_key", pl.col("stop_day"), pl.col("event")),
                   on=["person_key", "stop_day"], how="left").with_columns(pl.col("event").fill_null(0))
    values = intervals.select("person_key", "start_day", "pr_ms", "heart_rate").sort("start_day")
    cut = cut.rename({"cut": "start_day"}).sort("start_day").join_asof(
        values, on="start_day", by="person_key", strategy="backward",
        check_sortedness=False)  # both sides are sorted on start_day just above
    for kind in kinds:
        days = onsets.filter(pl.col("event_kind") == kind).select("person_key", pl.col("day").alias("_d"))
        cut = cut.join(days, on="person_key", how="left").with_columns(
            (pl.col("_d").is_not_null() & (pl.col("_d") <= pl.col("start_day"))).cast(pl.Float64)
            .alias(kind)).drop("_d")
    return cut.sort("person_key", "start_day").select(
        "person_key", "start_day", "stop_day", "event", "pr_ms", "heart_rate", *kinds)


def _counting_rows(ctx: AnalysisContext, o: dict) -> pl.DataFrame:
    cp = ctx.frames.counting_process(o["endpoint"])
    kinds = list(o["time_updated_events"])
    rows = split_at_events(cp, _onset_days(ctx, kinds), kinds)
    ages = ctx.frames.persons.select("person_key", pl.col("age").alias("_age0"))
    rows = rows.join(ages, on="person_key", how="left")
    if ctx.spec.follow_up.time_scale == "age":
        start = pl.col("_age0") + pl.col("start_day") / DAYS_PER_YEAR
        stop = pl.col("_age0") + pl.col("stop_day") / DAYS_PER_YEAR
    else:
        start, stop = pl.col("start_day") / DAYS_PER_YEAR, pl.col("stop_day") / DAYS_PER_YEAR
    return rows.with_columns(start.alias("start"), stop.alias("stop")).sort("person_key", "start_day")


def _interval_ms(ctx: AnalysisContext, rows: pl.DataFrame) -> np.ndarray:
    info = ctx.frames.exposure
    if info is not None and info.spec.measure == "pr_corrected":
        expr = measure_values(rows, info.spec, info.slope_ms_per_bpm)
    else:
        expr = pl.col("pr_ms").cast(pl.Float64)
    return rows.select(expr.fill_null(np.nan)).to_series().to_numpy()


def run_time_updated_cox(ctx: AnalysisContext, o: dict) -> dict[str, pd.DataFrame]:
    """Counting-process Cox model with PR carried forward from each ECG, robust by person."""
    persons = ctx.frames.endpoint_frame(o["endpoint"])
    ms0, level0 = _ms_and_level(ctx, persons)
    coding = exposure_coding(ctx, o, ms0, level0)  # SD and knots of PR at index
    rows = _counting_rows(ctx, o)
    covs = covariate_coding(persons, o["covariates"])
    rows = rows.join(persons.select("person_key", *o["covariates"]), on="person_key", how="left")
    base = rows.select("person_key", "start", "stop", "event", *o["time_updated_events"],
                       *o["covariates"]).to_pandas()
    design = build_design(base, coding, covs, _interval_ms(ctx, rows), np.full(rows.height, None))
    design.add_terms(o["time_updated_events"], "after vs before the event")
    model = CoxPH(alpha=o["alpha"], ties=o["ties"], robust=o["robust"], event_of_interest=1,
                  ph_transform=o["ph_transform"], ph_alpha=o["ph_alpha"])
    fitted, note = fit_design(design, model, duration="stop", event="event", entry="start",
                              id="person_key")
    if design.dropped:  # intervals, not persons, in the counting-process frame
        note = "; ".join(n for n in (f"{design.dropped} intervals without a PR value (before "
                                     "the first measurable PR) or a covariate left out", note) if n)
        design.dropped = 0
    return _regression_parts(fitted, design, o, "time_updated_cox", note)


# --------------------------------------------------------------------------- interval_censored

INTERVAL_OPTIONS: dict[str, Key] = {
    "endpoint": _endpoint_key(),
    "group": _group_key(),
    "times": _times_key(),
    "n_boot": Key((int,), 100, check=non_negative, doc="bootstrap replicates of the Turnbull "
                  "intervals (0 = none)"),
    "censored_until": Key((str,), "last_ecg", ("last_ecg", "end_of_follow_up"), "persons "
                          "never seen with the endpoint: right-censored at their last ECG "
                          "without it, or at the end of follow-up (a block would have been "
                          "seen)"),
    "alpha": ALPHA_KEY,
}


def _check_interval(source: SpecSource, path: KeyPath, o: dict, spec: Spec) -> None:
    _check_endpoint(source, path, o["endpoint"], spec)
    _refuse_age_scale(source, path, spec, "the Turnbull estimator here has no delayed entry")
    for kind, src in spec.components(o["endpoint"]):
        if kind not in ECG_DETECTED_EVENTS or src != "ecg":
            _fail(source, (*path, "endpoint"), f"endpoint '{o['endpoint']}' includes "
                  f"{kind} from source '{src}', which is not dated by an ECG; interval "
                  "censoring needs an event seen on ECGs: event = one of "
                  f"{', '.join(ECG_DETECTED_EVENTS)} with source = \"ecg\"")
    _check_group(source, path, o, spec)
    _check_times(o, spec)


def _intervals(ctx: AnalysisContext, endpoint: str, censored_until: str) -> pl.DataFrame:
    """(left, right] in years since index from sql/study/ecg_intervals.sql."""
    tables = {"study_endpoint_time": ctx.frames.endpoints,
              "study_cohort": ctx.frames.persons.select("person_key", "index_date")}
    rows = query(ctx.frames.con, "study/ecg_intervals.sql",
                 {"endpoint": endpoint, "rule_set_id": ctx.frames.rule_set}, tables)
    left = pl.col("left_day")
    if censored_until == "end_of_follow_up":
        left = pl.when(pl.col("right_day").is_null()).then(pl.col("stop_day")).otherwise(left)
    return rows.with_columns(
        (left / DAYS_PER_YEAR).alias("left"),
        (pl.col("right_day") / DAYS_PER_YEAR).fill_null(np.inf).alias("right"))


def _turnbull_rows(rows: pd.DataFrame, o: dict, rng: np.random.Generator
                   ) -> tuple[pd.DataFrame, pd.DataFrame]:
    tb = Turnbull(alpha=o["alpha"], n_boot=o["n_boot"], seed=rng)
    # SQUAREM trial steps may divide by an emptied interval; the EM falls back on them.
    with warnings.catch_warnings(), np.errstate(all="ignore"):
        warnings.simplefilter("ignore", UserWarning)
        tb.fit(rows, left="left", right="right")
    curve = tb.summary.query("term == 'risk'")[["term", "time", "estimate", "se", "lower",
                                                 "upper", "events"]]
    times = whole_days(o["times"])
    iv = tb.intervals_
    # Mass of the innermost intervals ending at or before t (the right-end convention).
    risk = np.array([iv.loc[iv["right"] <= t, "probability"].sum() for t in times])
    grid = curve["time"].to_numpy()
    idx = np.searchsorted(grid, times, side="right") - 1

    def at(col: str) -> np.ndarray:
        vals = curve[col].to_numpy(dtype=float)
        return np.where(idx >= 0, vals[np.maximum(idx, 0)], 0.0)

    at_times = pd.DataFrame({"term": "risk", "time": o["times"], "estimate": risk, "se": at("se"),
                             "lower": at("lower"), "upper": at("upper")})
    return curve, at_times


def _width_row(rows: pd.DataFrame) -> dict[str, Any]:
    seen = rows[np.isfinite(rows["right"])]
    width = (seen["right"] - seen["left"]).to_numpy()
    return {"persons": len(rows), "events_seen": len(seen),
            "right_censored": len(rows) - len(seen),
            "median_width_years": float(np.median(width)) if width.size else np.nan,
            "mean_width_years": float(np.mean(width)) if width.size else np.nan,
            "median_ecgs": float(np.median(rows["n_ecg"])) if len(rows) else np.nan}


def run_interval_censored(ctx: AnalysisContext, o: dict) -> dict[str, pd.DataFrame]:
    """Turnbull NPMLE from ECG intervals beside the right-censored KM and Aalen-Johansen."""
    rows = _intervals(ctx, o["endpoint"], o["censored_until"]).join(
        ctx.frames.persons.select("person_key", *([o["group"]] if o["group"] != "none" else [])),
        on="person_key", how="left")
    grouped, levels = _group_levels(ctx, rows, o["group"])
    data = grouped.select("left", "right", "n_ecg", "_group").to_pandas()
    rng = ctx.rng()
    curves, at_times, widths = [], [], []
    for g in levels:
        part = data[data["_group"] == g]
        widths.append({"group": g, **_width_row(part)})
        if not np.isfinite(part["right"]).any():
            continue  # no event seen: the NPMLE puts no mass anywhere
        c, a = _turnbull_rows(part, o, rng)
        curves.append(c.assign(group=g, method="turnbull"))
        at_times.append(a.assign(group=g, method="turnbull"))
    right = _right_censored(ctx, o)
    curves.extend(right[0])
    at_times.extend(right[1])
    return _interval_parts(curves, at_times, widths, o, levels)


def _right_censored(ctx: AnalysisContext, o: dict) -> tuple[list[pd.DataFrame], list[pd.DataFrame]]:
    """Kaplan-Meier (1 - KM) and Aalen-Johansen risks of the endpoint, dated at detection."""
    km_o = {**o, "ci": "log-log"}
    km = run_kaplan_meier(ctx, km_o)
    curves, at_times = [], []
    risk = km["curve"][km["curve"]["term"] != "survival"]
    curves.append(risk.assign(method="kaplan_meier"))
    at_times.append(km["at_times"][km["at_times"]["term"] != "survival"].assign(method="kaplan_meier"))
    cif = run_cumulative_incidence(ctx, {**km_o, "variance": "delta", "gray_rho": 0})
    own = cif["curve"][cif["curve"]["term"] == o["endpoint"]]
    curves.append(own.assign(method="aalen_johansen"))
    at_times.append(cif["at_times"][cif["at_times"]["term"] == o["endpoint"]].assign(method="aalen_johansen"))
    return curves, at_times


def _interval_parts(curves: list, at_times: list, widths: list, o: dict,
                    levels: list[str]) -> dict[str, pd.DataFrame]:
    ranks = {"group": _rank(levels), "method": _rank(["turnbull", "kaplan_meier", "aalen_johansen"])}
    out = {}
    for part, frames, cols in (("estimates", curves, INTERVAL_COLUMNS),
                               ("at_times", at_times, INTERVAL_AT_TIMES_COLUMNS)):
        frames = [f for f in frames if len(f)]
        if not frames:
            out[part] = _empty(cols)
            continue
        frame = pd.concat(frames, ignore_index=True).assign(endpoint=o["endpoint"])
        out[part] = _ordered(frame, ["method", "group", "time"], ranks)[list(cols)]
    summary = pd.DataFrame(widths).assign(endpoint=o["endpoint"])
    out["intervals"] = summary[list(INTERVAL_SUMMARY_COLUMNS)]
    return out


def _interval_summary(frames: dict[str, pl.DataFrame]) -> list[str]:
    at = frames.get("at_times")
    if at is None or at.height == 0:
        return []
    last = at["time"].max()
    rows = at.filter(pl.col("time") == last)
    parts = [f"{r['method']} {100 * r['estimate']:.2f}%" for r in rows.iter_rows(named=True)
             if r["group"] == rows["group"][0]]
    return [f"{at['endpoint'][0]} risk at {last:g} years ({rows['group'][0]}): " + ", ".join(parts)]


# --------------------------------------------------------------------------- multistate

MULTISTATE_OPTIONS: dict[str, Key] = {
    "model": Key((str,), "conduction", ("conduction", "competing"), "conduction: normal -> "
                 "first-degree -> higher-grade -> pacemaker, death absorbing; competing: the "
                 "endpoint and its competing endpoints from the event-free state"),
    "endpoint": Key((str,), None, doc="competing model: the endpoint"),
    "mobitz_i_as": Key((str,), "first_degree", ("first_degree", "higher_grade"), "state of an "
                       "ECG with Mobitz I block (not higher-grade in the default rule set)"),
    "times": _times_key(),
    "n_boot": Key((int,), 200, check=non_negative, doc="bootstrap replicates over persons"),
    "alpha": ALPHA_KEY,
}


def _check_multistate(source: SpecSource, path: KeyPath, o: dict, spec: Spec) -> None:
    if o["model"] == "competing":
        if o["endpoint"] is None:
            _fail(source, path, "model = \"competing\" needs endpoint = \"<name>\"")
        _check_endpoint(source, path, o["endpoint"], spec)
    else:
        if o["endpoint"] is not None:
            _fail(source, (*path, "endpoint"), "endpoint applies only to model = \"competing\" "
                  "(the conduction model has its own states); remove it")
        _refuse_age_scale(source, path, spec, "the conduction model starts everyone at index "
                          "in their state then (the initial distribution of the Aalen-Johansen "
                          "estimator)")
    _check_times(o, spec)


def _conduction_sojourns(ctx: AnalysisContext, o: dict) -> tuple[pl.DataFrame, int]:
    """Sojourns from sql/study/state_transitions.sql; also the persons without an entry state."""
    v = ctx.frames.variant
    persons = ctx.frames.persons
    end = pl.col("possible_followup_days")
    if v.horizon_days is not None:
        end = pl.min_horizontal(end, pl.lit(v.horizon_days))
    follow = persons.select("person_key", "index_date",
                            pl.lit(v.lag_days).cast(pl.Int64).alias("entry_day"),
                            end.cast(pl.Int64).alias("end_day"))
    rows = query(ctx.frames.con, "study/state_transitions.sql",
                 {"rule_set_id": ctx.frames.rule_set, "mobitz_i_state": o["mobitz_i_as"]},
                 {"study_followup": follow})
    eligible = follow.filter(pl.col("end_day") > pl.col("entry_day")).height
    left_out = eligible - rows["person_key"].n_unique()
    return rows.with_columns((pl.col("start_day") / DAYS_PER_YEAR).alias("start"),
                             (pl.col("stop_day") / DAYS_PER_YEAR).alias("stop")), left_out


def _competing_sojourns(ctx: AnalysisContext, o: dict) -> pl.DataFrame:
    names = _cause_names(ctx.spec, o["endpoint"])
    frame = ctx.frames.endpoint_frame(o["endpoint"])
    return frame.select(
        "person_key", pl.lit("event_free").alias("from_state"),
        pl.col("status").replace_strict(names, default=None, return_dtype=pl.String).alias("to_state"),
        pl.col("entry").alias("start"), pl.col("exit").alias("stop"))


def run_multistate(ctx: AnalysisContext, o: dict) -> dict[str, pd.DataFrame]:
    """Transition counts, Nelson-Aalen hazards and Aalen-Johansen state occupation."""
    if o["model"] == "conduction":
        rows, left_out = _conduction_sojourns(ctx, o)
        states, transitions = CONDUCTION_STATES, CONDUCTION_TRANSITIONS
    else:
        rows, left_out = _competing_sojourns(ctx, o), 0
        names = list(_cause_names(ctx.spec, o["endpoint"]).values())
        states = ("event_free", *names)
        transitions = tuple(("event_free", n) for n in names)
    if rows.height == 0:
        return {p: _empty(c) for p, c in _MULTISTATE_PARTS.items()}
    ms = MultiState(states, transitions, alpha=o["alpha"], n_boot=o["n_boot"], seed=ctx.rng())
    ms.fit(rows.select("person_key", "from_state", "to_state", "start", "stop"),
           id="person_key", from_state="from_state", to_state="to_state", start="start",
           stop="stop")
    return _multistate_parts(ms, o, states, left_out)


def _multistate_parts(ms: MultiState, o: dict, states: Sequence[str], left_out: int
                      ) -> dict[str, pd.DataFrame]:
    model = o["model"]
    ranks = {"state": _rank(states), "from_state": _rank(states),
             "to_state": _rank([*states, "censored"])}
    occ = ms.summary.rename(columns={"term": "state"}).assign(model=model)
    times = whole_days(o["times"])
    at = []
    for state, part in occ.groupby("state", sort=False):
        grid = part["time"].to_numpy()
        idx = np.searchsorted(grid, times, side="right") - 1
        first = ms.occupation_at(times)[state].to_numpy()
        cols = {c: np.where(idx >= 0, part[c].to_numpy()[np.maximum(idx, 0)], np.nan)
                for c in ("se", "lower", "upper")}
        at.append(pd.DataFrame({"model": model, "state": state, "time": o["times"],
                                "estimate": first, **cols}))
    counts = ms.transition_counts_.assign(model=model)
    if left_out:
        counts = pd.concat([counts, pd.DataFrame([{"model": model, "from_state": "no_state_at_entry",
                                                   "to_state": "left_out", "count": left_out}])],
                           ignore_index=True)
    hazards = ms.cumulative_hazard_.assign(model=model)
    return {
        "occupation": _ordered(occ, ["state", "time"], ranks)[list(OCCUPATION_COLUMNS)],
        "at_times": _ordered(pd.concat(at, ignore_index=True), ["state", "time"], ranks)[list(OCCUPATION_AT_TIMES_COLUMNS)],
        "transitions": _ordered(counts, ["from_state", "to_state"], ranks)[list(TRANSITION_COLUMNS)],
        "hazards": _ordered(hazards, ["from_state", "to_state", "time"], ranks)[list(HAZARD_COLUMNS)],
    }


_MULTISTATE_PARTS = {"occupation": OCCUPATION_COLUMNS, "at_times": OCCUPATION_AT_TIMES_COLUMNS,
                     "transitions": TRANSITION_COLUMNS, "hazards": HAZARD_COLUMNS}


def _multistate_summary(frames: dict[str, pl.DataFrame]) -> list[str]:
    at = frames.get("at_times")
    if at is None or at.height == 0:
        return []
    last = at["time"].max()
    rows = at.filter(pl.col("time") == last)
    return [f"state occupation at {last:g} years: " + ", ".join(
        f"{r['state']} {100 * r['estimate']:.1f}%" for r in rows.iter_rows(named=True))]


# --------------------------------------------------------------------------- absolute_risk

PROFILE_COVARIATES = ("age", "sex", "bundle_branch_block")
ABSOLUTE_RISK_OPTIONS: dict[str, Key] = {
    "endpoint": _endpoint_key(),
    **{k: v for k, v in _exposure_keys().items() if k != "reference"},
    "exposure": Key((str,), "per_ms", ("spec", "per_ms", "per_sd", "spline", "none"),
                    "PR at index per ms, per SD, as a spline, or none"),
    "covariates": Key((list,), None, PROFILE_COVARIATES, "covariates of the cause-specific "
                      "models (default age, sex)", items=(str,), check=distinct),
    "horizons": Key((list,), [5, 10], items=(int, float), check=_positive_list,
                    doc="years after index at which risk is reported"),
    "profile_ages": Key((list,), [50, 60, 70, 80], items=(int, float), check=increasing,
                        doc="ages at index of the profiles"),
    "profile_sexes": Key((list,), ["F", "M"], ("F", "M"), "sexes of the profiles",
                         items=(str,), check=distinct),
    "profile_pr_ms": Key((list,), [160, 220], items=(int, float), check=increasing,
                         doc="PR at index (ms) of the profiles"),
    "profile_bundle_branch_block": Key((list,), ["no"], ("no", "yes"), "bundle branch block "
                                       "of the profiles (with that covariate)", items=(str,),
                                       check=distinct),
    "n_boot": Key((int,), 100, check=non_negative, doc="bootstrap replicates over persons"),
    "ties": Key((str,), "efron", ("efron", "breslow"), "ties of the Cox fits"),
    "alpha": ALPHA_KEY,
}


def _check_absolute_risk(source: SpecSource, path: KeyPath, o: dict, spec: Spec) -> None:
    _check_endpoint(source, path, o["endpoint"], spec)
    _refuse_age_scale(source, path, spec, "absolute risk is reported at horizons after index")
    o["reference"] = None
    _check_exposure(source, path, o, spec, allowed=("spec", "per_ms", "per_sd", "spline", "none"))
    _check_covariates(source, path, o, spec, allowed=PROFILE_COVARIATES)
    pop = spec.population
    for age in o["profile_ages"]:
        if age < pop.age_from or (pop.age_below is not None and age >= pop.age_below):
            _fail(source, (*path, "profile_ages"), f"profile age {age} lies outside the study's "
                  f"ages at index ({pop.age_from}"
                  f"{'-' + str(pop.age_below - 1) if pop.age_below else '+'}): the models would "
                  "extrapolate; choose ages inside")


def _profiles(o: dict) -> pd.DataFrame:
    rows = []
    bbb = o["profile_bundle_branch_block"] if "bundle_branch_block" in o["covariates"] else [None]
    use_pr = o["exposure"] != "none"
    for age in o["profile_ages"]:
        for sex in o["profile_sexes"]:
            for pr in (o["profile_pr_ms"] if use_pr else [None]):
                for b in bbb:
                    rows.append({"age": float(age), "sex": sex, "pr_ms": pr, "bundle_branch_block": b})
    return pd.DataFrame(rows)


def run_absolute_risk(ctx: AnalysisContext, o: dict) -> dict[str, pd.DataFrame]:
    """Cumulative incidence at horizons for profiles from combined cause-specific Cox models."""
    frame = ctx.frames.endpoint_frame(o["endpoint"])
    design = _person_design(ctx, frame, o, ["exit", "status"])
    profiles = _profiles(o)
    covs = covariate_coding(frame, o["covariates"])
    pr = profiles["pr_ms"].to_numpy(dtype=float)
    x = np.column_stack([design.exposure.columns(pr, None), covs.columns(profiles)])
    names = _cause_names(ctx.spec, o["endpoint"])
    model = AbsoluteRisk(horizons=[float(h) for h in o["horizons"]], alpha=o["alpha"],
                         ties=o["ties"], cause_names=names, n_boot=o["n_boot"], seed=ctx.rng())
    fitted, note = _quietly(lambda: model.fit(
        design.frame, duration="exit", event="status", covariates=design.terms,
        profiles=pd.DataFrame(x, columns=design.terms)))
    if fitted is None:
        raise DataError(f"absolute_risk for {o['endpoint']}: {note}")
    out = fitted.summary.rename(columns={"term": "cause"})
    out = out.join(profiles, on="profile").assign(endpoint=o["endpoint"])
    out["n"] = out["n"].astype("Int64")
    out["events"] = out["events"].astype("Int64")
    ranks = {"cause": _rank(list(names.values()))}
    return {"risk": _ordered(out, ["cause", "time", "profile"], ranks)[list(RISK_COLUMNS)]}


def _absolute_risk_summary(frames: dict[str, pl.DataFrame]) -> list[str]:
    risk = frames.get("risk")
    if risk is None or risk.height == 0:
        return []
    own = risk.filter(pl.col("cause") == pl.col("endpoint"))
    lo, hi = own["estimate"].min(), own["estimate"].max()
    return [f"{own['endpoint'][0]}: absolute risk across profiles {100 * lo:.2f}% to "
            f"{100 * hi:.2f}% at {own['time'].min():g}-{own['time'].max():g} years"]


# --------------------------------------------------------------------------- landmark

LANDMARK_OPTIONS: dict[str, Key] = {
    **{k: v for k, v in _regression_options(False).items() if k != "reference"},
    "exposure": Key((str,), "per_ms", ("per_ms", "per_sd", "spline", "none"),
                    "PR last measured on or before the landmark: per ms, per SD, spline, none"),
    "landmarks": Key((list,), [0, 1, 2, 5], items=(int, float), check=_non_negative_list,
                     doc="landmark times (years since index)"),
    "window_years": Key((int, float), 5, check=positive,
                        doc="follow-up after each landmark (administrative censoring)"),
    "events_at_landmark": Key((list,), [], POST_INDEX_EVENTS, "events after index, as 0/1 "
                              "states on the landmark day", items=(str,), check=distinct),
}


def _check_landmark(source: SpecSource, path: KeyPath, o: dict, spec: Spec) -> None:
    _check_endpoint(source, path, o["endpoint"], spec)
    _refuse_age_scale(source, path, spec, "landmarks are times since index")
    o["reference"] = None
    _check_exposure(source, path, o, spec, allowed=("per_ms", "per_sd", "spline", "none"),
                    time_updated=True)
    _check_covariates(source, path, o, spec)
    own = {kind for kind, _ in spec.components(o["endpoint"])}
    clash = [e for e in o["events_at_landmark"] if e in own]
    if clash:
        _fail(source, (*path, "events_at_landmark"), f"'{clash[0]}' is the event of endpoint "
              f"'{o['endpoint']}': persons with it before the landmark are not at risk, so "
              "the state is always 0; remove it")


def _landmark_sets(ctx: AnalysisContext, o: dict) -> pd.DataFrame:
    """Landmark data sets with PR and event states measured on each landmark day."""
    frame = ctx.frames.endpoint_frame(o["endpoint"])
    base = frame.select("person_key", "entry", "exit", "status", "age", *[
        c for c in o["covariates"] if c != "age"]).to_pandas()
    sets = landmark(base, landmarks=o["landmarks"], duration="exit", event="status",
                    entry="entry", horizon=float(o["window_years"]))
    sets["_day"] = sets["landmark"] * DAYS_PER_YEAR
    sets["age"] = sets["age"] + sets["landmark"]  # age at the landmark
    cp = ctx.frames.counting_process(o["endpoint"])
    ms = _interval_ms(ctx, cp)
    cp = cp.select("person_key", "start_day", "stop_day").with_columns(pl.Series("_ms", ms)).to_pandas()
    merged = sets.merge(cp, on="person_key", how="left")
    inside = (merged["start_day"] <= merged["_day"]) & (merged["_day"] < merged["stop_day"])
    pr = merged.loc[inside, ["person_key", "landmark", "_ms"]]
    sets = sets.merge(pr, on=["person_key", "landmark"], how="left")
    onsets = _onset_days(ctx, o["events_at_landmark"]).to_pandas()
    for kind in o["events_at_landmark"]:
        d = onsets.loc[onsets["event_kind"] == kind, ["person_key", "day"]]
        sets = sets.merge(d.rename(columns={"day": f"_{kind}"}), on="person_key", how="left")
        sets[kind] = (sets[f"_{kind}"] <= sets["_day"]).astype(float)
    return sets


def run_landmark(ctx: AnalysisContext, o: dict) -> dict[str, pd.DataFrame]:
    """Cause-specific Cox models from each landmark, exposures measured at the landmark."""
    persons = ctx.frames.endpoint_frame(o["endpoint"])
    ms0, level0 = _ms_and_level(ctx, persons)
    coding = exposure_coding(ctx, o, ms0, level0)
    covs = covariate_coding(persons, o["covariates"])
    sets = _landmark_sets(ctx, o)
    coefs, counts = [], []
    for s in o["landmarks"]:
        part = sets[sets["landmark"] == s].reset_index(drop=True)
        design = build_design(part, coding, covs, part["_ms"].to_numpy(dtype=float),
                              np.full(len(part), None))
        design.add_terms(o["events_at_landmark"], "present vs absent at the landmark")
        model = CoxPH(alpha=o["alpha"], ties=o["ties"], robust=o["robust"], event_of_interest=1,
                      ph_transform=o["ph_transform"], ph_alpha=o["ph_alpha"])
        fitted, note = fit_design(design, model, duration="exit", event="status")
        rows = coefficient_rows(fitted, design, o["endpoint"], "landmark_cox", note, o["ph_alpha"])
        coefs.append(rows.assign(landmark=float(s)))
        st = design.frame["status"]
        counts.append({"landmark": float(s), "endpoint": o["endpoint"], "at_risk": len(design.frame),
                       "events": int((st == 1).sum()), "competing": int((st >= 2).sum()),
                       "censored": int((st == 0).sum()), "left_out": design.dropped})
    return {"coefficients": pd.concat(coefs, ignore_index=True)[list(LANDMARK_COLUMNS)],
            "counts": pd.DataFrame(counts, columns=list(LANDMARK_COUNT_COLUMNS))}


# --------------------------------------------------------------------------- registration

KINDS: tuple[AnalysisKind, ...] = (
    AnalysisKind(
        name="kaplan_meier", run=run_kaplan_meier, options=KM_OPTIONS, check=_check_km,
        parts={"curve": CURVE_COLUMNS, "at_times": AT_TIMES_COLUMNS, "at_risk": AT_RISK_COLUMNS},
        description="Kaplan-Meier with log-log Greenwood intervals and numbers at risk; "
                    "1 - KM labelled risk_naive under competing events",
        summary=_km_summary),
    AnalysisKind(
        name="cumulative_incidence", run=run_cumulative_incidence, options=CIF_OPTIONS,
        check=_check_cif,
        parts={"curve": CURVE_COLUMNS, "at_times": AT_TIMES_COLUMNS, "at_risk": AT_RISK_COLUMNS,
               "gray_test": GRAY_COLUMNS},
        description="Aalen-Johansen cumulative incidence per cause with Gray's test",
        summary=_cif_summary),
    AnalysisKind(
        name="cox", run=run_cox, options=COX_OPTIONS, check=_check_cox, parts=_REGRESSION_PARTS,
        description="cause-specific Cox regression (Efron) with PR categories, per ms, per SD "
                    "or spline, PH test", summary=_coefficient_summary),
    AnalysisKind(
        name="fine_gray", run=run_fine_gray, options=FINE_GRAY_OPTIONS, check=_check_fine_gray,
        parts=_REGRESSION_PARTS, description="Fine-Gray subdistribution hazards, robust variance",
        summary=_coefficient_summary),
    AnalysisKind(
        name="time_updated_cox", run=run_time_updated_cox, options=TIME_UPDATED_OPTIONS,
        check=_check_time_updated, parts=_REGRESSION_PARTS,
        description="counting-process Cox with PR carried forward from each ECG, robust by person",
        summary=_coefficient_summary),
    AnalysisKind(
        name="interval_censored", run=run_interval_censored, options=INTERVAL_OPTIONS,
        check=_check_interval,
        parts={"estimates": INTERVAL_COLUMNS, "at_times": INTERVAL_AT_TIMES_COLUMNS,
               "intervals": INTERVAL_SUMMARY_COLUMNS},
        description="Turnbull NPMLE from ECG intervals beside right-censored KM / Aalen-Johansen",
        summary=_interval_summary),
    AnalysisKind(
        name="multistate", run=run_multistate, options=MULTISTATE_OPTIONS,
        check=_check_multistate, parts=_MULTISTATE_PARTS,
        description="multi-state model: transition counts, Nelson-Aalen hazards, "
                    "Aalen-Johansen state occupation with bootstrap limits",
        summary=_multistate_summary),
    AnalysisKind(
        name="absolute_risk", run=run_absolute_risk, options=ABSOLUTE_RISK_OPTIONS,
        check=_check_absolute_risk, parts={"risk": RISK_COLUMNS},
        description="absolute risk at horizons for age / sex / PR profiles",
        summary=_absolute_risk_summary),
    AnalysisKind(
        name="landmark", run=run_landmark, options=LANDMARK_OPTIONS, check=_check_landmark,
        parts={"coefficients": LANDMARK_COLUMNS, "counts": LANDMARK_COUNT_COLUMNS},
        description="landmark Cox models with PR and events measured at each landmark",
        summary=_coefficient_summary),
)

for _kind in KINDS:
    register_kind(_kind)

__all__ = ["KINDS", "CovariateCoding", "ExposureCoding", "build_design", "covariate_coding",
           "exposure_coding", "split_at_events"]
