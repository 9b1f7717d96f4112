"""Expose a source file to the staging SQL as the view ``src`` (record + canonical text columns).

CSV is read by DuckDB in one pass with rejected lines captured (wrong field count, invalid
UTF-8); Parquet is read as is; FHIR NDJSON is flattened in ``cohort.ingest.fhir``. Every
source yields the same view, so one set of staging statements validates them all.
"""

from __future__ import annotations

import csv
import hashlib
import io
from dataclasses import dataclass, field
from pathlib import Path

from cohort.errors import InputFileError, MappingError
from cohort.ingest.mapping import CANONICAL_COLUMNS, Mapping, TableMapping

_CHUNK = 8 * 1024 * 1024


@dataclass
class ScanResult:
    """What reading a source produced besides the ``src`` view."""

    sha256: str
    kind: str  # csv | parquet | fhir
    header_lines: int = 0
    empty_lines: list[int] = field(default_factory=list)
    rejected: list[tuple[int, str | None, str, str]] = field(default_factory=list)
    """(record, field, raw line, reason) of lines the reader could not split into fields."""
    preset_rejects: list[tuple[int, str | None, str, str]] = field(default_factory=list)
    """Lines a Python reader (FHIR) rejected itself, numbered as records already."""
    csv_layout: tuple[Path, str, str, int] | None = None
    """(path, delimiter, quote, number of columns) of a CSV source, for the field-count check."""
    miscounted: list[tuple[int, str]] = field(default_factory=list)
    """(row_k, raw line) of parsed rows whose line has one field too many (see finish)."""

    def finish(self, con) -> None:
        """After staging read the file: collect rejected lines, build table ``skip_offset``.

        ``skip_offset(k_start, lines_before)``: parsed rows from the k_start-th on sit
        ``lines_before`` lines further down the file than their position (header, empty and
        rejected lines are not parsed; one record per line).
        """
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
        skipped = sorted({line for line, *_ in rejects} | set(self.empty_lines) | set(range(1, self.header_lines + 1)))
        # consecutive skipped lines share a k_start: the last (largest count) applies
        offsets = list({line - j + 1: j for j, line in enumerate(skipped, start=1)}.items())
        con.execute("CREATE OR REPLACE TEMP TABLE skip_offset (k_start BIGINT, lines_before BIGINT)")
        if offsets:
            con.executemany("INSERT INTO skip_offset VALUES (?, ?)", offsets)
        if self.csv_layout:
            self.miscounted = _trailing_extra_fields(con, *self.csv_layout, self.empty_lines, skipped)


def _trailing_extra_fields(con, path: Path, delimiter: str, quote: str, n_columns: int,
                           empty_lines: list[int], skipped: list[int]) -> list[tuple[int, str]]:
    """Parsed rows whose line ends in one extra, empty field.

    DuckDB's reader accepts a line with one field too many when that field is empty (a
    trailing delimiter), which would shift every value one column to the right. Lines ending
    in the delimiter are re-counted here (quoted text removed first) and returned as
    (row_k, line) so that they are quarantined instead.
    """
    path_text = str(path).replace("'", "''")
    d = delimiter.replace("'", "''")
    q = quote.replace("'", "''")
    unquoted = f"regexp_replace(l, '{q}[^{q}]*{q}', '', 'g')" if q else "l"
    rows = con.execute(
        f"""
        SELECT n, l FROM (
            SELECT row_number() OVER () AS n, l
            FROM read_csv('{path_text}', header = false, columns = {{'l': 'VARCHAR'}}, delim = '\x01',
                          quote = '', escape = '', auto_detect = false, strict_mode = false,
                          encoding = 'latin-1',  -- decodes any byte: line numbers stay aligned
                          null_padding = true, max_line_size = 10000000)
        )
        WHERE ends_with(l, '{d}')
          AND (length({unquoted}) - length(replace({unquoted}, '{d}', ''))) / length('{d}') >= {n_columns}
        """
    ).fetchall()
    found = []
    blanks = sorted(empty_lines)
    for ordinal, line in rows:  # the line scan skips empty lines: map back to file lines
        file_line = ordinal
        for blank in blanks:
            if blank <= file_line:
                file_line += 1
        row_k = file_line - sum(1 for s in skipped if s < file_line)
        if file_line not in skipped:
            found.append((row_k, line))
    return found


