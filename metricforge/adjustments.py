"""The extra result tables of a run (caps, cuped, quantile_<metric>) reshaped for the
statistics: winsorising caps, CUPED moments and quantile summaries per variant."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import pyarrow as pa

from metricforge.compile.extras import (
    cap_column,
    capped_metrics,
    cuped_column,
    cuped_metrics,
    cuped_variables,
    quantile_metrics,
)
from metricforge.spec.model import MetricDef, Plan
from metricforge.stats.cuped import UnitVectors
from metricforge.stats.moments import Moments
from metricforge.stats.quantiles import QuantileSummary


@dataclass
class Extras:
    caps: dict[str, float] = field(default_factory=dict)  # metric -> cap of its per-unit value
    cuped: dict[str, dict[str, UnitVectors]] = field(default_factory=dict)  # metric -> variant
    quantiles: dict[str, dict[str, QuantileSummary]] = field(default_factory=dict)


def _f(value: Any) -> float:
    return math.nan if value is None else float(value)


def read_extras(plan: Plan, tables: dict[str, pa.Table]) -> Extras:
    extras = Extras()
    if capped_metrics(plan):
        row = tables["caps"].to_pylist()[0]
        for metric in capped_metrics(plan):
            extras.caps[metric.name] = _f(row[cap_column(metric)])
    if cuped_metrics(plan):
        rows = tables["cuped"].to_pylist()
        for metric in cuped_metrics(plan):
            names = tuple(k for k, _ in cuped_variables(metric))
            extras.cuped[metric.name] = {
                str(r["variant"]): _vectors(metric, names, r) for r in rows
            }
    for metric in quantile_metrics(plan):
        extras.quantiles[metric.name] = {
            str(r["variant"]): _summary(r) for r in tables[f"quantile_{metric.name}"].to_pylist()
        }
    return extras


def _vectors(metric: MetricDef, names: tuple[str, ...], row: dict[str, Any]) -> UnitVectors:
    def col(stat: str, a: str = "", b: str = "") -> str:
        return cuped_column(metric, stat, a, b)

    k = len(names)
    cov = [[math.nan] * k for _ in range(k)]
    for i in range(k):
        for j in range(i, k):
            cov[i][j] = cov[j][i] = _f(row[col("cov", names[i], names[j])])
    n = int(row[col("n")] or 0)
    if n < 2:  # one unit: no (co)variance; the statistics refuse it by its count
        cov = [[0.0] * k for _ in range(k)]
    return UnitVectors(
        n=n,
        names=names,
        mean=tuple(_f(row[col("mean", a)]) for a in names),
        cov=tuple(tuple(r) for r in cov),
    )


def _summary(row: dict[str, Any]) -> QuantileSummary:
    return QuantileSummary(
        quantile=_f(row["quantile"]),
        n_values=int(row["n_values"] or 0),
        below=Moments(
            n=int(row["n_units"] or 0),
            mean_x=_f(row["mean_below"]),
            mean_y=_f(row["mean_count"]),
            var_x=_f(row["var_below"]),
            var_y=_f(row["var_count"]),
            cov_xy=_f(row["cov_below_count"]),
        ),
        level_low=_f(row["level_low"]),
        level_high=_f(row["level_high"]),
        value_low=_f(row["value_low"]),
        value_high=_f(row["value_high"]),
    )
