"""Analysis kind ``site_quality``: event rates per site and period, funnel plot and u-chart data.

For each endpoint (by default progression to higher-grade AV block and pacemaker implantation,
whatever the spec declares), the at-risk follow-up of every person is placed on the calendar
(index date + days since index) and cut to the reporting period ``period``; the events
(status 1) dated inside the period count. Person-time runs over the days (start, stop] of
follow-up, so an event always falls on a day its person contributes to.

Parts (after ``variant``):

- ``rates``: per site over the whole reporting period, and the network ("all sites"):
  persons contributing time, events, person-years, rate per ``per`` person-years with exact
  Poisson limits (Garwood 1936);
- ``funnel``: each site against the network-wide rate with 95% and 99.8% exact Poisson
  limits (Spiegelhalter 2005, :func:`cohort.stats.quality.funnel_table`) and its flag;
- ``funnel_curve``: the funnel contours on a grid of person-years (for drawing);
- ``u_chart``: events per person-year per calendar period (``interval``: quarter by default)
  for the network and, with ``site_charts``, for each site, with the centre line and
  +/- ``sigma`` limits (:func:`cohort.stats.quality.u_chart`);
- ``outliers``: every site beyond the funnel limits and every period outside the u-chart
  limits.

The calendar split is done here on the endpoint frame (polars) rather than in ``sql/``: it
is one vectorized interval expansion of an already shaped frame, owned by this kind.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

import polars as pl

from cohort.errors import DataError
from cohort.stats.quality import (
    FUNNEL_COVERAGES,
    FUNNEL_METHODS,
    funnel_curve,
    funnel_table,
    u_chart,
)
from cohort.stats.rates import poisson_rates
from cohort.study.analyses import AnalysisContext, AnalysisKind, register_kind
from cohort.study.schema import (
    Key,
    KeyPath,
    SpecSource,
    alpha_level,
    date_window,
    distinct,
    positive,
)
from cohort.study.spec import DAYS_PER_YEAR, Spec

#: Label of the network-wide rows (all sites together).
NETWORK = "all sites"
#: Label of persons without a recorded site.
UNKNOWN_SITE = "(no site recorded)"
#: Months per period of each ``interval`` choice.
INTERVAL_MONTHS: dict[str, int] = {"month": 1, "quarter": 3, "half_year": 6, "year": 12}

RATES_COLUMNS = ("endpoint", "site", "period_start", "period_end", "persons", "events",
                 "person_years", "estimate", "lower", "upper", "per", "method", "alpha")
FUNNEL_COLUMNS = ("endpoint", "site", "events", "person_years", "estimate", "target",
                  "lower_95", "upper_95", "lower_998", "upper_998", "flag", "per", "method")
FUNNEL_CURVE_COLUMNS = ("endpoint", "person_years", "coverage", "target", "lower", "upper",
                        "per", "method")
U_CHART_COLUMNS = ("endpoint", "site", "period", "period_start", "period_end", "events",
                   "person_years", "estimate", "centre", "lower", "upper", "flag", "per",
                   "sigma")
OUTLIER_COLUMNS = ("endpoint", "chart", "site", "period", "events", "person_years", "estimate",
                   "lower", "upper", "limits", "flag", "per")

QUALITY_OPTIONS: dict[str, Key] = {
    "endpoints": Key((list,), None, doc="endpoints tracked (default: all declared)",
                     items=(str,), check=distinct),
    "period": Key((list,), None, items=(dt.date,), check=date_window,
                  doc="reporting period [start, end]: events and person-time inside it "
                      "(default: all follow-up)"),
    "interval": Key((str,), "quarter", tuple(INTERVAL_MONTHS), "calendar period of the u-chart"),
    "per": Key((int, float), 1000, doc="rates per this many person-years", check=positive),
    "funnel_method": Key((str,), "exact", FUNNEL_METHODS, "funnel limits (exact Poisson or normal)"),
    "sigma": Key((int, float), 3.0, doc="u-chart limits at centre +/- sigma standard errors",
                 check=positive),
    "site_charts": Key((bool,), True, doc="a u-chart per site besides the network chart"),
    "u_chart_centre": Key((str,), "own", ("own", "network"),
                          "centre of a site's u-chart: its own pooled rate or the network rate"),
    "alpha": Key((float,), 0.05, doc="two-sided level of the site rate intervals",
                 check=alpha_level),
}


def _check_quality(source: SpecSource, path: KeyPath, o: dict, spec: Spec) -> None:
    if not spec.endpoints:
        raise source.fail(path, "a site_quality analysis needs [endpoints.<name>] tables, e.g. "
                          "higher_grade (event = \"higher_grade_block\") and pacemaker")
    if o["endpoints"] is None:
        o["endpoints"] = list(spec.endpoints)
    for name in o["endpoints"]:
        if name not in spec.endpoints:
            raise source.fail((*path, "endpoints"), f"'{name}' is not a declared endpoint "
                              f"(endpoints: {', '.join(spec.endpoints)})")


# --------------------------------------------------------------------------- calendar split


def _period_index(date: pl.Expr, months: int) -> pl.Expr:
    """Number of the calendar period holding ``date`` (periods of ``months`` months)."""
    per_year = 12 // months
    return date.dt.year().cast(pl.Int64) * per_year + (date.dt.month().cast(pl.Int64) - 1) // months


def _period_start(index: pl.Expr, months: int) -> pl.Expr:
    per_year = 12 // months
    return pl.date(index // per_year, (index % per_year) * months + 1, 1)


def period_label(start: dt.date, interval: str) -> str:
    """Label of the period starting on ``start``: 2019-Q1, 2019-H2, 2019-03 or 2019."""
    if interval == "quarter":
        return f"{start.year}-Q{(start.month - 1) // 3 + 1}"
    if interval == "half_year":
        return f"{start.year}-H{(start.month - 1) // 6 + 1}"
    if interval == "month":
        return f"{start.year}-{start.month:02d}"
    return str(start.year)


def calendar_follow_up(frame: pl.DataFrame, period: tuple[dt.date, dt.date] | None) -> pl.DataFrame:
    """Follow-up on the calendar: ``lo`` (exclusive) and ``hi`` (inclusive) dates, cut to the period.

    ``frame`` has index_date, start_day, stop_day, status; rows without days inside the
    period are dropped; ``event`` is 1 when the endpoint's event falls inside the period.
    """
    lo = pl.col("index_date") + pl.duration(days=pl.col("start_day"))
    hi = pl.col("index_date") + pl.duration(days=pl.col("stop_day"))
    out = frame.with_columns(lo.cast(pl.Date).alias("lo"), hi.cast(pl.Date).alias("hi"))
    event = pl.col("status") == 1
    if period is not None:
        p0, p1 = period
        event = event & (pl.col("hi") >= p0) & (pl.col("hi") <= p1)
        out = out.with_columns(
            event.cast(pl.Int64).alias("event"),
            pl.max_horizontal(pl.col("lo"), pl.lit(p0 - dt.timedelta(days=1))).alias("lo"),
            pl.min_horizontal(pl.col("hi"), pl.lit(p1)).alias("hi"),
        )
    else:
        out = out.with_columns(event.cast(pl.Int64).alias("event"))
    return out.filter(pl.col("hi") > pl.col("lo"))


def split_periods(follow: pl.DataFrame, interval: str) -> pl.DataFrame:
    """Split calendar follow-up (lo, hi] into periods: one row per person and period.

    Returns person_key, site, period_start, period_end, days (days of follow-up inside the
    period) and event (1 on the row of the period holding ``hi`` when the event counts).
    """
    months = INTERVAL_MONTHS[interval]
    first = _period_index(pl.col("lo") + pl.duration(days=1), months)
    last = _period_index(pl.col("hi"), months)
    rows = follow.with_columns(first.alias("_p0"), last.alias("_p1")).with_columns(
        pl.int_ranges(pl.col("_p0"), pl.col("_p1") + 1).alias("_p")).explode("_p")
    start = _period_start(pl.col("_p"), months)
    end = _period_start(pl.col("_p") + 1, months) - pl.duration(days=1)
    rows = rows.with_columns(start.alias("period_start"), end.cast(pl.Date).alias("period_end"))
    first_day = pl.max_horizontal(pl.col("lo") + pl.duration(days=1), pl.col("period_start"))
    last_day = pl.min_horizontal(pl.col("hi"), pl.col("period_end"))
    days = (last_day - first_day).dt.total_days() + 1
    return rows.select(
        "person_key", "site", "period_start", "period_end", days.alias("days"),
        pl.when(pl.col("_p") == pl.col("_p1")).then(pl.col("event")).otherwise(0).alias("event"),
    )


# --------------------------------------------------------------------------- parts


def _site_rates(follow: pl.DataFrame, endpoint: str, period: tuple[dt.date, dt.date], o: dict) -> pl.DataFrame:
    days = (pl.col("hi") - pl.col("lo")).dt.total_days()
    by_site = follow.group_by("site").agg(pl.col("person_key").n_unique().alias("persons"),
                                          pl.col("event").sum().alias("events"),
                                          days.sum().alias("days")).sort("site")
    network = follow.select(pl.lit(NETWORK).alias("site"),
                            pl.col("person_key").n_unique().alias("persons"),
                            pl.col("event").sum().alias("events"), days.sum().alias("days"))
    table = pl.concat([by_site, network], how="vertical_relaxed")
    py = table["days"].to_numpy().astype(float) / DAYS_PER_YEAR
    res = poisson_rates(table["events"].to_numpy(), py, o["per"], o["alpha"])
    return table.select(
        pl.lit(endpoint).alias("endpoint"), "site", pl.lit(period[0]).alias("period_start"),
        pl.lit(period[1]).alias("period_end"), pl.col("persons").cast(pl.Int64),
        pl.col("events").cast(pl.Int64), pl.Series("person_years", py),
        pl.Series("estimate", res.estimate), pl.Series("lower", res.lower),
        pl.Series("upper", res.upper), pl.lit(float(o["per"])).alias("per"),
        pl.lit(res.method).alias("method"), pl.lit(o["alpha"]).alias("alpha"),
    )


def _funnel(rates: pl.DataFrame, endpoint: str, o: dict) -> tuple[pl.DataFrame, pl.DataFrame]:
    sites = rates.filter(pl.col("site") != NETWORK)
    if sites.height == 0 or int(sites["events"].sum()) == 0:
        return _empty(FUNNEL_COLUMNS), _empty(FUNNEL_CURVE_COLUMNS)  # no target to compare with
    table = funnel_table(sites, unit="site", events="events", denominator="person_years",
                         kind="rate", method=o["funnel_method"], per=o["per"])
    funnel = pl.from_pandas(table).rename({"unit": "site", "denominator": "person_years"})
    funnel = funnel.with_columns(pl.lit(endpoint).alias("endpoint")).select(FUNNEL_COLUMNS)
    py = sites["person_years"].to_numpy()
    target = float(sites["events"].sum()) / float(py.sum())
    curve = funnel_curve(target, float(py.max()) * 1.5, kind="rate",
                         min_precision=max(float(py.min()) / 2.0, 1e-3), points=120,
                         method=o["funnel_method"], coverages=FUNNEL_COVERAGES, per=o["per"])
    curve = pl.from_pandas(curve).rename({"precision": "person_years"}).with_columns(
        pl.lit(endpoint).alias("endpoint"), pl.lit(target * o["per"]).alias("target"),
        pl.lit(float(o["per"])).alias("per"), pl.lit(o["funnel_method"]).alias("method"))
    return funnel, curve.select(FUNNEL_CURVE_COLUMNS)


def _u_chart(periods: pl.DataFrame, endpoint: str, o: dict) -> pl.DataFrame:
    sums = periods.group_by("site", "period_start", "period_end").agg(
        pl.col("event").sum().alias("events"), pl.col("days").sum().alias("days"))
    sums = sums.with_columns((pl.col("days") / DAYS_PER_YEAR).alias("person_years")).filter(
        pl.col("person_years") > 0)
    network = sums.group_by("period_start", "period_end").agg(
        pl.col("events").sum(), pl.col("person_years").sum()).with_columns(
        pl.lit(NETWORK).alias("site"))
    charts = [_one_chart(network, None, o)]
    if o["site_charts"]:
        centre = None
        if o["u_chart_centre"] == "network":
            centre = float(network["events"].sum()) / float(network["person_years"].sum())
        charts.extend(_one_chart(part, centre, o)
                      for _, part in sorted(sums.partition_by("site", as_dict=True).items()))
    out = pl.concat([c for c in charts if c is not None], how="vertical_relaxed")
    labels = [period_label(d, o["interval"]) for d in out["period_start"].to_list()]
    return out.with_columns(pl.lit(endpoint).alias("endpoint"),
                            pl.Series("period", labels, dtype=pl.String)).select(U_CHART_COLUMNS)


def _one_chart(part: pl.DataFrame, centre: float | None, o: dict) -> pl.DataFrame | None:
    if part.height == 0:
        return None
    site = part["site"][0]
    chart = u_chart(part, period="period_start", events="events", exposure="person_years",
                    centre=centre, sigma=float(o["sigma"]), per=o["per"])
    frame = pl.from_pandas(chart).rename({"period": "period_start", "exposure": "person_years"})
    ends = part.select("period_start", "period_end")
    return frame.join(ends, on="period_start", how="left").with_columns(
        pl.lit(site).alias("site"), pl.col("period_start").cast(pl.Date))


def _outliers(funnel: pl.DataFrame, chart: pl.DataFrame) -> pl.DataFrame:
    f = funnel.filter(pl.col("flag") != "within").select(
        "endpoint", pl.lit("funnel").alias("chart"), "site", pl.lit(None, dtype=pl.String).alias("period"),
        pl.col("events"), "person_years", "estimate",
        pl.when(pl.col("flag").str.ends_with("998")).then(pl.col("lower_998")).otherwise(pl.col("lower_95")).alias("lower"),
        pl.when(pl.col("flag").str.ends_with("998")).then(pl.col("upper_998")).otherwise(pl.col("upper_95")).alias("upper"),
        pl.when(pl.col("flag").str.ends_with("998")).then(pl.lit("99.8%")).otherwise(pl.lit("95%")).alias("limits"),
        "flag", "per")
    u = chart.filter(pl.col("flag") != "within").select(
        "endpoint", pl.lit("u_chart").alias("chart"), "site", "period", "events", "person_years",
        "estimate", "lower", "upper", pl.format("{} sigma", pl.col("sigma").round(2)).alias("limits"),
        "flag", "per")
    return pl.concat([f, u], how="vertical_relaxed").select(OUTLIER_COLUMNS)


def _empty(columns: tuple[str, ...]) -> pl.DataFrame:
    return pl.DataFrame(schema=dict.fromkeys(columns, pl.String))


def _reporting_period(follow: pl.DataFrame, o: dict) -> tuple[dt.date, dt.date]:
    if o["period"] is not None:
        return tuple(o["period"])
    if follow.height == 0:
        raise DataError("site_quality: no person has follow-up time; check the population "
                        "and the endpoints of the spec")
    return (follow["lo"].min() + dt.timedelta(days=1), follow["hi"].max())


def run_site_quality(ctx: AnalysisContext, o: dict) -> dict[str, pl.DataFrame]:
    """Rates per site and period, funnel data, u-charts and the table of sites outside limits."""
    parts: dict[str, list[pl.DataFrame]] = {k: [] for k in ("rates", "funnel", "funnel_curve",
                                                            "u_chart", "outliers")}
    period = tuple(o["period"]) if o["period"] is not None else None
    for endpoint in o["endpoints"]:
        frame = ctx.frames.endpoint_frame(endpoint).with_columns(
            pl.col("site").fill_null(UNKNOWN_SITE))
        follow = calendar_follow_up(frame, period)
        window = _reporting_period(follow, o)
        rates = _site_rates(follow, endpoint, window, o)
        funnel, curve = _funnel(rates, endpoint, o)
        chart = _u_chart(split_periods(follow, o["interval"]), endpoint, o)
        for name, part in (("rates", rates), ("funnel", funnel), ("funnel_curve", curve),
                           ("u_chart", chart), ("outliers", _outliers(funnel, chart) if funnel.height
                                                else _empty(OUTLIER_COLUMNS))):
            parts[name].append(part)
    return {name: _concat(frames) for name, frames in parts.items()}


def _concat(frames: list[pl.DataFrame]) -> pl.DataFrame:
    non_empty = [f for f in frames if f.height]
    return pl.concat(non_empty, how="vertical_relaxed") if non_empty else frames[0]


def _quality_summary(frames: dict[str, pl.DataFrame]) -> list[str]:
    out = []
    funnel = frames.get("funnel")
    if funnel is None or funnel.height == 0:
        return ["no events in the reporting period: no funnel"]
    for (endpoint,), part in funnel.partition_by("endpoint", as_dict=True, maintain_order=True).items():
        beyond = part.filter(pl.col("flag") != "within")
        out.append(f"{endpoint}: {part.height} sites, {beyond.height} beyond the 95% funnel limits "
                   f"({int(part['flag'].str.ends_with('998').sum())} beyond 99.8%)")
    return out


SITE_QUALITY = register_kind(AnalysisKind(
    name="site_quality",
    run=run_site_quality,
    parts={"rates": RATES_COLUMNS, "funnel": FUNNEL_COLUMNS, "funnel_curve": FUNNEL_CURVE_COLUMNS,
           "u_chart": U_CHART_COLUMNS, "outliers": OUTLIER_COLUMNS},
    options=QUALITY_OPTIONS,
    check=_check_quality,
    description="event rates per site and calendar period: funnel plot against the network "
                "rate (Spiegelhalter 2005), u-charts, sites outside the limits",
    summary=_quality_summary,
))


def network_rate(rates: pl.DataFrame, endpoint: str) -> dict[str, Any]:
    """The network row of a ``rates`` part as a dict (for summaries and checks)."""
    row = rates.filter((pl.col("endpoint") == endpoint) & (pl.col("site") == NETWORK))
    return row.row(0, named=True) if row.height else {}


__all__ = ["INTERVAL_MONTHS", "NETWORK", "SITE_QUALITY", "calendar_follow_up", "network_rate",
           "period_label", "run_site_quality", "split_periods"]

