"""Per-person timelines (person_conduction, the view person_category) and the per-ECG state view."""

from __future__ import annotations

import pytest

from cohort.vocabulary import AV_CATEGORIES, VENTRICULAR_CONDUCTION


@pytest.fixture
def timeline(reg):
    """Person P1: normal, first degree twice, Mobitz II, paced; P2 without ECGs."""
    reg.person("P2")
    reg.ecg("A1", at="2012-03-01 09:00:00", pr=170)
    reg.ecg("A2", at="2014-03-01 09:00:00", pr=230, statements=["Sinus rhythm with 1st degree AV block"])
    reg.ecg("A3", at="2014-03-20 09:00:00", pr=240)
    reg.ecg("A4", at="2016-07-01 09:00:00", pr=None, statements=["Atrial fibrillation"])
    reg.ecg("A5", at="2017-05-01 09:00:00", pr=220, statements=["Sinus rhythm", "Mobitz II"])
    reg.ecg("A6", at="2018-01-10 09:00:00", pr=None, qrs=150, statements=["Ventricular paced rhythm"])
    reg.ecg("A7", at="2019-01-10 09:00:00", pr=180, statements=["Sinus rhythm"])
    reg.procedure("P1", "2017-12-01", "0JH606Z")   # dual chamber pacemaker (ICD-10-PCS 0JH6, device 6)
    reg.procedure("P2", "2018-02-01", "0JH608Z")   # defibrillator (device 8): not a pacemaker
    reg.diagnosis("P1", "2017-06-01", "I44.2")     # complete AV block (ICD-10-CM)
    reg.diagnosis("P1", "2015-01-01", "I44.1")     # second-degree AV block
    reg.diagnosis("P2", "2019-01-01", "I440")      # first degree, code without the dot
    reg.run("default-v1")
    reg.run("persist90-v1")
    return reg


def test_one_row_per_person(timeline):
    n = timeline.con.execute(
        "SELECT count(*), count(DISTINCT person_key) FROM person_conduction WHERE rule_set_id = 'default-v1'"
    ).fetchall()[0]
    assert n == (2, 2)
    assert timeline.person_row("P2")["n_ecg"] == 0


def test_first_dates_and_counts(timeline):
    row = timeline.person_row("P1")
    assert row["n_ecg"] == 7
    assert str(row["av_first_degree_first_date"]) == "2014-03-01"
    assert row["av_first_degree_n"] == 2 and row["av_first_degree_persistent"]
    assert str(row["av_mobitz_ii_first_date"]) == "2017-05-01" and not row["av_mobitz_ii_persistent"]
    assert row["av_not_assessable_n"] == 2
    assert str(row["first_higher_grade_ecg_date"]) == "2017-05-01"
    assert row["first_third_degree_ecg_date"] is None
    assert row["vc_paced_n"] == 1


def test_persistence_variant_needs_90_days(timeline):
    # A2 and A3 are 19 days apart: persistent under default-v1, not under persist90-v1.
    assert timeline.person_row("P1", "default-v1")["av_first_degree_persistent"]
    assert not timeline.person_row("P1", "persist90-v1")["av_first_degree_persistent"]


def test_diagnosis_dates_flagged_separately(timeline):
    row = timeline.person_row("P1")
    assert str(row["first_higher_grade_dx_date"]) == "2017-06-01"
    assert str(row["first_third_degree_dx_date"]) == "2017-06-01"
    assert str(row["first_second_degree_dx_date"]) == "2015-01-01"
    assert str(timeline.person_row("P2")["first_first_degree_dx_date"]) == "2019-01-01"


def test_pacemaker_date_and_source(timeline):
    p1 = timeline.person_row("P1")
    assert str(p1["pacemaker_procedure_date"]) == "2017-12-01"
    assert str(p1["pacemaker_ecg_date"]) == "2018-01-10"
    assert str(p1["pacemaker_date"]) == "2017-12-01" and p1["pacemaker_source"] == "procedure"
    # ICD-10-PCS 0JH6 device 8 is a defibrillator, not a pacemaker (references.md).
    p2 = timeline.person_row("P2")
    assert p2["pacemaker_date"] is None and p2["pacemaker_source"] is None


def test_paced_ecg_alone_sets_pacemaker_date(reg):
    reg.ecg("B1", at="2015-01-01 09:00:00", pr=None, statements=["Ventricular paced rhythm"])
    reg.run()
    row = reg.person_row("P1")
    assert str(row["pacemaker_date"]) == "2015-01-01" and row["pacemaker_source"] == "paced_ecg"


