"""Load source files into the registry: one transaction per file, every record accounted for.

For each file: read it (``sources``), stage and validate it (``sql/staging/<table>.sql``),
classify records as load / duplicate / quarantine (``sql/staging/classify.sql``), write them and
one ``load_log`` row whose counts reconcile (read = loaded + quarantined + duplicate). A file
whose content (sha256) was already loaded into the same table loads nothing new.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import time
import tomllib
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from pathlib import Path

import duckdb
import numpy as np
import pyarrow as pa

from cohort import __version__
from cohort.errors import InputFileError, MappingError, RegistryError
from cohort.ingest import sources
from cohort.ingest.mapping import INTERVAL_COLUMNS, LOAD_ORDER, Mapping, TableMapping, load_mapping
from cohort.ingest.pseudonym import define_person_key_macro, key_check
from cohort.registry import ensure_schema
from cohort.sqlfiles import read_sql

VALIDATION_RULES = Path(__file__).resolve().parent / "validation-v1.toml"
# Per table: row-local staging, registry references, content hashes of the records that need one.
_STAGE_SQL = {
    "person": ("staging/person.sql", "staging/person_refs.sql", "staging/content.sql"),
    "ecg": ("staging/ecg.sql", "staging/ecg_refs.sql", "staging/ecg_content.sql"),
    "wave_event": ("staging/wave_event.sql", "staging/wave_event_refs.sql", "staging/content.sql"),
    "procedure": ("staging/coded_event.sql", "staging/coded_event_refs.sql", "staging/content.sql"),
    "diagnosis": ("staging/coded_event.sql", "staging/coded_event_refs.sql", "staging/content.sql"),
}
_CODE_MAPS = {"person": {"sex_codes": "sex"}, "ecg": {"read_kind_codes": "read_kind"}, "wave_event": {"kind_codes": "kind"}}


@dataclass(frozen=True)
class LoadResult:
    """Outcome of loading one file (mirrors its ``load_log`` row)."""

    path: Path
    table: str
    source_id: str
    rows_read: int
    rows_loaded: int
    rows_quarantined: int
    rows_duplicate: int
    rows_repaired: int
    seconds: float
    skipped: bool = False  # the same content was loaded before

    @property
    def reconciles(self) -> bool:
        return self.rows_read == self.rows_loaded + self.rows_quarantined + self.rows_duplicate


def load_validation_rules(path: Path = VALIDATION_RULES) -> dict:
    """The ingest validation rules (ranges, unit repair, date bounds) as a dict."""
    with path.open("rb") as handle:
        return tomllib.load(handle)


def _param_row(rules: dict, table: TableMapping) -> dict[str, object]:
    """One row of parameters the staging SQL reads from temp table ``ingest_param``."""
    row: dict[str, object] = {}
    for name, (lower, upper) in rules["range"].items():
        row[f"{name}_lo"], row[f"{name}_hi"] = float(lower), float(upper)
    units = table.options.get("units", {})
    for column in INTERVAL_COLUMNS:
        row[f"{column}_factor"] = 1000.0 if units.get(column, "ms") == "s" else 1.0
    row["seconds_lower"] = float(rules["unit_repair"]["seconds_lower"])
    row["seconds_upper"] = float(rules["unit_repair"]["seconds_upper"])
    row["earliest_date"] = dt.date.fromisoformat(rules["dates"]["earliest"])
    slack = int(rules["dates"]["latest_slack_days"])
    row["latest_date"] = dt.date.today() + dt.timedelta(days=slack)
    row["latest_slack_days"] = slack
    return row


def _prepare_session(con, rules: dict, table: TableMapping, key: bytes | None) -> None:
    con.execute(read_sql("staging/macros.sql"))
    define_person_key_macro(con, key)
    params = _param_row(rules, table)
    columns = ", ".join(f"${name} AS {name}" for name in params)
    con.execute(f"CREATE OR REPLACE TEMP TABLE ingest_param AS SELECT {columns}", params)
    con.execute("CREATE OR REPLACE TEMP TABLE code_map (field VARCHAR, source_value VARCHAR, code VARCHAR)")
    rows = [
        (field, value.lower(), code)
        for option, field in _CODE_MAPS.get(table.table, {}).items()
        for code, values in table.codes(option).items()
        for value in values
    ]
    if rows:
        con.executemany("INSERT INTO code_map VALUES (?, ?, ?)", rows)
    con.execute("CREATE OR REPLACE TEMP TABLE column_map (canonical VARCHAR, source VARCHAR)")
    con.executemany("INSERT INTO column_map VALUES (?, ?)", list(table.columns.items()))


def _stage_rows(con, table: TableMapping) -> None:
    """Run the table's row-local staging statement (reads the source): ``stage_typed``."""
    options = table.options
    if table.table in ("procedure", "diagnosis"):
        con.execute(f"CREATE OR REPLACE TEMP VIEW target_rows AS SELECT * FROM {table.table}")
    params = {
        "person": {"date_formats": options.get("date_formats")},
        "ecg": {"timestamp_formats": options.get("timestamp_formats")},
        "wave_event": {},
        "procedure": {"date_formats": options.get("date_formats"), "default_code_system": options.get("default_code_system")},
        "diagnosis": {"date_formats": options.get("date_formats"), "default_code_system": options.get("default_code_system")},
    }[table.table]
    if table.table == "ecg":  # read by the view stage_checked and ecg_content.sql
        con.execute("SET VARIABLE dromos_statement_separator = ?", [options.get("statement_separator")])
        con.execute("SET VARIABLE dromos_code_separator = ?", [options.get("code_separator")])
    for statement in con.extract_statements(read_sql(_STAGE_SQL[table.table][0])):
        con.execute(statement.query, {k: v for k, v in params.items() if k in statement.named_parameters})


