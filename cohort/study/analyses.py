"""Registry of analysis kinds: kind -> function(context, options) -> tidy frames.

Each :class:`AnalysisKind` declares its options (validated like the spec, with file lines),
its output parts with a fixed column order, an optional cross-check against the spec and an
optional summary. ``run`` receives an :class:`AnalysisContext` (the study frames of one
variant, the analysis entry and a seeded random generator) and the validated options, and
returns ``{part: frame}`` with exactly the declared columns; the run layer prepends the
``variant`` column and writes ``tables/<name>.csv`` (first part) and
``tables/<name>_<part>.csv`` (the others).

Adding a kind (e.g. a survival estimator of :mod:`cohort.stats`) is one call::

    register_kind(AnalysisKind(
        name="kaplan_meier",
        run=my_function,                       # (ctx, options) -> {"curve": frame}
        parts={"curve": ("endpoint", "group", "time", "estimate", ...)},
        options={"endpoint": Key((str,), REQUIRED, doc="endpoint name")},
        check=my_check,                        # (source, path, options, spec) -> None
    ))

``ctx.frames.endpoint_frame(name)`` gives at-risk persons with ``entry``, ``exit`` (time
scale of the spec), ``status`` (0 censored, 1 event, 2+ competing) and the exposure and
covariate columns; ``ctx.frames.counting_process(name)`` the time-updated PR intervals.
"""

from __future__ import annotations

import hashlib
import warnings
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
import polars as pl
from statsmodels.tools.sm_exceptions import PerfectSeparationWarning

from cohort.errors import DataError
from cohort.stats.proportions import proportion_intervals
from cohort.stats.rates import poisson_rates, rate_ratio
from cohort.stats.standardize import (
    STANDARD_POPULATIONS,
    StandardPopulation,
    load_standard_population,
    standardized_table,
)
from cohort.stats.table_one import TABLE_ONE_COLUMNS, table_one
from cohort.stats.trend import TREND_METHODS, proportion_trend
from cohort.study.schema import (
    REQUIRED,
    Key,
    KeyPath,
    SpecSource,
    alpha_level,
    check_table,
    distinct,
    increasing,
    nearest,
    positive,
)
from cohort.study.spec import COVARIATES, DAYS_PER_YEAR, AnalysisSpec, Spec
from cohort.vocabulary import AV_CATEGORIES, RHYTHM_CLASSES, VENTRICULAR_CONDUCTION

Frames = Mapping[str, pl.DataFrame | pd.DataFrame]

AXES: dict[str, tuple[str, tuple[str, ...]]] = {
    "av": ("av_category", tuple(AV_CATEGORIES)),
    "ventricular": ("ventricular_conduction", tuple(VENTRICULAR_CONDUCTION)),
    "rhythm": ("rhythm_class", tuple(RHYTHM_CLASSES)),
}
PREVALENCE_STRATA = ("overall", "sex", "age_band", "age_band_sex")
DEFAULT_AGE_EDGES = [18, 40, 50, 60, 70, 80, 90]
INCIDENCE_VARIABLES = ("exposure", "sex", "age_band", "site")
RATIO_VARIABLES = ("exposure", "sex")


@dataclass(frozen=True)
class AnalysisContext:
    """What an analysis kind sees: the frames of one variant and its own spec entry."""

    frames: Any  # cohort.study.builder.StudyFrames
    analysis: AnalysisSpec

    @property
    def spec(self) -> Spec:
        return self.frames.spec

    def rng(self) -> np.random.Generator:
        """A Generator seeded from the spec seed, the variant and the analysis name."""
        text = f"{self.spec.seed}/{self.frames.variant.name}/{self.analysis.name}"
        return np.random.default_rng(int(hashlib.sha256(text.encode()).hexdigest()[:16], 16))


Check = Callable[[SpecSource, KeyPath, dict, Spec], None]


@dataclass(frozen=True)
class AnalysisKind:
    """One kind of analysis: options, output parts (fixed columns), run, check, summary."""

    name: str
    run: Callable[[AnalysisContext, dict], Frames]
    parts: dict[str, tuple[str, ...]]
    options: dict[str, Key]
    check: Check | None = None
    description: str = ""
    summary: Callable[[dict[str, pl.DataFrame]], list[str]] | None = None


ANALYSIS_KINDS: dict[str, AnalysisKind] = {}


def register_kind(kind: AnalysisKind) -> AnalysisKind:
    """Add (or replace) a kind in :data:`ANALYSIS_KINDS`; returns it."""
    if not kind.parts:
        raise ValueError(f"analysis kind {kind.name!r} declares no output parts")
    ANALYSIS_KINDS[kind.name] = kind
    return kind


def check_analysis(source: SpecSource, path: KeyPath, kind: str, raw: dict, spec: Spec) -> dict:
    """Validate one [[analyses]] entry's options (kind and name already removed)."""
    k = ANALYSIS_KINDS[kind]
    options = check_table(source, path, raw, k.options, what=f"analyses of kind {kind}")
    if k.check is not None:
        k.check(source, path, options, spec)
    return options


