"""The run history: one JSON line per run in ``metricforge-history.jsonl`` of the output root.

The output root of a run written to ``--out DIR`` is DIR's parent folder, so every result
folder under ``results/`` is catalogued in ``results/metricforge-history.jsonl``. A line is
appended only after the result folder is complete, with a single ``write`` on a file opened
with O_APPEND (and an exclusive lock where the system has one), so concurrent runs never
interleave their lines and a failed run leaves no line.
"""

from __future__ import annotations

import difflib
import hashlib
import json
import os
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from metricforge.errors import ManifestError

HISTORY_NAME = "metricforge-history.jsonl"
HISTORY_FORMAT = 1
_OUTPUTS = ("scorecard.parquet", "scorecard.json", "manifest.json")
_SEGMENTS = "segments.parquet"  # only in results of a spec with [segments]

try:  # POSIX only; O_APPEND alone already keeps one small write in one piece
    import fcntl
except ImportError:  # pragma: no cover - not on POSIX
    fcntl = None  # type: ignore[assignment]


def output_root(out: Path) -> Path:
    """The folder whose history a result folder ``out`` belongs to: its parent."""
    return Path(os.path.abspath(out)).parent


def history_file(root: Path) -> Path:
    return root if root.is_file() else root / HISTORY_NAME


def entry_for(out: Path, command: str, extra: dict[str, Any] | None = None) -> dict[str, Any]:
    """The catalogue line of the complete result folder ``out``."""
    manifest = json.loads((out / "manifest.json").read_bytes())
    card = json.loads((out / "scorecard.json").read_bytes())
    stamp = manifest["stamp"]
    entry: dict[str, Any] = {
        "format": HISTORY_FORMAT,
        "run_at": manifest.get("run_at"),
        "command": command,
        "experiment": stamp["experiment"],
        "bot_filter": f"{stamp['bot_filter']}@{stamp['bot_filter_version']}",
        "bot_filter_sha256": stamp["bot_filter_sha256"],
        "definitions_sha256": stamp["definitions_sha256"],
        "spec_sha256": stamp["spec_sha256"],
        "inputs_fingerprint": stamp["inputs_fingerprint"],
        "engine": f"{stamp['engine']} {stamp['engine_version']}",
        "tool_version": stamp["tool_version"],
        "trust": card.get("trust", {}).get("verdict"),
        "decision": [
            {
                k: r.get(k)
                for k in ("metric", "variant", "value", "abs_effect", "rel_effect", "p_value")
            }
            for r in card.get("metrics", [])
            if r.get("role") == "decision"
        ],
        "out": out.name,
        "out_absolute": Path(os.path.abspath(out)).as_posix(),
        "sha256": {
            name: _sha256(out / name)
            for name in (*_OUTPUTS, _SEGMENTS)
            if name != _SEGMENTS or (out / name).is_file()
        },
    }
    entry.update(extra or {})
    return entry


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def append(root: Path, entry: dict[str, Any]) -> Path:
    """Append one line to the root's history file, safely against concurrent runs."""
    path = history_file(root)
    line = (json.dumps(entry, separators=(",", ":"), ensure_ascii=False) + "\n").encode()
    fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
    try:
        if fcntl is not None:
            fcntl.flock(fd, fcntl.LOCK_EX)
        view = memoryview(line)
        while view:
            view = view[os.write(fd, view) :]
    finally:
        os.close(fd)  # closing releases the lock
    return path


def record(out: Path, command: str, extra: dict[str, Any] | None = None) -> str:
    """Catalogue the complete result folder ``out``; a note on what was done, or a warning.

    The result itself is already in place: a failure here is reported, never undone."""
    try:
        path = append(output_root(out), entry_for(out, command, extra))
    except (OSError, ValueError, KeyError) as err:
        reason = getattr(err, "strerror", None) or type(err).__name__
        return f"warning: the result is complete but was not added to the run history: {reason}"
    return f"catalogued in {path}"


def read_history(
    root: Path, experiment: str | None = None
) -> tuple[list[dict[str, Any]], list[str]]:
    """The history's entries, oldest first (optionally one experiment's), and a warning per
    line that is not a valid entry (e.g. cut short by a crash)."""
    path = history_file(root)
    if not path.is_file():
        raise ManifestError(
            f"no run history here (runs written to {root}/NAME append to {HISTORY_NAME})",
            file=str(path),
        )
    entries: list[dict[str, Any]] = []
    warnings: list[str] = []
    seen: set[str] = set()
    for number, line in _lines(path):
        try:
            entry = json.loads(line)
        except ValueError:
            entry = None
        if not isinstance(entry, dict) or not isinstance(entry.get("experiment"), str):
            warnings.append(f"{path}:{number}: not a history entry; skipped")
            continue
        seen.add(entry["experiment"])
        if experiment is None or entry["experiment"] == experiment:
            entries.append(entry)
    if experiment is not None and not entries and seen:
        near = difflib.get_close_matches(experiment, sorted(seen), n=1)
        hint = f" (did you mean '{near[0]}'?)" if near else ""
        warnings.append(
            f"{path}: no run of experiment '{experiment}'{hint};"
            f" catalogued: {', '.join(sorted(seen))}"
        )
    return entries, warnings


def _lines(path: Path) -> Iterator[tuple[int, str]]:
    with path.open("rb") as fh:
        for number, raw in enumerate(fh, start=1):
            text = raw.decode("utf-8", errors="replace").strip()
            if text:
                yield number, text
