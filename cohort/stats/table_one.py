"""Baseline characteristics by exposure group ("Table 1") as a tidy frame, with SMDs.

Standardized mean differences compare each group with a reference group:

- continuous: d = (m1 - m0) / sqrt((s1^2 + s0^2) / 2) (Austin PC (2009) Stat Med
  28:3083-3107), on means and SDs also when the variable is shown as median/IQR;
- one level of a categorical variable (its indicator): d = (p1 - p0) /
  sqrt((p1 (1 - p1) + p0 (1 - p0)) / 2) (Austin 2009);
- a categorical variable as a whole (K levels): d = sqrt((p1 - p0)' S^-1 (p1 - p0)) over the
  shares of levels 2..K, S = (S1 + S0) / 2 with S_kk = p_k (1 - p_k), S_kl = -p_k p_l (the
  multivariate form of Austin's binary formula, Yang D & Dalton JE (2012) SAS Global Forum
  paper 335-2012); for K = 2 it equals |d| of the binary formula. A pseudo-inverse is used
  when S is singular (a level absent from both groups).

Signed SMDs (continuous, level rows) are group minus reference; the variable-level
categorical SMD is >= 0 by construction. Percentages are among persons with the variable
recorded; quantiles are linear interpolation (numpy/polars default, Hyndman & Fan type 7);
SDs use n - 1.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import pandas as pd
import polars as pl

from cohort.errors import DataError
from cohort.stats.proportions import as_polars, check_choice, require_columns

VariableKind = Literal["categorical", "mean_sd", "median_iqr"]
VARIABLE_KINDS: tuple[str, ...] = ("categorical", "mean_sd", "median_iqr")

#: Columns of :func:`table_one`.
TABLE_ONE_COLUMNS: tuple[str, ...] = (
    "variable",
    "level",
    "group",
    "statistic",
    "value",
    "n_missing",
    "smd",
)
#: ``variable`` of the rows giving each group's size (statistic "n").
GROUP_SIZE = "group_size"
_CONTINUOUS_STATS: dict[str, tuple[str, ...]] = {
    "mean_sd": ("n_nonmissing", "mean", "sd"),
    "median_iqr": ("n_nonmissing", "median", "q1", "q3"),
}


# --------------------------------------------------------------------------- SMD arithmetic


def _ratio(diff: float, denom: float) -> float:
    if np.isnan(diff) or np.isnan(denom):
        return float("nan")
    if denom == 0.0:
        # No spread in either group: equal values are balanced, unequal ones maximally not.
        return 0.0 if diff == 0.0 else float(np.copysign(np.inf, diff))
    return float(diff / denom)


def smd_continuous(mean1: float, sd1: float, mean0: float, sd0: float) -> float:
    """Austin (2009) SMD of a continuous variable, group 1 minus group 0."""
    return _ratio(mean1 - mean0, float(np.sqrt((sd1**2 + sd0**2) / 2.0)))


def smd_binary(p1: float, p0: float) -> float:
    """Austin (2009) SMD of a binary variable (shares p1, p0), group 1 minus group 0."""
    return _ratio(p1 - p0, float(np.sqrt((p1 * (1 - p1) + p0 * (1 - p0)) / 2.0)))


def smd_categorical(shares1: Sequence[float], shares0: Sequence[float]) -> float:
    """Multivariate SMD of a K-level categorical variable from the level shares of two groups.

    Each argument holds the K level shares of one group (summing to 1), levels in the same
    order; the first level is the one left out.
    """
    p1, p0 = np.asarray(shares1, dtype=float), np.asarray(shares0, dtype=float)
    if p1.shape != p0.shape:
        raise DataError(f"{p1.size} and {p0.size} level shares: give both groups every level.")
    if np.isnan(p1).any() or np.isnan(p0).any():
        return float("nan")
    t, c = p1[1:], p0[1:]
    if t.size == 0:
        return 0.0
    # Multinomial covariance of the shares: p_k (1 - p_k) on the diagonal, -p_k p_l off it.
    s = (np.diag(t) - np.outer(t, t) + np.diag(c) - np.outer(c, c)) / 2.0
    diff = t - c
    if not diff.any():
        return 0.0
    return float(np.sqrt(max(diff @ np.linalg.pinv(s) @ diff, 0.0)))


# --------------------------------------------------------------------------- summaries


@dataclass(frozen=True)
class _Summary:
    """Per-group statistics of one variable (values keyed by statistic, plus missing)."""

    values: dict[str, float]
    n_missing: int


def _continuous(pf: pl.DataFrame, var: str, group: str | None) -> dict[Any, _Summary]:
    col = pl.col(var).cast(pl.Float64)
    exprs = [
        col.count().cast(pl.Float64).alias("n_nonmissing"),
        col.null_count().alias("n_missing"),
        col.mean().alias("mean"),
        col.std(ddof=1).alias("sd"),
        col.median().alias("median"),
        col.quantile(0.25, interpolation="linear").alias("q1"),
        col.quantile(0.75, interpolation="linear").alias("q3"),
    ]
    agg = pf.select(exprs) if group is None else pf.group_by(group).agg(exprs)
    out = {}
    for row in agg.iter_rows(named=True):
        key = row.pop(group) if group is not None else None
        n_missing = int(row.pop("n_missing"))
        out[key] = _Summary({k: _float(v) for k, v in row.items()}, n_missing)
    return out


def _float(v: Any) -> float:
    return float("nan") if v is None else float(v)


def _categorical(
    pf: pl.DataFrame, var: str, group: str | None, levels: list[Any]
) -> dict[Any, _Summary]:
    keys = [var] if group is None else [group, var]
    counts = pf.group_by(keys).len()
    out: dict[Any, dict[Any, int]] = {}
    for row in counts.iter_rows(named=True):
        out.setdefault(row[group] if group is not None else None, {})[row[var]] = row["len"]
    result = {}
    for key, by_level in out.items():
        n_missing = int(by_level.pop(None, 0))
        result[key] = _Summary({lv: float(by_level.get(lv, 0)) for lv in levels}, n_missing)
    return result


def _levels(pf: pl.DataFrame, var: str, given: Sequence[Any] | None) -> list[Any]:
    present = pf[var].drop_nulls().unique().sort().to_list()
    if given is None:
        return present
    unknown = [v for v in present if v not in set(given)]
    if unknown:
        n_rows = int(pf[var].is_in(unknown).sum())
        raise DataError(
            f"{n_rows} rows of {var!r} hold values not among the given levels "
            f"({', '.join(map(str, unknown[:5]))}); add them to levels[{var!r}] or recode."
        )
    return list(given)


# --------------------------------------------------------------------------- rows


def _rows_continuous(
    var: str, kind: str, summ: dict[Any, _Summary], labels: dict[Any, str], ref: Any
) -> list[tuple]:
    rows = []
    r = summ.get(ref)
    for key, label in labels.items():
        s = summ.get(key, _Summary({}, 0))
        smd = float("nan")
        if key is not _OVERALL and key != ref and r is not None and s.values:
            smd = smd_continuous(s.values["mean"], s.values["sd"], r.values["mean"],
                                 r.values["sd"])
        for stat in _CONTINUOUS_STATS[kind]:
            rows.append((var, None, label, stat, s.values.get(stat, float("nan")), s.n_missing,
                         smd))
    return rows


def _shares(s: _Summary, levels: list[Any]) -> np.ndarray:
    counts = np.array([s.values.get(lv, 0.0) for lv in levels])
    total = counts.sum()
    return counts / total if total > 0 else np.full(len(levels), np.nan)


def _rows_categorical(
    var: str, summ: dict[Any, _Summary], labels: dict[Any, str], ref: Any, levels: list[Any]
) -> list[tuple]:
    empty = _Summary({lv: 0.0 for lv in levels}, 0)
    ref_shares = _shares(summ.get(ref, empty), levels)
    nan = float("nan")
    per_group = []
    for key, label in labels.items():
        s = summ.get(key, empty)
        compare = key is not _OVERALL and key != ref
        per_group.append((label, s, _shares(s, levels), compare))
    rows = [
        (var, None, label, "n_nonmissing", float(sum(s.values.values())), s.n_missing,
         smd_categorical(shares, ref_shares) if compare else nan)
        for label, s, shares, compare in per_group
    ]
    for i, lv in enumerate(levels):  # level-major order: one display row per level
        for label, s, shares, compare in per_group:
            d_lv = smd_binary(shares[i], ref_shares[i]) if compare else nan
            rows.append((var, str(lv), label, "n", s.values.get(lv, 0.0), s.n_missing, d_lv))
            rows.append((var, str(lv), label, "percent", 100.0 * shares[i], s.n_missing, d_lv))
    return rows


class _OverallKey:
    """Sentinel key for the all-persons column (never equal to a group value)."""

    def __repr__(self) -> str:
        return "<overall>"


_OVERALL = _OverallKey()


def _group_labels(
    pf: pl.DataFrame, group: str, overall: bool, overall_label: str
) -> dict[Any, str]:
    missing = pf[group].null_count()
    if missing:
        raise DataError(
            f"{missing} of {pf.height} rows have no {group!r}; a baseline table needs every "
            "person in a group: drop or label those rows first."
        )
    labels = {g: str(g) for g in pf[group].unique().sort().to_list()}
    if overall:
        if overall_label in labels.values():
            raise DataError(f"a group is named {overall_label!r}; pass another overall_label.")
        labels[_OVERALL] = overall_label
    return labels


def table_one(
    frame: pl.DataFrame | pd.DataFrame,
    *,
    group: str,
    variables: Mapping[str, VariableKind],
    reference: Any = None,
    levels: Mapping[str, Sequence[Any]] | None = None,
    overall: bool = True,
    overall_label: str = "overall",
) -> pd.DataFrame:
    """Baseline characteristics per exposure group as a tidy frame.

    Parameters
    ----------
    frame : polars or pandas DataFrame
        One row per person.
    group : str
        Exposure group column (no missing values).
    variables : mapping of column name to kind
        ``"categorical"`` (counts and percentages per level), ``"mean_sd"`` or
        ``"median_iqr"`` (numeric columns), in display order.
    reference : optional
        Group the SMDs compare against; default the first group in sort order.
    levels : mapping of column name to level order, optional
        Level order of categorical variables; values outside it raise DataError.
    overall : bool
        Add an all-persons column labelled ``overall_label``.

    Returns
    -------
    pandas.DataFrame
        :data:`TABLE_ONE_COLUMNS`. First, per group, a row variable = "group_size",
        statistic "n". Then per variable: for each group a row with level None and statistic
        "n_nonmissing"; for continuous variables, with it, "mean"/"sd" or "median"/"q1"/"q3";
        for categorical ones, then per level and group the statistics "n" and "percent". ``n_missing`` counts persons of the group
        with the variable missing. ``smd`` compares the group with the reference (NaN for the
        reference and overall): level rows carry the level's binary SMD, the "n_nonmissing"
        row of a categorical variable its multi-level SMD.
    """
    pf = as_polars(frame)
    require_columns(pf, [group, *variables])
    if GROUP_SIZE in variables:
        raise DataError(f"{GROUP_SIZE!r} is reserved for group sizes; rename that column.")
    labels = _group_labels(pf, group, overall, overall_label)
    groups = [g for g in labels if g is not _OVERALL]
    ref = groups[0] if reference is None else reference
    if ref not in groups:
        raise DataError(f"reference group {ref!r} not found in {group!r}; groups: {groups}.")
    sizes = dict(pf.group_by(group).len().iter_rows())
    rows = [(GROUP_SIZE, None, labels[g], "n", float(sizes[g]), 0, float("nan")) for g in groups]
    if overall:
        rows.append((GROUP_SIZE, None, overall_label, "n", float(pf.height), 0, float("nan")))
    for var, kind in variables.items():
        check_choice(kind, VARIABLE_KINDS, f"kind of variable {var!r}")
        rows.extend(_variable_rows(pf, group, var, kind, labels, ref, (levels or {}).get(var),
                                   overall))
    return pd.DataFrame(rows, columns=list(TABLE_ONE_COLUMNS))


def _variable_rows(
    pf: pl.DataFrame,
    group: str,
    var: str,
    kind: str,
    labels: dict[Any, str],
    ref: Any,
    given_levels: Sequence[Any] | None,
    overall: bool,
) -> list[tuple]:
    if kind == "categorical":
        lv = _levels(pf, var, given_levels)
        summ = _categorical(pf, var, group, lv)
        if overall:
            summ[_OVERALL] = _categorical(pf, var, None, lv)[None]
        return _rows_categorical(var, summ, labels, ref, lv)
    if not pf.schema[var].is_numeric():
        raise DataError(
            f"variable {var!r} has type {pf.schema[var]}; {kind} needs a numeric column "
            "(or declare it 'categorical')."
        )
    summ = _continuous(pf, var, group)
    if overall:
        summ[_OVERALL] = _continuous(pf, var, None)[None]
    return _rows_continuous(var, kind, summ, labels, ref)
