"""Writing results all or nothing: the files' bytes, then one publish (report/publish.py)."""

from __future__ import annotations

import datetime as dt
import json
import math
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq

from metricforge.errors import OutputError
from metricforge.inputs import describe
from metricforge.provenance import library_versions
from metricforge.report.publish import check_target, protected_paths, publish, recover
from metricforge.report.scorecard import Scorecard
from metricforge.runner import RunData
from metricforge.spec.metrics import definition_files
from metricforge.spec.model import Plan


def _json_default(value: object) -> object:
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return str(value)


def dump_json(data: Any) -> bytes:
    text = json.dumps(data, indent=2, ensure_ascii=False, allow_nan=False, default=_json_default)
    return (text + "\n").encode("utf-8")


def manifest(data: RunData, card: Scorecard) -> dict[str, Any]:
    plan = data.plan
    return {
        "stamp": card.stamp,
        "run_at": dt.datetime.now(dt.UTC).isoformat(timespec="seconds"),
        "libraries": library_versions(),
        "spec": {"path": str(plan.spec.path), "sha256": plan.spec.sha256, "text": plan.spec.text},
        "bot_filter": {
            "ref": plan.bot_filter.ref,
            "path": str(plan.bot_filter.path),
            "sha256": plan.bot_filter.sha256,
            "released": plan.bot_filter.released,
            "text": plan.bot_filter.text,
        },
        "definitions": {
            "used": [m.name for m in plan.metrics],
            "files": [
                {"path": str(p), "text": p.read_text(encoding="utf-8")}
                for p in definition_files(plan.spec.definition_paths)
            ],
        },
        "inputs": describe(data.inputs),
    }


def _parquet_bytes(table: pa.Table) -> bytes:
    sink = pa.BufferOutputStream()
    pq.write_table(table, sink, compression="zstd")
    payload: bytes = sink.getvalue().to_pybytes()
    return payload


def prepare_output(out: Path, plan: Plan) -> Path:
    """Check ``out`` against the output rules before any work; tidy killed runs' leftovers."""
    target = check_target(out, *protected_paths(plan))
    try:
        recover(target)
    except OSError as err:
        raise OutputError(f"cannot tidy the output folder: {err.strerror}", file=str(out)) from None
    return target


def write_outputs(out: Path, data: RunData, card: Scorecard) -> None:
    """Write scorecard.parquet, scorecard.json and manifest.json into ``out`` atomically."""
    target = check_target(out, *protected_paths(data.plan))
    files = {
        "scorecard.parquet": _parquet_bytes(card.table()),
        "scorecard.json": dump_json(card.as_json()),
        "manifest.json": dump_json(manifest(data, card)),
    }
    publish(target, files)
