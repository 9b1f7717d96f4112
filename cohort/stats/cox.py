"""Cox proportional-hazards regression (cause-specific, counting-process, stratified).

Cox DR (1972) JRSS-B 34:187-220. Ties by Efron B (1977) JASA 72:557-565 (default) or
Breslow NE (1974) Biometrics 30:89-99. Delayed entry and time-updated covariates through the
counting-process form (start, stop] (Andersen PK & Gill RD 1982 Ann Stat 10:1100). Robust
sandwich variance by Lin DY & Wei LJ (1989) JASA 84:1074-1078, clustered on ``id``.
Proportional-hazards test by Grambsch PM & Therneau TM (1994) Biometrika 81:515-526 in its
original (approximate) form: the one of R survival < 3.0 cox.zph and lifelines
``proportional_hazard_test``.

Speed: each Newton step is O(n p^2). Rows are mapped once to bins of the sorted unique event
times; the risk-set sums of exp(eta), x exp(eta) and x x' exp(eta) at every event time are then
a sparse "enter at bin a, leave at bin b" accumulation followed by a cumulative sum, so delayed
entry costs nothing extra and no per-iteration sort is needed. Efron's correction is applied
per event row, vectorized.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from scipy import sparse, stats

from cohort.errors import DataError
from cohort.stats import _survival_base as base

TIES = ("efron", "breslow")
PH_TRANSFORMS = ("km", "rank", "identity")
PH_COLUMNS = ("term", "statistic", "df", "p", "transform")


# --------------------------------------------------------------------------- design
@dataclass
class _Tail:
    """Rows that stay in the risk set after ``stop`` with weight g(t) * scale (Fine-Gray)."""

    rows: np.ndarray  # positions (in the active design) of rows with a tail
    scale: np.ndarray  # 1 / G(T_i-) for those rows
    g_event: np.ndarray  # G(t_j-) at every event time (global event order)
    enter: sparse.csr_matrix  # bins x n_tail: the tail starts at the row's exit bin


@dataclass
class _Design:
    """Everything about the data that does not change between Newton steps.

    Active rows are sorted by exit bin, so the events of one event time are contiguous in
    ``event_rows`` and the exit accumulation is a sparse matrix built without sorting.
    """

    x: np.ndarray  # active rows, centered covariates (n_a x p)
    w: np.ndarray
    enter: sparse.csr_matrix  # bins x n_a: 1 at each row's entry bin
    leave: sparse.csr_matrix  # bins x n_a: 1 at each row's exit bin
    block_first: np.ndarray  # first bin of each stratum block
    block_size: np.ndarray
    event_bin: np.ndarray  # bin of each event time
    event_rows: np.ndarray  # active positions of event rows, grouped by event time
    event_of_row: np.ndarray  # global event-time index of each event row
    event_start: np.ndarray  # first position in event_rows of each event time
    frac: np.ndarray  # Efron fraction l / d of each event row (0 for Breslow)
    meanw: np.ndarray  # mean weight of the tied events of each event row
    ev_w: np.ndarray  # weight of each event row
    xw_events: np.ndarray  # sum over events of w x (constant part of the score)
    bins: tuple[np.ndarray, np.ndarray]  # entry and exit bin of each active row
    event_time: np.ndarray  # time of every event time (global order)
    event_stratum: np.ndarray
    tail: _Tail | None


def _block_cumsum(d: np.ndarray, first: np.ndarray, size: np.ndarray) -> np.ndarray:
    """Cumulative sum along axis 0 restarted at each stratum block (exact reset)."""
    cum = np.cumsum(d, axis=0)
    before = np.zeros((first.size,) + d.shape[1:])
    before[1:] = cum[first[1:] - 1]
    return cum - np.repeat(before, size, axis=0)


def _bin_matrix(bins: np.ndarray, n_bins: int) -> sparse.csr_matrix:
    """Sparse bins x rows indicator (row i counted in bin ``bins[i]``), built in O(n)."""
    order = np.arange(bins.size) if np.all(np.diff(bins) >= 0) else np.argsort(bins,
                                                                               kind="stable")
    indptr = np.searchsorted(bins[order], np.arange(n_bins + 1), side="left")
    return sparse.csr_matrix((np.ones(bins.size), order, indptr), shape=(n_bins, bins.size))


def _event_bins(start: np.ndarray, stop: np.ndarray, event: np.ndarray, strata: np.ndarray
                ) -> tuple[np.ndarray, ...]:
    """Entry/exit bin of every row on per-stratum grids of unique event times."""
    n = stop.size
    b_start = np.empty(n, dtype=np.int64)
    b_stop = np.empty(n, dtype=np.int64)
    firsts, sizes, ev_times, ev_strata = [], [], [], []
    offset = 0
    for s in range(int(strata.max()) + 1):
        m = strata == s
        ut = np.unique(stop[m & (event == 1)])
        b_start[m] = offset + np.searchsorted(ut, start[m], side="right")
        b_stop[m] = offset + np.searchsorted(ut, stop[m], side="right")
        firsts.append(offset)
        sizes.append(ut.size + 1)
        ev_times.append(ut)
        ev_strata.append(np.full(ut.size, s))
        offset += ut.size + 1
    return (b_start, b_stop, np.array(firsts), np.array(sizes), np.concatenate(ev_times),
            np.concatenate(ev_strata))


def _build_design(start: np.ndarray, stop: np.ndarray, event: np.ndarray, x: np.ndarray,
                  w: np.ndarray, strata: np.ndarray, ties: str,
                  tail: tuple[np.ndarray, np.ndarray, Any] | None) -> tuple[_Design, np.ndarray]:
    """Map rows to event-time bins once; returns the design and the active-row positions."""
    b_start, b_stop, first, size, ev_time, ev_stratum = _event_bins(start, stop, event, strata)
    n_bins = int(size.sum())
    has_tail = np.zeros(stop.size, dtype=bool)
    if tail is not None:
        has_tail[tail[0]] = True
    # Rows whose interval holds no event time (and no tail) never enter a risk set.
    active = np.flatnonzero((b_start < b_stop) | has_tail)
    keys = b_stop[active]
    if n_bins < np.iinfo(np.uint16).max:
        keys = keys.astype(np.uint16)  # numpy sorts 16-bit keys by radix sort
    active = active[np.argsort(keys, kind="stable")]
    b_start, b_stop = b_start[active], b_stop[active]
    xa, wa, ea = x[active], w[active], event[active]
    is_event_bin = np.ones(n_bins, dtype=bool)
    is_event_bin[first + size - 1] = False  # the last bin of a block follows the last event
    event_bin = np.flatnonzero(is_event_bin)
    bin_to_event = np.full(n_bins, -1)
    bin_to_event[event_bin] = np.arange(event_bin.size)
    ev_rows = np.flatnonzero(ea == 1)  # already grouped by event time (sorted by exit bin)
    ev_of_row = bin_to_event[b_stop[ev_rows] - 1]
    d = np.bincount(ev_of_row, minlength=event_bin.size)
    ev_start = np.cumsum(d) - d
    wsum = np.add.reduceat(wa[ev_rows], ev_start)
    rank = np.arange(ev_rows.size) - np.repeat(ev_start, d)
    frac = rank / d[ev_of_row] if ties == "efron" else np.zeros(ev_rows.size)
    tail_obj = None
    if tail is not None:
        pos = np.flatnonzero(has_tail[active])
        scale = np.empty(stop.size)
        scale[tail[0]] = tail[1]
        tail_obj = _Tail(pos, scale[active[pos]], tail[2](ev_time, ev_stratum),
                         _bin_matrix(b_stop[pos], n_bins))
    design = _Design(
        x=xa, w=wa, enter=_bin_matrix(b_start, n_bins), leave=_bin_matrix(b_stop, n_bins),
        block_first=first, block_size=size, event_bin=event_bin, event_rows=ev_rows,
        event_of_row=ev_of_row, event_start=ev_start, frac=frac, meanw=(wsum / d)[ev_of_row],
        ev_w=wa[ev_rows], xw_events=wa[ev_rows] @ xa[ev_rows], bins=(b_start, b_stop),
        event_time=ev_time, event_stratum=ev_stratum, tail=tail_obj)
    return design, active


# --------------------------------------------------------------------------- likelihood
@dataclass
class _Eval:
    loglik: float
    grad: np.ndarray
    info: np.ndarray
    s0: np.ndarray  # per event row (Efron-adjusted), scaled by exp(-shift)
    xbar: np.ndarray  # per event row
    risk: np.ndarray  # exp(eta - shift) of active rows
    shift: float
    r0: np.ndarray  # unadjusted risk-set sum per event time (scaled)


def _risk_sums(des: _Design, f_cols: np.ndarray) -> np.ndarray:
    """Risk-set sums of the columns at every event time (plain intervals plus tails)."""
    agg = _block_cumsum(des.enter @ f_cols - des.leave @ f_cols, des.block_first,
                        des.block_size)[des.event_bin]
    if des.tail is not None:
        t = des.tail
        tail_in = t.enter @ (f_cols[t.rows] * t.scale[:, None])
        agg = agg + t.g_event[:, None] * _block_cumsum(
            tail_in, des.block_first, des.block_size)[des.event_bin]
    return agg


def _over_risk_sets(des: _Design, per_event: np.ndarray) -> np.ndarray:
    """For each active row, the sum of a per-event-time quantity over its risk sets."""
    n_bins = des.enter.shape[0]
    full = np.zeros((n_bins,) + per_event.shape[1:])
    full[des.event_bin] = per_event
    cum = np.concatenate([np.zeros((1,) + per_event.shape[1:]), np.cumsum(full, axis=0)])
    b0, b1 = des.bins
    out = cum[b1] - cum[b0]
    if des.tail is not None:
        t = des.tail
        full_g = np.zeros_like(full)
        full_g[des.event_bin] = per_event * t.g_event.reshape((-1,) + (1,) * (per_event.ndim - 1))
        cum_g = np.concatenate([np.zeros((1,) + per_event.shape[1:]), np.cumsum(full_g, axis=0)])
        start = b1[t.rows]
        end = _block_end(des, start)
        scale = t.scale.reshape((-1,) + (1,) * (per_event.ndim - 1))
        out[t.rows] += scale * (cum_g[end] - cum_g[start])
    return out


def _evaluate(des: _Design, beta: np.ndarray) -> _Eval:
    """Efron/Breslow log partial likelihood, score and information at ``beta``."""
    eta = des.x @ beta
    shift = float(eta.max())
    risk = np.exp(eta - shift)
    f = des.w * risk
    f_cols = np.empty((f.size, 1 + beta.size))
    f_cols[:, 0] = f
    np.multiply(des.x, f[:, None], out=f_cols[:, 1:])
    agg = _risk_sums(des, f_cols)
    ev_sum = np.add.reduceat(f_cols[des.event_rows], des.event_start)
    j, fr, mw = des.event_of_row, des.frac, des.meanw
    per_row = np.take(agg, j, axis=0)
    if np.any(fr):
        per_row -= fr[:, None] * np.take(ev_sum, j, axis=0)
    s0 = per_row[:, 0]
    xbar = per_row[:, 1:]
    xbar /= s0[:, None]
    ll = float(beta @ des.xw_events - mw @ (np.log(s0) + shift))
    grad = des.xw_events - mw @ xbar
    # Second moments without forming x x' per row: sum_j a_j S2_j = X' diag(f c) X, where
    # c_i sums a_j over the risk sets holding row i (Efron's down-weighting subtracted).
    n_ev = agg.shape[0]
    a_j = np.bincount(j, weights=mw / s0, minlength=n_ev)
    c = _over_risk_sets(des, a_j)
    if np.any(fr):
        c[des.event_rows] -= np.bincount(j, weights=mw * fr / s0, minlength=n_ev)[j]
    info = (des.x * (f * c)[:, None]).T @ des.x - (xbar * mw[:, None]).T @ xbar
    return _Eval(ll, grad, info, s0, xbar, risk, shift, agg[:, 0])


def _newton(des: _Design, tol: float, max_iter: int
            ) -> tuple[np.ndarray, _Eval, int, bool, float]:
    """Newton-Raphson with step halving from beta = 0; also returns the null log likelihood."""
    beta = np.zeros(des.x.shape[1])
    cur = _evaluate(des, beta)
    null = cur.loglik
    for it in range(1, max_iter + 1):
        try:
            step = np.linalg.solve(cur.info, cur.grad)
        except np.linalg.LinAlgError:
            raise DataError("CoxPH.fit: the information matrix is singular; covariates are "
                            "collinear or one of them separates the events perfectly; drop or "
                            "combine the offending covariates") from None
        for _ in range(40):
            new = _evaluate(des, beta + step)
            if np.isfinite(new.loglik) and new.loglik >= cur.loglik - 1e-10 * abs(cur.loglik):
                break
            step = step / 2
        beta, cur = beta + step, new
        if np.max(np.abs(step)) < tol * (1 + np.max(np.abs(beta))):
            return beta, cur, it, True, null
    return beta, cur, max_iter, False, null


# --------------------------------------------------------------------------- residuals
def _per_event_time(des: _Design, ev: _Eval) -> dict[str, np.ndarray]:
    """Hazard increments and means summed over the Efron steps of each event time."""
    h = des.meanw / ev.s0
    keep = 1.0 - des.frac
    d = np.diff(np.append(des.event_start, des.event_rows.size))

    def seg(v: np.ndarray) -> np.ndarray:
        return np.add.reduceat(v, des.event_start)

    return {"H": seg(h), "Hk": seg(h * keep), "HX": seg(h[:, None] * ev.xbar),
            "HXk": seg((h * keep)[:, None] * ev.xbar),
            "xbar_mean": seg(ev.xbar) / d[:, None]}


def _rowsum(idx: np.ndarray, vals: np.ndarray, n: int) -> np.ndarray:
    """Sum rows of ``vals`` by integer group ``idx`` (0..n-1)."""
    mat = sparse.csr_matrix((np.ones(idx.size), (idx, np.arange(idx.size))), shape=(n, idx.size))
    return np.asarray(mat @ vals)


def _score_residuals(des: _Design, ev: _Eval) -> np.ndarray:
    """Per-row score residuals (Efron-weighted as in R survival; Lin & Wei 1989)."""
    sums = _per_event_time(des, ev)
    h_in = _over_risk_sets(des, sums["H"])
    hx_in = _over_risk_sets(des, sums["HX"])
    comp = ev.risk[:, None] * (des.x * h_in[:, None] - hx_in)
    rows, j = des.event_rows, des.event_of_row
    # A row dying at t_j carries weight (1 - l/d) in the l-th Efron risk set.
    dh = sums["H"][j] - sums["Hk"][j]
    dhx = sums["HX"][j] - sums["HXk"][j]
    comp[rows] -= ev.risk[rows, None] * (des.x[rows] * dh[:, None] - dhx)
    resid = -comp
    resid[rows] += des.x[rows] - sums["xbar_mean"][j]
    return resid


def _block_end(des: _Design, bins: np.ndarray) -> np.ndarray:
    """One past the last bin of the block holding each bin."""
    ends = des.block_first + des.block_size
    return ends[np.searchsorted(ends, bins, side="right")]


def _ph_test(des: _Design, ev: _Eval, var: np.ndarray, terms: list[str],
             transform: str) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Grambsch-Therneau test on scaled Schoenfeld residuals (per term and global)."""
    sums = _per_event_time(des, ev)
    rows, j = des.event_rows, des.event_of_row
    resid = des.x[rows] - sums["xbar_mean"][j]
    t = des.event_time[j]
    if transform == "km":
        # 1 - KM(t) from the same (weighted) risk sets as the model, at beta = 0.
        r0 = _risk_sums(des, des.w[:, None])[:, 0]
        wsum = np.bincount(j, weights=des.ev_w, minlength=r0.size)
        km = np.ones(r0.size)
        for s in np.unique(des.event_stratum):  # KM per stratum, as the model's risk sets
            m = des.event_stratum == s
            km[m] = np.cumprod(1 - wsum[m] / r0[m])
        g = 1 - km[j]
    elif transform == "rank":
        g = stats.rankdata(t)
    else:
        g = t.astype(float)
    d = rows.size
    gc = g - g.mean()
    test = gc @ resid
    # Scaled residuals r* = d r V (lifelines' convention); T_j = (g'r*_j)^2 / (d V_jj g'g).
    per = d * (test @ var) ** 2 / (np.diag(var) * (gc @ gc))
    glob = float(test @ var @ test) * d / (gc @ gc)
    p = len(terms)
    table = pd.DataFrame({
        "term": terms + ["GLOBAL"], "statistic": np.append(per, glob),
        "df": [1] * p + [p], "p": np.append(stats.chi2.sf(per, 1), stats.chi2.sf(glob, p)),
        "transform": transform})
    scaled = d * resid @ var
    schoen = pd.DataFrame(resid, columns=terms)
    schoen.insert(0, "time", t)
    for k, name in enumerate(terms):
        schoen[f"scaled_{name}"] = scaled[:, k]
    return table, schoen


