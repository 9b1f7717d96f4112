"""Figures of the report, drawn from the tidy tables (SVG and PNG, byte-identical on re-runs).

Every plot function takes the rows to draw (a polars frame of table text, as read back from
``tables/*.csv`` by :func:`cohort.report.tables.load_csv`) and ``ax=None``, and returns the
axes; figures are :class:`matplotlib.figure.Figure` objects not registered with pyplot, so
nothing global is touched (the Agg canvas renders them). Withheld values (disclosure control)
are NaN and are not drawn; numbers at risk that were withheld print as an en dash.

Style: ``style.toml`` (colour-blind-safe palette of Okabe & Ito 2008, light grid, left and
bottom axes only). Determinism: SVG without date, fixed ``svg.hashsalt``, text kept as text,
ids prefixed with the figure name (several SVGs live in one HTML page); PNG without software
metadata.
"""

from __future__ import annotations

import io
import re
import tomllib
from collections.abc import Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import matplotlib
import numpy as np
import polars as pl
from matplotlib.axes import Axes
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, PercentFormatter

from cohort.report.tables import num, withheld

STYLE_FILE = Path(__file__).resolve().parent / "style.toml"
STYLE: dict[str, Any] = tomllib.loads(STYLE_FILE.read_text(encoding="utf-8"))
PALETTE: list[str] = list(STYLE["palette"]["series"])
_P = STYLE["palette"]
_F = STYLE["figure"]
WITHHELD_TEXT = "\u2013"  # en dash: a number at risk withheld by disclosure control


def rc() -> dict[str, Any]:
    """Matplotlib settings of the Dromos style (used inside :func:`style`)."""
    return {
        "svg.hashsalt": STYLE["svg"]["hashsalt"],
        "svg.fonttype": STYLE["svg"]["fonttype"],
        "font.family": "sans-serif",
        "font.sans-serif": ["DejaVu Sans", "Arial", "Liberation Sans"],
        "font.size": _F["font_size"],
        "axes.titlesize": _F["title_size"],
        "axes.titleweight": "bold",
        "axes.titlelocation": "left",
        "axes.edgecolor": _P["ink"],
        "axes.labelcolor": _P["ink"],
        "axes.spines.top": False,
        "axes.spines.right": False,
        "axes.grid": True,
        "axes.axisbelow": True,
        "grid.color": _P["grid"],
        "grid.linewidth": 0.8,
        "xtick.color": _P["ink"],
        "ytick.color": _P["ink"],
        "legend.frameon": False,
        "lines.linewidth": _F["line_width"],
        "lines.markersize": _F["marker_size"],
        "axes.prop_cycle": matplotlib.cycler(color=PALETTE),
        "savefig.dpi": _F["dpi"],
    }


@contextmanager
def style():
    """Context in which figures get the Dromos style."""
    with matplotlib.rc_context(rc()):
        yield


def new_axes(width: float | None = None, height: float | None = None, bottom_in: float = 0.55,
             left_in: float = 0.8) -> Axes:
    """One axes on a new (pyplot-free) figure with margins given in inches."""
    w = width or _F["width_in"]
    h = height or _F["height_in"]
    fig = Figure(figsize=(w, h))
    fig.subplots_adjust(left=left_in / w, right=1 - 0.25 / w, top=1 - 0.42 / h,
                        bottom=bottom_in / h)
    return fig.add_subplot()


def colour_map(groups: Sequence[str]) -> dict[str, str]:
    """Palette colour of each group, in the order given."""
    return {g: PALETTE[i % len(PALETTE)] for i, g in enumerate(groups)}


def _ordered(values: Sequence[str]) -> list[str]:
    return list(dict.fromkeys(values))


def _legend(ax: Axes, **options: Any) -> None:
    """A legend when anything labelled was drawn (all rows withheld leaves nothing to name)."""
    if ax.get_legend_handles_labels()[0]:
        ax.legend(**options)


def _percent(ax: Axes, axis: str = "y", digits: int | None = None) -> None:
    """Percent tick labels (values already in percent); decimals follow the axis range
    unless ``digits`` is given, so 0.02% steps are not all printed as 0.0%."""
    (ax.yaxis if axis == "y" else ax.xaxis).set_major_formatter(
        PercentFormatter(xmax=100, decimals=digits))


# --------------------------------------------------------------------------- curves


