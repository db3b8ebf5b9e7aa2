"""Data quality counted in the one scan: unit_rows columns and the `data_quality` result.

A value expression (sum and mean metrics) is used only when it converts to the exact
DECIMAL(28, 10) (``exact``): a finite number of magnitude below 1e18 (the
engines' TRY_CAST gives NULL for NaN, ±infinity and anything larger, and DuckDB's also for
the one double just below 1e18). Other values are left out as if missing; an exact sum
of used values cannot overflow (DECIMAL(38, 10)). One conversion both tests and converts
each value, which costs a scan less than a separate magnitude test. The scan counts, per
unit, in the experiment window:

  dq_duplicate_exposures     exposure rows that repeat another row of the unit exactly
                             (same variant and time) inside the experiment's dates
  dq_ignored_<metric>        matching events whose value was NaN, infinite or too large
  dq_negative_<metric>       matching events whose (used) value was below zero

The result query ``data_quality`` sums them per variant, with the units that have no
event in their window. Nothing here reads the events a second time.
"""

from __future__ import annotations

import sqlglot.expressions as exp

from metricforge.compile.sqlparts import case
from metricforge.spec.model import Kind, MetricDef, Plan

DUPLICATE_EXPOSURES = "dq_duplicate_exposures"
UNITS_WITHOUT_EVENTS = "units_without_events"


def ignored_column(metric: str) -> str:
    return f"dq_ignored_{metric}"


def negative_column(metric: str) -> str:
    return f"dq_negative_{metric}"


def has_value(metric: MetricDef) -> bool:
    return metric.kind in (Kind.SUM, Kind.MEAN)


EXACT = exp.DataType.build("DECIMAL(28, 10)")  # 18 integer digits: magnitude below 1e18


def exact(value: exp.Expr) -> exp.Expr:
    """``value`` as an exact decimal; NULL when it is NULL, NaN, ±infinite or too large.

    TRY_CAST, not CAST: an engine may hoist a cast out of the CASE around it and apply it
    to every row, and a failed cast must not stop the run.
    """
    return exp.TryCast(this=value.copy(), to=EXACT.copy())


def value_checks(
    cond: exp.Expr, value: exp.Expr, used: exp.Expr, metric: MetricDef
) -> list[tuple[str, exp.Expr]]:
    """Session-level counts of ignored and negative values: (column, aggregate).

    ``used`` is the metric's own ``CASE WHEN cond THEN exact(value) END``, the expression
    its sum aggregates; both counts are written around it, so the engine converts each
    value once (DuckDB shares identical expressions): ignored = matching non-NULL values
    minus the used ones; negative = used values below zero, the cheap comparison first.
    """
    ignored = exp.Sub(
        this=exp.Count(this=case(cond, value)), expression=exp.Count(this=used.copy())
    )
    negative = case(
        exp.and_(
            cond.copy(),
            exp.paren(value.copy()) < exp.Literal.number(0),
            used.copy().is_(exp.null()).not_(),
        ),
        exp.Literal.number(1),
    )
    return [
        (ignored_column(metric.name), ignored),
        (negative_column(metric.name), exp.Count(this=negative)),
    ]


def unit_columns(plan: Plan) -> list[str]:
    """The data-quality columns of ``unit_rows`` (besides the duplicate exposures)."""
    out: list[str] = []
    for metric in plan.metrics:
        if has_value(metric):
            out += [ignored_column(metric.name), negative_column(metric.name)]
    return out


def data_quality_query(plan: Plan, table: str) -> exp.Select:
    """Per variant: exposed units, units without events and the summed counts."""

    def total(column: str) -> exp.Expr:
        return exp.alias_(exp.cast(exp.Sum(this=exp.column(column)), "BIGINT"), column)

    no_events = exp.Case().when(
        exp.column("n_events").eq(exp.Literal.number(0)), exp.Literal.number(1)
    )
    select = exp.select(
        exp.column("variant"),
        exp.alias_(exp.Count(this=exp.Star()), "units"),
        exp.alias_(
            exp.cast(exp.Sum(this=no_events.else_(exp.Literal.number(0))), "BIGINT"),
            UNITS_WITHOUT_EVENTS,
        ),
        total(DUPLICATE_EXPOSURES),
    )
    for column in unit_columns(plan):
        select = select.select(total(column))
    return select.from_(table).group_by(exp.column("variant")).order_by(exp.column("variant"))