# --------------------------------------------------------------------------- estimator
class CoxPH:
    """Cox proportional-hazards model (cause-specific when ``event_of_interest`` is set).

    Parameters
    ----------
    alpha : float
        1 - confidence level of the hazard-ratio intervals.
    ties : {"efron", "breslow"}
        Handling of tied event times.
    robust : bool
        Report the Lin-Wei sandwich standard error (clustered on ``id`` when given) in
        ``se``; the model-based one stays in ``se_naive``.
    event_of_interest : int, optional
        Event code modelled; all other codes are censored (cause-specific hazard). When None
        the event column must be 0/1.
    ph_transform : {"km", "rank", "identity"}
        Time transform g(t) of the Grambsch-Therneau test (km = 1 - KM(t) as in lifelines; R's default transform).
    ph_alpha : float
        ``ph_flag`` is True where the PH test p-value is below this.
    concordance : bool
        Also compute Harrell's C (via lifelines; ignores delayed entry).
    tol, max_iter : float, int
        Newton-Raphson stops when max |step| < tol (1 + max |beta|).

    Notes
    -----
    ``summary`` columns: term, estimate (log HR), se, se_naive, hr, lower, upper (HR scale),
    z, p, n (persons: distinct ids, else rows), events, ph_p, ph_flag. ``ph_test_`` holds
    term, statistic, df, p, transform (with a GLOBAL row). Counting-process data: pass
    ``entry=`` (or its alias ``start=``) and ``id=``; time-updated covariates are simply
    columns of the (start, stop] rows.
    """

    def __init__(self, alpha: float = 0.05, ties: str = "efron", robust: bool = False,
                 event_of_interest: int | None = None, ph_transform: str = "km",
                 ph_alpha: float = 0.05, concordance: bool = False, tol: float = 1e-9,
                 max_iter: int = 50) -> None:
        base.check_setting(ties, TIES, "ties", caller="CoxPH")
        base.check_setting(ph_transform, PH_TRANSFORMS, "ph_transform", caller="CoxPH")
        self.alpha = alpha
        self.ties = ties
        self.robust = robust
        self.event_of_interest = event_of_interest
        self.ph_transform = ph_transform
        self.ph_alpha = ph_alpha
        self.concordance = concordance
        self.tol = tol
        self.max_iter = max_iter

    def fit(self, frame: Any, *, duration: str, event: str,
            covariates: list[str] | None = None, entry: str | None = None,
            start: str | None = None, weights: str | None = None, strata: str | None = None,
            id: str | None = None) -> CoxPH:
        """Fit by Newton-Raphson; returns self. ``start`` is an alias of ``entry``."""
        caller = "CoxPH.fit"
        if entry is not None and start is not None and entry != start:
            raise DataError(f"{caller}: give either entry= or start= (aliases), not both")
        entry = entry or start
        roles = [duration, event, entry, weights, strata, id]
        if covariates is None:
            covariates = [c for c in base.frame_columns(frame) if c not in roles]
        if not covariates:
            raise DataError(f"{caller}: no covariates; pass covariates=[...] column names")
        cols = base.extract(frame, roles + list(covariates), caller=caller)
        stop = base.as_float(cols[duration], duration, caller=caller)
        base.check_nonempty(stop.size, caller=caller)
        codes = base.event_codes(cols[event], event, caller=caller)
        ev = self._event_indicator(codes, event, caller)
        st = (base.as_float(cols[entry], entry, caller=caller, allow_inf=True) if entry
              else np.full(stop.size, -np.inf))
        base.check_times(stop, st if entry else None, caller=caller, duration_name=duration,
                         entry_name=entry)
        w = base.as_float(cols[weights], weights, caller=caller) if weights else None
        if w is not None:
            base.check_weights(w, weights, caller=caller)
            if not self.robust and np.any(w != np.round(w)):
                warnings.warn("CoxPH: non-integer weights (e.g. inverse-probability weights) "
                              "with model-based standard errors understate uncertainty; use "
                              "CoxPH(robust=True)", UserWarning, stacklevel=2)
        x = np.column_stack([base.as_float(cols[c], c, caller=caller) for c in covariates])
        strat = (base.as_labels(cols[strata], strata, caller=caller)[0] if strata
                 else np.zeros(stop.size, dtype=np.int64))
        cluster = base.as_labels(cols[id], id, caller=caller)[0] if id else None
        self._fit_arrays(st, stop, ev, x, w, strat, cluster, list(covariates))
        if self.concordance:
            self.concordance_ = self._harrell_c(stop, ev, x)
        return self

    def _event_indicator(self, codes: np.ndarray, name: str, caller: str) -> np.ndarray:
        if self.event_of_interest is None:
            if codes.max(initial=0) > 1:
                raise DataError(
                    f"{caller}: column '{name}' has codes > 1 ({int((codes > 1).sum())} rows); "
                    "set CoxPH(event_of_interest=k) to fit the cause-specific hazard of cause k")
            return codes
        return (codes == self.event_of_interest).astype(np.int64)

    def _fit_arrays(self, start: np.ndarray, stop: np.ndarray, event: np.ndarray,
                    x: np.ndarray, w: np.ndarray | None, strata: np.ndarray,
                    cluster: np.ndarray | None, terms: list[str],
                    tail: tuple[np.ndarray, np.ndarray, Any] | None = None) -> CoxPH:
        """Fit from arrays (shared with FineGray, which adds weighted risk-set tails)."""
        caller = "CoxPH.fit"
        if event.sum() == 0:
            raise DataError(f"{caller}: no events in the data; nothing to estimate")
        w = np.ones(stop.size) if w is None else w
        sd = x.std(axis=0)
        if np.any(sd == 0):
            const = [t for t, s in zip(terms, sd, strict=True) if s == 0]
            raise DataError(f"{caller}: covariate(s) {const} are constant; drop them (a "
                            "constant has no hazard ratio)")
        self.means_ = pd.Series(np.average(x, axis=0, weights=w), index=terms)
        xc = x - self.means_.to_numpy()
        des, active = _build_design(start, stop, event, xc, w, strata, self.ties, tail)
        beta, cur, n_iter, ok, null = _newton(des, self.tol, self.max_iter)
        if not ok:
            warnings.warn(f"CoxPH: Newton-Raphson did not converge in {self.max_iter} "
                          "iterations; estimates may be unreliable (check for separation)",
                          UserWarning, stacklevel=3)
        self._design, self._eval = des, cur
        var = np.linalg.inv(cur.info)
        self.params_ = pd.Series(beta, index=terms)
        self.variance_naive_ = pd.DataFrame(var, index=terms, columns=terms)
        self.loglik_ = cur.loglik
        self.loglik_null_ = null
        self.n_iter_, self.converged_ = n_iter, ok
        self._rows = (active, stop.size, w, cluster)
        # The sandwich needs per-row score residuals (an extra O(n p) pass): only on request.
        self.variance_robust_ = self._sandwich(var) if self.robust else None
        self.variance_ = self.variance_robust_ if self.robust else self.variance_naive_
        self.ph_test_, self.schoenfeld_ = _ph_test(des, cur, var, terms, self.ph_transform)
        self.n_ = int(cluster.max() + 1 if cluster is not None else stop.size)
        self.events_ = int(event.sum())
        self.baseline_cumulative_hazard_ = self._baseline(cur)
        return self

    def score_residuals(self) -> pd.DataFrame:
        """Per-row score residuals U_i (Efron-weighted as R survival), in input row order.

        Rows whose follow-up holds no event time have U_i = 0.
        """
        base.require_fitted(self, "params_")
        active, n_rows, _, _ = self._rows
        out = np.zeros((n_rows, self.params_.size))
        out[active] = _score_residuals(self._design, self._eval)
        return pd.DataFrame(out, columns=self.params_.index)

    def _sandwich(self, var: np.ndarray) -> pd.DataFrame:
        _, _, w, cluster = self._rows
        u = self.score_residuals().to_numpy() * w[:, None]
        if cluster is not None:
            u = _rowsum(cluster, u, int(cluster.max()) + 1)
        rv = var @ (u.T @ u) @ var
        terms = list(self.params_.index)
        return pd.DataFrame(rv, index=terms, columns=terms)

    def _baseline(self, ev: _Eval) -> pd.DataFrame:
        """Breslow cumulative baseline hazard at the covariate means, per stratum."""
        des = self._design
        wsum = np.bincount(des.event_of_row, weights=des.ev_w, minlength=ev.r0.size)
        d_a = wsum / (ev.r0 * np.exp(ev.shift))
        cum = np.zeros_like(d_a)
        for s in np.unique(des.event_stratum):
            m = des.event_stratum == s
            cum[m] = np.cumsum(d_a[m])
        return pd.DataFrame({"stratum": des.event_stratum, "time": des.event_time,
                             "hazard": d_a, "cumulative_hazard": cum})

    def _harrell_c(self, stop: np.ndarray, ev: np.ndarray, x: np.ndarray) -> float:
        from lifelines.utils import concordance_index

        return float(concordance_index(stop, -(x @ self.params_.to_numpy()), ev))

    # ------------------------------------------------------------------ results
    @property
    def summary(self) -> pd.DataFrame:
        """Tidy coefficient rows (see class Notes for the columns)."""
        base.require_fitted(self, "params_")
        z = base.z_value(self.alpha)
        out = base.wald_table(list(self.params_.index), self.params_.to_numpy(),
                              np.sqrt(np.diag(self.variance_.to_numpy())),
                              np.sqrt(np.diag(self.variance_naive_.to_numpy())), z, self.n_,
                              self.events_)
        ph = self.ph_test_.set_index("term")["p"]
        out["ph_p"] = out["term"].map(ph).to_numpy()
        out["ph_flag"] = out["ph_p"] < self.ph_alpha
        return base.tidy(out, base.REGRESSION_COLUMNS)

    def hazard_increments(self, profiles: np.ndarray, stratum: int = 0
                          ) -> tuple[np.ndarray, np.ndarray]:
        """Breslow hazard increments dA(t | x) at the event times of one stratum.

        Parameters
        ----------
        profiles : array (q x p)
            Covariate rows on the original scale, columns in ``params_`` order.
        stratum : int
            Stratum code (order of the sorted stratum labels).

        Returns
        -------
        times (T,), increments (T x q).
        """
        base.require_fitted(self, "params_")
        bh = self.baseline_cumulative_hazard_
        m = bh["stratum"].to_numpy() == stratum
        lin = (np.atleast_2d(profiles) - self.means_.to_numpy()) @ self.params_.to_numpy()
        return bh["time"].to_numpy()[m], bh["hazard"].to_numpy()[m][:, None] * np.exp(lin)


