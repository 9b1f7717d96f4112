"""Per-ECG categories: precedence, not-assessable rhythms, conflicts, inference, invariants."""

from __future__ import annotations

import duckdb
import numpy as np
import pytest

from cohort.registry import ensure_schema
from cohort.vocabulary import AV_CATEGORIES, AV_GRADE, RHYTHM_CLASSES, VENTRICULAR_CONDUCTION
from tests.phenotype.conftest import RegistryBuilder, one_ecg


def _beat_table(con, rows: list[tuple[str, str, float | None]], rules_id: str = "beats-v1") -> None:
    """A hand-made beat_pattern table with the columns of the beat classifier's batch mode."""
    con.execute(
        "CREATE TABLE beat_pattern (ecg_key VARCHAR, pattern VARCHAR, ratio VARCHAR, "
        "atrial_rate DOUBLE, ventricular_rate DOUBLE, escape_rate DOUBLE, pr_median_ms DOUBLE, "
        "n_p INTEGER, n_qrs INTEGER, n_not_conducted INTEGER, evidence VARCHAR[], rules_id VARCHAR)"
    )
    for key, pattern, pr in rows:
        con.execute(
            "INSERT INTO beat_pattern VALUES (?, ?, NULL, 75, 60, NULL, ?, 12, 10, 2, [], ?)",
            [key, pattern, pr, rules_id],
        )


# --- precedence -------------------------------------------------------------------------------

def test_confirmed_read_beats_machine_read(reg):
    reg.ecg("E1", pr=230, statements=["Sinus rhythm with first degree AV block"])
    reg.ecg("E1", pr=230, read_kind="confirmed", statements=["Sinus rhythm", "Normal ECG"])
    reg.run()
    row = reg.row("E1")
    assert row["read_kind"] == "confirmed"
    assert row["av_category"] == "normal_pr" and row["av_source"] == "statement_negation"
    assert "override:machine_statement_by_confirmed" in row["evidence"]
    assert "conflict:no_av_block_statement_pr>200" in row["evidence"]


def test_confirmed_read_without_machine_read_is_used_alone(reg):
    # The machine and confirmed reads are paired by a full join: a tracing with only an
    # overread keeps it, and nothing is taken from (or flagged about) a machine read.
    reg.ecg("E1", pr=230, read_kind="confirmed", statements=["Sinus rhythm with 1st degree AV block"])
    reg.ecg("E2", pr=170)
    reg.run()
    row = reg.row("E1")
    assert row["read_kind"] == "confirmed" and row["pr_ms"] == 230
    assert row["av_category"] == "first_degree" and row["av_source"] == "statement"
    assert not any(e.startswith(("override:machine", "fallback:machine")) for e in row["evidence"])
    assert reg.row("E2")["read_kind"] == "machine"


def test_confirmed_read_without_measurements_falls_back_to_machine(reg):
    reg.ecg("E1", pr=250, statements=["Sinus rhythm"])
    reg.ecg("E1", pr=None, qrs=None, axis=None, read_kind="confirmed",
            statements=["Sinus rhythm with 1st degree AV block"])
    reg.run()
    row = reg.row("E1")
    assert row["av_category"] == "first_degree" and row["pr_ms"] == 250
    assert "fallback:machine_measurements" in row["evidence"]


def test_statement_beats_beat_pattern(reg):
    reg.ecg("E1", pr=180, vr=70, ar=70, statements=["Sinus rhythm with 2:1 AV block"])
    _beat_table(reg.con, [("E1", "mobitz_i", 190.0)])
    reg.run()
    row = reg.row("E1")
    assert row["av_category"] == "two_to_one" and row["beat_pattern"] == "mobitz_i"
    assert "override:beat_pattern_by_statement" in row["evidence"]


def test_beat_pattern_beats_measurement(reg):
    reg.ecg("E1", pr=180, statements=["Sinus rhythm"])
    _beat_table(reg.con, [("E1", "mobitz_i", 190.0)])
    reg.run()
    row = reg.row("E1")
    assert row["av_category"] == "mobitz_i" and row["av_source"] == "beat_pattern"
    assert "beat_pattern:mobitz_i" in row["evidence"]
    assert "override:measurement_by_beat_pattern" in row["evidence"]


