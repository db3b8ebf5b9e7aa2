"""The decision metric fixed up front: a lock file next to the spec, compared on every run.

``metricforge lock PIPELINE`` writes ``<spec name>.lock.json`` beside the spec: the decision
metric, the guardrails, alpha, the guardrails' non-inferiority margins, whether CUPED is on
and the pre-period's length, the [sequential] settings (only when the spec has them), and a
content hash of each metric's definition (with the definitions it is built from;
descriptions and unit labels left out), stamped with the real time of locking — there is no
way to set another time. ``run`` compares:
  fail  something locked changed (decision metric, guardrails, alpha, a margin, CUPED or
        pre_period_days, [sequential] added, changed or removed, a definition; a lock
        written before margins, CUPED and the pre-period were recorded is compared on what
        it holds; a lock without [sequential] stands for a spec without it);
  warn  there is no lock, or it was made at or after the experiment's start (it cannot show
        that the metric was chosen before the data existed);
  pass  a lock made before the start, unchanged.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
from pathlib import Path
from typing import Any

from metricforge import __version__
from metricforge.checks.result import FAIL, PASS, WARN, check
from metricforge.errors import SpecError
from metricforge.spec.model import ExperimentSpec, Plan

SUFFIX = ".lock.json"
COSMETIC = frozenset({"description", "unit_label"})  # keys that change no number
_KEYS = ("experiment", "locked_at", "alpha", "decision", "guardrails")
STAMP = "%Y-%m-%dT%H:%M:%SZ"  # UTC, whole seconds: such stamps sort as text


def lock_path(spec_path: Path) -> Path:
    return spec_path.with_name(spec_path.stem + SUFFIX)


def definition_sha256(plan: Plan, name: str) -> str:
    """Hash of a metric's definition and of every definition it is built from."""
    closure: dict[str, object] = {}

    def add(metric_name: str) -> None:
        metric = plan.metric(metric_name)
        closure[metric_name] = {k: v for k, v in metric.raw.items() if k not in COSMETIC}
        for dep in metric.dependencies():
            add(dep)

    add(name)
    text = json.dumps(closure, sort_keys=True, separators=(",", ":"), default=str)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _stamp(moment: dt.datetime) -> str:
    return moment.astimezone(dt.UTC).strftime(STAMP)


def _utc(naive: dt.datetime) -> dt.datetime:
    return naive.replace(tzinfo=dt.UTC)


def lock_record(plan: Plan, now: dt.datetime) -> dict[str, Any]:
    spec = plan.spec
    return {
        "experiment": spec.name,
        "locked_at": _stamp(now),
        "experiment_start": _stamp(_utc(spec.start)),
        "alpha": spec.alpha,
        "decision": {"metric": spec.decision, "sha256": definition_sha256(plan, spec.decision)},
        "guardrails": [
            {"metric": g, "sha256": definition_sha256(plan, g)} for g in spec.guardrails
        ],
        "guardrail_margins": dict(spec.guardrail_margins),
        "cuped": spec.cuped,
        "pre_period_days": spec.pre_period_days,
        **({"sequential": spec.sequential.record()} if spec.sequential is not None else {}),
        "tool_version": __version__,
    }


def write_lock(plan: Plan, now: dt.datetime, *, force: bool = False) -> Path:
    """Write the lock of ``plan`` at time ``now``; refuse to replace one unless ``force``."""
    path = lock_path(plan.spec.path)
    if path.exists() and not force:
        raise SpecError(
            "a lock already exists; --force replaces it with a lock stamped now",
            file=str(path),
        )
    text = json.dumps(lock_record(plan, now), indent=2) + "\n"
    tmp = path.with_name(f".{path.name}.partial-{os.getpid()}")
    try:
        tmp.write_text(text, encoding="utf-8")
        tmp.replace(path)
    except OSError as err:
        raise SpecError(f"cannot write the lock: {err.strerror}", file=str(path)) from None
    return path


def lock_source(plan: Plan) -> Path:
    """Where a run reads its lock: beside the spec, or a rerun's copy from its manifest."""
    return plan.lock_file if plan.lock_file is not None else lock_path(plan.spec.path)


def read_lock_text(path: Path) -> str | None:
    """The lock file's text, None when there is none."""
    try:
        return path.read_bytes().decode("utf-8")
    except FileNotFoundError:
        return None
    except (OSError, UnicodeDecodeError) as err:
        raise SpecError(f"unreadable lock file: {err}", file=str(path)) from None


def read_lock(path: Path) -> dict[str, Any] | None:
    """The lock at ``path``, None when there is none; a malformed one is bad input."""
    text = read_lock_text(path)
    return None if text is None else parse_lock(text, path)


def parse_lock(text: str, path: Path) -> dict[str, Any]:
    """A lock file's content, checked; ``path`` names it in errors."""
    try:
        data = json.loads(text)
    except json.JSONDecodeError as err:
        raise SpecError(f"unreadable lock file: {err}", file=str(path)) from None
    missing = [k for k in _KEYS if not isinstance(data, dict) or k not in data]
    if missing:
        raise SpecError("lock file lacks a required key", file=str(path), key=missing[0])
    entries = (
        [data["decision"], *data["guardrails"]] if isinstance(data["guardrails"], list) else []
    )
    try:
        dt.datetime.strptime(str(data["locked_at"]), STAMP)
    except ValueError:
        raise SpecError("malformed time", file=str(path), key="locked_at") from None
    well_formed = entries and all(
        isinstance(e, dict)
        and isinstance(e.get("metric"), str)
        and isinstance(e.get("sha256"), str)
        for e in entries
    )
    if not well_formed or not isinstance(data["alpha"], int | float):
        raise SpecError("malformed decision, guardrails or alpha", file=str(path))
    margins = data.get("guardrail_margins", {})
    kinds = {
        "guardrail_margins": isinstance(margins, dict)
        and all(isinstance(v, int | float) and not isinstance(v, bool) for v in margins.values()),
        "cuped": isinstance(data.get("cuped", False), bool),
        "pre_period_days": type(data.get("pre_period_days", 0)) is int,
        "sequential": _well_formed_sequential(data.get("sequential")),
    }
    for key, ok in kinds.items():
        if not ok:
            raise SpecError("malformed value", file=str(path), key=key)
    return dict(data)