def run_analysis(ctx: AnalysisContext) -> dict[str, pl.DataFrame]:
    """Run one analysis; return its parts as polars frames with the declared columns."""
    kind = ANALYSIS_KINDS[ctx.analysis.kind]
    out = kind.run(ctx, ctx.analysis.options)
    frames = {}
    for part, columns in kind.parts.items():
        if part not in out:
            continue
        frame = out[part]
        if isinstance(frame, pd.DataFrame):
            frame = pl.from_pandas(frame, nan_to_null=False)
        if tuple(frame.columns) != tuple(columns):
            raise RuntimeError(
                f"analysis kind {kind.name} returned part {part!r} with columns "
                f"{frame.columns}, not its declared {list(columns)}"
            )
        frames[part] = frame
    return frames


# --------------------------------------------------------------------------- shared helpers


def _fail(source: SpecSource, path: KeyPath, message: str) -> None:
    raise source.fail(path, message)


def band_labels(edges: Sequence[int]) -> list[str]:
    """Labels of bands starting at ``edges`` (last open): [18, 40] -> 18-39, 40+."""
    out = []
    for i, lo in enumerate(edges):
        out.append(f"{lo}+" if i == len(edges) - 1 else f"{lo}-{edges[i + 1] - 1}")
    return out


def add_age_band(frame: pl.DataFrame, edges: Sequence[int], age: str = "age_completed") -> pl.DataFrame:
    """Add ``age_band`` (label) and ``_band_rank`` from completed ages."""
    labels = band_labels(edges)
    idx = np.searchsorted(np.asarray(edges), frame[age].to_numpy(), side="right") - 1
    return frame.with_columns(
        pl.Series("_band_rank", idx, dtype=pl.Int64),
        pl.Series("age_band", [labels[i] if i >= 0 else None for i in idx], dtype=pl.String),
    )


def _rank_map(values: Sequence[Any]) -> dict[Any, int]:
    return {v: i for i, v in enumerate(values)}


def _check_edges(source: SpecSource, path: KeyPath, edges: list[int], spec: Spec) -> None:
    pop = spec.population
    if edges[0] > pop.age_from:
        _fail(source, (*path, "age_bands"), f"the first age band starts at {edges[0]}, above "
              f"population.age_from ({pop.age_from:g}): persons aged {pop.age_from:g}-"
              f"{edges[0] - 1} would have no band; start the bands at or below age_from")
    if edges[0] < 0:
        _fail(source, (*path, "age_bands"), "age band edges must be >= 0")


def _time_updated_refused(source: SpecSource, path: KeyPath, spec: Spec, what: str) -> None:
    if spec.exposure is not None and spec.exposure.time_updated:
        _fail(source, (*path, "kind"), f"{what} cannot use a time-updated exposure "
              "(exposure.kind = \"pr_time_updated\" changes after index); declare a fixed "
              "exposure such as pr_continuous or pr_category, or drop this analysis")


def _exposure_groups_needed(source: SpecSource, path: KeyPath, spec: Spec, what: str) -> None:
    exp = spec.exposure
    if exp is None:
        _fail(source, path, f"{what} needs an [exposure] table with kind pr_category or "
              "pr_percentile")
    if not exp.categorical:
        _fail(source, path, f"{what} needs exposure groups, but exposure.kind is "
              f"\"{exp.kind}\"; use pr_category or pr_percentile")


# --------------------------------------------------------------------------- prevalence

PREVALENCE_COLUMNS = ("basis", "year", "axis", "category", "stratum", "sex", "age_band",
                      "events", "n", "estimate", "lower", "upper", "method", "alpha")
STANDARDIZED_PART_COLUMNS = ("basis", "year", "axis", "category", "sex", "standard", "events",
                             "population", "crude", "estimate", "se", "lower", "upper",
                             "coverage", "method", "alpha", "note")
TREND_PART_COLUMNS = ("basis", "axis", "category", "sex", "term", "estimate", "lower", "upper",
                      "slope", "se", "p", "events", "n", "first_year", "last_year", "n_years",
                      "method", "alpha", "note")


PREVALENCE_OPTIONS: dict[str, Key] = {
    "basis": Key((str,), "index", ("index", "calendar_year"),
                 "index ECG, or each person's first ECG of each calendar year"),
    "axes": Key((list,), list(AXES), tuple(AXES), "category axes", items=(str,), check=distinct),
    "age_bands": Key((list,), DEFAULT_AGE_EDGES, items=(int,), check=increasing,
                     doc="lower edges of the age bands (completed years; last band open)"),
    "strata": Key((list,), list(PREVALENCE_STRATA), PREVALENCE_STRATA, "strata reported",
                  items=(str,), check=distinct),
    "methods": Key((list,), ["wilson", "clopper_pearson"], ("wilson", "clopper_pearson"),
                   "confidence interval methods", items=(str,), check=distinct),
    "standards": Key((list,), list(STANDARD_POPULATIONS), STANDARD_POPULATIONS,
                     "standard populations for direct age standardization", items=(str,),
                     check=distinct),
    "standard_top_age": Key((int,), 85, doc="standard bands from this age are merged into one "
                            "open band", check=positive),
    "trend": Key((bool,), None, doc="trend across calendar years (default: yes for "
                 "calendar_year, no for index)"),
    "trend_method": Key((str,), "poisson", TREND_METHODS, "trend model"),
    "alpha": Key((float,), 0.05, doc="two-sided level", check=alpha_level),
}


