"""The report pass on real run folders: determinism, manifest, figure data, report page."""

from __future__ import annotations

import csv
import hashlib
import json
from html.parser import HTMLParser
from pathlib import Path

import duckdb
import pytest

from cohort.report.build import REPORT_FILE, _drop_fully_withheld
from cohort.report.disclosure import MARKER
from cohort.report.manifest import MANIFEST_FILE, PACKAGES, fingerprint
from cohort.report.tables import load_csv
from cohort.study.shipped import shipped_specs

RUNS = ["prevalence", "pacemaker", "site_quality"]


def files_of(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def manifest_of(folder: Path) -> dict:
    return json.loads((folder / MANIFEST_FILE).read_text(encoding="utf-8"))


def test_rerun_writes_identical_files(report_runs):
    first, again = files_of(report_runs["prevalence"]), files_of(report_runs["prevalence_again"])
    assert first.keys() == again.keys()
    differing = [name for name in first if name != MANIFEST_FILE and first[name] != again[name]]
    assert not differing
    assert fingerprint(manifest_of(report_runs["prevalence"])) == fingerprint(
        manifest_of(report_runs["prevalence_again"]))


@pytest.mark.parametrize("run", RUNS)
def test_manifest_hashes_every_output(report_runs, run):
    folder = report_runs[run]
    entries = {e["path"]: e for e in manifest_of(folder)["outputs"]}
    on_disk = {name for name in files_of(folder) if name != MANIFEST_FILE}
    assert set(entries) == on_disk
    for name, entry in entries.items():
        data = (folder / name).read_bytes()
        assert entry["bytes"] == len(data)
        assert entry["sha256"] == hashlib.sha256(data).hexdigest()


@pytest.mark.parametrize("run", RUNS)
def test_manifest_records_inputs(report_runs, synthetic_db, run):
    doc = manifest_of(report_runs[run])
    spec_path = shipped_specs()[run]
    assert doc["study"]["spec_text"] == spec_path.read_text(encoding="utf-8")
    assert doc["study"]["spec_sha256"] == hashlib.sha256(spec_path.read_bytes()).hexdigest()
    assert doc["seed"] == 2026
    assert set(PACKAGES) <= set(doc["software"]["packages"])
    assert all(doc["software"]["packages"][p] for p in ("duckdb", "polars", "lifelines"))
    with duckdb.connect(str(synthetic_db["db"]), read_only=True) as con:
        loaded = {r[0] for r in con.execute("SELECT sha256 FROM load_log").fetchall()}
    assert {s["sha256"] for s in doc["registry"]["sources"]} == loaded
    assert doc["registry"]["load_log_sha256"]
    rule_sets = {r["id"]: r for r in doc["rule_sets"]}
    assert {v["rule_set"] for v in doc["variants"]} == set(rule_sets)
    for entry in rule_sets.values():
        assert entry["files"] and all(len(f["sha256"]) == 64 for f in entry["files"])
    assert doc["disclosure"]["enabled"] is True and doc["disclosure"]["threshold"] == 11


@pytest.mark.parametrize("run", RUNS)
def test_figure_data_are_rows_of_the_published_tables(report_runs, run):
    """What a figure plots is in the (protected) tables: nothing recomputed, nothing unwithheld."""
    folder = report_runs[run]
    data_files = sorted((folder / "figures").glob("*.data.csv"))
    assert data_files, "no figures drawn"
    for data_file in data_files:
        assert (folder / "figures" / data_file.name.replace(".data.csv", ".svg")).is_file()
        assert (folder / "figures" / data_file.name.replace(".data.csv", ".png")).is_file()
        plotted = load_csv(data_file)
        assert plotted.height > 0, data_file.name
        for source in plotted["source"].unique().to_list():
            table = load_csv(folder / "tables" / source)
            shared = [c for c in plotted.columns if c in table.columns]
            assert "variant" in shared
            published = set(table.select(shared).iter_rows())
            for row in plotted.filter(plotted["source"] == source).select(shared).iter_rows():
                assert row in published, f"{data_file.name}: {dict(zip(shared, row, strict=True))}"


class _Tables(HTMLParser):
    """Cells of every ``<table data-source=...>`` of a page, and the figures on it."""

    def __init__(self) -> None:
        super().__init__()
        self.tables: dict[str, list[list[str]]] = {}
        self.figures: list[str] = []
        self._source: str | None = None
        self._row: list[str] | None = None
        self._cell: list[str] | None = None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "table" and "data-source" in a:
            self._source = a["data-source"]
            self.tables[self._source] = []
        elif tag == "figure" and "data-figure" in a:
            self.figures.append(a["data-figure"])
        elif self._source and tag == "tr":
            self._row = []
        elif self._row is not None and tag == "td":
            self._cell = []

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)

    def handle_endtag(self, tag):
        if tag == "td" and self._cell is not None:
            self._row.append("".join(self._cell))
            self._cell = None
        elif tag == "tr" and self._row is not None:
            if self._row:
                self.tables[self._source].append(self._row)
            self._row = None
        elif tag == "table":
            self._source = None


def parse_page(html: str) -> _Tables:
    parser = _Tables()
    parser.feed(html)
    return parser


def check_page_matches_folder(html: str, folder: Path) -> None:
    """Every table on the page shows its CSV cell for cell; every figure file is on it."""
    page = parse_page(html)
    figures = sorted(p.name.removesuffix(".data.csv") for p in (folder / "figures").glob("*.data.csv"))
    assert sorted(page.figures) == figures
    assert "attrition.csv" in page.tables
    for source, shown in page.tables.items():
        frame = load_csv(folder / source)
        if source.startswith("tables/"):  # analysis tables leave out rows with nothing to show
            frame, _omitted = _drop_fully_withheld(frame)
        expected = [list(r) for r in frame.iter_rows()]
        assert shown == expected[:len(shown)] and len(shown) == min(len(expected), 4000), source


@pytest.mark.parametrize("run", RUNS)
def test_report_shows_the_tables_and_figures(report_runs, run):
    folder = report_runs[run]
    html = (folder / REPORT_FILE).read_text(encoding="utf-8")
    check_page_matches_folder(html, folder)
    for needed in ("Read this first", "Disclosure control: on", "References"):
        assert needed.lower() in html.lower(), needed
    assert "Disclosure control: OFF" not in html


def test_report_without_disclosure_control_says_so_first(report_runs):
    folder = report_runs["prevalence_exact"]
    html = (folder / REPORT_FILE).read_text(encoding="utf-8")
    off = html.index("Disclosure control: OFF")
    assert off < html.index('id="cautions"') and off < html.index("<main>")
    assert manifest_of(folder)["disclosure"]["enabled"] is False
    with (folder / "attrition.csv").open(encoding="utf-8") as handle:
        assert MARKER not in handle.read()


def test_no_person_level_values_leave_the_run(report_runs, synthetic_db):
    """No person id or date of birth appears in any file of a run folder (common practice,
    no source: identifiers and exact dates of birth never leave the analysis environment)."""
    exports = synthetic_db["exports"]
    with (exports / "persons.csv").open(encoding="utf-8", newline="") as handle:
        persons = list(csv.DictReader(handle))[:200]
    for run in RUNS:
        text = "\n".join(b.decode("utf-8", "replace") for b in files_of(report_runs[run]).values())
        for person in persons:
            assert f",{person['person_id']}," not in text and person["birth_date"] not in text
