"""Run the phenotype stage on a registry: rule tables, lexicon, per-ECG and per-person tables.

Everything set-based happens in DuckDB (``sql/phenotype/*.sql``); Python only classifies the
distinct statements with the lexicon (few thousand strings, however many ECGs) and loads the
rule set's parameters as small tables. Each rule set writes only its own rows, so several live
side by side, and re-running one replaces exactly its rows, in one transaction.
"""

from __future__ import annotations

import contextlib
import importlib
import time
from collections.abc import Callable
from typing import Any

import duckdb
import pyarrow as pa

from cohort import __version__
from cohort.errors import DataError, RegistryError, RuleSetError
from cohort.phenotype.lexicon import FINDINGS, Lexicon, load_lexicon
from cohort.phenotype.rules import (
    RuleSet,
    category_rows,
    code_rows,
    finding_rows,
    load_rule_set,
    param_row,
)
from cohort.sqlfiles import read_sql
from cohort.vocabulary import AV_CATEGORIES, RHYTHM_CLASSES, VENTRICULAR_CONDUCTION

# Tables this stage writes; every one has a rule_set_id column.
RULE_TABLES = ("rule_param", "rule_finding", "rule_category", "rule_code", "statement_class")
DERIVED_TABLES = (
    "statement_profile",
    "conduction_signature",
    "ecg_conduction_core",
    "unrecognised_statement",
    "person_conduction",
)
# Views over the stored tables; ecg_state and person_category were tables before (dropped and
# replaced on the next run: the views give the same rows for every rule set from ecg_conduction).
VIEWS = ("ecg_conduction", "ecg_state", "person_category")
FORMER_TABLES = ("ecg_state", "person_category")
RUN_LOG = "phenotype_run"
STEPS = (
    "rules",
    "beats",
    "statements",
    "statement_profile",
    "ecg_input",
    "conduction_signature",
    "ecg_conduction_core",
    "unrecognised_statement",
    "person_conduction",
)
FLAG_COLUMNS = (
    "rbbb", "incomplete_rbbb", "lbbb", "incomplete_lbbb", "lafb", "lpfb", "bifascicular",
    "bifascicular_parts_unknown", "nonspecific_ivcd", "wide_qrs_morphology_unknown",
    "ventricular_paced", "preexcitation", "higher_grade", "av_inferred", "av_subtype_unknown",
    "rhythm_uncertain", "av_uncertain", "vc_uncertain", "has_unrecognised",
)

Progress = Callable[[str, int, int], None] | Any


def _table_exists(con, name: str) -> bool:
    row = con.execute(
        "SELECT count(*) FROM information_schema.tables WHERE table_name = ? "
        "AND table_schema = current_schema()",
        [name],
    ).fetchall()[0]
    return bool(row[0])


def _check_registry(con) -> None:
    missing = [t for t in ("ecg", "person", "procedure", "diagnosis") if not _table_exists(con, t)]
    if missing:
        raise RegistryError(
            f"the database is not a Dromos registry: tables {missing} are missing; create it "
            "with 'dromos ingest' first"
        )


def _report(progress: Progress | None, step: str, index: int) -> None:
    """Tell a tqdm bar or a callable ``progress(step, index, total)`` that a step is done."""
    if progress is None:
        return
    if hasattr(progress, "update"):
        if hasattr(progress, "set_description"):
            progress.set_description(step)
        progress.update(1)
    else:
        progress(step, index, len(STEPS))


def _bind(sql: str, params: dict) -> dict:
    """The named parameters ``sql`` uses (DuckDB refuses unused ones)."""
    return {k: v for k, v in params.items() if f"${k}" in sql}


def _columns(con, table: str) -> dict[str, str]:
    rows = con.execute(
        "SELECT column_name, data_type FROM information_schema.columns WHERE table_name = ? "
        "AND table_schema = current_schema() ORDER BY ordinal_position",
        [table],
    ).fetchall()
    return dict(rows)