def _check_prevalence(source: SpecSource, path: KeyPath, o: dict, spec: Spec) -> None:
    _time_updated_refused(source, path, spec, "a prevalence analysis is cross-sectional and")
    _check_edges(source, path, o["age_bands"], spec)
    for name in o["standards"]:
        lowers = {b[0] for b in load_standard_population(name).bands}
        if o["standard_top_age"] not in lowers:
            _fail(source, (*path, "standard_top_age"), f"standard_top_age {o['standard_top_age']} "
                  f"is not a band limit of standard {name} (limits: "
                  f"{', '.join(map(str, sorted(lowers)))}); use e.g. 85")
    if o["trend"] is None:
        o["trend"] = o["basis"] == "calendar_year"


def _prevalence_base(ctx: AnalysisContext, o: dict) -> pl.DataFrame:
    cols = ["sex", "age_completed", *(AXES[a][0] for a in o["axes"])]
    if o["basis"] == "index":
        persons = ctx.frames.persons
        return persons.select(pl.col("index_year").cast(pl.Int64).alias("year"), *cols)
    return ctx.frames.ecg_year().select(pl.col("year").cast(pl.Int64), *cols)


def _strata_keys(stratum: str, by_year: bool) -> list[str]:
    keys = {"overall": [], "sex": ["sex"], "age_band": ["age_band"],
            "age_band_sex": ["age_band", "sex"]}[stratum]
    return (["year"] if by_year else []) + keys


def _category_counts(base: pl.DataFrame, keys: list[str], column: str, cats: Sequence[str]) -> pl.DataFrame:
    """Events per category and denominator per group, every category of the axis present."""
    frame = base.with_columns(pl.lit(0).alias("_all"))
    group = keys or ["_all"]
    denom = frame.group_by(group).agg(pl.len().alias("n"))
    events = frame.group_by([*group, column]).agg(pl.len().alias("events"))
    grid = denom.join(pl.DataFrame({column: list(cats)}, schema={column: pl.String}), how="cross")
    out = grid.join(events, on=[*group, column], how="left").with_columns(
        pl.col("events").fill_null(0))
    return out.rename({column: "category"})


def _prevalence_estimates(base: pl.DataFrame, o: dict, by_year: bool) -> pl.DataFrame:
    parts = []
    axis_rank = _rank_map(o["axes"])
    for axis in o["axes"]:
        column, cats = AXES[axis]
        cat_rank = _rank_map(cats)
        for s_rank, stratum in enumerate(s for s in PREVALENCE_STRATA if s in o["strata"]):
            counts = _category_counts(base, _strata_keys(stratum, by_year), column, cats)
            for m_rank, method in enumerate(o["methods"]):
                res = proportion_intervals(counts["events"].to_numpy(), counts["n"].to_numpy(),
                                           o["alpha"], method)
                parts.append(counts.with_columns(
                    pl.lit(axis).alias("axis"), pl.lit(stratum).alias("stratum"),
                    pl.Series("estimate", res.estimate), pl.Series("lower", res.lower),
                    pl.Series("upper", res.upper), pl.lit(method).alias("method"),
                    pl.lit(o["alpha"]).alias("alpha"), pl.lit(axis_rank[axis]).alias("_a"),
                    pl.col("category").replace_strict(cat_rank, return_dtype=pl.Int64).alias("_c"),
                    pl.lit(s_rank).alias("_s"), pl.lit(m_rank).alias("_m"),
                ))
    return _finish_prevalence(parts, o, by_year)


def _finish_prevalence(parts: list[pl.DataFrame], o: dict, by_year: bool) -> pl.DataFrame:
    band_rank = _rank_map(band_labels(o["age_bands"]))
    cols = {"year": pl.Int64, "sex": pl.String, "age_band": pl.String}
    keep = ["axis", "category", "stratum", *cols, "events", "n", "estimate", "lower", "upper",
            "method", "alpha", "_a", "_c", "_s", "_m"]
    fixed = []
    for p in parts:
        p = p.with_columns([pl.lit(None, dtype=t).alias(c) for c, t in cols.items()
                            if c not in p.columns])
        fixed.append(p.with_columns([pl.col(c).cast(t) for c, t in cols.items()]).select(keep))
    out = pl.concat(fixed, how="vertical_relaxed").with_columns(
        pl.col("age_band").replace_strict(band_rank, default=-1, return_dtype=pl.Int64).alias("_b"))
    out = out.sort(["_a", "year", "_c", "_s", "sex", "_b", "_m"], nulls_last=False)
    return out.with_columns(pl.lit(o["basis"]).alias("basis"),
                            pl.col("events").cast(pl.Int64), pl.col("n").cast(pl.Int64)).select(
        PREVALENCE_COLUMNS)


def standard_bands(name: str, top_age: int) -> list[tuple[int, int | None, float]]:
    """(lower, upper, weight) of a standard with every band from ``top_age`` merged (open)."""
    std = load_standard_population(name)
    w = std.weights
    kept = [(lo, hi, float(wt)) for (lo, hi), wt in zip(std.bands, w, strict=True) if lo < top_age]
    top = float(sum(wt for (lo, _), wt in zip(std.bands, w, strict=True) if lo >= top_age))
    return [*kept, (top_age, None, top)]


