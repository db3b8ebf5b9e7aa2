"""Segment breakdowns (``[segments]``): effects per segment value, exploratory.

Rows: one per (segment column, shown segment value, treatment variant, metric), computed
by ``effect_fields``, the scorecard's own statistics (Welch, delta method, Newcombe,
relative effect), always two-sided; their p-values are adjusted with Benjamini–Hochberg
across every segment row of the run. The minimum cell size (``stats/cells.py``) decides
which values are shown, pooled into ``(other)`` or suppressed; a metric row whose metric
has fewer than ``min_units`` units with a value in either cell carries no figures.

Not broken down: quantile metrics (their statistic is not a per-unit moment). CUPED is not
applied in segment rows (they compare unadjusted values); winsorised metrics use the run's
cap. A segment value NULL (no value in the unit's window) is shown as ``(none)``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import pyarrow as pa

from metricforge.compile.segments import result_name
from metricforge.report.arrow_rows import table_from_rows
from metricforge.report.effect_fields import EFFECT_FIELDS, effect_fields
from metricforge.runner import RunData, row_moments
from metricforge.spec.model import Kind
from metricforge.stats.cells import plan_cells
from metricforge.stats.moments import Moments, merge_moments
from metricforge.stats.multiplicity import benjamini_hochberg

NONE_LABEL, OTHER_LABEL = "(none)", "(other)"
VALUE, NONE, OTHER = "value", "none", "other"  # segment_kind
STAMP_COLUMNS = ("spec_sha256", "definitions_sha256", "inputs_fingerprint", "tool_version")

SEGMENTS_SCHEMA = pa.schema(
    [
        ("experiment", pa.string()),
        ("segment_column", pa.string()),
        ("segment_value", pa.string()),
        ("segment_kind", pa.string()),
        ("metric", pa.string()),
        ("role", pa.string()),
        ("kind", pa.string()),
        ("variant", pa.string()),
        ("control", pa.string()),
        ("cell_units", pa.int64()),
        ("cell_units_control", pa.int64()),
        ("n_units", pa.int64()),
        ("n_units_control", pa.int64()),
        *[(f, pa.float64()) for f in EFFECT_FIELDS],
        ("p_value_adjusted", pa.float64()),
        ("adjustment", pa.string()),
        ("alpha", pa.float64()),
        ("method", pa.string()),
        ("hypothesis", pa.string()),
        *[(c, pa.string()) for c in STAMP_COLUMNS],
    ]
)


@dataclass(frozen=True)
class Cell:
    """One segment value: its analysed units and every metric's moments, per variant."""

    units: dict[str, int]
    moments: dict[str, dict[str, Moments]]  # metric -> variant -> moments


@dataclass(frozen=True)
class Breakdown:
    rows: list[dict[str, Any]]
    section: dict[str, Any]

    def table(self) -> pa.Table:
        return table_from_rows(self.rows, SEGMENTS_SCHEMA)


def broken_down(data: RunData) -> list[str]:
    """The reported metrics that segment rows cover (quantile metrics are not)."""
    return [n for n, _ in data.plan.reported if data.plan.metric(n).kind is not Kind.QUANTILE]


def read_cells(data: RunData, column: str) -> dict[str | None, Cell]:
    """The segment values of one column (None: no value) as cells, in the query's order."""
    metrics = broken_down(data)
    cells: dict[str | None, Cell] = {}
    for row in data.tables[result_name(column)].to_pylist():
        value, variant = row["segment"], str(row["variant"])
        cell = cells.setdefault(value, Cell({}, {m: {} for m in metrics}))
        cell.units[variant] = int(row["n_units"])
        for m in metrics:
            cell.moments[m][variant] = row_moments(data.plan.metric(m), row)
    return cells


def _pooled(cells: list[Cell], metrics: list[str], variants: tuple[str, ...]) -> Cell:
    units = {v: sum(c.units.get(v, 0) for c in cells) for v in variants}
    moments = {
        m: {
            v: merge_moments([c.moments[m][v] for c in cells if v in c.moments[m]])
            for v in variants
        }
        for m in metrics
    }
    return Cell(units, moments)


