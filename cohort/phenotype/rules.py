"""Load and validate phenotype rule sets (``cohort/rules/<id>.toml``).

A rule set is data: thresholds, the pointer to a statement lexicon and code lists. A file may
``extends`` another rule set and override single keys, so a sensitivity rule set states only
what differs. Every problem raises :class:`cohort.errors.RuleSetError` naming the key and the
file, with the fix.
"""

from __future__ import annotations

import copy
import hashlib
import json
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from cohort.errors import RuleSetError
from cohort.vocabulary import AV_CATEGORIES, AV_GRADE, RHYTHM_CLASSES, VENTRICULAR_CONDUCTION

RULES_DIR = Path(__file__).resolve().parents[1] / "rules"

# Lexicon rhythm findings that may appear in [rhythm] rank, and the rhythm class each gives.
RHYTHM_FINDING_CLASS: dict[str, str] = {
    "sinus": "sinus",
    "atrial_fibrillation": "atrial_fibrillation",
    "atrial_flutter": "atrial_flutter",
    "junctional": "junctional",
    "paced_atrial": "paced",
    "paced_ventricular": "paced",
    "ventricular": "other",
    "other": "other",
}
AV_STATEMENT_CATEGORIES = tuple(c for c in AV_CATEGORIES if c not in ("normal_pr", "not_assessable"))
# Categories that only diagnosis codes carry (ICD-10-CM is coarser or different from ECG codes).
DIAGNOSIS_ONLY_CATEGORIES = ("second_degree", "av_block_unspecified", "trifascicular")

_NUMBER = (int, float)

# Schema: section -> key -> (python types, checker or None). Checkers return an error text.
_Spec = dict[str, dict[str, tuple[tuple[type, ...], Any]]]


def _one_of(allowed) -> Any:
    def check(value):
        return None if value in allowed else f"must be one of {sorted(allowed)}"

    return check


def _list_of(allowed) -> Any:
    def check(value):
        if not all(isinstance(v, str) for v in value):
            return "must be a list of strings"
        bad = [v for v in value if v not in allowed]
        return f"has unknown codes {bad}; allowed: {sorted(allowed)}" if bad else None

    return check


def _str_list(value):
    return None if all(isinstance(v, str) for v in value) else "must be a list of strings"


SCHEMA: _Spec = {
    "rule_set": {
        "id": ((str,), None),
        "description": ((str,), None),
        "lexicon": ((str,), None),
        "beats_rules_id": ((str,), None),
        "extends": ((str,), None),
    },
    "pr": {
        "short_below_ms": (_NUMBER, None),
        "first_degree_ms": (_NUMBER, None),
        "first_degree_inclusive": ((bool,), None),
        "marked_first_degree_ms": (_NUMBER, None),
        "marked_first_degree_inclusive": ((bool,), None),
    },
    "qrs": {
        "complete_bbb_min_ms": (_NUMBER, None),
        "incomplete_bbb_min_ms": (_NUMBER, None),
        "ivcd_above_ms": (_NUMBER, None),
        "fascicular_below_ms": (_NUMBER, None),
        "adult_min_age_years": (_NUMBER, None),
    },
    "axis": {
        "lafb_min_deg": (_NUMBER, None),
        "lafb_max_deg": (_NUMBER, None),
        "lpfb_min_deg": (_NUMBER, None),
        "lpfb_max_deg": (_NUMBER, None),
        "fascicular_from_axis": ((bool,), None),
        "axis_statement_blocks_fascicular": ((bool,), None),
    },
    "statements": {
        "include_uncertain": ((bool,), None),
        "unspecified_second_degree_as": ((str,), _one_of(("mobitz_i", "mobitz_ii"))),
        "uncertain_rhythm_blocks_pr": ((bool,), None),
        "pr_threshold_overrides_first_degree_statement": ((bool,), None),
    },
    "rhythm": {
        "rank": ((list,), _list_of(RHYTHM_FINDING_CLASS)),
        "pr_not_assessable": ((list,), _list_of(RHYTHM_CLASSES)),
        "infer_sinus_from_pr": ((bool,), None),
    },
    "av": {
        "statement_rank": ((list,), _list_of(AV_STATEMENT_CATEGORIES)),
        "accepted_when_pr_not_assessable": ((list,), _list_of(AV_STATEMENT_CATEGORIES)),
        "higher_grade": ((list,), _list_of(AV_CATEGORIES)),
    },
    "ventricular": {
        "rank": ((list,), _list_of(VENTRICULAR_CONDUCTION)),
        "unspecified_bbb_as": ((str,), _one_of(VENTRICULAR_CONDUCTION)),
    },
    "rate_discordance": {
        "enabled": ((bool,), None),
        "max_ventricular_rate_bpm": (_NUMBER, None),
        "two_to_one_min_ratio": (_NUMBER, None),
        "two_to_one_max_ratio": (_NUMBER, None),
        "sets_category": ((bool,), None),
    },
    "persistence": {
        "min_ecgs": ((int,), None),
        "min_days_apart": ((int,), None),
    },
    "state": {
        "order": ((list,), _str_list),
        "unknown": ((str,), None),
        "map": ((dict,), None),
    },
    "codes": {
        "diagnosis_system": ((str,), None),
        "procedure_system": ((str,), None),
        "diagnosis": ((list,), None),
        "pacemaker_implant": ((list,), _str_list),
        "pacemaker_presence_dx": ((list,), _str_list),
    },
}
OPTIONAL_KEYS = {("rule_set", "extends"), ("rule_set", "description")}
_DIAGNOSIS_KEYS = {"code", "axis", "category"}


