"""Input files: discovery, schema checks and fingerprints, from Parquet footers only.

Data paths: a path the spec names (absolute, or relative to the spec's folder) may be
anywhere the user can read, but it must be a regular Parquet file or a folder. In a
folder, only ``*.parquet`` files are read, and a file that is a symbolic link must point
inside that folder. Footers give each file's row count, hash and per-column null counts
(used by the data-quality section) without reading any data.

Data URIs (``s3a://``, ``hdfs://``, ``file://``, ...; locations.py): the files are listed and
their footers read through pyarrow's file system of the URI; a file's label is its URI as
written, so it is the same on every machine.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import os
import struct
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq

from metricforge.errors import InputDataError
from metricforge.locations import Uri, describe

# Where an input is: a local path, or a URI of a file system pyarrow opens (locations.py).
Where = Path | Uri
URI_WORKERS = 8  # footers of remote files are read this many at a time


@dataclass(frozen=True)
class InputFile:
    path: Where
    label: str  # as shown in outputs: relative to the spec's folder, or the URI as written
    size: int
    rows: int
    footer_sha256: str
    schema: pa.Schema
    content_sha256: str | None = None  # of the whole file; only when asked for (slow)
    # Per top-level column: null values recorded in the footer statistics (None: not recorded)
    null_counts: dict[str, int | None] = field(default_factory=dict, compare=False)


def within(path: Where, root: Path | Uri) -> bool:
    """Whether the input file ``path`` was listed from the data location ``root``."""
    if isinstance(path, Uri) or isinstance(root, Uri):
        return isinstance(path, Uri) and isinstance(root, Uri) and path.within(root)
    return path == root or root in path.parents


def _inside(path: Path, folder: Path) -> bool:
    try:
        path.resolve().relative_to(folder.resolve())
    except ValueError:
        return False
    return True


def parquet_files(path: Path) -> list[Path]:
    """The Parquet files a data path names: the file itself, or a folder's *.parquet
    (for a URI, see ``locations.parquet_files``)."""
    try:
        if path.is_file():
            return [path]
        if path.is_dir():
            files = sorted(p for p in path.rglob("*.parquet") if p.is_file())
            for p in files:
                if p.is_symlink() and not _inside(p, path):
                    raise InputDataError(
                        "a symbolic link in the data folder points outside it", file=str(p)
                    )
            if files:
                return files
            raise InputDataError("no .parquet files in folder", file=str(path))
        if path.exists():
            raise InputDataError("input is neither a regular file nor a folder", file=str(path))
    except (OSError, ValueError) as err:
        reason = getattr(err, "strerror", None) or str(err)
        raise InputDataError(f"cannot open input: {reason}", file=str(path)) from None
    raise InputDataError("input not found", file=str(path))


def _footer_sha256(path: Path) -> str:
    try:
        with path.open("rb") as fh:
            return _footer_hash(fh, fh.seek(0, 2), str(path))
    except OSError as err:
        raise InputDataError(f"cannot read file: {err.strerror}", file=str(path)) from None


def _footer_hash(fh: Any, size: int, name: str) -> str:
    """SHA-256 of the Parquet footer of the open file ``fh`` (a Python or pyarrow file)."""
    if size < 12:
        raise InputDataError("not a Parquet file (too small)", file=name)
    fh.seek(size - 8)
    tail = fh.read(8)
    if tail[4:] != b"PAR1":
        raise InputDataError("not a Parquet file (no footer magic)", file=name)
    (length,) = struct.unpack("<I", tail[:4])
    if length + 12 > size:
        raise InputDataError("corrupt Parquet footer", file=name)
    fh.seek(size - 8 - length)
    return hashlib.sha256(fh.read(length)).hexdigest()


def inspect(path: Where, base: Path) -> InputFile:
    if isinstance(path, Uri):
        return _inspect_uri(path)
    footer = _footer_sha256(path)
    try:
        meta = pq.read_metadata(path)
        schema = pq.read_schema(path)
    except (pa.ArrowException, OSError) as err:
        first = str(err).splitlines()[0] if str(err) else type(err).__name__
        raise InputDataError(f"cannot read Parquet: {first}", file=str(path)) from None
    return InputFile(
        path,
        label_of(path, base),
        path.stat().st_size,
        meta.num_rows,
        footer,
        schema,
        null_counts=_null_counts(meta),
    )


def _inspect_uri(uri: Uri) -> InputFile:
    """The same from a file system pyarrow opened: the footer only, never a data page."""
    try:
        with uri.fs.open_input_file(uri.arrow_path) as fh:
            size = fh.size()
            footer = _footer_hash(fh, size, uri.text)
            reader = pq.ParquetFile(fh)
            meta, schema = reader.metadata, reader.schema_arrow
    except (pa.ArrowException, OSError) as err:
        raise InputDataError(
            f"cannot read Parquet: {describe(err, uri.scheme)}", file=uri.text
        ) from None
    return InputFile(
        uri, uri.text, size, meta.num_rows, footer, schema, null_counts=_null_counts(meta)
    )


def inspect_all(paths: list[Where], base: Path) -> list[InputFile]:
    """``inspect`` of every file, in order; the footers of URIs are read a few at a time."""
    if len(paths) < 2 or not any(isinstance(p, Uri) and p.remote for p in paths):
        return [inspect(p, base) for p in paths]
    with ThreadPoolExecutor(max_workers=URI_WORKERS) as pool:
        return list(pool.map(lambda p: inspect(p, base), paths))


def read_metadata(path: Where) -> pq.FileMetaData:
    """A file's Parquet footer (metadata only)."""
    try:
        if isinstance(path, Uri):
            with path.fs.open_input_file(path.arrow_path) as fh:
                return pq.read_metadata(fh)
        return pq.read_metadata(path)
    except (pa.ArrowException, OSError) as err:
        scheme = path.scheme if isinstance(path, Uri) else "file"
        raise InputDataError(
            f"cannot read Parquet: {describe(err, scheme)}", file=str(path)
        ) from None