def clipped_standard(name: str, top_age: int, age_from: int, age_below: int | None
                     ) -> tuple[StandardPopulation, float, str]:
    """The standard restricted to the study ages [age_from, age_below), with its coverage.

    A band cut by a study age limit keeps the share of its weight that its single years inside
    the limit make up (ages taken as uniform within the band); an open band cut from above
    keeps its whole weight (its width is unknown). Returns the restricted standard (labels like
    "18-19"), the share of the full standard's weight kept, and a note on the cut bands.
    """
    rows, notes = [], []
    for lo, hi, wt in standard_bands(name, top_age):
        if (hi is not None and hi < age_from) or (age_below is not None and lo >= age_below):
            continue
        new_lo = max(lo, age_from)
        new_hi = hi if age_below is None else (age_below - 1 if hi is None else min(hi, age_below - 1))
        share = 1.0 if hi is None else (new_hi - new_lo + 1) / (hi - lo + 1)
        if (new_lo, new_hi) != (lo, hi):
            label = _band_label((lo, hi))
            notes.append(f"band {label} cut to {_band_label((new_lo, new_hi))}"
                         + (f" (weight x {share:.4g})" if share < 1 else " (open band: whole weight)"))
        rows.append(((new_lo, new_hi), wt * share))
    bands = [b for b, _ in rows]
    weights = [w for _, w in rows]
    std = StandardPopulation.from_weights(name, bands, weights)
    return std, float(sum(weights)), "; ".join(notes)


def _band_label(band: tuple[int, int | None]) -> str:
    lo, hi = band
    return f"{lo}+" if hi is None else (str(lo) if hi == lo else f"{lo}-{hi}")


def _standardized(base: pl.DataFrame, o: dict, by_year: bool, spec: Spec) -> pl.DataFrame:
    rows = []
    pop = spec.population
    below = None if pop.age_below is None else int(pop.age_below)
    for name in o["standards"]:
        std, coverage, note = clipped_standard(name, o["standard_top_age"], int(pop.age_from), below)
        labels = [_band_label(b) for b in std.bands]
        lowers = np.array([b[0] for b in std.bands])
        idx = np.searchsorted(lowers, base["age_completed"].to_numpy(), side="right") - 1
        framed = base.with_columns(pl.Series("_std_band", [labels[i] for i in idx], dtype=pl.String))
        for axis in o["axes"]:
            part = _standardize_axis(framed, axis, std, labels, note, o, by_year)
            rows.append(part.with_columns(pl.when(pl.col("estimate").is_not_null())
                                          .then(pl.lit(coverage)).alias("coverage")))
    out = pl.concat(rows, how="vertical_relaxed")
    return out.with_columns(pl.lit(o["basis"]).alias("basis")).select(STANDARDIZED_PART_COLUMNS)


def _standardize_axis(framed: pl.DataFrame, axis: str, standard: StandardPopulation,
                      labels: list[str], note: str, o: dict, by_year: bool) -> pl.DataFrame:
    column, cats = AXES[axis]
    framed = framed.with_columns(pl.lit("all").alias("_sex_all"))
    results = []
    for sex_col in ("_sex_all", "sex"):
        keys = (["year"] if by_year else []) + [sex_col]
        counts = _category_counts(framed, [*keys, "_std_band"], column, cats)
        pops = counts.select([*keys, "_std_band", "n"]).unique()
        present = pops.group_by(keys).agg(pl.col("_std_band").n_unique().alias("_k"),
                                          pl.col("_std_band").alias("_bands"))
        complete = present.filter(pl.col("_k") == len(labels)).select(keys)
        incomplete = present.filter(pl.col("_k") < len(labels))
        ok = counts.join(complete, on=keys, how="inner")
        if ok.height:
            tab = standardized_table(ok, age_band="_std_band", events="events", population="n",
                                     by=[*keys, "category"], standard=standard,
                                     method="fay_feuer", alpha=o["alpha"])
            frame = pl.from_pandas(tab).with_columns(pl.lit(note).alias("note"))
            results.append(_sex_column(frame, sex_col))
        if incomplete.height:
            results.append(_incomplete_rows(incomplete, counts, keys, sex_col, labels,
                                            standard.name, cats, o))
    out = pl.concat([_standard_shape(r, by_year) for r in results], how="vertical_relaxed")
    cat_rank = _rank_map(cats)
    out = out.with_columns(pl.lit(axis).alias("axis"),
                           pl.col("category").replace_strict(cat_rank, return_dtype=pl.Int64).alias("_c"),
                           (pl.col("sex") == "all").alias("_all"))
    return out.sort(["year", "_c", "_all", "sex"], descending=[False, False, True, False],
                    nulls_last=False).drop("_c", "_all")


def _sex_column(frame: pl.DataFrame, sex_col: str) -> pl.DataFrame:
    if sex_col == "_sex_all":
        return frame.rename({"_sex_all": "sex"})
    return frame


def _incomplete_rows(incomplete: pl.DataFrame, counts: pl.DataFrame, keys: list[str],
                     sex_col: str, labels: list[str], standard: str, cats: Sequence[str],
                     o: dict) -> pl.DataFrame:
    """Rows of groups lacking persons in some standard band: counts kept, no estimate."""
    rows = []
    for rec in incomplete.iter_rows(named=True):
        missing = [b for b in labels if b not in set(rec["_bands"])]
        key_filter = [pl.col(k) == rec[k] for k in keys]
        part = counts.filter(*key_filter)
        for cat in cats:
            sub = part.filter(pl.col("category") == cat)
            events = int(sub["events"].sum())
            n = float(sub.select(["_std_band", "n"]).unique()["n"].sum())
            row = {k: rec[k] for k in keys}
            row.update({"category": cat, "events": events, "population": n,
                        "crude": events / n if n else None, "estimate": None, "se": None,
                        "lower": None, "upper": None, "standard": standard, "coverage": None,
                        "per": 1.0, "method": "fay_feuer", "alpha": o["alpha"],
                        "note": f"not standardized: no persons in band(s) {', '.join(missing)}"})
            rows.append(row)
    frame = pl.DataFrame(rows, infer_schema_length=None)
    return _sex_column(frame, sex_col)


