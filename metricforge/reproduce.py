"""Judging a rerun: is the new scorecard byte-identical to the old one, and if not, why."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

from metricforge.compare import (
    SCORECARD,
    SCORECARD_JSON,
    changed_rows,
    match_rows,
    read_result,
)
from metricforge.errors import ManifestError
from metricforge.manifest import MANIFEST_NAME, Manifest, read_manifest
from metricforge.report.files import SEGMENTS_FILE

BUG = (
    "same inputs and versions yet different numbers: this is a bug in metricforge;"
    " please report it with both result folders"
)


@dataclass(frozen=True)
class Verdict:
    identical: bool | None  # None: there is no old scorecard next to the manifest
    files: dict[str, bool | None]  # file name -> byte-identical (None: the old one is missing)
    reasons: list[str]  # why the scorecard differs
    differences: list[str]  # which rows' values differ ("metric/variant: columns")


def _changes(kind: str, old: dict[str, Any], new: dict[str, Any]) -> str | None:
    keys = [k for k in sorted(set(old) | set(new)) if old.get(k) != new.get(k)]
    if not keys:
        return None
    return f"{kind}: " + ", ".join(f"{k} {old.get(k, '–')} → {new.get(k, '–')}" for k in keys)


def explain(old: Manifest, new: Manifest, input_changes: list[str]) -> list[str]:
    """The differences between two runs' records that can change a scorecard."""
    a, b = old.stamp, new.stamp
    reasons = []
    if a.get("inputs_fingerprint") != b.get("inputs_fingerprint"):
        reasons.append("inputs: " + ("; ".join(input_changes) or "the fingerprint differs"))
    for key, what in (
        ("spec_sha256", "spec"),
        ("definitions_sha256", "metric definitions"),
        ("bot_filter_sha256", "bot filter"),
    ):
        if a.get(key) != b.get(key):
            reasons.append(f"{what}: sha256 {str(a.get(key))[:12]} → {str(b.get(key))[:12]}")
    if a.get("tool_version") != b.get("tool_version"):
        tools = f"{a.get('tool_version')} → {b.get('tool_version')}"
        reasons.append(f"tool version: metricforge {tools}")
    engine_a = f"{a.get('engine')} {a.get('engine_version')}"
    engine_b = f"{b.get('engine')} {b.get('engine_version')}"
    if engine_a != engine_b:
        reasons.append(f"engine: {engine_a} → {engine_b}")
    if "lock" not in old.data:
        reasons.append(
            "lock file: the old manifest holds no copy of it (written before lock files were"
            " copied), so the rerun compared with the lock beside the spec as it is today"
        )
    for kind, key in (("library versions", "libraries"), ("platform", "platform")):
        found = _changes(kind, old.data.get(key) or {}, new.data.get(key) or {})
        if found:
            reasons.append(found)
    return reasons


def judge(old: Manifest, out: Path, input_changes: list[str]) -> Verdict:
    """Compare the new result in ``out`` with the scorecard next to the old manifest."""
    old_dir = old.path.parent
    files: dict[str, bool | None] = {}
    names = [SCORECARD, SCORECARD_JSON]
    if (old_dir / SEGMENTS_FILE).is_file() or (out / SEGMENTS_FILE).is_file():
        names.append(SEGMENTS_FILE)  # [segments]: the breakdown must reproduce too
    for name in names:
        before, after = old_dir / name, out / name
        if not before.is_file():
            files[name] = None
        else:
            files[name] = after.is_file() and before.read_bytes() == after.read_bytes()
    if all(files.values()):
        return Verdict(True, files, [], [])
    reasons = explain(old, read_manifest(out / MANIFEST_NAME), input_changes)
    if None in files.values():
        missing = [n for n, same in files.items() if same is None]
        reasons.insert(0, f"no old {', '.join(missing)} next to the manifest to compare with")
        return Verdict(None, files, reasons, [])
    try:
        before_result, after_result = read_result(old_dir), read_result(out)
        differences = changed_rows(*match_rows(before_result, after_result))
    except ManifestError as err:  # the new result is written; say why it cannot be judged
        reasons.insert(0, f"the old scorecard cannot be read: {err.one_line()}")
        return Verdict(False, files, reasons, [])
    old_cols = before_result.table.column_names
    new_cols = after_result.table.column_names
    if old_cols != new_cols:
        added = [c for c in new_cols if c not in old_cols]
        gone = [c for c in old_cols if c not in new_cols]
        reasons.append(f"scorecard columns: added {added}, removed {gone} (another tool build)")
    if not reasons:
        reasons.append(
            BUG
            if differences
            else "same inputs, versions and values yet different file bytes: the output format"
            " changed without a new tool version (a bug in metricforge)"
        )
    return Verdict(False, files, reasons, differences)
