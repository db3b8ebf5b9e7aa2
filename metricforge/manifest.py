"""manifest.json: a self-contained record of one run, enough to rerun it exactly.

It holds full copies of the spec, of every metric definition file, of the bot-filter file
(with its released.toml entry) and of the lock file the run compared with, each input
file's fingerprint, the options of the run, and the engine, library and tool versions.
``metricforge rerun`` reads nothing else.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
import platform
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from metricforge import __version__
from metricforge.checks.lock import lock_path
from metricforge.errors import ManifestError
from metricforge.inputs import InputFile, label_of, with_content_hashes, within
from metricforge.locations import Uri
from metricforge.provenance import library_versions
from metricforge.report.scorecard import Scorecard
from metricforge.runner import RunData
from metricforge.spec.metrics import definition_files
from metricforge.spec.model import Plan

FORMAT = "metricforge-manifest"
FORMAT_VERSION = 1
MANIFEST_NAME = "manifest.json"
FOOTER, FULL = "footer", "full"  # how input files were hashed


def sha256_text(text: str) -> str:
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def absolute(path: Path | Uri) -> str:
    """The absolute path, ``..`` removed lexically (as the spec's relative paths mean it);
    a URI as written."""
    if isinstance(path, Uri):
        return path.text
    return Path(os.path.abspath(path)).as_posix()


def file_record(path: Path, base: Path) -> dict[str, str]:
    """A text file's path relative to the spec's folder, absolute path, hash and full text."""
    text = path.read_bytes().decode("utf-8")
    return {
        "path": label_of(path, base),
        "absolute": absolute(path),
        "sha256": sha256_text(text),
        "text": text,
    }


def hash_contents(data: RunData) -> None:
    """Add the hash of every input file's whole content (``run --hash-inputs full``)."""
    data.inputs = with_content_hashes(data.inputs)
    data.provenance["input_hashes"] = FULL


def _input_record(f: InputFile, role: str) -> dict[str, Any]:
    record: dict[str, Any] = {
        "role": role,
        "path": f.label,
        "absolute": absolute(f.path),
        "size": f.size,
        "rows": f.rows,
        "footer_sha256": f.footer_sha256,
    }
    if f.content_sha256 is not None:
        record["content_sha256"] = f.content_sha256
    return record


def _inputs(data: RunData, fingerprint: str) -> dict[str, Any]:
    spec = data.plan.spec
    base = spec.path.parent

    def role(f: InputFile) -> str:
        return "exposures" if within(f.path, spec.exposures_path) else "events"

    return {
        "fingerprint": fingerprint,
        "hashes": data.provenance.get("input_hashes", FOOTER),
        "roots": {
            name: {"path": label_of(root, base), "absolute": absolute(root)}
            for name, root in (("events", spec.events_path), ("exposures", spec.exposures_path))
        },
        "files": [_input_record(f, role(f)) for f in data.inputs],
    }


def build_manifest(data: RunData, card: Scorecard) -> dict[str, Any]:
    """The manifest of a finished run (see the README, "manifest.json")."""
    plan, extra = data.plan, data.provenance
    spec, flt = plan.spec, plan.bot_filter
    base = spec.path.parent
    stamp = card.stamp
    definitions = extra.get("definition_files") or [
        file_record(p, base) for p in definition_files(spec.definition_paths)
    ]
    filter_paths = extra.get("bot_filter_file") or {
        "path": label_of(flt.path, base),
        "absolute": absolute(flt.path),
    }
    manifest: dict[str, Any] = {
        "format": FORMAT,
        "format_version": FORMAT_VERSION,
        "tool": {"name": "metricforge", "version": __version__},
        "run_at": dt.datetime.now(dt.UTC).isoformat(timespec="seconds"),
        "stamp": stamp,
        "options": {"bot_filter": flt.ref, "pre_period_days": plan.pre_period_days},
        "engine": {"name": stamp["engine"], "version": stamp["engine_version"]},
        "libraries": library_versions(),
        "platform": platform_record(),
        "spec": {
            "path": spec.path.as_posix(),
            "absolute": absolute(spec.path),
            "sha256": spec.sha256,
            "text": spec.text,
        },
        "bot_filter": {
            "ref": flt.ref,
            **filter_paths,
            "sha256": flt.sha256,
            "released": flt.released,
            "registry_entry": {
                "name": flt.name,
                "version": flt.version,
                "sha256": flt.sha256,
                "released": flt.released,
            },
            "text": flt.text,
        },
        "definitions": {
            "sha256": stamp["definitions_sha256"],
            "used": [m.name for m in plan.metrics],
            "metrics": {
                m.name: {"file": Path(m.origin.file).name, "definition": m.raw}
                for m in plan.metrics
            },
            "files": definitions,
        },
        "inputs": _inputs(data, str(stamp["inputs_fingerprint"])),
    }
    if "lock_file" in extra:  # set by the lock check while the scorecard was built
        manifest["lock"] = _lock_record(plan, extra["lock_file"])
    if "rerun_of" in extra:
        manifest["rerun_of"] = extra["rerun_of"]
    return manifest


def _lock_record(plan: Plan, text: str | None) -> dict[str, str] | None:
    """The lock file the run compared with, as read (None: there was none). Its place is
    where the lock of the spec belongs, also for a rerun that read the manifest's copy."""
    if text is None:
        return None
    place = lock_path(plan.spec.path)
    return {
        "path": label_of(place, plan.spec.path.parent),
        "absolute": absolute(place),
        "sha256": sha256_text(text),
        "text": text,
    }


def platform_record() -> dict[str, str]:
    return {
        "system": platform.system(),
        "machine": platform.machine(),
        "python_implementation": platform.python_implementation(),
    }


# ---------------------------------------------------------------- reading a manifest

_REQUIRED: tuple[tuple[tuple[str, ...], type], ...] = (
    (("stamp",), dict),
    (("options", "bot_filter"), str),
    (("options", "pre_period_days"), int),
    (("engine", "name"), str),
    (("libraries",), dict),
    (("spec", "path"), str),
    (("spec", "absolute"), str),
    (("spec", "sha256"), str),
    (("spec", "text"), str),
    (("bot_filter", "ref"), str),
    (("bot_filter", "path"), str),
    (("bot_filter", "text"), str),
    (("bot_filter", "registry_entry", "name"), str),
    (("bot_filter", "registry_entry", "version"), int),
    (("bot_filter", "registry_entry", "sha256"), str),
    (("bot_filter", "registry_entry", "released"), str),
    (("definitions", "sha256"), str),
    (("definitions", "files"), list),
    (("inputs", "hashes"), str),
    (("inputs", "roots", "events", "path"), str),
    (("inputs", "roots", "exposures", "path"), str),
    (("inputs", "files"), list),
)
_STAMP_KEYS = ("experiment", "inputs_fingerprint", "tool_version", "engine", "engine_version")


@dataclass(frozen=True)
class Manifest:
    path: Path
    data: dict[str, Any]

    def get(self, *keys: str) -> Any:
        value: Any = self.data
        for key in keys:
            value = value[key]
        return value

    @property
    def stamp(self) -> dict[str, Any]:
        stamp: dict[str, Any] = self.data["stamp"]
        return stamp

    def error(self, message: str, *keys: str) -> ManifestError:
        return ManifestError(message, file=str(self.path), key=".".join(keys) or None)


def read_manifest(path: Path) -> Manifest:
    """Read and check a manifest written by this tool (format version 1)."""
    if path.is_dir():
        path = path / MANIFEST_NAME
    try:
        data = json.loads(path.read_bytes().decode("utf-8"))
    except FileNotFoundError:
        raise ManifestError("manifest not found", file=str(path)) from None
    except OSError as err:
        raise ManifestError(f"cannot read manifest: {err.strerror}", file=str(path)) from None
    except (UnicodeDecodeError, json.JSONDecodeError) as err:
        raise ManifestError(f"not a JSON manifest: {err}", file=str(path)) from None
    man = Manifest(path, data if isinstance(data, dict) else {})
    if man.data.get("format") != FORMAT:
        raise man.error("not a metricforge manifest (no 'format' key of this tool)", "format")
    if man.data.get("format_version") != FORMAT_VERSION:
        raise man.error(
            f"manifest format version {man.data.get('format_version')!r} is not supported"
            f" (this tool reads version {FORMAT_VERSION})",
            "format_version",
        )
    for keys, kind in _REQUIRED:
        try:
            value = man.get(*keys)
        except (KeyError, TypeError):
            raise man.error("required key is missing", *keys) from None
        if not isinstance(value, kind) or isinstance(value, bool):
            raise man.error(f"expected {kind.__name__}", *keys)
    for key in _STAMP_KEYS:
        if not isinstance(man.stamp.get(key), str):
            raise man.error("required key is missing", "stamp", key)
    for section, keys in (("definitions", ("path", "text")), ("inputs", ("path",))):
        for i, record in enumerate(man.get(section, "files")):
            if not (isinstance(record, dict) and all(isinstance(record.get(k), str) for k in keys)):
                raise man.error(f"expected a table with {list(keys)}", section, "files", str(i))
    return man
