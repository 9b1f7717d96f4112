"""Restricted cubic splines (Harrell) and hazard-ratio curves from a fitted Cox model.

Basis of Stone CJ & Koo CY (1985) and Harrell FE (2015) Regression Modeling Strategies, 2nd
ed., sec. 2.4.5: for knots t_1 < ... < t_k the columns are x and, for j = 1..k-2,

    [(x - t_j)_+^3 - (x - t_{k-1})_+^3 (t_k - t_j) / (t_k - t_{k-1})
     + (x - t_k)_+^3 (t_{k-1} - t_j) / (t_k - t_{k-1})] / (t_k - t_1)^2,

linear beyond the outer knots (the scaling by (t_k - t_1)^2 is Harrell's ``norm=2`` default,
which keeps the columns on the scale of x). Default knots sit at Harrell's quantiles (table
2.3 of the book), e.g. 5/35/65/95% for 4 knots.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from cohort.errors import DataError
from cohort.stats import _survival_base as base

_KNOT_TABLE = Path(__file__).resolve().parent / "data" / "harrell_knot_quantiles.csv"


def _knot_quantiles() -> dict[int, tuple[float, ...]]:
    """Harrell's knot quantiles by number of knots, from the data file (source cited there)."""
    rows = [line for line in _KNOT_TABLE.read_text(encoding="utf-8").splitlines() if line and not line.startswith("#")]
    table = {}
    for line in rows[1:]:
        n, quantiles = line.split(",")
        table[int(n)] = tuple(float(q) for q in quantiles.split())
    return table


HARRELL_QUANTILES: dict[int, tuple[float, ...]] = _knot_quantiles()
CURVE_COLUMNS = ("value", "log_hr", "se", "hr", "lower", "upper")


def harrell_knots(x: Any, n_knots: int = 4) -> np.ndarray:
    """Knots at Harrell's quantiles of ``x`` (numpy's linear quantile = R type 7)."""
    if n_knots not in HARRELL_QUANTILES:
        raise ValueError(f"n_knots={n_knots}: choose one of {sorted(HARRELL_QUANTILES)}")
    x = np.asarray(x, dtype=float)
    x = x[np.isfinite(x)]
    knots = np.quantile(x, HARRELL_QUANTILES[n_knots])
    if np.unique(knots).size < n_knots:
        raise DataError(f"harrell_knots: x has too few distinct values ({np.unique(x).size}) "
                        f"for {n_knots} distinct knots; use fewer knots or give knots yourself")
    return knots


def rcs_basis(x: Any, knots: Sequence[float]) -> np.ndarray:
    """Restricted cubic spline basis (n x (k - 1)): x and k - 2 nonlinear columns."""
    t = np.asarray(knots, dtype=float)
    if t.size < 3 or np.any(np.diff(t) <= 0):
        raise ValueError("rcs_basis: need >= 3 strictly increasing knots")
    x = np.asarray(x, dtype=float)
    k = t.size
    norm = (t[-1] - t[0]) ** 2

    def cube(u: np.ndarray) -> np.ndarray:
        return np.maximum(u, 0.0) ** 3

    cols = [x]
    for j in range(k - 2):
        term = (cube(x - t[j]) - cube(x - t[k - 2]) * (t[k - 1] - t[j]) / (t[k - 1] - t[k - 2])
                + cube(x - t[k - 1]) * (t[k - 2] - t[j]) / (t[k - 1] - t[k - 2]))
        cols.append(term / norm)
    return np.column_stack(cols)


def rcs_names(prefix: str, n_knots: int) -> list[str]:
    """Column names: prefix, prefix_rcs1, ..., prefix_rcs{k-2}."""
    return [prefix] + [f"{prefix}_rcs{j}" for j in range(1, n_knots - 1)]


def rcs_columns(values: Any, knots: Sequence[float], prefix: str) -> pd.DataFrame:
    """Basis as a pandas DataFrame with :func:`rcs_names` columns (to join onto a frame)."""
    return pd.DataFrame(rcs_basis(values, knots), columns=rcs_names(prefix, len(knots)))


def hr_curve(model: Any, terms: Sequence[str], knots: Sequence[float], values: Any,
             reference: float, alpha: float = 0.05) -> pd.DataFrame:
    """Hazard ratio vs a covariate modelled by a spline, relative to ``reference``.

    log HR(v) = (B(v) - B(ref))' beta_s with variance (B(v) - B(ref))' V_s (B(v) - B(ref)),
    beta_s and V_s the spline coefficients of ``model`` (any fitted CoxPH/FineGray: uses
    ``params_`` and ``variance_``) named by ``terms`` in basis order.
    """
    terms = list(terms)
    missing = [t for t in terms if t not in model.params_.index]
    if missing:
        raise DataError(f"hr_curve: terms {missing} are not coefficients of the model "
                        f"({list(model.params_.index)}); pass the spline column names")
    if len(terms) != len(knots) - 1:
        raise DataError(f"hr_curve: {len(knots)} knots give {len(knots) - 1} basis columns, "
                        f"but {len(terms)} terms were given")
    beta = model.params_[terms].to_numpy()
    var = model.variance_.loc[terms, terms].to_numpy()
    v = np.atleast_1d(np.asarray(values, dtype=float))
    contrast = rcs_basis(v, knots) - rcs_basis(np.array([reference]), knots)
    log_hr = contrast @ beta
    se = np.sqrt(np.einsum("ij,jk,ik->i", contrast, var, contrast))
    z = base.z_value(alpha)
    return pd.DataFrame({"value": v, "log_hr": log_hr, "se": se, "hr": np.exp(log_hr),
                         "lower": np.exp(log_hr - z * se), "upper": np.exp(log_hr + z * se)})
