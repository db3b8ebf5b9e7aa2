"""The scorecard's `sequential` section: always-valid p-values and confidence sequences.

Present only when the spec has a [sequential] table. For each reported metric (decision,
guardrails, diagnostics) and treatment arm: the difference ``d`` of the scorecard (the
CUPED-adjusted one where CUPED is on), its variance ``v``, the mixing variance
τ² = (effect · |scale|)² and, from stats/sequential.py, the always-valid p-value of H0: no
difference (two-sided, for every role) and the confidence sequence of the absolute effect
at this look. A run is one look: `metricforge looks` replays the looks over time and takes
the running minimum of the p-values and the running intersection of the intervals.

The scale is the metric's ``baseline`` from the spec when given (a number fixed before the
data: the guarantee is exact), otherwise the pooled value of the two compared variants at
this look (all their units together). Under H0 the pooled value carries no information
about the difference (for equal arms, the sum and the difference of the arm means are
uncorrelated), and it only sets how sharply the test is tuned; it settles as units arrive,
like the plug-in variance ``v`` itself. Quantile metrics are left out: their interval comes
from order statistics, not from an estimate with a variance.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from metricforge.errors import StatsError
from metricforge.runner import RunData
from metricforge.spec.model import Kind, Sequential
from metricforge.stats.cuped import cuped_compare
from metricforge.stats.moments import Moments, ratio_point_and_variance
from metricforge.stats.sequential import look_interval, look_p_value, mixing_variance

METHOD = "normal-mixture"
QUANTILE_NOTE = (
    "not computed: quantile metrics are left out (their interval comes from order"
    " statistics, not from an estimate and its variance)"
)


@dataclass(frozen=True)
class Estimate:
    """The difference of one arm against the control at one look, and its variance."""

    d: float
    v: float
    scale: float
    scale_from: str  # "baseline" or "pooled"
    method: str


def _pooled(t: Moments, c: Moments) -> float:
    """The value of the metric over the units of both arms together."""
    den = t.n * t.mean_y + c.n * c.mean_y
    return float((t.n * t.mean_x + c.n * c.mean_x) / den) if den else math.nan


def estimate(data: RunData, settings: Sequential, metric: str, variant: str) -> Estimate:
    """(d, v) of ``metric`` for ``variant`` against the control; a StatsError if none."""
    definition = data.plan.metric(metric)
    if definition.kind is Kind.QUANTILE:
        raise StatsError(QUANTILE_NOTE.removeprefix("not computed: "))
    control = data.plan.spec.control
    moments = data.moments[metric]
    t_val, v_t = ratio_point_and_variance(moments[variant])
    c_val, v_c = ratio_point_and_variance(moments[control])
    d, v, method = t_val - c_val, v_t + v_c, METHOD
    arms = data.extras.cuped.get(metric)
    if arms is not None:
        try:
            adjusted = cuped_compare(arms, variant, control, alpha=data.plan.spec.alpha)
            d, v, method = adjusted.effect.abs_effect, adjusted.variance, METHOD + "+cuped"
        except StatsError as err:
            method = f"{METHOD} (cuped not applied: {err.message})"
    baselines = dict(settings.baselines)
    if metric in baselines:
        return Estimate(d, v, baselines[metric], "baseline", method)
    return Estimate(d, v, _pooled(moments[variant], moments[control]), "pooled", method)


def look_row(
    data: RunData, settings: Sequential, metric: str, role: str, variant: str
) -> dict[str, Any]:
    """One (metric, arm) row of the section at this look."""
    spec = data.plan.spec
    row: dict[str, Any] = {
        "metric": metric,
        "role": role,
        "variant": variant,
        "n_units": data.moments[metric][variant].n,
        "n_units_control": data.moments[metric][spec.control].n,
        "abs_effect": None,
        "variance": None,
        "scale": None,
        "scale_from": None,
        "mixing_sd": None,
        "always_valid_p": None,
        "cs_low": None,
        "cs_high": None,
        "method": "",
    }
    try:
        est = estimate(data, settings, metric, variant)
    except StatsError as err:
        row["method"] = f"not computed: {err.message}"
        return row
    tau2 = float(mixing_variance(settings.effect, est.scale))
    low, high = look_interval(est.d, est.v, tau2, spec.alpha)
    row.update(
        abs_effect=est.d,
        variance=est.v,
        scale=est.scale,
        scale_from=est.scale_from,
        mixing_sd=math.sqrt(tau2),
        always_valid_p=float(look_p_value(est.d, est.v, tau2)),
        cs_low=float(low),
        cs_high=float(high),
        method=est.method,
    )
    if not math.isfinite(row["always_valid_p"]):
        row["method"] = (
            "not computed: the difference has no variance or the scale is 0 (give a baseline)"
        )
    return {
        k: (None if isinstance(x, float) and not math.isfinite(x) else x) for k, x in row.items()
    }


def sequential_section(data: RunData) -> dict[str, Any] | None:
    """The `sequential` section of scorecard.json; None without [sequential]."""
    settings = data.plan.spec.sequential
    if settings is None:
        return None
    spec = data.plan.spec
    rows = [
        look_row(data, settings, name, role.value, variant)
        for name, role in data.plan.reported
        for variant in spec.variant_names[1:]
    ]
    return {
        **settings.record(),
        "alpha": spec.alpha,
        "hypothesis": "two-sided: no difference",
        "method": METHOD,
        "look": (
            "this run is one look: always_valid_p and the interval [cs_low, cs_high] hold"
            " at any number of looks when each look's p-value is the running minimum and its"
            " interval the running intersection over all looks (metricforge looks)"
        ),
        "rows": rows,
    }
