"""Planning an experiment from the pre-period logs: units and days for a power, or the MDE.

For every reported metric of a pipeline, the units of its exposure log are read over
their D days before first exposure (D = the spec's window_days unless given), in the one
scan of the events (``Plan.history_split``):

- the baseline (pooled mean or ratio) and the per-unit standard deviation σ (for ratios,
  of the delta-method linearisation) come from the whole pre-period;
- the correlation ρ between each unit's values in the earlier and the later half of the
  pre-period stands for the correlation CUPED would exploit between a pre-period and the
  experiment period; "with CUPED" uses σ²(1 − ρ²). Halves are shorter than the windows
  CUPED correlates, and per-unit values over shorter windows are noisier, so this ρ is
  usually an underestimate: the CUPED columns are on the cautious side;
- units first exposed per day (after the bot filter) give the traffic curve that turns
  units into days; past the observed days it is extended at the mean daily arrivals of
  the last observed week (marked as extrapolated).

Units per variant are for a two-sided z-test at the spec's alpha (for the decision metric
with several treatment arms, alpha divided by their number: the first step of Holm's
procedure) with the planned split, each treatment against the control.
"""

from __future__ import annotations

import dataclasses
import math
import re
from dataclasses import dataclass
from typing import Any

from rich.console import Console
from rich.table import Table

from metricforge.compile.history import half_columns, history_results
from metricforge.compile.query import CompiledRun, compile_plan
from metricforge.data_errors import run_naming_failures
from metricforge.engines.base import Engine
from metricforge.errors import InputDataError, SpecError, StatsError
from metricforge.runner import gather_inputs
from metricforge.spec.model import Kind, Plan, Role
from metricforge.stats.moments import Moments, ratio_point_and_variance
from metricforge.stats.power import detectable_effect, linearised_correlation, units_needed

NOT_PLANNED = (
    "not planned: a quantile metric's spread is not a per-unit moment (its scorecard CI is"
    " the outer CI of the pooled values)"
)


@dataclass(frozen=True)
class MetricPlan:
    metric: str
    role: str
    baseline: float
    sd: float  # per unit
    rho: float  # between the pre-period's halves (NaN when unknown)
    units: float = math.nan  # per variant (the control's count), without / with CUPED
    units_cuped: float = math.nan
    days: tuple[int, bool] | None = None  # (days, extrapolated)
    days_cuped: tuple[int, bool] | None = None
    mde: float = math.nan  # relative, at the given days
    mde_cuped: float = math.nan
    note: str = ""


@dataclass(frozen=True)
class PlanReport:
    experiment: str
    history_days: int
    exposure_days: int
    arrivals: tuple[int, ...]  # analysable units first exposed on each day
    alpha: float
    power: float
    mde: float | None
    days: int | None
    metrics: tuple[MetricPlan, ...]


def parse_mde(text: str) -> float:
    """'2%' or '0.02' → 0.02 (a relative effect)."""
    match = re.fullmatch(r"\s*([0-9]*\.?[0-9]+)\s*(%?)\s*", text)
    value = float(match.group(1)) / (100.0 if match.group(2) else 1.0) if match else math.nan
    if not 0.0 < value < 10.0:
        raise SpecError(f"expected a relative effect such as 2% or 0.02, got '{text}'", key="--mde")
    return value


def history_plan(plan: Plan, days: int | None = None) -> Plan:
    d = days if days is not None else plan.spec.window_days
    if not 1 <= d <= 366:
        raise SpecError("the history must be between 1 and 366 days", key="--history-days")
    return dataclasses.replace(plan, pre_period_days=d, history_split=True)


def cumulative(arrivals: tuple[int, ...], days: int) -> tuple[float, bool]:
    """Units first exposed in the first ``days`` days, and whether extrapolated."""
    if days <= len(arrivals):
        return float(sum(arrivals[:days])), False
    week = arrivals[-min(7, len(arrivals)) :]
    rate = sum(week) / len(week)
    return sum(arrivals) + rate * (days - len(arrivals)), True