def _well_formed_sequential(value: object) -> bool:
    """None (no [sequential] when locked) or {"effect": number, "baseline": {metric: number}}."""
    if value is None:
        return True
    if not isinstance(value, dict) or set(value) != {"effect", "baseline"}:
        return False
    baseline = value["baseline"]
    if not isinstance(baseline, dict):
        return False
    numbers = [value["effect"], *baseline.values()]
    return all(isinstance(v, int | float) and not isinstance(v, bool) for v in numbers)


def _sequential_text(record: dict[str, Any] | None) -> str:
    if record is None:
        return "none"
    base = ", ".join(f"{k} {v:g}" for k, v in sorted(record["baseline"].items()))
    return f"effect {record['effect']:g}" + (f", baseline {base}" if base else "")


def _percent(margin: float | None) -> str:
    return "none" if margin is None else f"{100 * margin:.4g}%"


def _analysis_changes(spec: ExperimentSpec, lock: dict[str, Any]) -> list[str]:
    """Changes of margins, CUPED and the pre-period; keys an older lock lacks are skipped."""
    out: list[str] = []
    if "guardrail_margins" in lock:
        locked = {str(k): float(v) for k, v in lock["guardrail_margins"].items()}
        now = dict(spec.guardrail_margins)
        for name in sorted(set(locked) | set(now)):
            if locked.get(name) != now.get(name):
                out.append(
                    f"margin of guardrail '{name}' changed from"
                    f" {_percent(locked.get(name))} to {_percent(now.get(name))}"
                )
    if "cuped" in lock and lock["cuped"] != spec.cuped:
        out.append(f"CUPED turned {'on' if spec.cuped else 'off'}")
    if "pre_period_days" in lock and lock["pre_period_days"] != spec.pre_period_days:
        out.append(
            f"pre_period_days changed from {lock['pre_period_days']} to {spec.pre_period_days}"
        )
    now_seq = spec.sequential.record() if spec.sequential is not None else None
    # A lock holds [sequential] only if the spec had one: a lock without it records "none",
    # so a table added, changed or removed after the lock is a change.
    locked_seq = lock.get("sequential")
    if locked_seq != now_seq:
        out.append(
            f"[sequential] changed from {_sequential_text(locked_seq)} to"
            f" {_sequential_text(now_seq)}"
        )
    return out


def changes(plan: Plan, lock: dict[str, Any]) -> list[str]:
    """What differs between the lock and the plan, one sentence each."""
    spec = plan.spec
    out: list[str] = []
    if lock["experiment"] != spec.name:
        out.append(f"the lock is for experiment '{lock['experiment']}', not '{spec.name}'")
    if lock["decision"]["metric"] != spec.decision:
        out.append(
            f"decision metric changed from '{lock['decision']['metric']}' to '{spec.decision}'"
        )
    elif lock["decision"]["sha256"] != definition_sha256(plan, spec.decision):
        out.append(f"definition of decision metric '{spec.decision}' changed")
    locked = {g["metric"]: g["sha256"] for g in lock["guardrails"]}
    for name in spec.guardrails:
        if name not in locked:
            out.append(f"guardrail '{name}' added")
        elif locked[name] != definition_sha256(plan, name):
            out.append(f"definition of guardrail '{name}' changed")
    out += [f"guardrail '{name}' removed" for name in locked if name not in spec.guardrails]
    if float(lock["alpha"]) != spec.alpha:
        out.append(f"alpha changed from {lock['alpha']} to {spec.alpha}")
    return out + _analysis_changes(spec, lock)


def lock_check(plan: Plan, seen: dict[str, Any] | None = None) -> dict[str, Any]:
    """The ``decision_locked`` check. ``seen`` (a run's provenance) receives the lock file
    exactly as read, under ``lock_file`` (None: there was none), for the manifest's copy."""
    spec = plan.spec
    path = lock_source(plan)
    text = read_lock_text(path)
    lock = None if text is None else parse_lock(text, path)
    if seen is not None:
        seen["lock_file"] = text
    start = _stamp(_utc(spec.start))
    if lock is None:
        return check(
            "decision_locked",
            WARN,
            f"no lock file {path.name}: nothing shows the decision metric was fixed before"
            " the data was seen (make one with `metricforge lock`)",
            lock_file=path.name,
            locked_at=None,
            changes=[],
        )
    found = changes(plan, lock)
    when = lock["locked_at"]
    if found:
        status, figure = FAIL, f"changed after the lock of {when}: " + "; ".join(found)
    elif when >= start:  # both are UTC stamps of the same fixed format
        status = WARN
        figure = (
            f"locked {when}, at or after the experiment's start {start}: unchanged since,"
            " but the lock cannot show the metric was chosen before the data existed"
        )
    else:
        status, figure = PASS, f"locked {when}, before the start {start}; unchanged since"
    return check(
        "decision_locked",
        status,
        figure,
        lock_file=path.name,
        locked_at=when,
        experiment_start=start,
        changes=found,
    )