def plot_curves(curves: pl.DataFrame, *, start: float = 0.0, scale: float = 100.0,
                at_risk: pl.DataFrame | None = None, ax: Axes | None = None,
                groups: Sequence[str] | None = None, ylabel: str = "Cumulative incidence",
                xlabel: str = "Years since index", band: bool = True) -> Axes:
    """Step curves per group (columns group, time, estimate, lower, upper), from (0, start).

    ``start`` is 0 for cumulative incidence and 1 for survival; ``scale`` 100 shows percent.
    With ``at_risk`` (group, time, n_at_risk) a numbers-at-risk table is written beneath the
    time axis, one row per group, at the table's times.
    """
    ax = ax or new_axes()
    order = list(groups) if groups is not None else _ordered(curves["group"].to_list())
    colours = colour_map(order)
    for g in order:
        part = curves.filter(pl.col("group") == g)
        t, y = num(part["time"]), num(part["estimate"])
        keep = np.isfinite(t) & np.isfinite(y)
        x = np.concatenate([[0.0], t[keep]])
        yy = np.concatenate([[start], y[keep]]) * scale
        label = g if keep.any() else f"{g} (withheld: too few events)"
        ax.step(x, yy, where="post", color=colours[g], label=label)
        if band and "lower" in part.columns:
            lo, hi = num(part["lower"])[keep], num(part["upper"])[keep]
            ok = np.isfinite(lo) & np.isfinite(hi)
            if ok.any():
                ax.fill_between(np.concatenate([[0.0], t[keep][ok]]),
                                np.concatenate([[start], lo[ok]]) * scale,
                                np.concatenate([[start], hi[ok]]) * scale,
                                step="post", color=colours[g], alpha=_P["band_alpha"], lw=0)
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    if scale == 100.0:
        _percent(ax)
    ax.set_xlim(left=0)
    if start == 0.0:
        ax.set_ylim(bottom=0)
    if len(order) > 1 or order[:1] != [""]:
        _legend(ax, loc="upper left" if start == 0.0 else "lower left", fontsize=_F["font_size"] - 0.5)
    if at_risk is not None and at_risk.height:
        add_numbers_at_risk(ax, at_risk, order, colours)
    return ax


def add_numbers_at_risk(ax: Axes, at_risk: pl.DataFrame, groups: Sequence[str],
                        colours: dict[str, str]) -> Axes:
    """Numbers at risk (group, time, n_at_risk) as rows of text beneath the time axis."""
    times = sorted({float(t) for t in num(at_risk["time"]) if np.isfinite(t)})
    ax.set_xticks([0.0, *times])
    ax.xaxis.set_major_formatter(FuncFormatter(lambda x, _p: f"{x:g}"))
    fig = ax.get_figure()
    axes_h = ax.get_position().height * fig.get_size_inches()[1]
    row = _F["at_risk_row_in"] / axes_h
    first = -(0.50 / axes_h)  # below tick labels and the axis label
    blend = matplotlib.transforms.blended_transform_factory(ax.transData, ax.transAxes)
    ax.text(0.0, first + row * 0.1, "Number at risk", transform=ax.transAxes, ha="right",
            va="bottom", fontsize=_F["font_size"] - 1, color=_P["muted"], clip_on=False)
    for i, g in enumerate(groups):
        part = at_risk.filter(pl.col("group") == g)
        y = first - row * (i + 1)
        ax.text(-0.012, y, g, transform=ax.transAxes, ha="right", va="center",
                color=colours[g], fontsize=_F["font_size"] - 1, clip_on=False)
        hidden = withheld(part["n_at_risk"])
        for t, n, w in zip(num(part["time"]), part["n_at_risk"].to_list(), hidden, strict=True):
            if np.isfinite(t):
                ax.text(t, y, WITHHELD_TEXT if w else n, transform=blend, ha="center",
                        va="center", fontsize=_F["font_size"] - 1, color=_P["ink"], clip_on=False)
    return ax


def at_risk_height(n_groups: int) -> float:
    """Extra figure height (inches) for a numbers-at-risk table of ``n_groups`` rows."""
    return 0.35 + _F["at_risk_row_in"] * (n_groups + 1)


# --------------------------------------------------------------------------- prevalence


