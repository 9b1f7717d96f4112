"""Direct age standardization against built-in or custom standard populations.

The standardized rate is sum_i s_i x_i / n_i with standard weights s_i summing to 1, x_i
events and n_i persons (or person-time) in age band i. Confidence limits:

- ``"fay_feuer"``: gamma interval of Fay MP & Feuer EJ (1997) Stat Med 16:791-801, with
  w_i = s_i / n_i, y = sum w_i x_i, v = sum w_i^2 x_i, w_M = max w_i; lower =
  Gamma^-1(alpha/2; y^2/v, v/y) (0 when y = 0), upper = Gamma^-1(1 - alpha/2;
  (y + w_M)^2 / (v + w_M^2), (v + w_M^2) / (y + w_M)) (shape, scale).
- ``"tiwari"``: the modification of Tiwari RC, Clegg LX & Zou Z (2006) Stat Methods Med Res
  15:547-569: the upper limit adds the mean of w_i to y and the mean of w_i^2 to v instead of
  w_M and w_M^2 (less conservative); the lower limit is Fay-Feuer's. Means are taken over bands
  with a positive standard weight, since a band of weight 0 does not enter the rate.

Standard populations (WHO 2000-2025, European 2013, US 2000) are CSV files in
``cohort/stats/standard_populations/`` (cited in its README). Data age bands are mapped onto a
standard's bands by :func:`map_age_bands`: every data band must nest with the standard bands
(either contain whole standard bands or lie inside one), otherwise a DataError says which bands
cut across. When the data cover only part of the standard's age range (an adult cohort), the
standard is restricted to that range and renormalized; ``coverage`` reports the share of the
standard's weight kept.

Age bands are ``(lower, upper)`` pairs of completed years, ``upper`` inclusive, ``None`` for an
open top band: ``(0, 4)`` is ages 0 to under 5, ``(85, None)`` is 85 and over.
"""

from __future__ import annotations

import csv
import re
from collections.abc import Sequence
from dataclasses import dataclass
from importlib import resources
from typing import Any, Literal

import numpy as np
import pandas as pd
import polars as pl
from scipy import stats

from cohort.errors import DataError
from cohort.stats.proportions import (
    as_key_list,
    as_polars,
    check_alpha,
    check_choice,
    require_columns,
    sorted_partitions,
    validate_counts,
)

AgeBand = tuple[int, int | None]
StandardizeMethod = Literal["fay_feuer", "tiwari"]
STANDARDIZE_METHODS: tuple[str, ...] = ("fay_feuer", "tiwari")
STANDARD_POPULATIONS: tuple[str, ...] = ("who_2000_2025", "european_2013", "us_2000")

#: Columns of :func:`standardized_table`, after the ``by`` key columns.
STANDARDIZED_COLUMNS: tuple[str, ...] = (
    "events",
    "population",
    "crude",
    "estimate",
    "se",
    "lower",
    "upper",
    "standard",
    "coverage",
    "per",
    "method",
    "alpha",
)

_RANGE = re.compile(r"^\s*(\d+)\s*(?:-|–|to)\s*(\d+)\s*$", re.IGNORECASE)
_OPEN = re.compile(r"^\s*(\d+)\s*(?:\+|and over|and older|or older|or more|plus)\s*$",
                   re.IGNORECASE)
_UNDER = re.compile(r"^\s*(?:under|<|less than)\s*(\d+)\s*$", re.IGNORECASE)
_SINGLE = re.compile(r"^\s*(\d+)\s*$")


# --------------------------------------------------------------------------- age bands


def parse_age_band(label: str | Sequence[Any]) -> AgeBand:
    """Read an age band from a label ("20-24", "85+", "40 and over", "Under 20", "<1", "7").

    A ``(lower, upper)`` pair is accepted as is (checked).
    """
    if not isinstance(label, str):
        lower, upper = label
        return _checked_band(int(lower), None if upper is None else int(upper), label)
    if m := _RANGE.match(label):
        return _checked_band(int(m[1]), int(m[2]), label)
    if m := _OPEN.match(label):
        return int(m[1]), None
    if m := _UNDER.match(label):
        return _checked_band(0, int(m[1]) - 1, label)
    if m := _SINGLE.match(label):
        return int(m[1]), int(m[1])
    raise DataError(
        f"cannot read age band {label!r}; write bands like '20-24', '85+', '40 and over', "
        "'Under 20' or '<1' (completed years, upper age inclusive)."
    )


