"""Expose a source file to the staging SQL as the view ``src`` (canonical text columns).

CSV is read by DuckDB in one pass on all threads, with rejected lines captured (invalid UTF-8,
two or more fields too many) and a wrong field count flagged per row (``line_problem``);
Parquet is read as is (its row number is the record); FHIR NDJSON is flattened in ``cohort.ingest.fhir``. Every
source yields the same view, so one set of staging statements validates them all.
"""

from __future__ import annotations

import csv
import hashlib
import io
import re
from dataclasses import dataclass, field
from pathlib import Path

from cohort.errors import InputFileError, MappingError
from cohort.ingest.mapping import CANONICAL_COLUMNS, Mapping, TableMapping

_CHUNK = 8 * 1024 * 1024


@dataclass
class ScanResult:
    """What reading a source produced besides the ``src`` view."""

    kind: str  # csv | parquet | fhir
    table: str
    path: Path | None = None
    header_lines: int = 0
    empty_lines: list[int] | None = None
    """1-based numbers of the file's empty lines; None until looked for (see loader)."""
    rejected: list[tuple[int, str | None, str, str]] = field(default_factory=list)
    """(record, field, raw line, reason) of lines the reader could not split into fields."""
    preset_rejects: list[tuple[int, str | None, str, str]] = field(default_factory=list)
    """Lines a Python reader (FHIR) rejected itself, numbered as records already."""
    positional: bool = False
    """True when ``src`` has no row_k: a staged row's record is its position (CSV)."""
    reject_lines: list[int] = field(default_factory=list)
    """File line numbers of the rejected lines (see finish)."""

    def finish(self, con) -> None:
        """After staging read the file: collect rejected lines, build table ``skip_offset``."""
        rejects = []
        if self.kind == "csv":
            rejects = con.execute(
                """
                SELECT line, any_value(column_name), any_value(csv_line),
                       string_agg(DISTINCT error_type, ', ' ORDER BY error_type)
                FROM dromos_rejects GROUP BY line ORDER BY line
                """
            ).fetchall()
        self.rejected = [
            (line - self.header_lines, column if "ENCODING" in kinds else None, raw, _reject_reason(kinds))
            for line, column, raw, kinds in rejects
        ] + list(self.preset_rejects)
        self.reject_lines = [line for line, *_ in rejects]
        self.write_skip_offset(con)

    def write_skip_offset(self, con) -> None:
        """Table ``skip_offset(k_start, lines_before)``: parsed rows from the k_start-th on sit
        ``lines_before`` lines further down the file than their position (header, empty and
        rejected lines are not parsed; one record per line)."""
        skipped = sorted(set(self.reject_lines) | set(self.empty_lines or ())
                         | set(range(1, self.header_lines + 1)))
        # consecutive skipped lines share a k_start: the last (largest count) applies
        offsets = list({line - j + 1: j for j, line in enumerate(skipped, start=1)}.items())
        con.execute("CREATE OR REPLACE TEMP TABLE skip_offset (k_start BIGINT, lines_before BIGINT)")
        if offsets:
            con.executemany("INSERT INTO skip_offset VALUES (?, ?)", offsets)


def file_sha256(path: Path) -> str:
    """SHA-256 of the file's bytes (hex)."""
    with path.open("rb") as handle:
        return hashlib.file_digest(handle, "sha256").hexdigest()


# A newline followed by an empty line (LF or CRLF); zero-width, so runs of empty lines all match.
_BEFORE_EMPTY_LINE = re.compile(b"\n(?=\r?\n)")


def empty_lines_of(path: Path) -> list[int]:
    """The 1-based numbers of the file's empty lines (the CSV reader skips them)."""
    empty_lines: list[int] = []
    line_no = 1  # number of the line the chunk starts in
    previous_end = b"\n"  # a file starting with a newline has an empty first line
    with path.open("rb") as handle:
        while chunk := handle.read(_CHUNK):
            data = previous_end + chunk
            seen, newlines = 0, 0
            for hit in _BEFORE_EMPTY_LINE.finditer(data):
                newlines += data.count(b"\n", seen, hit.start() + 1)
                seen = hit.start() + 1
                empty_lines.append(line_no + newlines - 1)
            line_no += chunk.count(b"\n")
            previous_end = chunk[-1:]
    return sorted(set(empty_lines))


