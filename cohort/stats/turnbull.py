"""Turnbull NPMLE of the event-time distribution under interval censoring.

Turnbull BW (1976) JRSS-B 38:290-295: the nonparametric maximum-likelihood estimate puts
mass only on the innermost intervals (Peto R 1973 Appl Stat 22:86-91) and is found by the
self-consistency (EM) iteration p_j <- sum_i w_i a_ij p_j / sum_l a_il p_l / sum_i w_i.

Observations are half-open intervals (left, right]: the event happened after ``left`` and no
later than ``right``; ``right`` = inf means right-censored at ``left``; ``left == right``
is an exactly observed time. With exact and right-censored data only, the NPMLE is the
Kaplan-Meier estimate (Efron B 1967, self-consistency). Each observation covers a contiguous
run of innermost intervals, so one EM step is O(n + m) with cumulative sums. The survival
curve is defined between innermost intervals; inside one the NPMLE does not say where the
mass lies (rows report the right end).
"""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np
import pandas as pd

from cohort.errors import DataError
from cohort.stats import _survival_base as base


def innermost_intervals(left: np.ndarray, right: np.ndarray
                        ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Innermost intervals and, per observation, the index range [a_i, b_i] it covers.

    Returns (lo, hi, a, b): innermost interval j is (lo_j, hi_j] ([t, t] when lo == hi).
    """
    n = left.size
    exact = left == right
    # Order at equal values: exact left ends, then right ends, then open left ends.
    values = np.concatenate([left, right])
    kind = np.concatenate([np.where(exact, 0, 2), np.ones(n, dtype=np.int64)])
    is_left = np.concatenate([np.ones(n, bool), np.zeros(n, bool)])
    order = np.lexsort((kind, values))
    pos = np.empty(2 * n, dtype=np.int64)
    pos[order] = np.arange(2 * n)
    sorted_left = is_left[order]
    start_k = np.flatnonzero(sorted_left[:-1] & ~sorted_left[1:])  # a left end then a right end
    lo = values[order][start_k]
    hi = values[order][start_k + 1]
    a = np.searchsorted(start_k, pos[:n], side="left")
    b = np.searchsorted(start_k + 1, pos[n:], side="right") - 1
    return lo, hi, a, b


def _em_step(p: np.ndarray, a: np.ndarray, b: np.ndarray, w: np.ndarray, total: float
             ) -> np.ndarray:
    """One self-consistency step, O(n + m) with cumulative sums."""
    m = p.size
    cum = np.concatenate(([0.0], np.cumsum(p)))
    share = w / (cum[b + 1] - cum[a])
    diff = np.bincount(a, weights=share, minlength=m + 1) - np.bincount(
        b + 1, weights=share, minlength=m + 1)
    new = p * np.cumsum(diff)[:m] / total
    return new / new.sum()


def _pool_ranges(a: np.ndarray, b: np.ndarray, w: np.ndarray, m: int
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Distinct (a, b) index ranges with the summed weight of the observations on each."""
    key = a.astype(np.int64) * (m + 1) + b
    distinct, inverse = np.unique(key, return_inverse=True)
    return distinct // (m + 1), distinct % (m + 1), np.bincount(inverse, weights=w)


def self_consistency(a: np.ndarray, b: np.ndarray, w: np.ndarray, m: int, tol: float,
                     max_iter: int) -> tuple[np.ndarray, int, bool]:
    """EM on the innermost-interval masses, accelerated by SQUAREM.

    Varadhan R & Roland C (2008) Scand J Stat 35:335-353: two EM steps give an extrapolated
    point, kept only if it does not lower the likelihood (the plain EM step is the fallback),
    so the iteration stays monotone. Stops when max |change| of a mass < tol. Observations
    covering the same innermost intervals are pooled first (their weights summed): the
    likelihood depends on them only through that sum, and each step then costs O(pairs + m).
    """
    a, b, w = _pool_ranges(a, b, w, m)
    p = np.full(m, 1.0 / m)
    total = w.sum()
    for it in range(1, max_iter + 1):
        p1 = _em_step(p, a, b, w, total)
        p2 = _em_step(p1, a, b, w, total)
        r, v = p1 - p, p2 - 2 * p1 + p
        nv = np.sqrt(v @ v)
        new = p2
        if nv > 0:
            step = -np.sqrt(r @ r) / nv
            trial = np.maximum(p - 2 * step * r + step**2 * v, 0.0)
            if trial.sum() > 0:
                # An extrapolation can empty an interval some observation needs: its
                # likelihood is then -inf or NaN and the plain EM step is kept.
                with np.errstate(divide="ignore", invalid="ignore"):
                    trial = _em_step(trial / trial.sum(), a, b, w, total)
                    if log_likelihood(trial, a, b, w) >= log_likelihood(p2, a, b, w):
                        new = trial
        if np.max(np.abs(new - p)) < tol:
            return new, it, True
        p = new
    return p, max_iter, False


def log_likelihood(p: np.ndarray, a: np.ndarray, b: np.ndarray, w: np.ndarray) -> float:
    """Interval-censored log likelihood sum_i w_i log P(interval i)."""
    cum = np.concatenate(([0.0], np.cumsum(p)))
    return float(w @ np.log(cum[b + 1] - cum[a]))


class Turnbull:
    """Turnbull nonparametric MLE for interval-censored event times.

    Parameters
    ----------
    alpha : float
        1 - confidence level of bootstrap intervals.
    tol : float
        Convergence: max absolute change of any interval mass between EM steps.
    max_iter : int
        Maximum EM steps (a warning is emitted if reached).
    n_boot : int
        Bootstrap replicates over observations for se / percentile limits (0 = none).
    seed : int or numpy Generator
        Randomness of the bootstrap.

    Notes
    -----
    ``summary`` columns: group (""), term ("survival" / "risk"), time (right end of each
    innermost interval), estimate, se, lower, upper, n_at_risk (NaN: not defined), events
    (expected number of events in the interval), censored (NaN). ``intervals_``: left, right,
    probability.
    """

    def __init__(self, alpha: float = 0.05, tol: float = 1e-9, max_iter: int = 20_000,
                 n_boot: int = 0, seed: int | np.random.Generator | None = 0) -> None:
        self.alpha = alpha
        self.tol = tol
        self.max_iter = max_iter
        self.n_boot = n_boot
        self.seed = seed

    def fit(self, frame: Any, *, left: str, right: str, weights: str | None = None
            ) -> Turnbull:
        """Estimate the distribution from (left, right] intervals; returns self."""
        caller = "Turnbull.fit"
        cols = base.extract(frame, [left, right, weights], caller=caller)
        lo = base.as_float(cols[left], left, caller=caller, allow_inf=True)
        hi = base.as_float(cols[right], right, caller=caller, allow_inf=True)
        base.check_nonempty(lo.size, caller=caller)
        bad = lo > hi
        if bad.any():
            raise DataError(f"{caller}: {int(bad.sum())} rows have '{left}' > '{right}'; the "
                            "interval is (left, right]: swap or fix those rows")
        bad = np.isposinf(lo)
        if bad.any():
            raise DataError(f"{caller}: {int(bad.sum())} rows have '{left}' = inf; use the "
                            "last event-free time as left and inf as right for right-censoring")
        w = base.as_float(cols[weights], weights, caller=caller) if weights else np.ones(lo.size)
        base.check_weights(w, weights or "weights", caller=caller)
        self._data = (lo, hi, w)
        ilo, ihi, a, b = innermost_intervals(lo, hi)
        p, self.n_iter_, self.converged_ = self_consistency(a, b, w, ilo.size, self.tol,
                                                            self.max_iter)
        if not self.converged_:
            warnings.warn(f"Turnbull: EM did not converge in {self.max_iter} steps (tol "
                          f"{self.tol}); raise max_iter", UserWarning, stacklevel=2)
        self.intervals_ = pd.DataFrame({"left": ilo, "right": ihi, "probability": p})
        self.loglik_ = log_likelihood(p, a, b, w)
        self.n_ = int(lo.size)
        boot = self._bootstrap(ihi) if self.n_boot > 0 else None
        self._table = self._tidy(ihi, p, w.sum(), boot)
        return self

    def survival_at(self, times: Any) -> np.ndarray:
        """S(t) = 1 - mass of innermost intervals ending at or before t (NaN inside one)."""
        base.require_fitted(self, "intervals_")
        return _survival(self.intervals_, np.atleast_1d(np.asarray(times, dtype=float)))

    def _bootstrap(self, grid: np.ndarray) -> np.ndarray:
        rng = np.random.default_rng(self.seed)
        lo, hi, w = self._data
        reps = np.empty((self.n_boot, grid.size))
        for k in range(self.n_boot):
            i = rng.integers(0, lo.size, lo.size)
            blo, bhi, a, b = innermost_intervals(lo[i], hi[i])
            p, _, _ = self_consistency(a, b, w[i], blo.size, self.tol, self.max_iter)
            frame = pd.DataFrame({"left": blo, "right": bhi, "probability": p})
            reps[k] = _survival(frame, grid, strict=False)
        return reps

    def _tidy(self, grid: np.ndarray, p: np.ndarray, total: float, boot: np.ndarray | None
              ) -> pd.DataFrame:
        surv = 1 - np.cumsum(p)
        if boot is not None:
            se = boot.std(axis=0, ddof=1)
            lo = np.quantile(boot, self.alpha / 2, axis=0)
            hi = np.quantile(boot, 1 - self.alpha / 2, axis=0)
        else:
            se = lo = hi = np.full(grid.size, np.nan)
        common = {"group": "", "time": grid, "se": se, "n_at_risk": np.nan,
                  "events": p * total, "censored": np.nan}
        out = pd.concat([
            pd.DataFrame({**common, "term": "survival", "estimate": surv, "lower": lo,
                          "upper": hi}),
            pd.DataFrame({**common, "term": "risk", "estimate": 1 - surv, "lower": 1 - hi,
                          "upper": 1 - lo})], ignore_index=True)
        return base.tidy(out, base.CURVE_COLUMNS)

    @property
    def summary(self) -> pd.DataFrame:
        """Tidy curve rows (see class Notes)."""
        base.require_fitted(self, "_table")
        return self._table.copy()


def _survival(intervals: pd.DataFrame, times: np.ndarray, strict: bool = True) -> np.ndarray:
    right = intervals["right"].to_numpy()
    left = intervals["left"].to_numpy()
    cum = np.concatenate(([0.0], np.cumsum(intervals["probability"].to_numpy())))
    done = np.searchsorted(right, times, side="right")
    surv = 1 - cum[done]
    if strict:  # undetermined strictly inside an innermost interval (they are disjoint)
        j = np.minimum(np.searchsorted(right, times, side="left"), right.size - 1)
        inside = (times > left[j]) & (times < right[j])
        surv = np.where(inside, np.nan, surv)
    return surv
