"""Append-only file writers (CSV, Parquet, NDJSON) that count rows; sha256 at close."""

from __future__ import annotations

import hashlib
import io
from pathlib import Path

import polars as pl
import pyarrow as pa
import pyarrow.parquet as pq

DATETIME_FORMAT = "%Y-%m-%dT%H:%M:%S"

_ARROW = {
    pl.String: pa.string(),
    pl.Date: pa.date32(),
    pl.Int32: pa.int32(),
    pl.Int64: pa.int64(),
    pl.Float64: pa.float64(),
    pl.Boolean: pa.bool_(),
}


def csv_bytes(frame: pl.DataFrame, header: bool) -> bytes:
    """RFC 4180 CSV (quotes only where needed), ISO dates, '\\n' line ends, empty = missing."""
    buf = io.BytesIO()
    frame.write_csv(
        buf,
        include_header=header,
        date_format="%Y-%m-%d",
        datetime_format=DATETIME_FORMAT,
        quote_style="necessary",
        line_terminator="\n",
    )
    return buf.getvalue()


def sha256_of(path: Path) -> str:
    h = hashlib.sha256()
    with path.open("rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 22), b""):
            h.update(chunk)
    return h.hexdigest()


class Sink:
    """Base: a file, its row count, and the manifest entry written at close."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.rows = 0

    def entry(self, root: Path) -> dict[str, object]:
        return {
            "path": self.path.relative_to(root).as_posix(),
            "rows": self.rows,
            "bytes": self.path.stat().st_size,
            "sha256": sha256_of(self.path),
        }


class CsvSink(Sink):
    """CSV file written block by block; the header comes from the schema."""

    def __init__(self, path: Path, schema: dict[str, pl.DataType]) -> None:
        super().__init__(path)
        self.schema = schema
        self.fh = path.open("wb")
        self.fh.write(csv_bytes(pl.DataFrame(schema=schema), header=True))

    def write(self, frame: pl.DataFrame) -> None:
        if frame.height:
            self.fh.write(csv_bytes(frame, header=False))
            self.rows += frame.height

    def write_raw(self, data: bytes, rows: int) -> None:
        """Bytes already serialized (e.g. with injected defects)."""
        self.fh.write(data)
        self.rows += rows

    def close(self) -> None:
        self.fh.close()


def arrow_schema(schema: dict[str, pl.DataType]) -> pa.Schema:
    fields = []
    for name, dtype in schema.items():
        if isinstance(dtype, pl.Datetime) or dtype == pl.Datetime:
            fields.append(pa.field(name, pa.timestamp("ms")))
        else:
            fields.append(pa.field(name, _ARROW[dtype]))
    return pa.schema(fields)


class ParquetSink(Sink):
    """Parquet file with one row group per written block (same bytes whatever the chunking)."""

    def __init__(self, path: Path, schema: dict[str, pl.DataType] | None = None) -> None:
        super().__init__(path)
        self.schema = arrow_schema(schema) if schema is not None else None
        self.writer: pq.ParquetWriter | None = None

    def write(self, frame: pl.DataFrame) -> None:
        table = frame.to_arrow()
        if self.schema is None:
            self.schema = pa.schema([pa.field(f.name, _plain(f.type)) for f in table.schema])
        table = table.cast(self.schema)
        if self.writer is None:
            self.writer = pq.ParquetWriter(self.path, self.schema, compression="zstd")
        if table.num_rows:
            self.writer.write_table(table)
            self.rows += table.num_rows

    def close(self) -> None:
        if self.writer is None:
            assert self.schema is not None, "ParquetSink closed before any schema was known"
            self.writer = pq.ParquetWriter(self.path, self.schema, compression="zstd")
        self.writer.close()


def _plain(t: pa.DataType) -> pa.DataType:
    """Arrow view/large string types as plain string (portable Parquet)."""
    if pa.types.is_large_string(t) or pa.types.is_string_view(t):
        return pa.string()
    return t


class NdjsonSink(Sink):
    """One JSON resource per line."""

    def __init__(self, path: Path) -> None:
        super().__init__(path)
        self.fh = path.open("wb")

    def write_lines(self, lines: list[str]) -> None:
        if lines:
            self.fh.write(("\n".join(lines) + "\n").encode("utf-8"))
            self.rows += len(lines)

    def close(self) -> None:
        self.fh.close()
