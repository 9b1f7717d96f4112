"""Explain one ECG's conduction categories: measurements, statements, rules fired, overrides.

Reads what the phenotype run stored (ecg_conduction, statement_class, statement_profile,
rule_param) so the explanation is exactly what produced the categories, not a re-computation.
"""

from __future__ import annotations

from typing import Any

from cohort.errors import DataError, RegistryError
from cohort.phenotype.lexicon import load_lexicon
from cohort.phenotype.run import _require_run, _table_exists, rule_set_of_run

MEASUREMENTS = (
    "ventricular_rate", "atrial_rate", "pr_ms", "qrs_ms", "qt_ms", "qtc_ms", "p_axis",
    "qrs_axis", "t_axis",
)
CATEGORY_COLUMNS = (
    "read_kind", "rhythm_class", "rhythm_source", "pr_assessable", "av_category", "av_grade",
    "higher_grade", "av_source", "av_inferred", "rate_discordance", "beat_pattern",
    "av_subtype_unknown", "ventricular_conduction", "vc_source", "rbbb", "incomplete_rbbb",
    "lbbb", "incomplete_lbbb", "lafb", "lpfb", "bifascicular", "bifascicular_parts_unknown",
    "nonspecific_ivcd", "wide_qrs_morphology_unknown", "ventricular_paced", "preexcitation",
    "rhythm_uncertain", "av_uncertain", "vc_uncertain", "has_unrecognised", "n_conflicts",
    "pr_ms", "qrs_ms", "qrs_axis",
)

# What each evidence prefix means, for people reading an explanation.
_MEANING = {
    "statement": "a statement of the read used says {x}",
    "code": "a statement code of the read used says {x}",
    "negated": "a statement negates {x} ('no ...', '... no longer present')",
    "uncertain_excluded": "an uncertain statement of {x} ('possible', 'probable', 'consider'...) "
    "is not counted: this rule set excludes uncertain findings",
    "uncertain": "an uncertain statement of {x} is counted (this rule set includes uncertain findings)",
    "measurement": "the measurement meets {x}",
    "conflict": "a statement contradicts the measurements ({x}); the statement's category is kept",
    "inferred": "{x}: atrial rate well above a slow ventricular rate suggests non-conducted P waves",
    "ignored": "{x}: this AV finding does not measure AV conduction in that rhythm",
    "not_assessable": "{x}",
    "rhythm": "{x}",
    "fallback": "{x}: the read used lacks the value, taken from the next source",
    "beat_pattern": "the beat-level classifier found pattern {x}",
    "excluded": "{x}: the axis criterion is not applied (a statement explains the axis)",
    "unrecognised_statement": "a statement was not recognised by the lexicon (see --list-unrecognised)",
}
_OVERRIDE = {
    "machine_statement_by_confirmed": "the confirmed (overread) read supersedes the machine read",
    "beat_pattern_by_statement": "a statement outranks the beat-level pattern",
    "inferred_by_statement": "a statement outranks the block inferred from rate discordance",
    "inferred_by_beat_pattern": "the beat-level pattern outranks the block inferred from rates",
    "measurement_by_beat_pattern": "the beat-level pattern outranks the PR measurement",
    "measurement_by_inferred": "rate discordance (inferred block) outranks the PR measurement",
}


def describe_evidence(item: str) -> str:
    """Plain-language meaning of one evidence rule id."""
    prefix, _, rest = item.partition(":")
    if prefix == "override":
        if rest.startswith("first_degree_statement_by_"):
            return (
                "the rule set regrades first-degree statements by its PR threshold: measured "
                + rest.removeprefix("first_degree_statement_by_")
            )
        return _OVERRIDE.get(rest, rest.replace("_", " "))
    template = _MEANING.get(prefix)
    if template is None:
        return item
    return template.format(x=rest.replace("_", " ") if rest else prefix)


