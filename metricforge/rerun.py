"""Rerunning a run from its manifest alone.

The manifest's copies of the spec, the definitions, the bot filter and the lock file are
written to a private temporary folder and the plan is loaded from there (never from today's
library); the inputs are found through the spec's paths from the spec's recorded folder and checked
against the recorded fingerprints before anything runs.
"""

from __future__ import annotations

import dataclasses
import json
import tempfile
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

from metricforge.checks.lock import lock_path
from metricforge.engines.base import Engine
from metricforge.errors import InputDataError, ManifestError, OutputError, SpecError
from metricforge.inputs import content_sha256, inspect, label_of
from metricforge.locations import Uri
from metricforge.manifest import (
    FULL,
    Manifest,
    absolute,
    hash_contents,
    read_manifest,
    sha256_text,
)
from metricforge.partitions import event_window, exposure_window, prune
from metricforge.provenance import definitions_sha256
from metricforge.report.files import prepare_output, write_outputs
from metricforge.report.scorecard import Scorecard, build
from metricforge.reproduce import Verdict, judge
from metricforge.runner import execute, list_files, open_location
from metricforge.spec.experiment import assemble_plan, load_spec
from metricforge.spec.filters import REGISTRY_NAME, parse_ref
from metricforge.spec.model import Plan

RERUN_DIFFERS_EXIT = 5  # the rerun did not reproduce the old scorecard byte for byte


@dataclass(frozen=True)
class InputChange:
    status: str  # "changed", "missing" or "added"
    label: str  # the file's path as the spec wrote it
    detail: str = ""

    def describe(self) -> str:
        return f"{self.status} {self.label}" + (f" ({self.detail})" if self.detail else "")


class InputsChangedError(InputDataError):
    """The inputs no longer match the manifest's fingerprints."""

    def __init__(self, changes: list[InputChange], man: Manifest, base: Path) -> None:
        self.changes = changes
        listed = "; ".join(c.describe() for c in changes)
        hint = " rerun with --allow-changed-inputs to use them anyway"
        missing = sum(c.status == "missing" for c in changes)
        if missing == len(man.get("inputs", "files")):
            hint = f" none was found from {base}; if the data moved, rerun with --spec-folder"
        super().__init__(
            f"{len(changes)} input file(s) differ from the manifest: {listed};{hint}",
            file=str(man.path),
            key="inputs",
        )


@dataclass(frozen=True)
class RerunResult:
    manifest: Path
    out: Path
    card: Scorecard
    changes: list[InputChange]
    verdict: Verdict


def _materialise(path: Path, text: str) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(text.encode("utf-8"))
    return path


def _check_copy(man: Manifest, text: str, recorded: object, *keys: str) -> None:
    if isinstance(recorded, str) and sha256_text(text) != recorded:
        raise man.error("the copy does not match its recorded sha256 (manifest edited?)", *keys)


def _rebased(location: Path | Uri, copy_folder: Path, base: Path) -> Path | Uri:
    """A data location of the spec copy, as the spec meant it from ``base``; a URI names the
    same data from every folder and machine."""
    if isinstance(location, Uri):
        return location
    return base / label_of(location, copy_folder)


def plan_from_manifest(man: Manifest, work: Path, spec_folder: Path | None = None) -> Plan:
    """The plan of the manifest's run, loaded from its own copies written under ``work``.

    The spec's relative data paths are resolved from ``spec_folder`` (default: the folder
    the spec was in when it ran), so the input files keep the labels they had."""
    spec_abs = Path(man.get("spec", "absolute"))
    base = Path(absolute(spec_folder)) if spec_folder is not None else spec_abs.parent
    text = man.get("spec", "text")
    _check_copy(man, text, man.get("spec", "sha256"), "spec", "text")
    spec_file = _materialise(work / "spec" / spec_abs.name, text)
    origin = {str(spec_file): str(base / spec_abs.name)}
    defs = work / "definitions"
    defs.mkdir()
    for i, record in enumerate(man.get("definitions", "files")):
        _check_copy(man, record["text"], record.get("sha256"), "definitions", "files", str(i))
        copy = _materialise(defs / f"{i:03d}-{Path(record['path']).name}", record["text"])
        origin[str(copy)] = record["path"]
    entry = man.get("bot_filter", "registry_entry")
    ref = f"{entry['name']}@{entry['version']}"
    parse_ref(ref, file=str(man.path), key="bot_filter.registry_entry")  # safe as a file name
    if ref != man.get("options", "bot_filter"):
        raise man.error(f"registry entry {ref} is not the run's filter", "bot_filter")
    filters = work / "filters"
    copy = _materialise(
        filters / f"{entry['name']}-v{entry['version']}.toml", man.get("bot_filter", "text")
    )
    origin[str(copy)] = man.get("bot_filter", "path")
    registry = (
        f"[{entry['name']}.{entry['version']}]\n"
        f"sha256 = {json.dumps(entry['sha256'])}\nreleased = {json.dumps(entry['released'])}\n"
    )
    _materialise(filters / REGISTRY_NAME, registry)
    try:
        loaded = load_spec(spec_file)
        spec = dataclasses.replace(
            loaded,
            path=base / spec_abs.name,
            events_path=_rebased(loaded.events_path, spec_file.parent, base),
            exposures_path=_rebased(loaded.exposures_path, spec_file.parent, base),
            definition_paths=(defs,),
        )
        plan = assemble_plan(spec, bot_filter=ref, filters=filters)
    except SpecError as err:
        message = err.one_line()
        for copy_path, label in origin.items():
            message = message.replace(copy_path, label)
        raise ManifestError(
            f"its copies do not load with this tool version: {message}", file=str(man.path)
        ) from None
    plan = dataclasses.replace(
        plan,
        pre_period_days=man.get("options", "pre_period_days"),
        lock_file=_lock_copy(man, spec_file),
    )
    if definitions_sha256(plan) != man.get("definitions", "sha256"):
        raise man.error(
            "the definition copies do not give the recorded definitions hash", "definitions"
        )
    return plan