def test_blocked_pac_pattern_is_not_av_block(reg):
    reg.ecg("E1", pr=170, statements=["Sinus rhythm"])
    _beat_table(reg.con, [("E1", "blocked_pac", 170.0)])
    reg.run()
    row = reg.row("E1")
    assert row["av_category"] == "normal_pr" and row["av_source"] == "measurement"


def test_one_to_one_beat_pattern_graded_by_rule_set_pr(reg):
    reg.ecg("E1", pr=210, statements=["Sinus rhythm"])
    _beat_table(reg.con, [("E1", "first_degree", 210.0)])
    reg.run("default-v1")
    reg.run("pr220-v1")
    assert reg.row("E1", "default-v1")["av_category"] == "first_degree"
    assert reg.row("E1", "pr220-v1")["av_category"] == "normal_pr"


def test_beat_pattern_of_other_rules_id_is_not_used(reg):
    reg.ecg("E1", pr=180, statements=["Sinus rhythm"])
    _beat_table(reg.con, [("E1", "third_degree", None)], rules_id="beats-v0")
    summary = reg.run()
    assert reg.row("E1")["av_category"] == "normal_pr"
    assert any("no rows with rules_id 'beats-v1'" in n for n in summary["notes"])


def test_statement_beats_measurement_and_records_conflict(reg):
    row = one_ecg(reg, qrs=96, statements=["Sinus rhythm", "Right bundle branch block"])
    assert row["ventricular_conduction"] == "rbbb" and row["vc_source"] == "statement"
    assert "conflict:rbbb_statement_qrs<120" in row["evidence"] and row["n_conflicts"] == 1


def test_first_degree_statement_below_threshold_keeps_category_in_default(reg):
    reg.ecg("E1", pr=210, statements=["Sinus rhythm with first degree AV block"])
    reg.run("default-v1")
    reg.run("pr220-v1")
    assert reg.row("E1", "default-v1")["av_category"] == "first_degree"
    pr220 = reg.row("E1", "pr220-v1")
    # pr220-v1 regrades first-degree statements by its own threshold (documented switch).
    assert pr220["av_category"] == "normal_pr"
    assert "override:first_degree_statement_by_pr<220" in pr220["evidence"]


def test_first_degree_statement_with_marked_pr(reg):
    row = one_ecg(reg, pr=320, statements=["Sinus rhythm with first degree AV block"])
    assert row["av_category"] == "marked_first_degree"
    assert "measurement:pr>=300" in row["evidence"]


# --- rhythms where PR is not assessable -------------------------------------------------------

@pytest.mark.parametrize(
    ("statements", "category"),
    [
        (["Atrial fibrillation with rapid ventricular response"], "not_assessable"),
        (["Atrial flutter with 2:1 block"], "not_assessable"),
        (["Ventricular paced rhythm"], "not_assessable"),
        (["Junctional rhythm"], "not_assessable"),
        (["Possible atrial fibrillation"], "not_assessable"),
        (["Atrial fibrillation", "Complete heart block"], "third_degree"),
        (["Ventricular paced rhythm", "Underlying complete heart block"], "third_degree"),
    ],
)
def test_pr_not_assessable_rhythms(reg, statements, category):
    # Common practice, no source: no PR without organised atrial activity or with paced
    # ventricles; complete block stays diagnosable (regular escape).
    row = one_ecg(reg, pr=160, statements=statements)
    assert row["av_category"] == category
    assert row["av_category"] != "normal_pr"


def test_av_statement_in_flutter_is_recorded_as_ignored(reg):
    row = one_ecg(reg, pr=None, statements=["Atrial flutter", "2:1 AV block"])
    assert row["av_category"] == "not_assessable"
    assert "ignored:two_to_one_statement_in_atrial_flutter" in row["evidence"]


def test_flutter_conduction_ratio_is_not_high_grade_block(reg):
    # "4:1 conduction" in flutter is AV-node physiology, not high-grade AV block
    # (common practice, no source).
    row = one_ecg(reg, pr=None, statements=["Atrial flutter with 4:1 A-V conduction"])
    assert row["av_category"] == "not_assessable" and not row["higher_grade"]


def test_beat_level_blocked_pacs_contradicting_statement_recorded(reg):
    reg.ecg("E1", pr=180, statements=["Sinus rhythm", "2nd degree AV block, Mobitz II"])
    _beat_table(reg.con, [("E1", "blocked_pac", 180.0)])
    reg.run()
    row = reg.row("E1")
    assert row["av_category"] == "mobitz_ii"
    assert "conflict:mobitz_ii_statement_beat_pattern_blocked_pac" in row["evidence"]