@dataclass(frozen=True)
class RuleSet:
    """A validated rule set: ``data`` is the merged TOML (after ``extends``)."""

    id: str
    path: Path
    data: dict
    lexicon_path: Path
    sha256: str

    def get(self, section: str, key: str) -> Any:
        """Value of ``[section] key``."""
        return self.data[section][key]


def available_rule_sets(folder: Path = RULES_DIR) -> list[str]:
    """Ids of the rule sets shipped in ``folder`` (files with a ``[rule_set]`` table)."""
    ids = []
    for path in sorted(folder.glob("*.toml")):
        try:
            data = tomllib.loads(path.read_text(encoding="utf-8"))
        except (tomllib.TOMLDecodeError, OSError):
            continue
        table = data.get("rule_set")
        if isinstance(table, dict) and ("pr" in data or "extends" in table):
            ids.append(path.stem)
    return ids


def resolve_rule_path(rule: str | Path, folder: Path = RULES_DIR) -> Path:
    """Path of a rule set given its id (``default-v1``) or a path to a TOML file."""
    text = str(rule)
    if text.endswith(".toml") or "/" in text or "\\" in text:
        path = Path(text)
    else:
        path = folder / f"{text}.toml"
    if not path.is_file():
        known = ", ".join(available_rule_sets(folder)) or "none"
        raise RuleSetError(
            f"rule set '{rule}' not found (looked for {path}); known rule sets: {known}. "
            "Pass an id from cohort/rules/ or a path to a .toml rule file."
        )
    return path


