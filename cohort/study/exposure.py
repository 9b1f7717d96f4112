"""Exposure coding: PR at index as categories, sex-specific percentile groups, per-unit
continuous values, restricted cubic spline columns or the baseline of a time-updated PR.

The heart-rate corrected PR is PRc = PR - b (HR - HR_ref), a linear correction to a reference
heart rate: b is given (formula "linear") or estimated by least squares of PR on heart rate in
the study cohort (formula "regression"). This linear form is common practice, no source; it is
the form of the linear QT corrections (e.g. Sagie A et al. 1992, Am J Cardiol 70:797-801,
recalled from memory), applied to PR.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import polars as pl

from cohort.errors import DataError
from cohort.stats.splines import harrell_knots, rcs_basis, rcs_names
from cohort.study.spec import Exposure

#: Columns of the exposure description table (``exposure.csv``).
EXPOSURE_COLUMNS: tuple[str, ...] = (
    "kind", "measure", "sex", "level", "lower", "upper", "persons", "parameter", "value",
)


@dataclass(frozen=True)
class ExposureInfo:
    """What the coded exposure columns mean for one cohort (levels, scale, knots, cuts)."""

    spec: Exposure
    columns: tuple[str, ...]
    levels: tuple[str, ...] = ()
    reference: object = None
    per: float | None = None
    slope_ms_per_bpm: float | None = None
    knots: tuple[float, ...] = ()
    table: pl.DataFrame = field(default_factory=pl.DataFrame)

    @property
    def categorical(self) -> bool:
        return self.spec.categorical


def exposure_needs(exposure: Exposure | None) -> tuple[str, list[str] | None]:
    """What the index ECG must carry for the exposure (parameter of sql/study/cohort.sql)."""
    if exposure is None:
        return "none", None
    if exposure.kind == "pr_category":
        return "category", sorted({c for cats in exposure.levels.values() for c in cats})
    return ("pr_hr" if exposure.measure == "pr_corrected" else "pr"), None


def measure_values(frame: pl.DataFrame, exposure: Exposure, slope: float | None,
                   pr: str = "pr_ms", hr: str = "heart_rate") -> pl.Expr:
    """Expression for PR or heart-rate corrected PR (ms) from ``pr`` and ``hr`` columns."""
    if exposure.measure == "pr":
        return pl.col(pr).cast(pl.Float64)
    ref = exposure.correction.reference_hr_bpm
    return pl.col(pr).cast(pl.Float64) - slope * (pl.col(hr).cast(pl.Float64) - ref)


def _regression_slope(frame: pl.DataFrame) -> float:
    """Least-squares slope of PR on heart rate (ms per bpm) over the cohort."""
    x = frame["heart_rate"].cast(pl.Float64).to_numpy()
    y = frame["pr_ms"].cast(pl.Float64).to_numpy()
    ok = np.isfinite(x) & np.isfinite(y)
    x, y = x[ok], y[ok]
    if x.size < 3 or np.var(x) == 0:
        raise DataError(
            f"the heart-rate correction needs PR and heart rate on >= 3 index ECGs with some "
            f"spread in rate; the cohort has {x.size}. Use formula = \"linear\" with a slope."
        )
    return float(np.cov(x, y, ddof=1)[0, 1] / np.var(x, ddof=1))


def _slope(frame: pl.DataFrame, exposure: Exposure) -> float | None:
    if exposure.measure != "pr_corrected":
        return None
    if exposure.correction.formula == "linear":
        return float(exposure.correction.slope_ms_per_bpm)
    return _regression_slope(frame)


def code_exposure(persons: pl.DataFrame, exposure: Exposure | None) -> tuple[pl.DataFrame, ExposureInfo | None]:
    """Add the exposure columns to the included persons; describe them in an ExposureInfo.

    The persons must all have the exposure (the cohort SQL excluded those without it).
    """
    if exposure is None:
        return persons, None
    slope = _slope(persons, exposure)
    persons = persons.with_columns(measure_values(persons, exposure, slope).alias("exposure_ms"))
    coder = {
        "pr_category": _category,
        "pr_percentile": _percentile,
        "pr_continuous": _continuous,
        "pr_time_updated": _continuous,
        "pr_spline": _spline,
    }[exposure.kind]
    persons, info = coder(persons, exposure)
    params = _parameter_rows(exposure, info, slope)
    table = pl.concat([info.table, params], how="vertical_relaxed") if info.table.height else params
    return persons, ExposureInfo(**{**info.__dict__, "slope_ms_per_bpm": slope, "table": table})


def _empty_rows() -> dict[str, list]:
    return {c: [] for c in EXPOSURE_COLUMNS}


def _frame(rows: dict[str, list]) -> pl.DataFrame:
    schema = {"kind": pl.String, "measure": pl.String, "sex": pl.String, "level": pl.String,
              "lower": pl.Float64, "upper": pl.Float64, "persons": pl.Int64,
              "parameter": pl.String, "value": pl.Float64}
    return pl.DataFrame(rows, schema=schema)


def _parameter_rows(exposure: Exposure, info: ExposureInfo, slope: float | None) -> pl.DataFrame:
    rows = _empty_rows()
    params: list[tuple[str, float]] = []
    if info.per is not None:
        params += [("per_ms", info.per), ("center_ms", float(exposure.center))]
    if slope is not None:
        params += [("slope_ms_per_bpm", slope),
                   ("reference_hr_bpm", exposure.correction.reference_hr_bpm)]
    params += [(f"knot_{i + 1}_ms", k) for i, k in enumerate(info.knots)]
    if exposure.kind == "pr_spline" and info.reference is not None:
        params.append(("reference_ms", float(info.reference)))
    for name, value in params:
        for col, v in zip(EXPOSURE_COLUMNS, (exposure.kind, exposure.measure, None, None, None,
                                             None, None, name, float(value)), strict=True):
            rows[col].append(v)
    return _frame(rows)


def _category(persons: pl.DataFrame, exposure: Exposure) -> tuple[pl.DataFrame, ExposureInfo]:
    mapping = {c: level for level, cats in exposure.levels.items() for c in cats}
    persons = persons.with_columns(
        pl.col("av_category").replace_strict(mapping, default=None, return_dtype=pl.String).alias("exposure")
    )
    counts = dict(persons.group_by("exposure").len().iter_rows())
    rows = _empty_rows()
    for level in exposure.levels:
        for col, v in zip(EXPOSURE_COLUMNS, (exposure.kind, exposure.measure, None, level, None,
                                             None, int(counts.get(level, 0)), None, None), strict=True):
            rows[col].append(v)
    info = ExposureInfo(exposure, ("exposure",), tuple(exposure.levels), exposure.reference,
                        table=_frame(rows))
    return persons, info


def _percentile(persons: pl.DataFrame, exposure: Exposure) -> tuple[pl.DataFrame, ExposureInfo]:
    """Sex-specific percentile groups: a value equal to a cut point goes to the upper group."""
    levels = exposure.level_names()
    q = np.asarray(exposure.percentiles) / 100.0
    rows = _empty_rows()
    parts = []
    for (sex,), part in sorted(persons.partition_by("sex", as_dict=True).items()):
        values = part["exposure_ms"].to_numpy()
        cuts = np.quantile(values, q)  # linear interpolation (Hyndman & Fan type 7)
        group = np.searchsorted(cuts, values, side="right")
        parts.append(part.with_columns(pl.Series("exposure", [levels[g] for g in group], dtype=pl.String)))
        edges = np.r_[-np.inf, cuts, np.inf]
        for k, level in enumerate(levels):
            values_k = (exposure.kind, exposure.measure, sex, level,
                        None if k == 0 else float(edges[k]),
                        None if k == len(levels) - 1 else float(edges[k + 1]),
                        int((group == k).sum()), None, None)
            for col, v in zip(EXPOSURE_COLUMNS, values_k, strict=True):
                rows[col].append(v)
    persons = pl.concat(parts).sort("person_key") if parts else persons.with_columns(
        pl.lit(None, dtype=pl.String).alias("exposure"))
    info = ExposureInfo(exposure, ("exposure",), tuple(levels), exposure.reference, table=_frame(rows))
    return persons, info


def continuous_scale(persons: pl.DataFrame, exposure: Exposure) -> float:
    """ms per unit of the continuous exposure (the SD of the measure when per = "sd")."""
    if exposure.per != "sd":
        return float(exposure.per)
    sd = persons["exposure_ms"].std(ddof=1)
    if sd is None or not np.isfinite(sd) or sd <= 0:
        raise DataError(
            f"per = \"sd\" needs PR values with some spread; the cohort has {persons.height} "
            "persons. Give per in ms instead."
        )
    return float(sd)


def _continuous(persons: pl.DataFrame, exposure: Exposure) -> tuple[pl.DataFrame, ExposureInfo]:
    per = continuous_scale(persons, exposure)
    persons = persons.with_columns(((pl.col("exposure_ms") - exposure.center) / per).alias("exposure"))
    return persons, ExposureInfo(exposure, ("exposure",), per=per)


def _spline(persons: pl.DataFrame, exposure: Exposure) -> tuple[pl.DataFrame, ExposureInfo]:
    values = persons["exposure_ms"].to_numpy()
    knots = np.asarray(exposure.knots) if exposure.knots else harrell_knots(values, exposure.n_knots)
    names = rcs_names("exposure", len(knots))
    basis = rcs_basis(values, knots) if values.size else np.empty((0, len(names)))
    persons = persons.with_columns([pl.Series(n, basis[:, j]) for j, n in enumerate(names)])
    ref = exposure.reference if exposure.reference is not None else float(np.median(values)) if values.size else None
    return persons, ExposureInfo(exposure, tuple(names), reference=ref,
                                 knots=tuple(float(k) for k in knots))