def file_digest(path: Path) -> tuple[str, list[int]]:
    """SHA-256 of the file and the 1-based numbers of its empty lines (one pass)."""
    digest = hashlib.sha256()
    empty_lines: list[int] = []
    line_no = 1
    previous_end = b"\n"  # a file starting with a newline has an empty first line
    with path.open("rb") as handle:
        while chunk := handle.read(_CHUNK):
            digest.update(chunk)
            data = previous_end + chunk
            start = 0
            while True:
                hit = data.find(b"\n\n", start)
                crlf = data.find(b"\n\r\n", start)
                hits = [h for h in (hit, crlf) if h >= 0]
                if not hits:
                    break
                pos = min(hits)
                empty_lines.append(line_no + data.count(b"\n", 0, pos + 1) - 1)
                start = pos + 1
            line_no += chunk.count(b"\n")
            previous_end = chunk[-1:]
    return digest.hexdigest(), sorted(set(empty_lines))


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


def _create_src_view(con, relation: str, table: TableMapping, list_columns: set[str]) -> None:
    """View ``src``: row_k and every canonical column as text (NULL when not mapped)."""
    parts = ["row_k"]
    separator = table.options.get("statement_separator", " | ")
    for canonical in CANONICAL_COLUMNS[table.table]:
        source = table.columns.get(canonical)
        if source is None:
            parts.append(f"CAST(NULL AS VARCHAR) AS {canonical}")
        elif source in list_columns:
            sep = separator if canonical == "statements" else table.options.get("code_separator", ";")
            parts.append(f"array_to_string(\"{source}\", '{sep}') AS {canonical}")
        else:
            parts.append(f'CAST("{source}" AS VARCHAR) AS {canonical}')
    con.execute(f"CREATE OR REPLACE TEMP VIEW src AS SELECT {', '.join(parts)} FROM {relation}")


def scan_csv(con, path: Path, mapping: Mapping, table: TableMapping, sha256: str, empty_lines: list[int]) -> ScanResult:
    """Define ``src`` over DuckDB's ``read_csv`` of the file (read once, when staging runs)."""
    options = mapping.csv
    header = _csv_header(path, options)
    _check_mapped_columns(path, header, table)
    header_lines = 1 if options.get("header", True) else 0
    columns = ", ".join(f"'{name.replace(chr(39), chr(39) * 2)}': 'VARCHAR'" for name in header)
    con.execute("DROP TABLE IF EXISTS dromos_rejects; DROP TABLE IF EXISTS dromos_reject_scans")
    quoted = {k: "'" + str(options[k]).replace("'", "''") + "'" for k in ("delimiter", "quote", "escape")}
    path_text = str(path).replace("'", "''")
    # row_number() OVER () follows file order (insertion order is preserved; checked in tests).
    con.execute(
        f"""
        CREATE OR REPLACE TEMP VIEW raw_numbered AS
        SELECT row_number() OVER () AS row_k, *
        FROM read_csv(
            '{path_text}', header = {str(bool(header_lines)).lower()}, auto_detect = false,
            columns = {{{columns}}}, delim = {quoted['delimiter']}, quote = {quoted['quote']},
            escape = {quoted['escape']}, null_padding = false, store_rejects = true,
            rejects_table = 'dromos_rejects', rejects_scan = 'dromos_reject_scans',
            max_line_size = 10000000
        )
        """
    )
    _create_src_view(con, "raw_numbered", table, set())
    return ScanResult(
        sha256=sha256, kind="csv", header_lines=header_lines, empty_lines=empty_lines,
        csv_layout=(path, options["delimiter"], options["quote"], len(header)),
    )


def _reject_reason(error_types: str) -> str:
    if "INVALID ENCODING" in error_types or "INVALID UNICODE" in error_types:
        return "invalid UTF-8 bytes in the line"
    return f"malformed line ({error_types.lower()})"


def scan_parquet(con, path: Path, table: TableMapping, sha256: str) -> ScanResult:
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
    return ScanResult(sha256=sha256, kind="parquet")


def scan_arrow(con, arrow_table, table: TableMapping, sha256: str, kind: str) -> ScanResult:
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
    return ScanResult(sha256=sha256, kind=kind)