def _checked_band(lower: int, upper: int | None, label: Any) -> AgeBand:
    if lower < 0 or (upper is not None and upper < lower):
        raise DataError(f"age band {label!r} is empty or negative; the upper age must be >= lower.")
    return lower, upper


def band_label(band: AgeBand) -> str:
    """Label of a band: "20-24", "85+", or "7" for a single year."""
    lower, upper = band
    if upper is None:
        return f"{lower}+"
    return str(lower) if upper == lower else f"{lower}-{upper}"


def band_sort_key(band: AgeBand) -> tuple[int, float]:
    """Sort key for bands: by lower age, then upper age (open last)."""
    return band[0], np.inf if band[1] is None else band[1]


def _edges(bands: Sequence[AgeBand]) -> tuple[np.ndarray, np.ndarray]:
    """Half-open [lo, hi) edges in years; hi = inf for an open band."""
    lo = np.array([b[0] for b in bands], dtype=float)
    hi = np.array([np.inf if b[1] is None else b[1] + 1 for b in bands], dtype=float)
    return lo, hi


def _check_contiguous(bands: Sequence[AgeBand], what: str) -> None:
    """Bands sorted by lower age must neither overlap nor leave gaps."""
    if len(set(bands)) != len(bands):
        raise DataError(f"{what}: {len(bands) - len(set(bands))} age band(s) listed twice.")
    srt = sorted(bands, key=band_sort_key)
    lo, hi = _edges(srt)
    overlap = hi[:-1] > lo[1:]
    gap = hi[:-1] < lo[1:]
    if overlap.any() or gap.any():
        i = int(np.flatnonzero(overlap | gap)[0])
        kind = "overlap" if overlap[i] else "leave a gap"
        raise DataError(
            f"{what}: {int(overlap.sum())} overlap(s) and {int(gap.sum())} gap(s) between "
            f"consecutive age bands (first: {band_label(srt[i])} and {band_label(srt[i + 1])} "
            f"{kind}). Use contiguous bands, each age in exactly one band."
        )


def assign_age_bands(ages: Any, bands: Sequence[AgeBand | str]) -> np.ndarray:
    """Index (into ``bands``) of the band holding each age (years, fractions allowed).

    Raises DataError when ages are missing or fall outside the bands.
    """
    parsed = [parse_age_band(b) for b in bands]
    _check_contiguous(parsed, "age bands")
    order = np.argsort([b[0] for b in parsed], kind="stable")
    lo, hi = _edges([parsed[i] for i in order])
    a = np.atleast_1d(np.asarray(ages, dtype=float))
    pos = np.searchsorted(lo, a, side="right") - 1
    outside = ~np.isfinite(a) | (pos < 0) | (a >= hi[np.clip(pos, 0, None)])
    if outside.any():
        i = int(np.flatnonzero(outside)[0])
        raise DataError(
            f"{int(outside.sum())} of {a.size} ages are missing or outside the bands "
            f"{band_label((int(lo[0]), None if np.isinf(hi[-1]) else int(hi[-1]) - 1))} "
            f"(first at index {i}: {float(a[i]):g}). Drop those persons or add bands that cover them."
        )
    return order[pos]


# --------------------------------------------------------------------------- standards


