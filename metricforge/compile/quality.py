"""Data quality counted in the one scan: unit_rows columns and the `data_quality` result.

A value expression (sum and mean metrics) is used only when its result is a finite number
of magnitude below ``VALUE_LIMIT``; NaN, infinite and larger values are left out as if
missing (an exact DECIMAL(38, 10) sum of values below 1e18 cannot overflow). The scan
counts, per unit, in the experiment window:

  dq_duplicate_exposures     exposure rows that repeat another row of the unit exactly
                             (same variant and time) inside the experiment's dates
  dq_ignored_<metric>        matching events whose value was NaN, infinite or too large
  dq_negative_<metric>       matching events whose (used) value was below zero

The result query ``data_quality`` sums them per variant, with the units that have no
event in their window. Nothing here reads the events a second time.
"""

from __future__ import annotations

import sqlglot.expressions as exp

from metricforge.spec.model import Kind, MetricDef, Plan

VALUE_LIMIT = 1e18
DUPLICATE_EXPOSURES = "dq_duplicate_exposures"
UNITS_WITHOUT_EVENTS = "units_without_events"


def ignored_column(metric: str) -> str:
    return f"dq_ignored_{metric}"


def negative_column(metric: str) -> str:
    return f"dq_negative_{metric}"


def has_value(metric: MetricDef) -> bool:
    return metric.kind in (Kind.SUM, Kind.MEAN)


def usable(value: exp.Expr) -> exp.Expr:
    """True when ``value`` is finite and below the limit; false for NULL, NaN and ±inf.

    NaN compares greater than every number in DuckDB and Spark, and false under IEEE
    rules, so one comparison of the magnitude covers NaN, both infinities and the limit.
    """
    magnitude = exp.Abs(this=exp.cast(value.copy(), "DOUBLE"))
    return exp.paren(magnitude < exp.Literal.number(repr(VALUE_LIMIT)))


def value_checks(cond: exp.Expr, value: exp.Expr, metric: MetricDef) -> list[tuple[str, exp.Expr]]:
    """Session-level counts of ignored and negative values: (column, condition)."""
    wrapped = exp.paren(value.copy())
    ignored = exp.and_(cond.copy(), wrapped.is_(exp.null()).not_(), usable(value).not_())
    negative = exp.and_(cond.copy(), usable(value), wrapped.copy() < exp.Literal.number(0))
    return [
        (ignored_column(metric.name), ignored),
        (negative_column(metric.name), negative),
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
