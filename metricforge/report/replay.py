"""The terminal view of an A/A replay (rich)."""

from __future__ import annotations

from rich.console import Console
from rich.table import Table

from metricforge.checks.aa import Period, ReplayReport

# What the test column adds to the hypothesis for each replayed statistic.
STATISTIC_SHOWN = {"unadjusted": "", "cuped-adjusted": ", cuped", "outer-ci": ", outer CI"}


def render_replay(report: ReplayReport, console: Console) -> None:
    period = (
        f"the pre-period ({report.period_days} days before each unit's first exposure)"
        if report.period is Period.PRE
        else f"the experiment period ({report.period_days}-day windows)"
    )
    console.print(
        f"A/A replay of {report.experiment}: {report.replays} re-randomisations of"
        f" {report.units} analysed units in {report.buckets} hash buckets, on {period};"
        f" alpha {report.alpha:g}, seed {report.seed}",
        markup=False,
    )
    for note in report.notes:
        console.print(f"- {note}", markup=False)
    table = Table()
    columns = ("metric", "role", "test", "variant", "p < alpha", "99% interval", "KS D", "KS p")
    for col in columns:
        table.add_column(col, justify="left" if col in ("metric", "role", "test") else "right")
    table.add_column("verdict")
    for r in report.rows:
        judged = r["margin"] is None
        verdict = r["verdict"] + ("" if r["uniform"] or not judged else "; p-values not uniform")
        style = None if r["verdict"] == "calibrated" or not judged else "bold red"
        table.add_row(
            r["metric"],
            r["role"],
            r["hypothesis"].split(":")[0] + STATISTIC_SHOWN.get(r["statistic"], ""),
            r["variant"],
            f"{r['share']:.3f}",
            f"{r['ci_low']:.3f}–{r['ci_high']:.3f}",
            f"{r['ks_statistic']:.3f}",
            f"{r['ks_p_value']:.3g}",
            verdict,
            style=style,
        )
    console.print(table)
    for s in report.skipped:
        console.print(f"{s['metric']} ({s['role']}): {s['reason']}", markup=False)
