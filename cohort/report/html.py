"""report.html: one self-contained page (inline CSS and SVG, no scripts, no external requests).

Order: the first screen holds the title, study facts, the cautions and the disclosure-control
status (a prominent banner when it was switched off) and the contents; then the flow of
persons (STROBE-style diagram drawn from attrition.csv), methods with references and the rule
set's key thresholds, one section per analysis (figures with a "how to read" line, then its
tables cell for cell as in the CSV text), the references and the list of files. No date or
clock time is written, so re-runs give identical bytes.
"""

from __future__ import annotations

import html
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import polars as pl

from cohort.report.disclosure import MARKER, DisclosureLog
from cohort.report.methods import cite, references_used
from cohort.report.plan import RenderedFigure

HERE = Path(__file__).resolve().parent
TEXT: dict[str, Any] = tomllib.loads((HERE / "report.toml").read_text(encoding="utf-8"))
CSS = (HERE / "report.css").read_text(encoding="utf-8")
_NUMBER = re.compile(r"^-?(\d+(\.\d*)?|\.\d+)([eE][-+]?\d+)?$|^-?inf$")
#: Rule-set sections whose thresholds the report lists.
RULE_SECTIONS = ("pr", "qrs", "axis", "rate_discordance", "persistence")


def esc(value: Any) -> str:
    return html.escape(str(value), quote=True)


def slug(text: str) -> str:
    return re.sub(r"[^a-z0-9]+", "-", text.lower()).strip("-")


@dataclass
class TableView:
    """One table of the run folder as it is shown: file, text rows, heading."""

    file: str          # path relative to the run folder, e.g. tables/incidence.csv
    frame: pl.DataFrame
    title: str
    analysis: str | None = None
    omitted_withheld: int = 0


@dataclass
class Section:
    """One analysis: heading, what it is, its figures and tables."""

    name: str
    kind: str
    description: str
    figures: list[RenderedFigure] = field(default_factory=list)
    tables: list[TableView] = field(default_factory=list)


@dataclass
class Page:
    """Everything the page shows."""

    title: str
    study_id: str
    facts: list[tuple[str, str]]
    disclosure: DisclosureLog
    attrition: pl.DataFrame
    methods: list[tuple[str, str]]
    rules: list[tuple[str, list[tuple[str, str, str, str]]]]
    sections: list[Section]
    general_tables: list[TableView]
    files: list[str]


# --------------------------------------------------------------------------- first screen


def cautions_html() -> str:
    c = TEXT["cautions"]
    items = "".join(f"<li>{esc(i)}</li>" for i in c["items"])
    return f'<section class="notice" id="cautions"><h2>{esc(c["heading"])}</h2><ul>{items}</ul></section>'


def disclosure_html(log: DisclosureLog) -> str:
    d = TEXT["disclosure"]
    if not log.enabled:
        return (f'<section class="status off" id="disclosure" role="alert"><h2>{esc(d["off_heading"])}</h2>'
                f'<p>{esc(d["off_text"])}</p></section>')
    audit = d["audit_exact"] if log.audit == "exact" else f"Audit: {log.audit}."
    text = d["on_text"].format(below=log.threshold - 1, marker=log.marker, primary=log.primary,
                               complementary=log.complementary, audit=audit)
    notes = "".join(f"<li>{esc(n)}</li>" for n in log.notes)
    more = f'<ul class="small">{notes}</ul>' if notes else ""
    return (f'<section class="status" id="disclosure"><h2>{esc(d["on_heading"])}</h2>'
            f'<p>{esc(text)}</p>{more}</section>')


# --------------------------------------------------------------------------- flow diagram


def _wrap(text: str, width: int) -> list[str]:
    words, lines, line = text.split(), [], ""
    for w in words:
        if line and len(line) + 1 + len(w) > width:
            lines.append(line)
            line = w
        else:
            line = f"{line} {w}".strip()
    return [*lines, line] if line else lines


