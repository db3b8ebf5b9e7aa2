"""The terminal view of a scorecard (rich)."""

from __future__ import annotations

import math
from typing import Any

from rich.console import Console
from rich.table import Table

from metricforge.checks.identity import describe as describe_identity
from metricforge.report.scorecard import Scorecard


def _num(value: Any, digits: int = 4) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "–"
    return f"{value:.{digits}g}"


def _pct(value: Any) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "–"
    return f"{100 * value:+.2f}%"


def _finite(value: Any) -> bool:
    return isinstance(value, float) and math.isfinite(value)


def _role(row: dict[str, Any]) -> str:
    """The role, with a guardrail's one-sided test: harm, or non-inferiority and its margin."""
    if row["role"] != "guardrail" or row["contrast"] is not None:
        return str(row["role"])
    if row["margin"] is None:
        return "guardrail (harm)"
    return f"guardrail (NI {100 * row['margin']:.4g}%)"


def _method(row: dict[str, Any]) -> str:
    """The method, with CUPED's variance reduction and a winsorising cap where they apply."""
    notes = [row["method"]]
    if row.get("variance_reduction") is not None:
        notes.append(f"variance -{100 * row['variance_reduction']:.1f}%")
    if row.get("cap") is not None:
        notes.append(f"cap {_num(row['cap'])}")
    return ", ".join(notes)


def render(card: Scorecard, console: Console) -> None:
    trust = card.trust
    verdict = trust["verdict"].upper()
    style = "bold green" if trust["verdict"] == "pass" else "bold red"
    warned = trust.get("warnings", 0)
    note = f" ({warned} warning{'s' * (warned != 1)})" if warned else ""
    console.print(f"[{style}]trust: {verdict}[/]{note}  experiment {card.stamp['experiment']}")
    marks = {"pass": "ok  ", "fail": "[bold red]FAIL[/]", "warn": "[yellow]warn[/]"}
    for check in trust["checks"]:
        console.print(f"  {marks[check.get('status', 'pass')]} {check['check']}: ", end="")
        console.print(check["figure"], markup=False)
    if card.identity is not None:
        console.print("  " + describe_identity(card.identity), markup=False)
    for v in card.variants:
        console.print(
            f"  {v['variant']}: {v['units']} units analysed, {v['bot_units']} bot units removed,"
            f" {v['seen_in_two_variants']} seen in two variants"
            f" ({v['contaminated_units']} of them excluded for it)"
        )
    for note in card.quality.get("notes", []):
        console.print(f"  data quality: {note}", markup=False)
    table = Table(title=None, show_lines=False)
    for col in (
        "metric",
        "role",
        "variant",
        "n",
        "value",
        "control",
        "abs effect (CI)",
        "rel effect (CI)",
        "p (adj)",
        "method",
    ):
        table.add_column(
            col,
            justify="left" if col in ("metric", "role", "method") else "right",
            overflow="fold",
        )
    for r in card.rows:
        p = r["p_value_adjusted"] if _finite(r["p_value_adjusted"]) else r["p_value"]
        significant = _finite(p) and p < r["alpha"]
        table.add_row(
            r["metric"],
            _role(r),
            r["variant"],
            str(r["n_units"]),
            _num(r["value"]),
            _num(r["control_value"]),
            f"{_num(r['abs_effect'])} ({_num(r['abs_ci_low'])}, {_num(r['abs_ci_high'])})",
            f"{_pct(r['rel_effect'])} ({_pct(r['rel_ci_low'])}, {_pct(r['rel_ci_high'])})",
            _num(r["p_value"], 3)
            + (f" ({_num(r['p_value_adjusted'], 3)})" if _finite(r["p_value_adjusted"]) else ""),
            _method(r),
            style="bold" if significant else None,
        )
    console.print(table)
    if card.segments is not None:
        render_segments(card.segments.section, card.stamp["experiment"], console)
    if card.sequential is not None:
        render_sequential(card.sequential, console)
    s = card.stamp
    console.print(
        f"bot filter {s['bot_filter']}@{s['bot_filter_version']} ({s['bot_filter_sha256'][:12]}),"
        f" definitions {s['definitions_sha256'][:12]}, spec {s['spec_sha256'][:12]},"
        f" inputs {s['inputs_fingerprint'][:12]}, {s['engine']} {s['engine_version']},"
        f" metricforge {s['tool_version']}"
    )


def _column_note(c: dict[str, Any]) -> str:
    note = f"{c['column']}: {c['values_shown']} value(s)"
    if c["values_pooled"]:
        fate = "shown" if c["other"] == "shown" else "suppressed (below min_units)"
        note += f", {c['values_pooled']} pooled into (other), {fate}"
    return note


def render_segments(section: dict[str, Any], experiment: str, console: Console) -> None:
    """The decision metric per segment value, and one line on the whole breakdown."""
    rows = [r for r in section["rows"] if r["role"] == "decision"]
    table = Table(title=None, show_lines=False)
    for col in ("segment", "value", "variant", "n", "rel effect (CI)", "p (bh)"):
        table.add_column(col, justify="left" if col in ("segment", "value") else "right")
    for r in rows:
        table.add_row(
            r["segment_column"],
            r["segment_value"],
            r["variant"],
            "–" if r["n_units"] is None else str(r["n_units"]),
            f"{_pct(r['rel_effect'])} ({_pct(r['rel_ci_low'])}, {_pct(r['rel_ci_high'])})",
            _num(r["p_value_adjusted"], 3),
        )
    console.print(f"segments of {experiment}'s decision metric (exploratory):", markup=False)
    console.print(table)
    notes = "; ".join(_column_note(c) for c in section["columns"])
    console.print(
        f"segments: min {section['min_units']} units per cell; {notes};"
        f" {section['adjustment']}; all rows in {section['file']}",
        markup=False,
    )


def render_sequential(section: dict[str, Any], console: Console) -> None:
    """The `sequential` section, one compact line per metric and arm."""
    console.print(
        f"always valid (effect {100 * section['effect']:.4g}%, alpha {section['alpha']:g},"
        " this look; `metricforge looks` replays all looks):"
    )
    for r in section["rows"]:
        if r["always_valid_p"] is None:
            console.print(f"  {r['metric']} {r['variant']}: {r['method']}", markup=False)
            continue
        mark = " *" if r["always_valid_p"] < section["alpha"] else ""
        console.print(
            f"  {r['metric']} {r['variant']}: effect {_num(r['abs_effect'])}"
            f" CS ({_num(r['cs_low'])}, {_num(r['cs_high'])}) p {_num(r['always_valid_p'], 3)}"
            f"{mark}",
            markup=False,
        )
