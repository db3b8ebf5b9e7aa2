"""`metricforge looks`: the looks an analyst would have taken at an experiment over time.

For each cut-off time t (the start plus every ``every``, up to the end plus the analysis
window, when the last event can have arrived) the run is repeated as of t: the plan's
``as_of`` limits the one scan to exposures and events with ts < t (compile/query.py,
compile/sessions.py). Each look gives, for the decision metric and the guardrails, the
units per variant, the effect and the ordinary p-value of the scorecard, and the
always-valid p-value and confidence sequence (report/sequential.py) carried over the
looks: the running minimum of the p-values and the running intersection of the intervals.
Looking at the ordinary p-value at every look inflates false positives; the always-valid
ones stay valid however often one looks. The last look reads every event, so its numbers
are the full scorecard's.

DuckDB only: every look is a run of the compiled query of its own, and a Spark session
per command would add its start-up to every replay (the as_of condition renders on Spark
like every other part of the query).
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
import re
from typing import Any

import numpy as np
from rich.console import Console
from rich.table import Table

from metricforge.engines.base import Engine
from metricforge.errors import InputDataError, SpecError
from metricforge.report.scorecard import build
from metricforge.report.sequential import look_row
from metricforge.runner import execute
from metricforge.spec.model import Plan, Role, Sequential
from metricforge.spec.tomlfile import TomlFile
from metricforge.stats.sequential import running_interval, running_p_value

MAX_LOOKS = 400
_EVERY = re.compile(r"^([1-9][0-9]{0,3})([dh])$")
FIELDS = ("abs_effect", "p_value", "look_p", "always_valid_p", "cs_low", "cs_high")


class LooksError(SpecError):
    """A bad option of `metricforge looks` (exit 2, nothing written)."""


def parse_every(text: str) -> dt.timedelta:
    """``1d``, ``12h``, ...: the time between two looks."""
    match = _EVERY.match(text.strip())
    if match is None:
        raise LooksError(
            f"--every must be a whole number of days or hours, e.g. 1d or 12h; got '{text}'",
            key="--every",
        )
    count, unit = int(match[1]), match[2]
    return dt.timedelta(days=count) if unit == "d" else dt.timedelta(hours=count)


def cutoffs(plan: Plan, every: dt.timedelta) -> list[dt.datetime]:
    """start + every, start + 2·every, ..., and last the end plus the analysis window."""
    spec = plan.spec
    last = spec.end + dt.timedelta(days=spec.window_days)
    count = -(-(last - spec.start) // every)  # ceiling
    if count > MAX_LOOKS:
        raise LooksError(f"--every gives {count} looks; at most {MAX_LOOKS}", key="--every")
    times = [spec.start + k * every for k in range(1, count)]
    return [*times, last]


def settings_of(plan: Plan) -> Sequential:
    spec = plan.spec
    if spec.sequential is None:
        raise SpecError(
            "looks needs a [sequential] table (e.g. effect = 0.05): the mixing variance of"
            " the always-valid p-values is fixed in the spec before the data is seen",
            file=str(spec.path),
            line=TomlFile(spec.path, spec.text, {}).line_of("metrics"),
            key="sequential",
        )
    return spec.sequential


def _look(plan: Plan, engine: Engine, settings: Sequential, cutoff: dt.datetime) -> dict[str, Any]:
    data = execute(dataclasses.replace(plan, as_of=cutoff), engine)
    card = {(r["metric"], r["variant"]): r for r in build(data).rows if r["contrast"] is None}
    rows = []
    for name, role in plan.reported:
        if role is Role.DIAGNOSTIC:
            continue
        for variant in plan.spec.variant_names[1:]:
            seq = look_row(data, settings, name, role.value, variant)
            row = card[(name, variant)]
            rows.append(
                {
                    "metric": name,
                    "role": role.value,
                    "variant": variant,
                    "value": row["value"],
                    "control_value": row["control_value"],
                    "abs_effect": row["abs_effect"],
                    "p_value": row["p_value"],
                    "hypothesis": row["hypothesis"],
                    "look_p": seq["always_valid_p"],
                    "look_cs_low": seq["cs_low"],
                    "look_cs_high": seq["cs_high"],
                    "method": seq["method"],
                }
            )
    units = {v: c.units for v, c in data.counts.items()}
    clean = [{k: None if _bad(x) else x for k, x in r.items()} for r in rows]
    return {"as_of": cutoff.isoformat() + "Z", "units": units, "rows": clean}


def _bad(value: Any) -> bool:
    return isinstance(value, float) and not math.isfinite(value)


def _nan(value: Any) -> float:
    return float("nan") if value is None else float(value)


def _carry(looks: list[dict[str, Any]]) -> None:
    """Fill each row's running always-valid p-value and running interval."""
    keys = sorted({(r["metric"], r["variant"]) for look in looks for r in look["rows"]})
    for key in keys:
        mine = [
            next((r for r in look["rows"] if (r["metric"], r["variant"]) == key), None)
            for look in looks
        ]
        present = [r for r in mine if r is not None]
        p = running_p_value(np.array([_nan(r["look_p"]) for r in present]))
        low, high = running_interval(
            np.array([_nan(r["look_cs_low"]) for r in present]),
            np.array([_nan(r["look_cs_high"]) for r in present]),
        )
        for r, p_i, lo, hi in zip(present, p, low, high, strict=True):
            finite = bool(p_i < float("inf"))
            r["always_valid_p"] = float(p_i) if finite else None
            r["cs_low"] = float(lo) if finite else None
            r["cs_high"] = float(hi) if finite else None