def plot_prevalence_by_age_sex(data: pl.DataFrame, ax: Axes | None = None,
                               title: str | None = None) -> Axes:
    """Prevalence (%) by age band, one series per sex, with interval bars.

    Columns age_band, sex, estimate, lower, upper (proportions).
    """
    ax = ax or new_axes()
    bands = _ordered(data["age_band"].to_list())
    sexes = _ordered(data["sex"].to_list())
    colours = colour_map(sexes)
    width = 0.8 / max(len(sexes), 1)
    for j, s in enumerate(sexes):
        part = data.filter(pl.col("sex") == s)
        x = np.array([bands.index(b) for b in part["age_band"].to_list()], dtype=float)
        x = x - 0.4 + width * (j + 0.5)
        est, lo, hi = (num(part[c]) * 100 for c in ("estimate", "lower", "upper"))
        ok = np.isfinite(est)
        err = np.vstack([est - lo, hi - est])[:, ok]
        ax.errorbar(x[ok], est[ok], yerr=np.where(np.isfinite(err), err, 0), fmt="o",
                    color=colours[s], ecolor=colours[s], elinewidth=1.1, capsize=2.5,
                    label=_sex_label(s))
        if (~ok).any():
            ax.plot(x[~ok], np.zeros((~ok).sum()), linestyle="none", marker="x",
                    color=_P["muted"], markersize=4)
    ax.set_xticks(range(len(bands)), bands)
    ax.set_xlabel("Age band at index (years)")
    ax.set_ylabel("Prevalence")
    _percent(ax)
    ax.set_ylim(bottom=0)
    _legend(ax, loc="upper left")
    if title:
        ax.set_title(title)
    return ax


def _sex_label(code: str) -> str:
    from cohort.vocabulary import SEXES

    return SEXES.get(code, code)


def plot_crude_vs_standardized(data: pl.DataFrame, ax: Axes | None = None) -> Axes:
    """Crude and age-standardized prevalence (%) per category, with intervals.

    Columns label (category), measure ("crude" or a standard population), estimate, lower,
    upper (proportions). One row of points per category, one colour per measure.
    """
    ax = ax or new_axes()
    labels = _ordered(data["label"].to_list())
    measures = _ordered(data["measure"].to_list())
    colours = colour_map(measures)
    step = 0.7 / max(len(measures), 1)
    for j, mname in enumerate(measures):
        part = data.filter(pl.col("measure") == mname)
        y = np.array([labels.index(v) for v in part["label"].to_list()], dtype=float)
        y = y - 0.35 + step * (j + 0.5)
        est, lo, hi = (num(part[c]) * 100 for c in ("estimate", "lower", "upper"))
        ok = np.isfinite(est)
        err = np.vstack([est - lo, hi - est])[:, ok]
        ax.errorbar(est[ok], y[ok], xerr=np.where(np.isfinite(err), err, 0), fmt="o",
                    color=colours[mname], elinewidth=1.1, capsize=2.5, label=mname)
    ax.set_yticks(range(len(labels)), labels)
    ax.invert_yaxis()
    ax.set_xlabel("Prevalence")
    _percent(ax, "x")
    ax.set_xlim(left=0)
    _legend(ax, loc="lower right", fontsize=_F["font_size"] - 0.5)
    return ax


# --------------------------------------------------------------------------- regression


def _plain_log_labels(axis) -> None:
    """Log-axis ticks as plain numbers (0.5, 2, 3), not powers of ten."""
    plain = FuncFormatter(lambda v, _p: f"{v:g}")
    axis.set_major_formatter(plain)
    axis.set_minor_formatter(plain)


def plot_hr_curve(data: pl.DataFrame, ax: Axes | None = None, xlabel: str = "PR interval (ms)") -> Axes:
    """Hazard ratio against PR (spline) with its pointwise band, log scale, HR 1 at the reference.

    Columns pr_ms, hr, lower, upper, reference_ms.
    """
    ax = ax or new_axes()
    x, hr, lo, hi = (num(data[c]) for c in ("pr_ms", "hr", "lower", "upper"))
    ok = np.isfinite(x) & np.isfinite(hr) & (hr > 0)
    ax.plot(x[ok], hr[ok], color=PALETTE[0])
    band = ok & np.isfinite(lo) & np.isfinite(hi) & (lo > 0)
    ax.fill_between(x[band], lo[band], hi[band], color=PALETTE[0], alpha=_P["band_alpha"], lw=0)
    ax.axhline(1.0, color=_P["muted"], lw=0.9, ls="--")
    ref = num(data["reference_ms"])
    if np.isfinite(ref).any():
        r = float(ref[np.isfinite(ref)][0])
        ax.axvline(r, color=_P["muted"], lw=0.9, ls=":")
        ax.annotate(f"reference {r:g} ms", (r, 1.0), xytext=(4, -12), textcoords="offset points",
                    color=_P["muted"], fontsize=_F["font_size"] - 1)
    ax.set_yscale("log")
    _plain_log_labels(ax.yaxis)
    ax.set_xlabel(xlabel)
    ax.set_ylabel("Hazard ratio (log scale)")
    return ax