def _stage_checks(con, scanned: sources.ScanResult) -> None:
    """Number the staged rows, check registry references, classify (``stage_outcome``)."""
    _check_positions(con, scanned.positional)
    scanned.finish(con)
    con.execute(read_sql(_STAGE_SQL[scanned.table][1]))
    _write_repeated_keys(con)
    con.execute(read_sql("staging/content_needed.sql"))
    con.execute(read_sql(_STAGE_SQL[scanned.table][2]))
    con.execute(read_sql("staging/classify.sql"), {"header_lines": scanned.header_lines})
    # Records are numbered by file line: empty lines (skipped by the reader) are looked for only
    # when some record will be reported, which spares a pass over a clean file.
    if scanned.path is not None and _any_reported(con):
        scanned.empty_lines = sources.empty_lines_of(scanned.path)
        if scanned.empty_lines:
            scanned.write_skip_offset(con)
            con.execute(read_sql("staging/classify.sql"), {"header_lines": scanned.header_lines})


def _write_repeated_keys(con) -> None:
    """Temp table ``stage_repeats``: key hashes held by more than one record without problems.

    Sorting the 64-bit hashes (numpy) finds them several times faster than a hash aggregate
    over keys that are nearly all distinct; classify.sql then compares the keys themselves.
    Session variable ``dromos_keys_repeat``: whether any hash repeats (when none does, the
    usual case, the checks skip hashing every key again).
    """
    found = con.execute("SELECT key_hash FROM stage_checked WHERE len(problems) = 0").fetchnumpy()
    hashes = np.sort(np.asarray(found["key_hash"], dtype=np.uint64))
    repeated = np.unique(hashes[1:][hashes[1:] == hashes[:-1]])
    con.execute("CREATE OR REPLACE TEMP TABLE stage_repeats (key_hash UBIGINT)")
    con.execute("SET VARIABLE dromos_keys_repeat = ?", [bool(len(repeated))])
    if len(repeated):
        con.register("_repeated_hashes", pa.table({"key_hash": pa.array(repeated, pa.uint64())}))
        con.execute("INSERT INTO stage_repeats SELECT key_hash FROM _repeated_hashes")
        con.unregister("_repeated_hashes")