def _rows(con, sql: str, params: list) -> list[dict]:
    cursor = con.execute(sql, params)
    cols = [d[0] for d in cursor.description]
    return [dict(zip(cols, r, strict=True)) for r in cursor.fetchall()]


def _statement_findings(con, rs, kind: str, texts: list[str] | None) -> list[dict]:
    lexicon = load_lexicon(rs.lexicon_path)
    out = []
    for text in texts or []:
        rows = _rows(
            con,
            "SELECT finding, certainty, negated, rule, unrecognised_part FROM statement_class "
            "WHERE rule_set_id = ? AND kind = ? AND text = ? ORDER BY finding",
            [rs.id, kind, text],
        )
        normalized = lexicon.normalize(text) if kind == "statement" else text
        out.append({"text": text, "normalized": normalized, "findings": rows})
    return out


def _machine_profile(con, rule_set_id: str, ecg_key: str) -> dict | None:
    rows = _rows(
        con,
        "SELECT p.rhythm_stmt, p.av_stmt, p.vc_stmt_list FROM statement_profile AS p "
        "JOIN ecg AS e ON hash(e.statements, e.statement_codes) = p.profile_hash "
        "WHERE p.rule_set_id = ? AND e.ecg_key = ? AND e.read_kind = 'machine'",
        [rule_set_id, ecg_key],
    )
    return rows[0] if rows else None


def _overrides(result: dict, machine: dict | None) -> list[str]:
    """Sentences saying which lower-precedence source was overridden and what it said."""
    cats = result["categories"]
    out = []
    for item in result["evidence"]:
        prefix, _, rest = item.partition(":")
        if prefix != "override":
            continue
        text = describe_evidence(item)
        if rest == "machine_statement_by_confirmed" and machine is not None:
            text += (
                f"; the machine statements gave rhythm {machine['rhythm_stmt']}, AV "
                f"{machine['av_stmt']}, ventricular {list(machine['vc_stmt_list'] or [])}"
            )
        if rest in ("beat_pattern_by_statement", "measurement_by_beat_pattern") and cats["beat_pattern"]:
            text += f"; beat pattern {cats['beat_pattern']}, category used {cats['av_category']}"
        out.append(text)
    return out


def explain_ecg(con, ecg_key: str, rules_id: str = "default-v1") -> dict[str, Any]:
    """Everything that decided one ECG's categories under one rule set.

    Returns a dict with the reads (measurements, statements with their findings, codes), the
    beat pattern row, the categories and flags, the evidence rule ids with their meaning, the
    conflicts, and sentences on the overridden lower-precedence sources.
    """
    rs = rule_set_of_run(con, rules_id)
    if not _table_exists(con, "ecg_conduction"):
        raise RegistryError(f"no phenotype tables yet; run 'dromos phenotype --rules {rs.id}' first")
    _require_run(con, rs.id)
    rows = _rows(con, "SELECT * FROM ecg_conduction WHERE rule_set_id = ? AND ecg_key = ?", [rs.id, ecg_key])
    if not rows:
        n = con.execute("SELECT count(*) FROM ecg WHERE ecg_key = ?", [ecg_key]).fetchall()[0][0]
        hint = "it is not in table ecg" if n == 0 else "re-run the phenotype: it is newer than the last run"
        raise DataError(f"ECG '{ecg_key}' has no ecg_conduction row for rule set {rs.id}; {hint}")
    row = rows[0]
    reads = _rows(
        con,
        "SELECT read_kind, acquired_at, site, source_id, " + ", ".join(MEASUREMENTS)
        + ", statements, statement_codes FROM ecg WHERE ecg_key = ? "
        "ORDER BY CASE read_kind WHEN 'confirmed' THEN 0 ELSE 1 END",
        [ecg_key],
    )
    for read in reads:
        read["used"] = read["read_kind"] == row["read_kind"]
        read["measurements"] = {m: read.pop(m) for m in MEASUREMENTS}
        read["statements"] = _statement_findings(con, rs, "statement", read["statements"])
        read["statement_codes"] = _statement_findings(con, rs, "code", read["statement_codes"])
    beat = None
    if _table_exists(con, "beat_pattern"):
        beats = _rows(
            con,
            "SELECT * FROM beat_pattern WHERE ecg_key = ? AND rules_id = ?",
            [ecg_key, rs.data["rule_set"]["beats_rules_id"]],
        )
        beat = beats[0] if beats else None
    evidence = list(row["evidence"] or [])
    result = {
        "ecg_key": ecg_key,
        "rule_set_id": rs.id,
        "person_key": row["person_key"],
        "acquired_at": row["acquired_at"],
        "read_used": row["read_kind"],
        "reads": reads,
        "beat_pattern": beat,
        "categories": {c: row[c] for c in CATEGORY_COLUMNS},
        "evidence": evidence,
        "evidence_meaning": [{"rule": e, "meaning": describe_evidence(e)} for e in evidence],
        "conflicts": [e for e in evidence if e.startswith("conflict:")],
    }
    result["overridden"] = _overrides(result, _machine_profile(con, rs.id, ecg_key))
    return result