def plot_forest(data: pl.DataFrame, ax: Axes | None = None, xlabel: str = "Hazard ratio",
                log: bool = True, value: str = "estimate") -> Axes:
    """Forest plot: one row per term (label, ``value``, lower, upper), optional ``group`` colour.

    Rows without an estimate (withheld or not estimable) are listed with "not shown".
    """
    ax = ax or new_axes(height=0.5 + 0.28 * max(data.height, 2), left_in=2.4)
    labels = data["label"].to_list()
    groups = data["group"].to_list() if "group" in data.columns else [""] * data.height
    colours = colour_map(_ordered(groups))
    est, lo, hi = (num(data[c]) for c in (value, "lower", "upper"))
    y = np.arange(data.height, dtype=float)
    for g in _ordered(groups):
        idx = np.array([i for i, gg in enumerate(groups) if gg == g])
        ok = idx[np.isfinite(est[idx]) & (est[idx] > 0 if log else True)]
        if ok.size:
            err = np.vstack([est[ok] - lo[ok], hi[ok] - est[ok]])
            ax.errorbar(est[ok], y[ok], xerr=np.where(np.isfinite(err), err, 0), fmt="s",
                        color=colours[g], elinewidth=1.2, capsize=2.5, label=g or None)
    for i in np.flatnonzero(~np.isfinite(est)):
        ax.annotate("not shown", (0.0, y[i]), xycoords=("axes fraction", "data"), xytext=(3, 0),
                    textcoords="offset points", va="center", fontsize=_F["font_size"] - 1,
                    color=_P["muted"])
    ax.axvline(1.0, color=_P["muted"], lw=0.9, ls="--")
    ax.set_yticks(y, labels)
    ax.set_ylim(data.height - 0.5, -0.5)
    if log:
        ax.set_xscale("log")
        _plain_log_labels(ax.xaxis)
    ax.set_xlabel(xlabel + (" (log scale)" if log else ""))
    ax.grid(axis="y", visible=False)
    _legend(ax, loc="lower right", fontsize=_F["font_size"] - 0.5)
    return ax


# --------------------------------------------------------------------------- multi-state


def plot_state_occupation(data: pl.DataFrame, ax: Axes | None = None,
                          states: Sequence[str] | None = None) -> Axes:
    """Probability (%) of being in each state over time (columns state, time, estimate).

    Drawn as one step line per state from its value at time 0 (1 for the first state, else 0).
    """
    ax = ax or new_axes()
    order = list(states) if states is not None else _ordered(data["state"].to_list())
    colours = colour_map(order)
    for i, s in enumerate(order):
        part = data.filter(pl.col("state") == s)
        t, y = num(part["time"]), num(part["estimate"])
        ok = np.isfinite(t) & np.isfinite(y)
        x = np.concatenate([[0.0], t[ok]])
        yy = np.concatenate([[1.0 if i == 0 else 0.0], y[ok]]) * 100
        ax.step(x, yy, where="post", color=colours[s], label=s.replace("_", " "))
    ax.set_xlabel("Years since index")
    ax.set_ylabel("Probability of being in the state")
    _percent(ax)
    ax.set_xlim(left=0)
    ax.set_ylim(0, 100)
    _legend(ax, loc="center right", fontsize=_F["font_size"] - 0.5)
    return ax


# --------------------------------------------------------------------------- quality


def plot_funnel(units: pl.DataFrame, curve: pl.DataFrame, ax: Axes | None = None,
                ylabel: str = "Rate per 1,000 person-years") -> Axes:
    """Funnel plot (Spiegelhalter 2005): sites by person-years with 95% and 99.8% limits.

    ``units``: site, person_years, estimate, target, flag; ``curve``: person_years, coverage,
    lower, upper. Sites beyond the limits are drawn in the flag colour and labelled.
    """
    ax = ax or new_axes()
    for coverage, colour, ls in (("0.95", _P["limit_inner"], "--"), ("0.998", _P["limit_outer"], "-")):
        part = curve.filter(pl.col("coverage") == coverage)
        x = num(part["person_years"])
        label = f"{float(coverage) * 100:g}% limits"
        ax.plot(x, num(part["upper"]), color=colour, ls=ls, lw=1.0, label=label)
        ax.plot(x, num(part["lower"]), color=colour, ls=ls, lw=1.0)
    target = num(units["target"])
    if np.isfinite(target).any():
        ax.axhline(float(target[np.isfinite(target)][0]), color=_P["muted"], lw=1.0,
                   label="network rate")
    x, y = num(units["person_years"]), num(units["estimate"])
    flags = units["flag"].to_list()
    out = np.array([f not in ("within", "") for f in flags])
    ok = np.isfinite(x) & np.isfinite(y)
    ax.plot(x[ok & ~out], y[ok & ~out], "o", color=PALETTE[0], label="site")
    if (ok & out).any():
        ax.plot(x[ok & out], y[ok & out], "o", color=_P["flag"], label="site beyond limits")
    for i in np.flatnonzero(ok & out):
        ax.annotate(units["site"][int(i)], (x[i], y[i]), xytext=(4, 4), textcoords="offset points",
                    fontsize=_F["font_size"] - 1.5, color=_P["flag"])
    ax.set_xlabel("Person-years at risk in the reporting period")
    ax.set_ylabel(ylabel)
    ax.set_ylim(bottom=0)
    _legend(ax, loc="upper right", fontsize=_F["font_size"] - 1)
    return ax


