"""What each scorecard p-value tests, its multiple-testing adjustment, factorial contrasts.

- Decision metric: two-sided; p-values adjusted with Holm across the treatment arms
  (family: the decision metric's comparisons with the control).
- Guardrails: one-sided against the metric's bad direction: a harm test, or with a
  relative margin (``[metrics] guardrail_margins``) a non-inferiority test. Not adjusted:
  an unadjusted harm test raises more alarms, never fewer; and a launch that needs every
  guardrail to hold needs each to hold on its own (intersection–union).
- Diagnostics: two-sided; Benjamini–Hochberg adjusted across every diagnostic metric and
  treatment arm of the experiment (family: all diagnostic comparisons).
- Factorial contrasts (``[factors]``): main effects and interactions, two-sided, not
  adjusted; with CUPED, contrasts of the variants' CUPED-adjusted values.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable
from typing import Any

from metricforge.errors import StatsError
from metricforge.runner import RunData
from metricforge.spec.model import Direction, MetricDef, Role
from metricforge.stats.contrasts import ContrastResult, contrast, factorial_terms
from metricforge.stats.cuped import cuped_arms
from metricforge.stats.moments import FloatArray
from metricforge.stats.multiplicity import benjamini_hochberg, holm
from metricforge.stats.quantiles import QuantileSummary, quantile_contrast

TWO_SIDED = "two-sided"


def hypothesis(metric: MetricDef, role: Role, margin: float | None) -> tuple[int, str]:
    """(side for ``compare``, text for the ``hypothesis`` column) of one metric's tests."""
    if role is not Role.GUARDRAIL:
        return 0, TWO_SIDED
    side = 1 if metric.direction is Direction.LOWER else -1
    worse = "higher is worse" if side == 1 else "lower is worse"
    if margin is None:
        return side, f"one-sided harm: {worse}"
    return side, f"non-inferiority, margin {100 * margin:.4g}% of control: {worse}"


def adjust(rows: list[dict[str, Any]]) -> None:
    """Fill ``p_value_adjusted`` and ``adjustment`` of the arm-versus-control rows."""
    arms = [r for r in rows if r["contrast"] is None]
    families: list[tuple[list[dict[str, Any]], Callable[[list[float]], FloatArray], str]] = []
    decision = [r for r in arms if r["role"] == Role.DECISION.value]
    if decision:
        what = f"holm: decision metric across {len(decision)} treatment arm(s)"
        families.append((decision, holm, what))
    diagnostics = [r for r in arms if r["role"] == Role.DIAGNOSTIC.value]
    if diagnostics:
        n_metrics = len({r["metric"] for r in diagnostics})
        what = (
            f"bh: {len(diagnostics)} diagnostic tests"
            f" ({n_metrics} metrics x {len(diagnostics) // n_metrics} arm(s))"
        )
        families.append((diagnostics, benjamini_hochberg, what))
    for family, method, what in families:
        adjusted = method([r["p_value"] for r in family])
        for row, p in zip(family, adjusted, strict=True):
            row["p_value_adjusted"] = float(p)
            row["adjustment"] = what if math.isfinite(p) else None


def factorial_rows(
    data: RunData, metric: str, base: Callable[[str], dict[str, Any]]
) -> list[dict[str, Any]]:
    """Main effects and interactions of a factorial spec, one row each.

    ``base(variant)`` gives the row fields shared with the arm rows.
    """
    spec = data.plan.spec
    if not spec.factors:
        return []
    names = [f.name for f in spec.factors]
    levels = {v: [f.coded(v) for f in spec.factors] for v in spec.variant_names}
    moments = data.moments[metric]
    quantiles = data.extras.quantiles.get(metric)
    rows = []
    for term in factorial_terms(names, levels):
        variants = list(term.weights)
        weights = [term.weights[v] for v in variants]
        row = base(term.name)
        row["contrast"] = " ".join(f"{w:+.4g} {v}" for v, w in zip(variants, weights, strict=True))
        row["n_units"] = sum(moments[v].n for v, w in term.weights.items() if w > 0)
        row["n_units_control"] = sum(moments[v].n for v, w in term.weights.items() if w < 0)
        try:
            if quantiles is not None:  # a quantile metric: its variants' quantiles
                res = _quantile_contrast(data, metric, quantiles, variants, weights)
            else:
                res = _moments_contrast(data, metric, variants, weights, row)
        except StatsError as err:
            row["method"] = f"not computed: {err.message}"
            rows.append(row)
            continue
        row.update(
            value=res.positive,
            control_value=res.negative,
            abs_effect=res.estimate,
            abs_ci_low=res.ci_low,
            abs_ci_high=res.ci_high,
            p_value=res.p_value,
            method=res.method if row["method"] == "" else row["method"],
        )
        rows.append(row)
    return rows


def _moments_contrast(
    data: RunData, metric: str, variants: list[str], weights: list[float], row: dict[str, Any]
) -> ContrastResult:
    """The contrast of the variants' values; with CUPED, of their adjusted values (θ pooled
    over all variants, as the arm rows): ``row`` then gets the method and the variance
    reduction, or says in ``method`` why CUPED was not applied."""
    alpha = data.plan.spec.alpha
    moments = data.moments[metric]
    arms = data.extras.cuped.get(metric)
    if arms is None:
        return contrast([moments[v] for v in variants], weights, alpha=alpha)
    try:
        cuped = cuped_arms(arms, variants)
        res = contrast([cuped.adjusted[v] for v in variants], weights, alpha=alpha)
    except StatsError as err:
        res = contrast([moments[v] for v in variants], weights, alpha=alpha)
        row["method"] = f"{res.method} (cuped not applied: {err.message})"
        return res
    after = math.fsum(
        w * w * cuped.adjusted[v].var_x / cuped.adjusted[v].n
        for v, w in zip(variants, weights, strict=True)
    )
    before = math.fsum(w * w * cuped.plain[v] for v, w in zip(variants, weights, strict=True))
    row["method"] = cuped.method
    row["variance_reduction"] = 1.0 - after / before if before > 0 else 0.0
    # the adjusted contrast, split into its positive and negative parts of observed values
    observed = [w * cuped.observed[v] for v, w in zip(variants, weights, strict=True)]
    positive = math.fsum(x for x, w in zip(observed, weights, strict=True) if w > 0)
    negative = 0.0 - math.fsum(x for x, w in zip(observed, weights, strict=True) if w < 0)
    return dataclasses.replace(res, positive=positive, negative=negative)


def _quantile_contrast(
    data: RunData,
    metric: str,
    summaries: dict[str, QuantileSummary],
    variants: list[str],
    weights: list[float],
) -> ContrastResult:
    cells = [summaries[v] for v in variants if v in summaries]
    if len(cells) != len(variants):
        raise StatsError("a variant has no values of this quantile metric")
    q, alpha = data.plan.metric(metric).q, data.plan.spec.alpha
    return quantile_contrast(cells, weights, q=q, alpha=alpha)