def test_paced_rhythm_gives_paced_ventricular_conduction(reg):
    row = one_ecg(reg, pr=None, qrs=160, statements=["Ventricular paced rhythm"])
    assert row["rhythm_class"] == "paced" and row["ventricular_conduction"] == "paced"
    assert not row["nonspecific_ivcd"]


def test_ventricular_escape_beside_sinus_is_sinus_rhythm_with_unassessable_qrs(reg):
    # Found by benchmarks/validate_phenotype.py (confirmed reads of third-degree block with a
    # ventricular escape were rhythm "other"). In complete heart block the atria keep their own
    # (sinus) rhythm and the wide escape QRS says nothing about bundle-branch conduction
    # (common practice, no source): rhythm sinus, AV third degree, QRS not assessable.
    row = one_ecg(reg, pr=None, vr=35, ar=75, qrs=150, axis=20,
                  statements=["Sinus rhythm", "Complete heart block", "Ventricular escape rhythm"])
    assert row["rhythm_class"] == "sinus" and row["av_category"] == "third_degree"
    assert row["ventricular_conduction"] == "not_assessable"
    assert "not_assessable:ventricular_rhythm" in row["evidence"]
    assert not row["nonspecific_ivcd"]


def test_idioventricular_rhythm_alone_is_other_rhythm(reg):
    row = one_ecg(reg, pr=None, vr=38, ar=None, qrs=160, statements=["Idioventricular rhythm"])
    assert row["rhythm_class"] == "other"
    assert row["ventricular_conduction"] == "not_assessable"


def test_missing_pr_is_not_assessable(reg):
    row = one_ecg(reg, pr=None, statements=["Sinus rhythm"])
    assert row["av_category"] == "not_assessable"
    assert "not_assessable:pr_missing" in row["evidence"]


def test_rhythm_inferred_from_pr(reg):
    row = one_ecg(reg, pr=170, statements=["Left ventricular hypertrophy"])
    assert row["rhythm_class"] == "sinus" and row["rhythm_source"] == "inferred_from_pr"


# --- inference from rates ---------------------------------------------------------------------

@pytest.mark.parametrize(
    ("vr", "ar", "category", "kind"),
    [(40, 80, "two_to_one", "2to1"), (30, 90, "high_grade", "high"), (70, 70, "normal_pr", None),
     (58, 80, "normal_pr", None)],
)
def test_rate_discordance(reg, vr, ar, category, kind):
    row = one_ecg(reg, vr=vr, ar=ar, pr=170, statements=["Sinus rhythm"])
    assert row["av_category"] == category
    assert row["rate_discordance"] == kind
    assert row["av_inferred"] is (kind is not None)


def test_rate_discordance_never_overrides_statement(reg):
    row = one_ecg(reg, vr=40, ar=80, pr=230, statements=["Sinus rhythm with first degree AV block"])
    assert row["av_category"] == "first_degree" and not row["av_inferred"]
    assert "inferred:rate_discordance_2to1" in row["evidence"]
    assert "override:inferred_by_statement" in row["evidence"]


def test_rate_discordance_suppressed_by_blocked_pacs(reg):
    row = one_ecg(reg, vr=40, ar=80, pr=170, statements=["Sinus rhythm with blocked PACs"])
    assert row["av_category"] == "normal_pr"
    assert "inferred:suppressed_by_blocked_pac" in row["evidence"]


# --- statements -------------------------------------------------------------------------------

def test_uncertain_statement_excluded_by_default(reg):
    row = one_ecg(reg, pr=190, statements=["Possible first degree AV block"])
    assert row["av_category"] == "normal_pr" and row["av_uncertain"]
    assert "uncertain_excluded:first_degree" in row["evidence"]


def test_uncertain_statement_included_by_rule_switch(reg, tmp_path):
    rules = tmp_path / "uncertain-v1.toml"
    rules.write_text(
        '[rule_set]\nid = "uncertain-v1"\nextends = "default-v1"\n'
        "[statements]\ninclude_uncertain = true  # sensitivity: count uncertain findings\n"
    )
    reg.ecg("E1", pr=190, statements=["Possible first degree AV block"])
    reg.run(str(rules))
    row = reg.row("E1", "uncertain-v1")
    assert row["av_category"] == "first_degree" and "uncertain:first_degree" in row["evidence"]