def _standard_shape(frame: pl.DataFrame, by_year: bool) -> pl.DataFrame:
    floats = ("population", "crude", "estimate", "se", "lower", "upper", "coverage", "alpha")
    frame = frame.with_columns(*[pl.col(c).cast(pl.Float64) for c in floats],
                               pl.col("events").cast(pl.Int64))
    if not by_year:
        frame = frame.with_columns(pl.lit(None, dtype=pl.Int64).alias("year"))
    return frame.select("year", "category", "sex", "standard", "events", "population", "crude",
                        "estimate", "se", "lower", "upper", "coverage", "method", "alpha", "note")


def _trend(base: pl.DataFrame, o: dict) -> pl.DataFrame:
    rows = []
    frame = base.with_columns(pl.lit("all").alias("_sex_all"))
    for axis in o["axes"]:
        column, cats = AXES[axis]
        for sex_col in ("_sex_all", "sex"):
            counts = _category_counts(frame, ["year", sex_col], column, cats)
            for (sex, cat), part in sorted(counts.partition_by([sex_col, "category"], as_dict=True).items(),
                                           key=lambda kv: (kv[0][0] != "all", kv[0][0], cats.index(kv[0][1]))):
                rows.append(_trend_row(part, axis, cat, sex, o))
    schema = dict.fromkeys(TREND_PART_COLUMNS, pl.Float64)
    schema.update({c: pl.String for c in ("basis", "axis", "category", "sex", "term", "method", "note")})
    schema.update({"events": pl.Int64, "n": pl.Int64, "n_years": pl.Int64})
    return pl.DataFrame(rows, schema=schema, orient="row").select(TREND_PART_COLUMNS)


def _trend_row(part: pl.DataFrame, axis: str, cat: str, sex: str, o: dict) -> tuple:
    years, x, n = (part[c].to_numpy() for c in ("year", "events", "n"))
    head = (o["basis"], axis, cat, sex, "annual_percent_change")
    try:
        if np.all(x == n):
            # every person has the category in every year: the slope has no variance
            raise DataError("the category holds every person in every year")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", PerfectSeparationWarning)  # reported as no trend
            r = proportion_trend(years, x, n, method=o["trend_method"], alpha=o["alpha"])
    except (DataError, ZeroDivisionError) as exc:
        reason = str(exc) if isinstance(exc, DataError) else "zero standard error of the slope"
        yrs = np.unique(years)
        return (*head, None, None, None, None, None, None, int(x.sum()), int(n.sum()),
                float(yrs.min()) if yrs.size else None, float(yrs.max()) if yrs.size else None,
                int(yrs.size), o["trend_method"], o["alpha"], f"no trend: {reason}")
    return (*head, r.apc, r.lower, r.upper, r.slope, r.se, r.p, int(r.events), int(r.n),
            r.first_year, r.last_year, r.n_years, r.method, r.alpha, "")


def run_prevalence(ctx: AnalysisContext, o: dict) -> dict[str, pl.DataFrame]:
    """Prevalence of every category of the chosen axes: crude, stratified, standardized, trend."""
    by_year = o["basis"] == "calendar_year"
    base = add_age_band(_prevalence_base(ctx, o), o["age_bands"])
    out = {"estimates": _prevalence_estimates(base, o, by_year)}
    if o["standards"]:
        out["standardized"] = _standardized(base, o, by_year, ctx.spec)
    if o["trend"]:
        out["trend"] = _trend(base, o)
    return out


def _prevalence_summary(frames: dict[str, pl.DataFrame]) -> list[str]:
    est = frames["estimates"]
    pick = est.filter((pl.col("stratum") == "overall") & (pl.col("axis") == "av")
                      & (pl.col("category") == "first_degree") & pl.col("year").is_null())
    lines = []
    for rec in pick.iter_rows(named=True):
        lines.append(f"first-degree AV block at index: {rec['events']}/{rec['n']} = "
                     f"{100 * rec['estimate']:.2f}% ({100 * rec['lower']:.2f}-"
                     f"{100 * rec['upper']:.2f}, {rec['method']})")
    return lines[:1]


# --------------------------------------------------------------------------- incidence

RATES_COLUMNS = ("endpoint", "stratum", "exposure", "sex", "age_band", "site", "persons",
                 "events", "person_years", "estimate", "lower", "upper", "per", "method", "alpha")
RATIO_PART_COLUMNS = ("endpoint", "variable", "term", "reference", "estimate", "lower", "upper",
                      "p", "events", "person_years", "events_reference", "person_years_reference",
                      "method", "alpha", "note")
FOLLOW_UP_COLUMNS = ("endpoint", "outcome", "persons", "person_years")


def _by_list(value: list) -> str | None:
    problem = distinct(value)
    if problem:
        return problem
    for entry in value:
        parts = entry.split("*")
        bad = [p for p in parts if p not in INCIDENCE_VARIABLES]
        if bad or len(set(parts)) != len(parts):
            return (f"has {entry!r}: use variables {', '.join(INCIDENCE_VARIABLES)}, "
                    "alone or joined by '*' (e.g. \"exposure*sex\")")
    return None


