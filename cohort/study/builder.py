"""Cohort builder: study frames from the registry and the phenotype tables of one rule set.

The SQL in ``sql/study`` does the set work (index ECG, criteria, endpoint times, counting
process, Lexis expansion); this module binds the spec's parameters, applies the exposure
coding and returns polars frames (DuckDB -> Arrow -> polars):

- ``persons``: one row per included person (columns: :data:`PERSON_COLUMNS`, the exposure
  columns, and per endpoint ``<name>_at_risk``, ``_status``, ``_start``, ``_stop`` (days since
  index), ``_entry_age``, ``_exit_age`` (years));
- ``endpoints``: one row per (included person, endpoint): :data:`ENDPOINT_COLUMNS`;
- ``attrition``: each inclusion and exclusion step in order: :data:`ATTRITION_COLUMNS`;
- on demand: ``counting_process(endpoint)`` (:data:`COUNTING_COLUMNS`), ``lexis(edges)``
  (:data:`LEXIS_COLUMNS`), ``ecg_year()`` (:data:`ECG_YEAR_COLUMNS`).

Person keys stay inside these frames (they link them); the run layer never writes them.
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import Any

import polars as pl

from cohort.errors import RegistryError
from cohort.sqlfiles import read_sql
from cohort.study.exposure import ExposureInfo, code_exposure, exposure_needs, measure_values
from cohort.study.spec import (
    COVARIATE_CATALOGUE,
    DAYS_PER_YEAR,
    PR_MEASURABLE_CATEGORIES,
    Spec,
    Variant,
)

PERSON_COLUMNS: tuple[str, ...] = (
    "person_key", "sex", "site", "birth_date", "death_date", "followup_end", "index_ecg_key",
    "index_date", "index_year", "age", "age_completed", "rhythm_class", "av_category",
    "ventricular_conduction", "pr_ms", "qrs_ms", "qrs_axis", "heart_rate", "pr_usable",
    "possible_followup_days", "possible_followup_years", "bundle_branch_block",
)
ENDPOINT_COLUMNS: tuple[str, ...] = (
    "person_key", "endpoint", "at_risk", "not_at_risk", "start_day", "stop_day", "status",
    "entry_age", "exit_age",
)
ATTRITION_COLUMNS: tuple[str, ...] = (
    "step", "kind", "criterion", "description", "n_before", "n_excluded", "n_remaining",
)
COUNTING_COLUMNS: tuple[str, ...] = (
    "person_key", "interval", "start_day", "stop_day", "event", "pr_ms", "heart_rate", "exposure",
    "start_age", "stop_age",
)
LEXIS_COLUMNS: tuple[str, ...] = (
    "person_key", "endpoint", "age_lower", "age_upper", "age_band", "days", "status_in_band",
)
ECG_YEAR_COLUMNS: tuple[str, ...] = (
    "person_key", "year", "ecg_date", "age_completed", "sex", "rhythm_class", "av_category",
    "ventricular_conduction",
)
INCLUSION_STEPS = ("index_ecg", "index_within_followup", "sex", "site", "calendar_window", "age")


# --------------------------------------------------------------------------- SQL plumbing


def _bind(sql: str, params: Mapping[str, Any]) -> dict[str, Any]:
    """The named parameters ``sql`` uses (DuckDB refuses unused ones)."""
    return {k: v for k, v in params.items() if f"${k}" in sql}


@contextmanager
def registered(con, tables: Mapping[str, pl.DataFrame]) -> Iterator[None]:
    """Expose polars frames to SQL under fixed names for the duration of a query."""
    for name, frame in tables.items():
        con.register(name, frame.to_arrow())
    try:
        yield
    finally:
        for name in tables:
            con.unregister(name)


def query(con, path: str, params: Mapping[str, Any], tables: Mapping[str, pl.DataFrame] | None = None) -> pl.DataFrame:
    """Run ``sql/<path>`` with its parameters (and registered inputs); return polars."""
    sql = read_sql(path)
    with registered(con, tables or {}):
        return pl.from_arrow(con.sql(sql, params=_bind(sql, params)).to_arrow_table())


def _table_exists(con, name: str) -> bool:
    return bool(con.execute(
        "SELECT count(*) FROM information_schema.tables WHERE table_name = ?", [name]
    ).fetchall()[0][0])


def check_phenotyped(con, rule_set: str) -> None:
    """RegistryError with the command to run when the rule set has no phenotype rows."""
    for table in ("person", "ecg"):
        if not _table_exists(con, table):
            raise RegistryError(
                f"the database is not a Dromos registry (table {table} is missing); create it "
                "with 'dromos ingest SOURCE --db FILE'"
            )
    done = _table_exists(con, "phenotype_run") and con.execute(
        "SELECT count(*) FROM phenotype_run WHERE rule_set_id = ?", [rule_set]
    ).fetchall()[0][0]
    if not done:
        raise RegistryError(
            f"rule set {rule_set} has not been run on this registry; run "
            f"'dromos phenotype --db FILE --rules {rule_set}' first"
        )


# --------------------------------------------------------------------------- criteria


def criteria_steps(spec: Spec, variant: Variant) -> list[tuple[str, str, str]]:
    """(kind, criterion, description) of every active step, in the order applied."""
    pop = spec.population
    index_words = {
        "first_ecg": "an ECG in the registry (index: first ECG)",
        "first_assessable_pr": "an ECG with a measurable PR (index: the first such ECG)",
        "first_ecg_in_window": "an ECG between {} and {} (index: the first one)",
    }
    words = index_words[pop.index]
    if pop.index_window:
        words = words.format(*pop.index_window)
    steps = [("inclusion", "index_ecg", words),
             ("inclusion", "index_within_followup", "index ECG on or before the end of follow-up")]
    if pop.sexes:
        steps.append(("inclusion", "sex", f"sex {', '.join(pop.sexes)}"))
    if pop.sites:
        steps.append(("inclusion", "site", f"site {', '.join(pop.sites)}"))
    if pop.calendar_window:
        steps.append(("inclusion", "calendar_window",
                      f"index date from {pop.calendar_window[0]} to {pop.calendar_window[1]}"))
    upper = f" and below {pop.age_below}" if pop.age_below is not None else " or older"
    steps.append(("inclusion", "age", f"age at index {pop.age_from}{upper} (completed years)"))
    for key, value in variant.exclusions:
        steps.append(("exclusion", key, _exclusion_words(key, value)))
    needs, _ = exposure_needs(spec.exposure)
    if needs != "none":
        words = {"pr": "no measurable PR on the index ECG",
                 "pr_hr": "no measurable PR or no heart rate on the index ECG",
                 "category": "index AV category in none of the exposure levels"}[needs]
        steps.append(("exclusion", "exposure_missing", words))
    return steps


def _exclusion_words(key: str, value: Any) -> str:
    return {
        "pacemaker_before_index": "pacemaker (implant or paced ECG) on or before the index date",
        "higher_grade_before_index": f"higher-grade AV block ({value}) on or before the index date",
        "af_at_index": "atrial fibrillation on the index ECG",
        "qrs_at_least_ms": f"QRS >= {value} ms on the index ECG",
        "min_followup_days": f"fewer than {value} day{'' if value == 1 else 's'} of possible follow-up",
    }[key]


def cohort_params(spec: Spec, variant: Variant) -> dict[str, Any]:
    """Parameters of sql/study/cohort.sql for a variant."""
    pop, ex = spec.population, dict(variant.exclusions)
    needs, categories = exposure_needs(spec.exposure)
    window = pop.index_window or (None, None)
    cal = pop.calendar_window or (None, None)
    return {
        "rule_set_id": variant.rule_set,
        "index_kind": pop.index,
        "index_start": window[0],
        "index_end": window[1],
        "pr_categories": list(PR_MEASURABLE_CATEGORIES),
        "sexes": list(pop.sexes) if pop.sexes else None,
        "sites": list(pop.sites) if pop.sites else None,
        "cal_start": cal[0],
        "cal_end": cal[1],
        "age_from": pop.age_from,
        "age_below": pop.age_below,
        "end_date": spec.follow_up.end_date,
        "hgb_source": ex.get("higher_grade_before_index", "either"),
        "qrs_min_ms": ex.get("qrs_at_least_ms"),
        "min_followup_days": ex.get("min_followup_days"),
        "exposure_needs": needs,
        "exposure_categories": categories,
        "steps": [c for _, c, _ in criteria_steps(spec, variant)],
    }


def attrition_table(candidates: pl.DataFrame, steps: list[tuple[str, str, str]]) -> pl.DataFrame:
    """STROBE-style flow: persons before, excluded at and remaining after each step."""
    counts = dict(candidates.group_by("first_failed").len().iter_rows())
    remaining = candidates.height
    rows = [(0, "start", "registry", "persons in the registry", remaining, 0, remaining)]
    for i, (kind, criterion, words) in enumerate(steps, start=1):
        n = int(counts.get(criterion, 0))
        rows.append((i, kind, criterion, words, remaining, n, remaining - n))
        remaining -= n
    schema = dict(zip(ATTRITION_COLUMNS, (pl.Int64, pl.String, pl.String, pl.String, pl.Int64,
                                          pl.Int64, pl.Int64), strict=True))
    return pl.DataFrame(rows, schema=schema, orient="row")


# --------------------------------------------------------------------------- endpoints


def endpoint_definitions(spec: Spec) -> pl.DataFrame:
    """Rows of study_endpoint_def: each endpoint's own, competing and censoring components."""
    rows = []
    for name, ep in spec.endpoints.items():
        for kind, source in spec.components(name):
            rows.append((name, "event", 1, kind, source))
        for code, other in enumerate(ep.competing, start=2):
            for kind, source in spec.components(other):
                rows.append((name, "competing", code, kind, source))
        for other in ep.censor_at:
            for kind, source in spec.components(other):
                rows.append((name, "censor", 0, kind, source))
    schema = {"endpoint": pl.String, "role": pl.String, "code": pl.Int32,
              "event_kind": pl.String, "source": pl.String}
    return pl.DataFrame(rows, schema=schema, orient="row")