def days_for(units: float, arrivals: tuple[int, ...]) -> tuple[int, bool] | None:
    """The first day count whose cumulative arrivals reach ``units``."""
    total = 0
    for day, count in enumerate(arrivals, start=1):
        total += count
        if total >= units:
            return day, False
    week = arrivals[-min(7, len(arrivals)) :]
    rate = sum(week) / len(week) if week else 0.0
    if rate <= 0:
        return None
    return len(arrivals) + math.ceil((units - total) / rate), True


def _f(row: dict[str, Any], key: str) -> float:
    value = row.get(key)
    return math.nan if value is None else float(value)


def _metric_plan(
    plan: Plan, row: dict[str, Any], name: str, role: Role, arrivals: tuple[int, ...], *,
    mde: float | None, days: int | None, power: float,
) -> MetricPlan:  # fmt: skip
    metric = plan.metric(name)
    if metric.kind is Kind.QUANTILE:  # its history columns count values, no latency
        return MetricPlan(name, role.value, math.nan, math.nan, math.nan, note=NOT_PLANNED)
    p = f"{name}__"
    n = int(row.get(p + "n") or 0)
    mean_y, var_y, cov_xy = 1.0, 0.0, 0.0
    if metric.is_ratio:
        mean_y, var_y, cov_xy = _f(row, p + "mean_y"), _f(row, p + "var_y"), _f(row, p + "cov_xy")
    try:
        moments = Moments(n, _f(row, p + "mean_x"), mean_y, _f(row, p + "var_x"), var_y, cov_xy)
        baseline, var = ratio_point_and_variance(moments)
    except StatsError as err:
        return MetricPlan(name, role.value, math.nan, math.nan, math.nan, note=err.message)
    sd = math.sqrt(var * n)
    rho = _halves_rho(row, p, metric.is_ratio)
    spec = plan.spec
    shares = dict(spec.variants)
    w_c = shares[spec.control]
    arms = [shares[v] for v in spec.variant_names[1:]]
    alpha = spec.alpha / len(arms) if role is Role.DECISION else spec.alpha
    uncapped = "sized on uncapped values: winsorising is not applied to the history"
    out = MetricPlan(name, role.value, baseline, sd, rho, note=uncapped if metric.winsorise else "")
    if baseline == 0 or not sd > 0:
        return dataclasses.replace(out, note="no relative effect: baseline 0 or no variance")
    for suffix, s in (("", sd), ("_cuped", sd * math.sqrt(1.0 - rho * rho))):
        if not s > 0:
            continue
        fields: dict[str, Any] = {}
        if mde is not None:  # the control's units, and all units, for the worst arm
            n_c = max(
                units_needed(mde * abs(baseline), s, alpha=alpha, power=power, ratio=w / w_c)
                for w in arms
            )
            fields["units" + suffix] = n_c
            fields["days" + suffix] = days_for(n_c / w_c, arrivals)
        if days is not None:
            total, _ = cumulative(arrivals, days)
            found = [
                detectable_effect(s, total * w, total * w_c, alpha=alpha, power=power) for w in arms
            ]
            fields["mde" + suffix] = max(found) / abs(baseline)
        out = dataclasses.replace(out, **fields)
    return out


def _halves_rho(row: dict[str, Any], p: str, ratio: bool) -> float:
    if int(row.get(p + "h_n") or 0) < 3:
        return math.nan
    names = ["x1", "x2", "y1", "y2"] if ratio else ["x1", "x2"]
    cov = [[math.nan] * len(names) for _ in names]
    for suffix, a, b in half_columns(ratio):
        i = names.index(a)
        j = names.index(b) if b is not None else i
        if suffix.startswith(("var", "cov")):
            cov[i][j] = cov[j][i] = _f(row, p + suffix)
    means = [_f(row, p + f"mean_{v}") for v in names]
    try:
        return linearised_correlation(means, cov)
    except StatsError:
        return math.nan


