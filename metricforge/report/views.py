"""Terminal views (rich) of a comparison, a rerun and the run history."""

from __future__ import annotations

import math
from typing import Any

from rich.console import Console
from rich.markup import escape
from rich.table import Table

from metricforge.compare import Comparison, ResultFolder
from metricforge.report.terminal import _num, _pct
from metricforge.reproduce import Verdict
from metricforge.rerun import InputChange


def _count(value: Any) -> str:
    return "–" if value is None else str(value)


def _change(value: Any, kind: str) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "–"
    if kind == "count":
        return f"{value:+d}" if isinstance(value, int) else f"{value:+.4g}"
    if kind == "share":
        return f"{100 * value:+.3g} pp"
    return f"{value:+.3g}"


_FORMATS = {"count": _count, "share": _pct, "number": _num}


def _pair(row: dict[str, Any], column: str, kind: str = "number") -> str:
    """``A → B (change)`` of one compared column; a share's change in percentage points."""
    fmt = _FORMATS[kind]
    a, b = row.get(f"{column}_a"), row.get(f"{column}_b")
    text = f"{fmt(a)} → {fmt(b)}"
    if f"{column}_change" in row and a is not None and b is not None:
        text += f" ({_change(row[f'{column}_change'], kind)})"
    return text


def _side(label: str, r: ResultFolder) -> str:
    s = r.stamp
    return (
        f"{label}: {r.folder}  {s.get('experiment')}, filter {r.filter_ref},"
        f" definitions {str(s.get('definitions_sha256'))[:12]},"
        f" inputs {str(s.get('inputs_fingerprint'))[:12]}, metricforge {s.get('tool_version')}"
    )


def render_comparison(c: Comparison, console: Console) -> None:
    console.print(escape(_side("A", c.a)))
    console.print(escape(_side("B", c.b)))
    if c.comparable:
        console.print("[bold green]comparable[/]: same experiment, bot filter and definitions")
    else:
        console.print("[bold red]NOT COMPARABLE[/]: " + escape("; ".join(c.reasons)))
    if c.notes:
        console.print("also differs: " + escape("; ".join(c.notes)))
    if c.left_out is not None:
        console.print("not compared: " + escape(c.left_out))
    console.print("each cell: A → B (change, B − A)")
    counts = Table("variant", "units analysed", "bot units removed", "events analysed")
    for v in c.variants:
        counts.add_row(
            escape(str(v["variant"])),
            *(_pair(v, k, "count") for k in ("units", "bot_units", "events")),
        )
    console.print(counts)
    table = Table()
    for col in ("variant", "metric"):  # whole names: contrast names share a prefix
        table.add_column(col, no_wrap=True)
    for col in ("value", "abs effect", "rel effect", "p"):  # wrap at "→" and "(" if narrow
        table.add_column(col, justify="right", overflow="fold")
    for row in c.rows:
        table.add_row(
            escape(row["variant"]),
            escape(row["metric"]),
            _pair(row, "value"),
            _pair(row, "abs_effect"),
            _pair(row, "rel_effect", "share"),
            f"{_num(row.get('p_value_a'), 2)} → {_num(row.get('p_value_b'), 2)}",
        )
    console.print(table)


def render_rerun(
    manifest: str, changes: list[InputChange], verdict: Verdict, console: Console
) -> None:
    console.print(f"rerun of {escape(manifest)} from its own copies of spec, definitions, filter")
    if changes:
        console.print(f"[bold yellow]inputs changed[/] ({len(changes)}, allowed):")
        for change in changes:
            console.print(f"  {escape(change.describe())}")
    else:
        console.print("inputs: every file matches the manifest")
    files = ", ".join(
        f"{name} {'identical' if same else ('missing' if same is None else 'differs')}"
        for name, same in verdict.files.items()
    )
    if verdict.identical:
        console.print(f"[bold green]REPRODUCED[/] byte for byte: {files}")
        return
    head = "NOT CONFIRMED" if verdict.identical is None else "DIFFERENT"
    console.print(f"[bold red]{head}[/]: {files}")
    for reason in verdict.reasons:
        console.print(f"  why: {escape(reason)}")
    for line in verdict.differences[:20]:
        console.print(f"  values differ: {escape(line)}")
    if len(verdict.differences) > 20:
        console.print(f"  … and {len(verdict.differences) - 20} more rows")


_REPRODUCED = {True: " (identical)", False: " (differs)", None: " (unconfirmed)"}


def _decision(rows: list[dict[str, Any]]) -> str:
    """``metric: variant effect p=…; …``: the relative effect, or the absolute one where a
    row has none (a factorial contrast)."""
    parts = []
    for d in rows:
        rel = d.get("rel_effect")
        effect = _pct(rel) if rel is not None else f"abs {_num(d.get('abs_effect'), 3)}"
        parts.append(f"{d.get('variant')} {effect} p={_num(d.get('p_value'), 3)}")
    metrics = sorted({str(d.get("metric")) for d in rows})
    return escape(f"{', '.join(metrics)}: " * bool(rows) + "; ".join(parts))


def render_history(entries: list[dict[str, Any]], console: Console) -> None:
    """One line per run; ``out`` is the result folder's name inside the output root."""
    table = Table("run at (UTC)", "experiment", "command", "filter", "definitions", "inputs")
    for col in ("tool", "trust", "decision", "out"):
        table.add_column(col, no_wrap=col == "out")
    for e in entries:
        decision = _decision([d for d in e.get("decision", []) if isinstance(d, dict)])
        command = str(e.get("command"))
        if command == "rerun":
            command += _REPRODUCED.get(e.get("reproduced"), "")
        table.add_row(
            str(e.get("run_at"))[:16].replace("T", " "),
            escape(str(e.get("experiment"))),
            command,
            str(e.get("bot_filter")),
            str(e.get("definitions_sha256"))[:12],
            str(e.get("inputs_fingerprint"))[:12],
            str(e.get("tool_version")),
            str(e.get("trust")),
            decision,
            escape(str(e.get("out"))),
        )
    console.print(table)
    console.print(f"{len(entries)} run(s)")
