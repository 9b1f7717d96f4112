"""Which figures a run gets, drawn from which rows of which tables.

For each analysis of the spec, :func:`plan_figures` picks the rows to draw from the tables
read back from ``tables/*.csv`` (text, after disclosure control) and returns
:class:`FigureSpec` objects: name, title, a "how to read this" sentence, the data layers
(each the table's own rows, with the table file it comes from) and the drawing function.
:func:`render` draws one into SVG and PNG and writes the exact plotted rows to
``figures/<name>.data.csv`` (a ``layer`` and a ``source`` column, then the table's columns
as text; added plotting columns such as ``label`` are named in ``FigureSpec.added``).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import polars as pl
from matplotlib.figure import Figure

from cohort.report import figures as F
from cohort.report.tables import to_csv_text
from cohort.vocabulary import AV_CATEGORIES, RHYTHM_CLASSES, VENTRICULAR_CONDUCTION

CONTENT = F.STYLE["content"]
AXIS_LABELS = {"av": AV_CATEGORIES, "ventricular": VENTRICULAR_CONDUCTION, "rhythm": RHYTHM_CLASSES}
STANDARD_LABELS = {"who_2000_2025": "WHO 2000-2025", "european_2013": "European 2013",
                   "us_2000": "US 2000"}
MAIN = "main"


@dataclass
class FigureSpec:
    """One figure: what it shows, how to read it, and the table rows it is drawn from."""

    name: str
    analysis: str
    title: str
    how_to_read: str
    layers: dict[str, tuple[str, pl.DataFrame]]  # layer -> (source table file, rows)
    draw: Callable[[dict[str, pl.DataFrame]], Figure]
    added: tuple[str, ...] = ()
    note: str = ""


@dataclass
class RenderedFigure:
    """A drawn figure: files written and the SVG text for the page."""

    spec: FigureSpec
    svg_path: Path
    png_path: Path
    data_path: Path
    svg: str
    files: list[Path] = field(default_factory=list)


Tables = dict[str, pl.DataFrame]  # table file stem -> rows as text


def _main(frame: pl.DataFrame) -> pl.DataFrame:
    return frame.filter(pl.col("variant") == MAIN) if "variant" in frame.columns else frame


def _label(axis: str, code: str) -> str:
    return AXIS_LABELS.get(axis, {}).get(code, code.replace("_", " "))


# --------------------------------------------------------------------------- prevalence


def _prevalence(name: str, tables: Tables) -> list[FigureSpec]:
    est = tables.get(name)
    if est is None or est.height == 0:
        return []
    if est["basis"][0] != "index":
        return []
    out = []
    method = _method(est)
    for axis in _ordered(est["axis"].to_list()):
        cats = [c for c in CONTENT.get(axis, []) if c in set(est.filter(pl.col("axis") == axis)["category"].to_list())]
        rows = _main(est).filter((pl.col("axis") == axis) & pl.col("category").is_in(cats)
                                 & (pl.col("stratum") == "age_band_sex") & (pl.col("method") == method)
                                 & pl.col("sex").is_in(CONTENT["prevalence_sexes"]))
        if rows.height == 0 or not F.finite(rows["estimate"]):
            continue
        out.append(FigureSpec(
            name=f"{name}_{axis}_age_sex", analysis=name,
            title=f"Prevalence by age band and sex: {', '.join(_label(axis, c) for c in cats)}",
            how_to_read=("Each point is the share of persons of one sex and age band who had the "
                         "category on their index ECG; bars are " + _method_words(method) +
                         " 95% intervals; a grey cross on the axis marks a value withheld by disclosure "
                         "control. Persons of unrecorded sex are in the tables only."),
            layers={"estimates": (f"{name}.csv", rows)},
            draw=lambda layers, axis=axis, cats=cats: _draw_prevalence_panels(layers["estimates"], axis, cats)))
    std = tables.get(f"{name}_standardized")
    if std is not None and std.height:
        out.extend(_crude_vs_standardized(name, est, std, method))
    return out


def _method(est: pl.DataFrame) -> str:
    methods = _ordered(est["method"].to_list())
    return CONTENT["prevalence_method"] if CONTENT["prevalence_method"] in methods else methods[0]


def _method_words(method: str) -> str:
    return {"wilson": "Wilson score", "clopper_pearson": "Clopper-Pearson exact"}.get(method, method)


def _ordered(values: list) -> list:
    return list(dict.fromkeys(values))


def _draw_prevalence_panels(rows: pl.DataFrame, axis: str, cats: list[str]) -> Figure:
    n = len(cats)
    cols = min(n, 2)
    nrows = (n + cols - 1) // cols
    with F.style():
        fig = Figure(figsize=(7.0, 2.7 * nrows + 0.4))
        fig.subplots_adjust(left=0.11, right=0.98, top=1 - 0.45 / (2.7 * nrows + 0.4),
                            bottom=0.55 / (2.7 * nrows + 0.4), hspace=0.55, wspace=0.3)
        for i, c in enumerate(cats):
            ax = fig.add_subplot(nrows, cols, i + 1)
            part = rows.filter(pl.col("category") == c)
            F.plot_prevalence_by_age_sex(part, ax=ax, title=_label(axis, c))
            if i > 0:
                ax.get_legend().remove()
            if i < n - cols:
                ax.set_xlabel("")
    return fig


def _crude_vs_standardized(name: str, est: pl.DataFrame, std: pl.DataFrame, method: str) -> list[FigureSpec]:
    out = []
    for axis in _ordered(std["axis"].to_list()):
        cats = [c for c in CONTENT.get(axis, []) if c in set(std.filter(pl.col("axis") == axis)["category"].to_list())]
        crude = _main(est).filter((pl.col("axis") == axis) & pl.col("category").is_in(cats)
                                  & (pl.col("stratum") == "overall") & (pl.col("method") == method))
        adj = _main(std).filter((pl.col("axis") == axis) & pl.col("category").is_in(cats)
                                & (pl.col("sex") == "all"))
        if adj.height == 0 or not F.finite(adj["estimate"]):
            continue
        crude = crude.with_columns(pl.col("category").replace_strict(
            {c: _label(axis, c) for c in cats}).alias("label"), pl.lit("crude").alias("measure"))
        adj = adj.with_columns(pl.col("category").replace_strict(
            {c: _label(axis, c) for c in cats}).alias("label"),
            pl.col("standard").replace_strict(STANDARD_LABELS, default=pl.col("standard")).alias("measure"))
        n_cats = len(cats)
        out.append(FigureSpec(
            name=f"{name}_{axis}_crude_vs_standardized", analysis=name,
            title=f"Crude and age-standardized prevalence ({axis} categories)",
            how_to_read=("For each category the crude share (all ages pooled as observed) is "
                         "shown beside the prevalence standardized to each standard "
                         "population's age structure (Fay-Feuer 95% intervals); a gap between "
                         "them means the cohort's ages differ from the standard's."),
            layers={"crude": (f"{name}.csv", crude), "standardized": (f"{name}_standardized.csv", adj)},
            draw=lambda layers, n_cats=n_cats: _one(
                F.plot_crude_vs_standardized,
                pl.concat([layers["crude"].select(_CVS), layers["standardized"].select(_CVS)]),
                height=0.9 + 0.55 * n_cats, left_in=2.6),
            added=("label", "measure")))
    return out


_CVS = ["label", "measure", "estimate", "lower", "upper"]


def _one(fn: Callable, data: pl.DataFrame, height: float | None = None, left_in: float = 0.8,
         bottom_in: float = 0.55, **kw) -> Figure:
    with F.style():
        ax = F.new_axes(height=height, left_in=left_in, bottom_in=bottom_in)
        fn(data, ax=ax, **kw)
    return ax.get_figure()


# --------------------------------------------------------------------------- incidence


def _incidence(name: str, tables: Tables) -> list[FigureSpec]:
    rr = tables.get(f"{name}_rate_ratios")
    if rr is None or rr.height == 0:
        return []
    rows = rr.with_columns(pl.format("{}: {} vs {}", pl.col("endpoint").str.replace_all("_", " "),
                                     pl.col("term"), pl.col("reference")).alias("label"),
                           pl.col("variant").alias("group"))
    if not F.finite(rows["estimate"]):
        return []
    return [FigureSpec(
        name=f"{name}_rate_ratios", analysis=name, title="Incidence rate ratios",
        how_to_read=("Each square is the ratio of the incidence rate in a group to the rate in "
                     "its reference group, with exact 95% limits, on a log scale; 1 (dashed) "
                     "means equal rates. Colours are the main analysis and its sensitivity "
                     "variants."),
        layers={"rate_ratios": (f"{name}_rate_ratios.csv", rows)},
        draw=lambda layers: _forest(layers["rate_ratios"], "Rate ratio"),
        added=("label", "group"))]


def _forest(rows: pl.DataFrame, xlabel: str, value: str = "estimate") -> Figure:
    with F.style():
        ax = F.new_axes(height=0.9 + 0.24 * max(rows.height, 2), left_in=2.9)
        F.plot_forest(rows, ax=ax, xlabel=xlabel, value=value)
    return ax.get_figure()


# --------------------------------------------------------------------------- survival


def _curves(name: str, tables: Tables, kind: str) -> list[FigureSpec]:
    curve = tables.get(name)
    if curve is None or curve.height == 0:
        return []
    main = _main(curve)
    endpoint = main["endpoint"][0] if main.height else ""
    term = endpoint if kind == "cumulative_incidence" else "survival"
    rows = main.filter(pl.col("term") == term)
    if rows.height == 0:
        rows = main.filter(pl.col("term") == main["term"][0]) if main.height else main
    at_risk = tables.get(f"{name}_at_risk")
    layers = {"curve": (f"{name}.csv", rows)}
    if at_risk is not None and at_risk.height:
        layers["at_risk"] = (f"{name}_at_risk.csv", _main(at_risk))
    groups = _ordered(rows["group"].to_list())
    start = 1.0 if kind == "kaplan_meier" else 0.0
    what = endpoint.replace("_", " ")
    if kind == "kaplan_meier":
        title = f"Kaplan-Meier: free of {what} by {rows['group_by'][0] if rows.height else 'group'}"
        read = ("Each step line is the share of persons still free of the event over time, "
                "with its 95% band (Greenwood variance, log-log scale). Competing deaths are "
                "treated as censored here, so 1 minus this curve overstates the risk: use the "
                "cumulative incidence figure for risk.")
        ylabel = "Event-free"
    else:
        title = f"Cumulative incidence of {what} by {rows['group_by'][0] if rows.height else 'group'}"
        read = ("Each step line is the probability of having had the event by each time, death "
                "counted as a competing event (Aalen-Johansen), with its 95% band. The numbers "
                "beneath give the persons still at risk at each time.")
        ylabel = "Cumulative incidence"
    note = ("Drawn through the published points only: a point is published where at least "
            "the disclosure threshold of events has accumulated since the previous one.")
    return [FigureSpec(
        name=f"{name}_curves", analysis=name, title=title, how_to_read=read, layers=layers,
        draw=lambda layers: _draw_curves(layers, groups, start, ylabel), note=note)]


def _draw_curves(layers: dict[str, pl.DataFrame], groups: list[str], start: float, ylabel: str) -> Figure:
    at_risk = layers.get("at_risk")
    extra = F.at_risk_height(len(groups)) if at_risk is not None else 0.0
    with F.style():
        ax = F.new_axes(height=3.6 + extra, bottom_in=0.55 + extra, left_in=1.1)
        F.plot_curves(layers["curve"], start=start, at_risk=at_risk, ax=ax, groups=groups,
                      ylabel=ylabel)
    return ax.get_figure()


def _regression(name: str, tables: Tables) -> list[FigureSpec]:
    out = []
    coef = tables.get(name)
    if coef is not None and coef.height and F.finite(coef["hr"]):
        rows = coef.with_columns(pl.format("{} ({})", pl.col("term"), pl.col("unit")).alias("label"),
                                 pl.col("variant").alias("group"))
        out.append(FigureSpec(
            name=f"{name}_forest", analysis=name, title="Hazard ratios",
            how_to_read=("Each square is a hazard ratio with its 95% interval on a log scale; "
                         "1 (dashed) means no association. Colours are the main analysis and "
                         "its sensitivity variants; terms marked 'not shown' have no estimate "
                         "(no events on one side, or withheld)."),
            layers={"coefficients": (f"{name}.csv", rows)},
            draw=lambda layers: _forest(layers["coefficients"], "Hazard ratio", value="hr"),
            added=("label", "group")))
    curve = tables.get(f"{name}_hr_curve")
    if curve is not None and curve.height and F.finite(curve["hr"]):
        rows = _main(curve)
        out.append(FigureSpec(
            name=f"{name}_hr_curve", analysis=name, title="Hazard ratio across the PR interval",
            how_to_read=("The line is the hazard ratio at each PR value against the reference PR "
                         "(dotted), from a restricted cubic spline, with its pointwise 95% band; "
                         "wide bands at the ends reflect few persons there."),
            layers={"hr_curve": (f"{name}_hr_curve.csv", rows)},
            draw=lambda layers: _one(F.plot_hr_curve, layers["hr_curve"])))
    return out


def _multistate(name: str, tables: Tables) -> list[FigureSpec]:
    occ = tables.get(name)
    if occ is None or occ.height == 0 or not F.finite(occ["estimate"]):
        return []
    rows = _main(occ)
    return [FigureSpec(
        name=f"{name}_occupation", analysis=name, title="Where persons are over time (state occupation)",
        how_to_read=("Each line is the probability of being in a state at each time since index "
                     "(Aalen-Johansen for the multi-state model); at every time the states sum "
                     "to 100%."),
        layers={"occupation": (f"{name}.csv", rows)},
        draw=lambda layers: _one(F.plot_state_occupation, layers["occupation"]))]


def _interval(name: str, tables: Tables) -> list[FigureSpec]:
    est = tables.get(name)
    if est is None or est.height == 0:
        return []
    main = _main(est)
    turnbull = main.filter(pl.col("method") == "turnbull")
    if turnbull.height == 0:
        return []
    group = turnbull["group"][0]
    rows = main.filter(pl.col("group") == group).with_columns(pl.col("method").alias("series"))
    methods = _ordered(rows["method"].to_list())
    return [FigureSpec(
        name=f"{name}_methods", analysis=name, title=f"Risk of the endpoint, three estimators ({group})",
        how_to_read=("The Turnbull estimate uses only what ECGs show (onset somewhere between the "
                     "last ECG without and the first with the block); Kaplan-Meier and "
                     "Aalen-Johansen date onset at the first ECG showing it."),
        layers={"estimates": (f"{name}.csv", rows)},
        draw=lambda layers: _draw_methods(layers["estimates"], methods),
        added=("series",))]


def _draw_methods(rows: pl.DataFrame, methods: list[str]) -> Figure:
    with F.style():
        ax = F.new_axes()
        F.plot_curves(rows.with_columns(pl.col("series").alias("group")), ax=ax, groups=methods,
                      ylabel="Risk", band=False)
    return ax.get_figure()


# --------------------------------------------------------------------------- site quality


def _site_quality(name: str, tables: Tables) -> list[FigureSpec]:
    from cohort.study.quality_kinds import NETWORK

    out = []
    funnel, curve = tables.get(f"{name}_funnel"), tables.get(f"{name}_funnel_curve")
    chart = tables.get(f"{name}_u_chart")
    rates = tables.get(name)
    per = rates["per"][0] if rates is not None and rates.height else "1000"
    ylabel = f"Rate per {float(per):,.0f} person-years"
    for endpoint in _ordered(_main(funnel)["endpoint"].to_list()) if funnel is not None else []:
        units = _main(funnel).filter(pl.col("endpoint") == endpoint)
        contour = _main(curve).filter(pl.col("endpoint") == endpoint) if curve is not None else curve
        what = endpoint.replace("_", " ")
        out.append(FigureSpec(
            name=f"{name}_{endpoint}_funnel", analysis=name, title=f"Funnel plot: {what} rate by site",
            how_to_read=("Each point is a site: its rate (vertical) against its person-years "
                         "(horizontal). The funnel lines are the 95% and 99.8% limits around the "
                         "network rate: a site outside the outer funnel differs more than chance "
                         "would make likely. Withheld rates (small counts) are not drawn."),
            layers={"funnel": (f"{name}_funnel.csv", units), "funnel_curve": (f"{name}_funnel_curve.csv", contour)},
            draw=lambda layers, ylabel=ylabel: _one(
                lambda d, ax: F.plot_funnel(d, layers["funnel_curve"], ax=ax, ylabel=ylabel),
                layers["funnel"])))
    if chart is None:
        return out
    for endpoint in _ordered(_main(chart)["endpoint"].to_list()):
        net = _main(chart).filter((pl.col("endpoint") == endpoint) & (pl.col("site") == NETWORK))
        what = endpoint.replace("_", " ")
        if net.height:
            out.append(FigureSpec(
                name=f"{name}_{endpoint}_u_chart", analysis=name,
                title=f"u-chart: {what} rate per period, all sites",
                how_to_read=("Each point is the network's rate in one calendar period; the "
                             "dashed steps are the control limits (centre +/- 3 standard errors, "
                             "wider when a period has less person-time). Points outside them "
                             "signal a change worth a look, not a verdict."),
                layers={"u_chart": (f"{name}_u_chart.csv", net)},
                draw=lambda layers, ylabel=ylabel: _one(F.plot_u_chart, layers["u_chart"], ylabel=ylabel)))
        sites = _main(chart).filter((pl.col("endpoint") == endpoint) & (pl.col("site") != NETWORK))
        if sites.height:
            out.append(FigureSpec(
                name=f"{name}_{endpoint}_u_chart_sites", analysis=name,
                title=f"u-charts per site: {what}",
                how_to_read=("One small chart per site, each with its own centre line and limits; "
                             "read them for changes within a site over time, and the funnel plot "
                             "for differences between sites."),
                layers={"u_chart": (f"{name}_u_chart.csv", sites)},
                draw=lambda layers: _draw_site_charts(layers["u_chart"])))
    return out


def _draw_site_charts(rows: pl.DataFrame) -> Figure:
    sites = _ordered(rows["site"].to_list())
    cols = 2
    nrows = (len(sites) + 1) // cols
    height = 1.9 * nrows + 0.5
    with F.style():
        fig = Figure(figsize=(7.0, height))
        fig.subplots_adjust(left=0.08, right=0.98, top=1 - 0.35 / height, bottom=0.4 / height,
                            hspace=0.75, wspace=0.18)
        for i, site in enumerate(sites):
            ax = fig.add_subplot(nrows, cols, i + 1)
            F.plot_u_chart(rows.filter(pl.col("site") == site), ax=ax, ylabel="")
            ax.set_title(site, fontsize=F.STYLE["figure"]["font_size"])
            ax.get_legend().remove()
            ax.set_xlabel("")
            labels = [t.get_text() for t in ax.get_xticklabels()]
            ax.set_xticks(ax.get_xticks()[::3], labels[::3])
    return fig


# --------------------------------------------------------------------------- dispatch

PLANNERS: dict[str, Callable[[str, Tables], list[FigureSpec]]] = {
    "prevalence": _prevalence,
    "incidence": _incidence,
    "cumulative_incidence": lambda n, t: _curves(n, t, "cumulative_incidence"),
    "kaplan_meier": lambda n, t: _curves(n, t, "kaplan_meier"),
    "cox": _regression,
    "fine_gray": _regression,
    "time_updated_cox": _regression,
    "multistate": _multistate,
    "interval_censored": _interval,
    "site_quality": _site_quality,
}


def plan_figures(analyses: list[tuple[str, str]], tables: Tables) -> list[FigureSpec]:
    """Figures of every analysis (name, kind), in spec order."""
    out = []
    for name, kind in analyses:
        planner = PLANNERS.get(kind)
        if planner is not None:
            out.extend(planner(name, tables))
    return out


def render(spec: FigureSpec, folder: Path) -> RenderedFigure:
    """Draw a figure into ``folder`` (SVG, PNG) and write its plotted rows as a data CSV."""
    data = {layer: rows for layer, (_source, rows) in spec.layers.items()}
    fig = spec.draw(data)
    svg_path, png_path, svg = F.save(fig, folder, spec.name)
    data_path = folder / f"{spec.name}.data.csv"
    data_path.write_text(to_csv_text(data_frame(spec)), encoding="utf-8")
    return RenderedFigure(spec, svg_path, png_path, data_path, svg, [svg_path, png_path, data_path])


def data_frame(spec: FigureSpec) -> pl.DataFrame:
    """All layers of a figure in one text frame: layer, source, then the union of columns."""
    frames = []
    for layer, (source, rows) in spec.layers.items():
        frames.append(rows.with_columns(pl.lit(layer).alias("layer"), pl.lit(source).alias("source")))
    columns = ["layer", "source"]
    for f in frames:
        columns.extend(c for c in f.columns if c not in columns)
    shaped = [f.with_columns([pl.lit("").alias(c) for c in columns if c not in f.columns]).select(columns)
              for f in frames]
    return pl.concat(shaped) if shaped else pl.DataFrame()


__all__ = ["FigureSpec", "RenderedFigure", "data_frame", "plan_figures", "render"]