INCIDENCE_OPTIONS: dict[str, Key] = {
    "endpoints": Key((list,), None, doc="endpoints (default: all declared)", items=(str,),
                     check=distinct),
    "by": Key((list,), None, doc="strata besides overall: exposure, sex, age_band (attained "
              "age, Lexis split), site, or products like exposure*age_band", items=(str,),
              check=_by_list),
    "age_bands": Key((list,), DEFAULT_AGE_EDGES, items=(int,), check=increasing,
                     doc="lower edges of attained-age bands"),
    "per": Key((int, float), 1000, doc="rates per this many person-years", check=positive),
    "ratios": Key((list,), None, RATIO_VARIABLES, "rate ratios for these variables",
                  items=(str,), check=distinct),
    "ratio_method": Key((str,), "exact", ("exact", "wald"), "rate ratio interval method"),
    "alpha": Key((float,), 0.05, doc="two-sided level", check=alpha_level),
}


def _check_incidence(source: SpecSource, path: KeyPath, o: dict, spec: Spec) -> None:
    if not spec.endpoints:
        _fail(source, path, "an incidence analysis needs [endpoints.<name>] tables")
    if o["endpoints"] is None:
        o["endpoints"] = list(spec.endpoints)
    for name in o["endpoints"]:
        if name not in spec.endpoints:
            hint = nearest(name, list(spec.endpoints))
            tip = f"did you mean '{hint}'? " if hint else ""
            _fail(source, (*path, "endpoints"), f"'{name}' is not a declared endpoint ({tip}"
                  f"endpoints: {', '.join(spec.endpoints)})")
    grouped = spec.exposure is not None and spec.exposure.categorical
    if o["by"] is None:
        o["by"] = ["exposure"] if grouped else []
    if o["ratios"] is None:
        o["ratios"] = ["exposure"] if grouped else []
    uses = {v for entry in o["by"] for v in entry.split("*")} | set(o["ratios"])
    if "exposure" in uses:
        _time_updated_refused(source, path, spec, "incidence by exposure group")
        _exposure_groups_needed(source, (*path, "by"), spec, "incidence by exposure")
    if any("age_band" in entry.split("*") for entry in o["by"]):
        _check_edges(source, path, o["age_bands"], spec)


def _person_rows(ctx: AnalysisContext, endpoint: str) -> pl.DataFrame:
    ef = ctx.frames.endpoint_frame(endpoint)
    cols = ["person_key", "sex", "site", *(["exposure"] if "exposure" in ef.columns else [])]
    return ef.select(*cols, (pl.col("stop_day") - pl.col("start_day")).alias("days"),
                     (pl.col("status") == 1).cast(pl.Int64).alias("event"))


def _lexis_rows(ctx: AnalysisContext, endpoint: str, edges: list[int]) -> pl.DataFrame:
    lex = ctx.frames.lexis(edges).filter(pl.col("endpoint") == endpoint)
    persons = ctx.frames.persons
    cols = ["person_key", "sex", "site", *(["exposure"] if "exposure" in persons.columns else [])]
    return lex.join(persons.select(cols), on="person_key", how="left").select(
        *cols, "age_band", "age_lower", "days", (pl.col("status_in_band") == 1).cast(pl.Int64).alias("event"))


def _rates_for(rows: pl.DataFrame, keys: list[str], o: dict, levels: Sequence[str]) -> pl.DataFrame:
    group = keys or ["_all"]
    frame = rows.with_columns(pl.lit(0).alias("_all"))
    agg = frame.group_by(group).agg(
        pl.col("person_key").n_unique().alias("persons"),
        pl.col("event").sum().alias("events"),
        pl.col("days").sum().alias("days"),
    )
    if "age_band" in group:
        agg = agg.join(rows.select("age_band", "age_lower").unique(), on="age_band", how="left")
    if "exposure" in group:  # exposure levels in their declared order
        agg = agg.with_columns(pl.col("exposure").replace_strict(
            _rank_map(levels), default=len(levels), return_dtype=pl.Int64).alias("_level"))
    sort_keys = [{"age_band": "age_lower", "exposure": "_level"}.get(k, k) for k in group]
    agg = agg.sort(sort_keys, nulls_last=True)
    person_years = agg["days"].to_numpy().astype(float) / DAYS_PER_YEAR
    res = poisson_rates(agg["events"].to_numpy(), person_years, o["per"], o["alpha"])
    return agg.with_columns(pl.Series("person_years", person_years),
                            pl.Series("estimate", res.estimate), pl.Series("lower", res.lower),
                            pl.Series("upper", res.upper), pl.lit(float(o["per"])).alias("per"),
                            pl.lit(res.method).alias("method"), pl.lit(o["alpha"]).alias("alpha"))