def format_explanation(result: dict[str, Any]) -> str:
    """Text rendering of :func:`explain_ecg` for the terminal."""
    cats = result["categories"]
    lines = [
        f"ECG {result['ecg_key']} (person {result['person_key']}, {result['acquired_at']}), "
        f"rule set {result['rule_set_id']}, read used: {result['read_used']}",
        "",
        "Categories:",
        f"  rhythm                 {cats['rhythm_class']} (from {cats['rhythm_source']})",
        f"  AV conduction          {cats['av_category']} (grade {cats['av_grade']}, from "
        f"{cats['av_source']}; PR assessable: {cats['pr_assessable']})",
        f"  ventricular conduction {cats['ventricular_conduction']} (from {cats['vc_source']})",
    ]
    flags = [c for c in ("rbbb", "incomplete_rbbb", "lbbb", "incomplete_lbbb", "lafb", "lpfb",
                         "bifascicular", "bifascicular_parts_unknown", "nonspecific_ivcd",
                         "wide_qrs_morphology_unknown", "ventricular_paced", "preexcitation",
                         "higher_grade", "av_inferred", "av_subtype_unknown", "rhythm_uncertain",
                         "av_uncertain", "vc_uncertain") if cats.get(c)]
    lines.append(f"  flags                  {', '.join(flags) or 'none'}")
    for read in result["reads"]:
        mark = "used" if read["used"] else "not used"
        lines += ["", f"{read['read_kind'].capitalize()} read ({mark}):"]
        meas = ", ".join(f"{k} {v:g}" for k, v in read["measurements"].items() if v is not None)
        lines.append(f"  measurements: {meas or 'none'}")
        for kind in ("statements", "statement_codes"):
            for s in read[kind]:
                found = "; ".join(
                    f"{f['finding']}{' (uncertain)' if f['certainty'] == 'uncertain' else ''}"
                    f"{' (negated)' if f['negated'] else ''}"
                    f"{' [' + f['unrecognised_part'] + ']' if f['unrecognised_part'] else ''}"
                    for f in s["findings"]
                ) or "no findings"
                lines.append(f"  {s['text']!r} -> {found}")
    if result["beat_pattern"]:
        b = result["beat_pattern"]
        lines += ["", f"Beat-level pattern: {b.get('pattern')} (ratio {b.get('ratio')}, "
                  f"PR median {b.get('pr_median_ms')} ms)"]
    lines += ["", "Rules that fired:"]
    lines += [f"  {e['rule']}: {e['meaning']}" for e in result["evidence_meaning"]] or ["  none"]
    if result["overridden"]:
        lines += ["", "Overridden lower-precedence sources:"]
        lines += [f"  {o}" for o in result["overridden"]]
    return "\n".join(lines)