@dataclass(frozen=True)
class StandardPopulation:
    """A standard population: contiguous age bands and their published weights."""

    name: str
    bands: tuple[AgeBand, ...]
    published: tuple[float, ...]

    def __post_init__(self) -> None:
        if len(self.bands) != len(self.published):
            raise DataError(
                f"standard {self.name!r}: {len(self.bands)} bands but "
                f"{len(self.published)} weights; give one weight per band."
            )
        _check_contiguous(list(self.bands), f"standard {self.name!r}")
        w = np.asarray(self.published, dtype=float)
        if not np.all(np.isfinite(w)) or (w < 0).any() or w.sum() <= 0:
            raise DataError(
                f"standard {self.name!r}: weights must be finite, >= 0 and not all 0."
            )

    @property
    def weights(self) -> np.ndarray:
        """Weights renormalized to sum to 1 (published values divided by their total)."""
        w = np.asarray(self.published, dtype=float)
        return w / w.sum()

    @property
    def published_total(self) -> float:
        """Sum of the published weights (e.g. 100.035 for the WHO percents)."""
        return float(np.sum(self.published))

    def to_frame(self) -> pd.DataFrame:
        """Columns age_lower, age_upper (None if open), label, published, weight."""
        return pd.DataFrame(
            {
                "age_lower": [b[0] for b in self.bands],
                "age_upper": [b[1] for b in self.bands],
                "label": [band_label(b) for b in self.bands],
                "published": list(self.published),
                "weight": self.weights,
            }
        )

    @classmethod
    def from_weights(
        cls, name: str, bands: Sequence[AgeBand | str], weights: Sequence[float]
    ) -> StandardPopulation:
        """A custom standard (e.g. a study's own pooled population) from bands and weights."""
        parsed = [parse_age_band(b) for b in bands]
        order = sorted(range(len(parsed)), key=lambda i: band_sort_key(parsed[i]))
        return cls(
            name=name,
            bands=tuple(parsed[i] for i in order),
            published=tuple(float(weights[i]) for i in order),
        )


def load_standard_population(name: str) -> StandardPopulation:
    """Load a built-in standard population by name (see :data:`STANDARD_POPULATIONS`)."""
    check_choice(name, STANDARD_POPULATIONS, "standard population")
    path = resources.files("cohort.stats").joinpath("standard_populations", f"{name}.csv")
    with path.open(encoding="utf-8", newline="") as fh:
        rows = list(csv.DictReader(fh))
    bands = tuple(
        (int(r["age_lower"]), int(r["age_upper"]) if r["age_upper"].strip() else None)
        for r in rows
    )
    return StandardPopulation(name, bands, tuple(float(r["weight"]) for r in rows))


def _as_standard(standard: str | StandardPopulation) -> StandardPopulation:
    return standard if isinstance(standard, StandardPopulation) else load_standard_population(
        standard
    )


# --------------------------------------------------------------------------- band mapping


@dataclass(frozen=True)
class BandMapping:
    """Data age bands aligned with a standard population on their common (nested) bands."""

    standard: str
    bands: tuple[AgeBand, ...]
    data_index: tuple[int, ...]
    weights: tuple[float, ...]
    coverage: float


def _common_band_checks(
    lo: np.ndarray, hi: np.ndarray, s_lo: np.ndarray, s_hi: np.ndarray, name: str
) -> np.ndarray:
    """Common boundaries of data and standard bands, after checking that they nest."""
    d_bounds, s_bounds = set(lo) | set(hi), set(s_lo) | set(s_hi)
    start, stop = lo.min(), hi.max()
    if start < s_lo.min() or stop > s_hi.max():
        raise DataError(
            f"data age bands reach beyond standard {name!r} (ages {s_lo.min():g} to "
            f"{s_hi.max() - 1:g}); drop ages outside it or use another standard."
        )
    for edge, where in ((start, "starts"), (stop, "ends")):
        if edge not in s_bounds:
            raise DataError(
                f"the data age range {where} at {edge:g}, inside a band of standard {name!r}; "
                f"its band limits are {sorted(int(b) for b in s_bounds if np.isfinite(b))}. "
                "Regroup the data so the range starts and ends on a standard limit."
            )
    common = np.array(sorted(b for b in d_bounds & s_bounds if start <= b <= stop))
    return common


