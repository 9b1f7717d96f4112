"""Threshold boundaries of the per-ECG categories, each against its published source.

One registry holds one ECG per case and is phenotyped once with default-v1 and pr220-v1.
"""

from __future__ import annotations

import duckdb
import pytest

from cohort.registry import ensure_schema
from tests.phenotype.conftest import RegistryBuilder

# (case id, ecg keyword arguments)
ECGS = {
    # PR: Kusumoto FM et al. 2018 ACC/AHA/HRS guideline, first-degree block PR > 200 ms.
    "pr199": {"pr": 199},
    "pr200": {"pr": 200},
    "pr201": {"pr": 201},
    "pr219": {"pr": 219},
    "pr220": {"pr": 220},
    # Short PR < 120 ms: common practice, no source.
    "pr119": {"pr": 119},
    "pr120": {"pr": 120},
    # Marked first degree PR >= 300 ms: common practice, no source.
    "pr299": {"pr": 299},
    "pr300": {"pr": 300},
    # QRS without a bundle-branch statement: Surawicz 2009, nonspecific IVCD QRS > 110 ms.
    "qrs109": {"qrs": 109},
    "qrs110": {"qrs": 110},
    "qrs111": {"qrs": 111},
    "qrs119": {"qrs": 119},
    "qrs120": {"qrs": 120},
    # Incomplete RBBB 110-119 ms, complete RBBB >= 120 ms (Surawicz 2009).
    "irbbb109": {"qrs": 109, "statements": ["Sinus rhythm", "Incomplete RBBB"]},
    "irbbb110": {"qrs": 110, "statements": ["Sinus rhythm", "Incomplete RBBB"]},
    "irbbb119": {"qrs": 119, "statements": ["Sinus rhythm", "Incomplete RBBB"]},
    "irbbb120": {"qrs": 120, "statements": ["Sinus rhythm", "Incomplete RBBB"]},
    "rbbb119": {"qrs": 119, "statements": ["Sinus rhythm", "RBBB"]},
    "rbbb120": {"qrs": 120, "statements": ["Sinus rhythm", "RBBB"]},
    "lbbb119": {"qrs": 119, "statements": ["Sinus rhythm", "LBBB"]},
    "lbbb120": {"qrs": 120, "statements": ["Sinus rhythm", "LBBB"]},
    # LAFB axis -45 to -90 with QRS < 120 ms (Surawicz 2009).
    "axis-44": {"axis": -44},
    "axis-45": {"axis": -45},
    "axis-90": {"axis": -90},
    "axis-91": {"axis": -91},
    "axis270": {"axis": 270},
    "lafb_qrs119": {"axis": -60, "qrs": 119},
    "lafb_qrs120": {"axis": -60, "qrs": 120},
    # LPFB axis +90 to +180 with QRS < 120 ms (Surawicz 2009).
    "axis89": {"axis": 89},
    "axis90": {"axis": 90},
    "axis180": {"axis": 180},
    "axis181": {"axis": 181},
    "lpfb_rvh": {"axis": 120, "statements": ["Sinus rhythm", "Right ventricular hypertrophy"]},
    "axis95_rad": {"axis": 95, "statements": ["Sinus rhythm", "Right axis deviation"]},
    "axis-50_lad": {"axis": -50, "statements": ["Sinus rhythm", "Left axis deviation"]},
    # Bifascicular = RBBB with LAFB or LPFB (Surawicz 2009).
    "rbbb_axis-60": {"axis": -60, "qrs": 140, "statements": ["Sinus rhythm", "RBBB"]},
    "rbbb_axis120": {"axis": 120, "qrs": 140, "statements": ["Sinus rhythm", "RBBB"]},
    "lbbb_axis-60": {"axis": -60, "qrs": 150, "statements": ["Sinus rhythm", "LBBB"]},
}


@pytest.fixture(scope="module")
def rows():
    con = duckdb.connect(":memory:")
    ensure_schema(con)
    reg = RegistryBuilder(con)
    reg.person("P1")
    for key, kwargs in ECGS.items():
        reg.ecg(key, **kwargs)
    reg.run("default-v1")
    reg.run("pr220-v1")
    out = {(k, r): reg.row(k, r) for k in ECGS for r in ("default-v1", "pr220-v1")}
    con.close()
    return out


@pytest.mark.parametrize(
    ("key", "category"),
    [("pr199", "normal_pr"), ("pr200", "normal_pr"), ("pr201", "first_degree")],
)
def test_first_degree_boundary_kusumoto_2018(rows, key, category):
    # Kusumoto 2018: PR > 200 ms, so exactly 200 ms is not first-degree block.
    assert rows[(key, "default-v1")]["av_category"] == category


@pytest.mark.parametrize(
    ("key", "category"),
    [("pr201", "normal_pr"), ("pr219", "normal_pr"), ("pr220", "first_degree")],
)
def test_pr220_rule_set_boundary(rows, key, category):
    # pr220-v1: first-degree block PR >= 220 ms (sensitivity rule set, inclusive).
    assert rows[(key, "pr220-v1")]["av_category"] == category


@pytest.mark.parametrize(("key", "category"), [("pr119", "short_pr"), ("pr120", "normal_pr")])
def test_short_pr_boundary_common_practice(rows, key, category):
    # Short PR < 120 ms: common practice, no source.
    assert rows[(key, "default-v1")]["av_category"] == category


@pytest.mark.parametrize(
    ("key", "category"), [("pr299", "first_degree"), ("pr300", "marked_first_degree")]
)
def test_marked_first_degree_boundary_common_practice(rows, key, category):
    # Marked first degree PR >= 300 ms: common practice, no source.
    assert rows[(key, "default-v1")]["av_category"] == category


