"""Fine-Gray subdistribution-hazard regression by inverse-probability-of-censoring weights.

Fine JP & Gray RJ (1999) JASA 94:496-509, fitted as a weighted Cox model in counting-process
form (Geskus RB 2011 Biometrics 67:39-49): a person with a competing event at T_i stays in the
risk set after T_i with weight G(t-)/G(T_i-), G the Kaplan-Meier estimate of the censoring
distribution. At tied times events precede censoring (G is evaluated just before t), as in R
survival's ``finegray``. The weighted risk sets are handled inside the Cox engine as a
time-scaled "tail" of each competing-event row, so the data are never expanded and each Newton
step stays O(n p^2).

Variance: the robust (Lin-Wei sandwich, clustered on the person) standard error is reported in
``se`` by default, as R's ``coxph`` does for ``finegray`` data; like it, it treats G as known.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from cohort.errors import DataError
from cohort.stats import _survival_base as base
from cohort.stats.cox import CoxPH


def censoring_survival(duration: np.ndarray, codes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Kaplan-Meier of the censoring times, events of any cause counted first at ties.

    Returns the grid of unique exit times and G(t) (right-continuous) on it.
    """
    tab = base.risk_table(duration, codes, None, None, n_codes=int(codes.max(initial=0)))
    cens = tab["counts"][:, 0]
    events = tab["counts"][:, 1:].sum(axis=1)
    at_risk = tab["at_risk"] - events  # those with an event at t left just before t
    with np.errstate(divide="ignore", invalid="ignore"):
        factor = np.where(cens > 0, 1 - cens / at_risk, 1.0)
    return tab["time"], np.cumprod(factor)


def left_limit(grid: np.ndarray, values: np.ndarray, times: np.ndarray) -> np.ndarray:
    """Value just before each time of a right-continuous step function starting at 1."""
    idx = np.searchsorted(grid, times, side="left") - 1
    return np.concatenate(([1.0], values))[idx + 1]