def _read_toml(path: Path) -> dict:
    try:
        return tomllib.loads(path.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as exc:
        raise RuleSetError(f"rule file {path} is not valid TOML: {exc}; fix the syntax") from exc


def _merge(base: dict, override: dict) -> dict:
    """Deep merge of tables; arrays and scalars of ``override`` replace the base value."""
    merged = copy.deepcopy(base)
    for key, value in override.items():
        if isinstance(value, dict) and isinstance(merged.get(key), dict) and key != "map":
            merged[key] = _merge(merged[key], value)
        else:
            merged[key] = copy.deepcopy(value)
    return merged


def _load_raw(path: Path, seen: tuple[Path, ...] = ()) -> tuple[dict, list[Path]]:
    """TOML of ``path`` merged over its ``extends`` chain; also the files read."""
    if path.resolve() in seen:
        chain = " -> ".join(p.name for p in (*seen, path))
        raise RuleSetError(f"rule file {path}: 'rule_set.extends' forms a cycle ({chain})")
    data = _read_toml(path)
    _check_unknown_keys(data, path)
    parent = data.get("rule_set", {}).get("extends")
    if parent is None:
        return data, [path]
    if not isinstance(parent, str):
        raise RuleSetError(f"key 'rule_set.extends' in {path} must be a rule set id (string)")
    # The base is looked for beside the file first, then among the shipped rule sets.
    local = path.parent / f"{parent}.toml"
    parent_path = local if local.is_file() else resolve_rule_path(parent, RULES_DIR)
    base, files = _load_raw(parent_path, (*seen, path.resolve()))
    base.get("rule_set", {}).pop("extends", None)
    base.get("rule_set", {}).pop("description", None)
    return _merge(base, data), [*files, path]


def _check_unknown_keys(data: dict, path: Path) -> None:
    for section, table in data.items():
        if section not in SCHEMA:
            raise RuleSetError(
                f"unknown section [{section}] in {path}; known sections: "
                f"{', '.join(SCHEMA)}. Fix the spelling or remove it."
            )
        if not isinstance(table, dict):
            raise RuleSetError(f"key '{section}' in {path} must be a table ([{section}])")
        for key in table:
            if key not in SCHEMA[section]:
                raise RuleSetError(
                    f"unknown key '{section}.{key}' in {path}; known keys in [{section}]: "
                    f"{', '.join(SCHEMA[section])}. Fix the spelling or remove it."
                )


def _check_types(data: dict, path: Path) -> None:
    for section, keys in SCHEMA.items():
        for key, (types, checker) in keys.items():
            value = data.get(section, {}).get(key)
            if value is None:
                if (section, key) in OPTIONAL_KEYS:
                    continue
                raise RuleSetError(f"missing key '{section}.{key}' in {path}; add it")
            ok = isinstance(value, types) and not (bool in (type(value),) and bool not in types)
            if not ok:
                names = "/".join(t.__name__ for t in types)
                raise RuleSetError(
                    f"key '{section}.{key}' in {path} must be {names}, got "
                    f"{type(value).__name__} {value!r}"
                )
            problem = checker(value) if checker else None
            if problem:
                raise RuleSetError(f"key '{section}.{key}' in {path} {problem}")


def _check_values(data: dict, path: Path) -> None:
    """Cross-key checks: ordered thresholds, valid ranges, complete maps and code lists."""
    pr, qrs, axis = data["pr"], data["qrs"], data["axis"]
    rd = data["rate_discordance"]
    checks = [
        (pr["short_below_ms"] <= pr["first_degree_ms"], "pr.short_below_ms <= pr.first_degree_ms"),
        (
            pr["first_degree_ms"] <= pr["marked_first_degree_ms"],
            "pr.first_degree_ms <= pr.marked_first_degree_ms",
        ),
        (
            qrs["incomplete_bbb_min_ms"] <= qrs["complete_bbb_min_ms"],
            "qrs.incomplete_bbb_min_ms <= qrs.complete_bbb_min_ms",
        ),
        (axis["lafb_min_deg"] <= axis["lafb_max_deg"], "axis.lafb_min_deg <= axis.lafb_max_deg"),
        (axis["lpfb_min_deg"] <= axis["lpfb_max_deg"], "axis.lpfb_min_deg <= axis.lpfb_max_deg"),
        (
            all(-180 <= axis[k] <= 180 for k in axis if k.endswith("_deg")),
            "axis limits within -180..180 degrees",
        ),
        (
            0 < rd["two_to_one_min_ratio"] <= rd["two_to_one_max_ratio"],
            "0 < rate_discordance.two_to_one_min_ratio <= two_to_one_max_ratio",
        ),
        (data["persistence"]["min_ecgs"] >= 1, "persistence.min_ecgs >= 1"),
        (data["persistence"]["min_days_apart"] >= 0, "persistence.min_days_apart >= 0"),
    ]
    for ok, rule in checks:
        if not ok:
            raise RuleSetError(f"rule file {path} breaks the rule {rule}; fix the values")
    _check_complete_list(data["rhythm"]["rank"], RHYTHM_FINDING_CLASS, "rhythm.rank", path)
    _check_complete_list(data["av"]["statement_rank"], AV_STATEMENT_CATEGORIES, "av.statement_rank", path)
    _check_complete_list(data["ventricular"]["rank"], VENTRICULAR_CONDUCTION.keys() - {"not_assessable"}, "ventricular.rank", path)
    _check_state(data["state"], path)
    _check_diagnosis_codes(data["codes"]["diagnosis"], path)


def _check_complete_list(values: list, required, key: str, path: Path) -> None:
    missing = [c for c in required if c not in values]
    if missing or len(set(values)) != len(values):
        raise RuleSetError(
            f"key '{key}' in {path} must list each of {sorted(required)} once; "
            f"missing {missing}" + ("; has duplicates" if len(set(values)) != len(values) else "")
        )


def _check_state(state: dict, path: Path) -> None:
    allowed = set(state["order"]) | {state["unknown"]}
    missing = [c for c in AV_CATEGORIES if c not in state["map"]]
    extra = [c for c in state["map"] if c not in AV_CATEGORIES]
    bad = sorted({v for v in state["map"].values() if v not in allowed})
    if missing or extra or bad:
        raise RuleSetError(
            f"key 'state.map' in {path} must map every AV category to a state in state.order "
            f"or state.unknown: missing {missing}, unknown categories {extra}, unknown states {bad}"
        )
    if "paced" not in state["order"]:
        raise RuleSetError(f"key 'state.order' in {path} must contain 'paced'")


def _check_diagnosis_codes(rows: list, path: Path) -> None:
    allowed = set(AV_CATEGORIES) | set(VENTRICULAR_CONDUCTION) | set(DIAGNOSIS_ONLY_CATEGORIES)
    for i, row in enumerate(rows, start=1):
        if not isinstance(row, dict) or set(row) != _DIAGNOSIS_KEYS:
            raise RuleSetError(
                f"entry {i} of 'codes.diagnosis' in {path} must be a table with keys "
                f"{sorted(_DIAGNOSIS_KEYS)}, got {row!r}"
            )
        if row["axis"] not in ("av", "vc") or row["category"] not in allowed:
            raise RuleSetError(
                f"entry {i} of 'codes.diagnosis' in {path} ({row['code']}): axis must be 'av' or "
                f"'vc' and category one of {sorted(allowed)}"
            )


def load_rule_set(rule: str | Path = "default-v1", folder: Path = RULES_DIR) -> RuleSet:
    """Read, merge (``extends``) and validate a rule set; raises RuleSetError on any problem."""
    path = resolve_rule_path(rule, folder)
    data, files = _load_raw(path)
    _check_types(data, path)
    _check_values(data, path)
    rule_id = data["rule_set"]["id"]
    if rule_id != path.stem:
        raise RuleSetError(
            f"key 'rule_set.id' in {path} is '{rule_id}' but the file is named {path.name}; "
            f"rename the file to {rule_id}.toml or fix the id"
        )
    lexicon_path = _lexicon_path(data["rule_set"]["lexicon"], files)
    digest = hashlib.sha256(json.dumps(data, sort_keys=True).encode())
    digest.update(lexicon_path.read_bytes())
    return RuleSet(rule_id, path, data, lexicon_path, digest.hexdigest())


def _lexicon_path(name: str, files: list[Path]) -> Path:
    """Lexicon file: beside the rule file that names it, else in the shipped rules folder."""
    for folder in [f.parent for f in reversed(files)] + [RULES_DIR]:
        candidate = folder / name
        if candidate.is_file():
            return candidate
    raise RuleSetError(
        f"key 'rule_set.lexicon' in {files[-1]} names '{name}', which is not in "
        f"{files[-1].parent} nor {RULES_DIR}; put the lexicon file beside the rule file"
    )


def _fmt(value: float) -> str:
    """Threshold as text for evidence labels: 200 not 200.0."""
    return str(int(value)) if float(value).is_integer() else str(value)


def param_row(rs: RuleSet) -> dict[str, Any]:
    """The one-row ``rule_param`` table of a rule set (thresholds, switches, evidence labels)."""
    pr, qrs, axis, st = rs.data["pr"], rs.data["qrs"], rs.data["axis"], rs.data["statements"]
    rd, rh = rs.data["rate_discordance"], rs.data["rhythm"]
    first_op = ">=" if pr["first_degree_inclusive"] else ">"
    first_not = "<" if pr["first_degree_inclusive"] else "<="
    marked_op = ">=" if pr["marked_first_degree_inclusive"] else ">"
    marked_not = "<" if pr["marked_first_degree_inclusive"] else "<="
    return {
        "rule_set_id": rs.id,
        "rules_sha256": rs.sha256,
        "beats_rules_id": rs.data["rule_set"]["beats_rules_id"],
        "short_below_ms": float(pr["short_below_ms"]),
        "first_degree_ms": float(pr["first_degree_ms"]),
        "first_degree_inclusive": pr["first_degree_inclusive"],
        "marked_first_degree_ms": float(pr["marked_first_degree_ms"]),
        "marked_first_degree_inclusive": pr["marked_first_degree_inclusive"],
        "complete_bbb_min_ms": float(qrs["complete_bbb_min_ms"]),
        "incomplete_bbb_min_ms": float(qrs["incomplete_bbb_min_ms"]),
        "ivcd_above_ms": float(qrs["ivcd_above_ms"]),
        "fascicular_below_ms": float(qrs["fascicular_below_ms"]),
        "adult_min_age_years": float(qrs["adult_min_age_years"]),
        "lafb_min_deg": float(axis["lafb_min_deg"]),
        "lafb_max_deg": float(axis["lafb_max_deg"]),
        "lpfb_min_deg": float(axis["lpfb_min_deg"]),
        "lpfb_max_deg": float(axis["lpfb_max_deg"]),
        "fascicular_from_axis": axis["fascicular_from_axis"],
        "axis_statement_blocks_fascicular": axis["axis_statement_blocks_fascicular"],
        "include_uncertain": st["include_uncertain"],
        "uncertain_rhythm_blocks_pr": st["uncertain_rhythm_blocks_pr"],
        "pr_overrides_first_degree": st["pr_threshold_overrides_first_degree_statement"],
        "pr_not_assessable": list(rh["pr_not_assessable"]),
        "infer_sinus_from_pr": rh["infer_sinus_from_pr"],
        "av_accepted_when_na": list(rs.data["av"]["accepted_when_pr_not_assessable"]),
        "higher_grade": list(rs.data["av"]["higher_grade"]),
        "vc_rank": list(rs.data["ventricular"]["rank"]),
        "unspecified_bbb_as": rs.data["ventricular"]["unspecified_bbb_as"],
        "rd_enabled": rd["enabled"],
        "rd_max_ventricular_rate": float(rd["max_ventricular_rate_bpm"]),
        "rd_two_to_one_min": float(rd["two_to_one_min_ratio"]),
        "rd_two_to_one_max": float(rd["two_to_one_max_ratio"]),
        "rd_sets_category": rd["sets_category"],
        "persist_min_ecgs": rs.data["persistence"]["min_ecgs"],
        "persist_min_days": rs.data["persistence"]["min_days_apart"],
        "state_order": list(rs.data["state"]["order"]),
        "lbl_pr_short": f"pr<{_fmt(pr['short_below_ms'])}",
        "lbl_pr_first": f"pr{first_op}{_fmt(pr['first_degree_ms'])}",
        "lbl_pr_not_first": f"pr{first_not}{_fmt(pr['first_degree_ms'])}",
        "lbl_pr_marked": f"pr{marked_op}{_fmt(pr['marked_first_degree_ms'])}",
        "lbl_pr_not_marked": f"pr{marked_not}{_fmt(pr['marked_first_degree_ms'])}",
        "lbl_pr_not_short": f"pr>={_fmt(pr['short_below_ms'])}",
        "lbl_pr_normal": (
            f"{_fmt(pr['short_below_ms'])}<=pr{first_not}{_fmt(pr['first_degree_ms'])}"
        ),
        "lbl_qrs_complete": f"qrs>={_fmt(qrs['complete_bbb_min_ms'])}",
        "lbl_qrs_not_complete": f"qrs<{_fmt(qrs['complete_bbb_min_ms'])}",
        "lbl_qrs_incomplete": (
            f"qrs{_fmt(qrs['incomplete_bbb_min_ms'])}-{_fmt(qrs['complete_bbb_min_ms'] - 1)}"
        ),
        "lbl_qrs_ivcd": f"qrs>{_fmt(qrs['ivcd_above_ms'])}",
        "lbl_qrs_not_ivcd": f"qrs<={_fmt(qrs['ivcd_above_ms'])}",
        "lbl_axis_lafb": f"axis{_fmt(axis['lafb_min_deg'])}..{_fmt(axis['lafb_max_deg'])}",
        "lbl_axis_lpfb": f"axis{_fmt(axis['lpfb_min_deg'])}..{_fmt(axis['lpfb_max_deg'])}",
    }


def finding_rows(rs: RuleSet, findings: list[str]) -> list[dict[str, Any]]:
    """The ``rule_finding`` table: each lexicon finding's axis, category and rank in this rule set."""
    rhythm_rank = rs.data["rhythm"]["rank"]
    av_rank = rs.data["av"]["statement_rank"]
    vc_rank = rs.data["ventricular"]["rank"]
    accepted = set(rs.data["av"]["accepted_when_pr_not_assessable"])
    unspecified_second = rs.data["statements"]["unspecified_second_degree_as"]
    rows = []
    for finding in findings:
        axis, _, name = finding.partition(":")
        category, rank = None, None
        if axis == "rhythm":
            category, rank = RHYTHM_FINDING_CLASS[name], rhythm_rank.index(name)
        elif axis == "av" and name not in ("block_unspecified", "none"):
            # An unspecified finding ranks just after the specific finding it maps to, so an
            # explicit "Mobitz I" wins over "second degree" in the same read.
            category = unspecified_second if name == "second_degree" else name
            rank = av_rank.index(category) + (0.5 if name == "second_degree" else 0.0)
        elif axis == "vc" and name not in ("none",):
            unspecified = name == "bbb_unspecified"
            category = rs.data["ventricular"]["unspecified_bbb_as"] if unspecified else name
            rank = vc_rank.index(category) + (0.5 if unspecified else 0.0)
        rows.append(
            {
                "rule_set_id": rs.id,
                "finding": finding,
                "axis": axis,
                "name": name or axis,
                "category": category,
                "rank": None if rank is None else float(rank),
                "accepted_when_na": category in accepted if axis == "av" else None,
            }
        )
    return rows


def category_rows(rs: RuleSet) -> list[dict[str, Any]]:
    """The ``rule_category`` table: AV grade, higher-grade membership and state of each category."""
    higher = set(rs.data["av"]["higher_grade"])
    state_map = rs.data["state"]["map"]
    return [
        {
            "rule_set_id": rs.id,
            "av_category": cat,
            "av_grade": AV_GRADE[cat],
            "is_higher_grade": cat in higher,
            "state": state_map[cat],
        }
        for cat in AV_CATEGORIES
    ]


def _norm_code(code: str) -> str:
    return code.strip().upper().replace(".", "")


def _norm_system(system: str) -> str:
    return system.strip().upper().replace("-", "").replace(" ", "")


def code_rows(rs: RuleSet) -> list[dict[str, Any]]:
    """The ``rule_code`` table: normalized diagnosis and procedure codes with their use."""
    codes = rs.data["codes"]
    dx_system = _norm_system(codes["diagnosis_system"])
    px_system = _norm_system(codes["procedure_system"])
    higher = set(rs.data["av"]["higher_grade"])
    rows = [
        {
            "rule_set_id": rs.id,
            "list_name": "diagnosis",
            "code_system": dx_system,
            "code": _norm_code(row["code"]),
            "axis": row["axis"],
            "category": row["category"],
            "is_higher_grade": row["category"] in higher,
        }
        for row in codes["diagnosis"]
    ]
    for name, system, values in (
        ("pacemaker_implant", px_system, codes["pacemaker_implant"]),
        ("pacemaker_presence_dx", dx_system, codes["pacemaker_presence_dx"]),
    ):
        rows += [
            {
                "rule_set_id": rs.id,
                "list_name": name,
                "code_system": system,
                "code": _norm_code(code),
                "axis": None,
                "category": None,
                "is_higher_grade": False,
            }
            for code in values
        ]
    return rows