def _first(looks: list[dict[str, Any]], alpha: float) -> list[dict[str, Any]]:
    """Per metric and arm: the first look whose ordinary / always-valid p is below alpha."""
    out: dict[tuple[str, str], dict[str, Any]] = {}
    for look in looks:
        for r in look["rows"]:
            entry = out.setdefault(
                (r["metric"], r["variant"]),
                {
                    "metric": r["metric"],
                    "variant": r["variant"],
                    "ordinary": None,
                    "always_valid": None,
                },
            )
            p = r["p_value"]
            if entry["ordinary"] is None and p is not None and p < alpha:
                entry["ordinary"] = look["as_of"]
            p_av = r.get("always_valid_p")
            if entry["always_valid"] is None and p_av is not None and p_av < alpha:
                entry["always_valid"] = look["as_of"]
    return list(out.values())


def replay_looks(plan: Plan, engine: Engine, every: dt.timedelta) -> dict[str, Any]:
    """Every look of the experiment (see the module doc), as plain data."""
    settings = settings_of(plan)
    times = cutoffs(plan, every)
    looks = []
    for i, cutoff in enumerate(times):
        try:
            looks.append(_look(plan, engine, settings, cutoff))
        except InputDataError as err:
            if i == len(times) - 1:
                raise
            # too early: no exposures yet, or a variant without analysable units
            looks.append(
                {"as_of": cutoff.isoformat() + "Z", "units": {}, "rows": [], "note": err.message}
            )
    _carry(looks)
    spec = plan.spec
    return {
        "experiment": spec.name,
        "every_hours": every.total_seconds() / 3600,
        "alpha": spec.alpha,
        **settings.record(),
        "looks": looks,
        "first_significant": _first(looks, spec.alpha),
    }


def _num(value: Any, digits: int = 4) -> str:
    return "–" if value is None else f"{value:.{digits}g}"


def render_looks(report: dict[str, Any], console: Console) -> None:
    """One table per metric and arm: a line per look; then the first significant looks."""
    console.print(
        f"looks at {report['experiment']} every {report['every_hours']:g} h; always-valid"
        f" p and CS with effect {100 * report['effect']:.4g}%, alpha {report['alpha']:g}"
    )
    keys = [(r["metric"], r["variant"], r["role"]) for r in report["looks"][-1]["rows"]]
    for metric, variant, role in keys:
        table = Table(title=f"{metric} ({role}), {variant} vs control", title_justify="left")
        for col in ("as of", "units", "effect", "p", "always-valid p", "CS"):
            table.add_column(col, justify="left" if col == "as of" else "right")
        for look in report["looks"]:
            row = next(
                (r for r in look["rows"] if (r["metric"], r["variant"]) == (metric, variant)),
                None,
            )
            if row is None:
                table.add_row(look["as_of"], "–", look.get("note", "–"), "", "", "")
                continue
            units = " / ".join(str(n) for n in look["units"].values())
            table.add_row(
                look["as_of"],
                units,
                _num(row["abs_effect"]),
                _num(row["p_value"], 3),
                _num(row["always_valid_p"], 3),
                f"({_num(row['cs_low'])}, {_num(row['cs_high'])})",
            )
        notes = {r["method"] for r in report["looks"][-1]["rows"] if r["metric"] == metric}
        for note in sorted(n for n in notes if n.startswith("not computed")):
            console.print(f"  always-valid p and CS {note}", markup=False)
        console.print(table)
    for entry in report["first_significant"]:
        console.print(
            f"{entry['metric']} {entry['variant']}: first p < alpha at"
            f" {entry['ordinary'] or 'no look'}; first always-valid p < alpha at"
            f" {entry['always_valid'] or 'no look'}",
            markup=False,
        )
