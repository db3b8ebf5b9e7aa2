"""Writing results all or nothing: a temporary folder beside the target, then a rename."""

from __future__ import annotations

import json
import math
import os
import shutil
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq

from metricforge.errors import OutputError
from metricforge.manifest import build_manifest
from metricforge.report.scorecard import Scorecard
from metricforge.runner import RunData


def _json_default(value: object) -> object:
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return str(value)


def dump_json(data: Any) -> bytes:
    text = json.dumps(data, indent=2, ensure_ascii=False, allow_nan=False, default=_json_default)
    return (text + "\n").encode("utf-8")


def manifest(data: RunData, card: Scorecard) -> dict[str, Any]:
    """The manifest's content lives in metricforge/manifest.py."""
    return build_manifest(data, card)


def _write(path: Path, payload: bytes) -> None:
    with path.open("wb") as fh:
        fh.write(payload)
        fh.flush()
        os.fsync(fh.fileno())


def write_outputs(out: Path, data: RunData, card: Scorecard) -> None:
    """Write scorecard.parquet, scorecard.json and manifest.json into ``out`` atomically."""
    out = out.absolute()
    parent = out.parent
    try:
        parent.mkdir(parents=True, exist_ok=True)
        if out.exists() and not out.is_dir():
            raise OutputError("output path exists and is not a folder", file=str(out))
        tmp = parent / f".{out.name}.partial-{os.getpid()}"
        if tmp.exists():
            shutil.rmtree(tmp)
        tmp.mkdir()
        pq.write_table(card.table(), tmp / "scorecard.parquet", compression="zstd")
        with (tmp / "scorecard.parquet").open("rb+") as fh:
            os.fsync(fh.fileno())
        _write(tmp / "scorecard.json", dump_json(card.as_json()))
        _write(tmp / "manifest.json", dump_json(manifest(data, card)))
        old = parent / f".{out.name}.old-{os.getpid()}"
        if out.exists():
            out.rename(old)
        tmp.rename(out)
        if old.exists():
            shutil.rmtree(old)
    except OSError as err:
        raise OutputError(f"cannot write results: {err.strerror}", file=str(out)) from None


def parquet_bytes(table: pa.Table) -> bytes:
    sink = pa.BufferOutputStream()
    pq.write_table(table, sink, compression="zstd")
    return bytes(sink.getvalue().to_pybytes())


def write_folder(out: Path, files: Mapping[str, bytes]) -> None:
    """Write ``files`` (name → content) as the folder ``out``, all or nothing, the same way
    as write_outputs: a hidden temporary folder beside it, every file flushed, then renamed."""
    out = out.absolute()
    parent = out.parent
    try:
        parent.mkdir(parents=True, exist_ok=True)
        if out.exists() and not out.is_dir():
            raise OutputError("output path exists and is not a folder", file=str(out))
        tmp = parent / f".{out.name}.partial-{os.getpid()}"
        if tmp.exists():
            shutil.rmtree(tmp)
        tmp.mkdir()
        for name, payload in files.items():
            _write(tmp / name, payload)
        old = parent / f".{out.name}.old-{os.getpid()}"
        if out.exists():
            out.rename(old)
        tmp.rename(out)
        if old.exists():
            shutil.rmtree(old)
    except OSError as err:
        raise OutputError(f"cannot write results: {err.strerror}", file=str(out)) from None