def map_age_bands(
    data_bands: Sequence[AgeBand | str], standard: str | StandardPopulation = "who_2000_2025"
) -> BandMapping:
    """Align distinct data age bands with a standard population's bands.

    Each data band must nest with the standard bands: it is a union of whole standard bands
    (data coarser, e.g. 10-year bands on a 5-year standard) or lies inside one standard band
    (data finer, e.g. single years). The result has the common bands (the coarser side of each
    nested pair), the common band of each data band, the standard weight of each common band
    renormalized over the data's age range, and the share of the standard weight covered.

    Raises
    ------
    DataError
        Bands listed twice, overlapping or with gaps; a data range beyond the standard; or
        bands that cut across each other (the message counts the data bands affected).
    """
    std = _as_standard(standard)
    parsed = [parse_age_band(b) for b in data_bands]
    _check_contiguous(parsed, "data age bands")
    lo, hi = _edges(parsed)
    s_lo, s_hi = _edges(std.bands)
    common = _common_band_checks(lo, hi, s_lo, s_hi, std.name)
    d_group = np.searchsorted(common, lo, side="right") - 1
    s_inside = (s_lo >= common[0]) & (s_hi <= common[-1])
    s_group = np.searchsorted(common, s_lo[s_inside], side="right") - 1
    n_groups = len(common) - 1
    nd = np.bincount(d_group, minlength=n_groups)
    ns = np.bincount(s_group, minlength=n_groups)
    crossing = (nd > 1) & (ns > 1)
    if crossing.any():
        g = int(np.flatnonzero(crossing)[0])
        cut = [band_label(b) for b, k in zip(parsed, d_group, strict=True) if k == g]
        raise DataError(
            f"{int(nd[crossing].sum())} of {len(parsed)} data age bands do not nest in the "
            f"bands of standard {std.name!r} (first case: data bands {', '.join(cut)} cut "
            "across standard bands). Regroup the data into bands whose limits are standard "
            f"limits: {sorted(int(b) for b in set(s_lo) | set(s_hi) if np.isfinite(b))}."
        )
    w = np.bincount(s_group, weights=std.weights[s_inside], minlength=n_groups)
    bands = tuple(
        (int(common[k]), None if np.isinf(common[k + 1]) else int(common[k + 1]) - 1)
        for k in range(n_groups)
    )
    return BandMapping(
        standard=std.name,
        bands=bands,
        data_index=tuple(int(k) for k in d_group),
        weights=tuple(float(x) for x in w / w.sum()),
        coverage=float(w.sum()),
    )


# --------------------------------------------------------------------------- arithmetic


@dataclass(frozen=True)
class StandardizedRate:
    """A directly standardized rate per ``per`` with gamma confidence limits."""

    estimate: float
    se: float
    lower: float
    upper: float
    crude: float
    events: float
    population: float
    per: float
    method: str
    alpha: float
    standard: str = "custom"
    coverage: float = 1.0


def _standard_weights(weights: Any, size: int) -> np.ndarray:
    w = np.atleast_1d(np.asarray(weights, dtype=float))
    if w.shape != (size,):
        raise DataError(f"{w.size} standard weights for {size} strata; give one per stratum.")
    if not np.all(np.isfinite(w)) or (w < 0).any() or w.sum() <= 0:
        raise DataError(
            f"standard weights must be finite, >= 0 and not all 0 ({int((w < 0).sum())} "
            "negative); pass population counts, percents or proportions."
        )
    return w / w.sum()  # any unit (counts, percent, proportions): only the shares matter


def _population(values: Any, weights: np.ndarray) -> np.ndarray:
    n = np.atleast_1d(np.asarray(values, dtype=float))
    if n.shape != weights.shape:
        raise DataError(f"{n.size} population values for {weights.size} strata.")
    bad = ~np.isfinite(n) | (n < 0) | ((n == 0) & (weights > 0))
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise DataError(
            f"{int(bad.sum())} of {n.size} strata have a missing, negative or zero population "
            f"where the standard weight is positive (first at index {i}: {float(n[i]):g}); the "
            "stratum rate is undefined: merge the band with a neighbour or narrow the age range."
        )
    return n


