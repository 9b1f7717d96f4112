"""Study spec validation: shipped specs load, the documented example is complete, and
malformed specs give a SpecError naming the key, the line and the fix (never a traceback)."""

from __future__ import annotations

import re
import textwrap
from pathlib import Path

import pytest

from cohort.cli import main
from cohort.errors import SpecError
from cohort.study import load_spec, parse_spec
from cohort.study.analyses import ANALYSIS_KINDS
from cohort.study.schema import index_lines
from cohort.study.spec import (
    SCHEMA_CORRECTION,
    SCHEMA_ENDPOINT,
    SCHEMA_EXCLUSIONS,
    SCHEMA_EXPOSURE,
    SCHEMA_FOLLOW_UP,
    SCHEMA_POPULATION,
    SCHEMA_STUDY,
    SCHEMA_TOP,
    SCHEMA_VARIANT,
)

ROOT = Path(__file__).resolve().parents[2]
DOC = ROOT / "docs" / "study-spec.md"


def _doc_example() -> str:
    return re.search(r"```toml\n(.*?)```", DOC.read_text(encoding="utf-8"), re.S)[1]


@pytest.mark.parametrize("name", ["prevalence.toml", "incidence.toml"])
def test_shipped_specs_are_valid(name):
    spec = load_spec(ROOT / "analyses" / name)
    assert spec.analyses and spec.variants[0].name == "main"


def test_documented_example_is_valid_and_uses_every_key():
    spec = parse_spec(_doc_example(), Path("example.toml"))
    assert [v.name for v in spec.variants] == ["main", "pr220", "narrow_qrs", "lag90"]
    # Re-setting a main exclusion in a variant keeps its position; false switches it off.
    assert [k for k, _ in spec.variant("narrow_qrs").exclusions] == [
        "pacemaker_before_index", "higher_grade_before_index", "qrs_at_least_ms",
        "min_followup_days"]
    text = DOC.read_text(encoding="utf-8")
    schemas = [SCHEMA_TOP, SCHEMA_STUDY, SCHEMA_POPULATION, SCHEMA_EXCLUSIONS, SCHEMA_EXPOSURE,
               SCHEMA_CORRECTION, SCHEMA_FOLLOW_UP, SCHEMA_ENDPOINT, SCHEMA_VARIANT,
               *(k.options for k in ANALYSIS_KINDS.values())]
    missing = [key for schema in schemas for key in schema
               if not any(form in text for form in (f"{key} =", f"`{key}`", f"[{key}]", f"[{key}."))]
    assert not missing, f"keys not documented in docs/study-spec.md: {missing}"


def test_line_index_finds_tables_arrays_and_inline_keys():
    text = '[study]\nid = "x"  # comment with = sign\n[[analyses]]\nkind = "a"\n[[analyses]]\nkind = "b"\nlevels = { a = ["x"], b = ["y"] }\n'
    idx = index_lines(text)
    assert idx[("study", "id")] == 2
    assert idx[("analyses", 0, "kind")] == 4
    assert idx[("analyses", 1, "kind")] == 6
    assert idx[("analyses", 1, "levels", "b")] == 7


GOOD_HEAD = """\
[study]
id = "bad-study"

"""