def _wide_endpoints(persons: pl.DataFrame, long: pl.DataFrame, names: list[str]) -> pl.DataFrame:
    for name in names:
        part = long.filter(pl.col("endpoint") == name).select(
            "person_key",
            pl.col("at_risk").alias(f"{name}_at_risk"),
            pl.col("status").alias(f"{name}_status"),
            pl.col("start_day").alias(f"{name}_start"),
            pl.col("stop_day").alias(f"{name}_stop"),
            pl.col("entry_age").alias(f"{name}_entry_age"),
            pl.col("exit_age").alias(f"{name}_exit_age"),
        )
        persons = persons.join(part, on="person_key", how="left")
    return persons


# --------------------------------------------------------------------------- the frames


@dataclass
class StudyFrames:
    """Frames of one variant of a study; on-demand frames are computed once and cached."""

    con: Any
    spec: Spec
    variant: Variant
    persons: pl.DataFrame
    endpoints: pl.DataFrame
    attrition: pl.DataFrame
    exposure: ExposureInfo | None
    n_registry: int
    _inputs: dict[str, pl.DataFrame] = field(default_factory=dict, repr=False)
    _cache: dict[Any, pl.DataFrame] = field(default_factory=dict, repr=False)

    @property
    def rule_set(self) -> str:
        return self.variant.rule_set

    def endpoint_frame(self, name: str) -> pl.DataFrame:
        """At-risk persons for endpoint ``name`` with their person columns.

        Adds ``entry`` and ``exit`` on the spec's time scale (years since index, or age in
        years) and ``person_years`` (whole days / 365.25).
        """
        if name not in self.spec.endpoints:
            raise KeyError(name)
        part = self.endpoints.filter((pl.col("endpoint") == name) & pl.col("at_risk"))
        frame = part.join(self.persons.select(self._person_side()), on="person_key", how="left")
        if self.spec.follow_up.time_scale == "age":
            entry, exit_ = pl.col("entry_age"), pl.col("exit_age")
        else:
            entry = pl.col("start_day") / DAYS_PER_YEAR
            exit_ = pl.col("stop_day") / DAYS_PER_YEAR
        return frame.with_columns(
            entry.alias("entry"), exit_.alias("exit"),
            ((pl.col("stop_day") - pl.col("start_day")) / DAYS_PER_YEAR).alias("person_years"),
        )

    def _person_side(self) -> list[str]:
        skip = {"at_risk", "status", "start", "stop", "entry_age", "exit_age"}
        return [c for c in self.persons.columns
                if not any(c == f"{e}_{s}" for e in self.spec.endpoints for s in skip)]

    def counting_process(self, endpoint: str) -> pl.DataFrame:
        """Follow-up for ``endpoint`` split at new PR readings (sql/study/counting_process.sql)."""
        key = ("counting", endpoint)
        if key not in self._cache:
            frame = query(self.con, "study/counting_process.sql",
                          {"endpoint": endpoint, "rule_set_id": self.rule_set,
                           "pr_categories": list(PR_MEASURABLE_CATEGORIES)}, self._inputs)
            self._cache[key] = self._scale_counting(frame)
        return self._cache[key]

    def _scale_counting(self, frame: pl.DataFrame) -> pl.DataFrame:
        ages = self.persons.select("person_key", (pl.col("age") * DAYS_PER_YEAR).alias("_age_days"))
        frame = frame.join(ages, on="person_key", how="left").with_columns(
            ((pl.col("_age_days") + pl.col("start_day")) / DAYS_PER_YEAR).alias("start_age"),
            ((pl.col("_age_days") + pl.col("stop_day")) / DAYS_PER_YEAR).alias("stop_age"),
        )
        info = self.exposure
        if info is not None and info.spec.kind in ("pr_continuous", "pr_time_updated"):
            ms = measure_values(frame, info.spec, info.slope_ms_per_bpm)
            value = (ms - info.spec.center) / info.per
        else:
            value = pl.lit(None, dtype=pl.Float64)
        return frame.with_columns(value.alias("exposure")).select(COUNTING_COLUMNS).sort(
            "person_key", "interval")

    def lexis(self, edges: list[int]) -> pl.DataFrame:
        """Every endpoint's follow-up split by attained age band (sql/study/lexis_age.sql)."""
        key = ("lexis", tuple(edges))
        if key not in self._cache:
            self._cache[key] = query(self.con, "study/lexis_age.sql", {"age_edges": list(edges)},
                                     self._inputs)
        return self._cache[key]

    def ecg_year(self) -> pl.DataFrame:
        """Each person's first ECG of each calendar year (sql/study/ecg_year.sql)."""
        if "ecg_year" not in self._cache:
            pop = self.spec.population
            cal = pop.calendar_window or (None, None)
            params = {"rule_set_id": self.rule_set, "cal_start": cal[0], "cal_end": cal[1],
                      "age_from": pop.age_from, "age_below": pop.age_below}
            self._cache["ecg_year"] = query(self.con, "study/ecg_year.sql", params, self._inputs)
        return self._cache["ecg_year"]