def gamma_limits(
    events: np.ndarray, w: np.ndarray, alpha: float, method: StandardizeMethod
) -> tuple[float, float]:
    """Fay-Feuer (1997) or Tiwari et al. (2006) limits of y = sum w_i x_i (unscaled)."""
    y, v = float(np.sum(w * events)), float(np.sum(w**2 * events))
    if method == "fay_feuer":
        add_y, add_v = float(w.max()), float(w.max()) ** 2
    else:
        pos = w[w > 0]
        add_y, add_v = float(pos.mean()), float(np.mean(pos**2))
    lower = float(stats.gamma.ppf(alpha / 2.0, y * y / v, scale=v / y)) if y > 0 else 0.0
    y_up, v_up = y + add_y, v + add_v
    upper = float(stats.gamma.ppf(1.0 - alpha / 2.0, y_up * y_up / v_up, scale=v_up / y_up))
    return lower, upper


def direct_standardize(
    events: Any,
    population: Any,
    standard_weights: Any,
    alpha: float = 0.05,
    method: StandardizeMethod = "fay_feuer",
    per: float = 1.0,
) -> StandardizedRate:
    """Directly standardized rate over strata with gamma confidence limits.

    Parameters
    ----------
    events : array-like of whole numbers
        Events (or prevalent cases) per stratum.
    population : array-like of float
        Persons or person-time per stratum; > 0 wherever the standard weight is > 0.
    standard_weights : array-like of float
        Standard population per stratum in any unit (counts, percent, shares); renormalized
        to sum to 1, so weights that do not sum to 1 are accepted on purpose.
    alpha : float
        Two-sided level.
    method : {"fay_feuer", "tiwari"}
        Interval method; see the module docstring.
    per : float
        Multiplier for the rate, e.g. 100000 for rates per 100,000.
    """
    alpha = check_alpha(alpha)
    check_choice(method, STANDARDIZE_METHODS, "standardization method")
    x = validate_counts(events, "events")
    s = _standard_weights(standard_weights, x.size)
    n = _population(population, s)
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.where(s > 0, s / n, 0.0)
    lower, upper = gamma_limits(x, w, alpha, method)
    return StandardizedRate(
        estimate=float(np.sum(w * x)) * per,
        se=float(np.sqrt(np.sum(w**2 * x))) * per,
        lower=lower * per,
        upper=upper * per,
        crude=float(x.sum() / n.sum()) * per,
        events=float(x.sum()),
        population=float(n.sum()),
        per=float(per),
        method=method,
        alpha=alpha,
    )


