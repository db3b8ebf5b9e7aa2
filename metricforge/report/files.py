"""Writing results all or nothing: a temporary folder beside the target, then a rename."""

from __future__ import annotations

import datetime as dt
import json
import math
import os
import shutil
from pathlib import Path
from typing import Any

import pyarrow.parquet as pq

from metricforge.errors import OutputError
from metricforge.inputs import describe
from metricforge.provenance import library_versions
from metricforge.report.scorecard import Scorecard
from metricforge.runner import RunData
from metricforge.spec.metrics import definition_files


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
