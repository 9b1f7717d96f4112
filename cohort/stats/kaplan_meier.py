"""Kaplan-Meier survival with Greenwood variance, left truncation and numbers at risk.

Kaplan EL & Meier P (1958) JASA 53:457-481; Greenwood M (1926) Reports on Public Health and
Medical Subjects 33. Left truncation (delayed entry) uses risk sets entry < t <= exit
(Klein & Moeschberger 2003, sec. 4.6).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from cohort.stats import _survival_base as base

COMPETING_WARNING = (
    "KaplanMeier: other event types are present and were treated as censored; 1 - KM then "
    "estimates the risk in a world without the competing event and overstates the risk "
    "when a competing event such as death removes people (use AalenJohansen for the "
    "cumulative incidence)"
)


@dataclass(frozen=True)
class _Curve:
    """One fitted curve on its grid of unique exit times."""

    time: np.ndarray
    n_at_risk: np.ndarray
    events: np.ndarray
    censored: np.ndarray
    survival: np.ndarray
    se: np.ndarray  # standard error of S(t) (Greenwood)


def km_curve(duration: np.ndarray, event: np.ndarray, entry: np.ndarray | None,
             weights: np.ndarray | None) -> _Curve:
    """Product-limit estimate and Greenwood SE at each unique exit time (ties exact)."""
    tab = base.risk_table(duration, event, entry, weights, n_codes=1)
    n, d = tab["at_risk"], tab["counts"][:, 1]
    with np.errstate(divide="ignore", invalid="ignore"):
        factor = np.where(n > 0, 1.0 - d / n, 1.0)
        surv = np.cumprod(factor)
        # Greenwood: Var S = S^2 sum d / (n (n - d)); infinite once the curve reaches 0.
        term = np.where(d > 0, d / (n * (n - d)), 0.0)
        se = surv * np.sqrt(np.cumsum(term))
    se = np.where(surv > 0, se, 0.0)
    return _Curve(tab["time"], n, d, tab["counts"][:, 0], surv, se)


class KaplanMeier:
    """Kaplan-Meier estimator of the survival function.

    Parameters
    ----------
    alpha : float
        1 - confidence level of the pointwise intervals.
    ci : {"log-log", "log", "plain"}
        Interval transform; log-log (the default of R survfit's conf.type="log-log") keeps
        limits in [0, 1].
    event_of_interest : int
        Event code counted as the event; other non-zero codes are treated as censored.
    competing_event_present : bool
        Declare that a competing event exists (even if not coded): 1 - KM is then labelled
        ``risk_naive`` and a warning is emitted.

    Notes
    -----
    With case weights the counts are weighted sums and Greenwood's formula is applied to them
    (an approximation; bootstrap for inference under sampling weights).
    ``summary`` columns: group, term ("survival", and "risk" = 1 - KM, or "risk_naive" under
    competing events), time, estimate, se, lower, upper, n_at_risk, events, censored.
    """

    def __init__(self, alpha: float = 0.05, ci: str = "log-log", event_of_interest: int = 1,
                 competing_event_present: bool = False) -> None:
        base.check_setting(ci, base.CI_KINDS, "ci", caller="KaplanMeier")
        self.alpha = alpha
        self.ci = ci
        self.event_of_interest = event_of_interest
        self.competing_event_present = competing_event_present

    def fit(self, frame: Any, *, duration: str, event: str, entry: str | None = None,
            weights: str | None = None, group: str | None = None) -> KaplanMeier:
        """Fit one curve per level of ``group`` (or one overall curve); returns self."""
        caller = "KaplanMeier.fit"
        cols, t, codes, e, w = base.curve_inputs(
            frame, duration=duration, event=event, entry=entry, weights=weights, group=group, caller=caller
        )
        other = (codes > 0) & (codes != self.event_of_interest)
        self.competing_ = bool(self.competing_event_present or other.any())
        if self.competing_:
            warnings.warn(COMPETING_WARNING, UserWarning, stacklevel=2)
        ev = (codes == self.event_of_interest).astype(np.int64)
        if group is None:
            gcodes, labels = np.zeros(t.size, dtype=np.int64), np.array(["all"])
        else:
            gcodes, labels = base.as_labels(cols[group], group, caller=caller)
        self.groups_ = [str(g) for g in labels]
        self.curves_: dict[str, _Curve] = {}
        self._data = (t, ev, e, w, gcodes)
        for k, label in enumerate(self.groups_):
            m = gcodes == k
            self.curves_[label] = km_curve(t[m], ev[m], None if e is None else e[m],
                                           None if w is None else w[m])
        self.n_ = int(t.size)
        self.events_ = float(ev.sum() if w is None else (w * ev).sum())
        return self

    # ------------------------------------------------------------------ results
    def _interval(self, surv: np.ndarray, se: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        return base.probability_ci(surv, se, base.z_value(self.alpha), self.ci)

    @property
    def summary(self) -> pd.DataFrame:
        """Tidy curve rows (see class Notes for the columns)."""
        base.require_fitted(self, "curves_")
        risk_term = "risk_naive" if self.competing_ else "risk"
        parts = []
        for label, c in self.curves_.items():
            lo, hi = self._interval(c.survival, c.se)
            common = {"group": label, "time": c.time, "se": c.se, "n_at_risk": c.n_at_risk,
                      "events": c.events, "censored": c.censored}
            parts.append(pd.DataFrame({**common, "term": "survival", "estimate": c.survival,
                                       "lower": lo, "upper": hi}))
            parts.append(pd.DataFrame({**common, "term": risk_term, "estimate": 1 - c.survival,
                                       "lower": 1 - hi, "upper": 1 - lo}))
        return base.tidy(pd.concat(parts, ignore_index=True), base.CURVE_COLUMNS)

    def survival_at(self, times: Any) -> pd.DataFrame:
        """S(t) with SE and interval at chosen times, per group (right-continuous).

        NaN past the last follow-up time unless the curve has reached 0 there.
        """
        base.require_fitted(self, "curves_")
        times = np.atleast_1d(np.asarray(times, dtype=float))
        rows = []
        for label, c in self.curves_.items():
            s = base.step_lookup(c.time, c.survival, times, before=1.0)
            se = base.step_lookup(c.time, c.se, times, before=0.0)
            beyond = times > c.time[-1]
            s = np.where(beyond & (c.survival[-1] > 0), np.nan, s)  # undefined past last follow-up
            lo, hi = self._interval(s, se)
            rows.append(pd.DataFrame({"group": label, "time": times, "estimate": s, "se": se,
                                      "lower": lo, "upper": hi}))
        return pd.concat(rows, ignore_index=True)

    def at_risk_table(self, times: Any) -> pd.DataFrame:
        """Numbers at risk at each time, and events / censored since the previous time."""
        base.require_fitted(self, "curves_")
        t, ev, e, w, gcodes = self._data
        times = np.atleast_1d(np.asarray(times, dtype=float))
        parts = []
        for k, label in enumerate(self.groups_):
            m = gcodes == k
            tab = base.at_risk_counts(t[m], ev[m], None if e is None else e[m],
                                      None if w is None else w[m], times)
            tab.insert(0, "group", label)
            parts.append(tab)
        return pd.concat(parts, ignore_index=True)