def test_measurement_evidence_names_threshold(rows):
    assert "measurement:pr>200" in rows[("pr201", "default-v1")]["evidence"]
    assert "measurement:pr>=220" in rows[("pr220", "pr220-v1")]["evidence"]
    assert "measurement:pr<120" in rows[("pr119", "default-v1")]["evidence"]


@pytest.mark.parametrize(
    ("key", "category", "morphology_unknown"),
    [
        ("qrs109", "normal", False),
        ("qrs110", "normal", False),
        ("qrs111", "nonspecific_ivcd", True),
        ("qrs119", "nonspecific_ivcd", True),
        ("qrs120", "nonspecific_ivcd", True),
    ],
)
def test_wide_qrs_without_statement_surawicz_2009(rows, key, category, morphology_unknown):
    # Surawicz 2009: nonspecific IVCD is QRS > 110 ms without RBBB/LBBB morphology; the
    # measurement alone cannot show the morphology, so the flag says it is unknown.
    row = rows[(key, "default-v1")]
    assert row["ventricular_conduction"] == category
    assert row["wide_qrs_morphology_unknown"] is morphology_unknown


def test_wide_qrs_evidence_labels(rows):
    assert "measurement:qrs>110_morphology_unknown" in rows[("qrs119", "default-v1")]["evidence"]
    assert "measurement:qrs>=120_morphology_unknown" in rows[("qrs120", "default-v1")]["evidence"]


@pytest.mark.parametrize(
    ("key", "conflict"),
    [
        ("irbbb109", True), ("irbbb110", False), ("irbbb119", False), ("irbbb120", True),
        ("rbbb119", True), ("rbbb120", False), ("lbbb119", True), ("lbbb120", False),
    ],
)
def test_bundle_branch_qrs_boundaries_surawicz_2009(rows, key, conflict):
    # Surawicz 2009: incomplete RBBB QRS 110-119 ms; complete RBBB / LBBB QRS >= 120 ms. A
    # statement outside its range keeps its category and records the conflict.
    row = rows[(key, "default-v1")]
    expected = {"irbbb": "incomplete_rbbb", "rbbb": "rbbb", "lbbb": "lbbb"}[key.rstrip("0123456789")]
    assert row["ventricular_conduction"] == expected
    assert (row["n_conflicts"] > 0) is conflict, row["evidence"]


def test_rbbb_conflict_label(rows):
    assert "conflict:rbbb_statement_qrs<120" in rows[("rbbb119", "default-v1")]["evidence"]


@pytest.mark.parametrize(
    ("key", "category"),
    [
        ("axis-44", "normal"), ("axis-45", "lafb"), ("axis-90", "lafb"), ("axis-91", "normal"),
        ("axis270", "lafb"), ("lafb_qrs119", "lafb"), ("lafb_qrs120", "nonspecific_ivcd"),
    ],
)
def test_lafb_axis_boundaries_surawicz_2009(rows, key, category):
    # Surawicz 2009: LAFB frontal axis -45 to -90 degrees with QRS < 120 ms. 270 degrees is
    # the same direction as -90.
    assert rows[(key, "default-v1")]["ventricular_conduction"] == category


@pytest.mark.parametrize(
    ("key", "category"),
    [("axis89", "normal"), ("axis90", "lpfb"), ("axis180", "lpfb"), ("axis181", "normal")],
)
def test_lpfb_axis_boundaries_surawicz_2009(rows, key, category):
    # Surawicz 2009: LPFB frontal axis +90 to +180 degrees with QRS < 120 ms; 181 degrees is
    # -179 (northwest), not LPFB.
    assert rows[(key, "default-v1")]["ventricular_conduction"] == category


def test_lpfb_not_called_beside_rvh(rows):
    # Surawicz 2009: LPFB needs other causes of right axis deviation excluded.
    row = rows[("lpfb_rvh", "default-v1")]
    assert row["ventricular_conduction"] == "normal" and not row["lpfb"]
    assert "excluded:lpfb_axis_other_cause" in row["evidence"]


@pytest.mark.parametrize(
    ("key", "evidence"),
    [
        ("axis95_rad", "excluded:lpfb_axis_statement_right_axis_deviation"),
        ("axis-50_lad", "excluded:lafb_axis_statement_left_axis_deviation"),
    ],
)
def test_axis_deviation_statement_declines_fascicular_block(rows, key, evidence):
    # Precedence of statements: a read that names only the axis deviation did not call a
    # fascicular block (decision of default-v1, [axis] axis_statement_blocks_fascicular).
    row = rows[(key, "default-v1")]
    assert row["ventricular_conduction"] == "normal" and evidence in row["evidence"]


@pytest.mark.parametrize(("key", "fascicle"), [("rbbb_axis-60", "lafb"), ("rbbb_axis120", "lpfb")])
def test_bifascicular_is_rbbb_plus_fascicle(rows, key, fascicle):
    # Surawicz 2009: bifascicular block = RBBB with LAFB or LPFB; the parts stay countable.
    row = rows[(key, "default-v1")]
    assert row["ventricular_conduction"] == "bifascicular"
    assert row["rbbb"] and row[fascicle] and not row["bifascicular_parts_unknown"]


def test_lbbb_with_left_axis_is_not_lafb(rows):
    row = rows[("lbbb_axis-60", "default-v1")]
    assert row["ventricular_conduction"] == "lbbb" and not row["lafb"]