def _add_new_columns(con, table: str, select_sql: str, bound: dict) -> list[str]:
    """Columns the query has and the stored table lacks are added (NULL for older rows)."""
    have = _columns(con, table)
    wanted = con.execute("DESCRIBE " + select_sql, bound).fetchall()
    added = []
    for name, dtype, *_ in wanted:
        if name not in have:
            con.execute(f'ALTER TABLE {table} ADD COLUMN "{name}" {dtype}')
            added.append(name)
    return added


def _write(con, table: str, select_sql: str, params: dict, notes: list[str] | None = None) -> None:
    """Replace this rule set's rows of ``table`` by the result of ``select_sql``.

    A table written by an earlier version gains the new columns (NULL in the rows of other
    rule sets until they are re-run); a note says so.
    """
    bound = _bind(select_sql, params)
    if not _table_exists(con, table):
        con.execute(f"CREATE TABLE {table} AS {select_sql}", bound)
        return
    added = _add_new_columns(con, table, select_sql, bound)
    if added and notes is not None:
        notes.append(
            f"table {table} gained columns {added}: NULL in rows of other rule sets until "
            "they are re-run"
        )
    con.execute(f"DELETE FROM {table} WHERE rule_set_id = ?", [params["rule_set_id"]])
    try:
        con.execute(f"INSERT INTO {table} BY NAME {select_sql}", bound)
    except duckdb.ConversionException as exc:
        raise RegistryError(
            f"table {table} in the registry has a column of another type than this Dromos "
            f"version writes ({exc}); run 'dromos phenotype --rebuild' to drop the phenotype "
            "tables of all rule sets and rebuild them"
        ) from exc


def _write_rows(con, table: str, rows: list[dict], rule_set_id: str,
                schema: pa.Schema | None = None, notes: list[str] | None = None) -> None:
    """Replace this rule set's rows of a small Python-built table."""
    arrow = pa.Table.from_pylist(rows, schema=schema)
    con.register("_phen_rows", arrow)
    try:
        _write(con, table, "SELECT * FROM _phen_rows", {"rule_set_id": rule_set_id}, notes)
    finally:
        # If the transaction failed the caller rolls back and reports the first error.
        with contextlib.suppress(duckdb.Error):
            con.unregister("_phen_rows")


_CLASS_SCHEMA = pa.schema([
    ("rule_set_id", pa.string()), ("kind", pa.string()), ("text", pa.string()),
    ("finding", pa.string()), ("certainty", pa.string()), ("negated", pa.bool_()),
    ("rule", pa.string()), ("unrecognised_part", pa.string()),
])
_FINDING_SCHEMA = pa.schema([
    ("rule_set_id", pa.string()), ("finding", pa.string()), ("axis", pa.string()),
    ("name", pa.string()), ("category", pa.string()), ("rank", pa.float64()),
    ("accepted_when_na", pa.bool_()),
])
_CODE_SCHEMA = pa.schema([
    ("rule_set_id", pa.string()), ("list_name", pa.string()), ("code_system", pa.string()),
    ("code", pa.string()), ("axis", pa.string()), ("category", pa.string()),
    ("is_higher_grade", pa.bool_()),
])
_CATEGORY_SCHEMA = pa.schema([
    ("rule_set_id", pa.string()), ("av_category", pa.string()), ("av_grade", pa.int32()),
    ("is_higher_grade", pa.bool_()), ("state", pa.string()),
])


def _load_rule_tables(con, rs: RuleSet, notes: list[str]) -> None:
    _write_rows(con, "rule_param", [param_row(rs)], rs.id, notes=notes)
    findings = [*FINDINGS, "unrecognised"]
    _write_rows(con, "rule_finding", finding_rows(rs, findings), rs.id, _FINDING_SCHEMA, notes)
    _write_rows(con, "rule_category", category_rows(rs), rs.id, _CATEGORY_SCHEMA, notes)
    _write_rows(con, "rule_code", code_rows(rs), rs.id, _CODE_SCHEMA, notes)