def build_segments(data: RunData, stamp: dict[str, Any]) -> Breakdown | None:
    """The segment rows and the ``segments`` section; None without ``[segments]``."""
    spec = data.plan.spec
    if spec.segments is None:
        return None
    min_units, variants = spec.segments.min_units, spec.variant_names
    metrics = broken_down(data)
    rows: list[dict[str, Any]] = []
    columns: list[dict[str, Any]] = []
    withheld = 0
    for column in spec.segments.by:
        cells = read_cells(data, column)
        plan = plan_cells({k: c.units for k, c in cells.items()}, variants, min_units)
        shown: list[tuple[str, str, Cell]] = [
            (NONE_LABEL if k is None else k, NONE if k is None else VALUE, cells[k])
            for k in plan.shown
        ]
        if plan.other_shown:
            pooled = _pooled([cells[k] for k in plan.pooled], metrics, variants)
            shown.append((OTHER_LABEL, OTHER, pooled))
        columns.append(
            {
                "column": column,
                "values_shown": sum(1 for _, kind, _ in shown if kind != OTHER),
                "values_pooled": len(plan.pooled),
                "other": "shown" if plan.other_shown else "suppressed" if plan.pooled else "none",
            }
        )
        for label, kind, cell in shown:
            for metric in metrics:
                for variant in variants[1:]:
                    row = _row(data, stamp, column, label, kind, cell, metric, variant)
                    withheld += row["method"].startswith("withheld")
                    rows.append(row)
    family = len([r for r in rows if math.isfinite(r["p_value"])])
    what = f"bh (exploratory): {family} segment tests"
    for row, p in zip(rows, benjamini_hochberg([r["p_value"] for r in rows]), strict=True):
        row["p_value_adjusted"] = float(p)
        row["adjustment"] = what if math.isfinite(p) else None
    return Breakdown(rows, _section(data, columns, withheld, rows, what))


def _row(
    data: RunData,
    stamp: dict[str, Any],
    column: str,
    label: str,
    kind: str,
    cell: Cell,
    metric: str,
    variant: str,
) -> dict[str, Any]:
    spec = data.plan.spec
    control, min_units = spec.control, spec.segments.min_units if spec.segments else 1
    definition = data.plan.metric(metric)
    moments = cell.moments[metric]
    n_t, n_c = moments[variant].n, moments[control].n
    row: dict[str, Any] = {
        "experiment": spec.name,
        "segment_column": column,
        "segment_value": label,
        "segment_kind": kind,
        "metric": metric,
        "role": dict(data.plan.reported)[metric].value,
        "kind": definition.kind.value,
        "variant": variant,
        "control": control,
        "cell_units": cell.units[variant],
        "cell_units_control": cell.units[control],
        "n_units": n_t,
        "n_units_control": n_c,
        "p_value_adjusted": math.nan,
        "adjustment": None,
        "alpha": spec.alpha,
        "hypothesis": "two-sided",
        **{c: stamp[c] for c in STAMP_COLUMNS},
    }
    if min(n_t, n_c) < min_units:  # a metric measured on fewer units than a cell may show
        row.update(n_units=None, n_units_control=None, **{f: math.nan for f in EFFECT_FIELDS})
        row["method"] = "withheld: fewer than min_units units with a value"
        return row
    fields, method = effect_fields(moments, variant, control, alpha=spec.alpha)
    row.update(fields, method=method)
    return row


def _clean(row: dict[str, Any]) -> dict[str, Any]:
    return {k: None if isinstance(v, float) and not math.isfinite(v) else v for k, v in row.items()}


def _section(
    data: RunData,
    columns: list[dict[str, Any]],
    withheld: int,
    rows: list[dict[str, Any]],
    adjustment: str,
) -> dict[str, Any]:
    spec = data.plan.spec
    assert spec.segments is not None
    quantiles = [n for n, _ in data.plan.reported if n not in broken_down(data)]
    cuped = sorted(data.extras.cuped)
    return {
        "exploratory": True,
        "by": list(spec.segments.by),
        "min_units": spec.segments.min_units,
        "unit_value": "the column's value on the unit's earliest event in its analysis window"
        " that has one (ties: the smallest value); none: (none)",
        "hypothesis": "two-sided",
        "adjustment": adjustment,
        "columns": columns,
        "not_broken_down": [
            {"metric": m, "reason": "quantile metric: not a per-unit statistic"} for m in quantiles
        ],
        "not_cuped_adjusted": cuped,
        "withheld_metric_rows": withheld,
        "file": "segments.parquet",
        "rows": [
            {
                k: (None if isinstance(v, float) and not math.isfinite(v) else v)
                for k, v in r.items()
            }
            for r in rows
        ],
    }
