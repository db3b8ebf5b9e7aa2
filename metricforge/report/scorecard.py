"""The scorecard: one row per (metric, treatment variant), plus the trust checks."""

from __future__ import annotations

import contextlib
import math
from dataclasses import dataclass, field
from typing import Any

import pyarrow as pa

from metricforge.errors import StatsError
from metricforge.runner import RunData
from metricforge.stats import Effect, compare, ratio_point_and_variance, srm_test
from metricforge.stats.independence import share_differs

SCORECARD_SCHEMA = pa.schema(
    [
        ("experiment", pa.string()),
        ("metric", pa.string()),
        ("role", pa.string()),
        ("kind", pa.string()),
        ("direction", pa.string()),
        ("variant", pa.string()),
        ("control", pa.string()),
        ("n_units", pa.int64()),
        ("n_units_control", pa.int64()),
        ("value", pa.float64()),
        ("control_value", pa.float64()),
        ("abs_effect", pa.float64()),
        ("abs_ci_low", pa.float64()),
        ("abs_ci_high", pa.float64()),
        ("rel_effect", pa.float64()),
        ("rel_ci_low", pa.float64()),
        ("rel_ci_high", pa.float64()),
        ("p_value", pa.float64()),
        ("alpha", pa.float64()),
        ("method", pa.string()),
        ("unit_label", pa.string()),
        ("bot_filter", pa.string()),
        ("bot_filter_version", pa.int64()),
        ("bot_filter_sha256", pa.string()),
        ("definitions_sha256", pa.string()),
        ("spec_sha256", pa.string()),
        ("inputs_fingerprint", pa.string()),
        ("tool_version", pa.string()),
    ]
)

_EFFECT_FIELDS = (
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


@dataclass(frozen=True)
class Scorecard:
    rows: list[dict[str, Any]]
    trust: dict[str, Any]
    variants: list[dict[str, Any]]
    stamp: dict[str, Any]
    quality: dict[str, Any] = field(default_factory=dict)

    def table(self) -> pa.Table:
        return pa.Table.from_pylist(self.rows, schema=SCORECARD_SCHEMA)

    def as_json(self) -> dict[str, Any]:
        return {
            "trust": self.trust,
            "experiment": self.stamp["experiment"],
            "stamp": self.stamp,
            "variants": self.variants,
            "data_quality": self.quality,
            "metrics": [_clean(r) for r in self.rows],
        }


def _clean(row: dict[str, Any]) -> dict[str, Any]:
    return {
        k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in row.items()
    }


def _effect_fields(data: RunData, metric: str, variant: str) -> tuple[dict[str, Any], str]:
    moments = data.moments[metric]
    control = data.plan.spec.control
    try:
        effect: Effect = compare(moments[variant], moments[control], alpha=data.plan.spec.alpha)
    except StatsError as err:
        fields: dict[str, Any] = {f: float("nan") for f in _EFFECT_FIELDS}
        for name, v in (("value", variant), ("control_value", control)):
            with contextlib.suppress(StatsError):
                fields[name] = ratio_point_and_variance(moments[v])[0]
        return fields, f"not computed: {err.message}"
    return {f: float(getattr(effect, f)) for f in _EFFECT_FIELDS}, effect.method


def build(data: RunData) -> Scorecard:
    spec = data.plan.spec
    stamp = data.stamp.as_dict()
    row_stamp = {
        k: stamp[k]
        for k in (
            "bot_filter",
            "bot_filter_version",
            "bot_filter_sha256",
            "definitions_sha256",
            "spec_sha256",
            "inputs_fingerprint",
            "tool_version",
        )
    }
    rows: list[dict[str, Any]] = []
    for name, role in data.plan.reported:
        metric = data.plan.metric(name)
        for variant in spec.variant_names[1:]:
            fields, method = _effect_fields(data, name, variant)
            rows.append(
                {
                    "experiment": spec.name,
                    "metric": name,
                    "role": role.value,
                    "kind": metric.kind.value,
                    "direction": metric.direction.value,
                    "variant": variant,
                    "control": spec.control,
                    "n_units": data.moments[name][variant].n,
                    "n_units_control": data.moments[name][spec.control].n,
                    **fields,
                    "alpha": spec.alpha,
                    "method": method,
                    "unit_label": metric.unit_label,
                    **row_stamp,
                }
            )
    return Scorecard(
        rows=rows,
        trust=trust_section(data),
        variants=variant_section(data),
        stamp=stamp,
        quality=data.quality,
    )


def variant_section(data: RunData) -> list[dict[str, Any]]:
    out = []
    for variant, c in data.counts.items():
        out.append(
            {
                "variant": variant,
                "planned_share": dict(data.plan.spec.variants)[variant],
                "units": c.units,
                "events": c.events,
                "bot_units": c.bot_units,
                "bot_events": c.bot_events,
                "bot_unit_share": c.bot_units / c.exposed if c.exposed else None,
                "contaminated_units": c.contaminated_units,
            }
        )
    return out


def trust_section(data: RunData) -> dict[str, Any]:
    spec = data.plan.spec
    names = spec.variant_names
    # Sample ratio on every exposed unit: the assignment itself, before any filtering.
    # An imbalance that the bot filter creates is the next check's job.
    exposed = [data.counts[v].exposed for v in names]
    srm = srm_test(exposed, [s for _, s in spec.variants])
    checks = [
        {
            "check": "sample_ratio_mismatch",
            "figure": f"chi2={srm.chi2:.4g}, df={srm.df}, p={srm.p_value:.4g}",
            "p_value": srm.p_value,
            "threshold": spec.srm_alpha,
            "observed": dict(zip(names, exposed, strict=True)),
            "expected": dict(
                zip(spec.variant_names, [round(e, 6) for e in srm.expected], strict=True)
            ),
            "passed": bool(srm.p_value >= spec.srm_alpha),
        }
    ]
    bots = [data.counts[v].bot_units for v in names]
    shares = [f"{v} {b / e:.2%}" for v, b, e in zip(names, bots, exposed, strict=True) if e]
    bot_test = share_differs(bots, exposed)
    checks.append(
        {
            "check": "bot_share_by_variant",
            "figure": ", ".join(shares) + f"; chi2={bot_test.chi2:.4g}, p={bot_test.p_value:.4g}",
            "p_value": bot_test.p_value,
            "threshold": spec.srm_alpha,
            "bot_units": dict(zip(names, bots, strict=True)),
            "exposed_units": dict(zip(names, exposed, strict=True)),
            "passed": bool(bot_test.p_value >= spec.srm_alpha),
        }
    )
    return {
        "verdict": "pass" if all(c["passed"] for c in checks) else "fail",
        "checks": checks,
    }