# (name, spec body after the [study] table, expected line, expected message parts)
MALFORMED = [
    ("unknown_top_section", '[populaton]\nage_from = 18\n[[analyses]]\nkind = "prevalence"\n',
     4, ["unknown key 'populaton'", "did you mean 'population'"]),
    ("unknown_exclusion_key", '[exclusions]\npacemaker_befor_index = true\n[[analyses]]\nkind = "prevalence"\n',
     5, ["pacemaker_befor_index", "did you mean 'pacemaker_before_index'"]),
    ("wrong_type_age", '[population]\nage_from = "18"\n[[analyses]]\nkind = "prevalence"\n',
     5, ["population.age_from", "must be a whole number", "string '18'"]),
    ("bool_not_number", '[exclusions]\nqrs_at_least_ms = true\n[[analyses]]\nkind = "prevalence"\n',
     5, ["exclusions.qrs_at_least_ms", "must be a number", "true/false"]),
    ("unknown_index_kind", '[population]\nindex = "first_ekg"\n[[analyses]]\nkind = "prevalence"\n',
     5, ["'first_ekg'", "did you mean 'first_ecg'", "first_assessable_pr"]),
    ("window_without_in_window_index", '[population]\nindex_window = [2010-01-01, 2011-01-01]\n[[analyses]]\nkind = "prevalence"\n',
     5, ["index_window applies only to", "first_ecg_in_window"]),
    ("in_window_without_window", '[population]\nindex = "first_ecg_in_window"\n[[analyses]]\nkind = "prevalence"\n',
     5, ["needs population.index_window"]),
    ("reversed_window", '[population]\ncalendar_window = [2015-01-01, 2010-01-01]\n[[analyses]]\nkind = "prevalence"\n',
     5, ["starts after it ends"]),
    ("bad_date_text", '[follow_up]\nend_date = "2019-13-45"\n[[analyses]]\nkind = "prevalence"\n',
     5, ["not a date", "YYYY-MM-DD"]),
    ("unknown_rule_set", '[study]\nid = "x"\nrule_set = "default-v2"\n[[analyses]]\nkind = "prevalence"\n',
     None, ["unknown or invalid rule set 'default-v2'", "did you mean 'default-v1'"]),
    ("reference_not_a_level", '[exposure]\nkind = "pr_category"\nreference = "normal"\n[[analyses]]\nkind = "prevalence"\n',
     6, ["reference 'normal' is not among the exposure levels", "did you mean 'normal_pr'"]),
    ("key_of_other_exposure_kind", '[exposure]\nkind = "pr_category"\nknots = [120, 160, 200]\n[[analyses]]\nkind = "prevalence"\n',
     6, ["exposure.knots applies only to kind pr_spline"]),
    ("unknown_av_category", '[exposure]\nkind = "pr_category"\nlevels = { a = ["normal_pr"], b = ["first_degre"] }\n[[analyses]]\nkind = "prevalence"\n',
     6, ["unknown AV category 'first_degre'", "did you mean 'first_degree'"]),
    ("corrected_without_correction", '[exposure]\nkind = "pr_continuous"\nmeasure = "pr_corrected"\n[[analyses]]\nkind = "prevalence"\n',
     6, ["needs an [exposure.correction] table"]),
    ("linear_without_slope", '[exposure]\nkind = "pr_continuous"\nmeasure = "pr_corrected"\n[exposure.correction]\nformula = "linear"\n[[analyses]]\nkind = "prevalence"\n',
     7, ["slope_ms_per_bpm"]),
    ("lag_not_below_horizon", '[follow_up]\nlag_days = 400\nhorizon_years = 1\n[[analyses]]\nkind = "prevalence"\n',
     5, ["lag (400 days) is not shorter than the horizon (365 days)"]),
    ("variant_lag_not_below_horizon", '[follow_up]\nhorizon_years = 1\n[variants.late]\nlag_days = 366\n[[analyses]]\nkind = "prevalence"\n',
     7, ["lag (366 days)", "horizon (365 days)"]),
    ("time_updated_with_prevalence", '[exposure]\nkind = "pr_time_updated"\n[[analyses]]\nkind = "prevalence"\n',
     7, ["cross-sectional", "time-updated exposure"]),
    ("unknown_analysis_kind", '[[analyses]]\nkind = "prevalance"\n',
     5, ["unknown analysis kind 'prevalance'", "did you mean 'prevalence'"]),
    ("unknown_analysis_option", '[[analyses]]\nkind = "prevalence"\nstandard = ["who_2000_2025"]\n',
     6, ["unknown key 'standard'", "did you mean 'standards'"]),
    ("unknown_standard", '[[analyses]]\nkind = "prevalence"\nstandards = ["who_2001"]\n',
     6, ["'who_2001'", "did you mean 'who_2000_2025'"]),
    ("competing_not_declared", '[endpoints.block]\nevent = "higher_grade_block"\ncompeting = ["deaht"]\n[[analyses]]\nkind = "incidence"\n',
     6, ["names 'deaht' in competing", "declare [endpoints.deaht]"]),
    ("bad_event_source", '[endpoints.block]\nevent = "higher_grade_block"\nsource = "procedure"\n[[analyses]]\nkind = "incidence"\n',
     6, ["has no source 'procedure'", "ecg, diagnosis, either"]),
    ("composite_cycle", '[endpoints.a]\nany_of = ["b", "c"]\n[endpoints.b]\nany_of = ["a", "c"]\n[endpoints.c]\nevent = "death"\n[[analyses]]\nkind = "incidence"\n',
     5, ["cycle (a -> b -> a)"]),
    ("incidence_without_endpoints", '[[analyses]]\nkind = "incidence"\n',
     4, ["needs [endpoints.<name>] tables"]),
    ("incidence_by_continuous_exposure", '[exposure]\nkind = "pr_continuous"\n[endpoints.d]\nevent = "death"\n[[analyses]]\nkind = "incidence"\nby = ["exposure"]\n',
     10, ["needs exposure groups", "pr_continuous"]),
    ("age_bands_above_age_from", '[[analyses]]\nkind = "prevalence"\nage_bands = [20, 40, 60]\n',
     6, ["first age band starts at 20", "age_from (18)"]),
    ("duplicate_analysis_names", '[[analyses]]\nkind = "prevalence"\n[[analyses]]\nkind = "prevalence"\n',
     6, ["two analyses are named 'prevalence'"]),
    ("no_analyses", '[population]\nage_from = 18\n',
     None, ["lacks the required key 'analyses'"]),
    ("toml_syntax", '[population\nage_from = 18\n',
     None, ["not valid TOML", "line 4"]),
    ("variant_changes_nothing", '[variants.same]\ndescription = "nothing"\n[[analyses]]\nkind = "prevalence"\n',
     4, ["changes nothing"]),
    ("table_one_group_exposure_without_exposure", '[covariates]\nat_index = ["age"]\n[[analyses]]\nkind = "table_one"\ngroup = "exposure"\n',
     8, ["needs an [exposure] table"]),
    ("unknown_covariate", '[covariates]\nat_index = ["age", "bmi"]\n[[analyses]]\nkind = "prevalence"\n',
     5, ["'bmi'", "allowed"]),
]