def flow_svg(attrition: pl.DataFrame, variant: str = "main") -> str:
    """STROBE-style flow of one variant: a column of remaining-persons boxes, exclusions beside."""
    rows = attrition.filter(pl.col("variant") == variant).to_dicts()
    if not rows:
        return ""
    main_x, main_w, side_x, side_w = 20, 270, 380, 340
    y, parts = 16, []
    box = ('<rect x="{x}" y="{y}" width="{w}" height="{h}" rx="6" fill="{fill}" stroke="#1d2733" '
           'stroke-width="1.2"/>')

    def text_lines(x: int, y0: int, lines: list[str], bold_first: bool = False) -> str:
        out = []
        for i, line in enumerate(lines):
            weight = ' font-weight="600"' if bold_first and i == 0 else ""
            out.append(f'<text x="{x}" y="{y0 + 15 * i}" font-size="12.5"{weight}>{esc(line)}</text>')
        return "".join(out)

    first = rows[0]
    lines = ["Persons in the registry", f"n = {first['n_remaining']}"]
    parts.append(box.format(x=main_x, y=y, w=main_w, h=44, fill="#eef3f8"))
    parts.append(text_lines(main_x + 12, y + 18, lines, True))
    y += 44
    for row in rows[1:]:
        desc = _wrap(f"{row['kind'].capitalize()}: {row['description']}", 46)
        label = "not meeting" if row["kind"] == "inclusion" else "excluded"
        side = [*desc, f"{label}: n = {row['n_excluded']}"]
        side_h = 12 + 15 * len(side)
        gap = max(side_h + 14, 40)
        mid = y + gap / 2
        parts.append(f'<line x1="{main_x + main_w / 2}" y1="{y}" x2="{main_x + main_w / 2}" '
                     f'y2="{y + gap - 2}" stroke="#1d2733" stroke-width="1.2" marker-end="url(#flow-arrow)"/>')
        parts.append(f'<line x1="{main_x + main_w / 2}" y1="{mid}" x2="{side_x - 2}" y2="{mid}" '
                     'stroke="#5d6976" stroke-width="1" marker-end="url(#flow-arrow)"/>')
        parts.append(box.format(x=side_x, y=mid - side_h / 2, w=side_w, h=side_h, fill="#fbf3ec"))
        parts.append(text_lines(side_x + 10, int(mid - side_h / 2 + 16), side))
        y += gap
        parts.append(box.format(x=main_x, y=y, w=main_w, h=30, fill="#eef3f8"))
        parts.append(text_lines(main_x + 12, y + 19, [f"remaining: n = {row['n_remaining']}"]))
        y += 30
    height = y + 16
    defs = ('<defs><marker id="flow-arrow" viewBox="0 0 10 10" refX="9" refY="5" markerWidth="7" '
            'markerHeight="7" orient="auto"><path d="M0,0 L10,5 L0,10 z" fill="#1d2733"/></marker></defs>')
    return (f'<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 740 {height}" width="740" '
            f'height="{height}" role="img" aria-label="Flow of persons" font-family="system-ui, '
            f'DejaVu Sans, sans-serif" fill="#1d2733">{defs}{"".join(parts)}</svg>')


# --------------------------------------------------------------------------- rule set


def rule_rows(path: Path) -> list[tuple[str, str, str, str]]:
    """(section, key, value, comment) of the threshold sections of a rule file and its bases."""
    from cohort.phenotype.rules import load_rule_set

    rs = load_rule_set(path)
    comments: dict[tuple[str, str], str] = {}
    for f in reversed(rule_chain(rs.path)):  # the file that sets a value explains it
        for key, note in _comments(f).items():
            comments.setdefault(key, note)
    rows = []
    for section in RULE_SECTIONS:
        for key, value in rs.data.get(section, {}).items():
            if isinstance(value, dict | list):
                continue
            rows.append((section, key, _value(value), comments.get((section, key), "")))
    rows.append(("av", "higher_grade", ", ".join(rs.data["av"]["higher_grade"]),
                 comments.get(("av", "higher_grade"), "categories counted as higher-grade AV block")))
    return rows


def _value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    return str(v)