class FineGray:
    """Fine-Gray proportional subdistribution-hazards model for one cause.

    Parameters
    ----------
    event_of_interest : int
        Cause code modelled; other non-zero codes are competing events, 0 is censored.
    alpha, ties, ph_transform, ph_alpha, tol, max_iter
        As in :class:`cohort.stats.cox.CoxPH`.
    robust : bool
        Report the sandwich standard error in ``se`` (default True; ``se_naive`` is always
        reported too).

    Notes
    -----
    ``summary`` has the columns of :class:`CoxPH` (term, estimate = log subdistribution HR,
    se, se_naive, hr, lower, upper, z, p, n, events, ph_p, ph_flag). Censoring weights are
    estimated without case weights and within strata when ``strata`` is given (as R's
    ``finegray``). Delayed entry is not supported.
    """

    def __init__(self, event_of_interest: int = 1, alpha: float = 0.05, ties: str = "efron",
                 robust: bool = True, ph_transform: str = "km", ph_alpha: float = 0.05,
                 tol: float = 1e-9, max_iter: int = 50) -> None:
        self.event_of_interest = event_of_interest
        self.alpha = alpha
        self.ties = ties
        self.robust = robust
        self.ph_transform = ph_transform
        self.ph_alpha = ph_alpha
        self.tol = tol
        self.max_iter = max_iter

    def fit(self, frame: Any, *, duration: str, event: str,
            covariates: list[str] | None = None, entry: str | None = None,
            weights: str | None = None, strata: str | None = None) -> FineGray:
        """Fit the subdistribution hazard of ``event_of_interest``; returns self."""
        caller = "FineGray.fit"
        if entry is not None:
            raise DataError(f"{caller}: delayed entry (entry=) is not supported by this "
                            "Fine-Gray fit; use cause-specific CoxPH(entry=...) with "
                            "AbsoluteRisk, or restrict to persons followed from time 0")
        roles = [duration, event, weights, strata]
        if covariates is None:
            covariates = [c for c in base.frame_columns(frame) if c not in roles]
        cols = base.extract(frame, roles + list(covariates), caller=caller)
        t = base.as_float(cols[duration], duration, caller=caller)
        base.check_nonempty(t.size, caller=caller)
        codes = base.event_codes(cols[event], event, caller=caller)
        base.check_times(t, None, caller=caller, duration_name=duration, entry_name=None)
        w = base.as_float(cols[weights], weights, caller=caller) if weights else None
        if w is not None:
            base.check_weights(w, weights, caller=caller)
        if not (codes == self.event_of_interest).any():
            raise DataError(f"{caller}: no row has event code {self.event_of_interest} in "
                            f"'{event}'; set event_of_interest to a code present in the data")
        x = np.column_stack([base.as_float(cols[c], c, caller=caller) for c in covariates])
        strat = (base.as_labels(cols[strata], strata, caller=caller)[0] if strata
                 else np.zeros(t.size, dtype=np.int64))
        self.model_ = CoxPH(alpha=self.alpha, ties=self.ties, robust=self.robust,
                            ph_transform=self.ph_transform, ph_alpha=self.ph_alpha,
                            tol=self.tol, max_iter=self.max_iter)
        ev = (codes == self.event_of_interest).astype(np.int64)
        competing = np.flatnonzero((codes > 0) & (ev == 0))
        tail = self._tail(t, codes, strat, competing)
        person = np.arange(t.size)
        self.model_._fit_arrays(np.full(t.size, -np.inf), t, ev, x, w, strat, person,
                                list(covariates), tail=tail)
        self.params_ = self.model_.params_
        self.variance_ = self.model_.variance_
        self.n_, self.events_ = t.size, int(ev.sum())
        return self

    def _tail(self, t: np.ndarray, codes: np.ndarray, strat: np.ndarray,
              competing: np.ndarray) -> tuple[np.ndarray, np.ndarray, Any]:
        """Competing-event rows, their 1/G(T_i-), and G(t-) at event times, per stratum."""
        curves = {}
        for s in np.unique(strat):
            m = strat == s
            curves[s] = censoring_survival(t[m], codes[m])
        g_ti = np.empty(competing.size)
        for s, (grid, g) in curves.items():
            m = strat[competing] == s
            g_ti[m] = left_limit(grid, g, t[competing[m]])
        if np.any(g_ti <= 0):
            raise DataError("FineGray.fit: the censoring distribution reaches 0 before some "
                            "competing events; the weights are undefined (check late "
                            "censoring)")

        def g_at_events(times: np.ndarray, strata_of: np.ndarray) -> np.ndarray:
            out = np.empty(times.size)
            for s, (grid, g) in curves.items():
                m = strata_of == s
                out[m] = left_limit(grid, g, times[m])
            return out

        return competing, 1.0 / g_ti, g_at_events

    # ------------------------------------------------------------------ results
    @property
    def summary(self) -> pd.DataFrame:
        """Tidy coefficient rows (columns as CoxPH)."""
        base.require_fitted(self, "model_")
        return self.model_.summary

    @property
    def ph_test_(self) -> pd.DataFrame:
        """Grambsch-Therneau test on the weighted fit (as cox.zph on finegray data)."""
        base.require_fitted(self, "model_")
        return self.model_.ph_test_

    def cumulative_incidence(self, profiles: np.ndarray, times: Any, stratum: int = 0
                             ) -> pd.DataFrame:
        """Predicted CIF(t | x) = 1 - exp(-Lambda0(t) exp(x'beta)) (Breslow baseline)."""
        base.require_fitted(self, "model_")
        grid, d_a = self.model_.hazard_increments(np.atleast_2d(profiles), stratum)
        cum = np.cumsum(d_a, axis=0)
        times = np.atleast_1d(np.asarray(times, dtype=float))
        idx = np.searchsorted(grid, times, side="right") - 1
        lam = np.where(idx[:, None] >= 0, cum[np.maximum(idx, 0)], 0.0)
        rows = [pd.DataFrame({"profile": k, "time": times, "estimate": 1 - np.exp(-lam[:, k])})
                for k in range(lam.shape[1])]
        return pd.concat(rows, ignore_index=True)
