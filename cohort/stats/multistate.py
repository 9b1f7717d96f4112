"""Multi-state model: transition counts, Nelson-Aalen hazards, Aalen-Johansen occupation.

Aalen OO & Johansen S (1978) Scand J Stat 5:141-150; Andersen PK, Borgan O, Gill RD & Keiding N
(1993) Statistical Models Based on Counting Processes, sec. IV.4. The transition probability
matrix is the product integral P(0, t) = prod_{s <= t} (I + dA(s)) over the unique transition
times, dA_hk(s) = d_hk(s) / Y_h(s) (Nelson-Aalen increments, all transitions at a tied time
taken together), with Y_h the number in state h and under observation (start < s <= stop).
State-occupation probabilities are p(t) = p(0) P(0, t), p(0) the distribution of the states in
which persons are first observed. Pointwise intervals: nonparametric bootstrap over persons
(seeded Generator), percentile limits.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from cohort.errors import DataError
from cohort.stats import _survival_base as base

HAZARD_COLUMNS = ("from_state", "to_state", "time", "cumulative_hazard", "se", "n_at_risk",
                  "events")


@dataclass(frozen=True)
class _Long:
    """Validated long data as integer state codes (censored rows have to_code == -1)."""

    person: np.ndarray
    frm: np.ndarray
    to: np.ndarray
    start: np.ndarray
    stop: np.ndarray


def _occupation(d: _Long, n_states: int) -> dict[str, np.ndarray]:
    """Aalen-Johansen state occupation on the grid of unique transition times."""
    moves = d.to >= 0
    grid, tix = np.unique(d.stop[moves], return_inverse=True)
    y = np.zeros((grid.size, n_states))
    for h in range(n_states):
        m = d.frm == h
        y[:, h] = (_count_ge(d.stop[m], grid) - _count_ge(d.start[m], grid))
    cnt = np.zeros((grid.size, n_states, n_states))
    np.add.at(cnt, (tix, d.frm[moves], d.to[moves]), 1.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        d_a = np.where(y[:, :, None] > 0, cnt / y[:, :, None], 0.0)
    first = _first_rows(d)
    p0 = np.bincount(d.frm[first], minlength=n_states) / first.size
    p = p0
    occ = np.empty((grid.size, n_states))
    for j in range(grid.size):
        out = d_a[j].sum(axis=1)
        # p_k += sum_h p_h dA_hk; p_h -= p_h sum_k dA_hk  (row j of the product integral)
        p = p + p @ d_a[j] - p * out
        occ[j] = p
    return {"time": grid, "occupation": occ, "at_risk": y, "counts": cnt, "d_a": d_a, "p0": p0}


def _count_ge(values: np.ndarray, grid: np.ndarray) -> np.ndarray:
    """Number of values >= each grid time."""
    s = np.sort(values)
    return s.size - np.searchsorted(s, grid, side="left")


def _first_rows(d: _Long) -> np.ndarray:
    order = np.lexsort((d.start, d.person))
    head = np.r_[True, d.person[order][1:] != d.person[order][:-1]]
    return order[head]


class MultiState:
    """Nonparametric multi-state model (any set of allowed transitions).

    Parameters
    ----------
    states : sequence
        State labels in order, e.g. ["normal", "first_degree", "higher_grade", "pacemaker",
        "death"].
    transitions : sequence of (from, to) pairs, optional
        Allowed transitions; rows with other transitions raise DataError. Default: any
        transition between listed states.
    alpha : float
        1 - confidence level of the bootstrap intervals.
    n_boot : int
        Bootstrap replicates over persons (0 = no intervals).
    seed : int or numpy Generator
        Randomness of the bootstrap.

    Notes
    -----
    Input long data: one row per (id, from_state, start, stop] sojourn, ``to_state`` = the
    state entered at ``stop``, or missing / equal to ``from_state`` if censored there.
    ``summary`` columns: group (""), term (state), time, estimate (occupation probability),
    se, lower, upper, n_at_risk (number in that state), events (transitions into it),
    censored (censored in it). ``cumulative_hazard_`` columns: from_state, to_state, time,
    cumulative_hazard, se (sqrt of sum d / Y^2), n_at_risk, events. ``transition_counts_``:
    from_state, to_state (or "censored"), count.
    """

    def __init__(self, states: Sequence[Any], transitions: Sequence[tuple[Any, Any]] | None = None,
                 alpha: float = 0.05, n_boot: int = 200,
                 seed: int | np.random.Generator | None = 0) -> None:
        self.states = states
        self.transitions = transitions
        self.alpha = alpha
        self.n_boot = n_boot
        self.seed = seed

    def fit(self, frame: Any, *, id: str, from_state: str, to_state: str,
            start: str, stop: str) -> MultiState:
        """Estimate hazards and state occupation; returns self."""
        d = self._validate(frame, id, from_state, to_state, start, stop)
        k = len(self.states)
        self._long = d
        res = _occupation(d, k)
        self._result = res
        self.times_ = res["time"]
        self.occupation_ = pd.DataFrame(res["occupation"], columns=[str(s) for s in self.states])
        self.occupation_.insert(0, "time", res["time"])
        self.transition_counts_ = self._counts(d)
        self.cumulative_hazard_ = self._hazards(res)
        boot = self._bootstrap(d, res["time"]) if self.n_boot > 0 else None
        self._table = self._tidy(d, res, boot)
        return self

    def _validate(self, frame: Any, id_: str, frm: str, to: str, start: str, stop: str) -> _Long:
        caller = "MultiState.fit"
        cols = base.extract(frame, [id_, frm, to, start, stop], caller=caller)
        a = base.as_float(cols[start], start, caller=caller, allow_inf=True)
        b = base.as_float(cols[stop], stop, caller=caller)
        base.check_nonempty(b.size, caller=caller)
        base.check_times(b, a, caller=caller, duration_name=stop, entry_name=start)
        index = {s: i for i, s in enumerate(self.states)}
        f_codes = np.array([index.get(v, -2) for v in cols[frm].tolist()])
        bad = f_codes < 0
        if bad.any():
            raise DataError(f"{caller}: {int(bad.sum())} rows have '{frm}' not among the states "
                            f"{list(self.states)}; add the state or fix the rows")
        raw_to = cols[to].tolist()
        t_codes = np.array([-1 if v is None or (isinstance(v, float) and np.isnan(v))
                            else index.get(v, -2) for v in raw_to])
        t_codes = np.where(t_codes == f_codes, -1, t_codes)  # same state = censored
        bad = t_codes == -2
        if bad.any():
            raise DataError(f"{caller}: {int(bad.sum())} rows have '{to}' not among the states "
                            f"{list(self.states)} (missing = censored); fix those rows")
        if self.transitions is not None:
            allowed = {(index[h], index[k]) for h, k in self.transitions}
            moves = t_codes >= 0
            pairs = list(zip(f_codes[moves].tolist(), t_codes[moves].tolist(), strict=True))
            wrong = [pr for pr in pairs if pr not in allowed]
            if wrong:
                first = (self.states[wrong[0][0]], self.states[wrong[0][1]])
                raise DataError(f"{caller}: {len(wrong)} rows make transitions not allowed "
                                f"(first: {first}); add them to transitions= or fix the rows")
        person = base.as_labels(cols[id_], id_, caller=caller)[0]
        return _Long(person, f_codes, t_codes, a, b)

    def _counts(self, d: _Long) -> pd.DataFrame:
        lab = [str(s) for s in self.states]
        to = np.where(d.to >= 0, np.array(lab, dtype=object)[np.maximum(d.to, 0)], "censored")
        frame = pd.DataFrame({"from_state": np.array(lab, dtype=object)[d.frm], "to_state": to})
        return frame.value_counts().rename("count").reset_index().sort_values(
            ["from_state", "to_state"]).reset_index(drop=True)

    def _hazards(self, res: dict[str, np.ndarray]) -> pd.DataFrame:
        lab = [str(s) for s in self.states]
        parts = []
        cnt, y = res["counts"], res["at_risk"]
        for h in range(len(lab)):
            for k in range(len(lab)):
                if h == k or cnt[:, h, k].sum() == 0:
                    continue
                with np.errstate(divide="ignore", invalid="ignore"):
                    var = np.where(y[:, h] > 0, cnt[:, h, k] / y[:, h] ** 2, 0.0)
                parts.append(pd.DataFrame({
                    "from_state": lab[h], "to_state": lab[k], "time": res["time"],
                    "cumulative_hazard": np.cumsum(res["d_a"][:, h, k]),
                    "se": np.sqrt(np.cumsum(var)), "n_at_risk": y[:, h],
                    "events": cnt[:, h, k]}))
        if not parts:
            return pd.DataFrame(columns=list(HAZARD_COLUMNS))
        return pd.concat(parts, ignore_index=True)[list(HAZARD_COLUMNS)]

    def _bootstrap(self, d: _Long, grid: np.ndarray) -> np.ndarray:
        """Occupation replicates on the original grid (B x T x states), persons resampled."""
        rng = np.random.default_rng(self.seed)
        order = np.argsort(d.person, kind="stable")
        n_p = int(d.person.max()) + 1
        starts = np.searchsorted(d.person[order], np.arange(n_p))
        sizes = np.diff(np.append(starts, d.person.size))
        reps = np.empty((self.n_boot, grid.size, len(self.states)))
        for b in range(self.n_boot):
            pick = rng.integers(0, n_p, n_p)
            rows = order[np.repeat(starts[pick], sizes[pick])
                         + _ranks_within(sizes[pick])]
            bd = _Long(np.repeat(np.arange(n_p), sizes[pick]), d.frm[rows], d.to[rows],
                       d.start[rows], d.stop[rows])
            r = _occupation(bd, len(self.states))
            idx = np.searchsorted(r["time"], grid, side="right") - 1
            occ0 = r["p0"][None, :]
            reps[b] = np.where(idx[:, None] >= 0, r["occupation"][np.maximum(idx, 0)], occ0)
        return reps

    def _tidy(self, d: _Long, res: dict[str, np.ndarray], boot: np.ndarray | None
              ) -> pd.DataFrame:
        parts = []
        grid, occ, y, cnt = res["time"], res["occupation"], res["at_risk"], res["counts"]
        cens = np.zeros((grid.size, len(self.states)))
        c_rows = (d.to < 0) & np.isin(d.stop, grid)
        np.add.at(cens, (np.searchsorted(grid, d.stop[c_rows]), d.frm[c_rows]), 1.0)
        for k, s in enumerate(self.states):
            if boot is not None:
                se = boot[:, :, k].std(axis=0, ddof=1)
                lo = np.quantile(boot[:, :, k], self.alpha / 2, axis=0)
                hi = np.quantile(boot[:, :, k], 1 - self.alpha / 2, axis=0)
            else:
                se = lo = hi = np.full(grid.size, np.nan)
            parts.append(pd.DataFrame({
                "group": "", "term": str(s), "time": grid, "estimate": occ[:, k], "se": se,
                "lower": lo, "upper": hi, "n_at_risk": y[:, k],
                "events": cnt[:, :, k].sum(axis=1), "censored": cens[:, k]}))
        return base.tidy(pd.concat(parts, ignore_index=True), base.CURVE_COLUMNS)

    @property
    def summary(self) -> pd.DataFrame:
        """Tidy state-occupation rows (see class Notes)."""
        base.require_fitted(self, "_table")
        return self._table.copy()

    def occupation_at(self, times: Any) -> pd.DataFrame:
        """State-occupation probabilities at chosen times (one column per state)."""
        base.require_fitted(self, "_result")
        times = np.atleast_1d(np.asarray(times, dtype=float))
        idx = np.searchsorted(self.times_, times, side="right") - 1
        occ = np.where(idx[:, None] >= 0,
                       self._result["occupation"][np.maximum(idx, 0)], self._result["p0"])
        out = pd.DataFrame(occ, columns=[str(s) for s in self.states])
        out.insert(0, "time", times)
        return out


def _ranks_within(sizes: np.ndarray) -> np.ndarray:
    """0, 1, ..., n-1 for each block of the given sizes, concatenated."""
    total = int(sizes.sum())
    return np.arange(total) - np.repeat(np.cumsum(sizes) - sizes, sizes)