def rule_chain(path: Path) -> list[Path]:
    from cohort.phenotype.rules import RULES_DIR, resolve_rule_path

    chain, current = [], path
    while current is not None and current not in chain:
        chain.append(current)
        parent = tomllib.loads(current.read_text(encoding="utf-8")).get("rule_set", {}).get("extends")
        if parent is None:
            break
        local = current.parent / f"{parent}.toml"
        current = local if local.is_file() else resolve_rule_path(parent, RULES_DIR)
    return chain


_ASSIGN = re.compile(r"^\s*([A-Za-z0-9_]+)\s*=\s*[^#]*#\s*(.+)$")
_HEAD = re.compile(r"^\s*\[([^\]]+)\]")


def _comments(path: Path) -> dict[tuple[str, str], str]:
    out, section = {}, ""
    for line in path.read_text(encoding="utf-8").splitlines():
        if m := _HEAD.match(line):
            section = m[1].strip()
        elif m := _ASSIGN.match(line):
            out[(section, m[1])] = m[2].strip()
    return out


# --------------------------------------------------------------------------- tables


def table_html(view: TableView) -> str:
    """A table cell for cell as in its CSV text, inside a collapsible block."""
    limit = int(TEXT["reading"]["long_table_rows"])
    frame = view.frame
    shown = frame.head(limit)
    head = "".join(f"<th>{esc(c)}</th>" for c in frame.columns)
    body = []
    for row in shown.iter_rows():
        cells = []
        for v in row:
            cls = ' class="w"' if v == MARKER else (' class="n"' if _NUMBER.match(v or "") else "")
            cells.append(f"<td{cls}>{esc(v)}</td>")
        body.append(f"<tr>{''.join(cells)}</tr>")
    notes = []
    if frame.height > limit:
        notes.append(f"first {limit:,} of {frame.height:,} rows shown; all rows are in {view.file}")
    if view.omitted_withheld:
        notes.append(f"{view.omitted_withheld:,} rows whose every value was withheld are not shown")
    note = f'<p class="small">{esc("; ".join(notes))}.</p>' if notes else ""
    meta = f"{frame.height:,} rows \u00b7 {view.file}"
    return (f'<details id="t-{slug(view.file)}"><summary><b>{esc(view.title)}</b> '
            f'<span class="meta">({esc(meta)})</span></summary>{note}<div class="scroll">'
            f'<table data-source="{esc(view.file)}"><thead><tr>{head}</tr></thead>'
            f'<tbody>{"".join(body)}</tbody></table></div></details>')


def figure_html(fig: RenderedFigure, number: int) -> str:
    svg = fig.svg
    svg = svg[svg.index("<svg"):]  # drop the XML prolog and doctype: inline in HTML
    note = f" {esc(fig.spec.note)}" if fig.spec.note else ""
    return (f'<figure id="f-{slug(fig.spec.name)}" data-figure="{esc(fig.spec.name)}">'
            f'<div class="plot">{svg}</div><figcaption><b>Figure {number}. {esc(fig.spec.title)}.</b> '
            f'<span class="how">How to read this: {esc(fig.spec.how_to_read)}{note}</span> '
            f'<span class="small">Data: figures/{esc(fig.spec.name)}.data.csv.</span></figcaption></figure>')


# --------------------------------------------------------------------------- page


