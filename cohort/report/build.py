"""Turn a run folder into a report: disclosure control, figures, report.html, manifest.json.

:func:`write_report` runs after :func:`cohort.study.run_spec` has written the tidy tables:

1. disclosure control rewrites ``tables/*.csv``, ``attrition.csv`` and ``exposure.csv`` in
   place (or, when switched off, records that it was off);
2. every figure is planned from the tables as written (so a figure never shows a withheld
   value) and drawn to ``figures/<name>.svg`` and ``.png``, with the plotted rows in
   ``figures/<name>.data.csv``;
3. ``report.html`` is written: one self-contained page;
4. ``manifest.json`` is written last, hashing every other file of the folder.

Everything but the ``volatile`` part of the manifest is byte-identical across re-runs of the
same spec on the same registry.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import polars as pl

from cohort.report import disclosure as D
from cohort.report.html import Page, Section, TableView, render_page, rule_rows
from cohort.report.manifest import MANIFEST_FILE, write_manifest
from cohort.report.methods import methods_sections
from cohort.report.plan import RenderedFigure, plan_figures, render
from cohort.report.tables import load_csv
from cohort.study.analyses import ANALYSIS_KINDS
from cohort.study.run import RunResult, table_file
from cohort.study.spec import Spec

REPORT_FILE = "report.html"
FIGURES_DIR = "figures"


@dataclass
class ReportResult:
    """Files a report pass wrote and the disclosure summary."""

    report: Path
    manifest: Path
    figures: list[RenderedFigure]
    disclosure: D.DisclosureLog


def write_report(result: RunResult, *, con, disclosure: bool = True,
                 threshold: int = D.DEFAULT_THRESHOLD) -> ReportResult:
    """Protect the tables of a run, draw its figures, write report.html and manifest.json.

    ``con`` is a connection to the registry the run read (its load log goes into the
    manifest). ``disclosure=False`` leaves exact small counts in place: the report then says
    so on its first screen and in its methods.
    """
    out, spec = result.out_dir, result.spec
    log = (D.apply_disclosure(out / "tables", threshold) if disclosure
           else D.disabled_log(out / "tables"))
    tables = {p.stem: load_csv(p) for p in sorted((out / "tables").glob("*.csv"))}
    figures = _draw_figures(out / FIGURES_DIR, spec, tables)
    page = _page(out, spec, tables, figures, log, threshold)
    report = out / REPORT_FILE
    report.write_text(render_page(page), encoding="utf-8")
    manifest = write_manifest(out, spec, con=con, spec_path=spec.path, disclosure=log)
    return ReportResult(report, manifest, figures, log)


def _draw_figures(folder: Path, spec: Spec, tables: dict[str, pl.DataFrame]) -> list[RenderedFigure]:
    folder.mkdir(parents=True, exist_ok=True)
    for stale in folder.iterdir():
        if stale.is_file():
            stale.unlink()
    planned = plan_figures([(a.name, a.kind) for a in spec.analyses], tables)
    return [render(figure, folder) for figure in planned]


def _page(out: Path, spec: Spec, tables: dict[str, pl.DataFrame], figures: list[RenderedFigure],
          log: D.DisclosureLog, threshold: int) -> Page:
    attrition = load_csv(out / "attrition.csv")
    general = [TableView("attrition.csv", attrition, "Flow of persons, every variant")]
    if (out / "exposure.csv").is_file():
        general.append(TableView("exposure.csv", load_csv(out / "exposure.csv"),
                                 "Exposure levels and cut points"))
    return Page(
        title=spec.title,
        study_id=spec.id,
        facts=_facts(spec, attrition),
        disclosure=log,
        attrition=attrition,
        methods=methods_sections(spec, disclosure=log.enabled, threshold=threshold),
        rules=[(rule, rule_rows(_rule_path(spec, rule)))
               for rule in dict.fromkeys(v.rule_set for v in spec.variants)],
        sections=[_section(a, tables, figures) for a in spec.analyses],
        general_tables=general,
        files=_files(out),
    )


def _facts(spec: Spec, attrition: pl.DataFrame) -> list[tuple[str, str]]:
    from cohort import __version__

    main = attrition.filter(pl.col("variant") == "main")
    included = main["n_remaining"][-1] if main.height else ""
    registry = main["n_remaining"][0] if main.height else ""
    variants = ", ".join(f"{v.name} ({v.rule_set})" for v in spec.variants)
    facts = [("Study", spec.id)]
    if spec.description:
        facts.append(("Description", spec.description))
    facts += [("Persons in the registry", registry), ("Persons included (main)", included),
              ("Variants (rule set)", variants),
              ("Spec", f"{spec.path.name if spec.path else '(in memory)'}, sha256 {spec.sha256[:16]}…"),
              ("Software", f"Dromos {__version__}"), ("Seed", str(spec.seed))]
    return facts


def _rule_path(spec: Spec, rule: str) -> Path:
    from cohort.phenotype.rules import resolve_rule_path

    if spec.path is not None and rule.endswith(".toml") and (spec.path.parent / rule).is_file():
        return spec.path.parent / rule
    return resolve_rule_path(rule)


def _section(analysis, tables: dict[str, pl.DataFrame], figures: list[RenderedFigure]) -> Section:
    kind = ANALYSIS_KINDS[analysis.kind]
    views = []
    for i, part in enumerate(kind.parts):
        stem = Path(table_file(analysis.name, part, i == 0)).stem
        if stem in tables:
            frame = tables[stem]
            shown, omitted = _drop_fully_withheld(frame)
            views.append(TableView(f"tables/{stem}.csv", shown,
                                   f"{analysis.name} \u2014 {part.replace('_', ' ')}",
                                   analysis.name, omitted))
    return Section(analysis.name, analysis.kind, kind.description,
                   [f for f in figures if f.spec.analysis == analysis.name], views)


def _drop_fully_withheld(frame: pl.DataFrame) -> tuple[pl.DataFrame, int]:
    """Rows whose every value is withheld (or empty) say nothing: shown as a count instead.

    Value columns are those holding the marker somewhere; a row is dropped only when it has
    at least one marker and nothing else in those columns.
    """
    value_columns = [c for c in frame.columns if (frame[c] == D.MARKER).any()]
    if not value_columns:
        return frame, 0
    marked = [pl.col(c) == D.MARKER for c in value_columns]
    blank = pl.all_horizontal([(pl.col(c) == D.MARKER) | (pl.col(c) == "") for c in value_columns])
    kept = frame.filter(~(blank & pl.any_horizontal(marked)))
    return kept, frame.height - kept.height


def _files(out: Path) -> list[str]:
    names = sorted(str(p.relative_to(out)) for p in out.rglob("*")
                   if p.is_file() and p.name != MANIFEST_FILE)
    return [*names, MANIFEST_FILE] if REPORT_FILE in names else [*names, REPORT_FILE, MANIFEST_FILE]