def _any_reported(con) -> bool:
    """True when some staged record is quarantined, duplicate or repaired (it gets a number)."""
    return con.execute("SELECT EXISTS (SELECT 1 FROM stage_outcome)").fetchone()[0]


@contextlib.contextmanager
def _read_errors(path: Path, kind: str, mapping: Mapping):
    """DuckDB's reading errors as an error naming the file and what to check."""
    try:
        yield
    except (duckdb.InvalidInputException, duckdb.IOException, duckdb.ConversionException) as exc:
        raise InputFileError(
            f"{path}: cannot be read as {kind} with mapping {mapping.mapping_id}: {exc}. "
            "Check the file's delimiter, quoting and encoding against the mapping."
        ) from exc


def _check_positions(con, positional: bool) -> None:
    """Record where CSV row numbering starts (variable dromos_first_rowid, see macros.sql).

    A CSV source has no row_k: staging kept file order (no hash join before its output), so
    a row's storage position in ``stage_typed`` is its position among the parsed rows. The
    positions of a new table are one contiguous run; that is checked, never assumed.
    """
    first, last, n = con.execute("SELECT min(rowid), max(rowid), count(*) FROM stage_typed").fetchone()
    if positional and n and last - first + 1 != n:
        raise RegistryError(
            f"internal error: the {n} staged rows do not sit in one run of positions "
            f"({first}..{last}); nothing was loaded. Please report this"
        )
    con.execute("SET VARIABLE dromos_first_rowid = ?", [int(first or 0)])


@contextlib.contextmanager
def _insertion_order_free(con):
    """Let DuckDB append rows to a registry table in any order (setting restored after).

    The order of stored rows means nothing (records were numbered while staging). An
    order-keeping copy of the staged rows leaves part-filled row groups at every batch of the
    parallel read, which the next checkpoint merges by rewriting them (2-3 s per 5.7M ECG rows
    and dead space in the file); appending in any order fills whole row groups.
    """
    before = con.execute("SELECT current_setting('preserve_insertion_order')").fetchone()[0]
    con.execute("SET preserve_insertion_order = false")
    try:
        yield
    finally:
        con.execute(f"SET preserve_insertion_order = {'true' if before else 'false'}")


def _write_outcomes(con, table: str, source_id: str, rejected: list) -> tuple[int, int, int, int]:
    """Insert loaded rows and the quarantine / repair / duplicate records; return the counts."""
    target_columns = [row[0] for row in con.execute(f"DESCRIBE {table}").fetchall() if row[0] != "source_id"]
    held_back = con.execute("SELECT EXISTS (SELECT 1 FROM stage_outcome WHERE status <> 'load')").fetchone()[0]
    # A file with nothing held back (the usual case) is copied without the anti-join.
    keep = ("WHERE NOT EXISTS (SELECT 1 FROM stage_outcome AS o WHERE o.row_k = s.row_k AND o.status <> 'load')"
            if held_back else "")
    with _insertion_order_free(con):
        con.execute(
            f"INSERT INTO {table} ({', '.join(target_columns)}, source_id) "
            f"SELECT {', '.join(target_columns)}, $source_id FROM stage_checked AS s {keep}",
            {"source_id": source_id},
        )
    params = {"source_id": source_id}
    con.execute(read_sql("staging/record_quarantine.sql"), params)
    if rejected:
        con.executemany(
            "INSERT INTO quarantine VALUES (?, ?, ?, ?, ?)",
            [(source_id, record, column, raw, reason) for record, column, raw, reason in rejected],
        )
    con.execute(read_sql("staging/record_repairs.sql"), params)
    con.execute(read_sql("staging/record_duplicates.sql"), params)
    staged, quarantined, duplicate, repaired = con.execute(
        """
        SELECT (SELECT count(*) FROM stage_checked), count(*) FILTER (status = 'quarantine'),
               count(*) FILTER (status = 'duplicate'),
               count(*) FILTER (status = 'load' AND len(repairs) > 0)
        FROM stage_outcome
        """
    ).fetchone()
    return staged - quarantined - duplicate, quarantined + len(rejected), duplicate, repaired