def _incidence_rates(ctx: AnalysisContext, endpoint: str, o: dict) -> pl.DataFrame:
    person_rows = _person_rows(ctx, endpoint)
    parts = []
    for entry in ["overall", *o["by"]]:
        keys = [] if entry == "overall" else entry.split("*")
        rows = _lexis_rows(ctx, endpoint, o["age_bands"]) if "age_band" in keys else person_rows
        if rows.height == 0:
            continue
        levels = ctx.frames.exposure.levels if ctx.frames.exposure is not None else ()
        part = _rates_for(rows, keys, o, levels).with_columns(pl.lit(entry).alias("stratum"))
        parts.append(part)
    cols = {"exposure": pl.String, "sex": pl.String, "age_band": pl.String, "site": pl.String}
    shaped = [p.with_columns([pl.lit(None, dtype=t).alias(c) for c, t in cols.items()
                              if c not in p.columns]) for p in parts]
    if not shaped:
        return pl.DataFrame(schema=dict.fromkeys(RATES_COLUMNS, pl.String)).with_columns(
            pl.lit(endpoint).alias("endpoint"))
    out = pl.concat([s.with_columns(pl.col(c).cast(t) for c, t in cols.items()).select(
        "stratum", *cols, "persons", "events", "person_years", "estimate", "lower", "upper",
        "per", "method", "alpha") for s in shaped], how="vertical_relaxed")
    return out.with_columns(pl.lit(endpoint).alias("endpoint"),
                            pl.col("persons").cast(pl.Int64),
                            pl.col("events").cast(pl.Int64)).select(RATES_COLUMNS)


def _ratio_rows(ctx: AnalysisContext, endpoint: str, o: dict) -> list[tuple]:
    rows_out = []
    rows = _person_rows(ctx, endpoint)
    for var in o["ratios"]:
        sums = rows.group_by(var).agg(pl.col("event").sum().alias("e"), pl.col("days").sum().alias("d"))
        if var == "exposure":
            levels = [lv for lv in ctx.frames.exposure.levels if lv in set(sums[var].to_list())]
            ref = ctx.frames.exposure.reference
        else:
            levels = sorted(v for v in sums[var].to_list() if v is not None)
            ref = "F" if "F" in levels else (levels[0] if levels else None)
        table = {r[var]: (int(r["e"]), r["d"] / DAYS_PER_YEAR) for r in sums.iter_rows(named=True)}
        for level in levels:
            if level == ref:
                continue
            rows_out.append(_ratio_row(endpoint, var, level, ref, table, o))
    return rows_out


def _ratio_row(endpoint: str, var: str, level: str, ref: str | None,
               table: dict[str, tuple[int, float]], o: dict) -> tuple:
    e1, t1 = table[level]
    e0, t0 = table.get(ref, (0, 0.0))
    head = (endpoint, var, str(level), str(ref))
    if ref not in table:
        return (*head, None, None, None, None, e1, t1, 0, 0.0, o["ratio_method"], o["alpha"],
                "no ratio: no person-time in the reference group")
    try:
        rr = rate_ratio(e1, t1, e0, t0, alpha=o["alpha"], method=o["ratio_method"])
    except DataError as exc:
        return (*head, None, None, None, None, e1, t1, e0, t0, o["ratio_method"], o["alpha"],
                f"no ratio: {exc}")
    return (*head, rr.estimate, rr.lower, rr.upper, rr.p, e1, t1, e0, t0, rr.method, rr.alpha, "")


def _follow_up_rows(ctx: AnalysisContext, endpoint: str) -> list[tuple]:
    long = ctx.frames.endpoints.filter(pl.col("endpoint") == endpoint)
    ep = ctx.spec.endpoints[endpoint]
    labels = {0: "censored", 1: "event"}
    labels.update({code: f"competing:{name}" for code, name in enumerate(ep.competing, start=2)})
    at_risk = long.filter(pl.col("at_risk"))
    stats = dict(((r["status"]), (r["persons"], r["days"])) for r in at_risk.group_by("status").agg(
        pl.len().alias("persons"), (pl.col("stop_day") - pl.col("start_day")).sum().alias("days")
    ).iter_rows(named=True))
    rows = [(endpoint, "at_risk", at_risk.height, float(at_risk.select(
        (pl.col("stop_day") - pl.col("start_day")).sum()).item() or 0) / DAYS_PER_YEAR)]
    for code, label in labels.items():
        n, d = stats.get(code, (0, 0))
        rows.append((endpoint, label, int(n), float(d) / DAYS_PER_YEAR))
    reasons = dict(long.filter(~pl.col("at_risk")).group_by("not_at_risk").len().iter_rows())
    for reason in ("event_before_entry", "competing_before_entry", "censored_before_entry",
                   "no_follow_up_after_entry"):
        rows.append((endpoint, f"not_at_risk:{reason}", int(reasons.get(reason, 0)), None))
    return rows


def run_incidence(ctx: AnalysisContext, o: dict) -> dict[str, pl.DataFrame]:
    """Incidence rates per 1,000 person-years (or ``per``), rate ratios and follow-up counts."""
    rates, ratios, follow = [], [], []
    for endpoint in o["endpoints"]:
        rates.append(_incidence_rates(ctx, endpoint, o))
        ratios.extend(_ratio_rows(ctx, endpoint, o))
        follow.extend(_follow_up_rows(ctx, endpoint))
    ratio_schema = dict.fromkeys(RATIO_PART_COLUMNS, pl.Float64)
    ratio_schema.update({c: pl.String for c in ("endpoint", "variable", "term", "reference",
                                                 "method", "note")})
    ratio_schema.update({"events": pl.Int64, "events_reference": pl.Int64})
    follow_schema = {"endpoint": pl.String, "outcome": pl.String, "persons": pl.Int64,
                     "person_years": pl.Float64}
    return {
        "rates": pl.concat(rates, how="vertical_relaxed"),
        "rate_ratios": pl.DataFrame(ratios, schema=ratio_schema, orient="row"),
        "follow_up": pl.DataFrame(follow, schema=follow_schema, orient="row"),
    }


