"""A result row's effect fields from two variants' moments: the one place where the
scorecard's rows (and the segment rows) call the statistics."""

from __future__ import annotations

import contextlib
from collections.abc import Callable, Mapping
from typing import Any

from metricforge.errors import StatsError
from metricforge.stats import Effect, Moments, compare, ratio_point_and_variance

EFFECT_FIELDS = (
    "value",
    "control_value",
    "abs_effect",
    "abs_ci_low",
    "abs_ci_high",
    "rel_effect",
    "rel_ci_low",
    "rel_ci_high",
    "p_value",
)


def _none() -> Effect | None:
    return None


def effect_fields(
    moments: Mapping[str, Moments],
    variant: str,
    control: str,
    *,
    alpha: float,
    side: int = 0,
    margin: float | None = None,
    adjusted: Callable[[], Effect | None] = _none,
) -> tuple[dict[str, Any], str]:
    """A row's effect fields and method: ``adjusted()`` (quantile, CUPED) or else the plain
    comparison of the variants' moments; NaN figures and the reason when neither works."""
    try:
        effect: Effect = adjusted() or compare(
            moments[variant], moments[control], alpha=alpha, side=side, margin=margin
        )
    except StatsError as err:
        fields: dict[str, Any] = {f: float("nan") for f in EFFECT_FIELDS}
        for name, v in (("value", variant), ("control_value", control)):
            with contextlib.suppress(StatsError):
                fields[name] = ratio_point_and_variance(moments[v])[0]
        return fields, f"not computed: {err.message}"
    return {f: float(getattr(effect, f)) for f in EFFECT_FIELDS}, effect.method