def classification_rows(lexicon: Lexicon, kind: str, texts: list[str], rule_set_id: str) -> list[dict]:
    """Rows of ``statement_class`` for distinct statements (kind 'statement') or codes ('code')."""
    classify = lexicon.classify if kind == "statement" else lexicon.classify_code
    rows = []
    for text in texts:
        result = classify(text)
        for f in result.findings:
            rows.append({
                "rule_set_id": rule_set_id, "kind": kind, "text": text, "finding": f.code,
                "certainty": f.certainty, "negated": f.negated, "rule": f.rule,
                "unrecognised_part": None,
            })
        if result.unrecognised_part is not None:
            rows.append({
                "rule_set_id": rule_set_id, "kind": kind, "text": text, "finding": "unrecognised",
                "certainty": "certain", "negated": False,
                "rule": "unrecognised:partial" if result.findings else "unrecognised:whole",
                "unrecognised_part": result.unrecognised_part,
            })
    return rows


def _prepare_statement_combos(con) -> None:
    """Temp table phen_statement_combo: the distinct statement lists of ``ecg`` (grouped once)."""
    con.execute("CREATE OR REPLACE TEMP TABLE phen_statement_combo AS "
                + read_sql("phenotype/statement_combo.sql"))


def _distinct_items(con, column: str) -> list[str]:
    """Distinct elements of a list column of ``ecg``, from its distinct lists (they repeat)."""
    sql = (
        f"SELECT DISTINCT t FROM (SELECT unnest({column}) AS t FROM phen_statement_combo) "
        "WHERE t IS NOT NULL ORDER BY t"
    )
    return [r[0] for r in con.execute(sql).fetchall()]


def _classify_statements(con, rs: RuleSet) -> dict[str, int]:
    """Classify each distinct statement and code of the registry once (Python lexicon)."""
    lexicon = load_lexicon(rs.lexicon_path)
    texts = _distinct_items(con, "statements")
    codes = _distinct_items(con, "statement_codes")
    rows = classification_rows(lexicon, "statement", texts, rs.id)
    rows += classification_rows(lexicon, "code", codes, rs.id)
    _write_rows(con, "statement_class", rows, rs.id, _CLASS_SCHEMA)
    return {"n_distinct_statements": len(texts), "n_distinct_codes": len(codes)}


def _run_beats(con, enabled: bool, rebuild: bool = False) -> str:
    """Run the beat classifier (another module) when wave events exist; say what happened.

    Beat patterns still up to date (same wave events, beat rules and classifier) are reused
    unless ``rebuild``; after new wave events only new and changed strips are classified.
    """
    if not enabled:
        return "beat classifier skipped on request"
    if not _table_exists(con, "wave_event") or not con.execute(
        "SELECT EXISTS (SELECT 1 FROM wave_event)"
    ).fetchall()[0][0]:
        return "no wave events in the registry: beat classifier not needed"
    try:
        module = importlib.import_module("cohort.phenotype.beats_batch")
    except ModuleNotFoundError as exc:
        if exc.name and exc.name.startswith("cohort.phenotype.beats"):
            return "beat classifier (cohort.phenotype.beats_batch) not available yet: skipped"
        raise
    if rebuild:
        return f"beat classifier wrote {module.classify_registry(con)} beat_pattern rows"
    n, classified = module.refresh_registry(con)
    if classified == 0:
        return (f"beat patterns of {n} strips reused: no new or changed strips, beat rules "
                "and classifier unchanged since they were computed")
    if classified < n:
        return (f"beat classifier: {classified} new or changed strips classified, patterns of "
                f"{n - classified} unchanged strips kept ({n} beat_pattern rows)")
    return f"beat classifier wrote {n} beat_pattern rows"


def _prepare_beat_input(con, rs: RuleSet) -> str | None:
    """Temp table phen_beat_input from beat_pattern (or empty); a note when it has no rows."""
    beats_id = rs.data["rule_set"]["beats_rules_id"]
    if not _table_exists(con, "beat_pattern"):
        con.execute("CREATE OR REPLACE TEMP TABLE phen_beat_input AS " + read_sql("phenotype/beat_input_empty.sql"))
        return None
    con.execute(
        "CREATE OR REPLACE TEMP TABLE phen_beat_input AS " + read_sql("phenotype/beat_input.sql"),
        {"beats_rules_id": beats_id},
    )
    n = con.execute("SELECT count(*) FROM phen_beat_input").fetchall()[0][0]
    if n == 0 and con.execute("SELECT EXISTS (SELECT 1 FROM beat_pattern)").fetchall()[0][0]:
        found = [r[0] for r in con.execute("SELECT DISTINCT rules_id FROM beat_pattern").fetchall()]
        return (
            f"beat_pattern has no rows with rules_id '{beats_id}' (found {found}); set "
            "rule_set.beats_rules_id in the rule file to use them"
        )
    return None


