"""The scorecard: one row per (metric, treatment variant), plus the trust checks."""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass, field
from typing import Any

import pyarrow as pa

from metricforge.checks import trust_section
from metricforge.checks.bots import event_shares
from metricforge.checks.contamination import two_variant_counts
from metricforge.checks.identity import identity_section
from metricforge.report.adjusted import adjusted_effect, extra_columns
from metricforge.report.arrow_rows import table_from_rows
from metricforge.report.effect_fields import EFFECT_FIELDS, effect_fields
from metricforge.report.inference import TWO_SIDED, adjust, factorial_rows, hypothesis
from metricforge.report.segments import Breakdown, build_segments
from metricforge.report.sequential import sequential_section
from metricforge.runner import RunData
from metricforge.spec.model import MetricDef, Role

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
        ("hypothesis", pa.string()),
        ("margin", pa.float64()),
        ("p_value_adjusted", pa.float64()),
        ("adjustment", pa.string()),
        ("contrast", pa.string()),
        ("variance_reduction", pa.float64()),  # CUPED: 1 - adjusted / unadjusted variance
        ("cap", pa.float64()),  # winsorising: the cap of the per-unit value
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


@dataclass(frozen=True)
class Scorecard:
    rows: list[dict[str, Any]]
    trust: dict[str, Any]
    variants: list[dict[str, Any]]
    stamp: dict[str, Any]
    identity: dict[str, Any] | None = None  # what identity stitching merged, if it ran
    quality: dict[str, Any] = field(default_factory=dict)
    segments: Breakdown | None = None  # [segments]: the segment rows and their section
    sequential: dict[str, Any] | None = None  # [sequential]: report/sequential.py

    def table(self) -> pa.Table:
        return table_from_rows(self.rows, SCORECARD_SCHEMA)

    def as_json(self) -> dict[str, Any]:
        return {
            "trust": self.trust,
            "experiment": self.stamp["experiment"],
            "stamp": self.stamp,
            **({"identity": self.identity} if self.identity is not None else {}),
            "variants": self.variants,
            "data_quality": self.quality,
            "metrics": [_clean(r) for r in self.rows],
            **({"segments": self.segments.section} if self.segments is not None else {}),
            **({"sequential": self.sequential} if self.sequential is not None else {}),
        }


def _clean(row: dict[str, Any]) -> dict[str, Any]:
    return {
        k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in row.items()
    }


def _effect_fields(
    data: RunData, metric: str, variant: str, side: int, margin: float | None
) -> tuple[dict[str, Any], str]:
    return effect_fields(
        data.moments[metric],
        variant,
        data.plan.spec.control,
        alpha=data.plan.spec.alpha,
        side=side,
        margin=margin,
        adjusted=lambda: adjusted_effect(data, metric, variant, side=side, margin=margin),
    )


def _base_row(
    data: RunData, metric: MetricDef, role: Role, stamp: dict[str, Any], variant: str
) -> dict[str, Any]:
    """A row with the fields every row of one metric shares; the effect fields still NaN."""
    spec = data.plan.spec
    return {
        "experiment": spec.name,
        "metric": metric.name,
        "role": role.value,
        "kind": metric.kind.value,
        "direction": metric.direction.value,
        "variant": variant,
        "control": spec.control,
        "n_units": 0,
        "n_units_control": 0,
        **{f: float("nan") for f in EFFECT_FIELDS},
        "alpha": spec.alpha,
        "method": "",
        "hypothesis": TWO_SIDED,
        "margin": None,
        "p_value_adjusted": float("nan"),
        "adjustment": None,
        "contrast": None,
        "variance_reduction": None,
        "cap": None,
        "unit_label": metric.unit_label,
        **stamp,
    }


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
    margins = dict(spec.guardrail_margins)
    for name, role in data.plan.reported:
        metric = data.plan.metric(name)
        side, tested = hypothesis(metric, role, margins.get(name))

        base = functools.partial(_base_row, data, metric, role, row_stamp)
        for variant in spec.variant_names[1:]:
            fields, method = _effect_fields(data, name, variant, side, margins.get(name))
            row = base(variant)
            row.update(
                n_units=data.moments[name][variant].n,
                n_units_control=data.moments[name][spec.control].n,
                method=method,
                hypothesis=tested,
                margin=margins.get(name),
                **fields,
                **extra_columns(data, name, variant),
            )
            rows.append(row)
        rows += factorial_rows(data, name, base)
    adjust(rows)
    return Scorecard(
        rows=rows,
        trust=trust_section(data),
        variants=variant_section(data),
        stamp=stamp,
        identity=identity_section(data),
        quality=data.quality,
        segments=build_segments(data, row_stamp),
        sequential=sequential_section(data),
    )


def variant_section(data: RunData) -> list[dict[str, Any]]:
    out = []
    event_share, _ = event_shares(data)
    two, _ = two_variant_counts(data)
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
                "exposed_units": c.exposed,
                "bot_event_share": event_share[variant],
                "seen_in_two_variants": two[variant],
            }
        )
    return out