def source_kind(path: Path) -> str:
    """csv, parquet or fhir, from the file name."""
    name = path.name.lower()
    if name.endswith((".ndjson", ".ndjson.gz", ".jsonl")):
        return "fhir"
    if name.endswith(".parquet"):
        return "parquet"
    if name.endswith((".csv", ".csv.gz", ".txt", ".tsv")):
        return "csv"
    raise InputFileError(f"{path}: unknown file type; expected .csv, .parquet or .ndjson")


def _csv_header(path: Path, options: dict) -> list[str]:
    with path.open("rb") as handle:
        first = handle.readline().decode("utf-8", errors="replace").lstrip("\ufeff")
    if not first.strip():
        raise InputFileError(f"{path}: the first line is empty; a header line is required")
    reader = csv.reader(io.StringIO(first), delimiter=options["delimiter"], quotechar=options["quote"])
    return [name.strip() for name in next(reader)]


def _check_mapped_columns(path: Path, header: list[str], table: TableMapping) -> None:
    missing = [source for source in table.columns.values() if source not in header]
    if missing:
        raise MappingError(
            f"{path}: column(s) {', '.join(missing)} named in the mapping for table "
            f"'{table.table}' are not in the file (its columns: {', '.join(header)}). "
            "Fix the [table.*.columns] section of the mapping or the file's header."
        )


def _create_src_view(con, relation: str, table: TableMapping, list_columns: set[str],
                     line_check: tuple[str, str, str] | None = None) -> None:
    """View ``src``: row_k, every canonical column as text (NULL when not mapped or empty),
    and ``line_problem`` / ``line_raw`` (a CSV line with a wrong number of fields).

    ``line_check`` = (last source column, extra column, delimiter) of a CSV read with one
    column more than its header and empty fields kept as '' (see :func:`scan_csv`).
    """
    parts = ["row_k"]
    separator = table.options.get("statement_separator", " | ")
    for canonical in CANONICAL_COLUMNS[table.table]:
        source = table.columns.get(canonical)
        if source is None:
            parts.append(f"CAST(NULL AS VARCHAR) AS {canonical}")
        elif source in list_columns:
            sep = separator if canonical == "statements" else table.options.get("code_separator", ";")
            parts.append(f"array_to_string(\"{source}\", '{sep}') AS {canonical}")
        elif line_check:
            parts.append(f"nullif(\"{source}\", '') AS {canonical}")
        else:
            parts.append(f'CAST("{source}" AS VARCHAR) AS {canonical}')
    if line_check:
        last, extra, delimiter = line_check
        parts.append(
            f"CASE WHEN \"{extra}\" IS NOT NULL THEN 'malformed line (too many columns)' "
            f"WHEN \"{last}\" IS NULL THEN 'malformed line (missing columns)' END AS line_problem"
        )
        fields = ", ".join(f'"{name}"' for name in _raw_columns(con, relation) if name != "row_k")
        parts.append(
            f"CASE WHEN \"{extra}\" IS NOT NULL OR \"{last}\" IS NULL "
            f"THEN concat_ws('{delimiter.replace(chr(39), chr(39) * 2)}', {fields}) END AS line_raw"
        )
    else:
        parts += ["CAST(NULL AS VARCHAR) AS line_problem", "CAST(NULL AS VARCHAR) AS line_raw"]
    con.execute(f"CREATE OR REPLACE TEMP VIEW src AS SELECT {', '.join(parts)} FROM {relation}")


def _raw_columns(con, relation: str) -> list[str]:
    return [row[0] for row in con.execute(f"DESCRIBE {relation}").fetchall()]


# Read as NULL by the CSV reader: never a whole field in practice, so empty fields arrive as ''
# and only the padding of a short line is NULL (empty fields become NULL in ``src``).
_NEVER_NULL = "\x02dromos:no-null-marker\x03"


def _extra_column(header: list[str]) -> str:
    name = "dromos_extra_field"
    while name in header:
        name += "_"
    return name