def _collapse(
    mapping: BandMapping, row_band: np.ndarray, events: np.ndarray, population: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    group = np.asarray(mapping.data_index)[row_band]
    k = len(mapping.bands)
    return (
        np.bincount(group, weights=events, minlength=k),
        np.bincount(group, weights=population, minlength=k),
    )


def standardize_by_age(
    age_bands: Sequence[AgeBand | str],
    events: Any,
    population: Any,
    standard: str | StandardPopulation = "who_2000_2025",
    alpha: float = 0.05,
    method: StandardizeMethod = "fay_feuer",
    per: float = 1.0,
) -> StandardizedRate:
    """Standardize counts given per data age band (rows may repeat a band) to a standard.

    The data bands are mapped with :func:`map_age_bands`; events and population are summed
    within the common bands and standardized with :func:`direct_standardize`.
    """
    parsed = [parse_age_band(b) for b in age_bands]
    distinct = sorted(set(parsed), key=band_sort_key)
    mapping = map_age_bands(distinct, standard)
    row_band = np.array([distinct.index(b) for b in parsed], dtype=int)
    x = validate_counts(events, "events")
    n = np.atleast_1d(np.asarray(population, dtype=float))
    if not (x.size == n.size == len(parsed)):
        raise DataError(
            f"{len(parsed)} age bands, {x.size} event counts and {n.size} populations: "
            "give one of each per row."
        )
    ev, pop = _collapse(mapping, row_band, x, n)
    res = direct_standardize(ev, pop, mapping.weights, alpha=alpha, method=method, per=per)
    return _with_standard(res, mapping)


def _with_standard(res: StandardizedRate, mapping: BandMapping) -> StandardizedRate:
    return StandardizedRate(**{**res.__dict__, "standard": mapping.standard,
                               "coverage": mapping.coverage})


# --------------------------------------------------------------------------- frame level


def standardized_table(
    frame: pl.DataFrame | pd.DataFrame,
    *,
    age_band: str,
    events: str,
    population: str,
    by: str | Sequence[str] | None = None,
    standard: str | StandardPopulation = "who_2000_2025",
    method: StandardizeMethod = "fay_feuer",
    alpha: float = 0.05,
    per: float = 1.0,
) -> pd.DataFrame:
    """Directly standardized rates per group from person-level or aggregated rows.

    Parameters
    ----------
    frame : polars or pandas DataFrame
        Rows with an age band label, an event count and a population (1 per person for
        prevalence; person-time for incidence). Rows are summed within group and band.
    age_band, events, population : str
        Column names; age band labels as read by :func:`parse_age_band`.
    by : str or list of str, optional
        Grouping columns (e.g. sex, exposure).
    standard, method, alpha, per
        As in :func:`standardize_by_age`.

    Returns
    -------
    pandas.DataFrame
        The ``by`` columns, then :data:`STANDARDIZED_COLUMNS`. All groups share one band
        mapping (from the bands present in the whole frame), so they use the same standard;
        a group with no population in a band of positive weight raises DataError.
    """
    keys = as_key_list(by)
    pf = as_polars(frame)
    require_columns(pf, [age_band, events, population, *keys])
    labels = pf[age_band].cast(pl.String)
    if labels.null_count():
        raise DataError(
            f"{labels.null_count()} of {pf.height} rows have no {age_band!r}; assign bands "
            "with assign_age_bands or drop persons of unknown age."
        )
    label_list = labels.unique().sort().to_list()
    parsed = {lab: parse_age_band(lab) for lab in label_list}
    distinct = sorted(set(parsed.values()), key=band_sort_key)
    mapping = map_age_bands(distinct, standard)
    band_of_label = {lab: distinct.index(b) for lab, b in parsed.items()}
    pf = pf.with_columns(
        labels.replace_strict(band_of_label, return_dtype=pl.Int64).alias("__band")
    )
    rows = []
    for key, part in sorted_partitions(pf, keys):
        ev, pop = _collapse(
            mapping,
            part["__band"].to_numpy(),
            validate_counts(part[events].to_numpy(), events),
            part[population].cast(pl.Float64).to_numpy(),
        )
        _check_group_bands(pop, mapping, dict(zip(keys, key, strict=True)))
        res = _with_standard(
            direct_standardize(ev, pop, mapping.weights, alpha=alpha, method=method, per=per),
            mapping,
        )
        rows.append((*key, *(_row(res))))
    return pd.DataFrame(rows, columns=[*keys, *STANDARDIZED_COLUMNS])


def _check_group_bands(pop: np.ndarray, mapping: BandMapping, group: dict[str, Any]) -> None:
    """Name the bands where a group has no population, before the arithmetic fails on them."""
    empty = [band_label(b) for b, p, w in zip(mapping.bands, pop, mapping.weights, strict=True)
             if p <= 0 and w > 0]
    if empty:
        where = ", ".join(f"{k}={v!r}" for k, v in group.items()) or "the frame"
        raise DataError(
            f"{where} has no population in {len(empty)} of {len(mapping.bands)} age bands "
            f"({', '.join(empty[:5])}); the band rate is undefined there: merge the band with "
            "a neighbour (e.g. a wider open top band) or narrow the age range."
        )


def _row(res: StandardizedRate) -> tuple:
    return (
        int(res.events),
        res.population,
        res.crude,
        res.estimate,
        res.se,
        res.lower,
        res.upper,
        res.standard,
        res.coverage,
        res.per,
        res.method,
        res.alpha,
    )
