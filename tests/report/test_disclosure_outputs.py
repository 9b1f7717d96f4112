"""Disclosure control on real run folders: no small count can be read or worked out.

The checks here are written independently of ``cohort.report.disclosure``: they compare the
protected tables with the exact ones of the same run (disclosure control off), rebuild the
additive relations the prevalence table publishes and audit them with linear algebra.
The rule itself (withhold counts of 1 to 10; complementary suppression so that a withheld
cell cannot be recovered by subtraction) is common practice in official statistics, e.g.
Hundepool et al. (2012) Statistical Disclosure Control, Wiley, ch. 4 (recalled from memory).
"""

from __future__ import annotations

import csv
import itertools
from collections import defaultdict
from pathlib import Path

import numpy as np
import pytest
from scipy.linalg import null_space

from cohort.report.disclosure import COUNT_NAMES, MARKER

THRESHOLD = 11


def rows_of(path: Path) -> list[dict[str, str]]:
    with path.open(encoding="utf-8", newline="") as handle:
        return list(csv.DictReader(handle))


def published_files(folder: Path) -> list[Path]:
    """Every CSV a reader of the run folder sees, figures' data files included."""
    return sorted(p for p in folder.rglob("*.csv"))


@pytest.mark.parametrize("run", ["prevalence", "pacemaker", "site_quality"])
def test_no_count_between_1_and_10_is_visible(report_runs, run):
    folder = report_runs[run]
    seen = 0
    for path in published_files(folder):
        for i, row in enumerate(rows_of(path), start=2):
            for column, text in row.items():
                if column not in COUNT_NAMES or text in ("", MARKER):
                    continue
                value = float(text)
                seen += 1
                assert value == 0 or value >= THRESHOLD, (
                    f"{path.relative_to(folder)} line {i}: {column} = {text} is a small count")
    assert seen > 100  # the run published counts at all


def test_published_values_are_the_exact_values(report_runs):
    """Suppression withholds; it never alters, rounds or drops a row."""
    protected, exact = report_runs["prevalence"], report_runs["prevalence_exact"]
    for path in sorted((exact / "tables").glob("*.csv")):
        truth = rows_of(path)
        shown = rows_of(protected / "tables" / path.name)
        assert len(shown) == len(truth), path.name
        for a, b in zip(shown, truth, strict=True):
            assert a.keys() == b.keys()
            for column in a:
                assert a[column] in (b[column], MARKER), (path.name, column)


def test_every_small_count_is_withheld(report_runs):
    protected, exact = report_runs["prevalence"], report_runs["prevalence_exact"]
    small = 0
    for path in sorted((exact / "tables").glob("*.csv")):
        for a, b in zip(rows_of(protected / "tables" / path.name), rows_of(path), strict=True):
            for column in a.keys() & COUNT_NAMES:
                if b[column] not in ("", "0") and float(b[column]) < THRESHOLD:
                    small += 1
                    assert a[column] == MARKER, (path.name, column, b[column])
    assert small > 0  # a 2,500-person registry has small cells: the test exercises them


# --------------------------------------------------------------------------- prevalence audit

KEY = ("variant", "basis", "year", "axis", "category", "stratum", "sex", "age_band")


def _cells(rows: list[dict[str, str]]) -> dict[tuple, str]:
    """Count cells by identity: events per category, and n per stratum (the persons of a
    stratum are one cell whichever axis or category row repeats them)."""
    cells: dict[tuple, str] = {}
    for row in rows:
        key = tuple(row[k] for k in KEY)
        cells[("events", *key)] = row["events"]
        n_key = ("n", *key[:3], "*", "*", *key[5:])
        cells[n_key] = row["n"]
    return cells


def _lines(cells: dict[tuple, str]) -> list[tuple[tuple, list[tuple]]]:
    """(total, parts) relations: margins over sex and age band, and categories over n."""
    by_group = defaultdict(dict)
    for cid in cells:
        measure, variant, basis, year, axis, category, stratum, sex, band = cid
        by_group[(measure, variant, basis, year, axis, category)][(stratum, sex, band)] = cid
    lines = []
    for group in by_group.values():
        overall = group.get(("overall", "", ""))
        sexes = [c for (s, _x, _b), c in group.items() if s == "sex"]
        bands = [c for (s, _x, _b), c in group.items() if s == "age_band"]
        if overall:
            lines += [(overall, sexes), (overall, bands)]
        for (s, sex, band), cid in group.items():
            if s == "sex":
                lines.append((cid, [c for (s2, x, _b), c in group.items() if s2 == "age_band_sex" and x == sex]))
            elif s == "age_band":
                lines.append((cid, [c for (s2, _x, b), c in group.items() if s2 == "age_band_sex" and b == band]))
    # every person has exactly one category per axis: categories add up to n
    by_stratum = defaultdict(list)
    for cid in cells:
        if cid[0] == "events":
            by_stratum[(cid[1], cid[2], cid[3], cid[4], *cid[6:])].append(cid)
    for (variant, basis, year, _axis, stratum, sex, band), parts in by_stratum.items():
        lines.append((("n", variant, basis, year, "*", "*", stratum, sex, band), parts))
    return [(t, p) for t, p in lines if p]


def test_prevalence_relations_hold_in_the_exact_table(report_runs):
    """The relations audited below are what the table really publishes (checked on truth)."""
    cells = _cells(rows_of(report_runs["prevalence_exact"] / "tables" / "prevalence_at_index.csv"))
    lines = _lines(cells)
    assert len(lines) > 100
    for total, parts in lines:
        assert int(cells[total]) == sum(int(cells[p]) for p in parts), (total, parts)


def test_withheld_prevalence_counts_cannot_be_worked_out(report_runs):
    """No line has exactly one withheld cell, withheld cells of a line with a published total
    sum to 0 or >= 11, and no small cell is determined by all published lines together
    (its unit vector is outside the row space: a zero row of the null-space basis)."""
    table = "prevalence_at_index.csv"
    shown = _cells(rows_of(report_runs["prevalence"] / "tables" / table))
    truth = _cells(rows_of(report_runs["prevalence_exact"] / "tables" / table))
    lines = _lines(truth)
    audited = 0
    for total, parts in lines:
        members = [total, *parts]
        withheld = [c for c in members if shown[c] == MARKER]
        assert len(withheld) != 1, f"only {withheld} withheld in the line of {total}"
        if shown[total] != MARKER:
            hidden_sum = sum(int(truth[c]) for c in parts if shown[c] == MARKER)
            assert hidden_sum == 0 or hidden_sum >= THRESHOLD, (total, hidden_sum)
    for variant in {c[1] for c in truth}:
        unknown = sorted(c for c in truth if c[1] == variant and shown[c] == MARKER)
        index = {c: i for i, c in enumerate(unknown)}
        rows = []
        for total, parts in lines:
            if total[1] != variant:
                continue
            row = np.zeros(len(unknown))
            for c, sign in itertools.chain([(total, 1.0)], ((p, -1.0) for p in parts)):
                if c in index:
                    row[index[c]] += sign
            if row.any():
                rows.append(row)
        basis = null_space(np.array(rows)) if rows else np.eye(len(unknown))
        for c, i in index.items():
            if 0 < int(truth[c]) < THRESHOLD:
                audited += 1
                assert np.abs(basis[i]).max() > 1e-9, f"{c} (true {truth[c]}) is determined"
    assert audited > 10  # small cells exist, so the audit had something to check