@pytest.mark.parametrize("name, body, line, parts", MALFORMED, ids=[m[0] for m in MALFORMED])
def test_malformed_spec_gives_a_located_spec_error(tmp_path, name, body, line, parts):
    text = body if body.startswith("[study]") else GOOD_HEAD + body
    path = tmp_path / "bad.toml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(SpecError) as info:
        load_spec(path)
    message = str(info.value)
    assert message.startswith("bad.toml")
    if line is not None:
        assert f"bad.toml, line {line}:" in message, message
    for part in parts:
        assert part in message, message


def test_at_least_fifteen_malformed_cases():
    assert len(MALFORMED) >= 15


def test_missing_spec_file(tmp_path):
    with pytest.raises(SpecError, match="not found"):
        load_spec(tmp_path / "nowhere.toml")


def test_cli_reports_a_bad_spec_with_exit_code_and_no_traceback(tmp_path, capsys):
    path = tmp_path / "bad.toml"
    path.write_text(GOOD_HEAD + textwrap.dedent('''\
        [exclusions]
        pacemaker_befor_index = true
        [[analyses]]
        kind = "prevalence"
        '''), encoding="utf-8")
    code = main(["run", str(path), "--db", str(tmp_path / "r.duckdb"), "--out", str(tmp_path / "o")])
    err = capsys.readouterr().err
    assert code == 2
    assert "dromos run: error: bad.toml, line 5: unknown key 'pacemaker_befor_index'" in err
    assert "Traceback" not in err
    assert main(["run", str(ROOT / "analyses" / "incidence.toml"), "--check"]) == 0


def test_cli_reports_a_registry_without_the_rule_set(tmp_path, capsys, tiny):
    db = tmp_path / "empty.duckdb"
    from cohort.registry import connect

    connect(db).close()
    code = main(["run", str(ROOT / "analyses" / "prevalence.toml"), "--db", str(db),
                 "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err
    assert code == 2
    assert "rule set default-v1 has not been run on this registry" in err
    assert "dromos phenotype" in err


def test_any_wrong_value_gives_a_spec_error_not_a_traceback():
    """Replace the value of every key of the documented example by values of other types:
    each variant either validates or raises SpecError (never another exception)."""
    lines = _doc_example().splitlines()
    replacements = ("true", '"x"', "-3", "[1, 2]", "{ a = 1 }", "[]", "2010-01-01")
    outcomes = {"ok": 0, "error": 0}
    for i, line in enumerate(lines):
        code = line.split("#")[0]
        if "=" not in code or code.lstrip().startswith("["):
            continue
        key = code.split("=")[0]
        for value in replacements:
            text = "\n".join([*lines[:i], f"{key}= {value}", *lines[i + 1:]])
            try:
                parse_spec(text, Path("fuzz.toml"))
                outcomes["ok"] += 1
            except SpecError as exc:
                assert str(exc).startswith("fuzz.toml")
                outcomes["error"] += 1
    for i in range(len(lines)):  # and with each line left out
        try:
            parse_spec("\n".join(lines[:i] + lines[i + 1:]), Path("fuzz.toml"))
            outcomes["ok"] += 1
        except SpecError as exc:
            assert str(exc).startswith("fuzz.toml")
            outcomes["error"] += 1
    assert outcomes["error"] > 200 and outcomes["ok"] > 0