def _object_type(con, name: str) -> str | None:
    rows = con.execute(
        "SELECT table_type FROM information_schema.tables WHERE table_name = ? "
        "AND table_schema = current_schema()",
        [name],
    ).fetchall()
    return rows[0][0] if rows else None


def drop_phenotype_tables(con) -> None:
    """Drop every table and view this stage writes (all rule sets): used by ``--rebuild``."""
    for name in (*VIEWS, *DERIVED_TABLES, *RULE_TABLES, RUN_LOG):
        kind = _object_type(con, name)
        if kind == "VIEW":
            con.execute(f"DROP VIEW {name}")
        elif kind is not None:
            con.execute(f"DROP TABLE {name}")


def _check_views_writable(con) -> None:
    for name in VIEWS:
        if name not in FORMER_TABLES and _object_type(con, name) not in (None, "VIEW"):
            raise RegistryError(
                f"{name} is a table written by an older Dromos version; run 'dromos phenotype "
                "--rebuild' to drop the phenotype tables of all rule sets and rebuild them"
            )


def _create_views(con) -> None:
    """The views: ecg_conduction (per-ECG core + per-signature categories), ecg_state and
    person_category."""
    _check_views_writable(con)
    for name in VIEWS:
        if name in FORMER_TABLES and _object_type(con, name) == "BASE TABLE":
            con.execute(f"DROP TABLE {name}")
        con.execute(f"CREATE OR REPLACE VIEW {name} AS " + read_sql(f"phenotype/{name}_view.sql"))


def _build_conduction(con, params: dict, timings: dict, progress, index: int, notes: list[str]) -> int:
    """Per-ECG inputs (temp table), categories per distinct signature, per-ECG core table."""
    t0 = time.perf_counter()
    sql = read_sql("phenotype/ecg_conduction_input.sql")
    con.execute("CREATE OR REPLACE TEMP TABLE phen_ecg_input AS " + sql, _bind(sql, params))
    timings["ecg_input"] = time.perf_counter() - t0
    _report(progress, "ecg_input", index)
    for offset, table in enumerate(("conduction_signature", "ecg_conduction_core"), start=1):
        t0 = time.perf_counter()
        _write(con, table, read_sql(f"phenotype/{table}.sql"), params, notes)
        timings[table] = time.perf_counter() - t0
        _report(progress, table, index + offset)
        if table == "conduction_signature":
            _check_signatures(con, params["rule_set_id"])
    con.execute("DROP TABLE phen_ecg_input")
    return index + 2


def _check_signatures(con, rule_set_id: str) -> None:
    """Signatures are 64-bit hashes: refuse (never silently merge) the rare collision."""
    n, n_distinct = con.execute(
        "SELECT count(*), count(DISTINCT signature) FROM conduction_signature WHERE rule_set_id = ?",
        [rule_set_id],
    ).fetchall()[0]
    if n != n_distinct:
        raise DataError(
            f"{n - n_distinct} rule signatures of rule set {rule_set_id} collide (64-bit hash); "
            "nothing was written. Please report this; re-running will not help"
        )


