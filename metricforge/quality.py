"""The `data_quality` section of a scorecard: what the run left out or found odd.

Two sources, neither a second scan of the events: the Parquet footers (null counts per
column, empty files, zoned timestamps) and the `data_quality` result query over
`unit_rows` (duplicate exposure rows, units without events, NaN/infinite/huge values
left out, negative values seen; see compile/quality.py).
"""

from __future__ import annotations

from typing import Any

import pyarrow as pa

from metricforge.compile.quality import (
    DUPLICATE_EXPOSURES,
    UNITS_WITHOUT_EVENTS,
    has_value,
    ignored_column,
    negative_column,
)
from metricforge.engines.base import EngineInputs
from metricforge.inputs import InputFile, within
from metricforge.schema import EXPOSURE_COLUMNS
from metricforge.spec.model import Plan


def _nulls(files: list[InputFile], columns: list[str]) -> dict[str, int | None]:
    out: dict[str, int | None] = {}
    for column in columns:
        total: int | None = 0
        for f in files:
            count = f.null_counts.get(column, 0 if column not in f.schema.names else None)
            total = None if total is None or count is None else total + count
        out[column] = total
    return out


def _zoned(files: list[InputFile]) -> list[str]:
    out = []
    for f in files:
        if "ts" in f.schema.names:
            kind = f.schema.field("ts").type
            if pa.types.is_timestamp(kind) and kind.tz is not None:
                out.append(f.label)
    return out


def summarise(
    plan: Plan, inputs: EngineInputs, files: list[InputFile], table: pa.Table | None
) -> dict[str, Any]:
    """The section as plain JSON-ready data, with one note per non-zero finding."""
    exposures = [f for f in files if within(f.path, plan.spec.exposures_path)]
    events = [f for f in files if not within(f.path, plan.spec.exposures_path)]
    unit = plan.spec.unit
    rows = table.to_pylist() if table is not None else []
    by_variant = {str(r["variant"]): r for r in rows}

    def per_variant(column: str) -> dict[str, int]:
        return {
            v: int(by_variant[v][column] or 0) for v in plan.spec.variant_names if v in by_variant
        }

    values: dict[str, dict[str, int]] = {}
    for metric in plan.metrics:
        if has_value(metric):
            values[metric.name] = {
                "ignored": sum(per_variant(ignored_column(metric.name)).values()),
                "negative": sum(per_variant(negative_column(metric.name)).values()),
            }
    section: dict[str, Any] = {
        "inputs": {
            "event_files": len(events),
            "exposure_files": len(exposures),
            "empty_files": [f.label for f in files if f.rows == 0],
            "zoned_timestamp_files": _zoned(files),
            "null_values": {
                "events": _nulls(events, [unit, "ts", "event", "session_id"]),
                "exposures": _nulls(exposures, list(EXPOSURE_COLUMNS)),
            },
        },
        "duplicate_exposure_rows": per_variant(DUPLICATE_EXPOSURES),
        "units_without_events": per_variant(UNITS_WITHOUT_EVENTS),
        "values": values,
    }
    section["notes"] = _notes(section, unit)
    return section


def _notes(section: dict[str, Any], unit: str) -> list[str]:
    notes: list[str] = []
    inputs = section["inputs"]
    nulls = inputs["null_values"]
    for column, meaning in (
        (unit, "never attributed to a unit"),
        ("ts", "outside every window"),
        ("event", "counted as events but matching no metric"),
    ):
        count = nulls["events"].get(column)
        if count:
            notes.append(f"{count} event rows with a null {column}: {meaning}")
    for column in ("unit_id", "variant", "ts", "experiment"):
        count = nulls["exposures"].get(column)
        if count:
            notes.append(f"{count} exposure rows with a null {column}: left out")
    if inputs["empty_files"]:
        notes.append(f"{len(inputs['empty_files'])} input files without rows")
    if inputs["zoned_timestamp_files"]:
        notes.append(
            f"{len(inputs['zoned_timestamp_files'])} files with zoned timestamps, read as UTC"
        )
    duplicates = sum(section["duplicate_exposure_rows"].values())
    if duplicates:
        notes.append(f"{duplicates} exposure rows repeat another row exactly: counted once")
    for metric, counts in section["values"].items():
        if counts["ignored"]:
            notes.append(
                f"{metric}: {counts['ignored']} NaN, infinite or out-of-range values left out"
            )
        if counts["negative"]:
            notes.append(f"{metric}: {counts['negative']} negative values (kept)")
    return notes