def _check_pseudonym_consistency(con, check: str | None, path: Path) -> None:
    earlier = con.execute("SELECT DISTINCT key_check FROM load_log").fetchall()
    for (previous,) in earlier:
        if previous != check:
            what = "with a different pseudonym key" if previous and check else (
                "with pseudonymized ids" if previous else "with plain ids"
            )
            raise InputFileError(
                f"{path}: the registry was loaded {what}; load every file the same way "
                "(same key, or none) or the same person would get two keys"
            )


def load_file(
    con,
    path: str | Path,
    *,
    mapping: Mapping | None = None,
    table: str | None = None,
    key: bytes | None = None,
    rules: dict | None = None,
) -> LoadResult:
    """Load one source file in one transaction; on any error the registry is unchanged."""
    path = Path(path)
    if not path.is_file():
        raise InputFileError(f"{path}: no such file")
    mapping = mapping or load_mapping()
    rules = rules or load_validation_rules()
    kind = sources.source_kind(path)
    if kind == "fhir":
        from cohort.ingest.fhir import load_fhir_file

        return load_fhir_file(con, path, mapping=mapping, key=key, rules=rules, load=_load_scanned)
    table_mapping = mapping.tables[table] if table else mapping.table_for(path)
    if table and table not in mapping.tables:
        raise MappingError(f"mapping {mapping.mapping_id} has no [table.{table}] section")
    sha256 = sources.file_sha256(path)

    def scan(parallel: bool = True) -> sources.ScanResult:
        if kind == "csv":
            return sources.scan_csv(con, path, mapping, table_mapping, parallel=parallel)
        return sources.scan_parquet(con, path, table_mapping)

    try:
        return _load_scanned(con, path, scan, table_mapping, mapping, key, rules, sha256, kind)
    except (InputFileError, duckdb.Error) as exc:
        if not sources.needs_serial_read(exc):
            raise
    # quoted line breaks: the whole load again (it was rolled back), reading on one thread
    return _load_scanned(con, path, lambda: scan(parallel=False), table_mapping, mapping, key,
                         rules, sha256, kind)


def _load_scanned(
    con,
    path: Path,
    scan: Callable[[], sources.ScanResult],
    table_mapping: TableMapping,
    mapping: Mapping,
    key: bytes | None,
    rules: dict,
    sha256: str,
    kind: str,
) -> LoadResult:
    """Run scan -> stage -> classify -> write -> log inside one transaction.

    Content loaded before (same ``sha256``, same table) loads nothing and is reported as skipped.
    """
    started = time.perf_counter()
    table = table_mapping.table
    source_id = f"{table}:{sha256[:16]}"
    ensure_schema(con)
    if con.execute("SELECT 1 FROM load_log WHERE source_id = ?", [source_id]).fetchone():
        return LoadResult(path, table, source_id, 0, 0, 0, 0, 0, 0.0, skipped=True)
    check = key_check(key)
    _check_pseudonym_consistency(con, check, path)
    con.execute("BEGIN TRANSACTION")
    try:
        _prepare_session(con, rules, table_mapping, key)
        with _read_errors(path, kind, mapping):  # the file itself is read while staging
            scanned = scan()
            _stage_rows(con, table_mapping)
            _stage_checks(con, scanned)
        staged = con.execute("SELECT count(*) FROM stage_checked").fetchone()[0]
        if staged == 0 and scanned.rejected:
            reasons = sorted({reason for *_, reason in scanned.rejected})
            raise InputFileError(
                f"{path}: no line could be read ({len(scanned.rejected)} rejected: {'; '.join(reasons)}). "
                "Check the delimiter and quote settings in the mapping and that the file is UTF-8 "
                "(convert with e.g. iconv -f latin1 -t utf-8)."
            )
        rejected = scanned.rejected
        if key is not None:  # a raw line holds the plain person id: keep only the reason
            rejected = [(record, column, None, reason) for record, column, _, reason in rejected]
        loaded, quarantined, duplicate, repaired = _write_outcomes(con, table, source_id, rejected)
        seconds = time.perf_counter() - started
        rows_read = staged + len(scanned.rejected)
        con.execute(
            "INSERT INTO load_log VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, current_timestamp, ?, ?)",
            [source_id, str(path), kind, table, sha256, mapping.sha256, rows_read, loaded, quarantined,
             duplicate, repaired, key is not None, check, seconds, __version__],
        )
        _drop_temporaries(con)
        con.execute("COMMIT")
    except BaseException:
        con.execute("ROLLBACK")
        _drop_temporaries(con)
        raise
    return LoadResult(path, table, source_id, rows_read, loaded, quarantined, duplicate, repaired, seconds)


