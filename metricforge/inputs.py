"""Input files: discovery, schema checks and fingerprints, from Parquet footers only."""

from __future__ import annotations

import hashlib
import json
import struct
from dataclasses import dataclass
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

from metricforge.errors import InputDataError


@dataclass(frozen=True)
class InputFile:
    path: Path
    label: str  # path as shown in outputs: relative to the spec's folder
    size: int
    rows: int
    footer_sha256: str
    schema: pa.Schema


def parquet_files(path: Path) -> list[Path]:
    if path.is_file():
        return [path]
    if path.is_dir():
        files = sorted(p for p in path.rglob("*.parquet") if p.is_file())
        if files:
            return files
        raise InputDataError("no .parquet files in folder", file=str(path))
    raise InputDataError("input not found", file=str(path))


def _footer_sha256(path: Path) -> str:
    with path.open("rb") as fh:
        fh.seek(0, 2)
        size = fh.tell()
        if size < 12:
            raise InputDataError("not a Parquet file (too small)", file=str(path))
        fh.seek(size - 8)
        tail = fh.read(8)
        if tail[4:] != b"PAR1":
            raise InputDataError("not a Parquet file (no footer magic)", file=str(path))
        (length,) = struct.unpack("<I", tail[:4])
        if length + 12 > size:
            raise InputDataError("corrupt Parquet footer", file=str(path))
        fh.seek(size - 8 - length)
        return hashlib.sha256(fh.read(length)).hexdigest()


def inspect(path: Path, base: Path) -> InputFile:
    footer = _footer_sha256(path)
    try:
        meta = pq.read_metadata(path)
        schema = pq.read_schema(path)
    except (pa.ArrowException, OSError) as err:
        first = str(err).splitlines()[0] if str(err) else type(err).__name__
        raise InputDataError(f"cannot read Parquet: {first}", file=str(path)) from None
    try:
        label = path.resolve().relative_to(base.resolve()).as_posix()
    except ValueError:
        label = path.as_posix()
    return InputFile(path, label, path.stat().st_size, meta.num_rows, footer, schema)


_TYPE_CHECKS = {
    "string": lambda t: pa.types.is_string(t) or pa.types.is_large_string(t),
    "double": lambda t: pa.types.is_floating(t) or pa.types.is_integer(t) or pa.types.is_decimal(t),
    "timestamp": pa.types.is_timestamp,
}


def check_columns(files: list[InputFile], needed: dict[str, str], what: str) -> None:
    """Every file must hold every needed column with a compatible type."""
    total_rows = 0
    for f in files:
        names = set(f.schema.names)
        for column, logical in needed.items():
            if column not in names:
                if column == "date":
                    continue
                raise InputDataError(
                    f"{what} file lacks column '{column}'", file=f.label, key=column
                )
            arrow_type = f.schema.field(column).type
            if not _TYPE_CHECKS[logical](arrow_type):
                raise InputDataError(
                    f"column '{column}' has type {arrow_type}, expected {logical}",
                    file=f.label,
                    key=column,
                )
        total_rows += f.rows
    if total_rows == 0:
        raise InputDataError(f"{what} log has no rows", file=files[0].label if files else what)


def fingerprint(files: list[InputFile]) -> str:
    """One hash over every input file's label, size, row count and footer hash."""
    payload = [[f.label, f.size, f.rows, f.footer_sha256] for f in files]
    return hashlib.sha256(json.dumps(payload, separators=(",", ":")).encode()).hexdigest()


def describe(files: list[InputFile]) -> list[dict[str, object]]:
    return [
        {"path": f.label, "size": f.size, "rows": f.rows, "footer_sha256": f.footer_sha256}
        for f in files
    ]