def run_phenotype(
    con,
    rules_id: str = "default-v1",
    progress: Progress | None = None,
    *,
    beats: bool = True,
    rebuild: bool = False,
) -> dict[str, Any]:
    """Phenotype every ECG and person of the registry with one rule set; return a summary.

    Parameters
    ----------
    con : duckdb connection to a Dromos registry (``cohort.registry.connect``).
    rules_id : rule set id in ``cohort/rules`` (e.g. ``default-v1``) or a path to a rule file.
    progress : a tqdm bar (``update``) or a callable ``progress(step, index, total)``.
    beats : run the beat classifier first when the registry has wave events.
    rebuild : drop the phenotype tables of all rule sets first (after a schema change) and
        classify every beat strip again (otherwise patterns still up to date are reused).

    Returns
    -------
    dict with category counts, unrecognised statements, timings and notes (see
    :func:`summarize`).
    """
    _check_registry(con)
    rs = load_rule_set(rules_id)
    if not rebuild:
        _check_views_writable(con)
    timings: dict[str, float] = {}
    notes: list[str] = []
    start = time.perf_counter()
    # The beat classifier manages its own writes, so it runs before our transaction.
    t0 = time.perf_counter()
    notes.append(_run_beats(con, beats, rebuild))
    timings["beats"] = time.perf_counter() - t0
    params = {"rule_set_id": rs.id}
    con.execute("BEGIN TRANSACTION")
    try:
        if rebuild:
            drop_phenotype_tables(con)
        t0 = time.perf_counter()
        _load_rule_tables(con, rs, notes)
        note = _prepare_beat_input(con, rs)
        if note:
            notes.append(note)
        timings["rules"] = time.perf_counter() - t0
        _report(progress, "rules", 1)
        _report(progress, "beats", 2)
        t0 = time.perf_counter()
        _prepare_statement_combos(con)
        counts = _classify_statements(con, rs)
        timings["statements"] = time.perf_counter() - t0
        _report(progress, "statements", 3)
        t0 = time.perf_counter()
        _write(con, "statement_profile", read_sql("phenotype/statement_profile.sql"), params, notes)
        con.execute("DROP TABLE phen_statement_combo")
        timings["statement_profile"] = time.perf_counter() - t0
        _report(progress, "statement_profile", 4)
        last = _build_conduction(con, params, timings, progress, 5, notes)
        _create_views(con)
        for index, table in enumerate(DERIVED_TABLES[3:], start=last + 1):
            t0 = time.perf_counter()
            _write(con, table, read_sql(f"phenotype/{table}.sql"), params, notes)
            timings[table] = time.perf_counter() - t0
            _report(progress, table, index)
        seconds = time.perf_counter() - start
        _log_run(con, rs, seconds, notes)
        con.execute("COMMIT")
    except BaseException:
        con.execute("ROLLBACK")
        raise
    summary = summarize(con, rs.id)
    summary.update(counts)
    summary.update({"rules_sha256": rs.sha256, "seconds": seconds, "timings": timings, "notes": notes})
    return summary


def _log_run(con, rs: RuleSet, seconds: float, notes: list[str]) -> None:
    n_ecg = con.execute(
        "SELECT count(*) FROM ecg_conduction_core WHERE rule_set_id = ?", [rs.id]
    ).fetchall()[0][0]
    row = {
        "rule_set_id": rs.id,
        "rules_sha256": rs.sha256,
        "rules_file": str(rs.path),
        "lexicon_file": str(rs.lexicon_path),
        "n_ecg": n_ecg,
        "seconds": seconds,
        "notes": notes,
        "software_version": __version__,
        "run_at": time.strftime("%Y-%m-%d %H:%M:%S"),
    }
    _write_rows(con, RUN_LOG, [row], rs.id, notes=notes)


# ECGs per signature first (integer key, one scan of the per-ECG table), then per category
# combination and flag over the few signatures.
_CATEGORY_GROUPS = (
    "WITH n AS (SELECT signature, read_kind, count(*) AS n FROM ecg_conduction_core "
    "WHERE rule_set_id = $rule_set_id GROUP BY signature, read_kind) "
    "SELECT n.read_kind, s.rhythm_class, s.av_category, s.ventricular_conduction, "
    "sum(n.n) AS n, {flags}, "
    "coalesce(sum(n.n) FILTER (WHERE s.n_conflicts > 0), 0) AS n_with_conflict "
    "FROM n JOIN conduction_signature AS s "
    "ON s.rule_set_id = $rule_set_id AND s.signature = n.signature GROUP BY ALL"
)