def _finish_persons(frame: pl.DataFrame) -> pl.DataFrame:
    bbb = list(COVARIATE_CATALOGUE["bundle_branch_block"]["categories"])
    return frame.with_columns(
        (pl.col("possible_followup_days") / DAYS_PER_YEAR).alias("possible_followup_years"),
        pl.when(pl.col("ventricular_conduction").is_in(bbb)).then(pl.lit("yes"))
        .otherwise(pl.lit("no")).alias("bundle_branch_block"),
    )


def build_cohort(con, spec: Spec, variant: str | Variant = "main") -> StudyFrames:
    """Build the frames of one variant of ``spec`` from a phenotyped registry."""
    v = variant if isinstance(variant, Variant) else spec.variant(variant)
    check_phenotyped(con, v.rule_set)
    steps = criteria_steps(spec, v)
    candidates = query(con, "study/cohort.sql", cohort_params(spec, v))
    attrition = attrition_table(candidates, steps)
    included = _finish_persons(candidates.filter(pl.col("first_failed").is_null()))
    persons, info = code_exposure(included.select(PERSON_COLUMNS), spec.exposure)
    inputs = {"study_cohort": persons.select("person_key", "sex", "index_date", "birth_date",
                                             "followup_end")}
    long = _endpoint_long(con, spec, v, inputs)
    inputs["study_endpoint_time"] = long
    names = list(spec.endpoints)
    return StudyFrames(con, spec, v, _wide_endpoints(persons, long, names), long, attrition,
                       info, candidates.height, inputs)


def _endpoint_long(con, spec: Spec, v: Variant, inputs: dict[str, pl.DataFrame]) -> pl.DataFrame:
    empty = pl.DataFrame(schema={"person_key": pl.String, "endpoint": pl.String,
                                 "at_risk": pl.Boolean, "not_at_risk": pl.String,
                                 "start_day": pl.Int32, "stop_day": pl.Int64, "status": pl.Int32,
                                 "entry_age": pl.Float64, "exit_age": pl.Float64})
    if not spec.endpoints:
        return empty
    events = query(con, "study/person_event.sql", {"rule_set_id": v.rule_set})
    tables = {**inputs, "study_person_event": events,
              "study_endpoint_def": endpoint_definitions(spec)}
    params = {"lag_days": v.lag_days, "horizon_days": v.horizon_days,
              "end_date": spec.follow_up.end_date}
    return query(con, "study/endpoint_time.sql", params, tables).select(ENDPOINT_COLUMNS)