_TEMPORARIES = (
    "stage_outcome", "stage_checked", "stage_typed", "stage_repeats", "stage_content",
    "stage_content_needed", "raw_arrow", "skip_offset",
    "dromos_rejects", "dromos_reject_scans", "src", "raw_numbered", "raw_source", "target_rows",
)


def _drop_temporaries(con) -> None:
    present = con.execute(
        "SELECT table_name, 'TABLE' FROM duckdb_tables() WHERE temporary "
        "UNION ALL SELECT view_name, 'VIEW' FROM duckdb_views() WHERE temporary"
    ).fetchall()
    for name, kind in present:
        if name in _TEMPORARIES:
            con.execute(f"DROP {kind} IF EXISTS {name}")


def order_for_loading(paths: Iterable[Path], mapping: Mapping, table: str | None = None) -> list[Path]:
    """Files sorted so that a table's references are loaded first (persons before ECGs...)."""
    def rank(path: Path) -> tuple[int, str]:
        if sources.source_kind(path) == "fhir":
            from cohort.ingest.fhir import fhir_rank

            return fhir_rank(path), path.name
        name = table or mapping.table_for(path).table
        return LOAD_ORDER.index(name), path.name

    return sorted(paths, key=rank)


def expand_sources(sources_given: Iterable[str | Path]) -> list[Path]:
    """Files named, with directories expanded to the data files they hold."""
    found: list[Path] = []
    for item in sources_given:
        path = Path(item)
        if path.is_dir():
            for pattern in ("*.csv", "*.csv.gz", "*.parquet", "*.ndjson", "*.ndjson.gz"):
                found.extend(sorted(path.glob(pattern)))
        elif path.exists():
            found.append(path)
        else:
            raise InputFileError(f"{path}: no such file or directory")
    if not found:
        raise InputFileError("no data files found in the sources given (.csv, .parquet, .ndjson)")
    return found


def ingest(
    con,
    sources_given: Iterable[str | Path],
    *,
    mapping: str | Path | Mapping | None = None,
    table: str | None = None,
    key: bytes | None = None,
    progress: Callable[[LoadResult], None] | None = None,
) -> list[LoadResult]:
    """Load every file (directories expanded) in dependency order; return one result per file."""
    mapping = mapping if isinstance(mapping, Mapping) else load_mapping(mapping)
    rules = load_validation_rules()
    paths = order_for_loading(expand_sources(sources_given), mapping, table)
    results = []
    for path in paths:
        result = load_file(con, path, mapping=mapping, table=table, key=key, rules=rules)
        results.append(result)
        if progress:
            progress(result)
    return results