# --------------------------------------------------------------------------- data preparation
def split_counting_process(persons: Any, changes: Any, *, id: str, entry: str, exit: str,
                           event: str, time: str, values: list[str]) -> pd.DataFrame:
    """Build (start, stop] episodes with covariates carried forward from their change times.

    Parameters
    ----------
    persons : frame
        One row per person: ``id``, ``entry`` (start of follow-up, e.g. age at index when
        age is the time scale, which makes the risk sets left-truncated), ``exit`` and
        ``event`` (code at exit).
    changes : frame
        Rows ``id``, ``time`` and the ``values`` columns measured then (e.g. PR at each ECG),
        on the same time scale. The last value at or before a time applies (carried forward);
        a change at or before entry sets the value at entry; changes at or after exit are
        ignored. Before a person's first change the values are missing (NaN).

    Returns
    -------
    pandas DataFrame with columns id, start, stop, event (the exit code on the last episode,
    0 before), and the ``values`` columns; ready for ``CoxPH.fit(..., entry="start",
    duration="stop", id="id")``.
    """
    caller = "split_counting_process"
    p = base.extract(persons, [id, entry, exit, event], caller=caller)
    c = base.extract(changes, [id, time, *values], caller=caller)
    pid = p[id]
    if np.unique(pid).size != pid.size:
        raise DataError(f"{caller}: 'persons' has {pid.size - np.unique(pid).size} duplicated "
                        f"'{id}' values; give one row per person")
    t0 = base.as_float(p[entry], entry, caller=caller)
    t1 = base.as_float(p[exit], exit, caller=caller)
    base.check_times(t1, t0, caller=caller, duration_name=exit, entry_name=entry)
    ev = base.event_codes(p[event], event, caller=caller)
    ct = base.as_float(c[time], time, caller=caller)
    labels, pcode = np.unique(pid, return_inverse=True)
    ccode = np.searchsorted(labels, c[id])
    known = (ccode < labels.size) & (labels[np.minimum(ccode, labels.size - 1)] == c[id])
    ccode, ct = ccode[known], ct[known]
    vals = np.column_stack([np.asarray(c[v], dtype=float)[known] for v in values])
    person_of = np.empty(labels.size, dtype=np.int64)
    person_of[pcode] = np.arange(pid.size)
    prow = person_of[ccode]
    inside = (ct > t0[prow]) & (ct < t1[prow])
    # Cut points: entry, every change strictly inside follow-up, exit.
    cut_person = np.concatenate([np.arange(pid.size), prow[inside]])
    cut_time = np.concatenate([t0, ct[inside]])
    order = np.lexsort((cut_time, cut_person))
    cut_person, cut_time = cut_person[order], cut_time[order]
    dup = np.r_[False, (cut_person[1:] == cut_person[:-1]) & (cut_time[1:] == cut_time[:-1])]
    cut_person, cut_time = cut_person[~dup], cut_time[~dup]
    last = np.r_[cut_person[1:] != cut_person[:-1], True]
    stop = np.where(last, t1[cut_person], np.r_[cut_time[1:], 0.0])
    out = pd.DataFrame({id: pid[cut_person], "start": cut_time, "stop": stop,
                        event: np.where(last, ev[cut_person], 0)})
    # Carry forward: the latest change at or before each episode start.
    corder = np.lexsort((ct, prow))
    vals_sorted, ct_sorted = vals[corder], ct[corder]
    for k, name in enumerate(values):
        out[name] = _carry_forward(prow[corder], ct_sorted, vals_sorted[:, k], cut_person,
                                   cut_time)
    return out


def _carry_forward(c_person: np.ndarray, c_time: np.ndarray, c_val: np.ndarray,
                   q_person: np.ndarray, q_time: np.ndarray) -> np.ndarray:
    """Value of the latest change (same person, time <= query time); NaN if none.

    Changes must be sorted by (person, time). Times are ranked jointly so that the composite
    (person, time) key is an exact integer and one searchsorted answers every query.
    """
    if c_person.size == 0:
        return np.full(q_person.size, np.nan)
    grid = np.unique(np.concatenate([c_time, q_time]))
    width = np.int64(grid.size)
    ck = c_person.astype(np.int64) * width + np.searchsorted(grid, c_time)
    qk = q_person.astype(np.int64) * width + np.searchsorted(grid, q_time)
    pos = np.searchsorted(ck, qk, side="right") - 1
    safe = np.maximum(pos, 0)
    ok = (pos >= 0) & (c_person[safe] == q_person)
    return np.where(ok, c_val[safe], np.nan)
