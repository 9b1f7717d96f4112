"""CLI subcommands ``dromos phenotype`` / ``dromos explain`` and the explain API."""

from __future__ import annotations

import json

import pytest

from cohort.cli import main
from cohort.errors import DataError
from cohort.phenotype import explain_ecg, format_explanation
from cohort.registry import connect


@pytest.fixture
def db(tmp_path):
    path = tmp_path / "registry.duckdb"
    con = connect(path)
    con.execute("INSERT INTO person VALUES ('P1', '1951-02-03', 'M', 'Quayside', NULL, '2024-12-31', 't')")
    con.execute(
        "INSERT INTO ecg (ecg_key, person_key, acquired_at, read_kind, ventricular_rate, atrial_rate, "
        "pr_ms, qrs_ms, qrs_axis, statements, statement_codes, source_id) VALUES "
        "('T1', 'P1', '2016-04-05 08:00', 'machine', 64, 64, 236, 128, -55, "
        "['Sinus rhythm with first degree AV block', 'RBBB'], [], 't'), "
        "('T1', 'P1', '2016-04-05 08:00', 'confirmed', 64, 64, 236, 128, -55, "
        "['Sinus rhythm, 1st degree AVB', 'RBBB and LAFB', 'Blorptastic wave'], [], 't')"
    )
    con.close()
    return path


def test_phenotype_command_prints_counts(db, capsys):
    assert main(["phenotype", "--db", str(db), "--skip-beats"]) == 0
    out = capsys.readouterr().out
    assert "rule set default-v1: 1 ECGs, 1 persons" in out
    assert "first_degree" in out and "bifascicular" in out
    assert "Blorptastic wave" in out


def test_phenotype_two_rule_sets_and_json(db, capsys):
    assert main(["phenotype", "--db", str(db), "--rules", "default-v1", "--rules", "pr220-v1", "--json"]) == 0
    out = capsys.readouterr().out
    assert out.count('"rule_set_id"') >= 2


def test_list_unrecognised(db, capsys):
    main(["phenotype", "--db", str(db)])
    capsys.readouterr()
    assert main(["phenotype", "--db", str(db), "--list-unrecognised"]) == 0
    out = capsys.readouterr().out
    assert "'Blorptastic wave'" in out and "blorptastic wave" in out


def test_list_unrecognised_before_run_is_an_error(db, capsys):
    assert main(["phenotype", "--db", str(db), "--list-unrecognised"]) != 0
    assert "run 'dromos phenotype" in capsys.readouterr().err


def test_missing_registry_is_an_error(tmp_path, capsys):
    assert main(["phenotype", "--db", str(tmp_path / "nope.duckdb")]) != 0
    assert "does not exist" in capsys.readouterr().err


def test_unknown_rule_set_is_an_error(db, capsys):
    assert main(["phenotype", "--db", str(db), "--rules", "nonsense-v7"]) != 0
    assert "known rule sets" in capsys.readouterr().err


def test_explain_command(db, capsys):
    main(["phenotype", "--db", str(db)])
    capsys.readouterr()
    assert main(["explain", "--db", str(db), "--ecg", "T1"]) == 0
    out = capsys.readouterr().out
    assert "read used: confirmed" in out
    assert "bifascicular" in out
    assert "override:machine_statement_by_confirmed" in out
    assert "Overridden lower-precedence sources" in out
    assert "'RBBB and LAFB' -> vc:lafb; vc:rbbb" in out


def test_explain_json(db, capsys):
    main(["phenotype", "--db", str(db)])
    capsys.readouterr()
    assert main(["explain", "--db", str(db), "--ecg", "T1", "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["categories"]["av_category"] == "first_degree"


def test_explain_api(db):
    con = connect(db)
    from cohort.phenotype import run_phenotype

    run_phenotype(con)
    result = explain_ecg(con, "T1")
    assert result["read_used"] == "confirmed"
    assert result["categories"]["ventricular_conduction"] == "bifascicular"
    assert [r["read_kind"] for r in result["reads"]] == ["confirmed", "machine"]
    assert any("machine statements gave" in o for o in result["overridden"])
    assert "Rules that fired" in format_explanation(result)
    with pytest.raises(DataError, match="not in table ecg"):
        explain_ecg(con, "NOPE")
    con.close()


def test_progress_callable(db):
    con = connect(db)
    from cohort.phenotype import run_phenotype
    from cohort.phenotype.run import STEPS

    seen = []
    run_phenotype(con, progress=lambda step, i, n: seen.append((step, i, n)))
    assert [s for s, _, _ in seen] == list(STEPS)
    con.close()