def scan_csv(con, path: Path, mapping: Mapping, table: TableMapping, *, parallel: bool = True) -> ScanResult:
    """Define ``src`` over DuckDB's ``read_csv`` of the file (read once, when staging runs).

    The file is read with one column more than its header and with padding of short lines, so
    that a wrong number of fields shows in the row itself (``line_problem``): DuckDB would
    otherwise accept a line with one extra empty field silently. ``src`` has no row_k:
    numbering rows with a window function would make DuckDB read the file on one thread.
    Staging keeps file order instead (no hash join before its output), and the loader numbers
    the staged rows by position (``ScanResult.positional``). ``parallel=False`` reads on one
    thread: DuckDB's parallel reader cannot pad short lines of a file with quoted line breaks.
    """
    options = mapping.csv
    header = _csv_header(path, options)
    _check_mapped_columns(path, header, table)
    header_lines = 1 if options.get("header", True) else 0
    extra = _extra_column(header)
    columns = ", ".join(f"'{name.replace(chr(39), chr(39) * 2)}': 'VARCHAR'" for name in [*header, extra])
    con.execute("DROP TABLE IF EXISTS dromos_rejects; DROP TABLE IF EXISTS dromos_reject_scans")
    quoted = {k: "'" + str(options[k]).replace("'", "''") + "'" for k in ("delimiter", "quote", "escape")}
    path_text = str(path).replace("'", "''")
    con.execute(
        f"""
        CREATE OR REPLACE TEMP VIEW raw_numbered AS
        SELECT CAST(NULL AS BIGINT) AS row_k, *
        FROM read_csv(
            '{path_text}', header = {str(bool(header_lines)).lower()}, auto_detect = false,
            columns = {{{columns}}}, delim = {quoted['delimiter']}, quote = {quoted['quote']},
            escape = {quoted['escape']}, null_padding = true, nullstr = '{_NEVER_NULL}',
            parallel = {str(parallel).lower()}, store_rejects = true, rejects_table = 'dromos_rejects',
            rejects_scan = 'dromos_reject_scans', max_line_size = 10000000
        )
        """
    )
    _create_src_view(con, "raw_numbered", table, set(), (header[-1], extra, options["delimiter"]))
    return ScanResult(kind="csv", table=table.table, path=path, header_lines=header_lines, positional=True)


def needs_serial_read(error: BaseException) -> bool:
    """Whether a read failed only because the file has quoted line breaks (see scan_csv)."""
    cause = error.__cause__ or error
    return "quoted new lines" in str(cause) and "parallel" in str(cause)


def _reject_reason(error_types: str) -> str:
    if "INVALID ENCODING" in error_types or "INVALID UNICODE" in error_types:
        return "invalid UTF-8 bytes in the line"
    return f"malformed line ({error_types.lower()})"


def scan_parquet(con, path: Path, table: TableMapping) -> ScanResult:
    """Define ``src`` over the Parquet file (record = row position in the file)."""
    path_text = str(path).replace("'", "''")
    con.execute(
        "CREATE OR REPLACE TEMP VIEW raw_source AS SELECT * EXCLUDE (file_row_number), "
        f"file_row_number + 1 AS row_k FROM read_parquet('{path_text}', file_row_number = true)"
    )
    described = con.execute("DESCRIBE raw_source").fetchall()
    header = [row[0] for row in described]
    _check_mapped_columns(path, header, table)
    list_columns = {row[0] for row in described if str(row[1]).endswith("[]")}
    _create_src_view(con, "raw_source", table, list_columns)
    return ScanResult(kind="parquet", table=table.table)


def scan_arrow(con, arrow_table, table: TableMapping, kind: str) -> ScanResult:
    """Expose an Arrow table of canonical text columns (with ``row_k``) as ``src``."""
    con.register("dromos_arrow_source", arrow_table)
    con.execute("CREATE OR REPLACE TEMP TABLE raw_arrow AS SELECT * FROM dromos_arrow_source")
    con.unregister("dromos_arrow_source")
    identity = TableMapping(
        table=table.table,
        files=table.files,
        columns={c: c for c in CANONICAL_COLUMNS[table.table] if c in arrow_table.column_names},
        options=table.options,
    )
    _create_src_view(con, "raw_arrow", identity, set())
    return ScanResult(kind=kind, table=table.table)
