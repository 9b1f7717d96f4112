"""Rule-set files: shipped values against their published sources, loading and validation."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from cohort.errors import RuleSetError
from cohort.phenotype.rules import (
    RULES_DIR,
    available_rule_sets,
    category_rows,
    code_rows,
    load_rule_set,
    param_row,
)
from cohort.vocabulary import AV_CATEGORIES, AV_GRADE


@pytest.fixture
def default():
    return load_rule_set("default-v1")


def test_shipped_rule_sets_load():
    ids = available_rule_sets()
    assert {"default-v1", "pr220-v1", "persist90-v1"} <= set(ids)
    for rule_id in ids:
        assert load_rule_set(rule_id).id == rule_id


def test_first_degree_threshold_is_kusumoto_2018(default):
    # Kusumoto FM et al. 2018 ACC/AHA/HRS bradycardia guideline: first-degree AV block is
    # PR > 200 ms (strictly greater), as quoted in references.md.
    assert default.get("pr", "first_degree_ms") == 200
    assert default.get("pr", "first_degree_inclusive") is False


def test_pr_common_practice_values(default):
    # Short PR < 120 ms and marked first degree >= 300 ms: common practice, no source.
    assert default.get("pr", "short_below_ms") == 120
    assert default.get("pr", "marked_first_degree_ms") == 300
    assert default.get("pr", "marked_first_degree_inclusive") is True


def test_qrs_and_axis_values_are_surawicz_2009(default):
    # Surawicz B et al. Circulation 2009;119:e235 (AHA/ACCF/HRS Part III): complete BBB
    # QRS >= 120 ms, incomplete 110-119 ms, nonspecific IVCD QRS > 110 ms, LAFB axis -45 to
    # -90 with QRS < 120 ms, LPFB axis +90 to +180 with QRS < 120 ms.
    assert default.get("qrs", "complete_bbb_min_ms") == 120
    assert default.get("qrs", "incomplete_bbb_min_ms") == 110
    assert default.get("qrs", "ivcd_above_ms") == 110
    assert default.get("qrs", "fascicular_below_ms") == 120
    assert (default.get("axis", "lafb_min_deg"), default.get("axis", "lafb_max_deg")) == (-90, -45)
    assert (default.get("axis", "lpfb_min_deg"), default.get("axis", "lpfb_max_deg")) == (90, 180)


def test_higher_grade_list_keeps_mobitz_i_apart(default):
    assert set(default.get("av", "higher_grade")) == {"mobitz_ii", "two_to_one", "high_grade", "third_degree"}
    higher = {r["av_category"] for r in category_rows(default) if r["is_higher_grade"]}
    assert "mobitz_i" not in higher


def test_pacemaker_codes_are_table_0jh6_devices_4_to_7(default):
    # ICD-10-PCS (CMS): table 0JH6 device values 4, 5, 6, 7 are pacemakers; 8 and 9 are
    # defibrillators, not pacemakers (references.md). Character 6 is the device.
    codes = default.get("codes", "pacemaker_implant")
    assert codes, "no pacemaker codes"
    assert all(c.startswith("0JH6") and len(c) == 7 for c in codes)
    assert {c[5] for c in codes} == {"4", "5", "6", "7"}
    assert not any(c[5] in "89" for c in codes)


def test_icd10cm_conduction_codes(default):
    # ICD-10-CM I44.x / I45.x conduction codes (recalled from memory, references.md level M).
    rows = {r["code"]: r for r in code_rows(default) if r["list_name"] == "diagnosis"}
    assert rows["I440"]["category"] == "first_degree"
    assert rows["I442"]["category"] == "third_degree" and rows["I442"]["is_higher_grade"]
    assert rows["I441"]["category"] == "second_degree" and not rows["I441"]["is_higher_grade"]
    assert rows["I447"]["category"] == "lbbb"
    assert rows["I452"]["category"] == "bifascicular"


def test_category_rows_follow_vocabulary(default):
    rows = category_rows(default)
    assert [r["av_category"] for r in rows] == list(AV_CATEGORIES)
    assert all(r["av_grade"] == AV_GRADE[r["av_category"]] for r in rows)


def test_pr220_extends_default():
    rs = load_rule_set("pr220-v1")
    default = load_rule_set("default-v1")
    assert rs.get("pr", "first_degree_ms") == 220 and rs.get("pr", "first_degree_inclusive")
    assert rs.get("qrs", "complete_bbb_min_ms") == default.get("qrs", "complete_bbb_min_ms")
    assert param_row(rs)["lbl_pr_first"] == "pr>=220"
    assert param_row(default)["lbl_pr_first"] == "pr>200"
    assert rs.sha256 != default.sha256


def test_persistence_variant():
    rs = load_rule_set("persist90-v1")
    assert rs.get("persistence", "min_days_apart") == 90
    assert rs.get("pr", "first_degree_ms") == 200


def _copy_rules(tmp_path: Path, text: str, name: str = "my-v1") -> Path:
    shutil.copy(RULES_DIR / "default-v1.toml", tmp_path / "default-v1.toml")
    shutil.copy(RULES_DIR / "lexicon-v1.toml", tmp_path / "lexicon-v1.toml")
    path = tmp_path / f"{name}.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_unknown_key_names_key_and_file(tmp_path):
    path = _copy_rules(tmp_path, '[rule_set]\nid = "my-v1"\nextends = "default-v1"\n[pr]\nfrist_degree_ms = 210\n')
    with pytest.raises(RuleSetError, match=r"unknown key 'pr.frist_degree_ms' in .*my-v1.toml"):
        load_rule_set(path)


def test_unknown_section(tmp_path):
    path = _copy_rules(tmp_path, '[rule_set]\nid = "my-v1"\nextends = "default-v1"\n[prr]\nx = 1\n')
    with pytest.raises(RuleSetError, match=r"unknown section \[prr\]"):
        load_rule_set(path)


def test_wrong_type_names_key(tmp_path):
    path = _copy_rules(tmp_path, '[rule_set]\nid = "my-v1"\nextends = "default-v1"\n[pr]\nfirst_degree_ms = "200"\n')
    with pytest.raises(RuleSetError, match=r"key 'pr.first_degree_ms' in .*my-v1.toml must be int/float, got str"):
        load_rule_set(path)


def test_bool_is_not_a_number(tmp_path):
    path = _copy_rules(tmp_path, '[rule_set]\nid = "my-v1"\nextends = "default-v1"\n[pr]\nfirst_degree_ms = true\n')
    with pytest.raises(RuleSetError, match="pr.first_degree_ms"):
        load_rule_set(path)


def test_unknown_category_code(tmp_path):
    path = _copy_rules(tmp_path, '[rule_set]\nid = "my-v1"\nextends = "default-v1"\n[av]\nhigher_grade = ["mobitz_2"]\n')
    with pytest.raises(RuleSetError, match=r"av.higher_grade.*unknown codes \['mobitz_2'\]"):
        load_rule_set(path)


def test_threshold_order_checked(tmp_path):
    path = _copy_rules(tmp_path, '[rule_set]\nid = "my-v1"\nextends = "default-v1"\n[pr]\nmarked_first_degree_ms = 150\n')
    with pytest.raises(RuleSetError, match="first_degree_ms <= pr.marked_first_degree_ms"):
        load_rule_set(path)


def test_id_must_match_file_name(tmp_path):
    path = _copy_rules(tmp_path, '[rule_set]\nid = "other-v1"\nextends = "default-v1"\n')
    with pytest.raises(RuleSetError, match="rename the file"):
        load_rule_set(path)


def test_missing_key(tmp_path):
    text = (RULES_DIR / "default-v1.toml").read_text().replace('id = "default-v1"', 'id = "my-v1"')
    text = text.replace("short_below_ms = 120", "")
    path = _copy_rules(tmp_path, text)
    with pytest.raises(RuleSetError, match="missing key 'pr.short_below_ms'"):
        load_rule_set(path)


def test_extends_cycle(tmp_path):
    (tmp_path / "a-v1.toml").write_text('[rule_set]\nid = "a-v1"\nextends = "b-v1"\n')
    (tmp_path / "b-v1.toml").write_text('[rule_set]\nid = "b-v1"\nextends = "a-v1"\n')
    with pytest.raises(RuleSetError, match="cycle"):
        load_rule_set(tmp_path / "a-v1.toml")


def test_unknown_rule_set_lists_known():
    with pytest.raises(RuleSetError, match="known rule sets: .*default-v1"):
        load_rule_set("no-such-v9")


def test_invalid_toml(tmp_path):
    path = tmp_path / "bad-v1.toml"
    path.write_text("[rule_set\nid=", encoding="utf-8")
    with pytest.raises(RuleSetError, match="not valid TOML"):
        load_rule_set(path)


def test_every_value_has_a_source_comment():
    # The rule files say where each number comes from (source name or "common practice").
    for name in ("default-v1.toml", "pr220-v1.toml", "persist90-v1.toml"):
        for line in (RULES_DIR / name).read_text().splitlines():
            stripped = line.strip()
            if "=" in stripped and not stripped.startswith("#") and stripped.split("=")[1].strip()[:1].isdigit():
                assert "#" in stripped, f"{name}: no source comment on: {stripped}"