def test_bifascicular_statement_without_parts(reg):
    row = one_ecg(reg, qrs=140, axis=10, statements=["Sinus rhythm", "Bifascicular block"])
    assert row["ventricular_conduction"] == "bifascicular" and row["bifascicular_parts_unknown"]


def test_unspecified_second_degree_is_flagged(reg):
    row = one_ecg(reg, statements=["Sinus rhythm with second degree AV block"])
    assert row["av_category"] == "mobitz_i" and row["av_subtype_unknown"]
    row2 = one_ecg(reg, statements=["Second degree AV block, Mobitz II"])
    assert row2["av_category"] == "mobitz_ii" and not row2["av_subtype_unknown"]


def test_statement_code_is_used(reg):
    row = one_ecg(reg, pr=230, statements=[], codes=["SNOMED:270492004"])
    assert row["av_category"] == "first_degree" and "code:first_degree" in row["evidence"]


def test_preexcitation_is_not_ivcd(reg):
    row = one_ecg(reg, pr=100, qrs=130, statements=["Sinus rhythm", "WPW"])
    assert row["av_category"] == "short_pr" and not row["nonspecific_ivcd"]
    assert row["ventricular_conduction"] == "not_assessable" and row["preexcitation"]


def test_child_qrs_not_judged_by_adult_criteria(reg):
    # Surawicz 2009 gives separate (lower) QRS limits for children (recalled from memory).
    reg.person("C1", birth="2012-05-01")
    row = one_ecg(reg, person="C1", at="2016-05-01 10:00:00", qrs=115)
    assert row["ventricular_conduction"] == "not_assessable"
    assert "not_assessable:pediatric_qrs_criteria" in row["evidence"]


def test_unrecognised_statements_listed(reg):
    from cohort.phenotype import list_unrecognised

    reg.ecg(statements=["Sinus rhythm", "Glorbic wave pattern"])
    reg.ecg(statements=["Glorbic wave pattern"])
    summary = reg.run()
    rows = list_unrecognised(reg.con)
    assert rows[0]["statement"] == "Glorbic wave pattern" and rows[0]["n"] == 2
    assert summary["top_unrecognised"][0]["statement"] == "Glorbic wave pattern"


# --- invariants on a random registry ----------------------------------------------------------

STATEMENT_POOL = [
    ["Sinus rhythm"], ["Normal sinus rhythm", "Normal ECG"], ["Sinus rhythm with 1st degree AV block"],
    ["Atrial fibrillation"], ["Atrial flutter with 2:1 block"], ["Ventricular paced rhythm"],
    ["Sinus rhythm", "RBBB"], ["Sinus rhythm", "LBBB"], ["Sinus bradycardia", "Possible LAFB"],
    ["Junctional rhythm"], ["Sinus rhythm with Mobitz I"], ["Complete heart block"],
    ["Sinus rhythm", "No AV block"], ["Sinus rhythm", "Unreadable stuff"], [],
]


@pytest.fixture(scope="module")
def random_registry():
    rng = np.random.default_rng(20240611)
    con = duckdb.connect(":memory:")
    ensure_schema(con)
    reg = RegistryBuilder(con)
    for p in range(40):
        reg.person(f"P{p}", birth=f"19{40 + p % 40}-06-15")
    for i in range(400):
        kwargs = dict(
            person=f"P{rng.integers(40)}",
            at=f"20{10 + rng.integers(10)}-0{1 + rng.integers(9)}-1{rng.integers(10)} 10:00:00",
            pr=None if rng.random() < 0.1 else float(rng.integers(90, 340)),
            qrs=None if rng.random() < 0.05 else float(rng.integers(70, 170)),
            axis=float(rng.integers(-120, 200)),
            vr=float(rng.integers(30, 120)), ar=float(rng.integers(30, 120)),
            statements=STATEMENT_POOL[rng.integers(len(STATEMENT_POOL))],
        )
        key = reg.ecg(f"R{i}", **kwargs)
        if rng.random() < 0.15:
            kwargs["statements"] = STATEMENT_POOL[rng.integers(len(STATEMENT_POOL))]
            reg.ecg(key, read_kind="confirmed", **kwargs)
    reg.procedure("P3", "2014-02-02", "0JH606Z")
    reg.run("default-v1")
    reg.run("pr220-v1")
    yield reg
    con.close()


