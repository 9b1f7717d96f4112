"""``dromos run`` report options and shipped spec names."""

from __future__ import annotations

import json

import pytest

from cohort.cli import main
from cohort.errors import SpecError
from cohort.study.shipped import resolve_spec, shipped_specs


def test_shipped_specs_resolve_by_name():
    names = set(shipped_specs())
    assert {"prevalence", "incidence", "progression", "pacemaker", "site_quality"} <= names
    assert resolve_spec("pacemaker") == shipped_specs()["pacemaker"]
    assert resolve_spec("pacemaker.toml") == shipped_specs()["pacemaker"]


def test_unknown_spec_name_lists_the_shipped_ones(tmp_path):
    with pytest.raises(SpecError, match="prevalence"):
        resolve_spec(tmp_path / "nothing.toml")


def test_run_by_name_with_a_custom_threshold(synthetic_db, tmp_path, capsys):
    out = tmp_path / "incidence"
    code = main(["run", "incidence", "--db", str(synthetic_db["db"]), "--out", str(out),
                 "--suppress-below", "5"])
    assert code == 0
    printed = capsys.readouterr().out
    assert "counts below 5 withheld" in printed and str(out / "report.html") in printed
    log = json.loads((out / "disclosure.json").read_text(encoding="utf-8"))
    assert log["enabled"] and log["threshold"] == 5
    assert (out / "manifest.json").is_file()


def test_tables_only_writes_no_report(synthetic_db, tmp_path, capsys):
    out = tmp_path / "incidence"
    assert main(["run", "incidence", "--db", str(synthetic_db["db"]), "--out", str(out),
                 "--tables-only"]) == 0
    assert "NOT disclosure-controlled" in capsys.readouterr().out
    assert (out / "tables").is_dir()
    assert not (out / "report.html").exists() and not (out / "manifest.json").exists()


@pytest.mark.parametrize("extra", [["--suppress-below", "1"],
                                   ["--suppress-below", "5", "--no-disclosure-control"]])
def test_contradictory_disclosure_options_are_refused(synthetic_db, tmp_path, capsys, extra):
    code = main(["run", "incidence", "--db", str(synthetic_db["db"]), "--out", str(tmp_path / "x"),
                 *extra])
    assert code != 0
    assert "--suppress-below" in capsys.readouterr().err
    assert not (tmp_path / "x").exists()


def test_no_disclosure_control_is_announced(synthetic_db, tmp_path, capsys):
    out = tmp_path / "incidence"
    assert main(["run", "incidence", "--db", str(synthetic_db["db"]), "--out", str(out),
                 "--no-disclosure-control"]) == 0
    assert "disclosure control OFF" in capsys.readouterr().out
    assert "Disclosure control: OFF" in (out / "report.html").read_text(encoding="utf-8")