def _lock_copy(man: Manifest, spec_file: Path) -> Path | None:
    """The manifest's copy of the lock file, written beside the spec's copy (left absent when
    the run had no lock); None for a manifest without the ``lock`` key (written before lock
    files were copied), whose rerun reads the lock beside the spec as it is today."""
    if "lock" not in man.data:
        return None
    record, place = man.data["lock"], lock_path(spec_file)
    if record is None:
        return place
    if not (isinstance(record, dict) and isinstance(record.get("text"), str)):
        raise man.error("expected null or a table with 'text'", "lock")
    _check_copy(man, record["text"], record.get("sha256"), "lock", "text")
    return _materialise(place, record["text"])


def verify_inputs(
    man: Manifest, plan: Plan, storage: Mapping[str, str] | None = None
) -> list[InputChange]:
    """Every recorded input file that changed or is missing, and every file added since,
    among the files the run reads (the date partitions of its window). ``storage``: as for
    ``runner.gather_inputs`` (None: remote data is refused)."""
    full = man.get("inputs", "hashes") == FULL
    base = plan.spec.path.parent
    recorded = {r["path"]: r for r in man.get("inputs", "files")}
    now: dict[str, dict[str, object] | str] = {}
    for key, window in (("events", event_window(plan)), ("exposures", exposure_window(plan))):
        root = open_location(plan.spec, key, storage)
        try:
            paths = prune(list_files(plan.spec, key, root, absent_ok=True), *window, folder=root)
        except InputDataError:
            paths = []  # no partition of the window left
        for path in paths:
            try:
                f = inspect(path, base)
            except InputDataError as err:
                now[label_of(path, base)] = f"unreadable: {err.message}"
                continue
            now[f.label] = {
                "size": f.size,
                "rows": f.rows,
                "footer_sha256": f.footer_sha256,
                "content_sha256": content_sha256(path) if full else None,
            }
    changes = [InputChange("missing", label) for label in recorded if label not in now]
    changes += [InputChange("added", label) for label in now if label not in recorded]
    for label, old in recorded.items():
        new = now.get(label)
        if isinstance(new, str):
            changes.append(InputChange("changed", label, new))
        elif new is not None and (detail := _differences(old, new)):
            changes.append(InputChange("changed", label, detail))
    return sorted(changes, key=lambda c: (c.label, c.status))


def _differences(old: dict[str, object], new: dict[str, object]) -> str:
    parts = [f"{key} {old.get(key)} → {new[key]}" for key in ("size", "rows")]
    parts = [p for p, key in zip(parts, ("size", "rows"), strict=True) if old.get(key) != new[key]]
    if old.get("footer_sha256") != new["footer_sha256"]:
        parts.append("footer hash differs")
    if new["content_sha256"] is not None and old.get("content_sha256") != new["content_sha256"]:
        parts.append("content hash differs")
    return ", ".join(parts)


def rerun(
    manifest_path: Path,
    out: Path,
    engine: Engine,
    *,
    allow_changed_inputs: bool = False,
    spec_folder: Path | None = None,
) -> RerunResult:
    """Re-execute the manifest's run into ``out`` and judge it against the old scorecard."""
    man = read_manifest(manifest_path)
    if out.resolve() == man.path.parent.resolve():
        raise OutputError(
            "--out is the folder of the manifest being rerun; choose another folder so that"
            " the old scorecard stays to compare with",
            file=str(out),
        )
    with tempfile.TemporaryDirectory(prefix="metricforge-rerun-") as tmp:
        plan = plan_from_manifest(man, Path(tmp), spec_folder)
        changes = verify_inputs(man, plan, engine.storage_settings())
        if changes and not allow_changed_inputs:
            raise InputsChangedError(changes, man, plan.spec.path.parent)
        prepare_output(out, plan)
        data = execute(plan, engine)
        if man.get("inputs", "hashes") == FULL:
            hash_contents(data)
        data.provenance.update(
            definition_files=man.get("definitions", "files"),
            bot_filter_file={
                "path": man.get("bot_filter", "path"),
                "absolute": man.data["bot_filter"].get("absolute", ""),
            },
            rerun_of={
                "manifest": absolute(man.path),
                "manifest_sha256": content_sha256(man.path),
                "run_at": man.data.get("run_at"),
                "input_changes": [c.describe() for c in changes],
            },
        )
        card = build(data)
        write_outputs(out, data, card)
    verdict = judge(man, out, [c.describe() for c in changes])
    return RerunResult(manifest=man.path, out=out, card=card, changes=changes, verdict=verdict)