def render_page(page: Page) -> str:
    """The whole report as one HTML text."""
    facts = "".join(f"<dt>{esc(k)}</dt><dd>{esc(v)}</dd>" for k, v in page.facts)
    toc = ['<li><a href="#flow">Flow of persons</a></li>', '<li><a href="#methods">Methods</a></li>']
    toc += [f'<li><a href="#a-{slug(s.name)}">{esc(_heading(s))}</a></li>' for s in page.sections]
    toc += ['<li><a href="#references">References</a></li>', '<li><a href="#files">Files</a></li>']
    out = ['<!DOCTYPE html><html lang="en"><head><meta charset="utf-8">',
           '<meta name="viewport" content="width=device-width, initial-scale=1">',
           f"<title>{esc(page.title)} \u2014 Dromos report</title><style>{CSS}</style></head><body>",
           '<header class="cover"><p class="kicker">Dromos study report</p>',
           f"<h1>{esc(page.title)}</h1><dl class=\"facts\">{facts}</dl>",
           disclosure_html(page.disclosure) if not page.disclosure.enabled else "",
           cautions_html(),
           disclosure_html(page.disclosure) if page.disclosure.enabled else "",
           f'<nav aria-label="Contents"><ol class="contents">{"".join(toc)}</ol></nav></header><main>']
    out.append(_flow_section(page))
    out.append(_methods_section(page))
    number = 0
    for s in page.sections:
        out.append(f'<section id="a-{slug(s.name)}"><h2>{esc(_heading(s))}</h2>')
        if s.description:
            out.append(f"<p>{esc(s.description)}</p>")
        for fig in s.figures:
            number += 1
            out.append(figure_html(fig, number))
        if s.tables:
            out.append(f'<h3>Tables</h3><p class="small">{esc(TEXT["reading"]["tables"].format(marker=MARKER))}</p>')
            out.extend(table_html(t) for t in s.tables)
        out.append("</section>")
    refs = references_used(page.methods)
    items = "".join(f'<li id="ref-{esc(k)}">{esc(v)}</li>' for k, v in refs)
    out.append(f'<section id="references"><h2>References</h2><ol class="refs">{items}</ol></section>')
    files = "".join(f"<li>{esc(f)}</li>" for f in page.files)
    out.append(f'<footer id="files"><h3>Files of this run</h3><p>Everything shown here comes from '
               f'these files of the run folder; manifest.json holds their SHA-256 hashes, the '
               f'input files of the registry, the rule set, the spec and the software versions.'
               f'</p><ul class="small">{files}</ul></footer></main></body></html>\n')
    return "".join(out)


def _heading(s: Section) -> str:
    return f"{s.name.replace('_', ' ').capitalize()} ({s.kind.replace('_', ' ')})"


def _flow_section(page: Page) -> str:
    out = ['<section id="flow"><h2>Flow of persons</h2>',
           "<p>Persons of the registry enter the study when they meet every inclusion criterion "
           "and none of the exclusions, checked in the order shown; each person is counted at "
           "the first criterion they fail.</p>",
           f'<div class="flow">{flow_svg(page.attrition)}</div>']
    variants = _ordered(page.attrition["variant"].to_list())
    if len(variants) > 1:
        rows = []
        for v in variants:
            last = page.attrition.filter(pl.col("variant") == v).tail(1)
            rows.append(f"<tr><td>{esc(v)}</td><td class=\"n\">{esc(last['n_remaining'][0])}</td></tr>")
        out.append('<p class="small">Persons included in each variant (the diagram shows the main '
                   'analysis; all steps are in attrition.csv):</p><table><thead><tr><th>variant</th>'
                   f'<th>persons included</th></tr></thead><tbody>{"".join(rows)}</tbody></table>')
    out.extend(table_html(t) for t in page.general_tables)
    out.append("</section>")
    return "".join(out)


def _methods_section(page: Page) -> str:
    out = ['<section id="methods"><h2>Methods</h2>']
    for heading, text in page.methods:
        out.append(f"<h3>{esc(heading)}</h3><p>{cite(text)}</p>")
    for rule_id, rows in page.rules:
        body = "".join(f"<tr><td>{esc(s)}</td><td>{esc(k)}</td><td class=\"n\">{esc(v)}</td>"
                       f"<td>{esc(n)}</td></tr>" for s, k, v, n in rows)
        out.append(f'<h3>Rule set {esc(rule_id)}</h3><p class="small">Key thresholds of the '
                   f'phenotype rule set (cohort/rules/{esc(rule_id)}.toml), with the source given '
                   f'in the file.</p><div class="scroll"><table class="rules"><thead><tr>'
                   f'<th>section</th><th>key</th><th>value</th><th>source / note</th></tr></thead>'
                   f'<tbody>{body}</tbody></table></div>')
    out.append("</section>")
    return "".join(out)


def _ordered(values: list) -> list:
    return list(dict.fromkeys(values))


__all__ = ["Page", "Section", "TableView", "flow_svg", "render_page", "rule_rows", "table_html"]