def _incidence_summary(frames: dict[str, pl.DataFrame]) -> list[str]:
    rates = frames["rates"].filter(pl.col("stratum") == "overall")
    return [f"{r['endpoint']}: {r['events']} events in {r['person_years']:,.0f} person-years, "
            f"{r['estimate']:.2f} per {r['per']:,.0f} ({r['lower']:.2f}-{r['upper']:.2f})"
            for r in rates.iter_rows(named=True)]


# --------------------------------------------------------------------------- table one

TABLE_ONE_KINDS = ("categorical", "mean_sd", "median_iqr")


def _variables_value(value: Any) -> str | None:
    if isinstance(value, list):
        bad = [v for v in value if not isinstance(v, str) or v not in COVARIATES]
    else:
        bad = [k for k in value if k not in COVARIATES]
        bad += [f"{k} = {v!r}" for k, v in value.items()
                if k in COVARIATES and v not in TABLE_ONE_KINDS]
    if bad:
        return (f"has {bad[0]!r}: variables are covariates ({', '.join(COVARIATES)}), kinds "
                f"{', '.join(TABLE_ONE_KINDS)}")
    return None


TABLE_ONE_OPTIONS: dict[str, Key] = {
    "group": Key((str,), None, ("exposure", "sex", "site"), "grouping column"),
    "variables": Key((list, dict), None, check=_variables_value,
                     doc="covariates (list) or covariate -> kind (table); default covariates.at_index"),
    "overall": Key((bool,), True, doc="add an all-persons column"),
}


def _check_table_one(source: SpecSource, path: KeyPath, o: dict, spec: Spec) -> None:
    grouped = spec.exposure is not None and spec.exposure.categorical
    if o["group"] is None:
        o["group"] = "exposure" if grouped else "sex"
    if o["group"] == "exposure":
        _time_updated_refused(source, path, spec, "Table 1 by exposure group")
        _exposure_groups_needed(source, (*path, "group"), spec, "Table 1 by exposure")
    if o["variables"] is None:
        if not spec.covariates:
            _fail(source, path, "Table 1 needs variables: list them in this analysis "
                  "(variables = [...]) or under [covariates] at_index")
        o["variables"] = list(spec.covariates)
    if isinstance(o["variables"], list):
        o["variables"] = {v: ("categorical" if COVARIATES[v] == "categorical" else "mean_sd")
                          for v in o["variables"]}
    if o["group"] in o["variables"]:
        _fail(source, (*path, "variables"), f"'{o['group']}' is the grouping column; remove "
              "it from variables")


_VOCAB_LEVELS = {"rhythm_class": tuple(RHYTHM_CLASSES), "av_category": tuple(AV_CATEGORIES),
                 "ventricular_conduction": tuple(VENTRICULAR_CONDUCTION),
                 "bundle_branch_block": ("no", "yes")}


def run_table_one(ctx: AnalysisContext, o: dict) -> dict[str, pd.DataFrame]:
    """Baseline characteristics by group, with standardized mean differences (Austin 2009)."""
    persons = ctx.frames.persons
    levels = {}
    for var, vocab in _VOCAB_LEVELS.items():
        if var in o["variables"]:
            present = set(persons[var].drop_nulls().to_list())
            levels[var] = [c for c in vocab if c in present]
    reference = None
    if o["group"] == "exposure":
        reference = ctx.frames.exposure.reference
        present = set(persons["exposure"].to_list())
        if reference not in present:
            reference = None
    table = table_one(persons, group=o["group"], variables=o["variables"], reference=reference,
                      levels=levels, overall=o["overall"])
    return {"table": table[list(TABLE_ONE_COLUMNS)]}


# --------------------------------------------------------------------------- registration

register_kind(AnalysisKind(
    name="prevalence",
    run=run_prevalence,
    parts={"estimates": PREVALENCE_COLUMNS, "standardized": STANDARDIZED_PART_COLUMNS,
           "trend": TREND_PART_COLUMNS},
    options=PREVALENCE_OPTIONS,
    check=_check_prevalence,
    description="prevalence of conduction categories: crude, by age band and sex, "
                "age-standardized (Fay-Feuer), trend across calendar years (APC)",
    summary=_prevalence_summary,
))
register_kind(AnalysisKind(
    name="incidence",
    run=run_incidence,
    parts={"rates": RATES_COLUMNS, "rate_ratios": RATIO_PART_COLUMNS,
           "follow_up": FOLLOW_UP_COLUMNS},
    options=INCIDENCE_OPTIONS,
    check=_check_incidence,
    description="incidence rates with exact Poisson limits, rate ratios, follow-up counts",
    summary=_incidence_summary,
))
register_kind(AnalysisKind(
    name="table_one",
    run=run_table_one,
    parts={"table": TABLE_ONE_COLUMNS},
    options=TABLE_ONE_OPTIONS,
    check=_check_table_one,
    description="baseline characteristics by group with standardized mean differences",
))

__all__ = ["ANALYSIS_KINDS", "REQUIRED", "AnalysisContext", "AnalysisKind", "Key",
           "check_analysis", "register_kind", "run_analysis"]
