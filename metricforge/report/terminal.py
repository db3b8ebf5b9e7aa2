"""The terminal view of a scorecard (rich)."""

from __future__ import annotations

import math
from typing import Any

from rich.console import Console
from rich.table import Table

from metricforge.report.scorecard import Scorecard


def _num(value: Any, digits: int = 4) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "–"
    return f"{value:.{digits}g}"


def _pct(value: Any) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "–"
    return f"{100 * value:+.2f}%"


def render(card: Scorecard, console: Console) -> None:
    trust = card.trust
    verdict = trust["verdict"].upper()
    style = "bold green" if trust["verdict"] == "pass" else "bold red"
    console.print(f"[{style}]trust: {verdict}[/]  experiment {card.stamp['experiment']}")
    for check in trust["checks"]:
        mark = "ok  " if check["passed"] else "FAIL"
        console.print(f"  {mark} {check['check']}: {check['figure']}")
    for v in card.variants:
        console.print(
            f"  {v['variant']}: {v['units']} units analysed, {v['bot_units']} bot units removed,"
            f" {v['contaminated_units']} seen in two variants"
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
        "p",
        "method",
    ):
        table.add_column(col, justify="left" if col in ("metric", "role", "method") else "right")
    for r in card.rows:
        significant = (
            r["p_value"] is not None and math.isfinite(r["p_value"]) and (r["p_value"] < r["alpha"])
        )
        table.add_row(
            r["metric"],
            r["role"],
            r["variant"],
            str(r["n_units"]),
            _num(r["value"]),
            _num(r["control_value"]),
            f"{_num(r['abs_effect'])} ({_num(r['abs_ci_low'])}, {_num(r['abs_ci_high'])})",
            f"{_pct(r['rel_effect'])} ({_pct(r['rel_ci_low'])}, {_pct(r['rel_ci_high'])})",
            _num(r["p_value"], 3),
            r["method"],
            style="bold" if significant else None,
        )
    console.print(table)
    s = card.stamp
    console.print(
        f"bot filter {s['bot_filter']}@{s['bot_filter_version']} ({s['bot_filter_sha256'][:12]}),"
        f" definitions {s['definitions_sha256'][:12]}, spec {s['spec_sha256'][:12]},"
        f" inputs {s['inputs_fingerprint'][:12]}, {s['engine']} {s['engine_version']},"
        f" metricforge {s['tool_version']}"
    )