def test_columns_cover_every_category(timeline):
    cols = {d[0] for d in timeline.con.execute("SELECT * FROM person_conduction LIMIT 0").description}
    for code in AV_CATEGORIES:
        assert {f"av_{code}_first_date", f"av_{code}_n", f"av_{code}_persistent"} <= cols
    for code in VENTRICULAR_CONDUCTION:
        assert {f"vc_{code}_first_date", f"vc_{code}_n", f"vc_{code}_persistent"} <= cols


def test_person_category_long_form(reg):
    reg.ecg("C1", qrs=140, axis=-60, statements=["Sinus rhythm", "RBBB"])
    reg.run()
    cats = dict(
        ((axis, cat), n) for axis, cat, n in reg.con.execute(
            "SELECT axis, category, n_ecg FROM person_category WHERE person_key = 'P1'"
        ).fetchall()
    )
    assert cats[("vc", "bifascicular")] == 1 and cats[("av", "normal_pr")] == 1
    assert cats[("rhythm", "sinus")] == 1


def test_ecg_state_sequence(timeline):
    rows = timeline.con.execute(
        "SELECT ecg_key, ecg_seq, state, last_known_pr_ms, worst_state_rank_so_far, last_known_state, paced_by "
        "FROM ecg_state WHERE rule_set_id = 'default-v1' AND person_key = 'P1' ORDER BY ecg_seq"
    ).fetchall()
    states = [r[2] for r in rows]
    assert [r[1] for r in rows] == list(range(1, 8))
    assert states == ["normal", "first_degree", "first_degree", "unknown", "higher_grade", "paced", "paced"]
    # AF (A4) has no assessable PR: the last known PR carries forward from A3.
    assert rows[3][3] == 240 and rows[3][5] == "first_degree"
    # worst state never decreases
    ranks = [r[4] for r in rows]
    assert ranks == sorted(ranks)
    assert rows[5][6] == "procedure" and rows[6][6] == "procedure"


def test_ecg_state_one_row_per_ecg(timeline):
    n = timeline.con.execute(
        "SELECT count(*), count(DISTINCT ecg_key) FROM ecg_state WHERE rule_set_id = 'default-v1'"
    ).fetchall()[0]
    assert n == (7, 7)


@pytest.mark.parametrize("name", ["ecg_state", "person_category"])
def test_table_of_an_older_version_becomes_the_view(timeline, name):
    """Registries phenotyped when these were stored get the views on the next run, same rows."""
    con = timeline.con
    query = f"SELECT * FROM {name} WHERE rule_set_id = 'persist90-v1' ORDER BY ALL"
    expected = con.execute(query).fetchall()
    assert expected
    con.execute(f"DROP VIEW {name}")
    con.execute(f"CREATE TABLE {name} AS SELECT 'stale' AS person_key, 'default-v1' AS rule_set_id")
    timeline.run("default-v1")
    kind = con.execute(
        "SELECT table_type FROM information_schema.tables WHERE table_name = ?", [name]
    ).fetchall()
    assert kind == [("VIEW",)]
    assert con.execute(query).fetchall() == expected  # the other rule set's rows are all there


def test_persons_missing_from_person_table_stay_apart(reg):
    # ECGs inserted without their person (the loader refuses them, a hand-made registry may
    # not): the per-person steps group by person number, so such persons must not merge.
    reg.ecg("M1", person="X1", at="2015-01-01 09:00:00", pr=230)
    reg.ecg("M2", person="X2", at="2015-02-01 09:00:00", pr=170)
    reg.ecg("M3", person="X1", at="2015-03-01 09:00:00", pr=170, statements=["Ventricular paced rhythm"])
    reg.ecg("K1", person="P1", at="2015-04-01 09:00:00", pr=170)
    reg.run()
    rows = reg.con.execute(
        "SELECT person_key, ecg_key, ecg_seq, state, worst_state_rank_so_far, paced_by "
        "FROM ecg_state WHERE rule_set_id = 'default-v1' ORDER BY person_key, ecg_seq"
    ).fetchall()
    assert [r[:3] for r in rows] == [
        ("P1", "K1", 1), ("X1", "M1", 1), ("X1", "M3", 2), ("X2", "M2", 1),
    ]
    assert [r[3] for r in rows] == ["normal", "first_degree", "paced", "normal"]
    assert rows[2][5] == "ecg" and rows[3][5] is None
    cats = reg.con.execute(
        "SELECT person_key, category, n_ecg FROM person_category "
        "WHERE rule_set_id = 'default-v1' AND axis = 'av' ORDER BY person_key, category"
    ).fetchall()
    assert ("X1", "first_degree", 1) in cats and ("X2", "normal_pr", 1) in cats
    assert not any(c[0] == "X2" and c[1] == "first_degree" for c in cats)
    persons = reg.con.execute(
        "SELECT person_key, n_ecg FROM person_conduction WHERE rule_set_id = 'default-v1'"
    ).fetchall()
    assert persons == [("P1", 1)]
