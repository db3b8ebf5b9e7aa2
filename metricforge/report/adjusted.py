"""Scorecard effects that do not come from plain moments: quantile metrics (outer CI) and
CUPED-adjusted metrics, and the extra columns `variance_reduction` and `cap`."""

from __future__ import annotations

import dataclasses
import math
from typing import Any

from metricforge.errors import StatsError
from metricforge.runner import RunData
from metricforge.spec.model import Kind
from metricforge.stats import Effect, compare
from metricforge.stats.cuped import CupedEffect, cuped_compare
from metricforge.stats.proportions import FISHER_BELOW, small_counts
from metricforge.stats.quantiles import quantile_compare

EXTRA_COLUMNS = ("variance_reduction", "cap")


def _cuped(data: RunData, metric: str, variant: str, **test: Any) -> CupedEffect | None:
    arms = data.extras.cuped.get(metric)
    if arms is None:
        return None
    control, alpha = data.plan.spec.control, data.plan.spec.alpha
    if small_counts(data.moments[metric][variant], data.moments[metric][control]):
        # a normal approximation on adjusted values would replace the exact test
        raise StatsError(f"an expected cell count is below {FISHER_BELOW:g}")
    return cuped_compare(arms, variant, control, alpha=alpha, **test)


def adjusted_effect(
    data: RunData, metric: str, variant: str, *, side: int = 0, margin: float | None = None
) -> Effect | None:
    """The effect of a quantile or CUPED-adjusted metric; None for every other metric.

    ``side`` and ``margin`` choose the p-value's hypothesis (0: two-sided; see
    ``stats.quantiles.quantile_compare``). CUPED that cannot be applied (a compared
    variant without any pre-period data; a proportion whose 2×2 table has an expected cell
    count below 5, which keeps Fisher's exact test) falls back to the unadjusted effect and
    says why in `method`.
    """
    control, alpha = data.plan.spec.control, data.plan.spec.alpha
    # passed to compare only when not the default, which every version of it accepts
    test: dict[str, Any] = {} if side == 0 and margin is None else {"side": side, "margin": margin}
    definition = data.plan.metric(metric)
    if definition.kind is Kind.QUANTILE:
        summaries = data.extras.quantiles[metric]
        t, c = summaries.get(variant), summaries.get(control)
        try:
            if t is None or c is None:
                raise StatsError("a variant has no values of this quantile metric")
            return quantile_compare(t, c, q=definition.q, alpha=alpha, side=side, margin=margin)
        except StatsError as err:  # the quantiles themselves are still worth showing
            numbers = {f.name: math.nan for f in dataclasses.fields(Effect) if f.name != "method"}
            numbers["value"] = t.quantile if t is not None else math.nan
            numbers["control_value"] = c.quantile if c is not None else math.nan
            return Effect(**numbers, method=f"not computed: {err.message}")
    if metric not in data.extras.cuped:
        return None
    try:
        result = _cuped(data, metric, variant, **test)
    except StatsError as err:
        moments = data.moments[metric]
        plain = compare(moments[variant], moments[control], alpha=alpha, **test)
        return dataclasses.replace(
            plain, method=f"{plain.method} (cuped not applied: {err.message})"
        )
    assert result is not None
    return result.effect


def extra_columns(data: RunData, metric: str, variant: str) -> dict[str, Any]:
    """`variance_reduction` (CUPED: 1 − adjusted/unadjusted variance of the effect) and
    `cap` (winsorising: the cap of the per-unit value); None where they do not apply."""
    reduction: float | None = None
    try:
        result = _cuped(data, metric, variant)
        reduction = result.variance_reduction if result is not None else None
    except StatsError:
        reduction = None
    cap = data.extras.caps.get(metric)
    if cap is not None and not math.isfinite(cap):
        cap = None
    return {"variance_reduction": reduction, "cap": cap}