def plot_u_chart(data: pl.DataFrame, ax: Axes | None = None,
                 ylabel: str = "Rate per 1,000 person-years") -> Axes:
    """u-chart: rate per period with the centre line and stepped control limits.

    Columns period, estimate, centre, lower, upper, flag.
    """
    ax = ax or new_axes()
    periods = data["period"].to_list()
    x = np.arange(len(periods), dtype=float)
    est, centre, lo, hi = (num(data[c]) for c in ("estimate", "centre", "lower", "upper"))
    ax.step(x, hi, where="mid", color=_P["limit_inner"], lw=1.0, ls="--", label="control limits")
    ax.step(x, lo, where="mid", color=_P["limit_inner"], lw=1.0, ls="--")
    ax.plot(x, centre, color=_P["muted"], lw=1.0, label="centre line")
    ok = np.isfinite(est)
    ax.plot(x[ok], est[ok], "-o", color=PALETTE[0], lw=1.0, markersize=3, label="period rate")
    out = np.array([f in ("above", "below") for f in data["flag"].to_list()]) & ok
    if out.any():
        ax.plot(x[out], est[out], "o", color=_P["flag"], markersize=5, label="outside limits")
    step = max(1, len(periods) // 10)
    ax.set_xticks(x[::step], periods[::step], rotation=0)
    ax.set_xlabel("Calendar period")
    ax.set_ylabel(ylabel)
    ax.set_ylim(bottom=0)
    _legend(ax, loc="upper left", ncols=4, fontsize=_F["font_size"] - 1)
    return ax


# --------------------------------------------------------------------------- saving

_ID = re.compile(r'id="([^"]+)"')


def svg_text(fig: Figure, prefix: str) -> str:
    """The figure as SVG text without date, with every id prefixed (unique in one page)."""
    buffer = io.StringIO()
    fig.savefig(buffer, format="svg", metadata={"Date": None, "Creator": "Dromos"})
    text = buffer.getvalue()
    ids = sorted(set(_ID.findall(text)), key=len, reverse=True)
    safe = re.sub(r"[^A-Za-z0-9_-]", "-", prefix)
    for old in ids:
        new = f"{safe}-{old}"
        text = (text.replace(f'id="{old}"', f'id="{new}"').replace(f"#{old})", f"#{new})")
                .replace(f'href="#{old}"', f'href="#{new}"'))
    return text


def png_bytes(fig: Figure) -> bytes:
    """The figure as PNG (Agg) without software metadata."""
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", metadata={"Software": None})
    return buffer.getvalue()


def save(fig: Figure, folder: Path, name: str) -> tuple[Path, Path, str]:
    """Write ``name``.svg and ``name``.png into ``folder``; returns their paths and the SVG text."""
    folder.mkdir(parents=True, exist_ok=True)
    with style():
        text = svg_text(fig, name)
        png = png_bytes(fig)
    svg_path, png_path = folder / f"{name}.svg", folder / f"{name}.png"
    svg_path.write_text(text, encoding="utf-8")
    png_path.write_bytes(png)
    return svg_path, png_path, text


def finite(values: Any) -> bool:
    """True when any value is a finite number (a figure has something to draw)."""
    arr = num(values) if not isinstance(values, np.ndarray) else values
    return bool(np.isfinite(arr).any())


__all__ = ["PALETTE", "STYLE", "add_numbers_at_risk", "at_risk_height", "colour_map", "finite",
           "new_axes", "plot_crude_vs_standardized", "plot_curves", "plot_forest",
           "plot_funnel", "plot_hr_curve", "plot_prevalence_by_age_sex", "plot_state_occupation",
           "plot_u_chart", "png_bytes", "rc", "save", "style", "svg_text"]