def label_of(path: Where, base: Path) -> str:
    """``path`` as the spec wrote it: relative to the spec's folder (lexically, so that the
    label does not depend on the working directory or on symbolic links), or absolute when
    the spec gave an absolute path; a URI as written."""
    if isinstance(path, Uri):
        return path.text
    try:
        return path.relative_to(base).as_posix()
    except ValueError:
        return Path(os.path.abspath(path)).as_posix()


def content_sha256(path: Where) -> str:
    """SHA-256 of a whole file, read in blocks."""
    digest = hashlib.sha256()
    if isinstance(path, Uri):
        with path.fs.open_input_stream(path.arrow_path) as stream:
            while block := stream.read(1 << 20):
                digest.update(block)
        return digest.hexdigest()
    with path.open("rb") as fh:
        while block := fh.read(1 << 20):
            digest.update(block)
    return digest.hexdigest()


def _size(path: Where) -> int:
    if isinstance(path, Uri):
        return int(path.fs.get_file_info(path.arrow_path).size)
    return path.stat().st_size


def _footer_now(f: InputFile) -> str:
    if isinstance(f.path, Uri):
        return inspect(f.path, Path()).footer_sha256
    return _footer_sha256(f.path)


def with_content_hashes(files: list[InputFile]) -> list[InputFile]:
    """``files`` with the hash of each whole file, refusing a file that changed since it was
    inspected (its size or footer differs now)."""
    out = []
    for f in files:
        try:
            digest = content_sha256(f.path)
            same = _size(f.path) == f.size and _footer_now(f) == f.footer_sha256
        except (OSError, pa.ArrowException) as err:
            scheme = f.path.scheme if isinstance(f.path, Uri) else "file"
            reason = getattr(err, "strerror", None) or describe(err, scheme)
            raise InputDataError(f"cannot read: {reason}", file=f.label) from None
        if not same:
            raise InputDataError("input file changed while the run read it", file=f.label)
        out.append(dataclasses.replace(f, content_sha256=digest))
    return out


def _null_counts(meta: pq.FileMetaData) -> dict[str, int | None]:
    """Nulls per top-level column from the row groups' statistics (None if not recorded)."""
    counts: dict[str, int | None] = {}
    for i in range(meta.num_row_groups):
        group = meta.row_group(i)
        for j in range(group.num_columns):
            chunk = group.column(j)
            name = chunk.path_in_schema
            if "." in name:
                continue
            stats = chunk.statistics
            known = stats is not None and stats.has_null_count
            before = counts.get(name, 0)
            counts[name] = before + int(stats.null_count) if known and before is not None else None
    return counts


def find_unreadable(paths: list[Path]) -> InputDataError | None:
    """The first input whose data pages cannot be decoded, as an error naming it.

    Used only after the engine failed, to name the broken file: it reads every file.
    """
    for path in paths:
        try:
            reader = pq.ParquetFile(path)
            for _ in reader.iter_batches(batch_size=65_536):
                pass
        except (pa.ArrowException, OSError, ValueError) as err:
            first = (str(err).splitlines() or [type(err).__name__])[0]
            return InputDataError(f"cannot read Parquet data: {first[:160]}", file=str(path))
    return None


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