def _category_groups(con, rule_set_id: str) -> list[dict[str, Any]]:
    """ECG and flag counts per (read kind, rhythm, AV, ventricular category): a few rows."""
    flags = ", ".join(f"coalesce(sum(n.n) FILTER (WHERE s.{c}), 0) AS {c}" for c in FLAG_COLUMNS)
    result = con.execute(_CATEGORY_GROUPS.format(flags=flags), {"rule_set_id": rule_set_id})
    names = [d[0] for d in result.description]
    return [dict(zip(names, row, strict=True)) for row in result.fetchall()]


def _total(groups: list[dict[str, Any]], column: str) -> int:
    return int(sum(g[column] for g in groups))


def _counts(groups: list[dict[str, Any]], column: str, codes) -> dict[str, int]:
    totals: dict[str, int] = {}
    for g in groups:
        totals[g[column]] = totals.get(g[column], 0) + int(g["n"])
    return {code: totals.get(code, 0) for code in codes}


def rule_set_of_run(con, rules: str) -> RuleSet:
    """The rule set of an earlier run: by id recorded in phenotype_run (its file), else by id/path."""
    if _table_exists(con, RUN_LOG):
        found = con.execute(
            f"SELECT rules_file FROM {RUN_LOG} WHERE rule_set_id = ?", [str(rules)]
        ).fetchall()
        if found:
            try:
                return load_rule_set(found[0][0])
            except RuleSetError:
                pass  # the file moved: fall back to the id
    return load_rule_set(rules)


def list_unrecognised(con, rules_id: str = "default-v1", limit: int | None = None) -> list[dict]:
    """Unrecognised statements of a rule set, most frequent first (run the phenotype first)."""
    rule_set_id = rule_set_of_run(con, rules_id).id
    if not _table_exists(con, "unrecognised_statement"):
        raise RegistryError(
            f"no phenotype tables in this registry; run 'dromos phenotype --rules {rule_set_id}' first"
        )
    _require_run(con, rule_set_id)
    sql = (
        "SELECT kind, statement, unrecognised_part, whole, n FROM unrecognised_statement "
        "WHERE rule_set_id = ? ORDER BY n DESC, statement"
    )
    if limit is not None:
        sql += f" LIMIT {int(limit)}"
    cols = ("kind", "statement", "unrecognised_part", "whole", "n")
    return [dict(zip(cols, r, strict=True)) for r in con.execute(sql, [rule_set_id]).fetchall()]


def _require_run(con, rule_set_id: str) -> None:
    done = _table_exists(con, RUN_LOG) and con.execute(
        f"SELECT count(*) FROM {RUN_LOG} WHERE rule_set_id = ?", [rule_set_id]
    ).fetchall()[0][0]
    if not done:
        raise RegistryError(
            f"rule set {rule_set_id} has not been run on this registry; run "
            f"'dromos phenotype --rules {rule_set_id}' first"
        )


def summarize(con, rule_set_id: str, top: int = 10) -> dict[str, Any]:
    """Category counts, flag counts and top unrecognised statements of a finished run."""
    _require_run(con, rule_set_id)
    groups = _category_groups(con, rule_set_id)
    n_person = con.execute(
        "SELECT count(*) FROM person_conduction WHERE rule_set_id = ?", [rule_set_id]
    ).fetchall()[0][0]
    unrec = con.execute(
        "SELECT count(*), coalesce(sum(n), 0) FROM unrecognised_statement WHERE rule_set_id = ?",
        [rule_set_id],
    ).fetchall()[0]
    return {
        "rule_set_id": rule_set_id,
        "n_ecg": _total(groups, "n"),
        "n_person": int(n_person),
        "read_kind": _counts(groups, "read_kind", ("machine", "confirmed")),
        "rhythm_class": _counts(groups, "rhythm_class", RHYTHM_CLASSES),
        "av_category": _counts(groups, "av_category", AV_CATEGORIES),
        "ventricular_conduction": _counts(groups, "ventricular_conduction", VENTRICULAR_CONDUCTION),
        "flags": {c: _total(groups, c) for c in FLAG_COLUMNS},
        "n_with_conflict": _total(groups, "n_with_conflict"),
        "n_unrecognised_statements": int(unrec[0]),
        "n_unrecognised_occurrences": int(unrec[1]),
        "top_unrecognised": list_unrecognised(con, rule_set_id, top),
    }
