"""Writing results all or nothing: the files' bytes, then one publish (report/publish.py)."""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq

from metricforge.errors import OutputError
from metricforge.manifest import build_manifest
from metricforge.report.publish import check_target, protected_paths, publish, recover
from metricforge.report.scorecard import Scorecard
from metricforge.runner import RunData
from metricforge.spec.model import Plan

SEGMENTS_FILE = "segments.parquet"  # written only when the spec has [segments]


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


def prepare_output(out: Path, plan: Plan) -> Path:
    """Check ``out`` against the output rules before any work; tidy killed runs' leftovers."""
    target = check_target(out, *protected_paths(plan))
    try:
        recover(target)
    except OSError as err:
        raise OutputError(f"cannot tidy the output folder: {err.strerror}", file=str(out)) from None
    return target


def write_outputs(out: Path, data: RunData, card: Scorecard) -> None:
    """Write scorecard.parquet, scorecard.json and manifest.json (and with ``[segments]``
    segments.parquet) into ``out`` atomically."""
    target = check_target(out, *protected_paths(data.plan))
    files = {
        "scorecard.parquet": parquet_bytes(card.table()),
        "scorecard.json": dump_json(card.as_json()),
    }
    record = manifest(data, card)
    if card.segments is not None:  # [segments]: a file of its own, its hash in the manifest
        files[SEGMENTS_FILE] = parquet_bytes(card.segments.table())
        digest = hashlib.sha256(files[SEGMENTS_FILE]).hexdigest()
        record["outputs"] = {SEGMENTS_FILE: {"sha256": digest}}
    files["manifest.json"] = dump_json(record)
    publish(target, files)


def parquet_bytes(table: pa.Table) -> bytes:
    sink = pa.BufferOutputStream()
    pq.write_table(table, sink, compression="zstd")
    return bytes(sink.getvalue().to_pybytes())


def write_folder(out: Path, files: Mapping[str, bytes], protected: Sequence[Path] = ()) -> None:
    """Write ``files`` (name → content) as the folder ``out``, all or nothing, the same way
    as write_outputs (see report/publish.py); ``protected`` are folders it may not touch."""
    target = check_target(out, protected, [])
    try:
        recover(target)
    except OSError as err:
        raise OutputError(f"cannot tidy the output folder: {err.strerror}", file=str(out)) from None
    publish(target, dict(files))