def _snapshot(con, table: str, rule_set_id: str) -> list:
    return con.execute(
        f"SELECT * FROM {table} WHERE rule_set_id = ? ORDER BY ALL", [rule_set_id]
    ).fetchall()


@pytest.mark.parametrize("rules", ["default-v1", "pr220-v1"])
def test_one_row_per_ecg_per_rule_set(random_registry, rules):
    con = random_registry.con
    n_keys = con.execute("SELECT count(DISTINCT ecg_key) FROM ecg").fetchall()[0][0]
    n, n_distinct = con.execute(
        "SELECT count(*), count(DISTINCT ecg_key) FROM ecg_conduction WHERE rule_set_id = ?", [rules]
    ).fetchall()[0]
    assert n == n_distinct == n_keys


@pytest.mark.parametrize("rules", ["default-v1", "pr220-v1"])
def test_every_ecg_has_exactly_one_valid_category(random_registry, rules):
    rows = random_registry.con.execute(
        "SELECT av_category, av_grade, ventricular_conduction, rhythm_class, evidence "
        "FROM ecg_conduction WHERE rule_set_id = ?", [rules]
    ).fetchall()
    for av, grade, vc, rhythm, evidence in rows:
        assert av in AV_CATEGORIES and grade == AV_GRADE[av]
        assert vc in VENTRICULAR_CONDUCTION and rhythm in RHYTHM_CLASSES
        assert evidence is not None


@pytest.mark.parametrize("rules", ["default-v1", "pr220-v1"])
def test_no_pr_category_in_af_flutter_paced(random_registry, rules):
    bad = random_registry.con.execute(
        "SELECT count(*) FROM ecg_conduction WHERE rule_set_id = ? "
        "AND rhythm_class IN ('atrial_fibrillation', 'atrial_flutter', 'paced') "
        "AND av_category NOT IN ('not_assessable', 'third_degree', 'high_grade', 'av_dissociation')",
        [rules],
    ).fetchall()[0][0]
    assert bad == 0


def test_confirmed_read_used_when_present(random_registry):
    con = random_registry.con
    mismatches = con.execute(
        "SELECT count(*) FROM ecg_conduction c JOIN ecg e ON e.ecg_key = c.ecg_key "
        "AND e.read_kind = 'confirmed' WHERE c.rule_set_id = 'default-v1' AND c.read_kind <> 'confirmed'"
    ).fetchall()[0][0]
    assert mismatches == 0


def test_rule_sets_side_by_side_and_rerun_idempotent(random_registry):
    con = random_registry.con
    before = {t: _snapshot(con, t, "pr220-v1") for t in ("ecg_conduction", "person_conduction", "ecg_state")}
    default_before = _snapshot(con, "ecg_conduction", "default-v1")
    random_registry.run("default-v1")
    assert _snapshot(con, "ecg_conduction", "default-v1") == default_before
    for table, rows in before.items():
        assert _snapshot(con, table, "pr220-v1") == rows, table
    # pr220-v1 counts fewer first-degree ECGs than default-v1 (stricter threshold).
    counts = dict(con.execute(
        "SELECT rule_set_id, count(*) FILTER (WHERE av_category = 'first_degree') "
        "FROM ecg_conduction GROUP BY 1"
    ).fetchall())
    assert counts["pr220-v1"] < counts["default-v1"]


def test_failed_run_leaves_registry_unchanged(random_registry, monkeypatch):
    import cohort.phenotype.run as runner

    con = random_registry.con
    before = _snapshot(con, "ecg_conduction", "default-v1")
    real = runner.read_sql

    def broken(path):
        if path.endswith("person_conduction.sql"):
            return "SELECT no_such_column FROM person"
        return real(path)

    monkeypatch.setattr(runner, "read_sql", broken)
    with pytest.raises(duckdb.Error):
        random_registry.run("default-v1")
    assert _snapshot(con, "ecg_conduction", "default-v1") == before


def test_summary_counts_add_up(random_registry):
    from cohort.phenotype import summarize

    s = summarize(random_registry.con, "default-v1")
    assert sum(s["av_category"].values()) == s["n_ecg"]
    assert sum(s["ventricular_conduction"].values()) == s["n_ecg"]
    assert sum(s["rhythm_class"].values()) == s["n_ecg"]
