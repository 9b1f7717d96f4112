"""Absolute risk (cumulative incidence) for covariate profiles from cause-specific Cox models.

The cause-specific hazards of all causes are fitted with :class:`cohort.stats.cox.CoxPH`
(Breslow baseline hazards) and combined by the product integral (Andersen PK, Borgan O, Gill
RD & Keiding N 1993, sec. VII.2; Benichou J & Gail MH 1990 Biometrics 46:813):

    S(t | x) = prod_{s <= t} (1 - sum_k dA_k(s | x)),
    CIF_k(t | x) = sum_{s <= t} S(s- | x) dA_k(s | x).

Intervals come from a nonparametric bootstrap over persons (``n_boot`` > 0, seeded Generator);
without it ``se``, ``lower`` and ``upper`` are NaN. ``landmark`` builds landmark data sets
(van Houwelingen HC 2007 Scand J Stat 34:70-85).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from cohort.errors import DataError
from cohort.stats import _survival_base as base
from cohort.stats.cox import CoxPH

RISK_COLUMNS = ("profile", "term", "time", "estimate", "se", "lower", "upper", "n", "events")


def combine_cause_specific(times: list[np.ndarray], increments: list[np.ndarray]
                           ) -> tuple[np.ndarray, np.ndarray]:
    """Product-integral CIFs from per-cause hazard increments (each T_k x q) on a union grid.

    Returns the union grid (T,) and CIF array (T x K x q).
    """
    grid = np.unique(np.concatenate(times))
    q = increments[0].shape[1]
    d_a = np.zeros((grid.size, len(times), q))
    for k, (t, inc) in enumerate(zip(times, increments, strict=True)):
        d_a[np.searchsorted(grid, t), k, :] = inc
    total = np.minimum(d_a.sum(axis=1), 1.0)  # a probability of leaving cannot exceed 1
    surv = np.cumprod(1.0 - total, axis=0)
    s_prev = np.vstack([np.ones((1, q)), surv[:-1]])
    return grid, np.cumsum(s_prev[:, None, :] * d_a, axis=0)


class AbsoluteRisk:
    """Cumulative incidence at horizons for covariate profiles (cause-specific Cox models).

    Parameters
    ----------
    horizons : sequence of float
        Times (in the duration's units) at which risk is reported, e.g. (5, 10) years.
    alpha : float
        1 - confidence level of the bootstrap percentile intervals.
    ties : {"efron", "breslow"}
        Ties of the cause-specific Cox fits.
    cause_names : dict, optional
        Labels for cause codes; default ``cause_<code>``.
    n_boot : int
        Bootstrap replicates over persons (0 = no intervals).
    seed : int or numpy Generator
        Randomness of the bootstrap.

    Notes
    -----
    ``summary`` columns: profile, term (cause label), time (horizon), estimate, se, lower,
    upper, n, events (of that cause).
    """

    def __init__(self, horizons: Any = (5.0, 10.0), alpha: float = 0.05, ties: str = "efron",
                 cause_names: dict[int, str] | None = None, n_boot: int = 0,
                 seed: int | np.random.Generator | None = 0) -> None:
        self.horizons = horizons
        self.alpha = alpha
        self.ties = ties
        self.cause_names = cause_names
        self.n_boot = n_boot
        self.seed = seed

    def fit(self, frame: Any, *, duration: str, event: str, covariates: list[str],
            profiles: Any = None, entry: str | None = None, weights: str | None = None,
            id: str | None = None) -> AbsoluteRisk:
        """Fit one cause-specific Cox model per cause and predict for ``profiles``.

        ``profiles`` is a frame with the covariate columns (one row per profile); default the
        covariate means. Returns self.
        """
        caller = "AbsoluteRisk.fit"
        cols = base.extract(frame, [duration, event, entry, weights, id, *covariates],
                            caller=caller)
        codes = base.event_codes(cols[event], event, caller=caller)
        self.causes_ = [int(c) for c in np.unique(codes[codes > 0])]
        if not self.causes_:
            raise DataError(f"{caller}: no events in '{event}'; nothing to predict")
        names = self.cause_names or {}
        self.cause_labels_ = [names.get(k, f"cause_{k}") for k in self.causes_]
        self._frame = pd.DataFrame(cols)
        self._roles = {"duration": duration, "event": event, "covariates": list(covariates),
                       "entry": entry, "weights": weights, "id": id}
        self.models_ = self._fit_models(self._frame)
        x = self._profiles(profiles, covariates)
        self.profiles_ = pd.DataFrame(x, columns=list(covariates))
        est = self._predict(self.models_, x)
        boot = self._bootstrap(x) if self.n_boot > 0 else None
        self._table = self._tidy(est, boot, codes)
        return self

    def _fit_models(self, df: pd.DataFrame) -> dict[int, CoxPH]:
        r = self._roles
        return {k: CoxPH(ties=self.ties, event_of_interest=k).fit(
            df, duration=r["duration"], event=r["event"], covariates=r["covariates"],
            entry=r["entry"], weights=r["weights"], id=r["id"]) for k in self.causes_}

    def _profiles(self, profiles: Any, covariates: list[str]) -> np.ndarray:
        if profiles is None:
            return self.models_[self.causes_[0]].means_.to_numpy()[None, :]
        cols = base.extract(profiles, covariates, caller="AbsoluteRisk.fit(profiles=...)")
        return np.column_stack([base.as_float(cols[c], c, caller="AbsoluteRisk.fit")
                                for c in covariates])

    def _predict(self, models: dict[int, CoxPH], x: np.ndarray) -> np.ndarray:
        """CIF at the horizons: array (horizons x causes x profiles)."""
        incs = [models[k].hazard_increments(x) for k in self.causes_]
        grid, cif = combine_cause_specific([t for t, _ in incs], [d for _, d in incs])
        h = np.atleast_1d(np.asarray(self.horizons, dtype=float))
        idx = np.searchsorted(grid, h, side="right") - 1
        out = np.where(idx[:, None, None] >= 0, cif[np.maximum(idx, 0)], 0.0)
        return out

    def _bootstrap(self, x: np.ndarray) -> np.ndarray:
        """Replicates (B x horizons x causes x profiles), resampling persons (ids)."""
        rng = np.random.default_rng(self.seed)
        df, idc = self._frame, self._roles["id"]
        keys = df[idc].to_numpy() if idc else np.arange(len(df))
        uniq, inv = np.unique(keys, return_inverse=True)
        order = np.argsort(inv, kind="stable")
        starts = np.searchsorted(inv[order], np.arange(uniq.size))
        sizes = np.diff(np.append(starts, len(df)))
        reps = []
        for _ in range(self.n_boot):
            pick = rng.integers(0, uniq.size, uniq.size)
            rows = order[np.concatenate([np.arange(s, s + n) for s, n in
                                         zip(starts[pick], sizes[pick], strict=True)])]
            boot = df.iloc[rows].reset_index(drop=True)
            if idc:  # each drawn person is a new cluster
                boot[idc] = np.repeat(np.arange(uniq.size), sizes[pick])
            try:
                reps.append(self._predict(self._fit_models(boot), x))
            except DataError:  # a replicate without events of some cause
                continue
        return np.array(reps)

    def _tidy(self, est: np.ndarray, boot: np.ndarray | None, codes: np.ndarray
              ) -> pd.DataFrame:
        h = np.atleast_1d(np.asarray(self.horizons, dtype=float))
        rows = []
        for ih, t in enumerate(h):
            for ik, (k, label) in enumerate(zip(self.causes_, self.cause_labels_, strict=True)):
                for ip in range(est.shape[2]):
                    b = boot[:, ih, ik, ip] if boot is not None and boot.size else None
                    rows.append({
                        "profile": ip, "term": label, "time": t, "estimate": est[ih, ik, ip],
                        "se": np.std(b, ddof=1) if b is not None else np.nan,
                        "lower": np.quantile(b, self.alpha / 2) if b is not None else np.nan,
                        "upper": np.quantile(b, 1 - self.alpha / 2) if b is not None else np.nan,
                        "n": len(self._frame), "events": int((codes == k).sum())})
        return pd.DataFrame(rows, columns=list(RISK_COLUMNS))

    @property
    def summary(self) -> pd.DataFrame:
        """Tidy risk rows (see class Notes)."""
        base.require_fitted(self, "_table")
        return self._table.copy()

    def predict(self, profiles: Any) -> pd.DataFrame:
        """Point estimates of the CIFs at the horizons for new profiles (no intervals)."""
        base.require_fitted(self, "models_")
        x = self._profiles(profiles, self._roles["covariates"])
        est = self._predict(self.models_, x)
        h = np.atleast_1d(np.asarray(self.horizons, dtype=float))
        rows = [{"profile": ip, "term": lab, "time": t, "estimate": est[ih, ik, ip]}
                for ih, t in enumerate(h) for ik, lab in enumerate(self.cause_labels_)
                for ip in range(est.shape[2])]
        return pd.DataFrame(rows)


def landmark(frame: Any, *, landmarks: Any, duration: str, event: str,
             entry: str | None = None, horizon: float | None = None) -> pd.DataFrame:
    """Stack landmark data sets: persons event-free and under follow-up at each landmark s.

    Time is reset to start at s (new duration = duration - s); with ``horizon`` follow-up is
    administratively censored at s + horizon. Persons who enter after s are not at risk at s
    and are left out. Adds a ``landmark`` column; all other columns are carried unchanged.
    """
    caller = "landmark"
    df = frame.to_pandas() if hasattr(frame, "to_pandas") and not isinstance(
        frame, pd.DataFrame) else pd.DataFrame(frame)
    cols = base.extract(df, [duration, event, entry], caller=caller)
    t = base.as_float(cols[duration], duration, caller=caller)
    codes = base.event_codes(cols[event], event, caller=caller)
    e = base.as_float(cols[entry], entry, caller=caller, allow_inf=True) if entry else None
    parts = []
    for s in np.atleast_1d(np.asarray(landmarks, dtype=float)):
        keep = (t > s) if e is None else (t > s) & (e <= s)
        part = df.loc[keep].copy()
        new_t = t[keep] - s
        new_e = codes[keep]
        if horizon is not None:
            beyond = new_t > horizon
            new_t = np.where(beyond, horizon, new_t)
            new_e = np.where(beyond, 0, new_e)
        part[duration] = new_t
        part[event] = new_e
        if entry:
            part[entry] = 0.0
        part.insert(0, "landmark", s)
        parts.append(part)
    return pd.concat(parts, ignore_index=True)