def estimate(
    plan: Plan, engine: Engine, *, mde: float | None, days: int | None, power: float = 0.8
) -> PlanReport:
    """Run the history scan of ``plan`` (from ``history_plan``) and size the experiment."""
    if mde is None and days is None:
        raise SpecError("give --mde (units and days needed), --days (the MDE), or both")
    if days is not None and days < 1:
        raise SpecError(f"must be at least 1, is {days}", key="--days")
    if not plan.spec.alpha < power < 1.0:  # before the scan, not after it
        raise SpecError(
            f"must lie strictly between the spec's alpha {plan.spec.alpha:g} and 1, is {power:g}",
            key="--power",
        )
    inputs, _ = gather_inputs(plan)
    compiled = compile_plan(plan, engine.dialect)
    run = CompiledRun(compiled.unit_rows, history_results(plan))
    tables = run_naming_failures(plan, engine, run, inputs)
    spec = plan.spec
    exposure_days = max(1, math.ceil((spec.end - spec.start).total_seconds() / 86400))
    counts = {int(r["first_day"]): int(r["n_units"]) for r in tables["arrivals"].to_pylist()}
    arrivals = tuple(counts.get(d, 0) for d in range(exposure_days))
    if not sum(arrivals):
        raise InputDataError(
            f"no analysable exposures of experiment '{spec.name}' to plan from",
            file=str(spec.exposures_path),
            key="experiment",
        )
    row = tables["history"].to_pylist()[0]
    metrics = tuple(
        _metric_plan(plan, row, name, role, arrivals, mde=mde, days=days, power=power)
        for name, role in plan.reported
    )
    return PlanReport(
        spec.name, plan.pre_period_days, exposure_days, arrivals, spec.alpha, power, mde,
        days, metrics,
    )  # fmt: skip


def _num(value: float, digits: int = 4) -> str:
    return f"{value:.{digits}g}" if math.isfinite(value) else "–"


def _days(value: tuple[int, bool] | None) -> str:
    if value is None:
        return "–"
    return f"{value[0]:,}*" if value[1] else str(value[0])


def _units(value: float) -> str:
    return f"{math.ceil(value):,}" if math.isfinite(value) else "–"


def render(report: PlanReport, console: Console) -> None:
    total = sum(report.arrivals)
    console.print(
        f"plan for {report.experiment}: history = each unit's {report.history_days} days before"
        f" its first exposure; {total:,} analysable units first exposed over"
        f" {report.exposure_days} days; two-sided alpha {report.alpha:g},"
        f" power {report.power:.0%}"
    )
    head = ["metric", "role", "baseline", "sd per unit", "rho halves"]
    if report.mde is not None:
        title = f"units per variant and days to detect a {100 * report.mde:.4g}% relative effect"
        table = Table(*head, title=title)
        for col in ("units/variant", "days", "units/variant CUPED", "days CUPED"):
            table.add_column(col, justify="right")
        for m in report.metrics:
            table.add_row(
                m.metric, m.role, _num(m.baseline), _num(m.sd), _num(m.rho, 3),
                _units(m.units), _days(m.days), _units(m.units_cuped), _days(m.days_cuped),
            )  # fmt: skip
        console.print(table)
        console.print(
            f"  * beyond the {report.exposure_days} observed days: extrapolated at the mean"
            " daily arrivals of the last observed week"
        )
    if report.days is not None:
        table = Table(*head, title=f"minimum detectable relative effect after {report.days} days")
        for col in ("MDE", "MDE CUPED"):
            table.add_column(col, justify="right")
        for m in report.metrics:
            table.add_row(
                m.metric, m.role, _num(m.baseline), _num(m.sd), _num(m.rho, 3),
                _pct(m.mde), _pct(m.mde_cuped),
            )  # fmt: skip
        console.print(table)
    for m in report.metrics:
        if m.note:
            console.print(f"  {m.metric}: {m.note}")


def _pct(value: float) -> str:
    return f"{100 * value:.2f}%" if math.isfinite(value) else "–"
