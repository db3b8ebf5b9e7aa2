"""Exact sample quantiles as window-function trees that mean the same in every dialect.

No quantile aggregate is used: sqlglot renders ``exp.Quantile`` as DuckDB's QUANTILE (a
discrete quantile) but Spark's PERCENTILE (interpolated), ``exp.PercentileCont`` as a
PERCENTILE_CONT(x, q) call that Spark's grammar lacks, and WITHIN GROUP as Spark's
approximate PERCENTILE_APPROX. Instead the values of each group are numbered with
ROW_NUMBER, and the quantile at level L is interpolated between the order statistics at
the 0-based positions floor(h) and ceil(h) with h = (n − 1)·L: the "linear" rule that is
numpy's and polars' default. Order statistics are exact, so the result does not depend on
how the engine splits the work.
"""

from __future__ import annotations

import sqlglot.expressions as exp

from metricforge.compile.sqlparts import DOUBLE


def ranked(source: str, key: str, value: str, *carried: str) -> exp.Select:
    """Rows of ``source`` with ``r`` (0-based position of ``value`` in its ``key`` group,
    ascending) and ``n`` (rows in the group); ``carried`` columns are kept."""
    order = exp.Order(expressions=[exp.Ordered(this=exp.column(value))])
    position = exp.Window(this=exp.RowNumber(), partition_by=[exp.column(key)], order=order)
    size = exp.Window(this=exp.Count(this=exp.Star()), partition_by=[exp.column(key)])
    return exp.select(
        exp.column(key),
        *[exp.column(c) for c in carried],
        exp.column(value),
        exp.alias_(exp.Sub(this=position, expression=exp.Literal.number(1)), "r"),
        exp.alias_(size, "n"),
    ).from_(source)


def value_at(level: exp.Expr, *, value: str = "v", table: str | None = None) -> exp.Expr:
    """An aggregate over one group of ``ranked`` rows: the group's quantile at ``level``.

    ``level`` is an expression that is constant within the group (a literal, or a column
    joined to every row of the group).
    """
    r, n, v = (exp.column(c, table=table) for c in ("r", "n", value))
    h = exp.Mul(
        this=exp.cast(exp.Sub(this=n, expression=exp.Literal.number(1)), DOUBLE),
        expression=level,
    )

    def at(position: exp.Expr) -> exp.Expr:
        return exp.Max(this=exp.Case().when(r.copy().eq(position), v.copy()))

    low, high = at(exp.Floor(this=h.copy())), at(exp.Ceil(this=h.copy()))
    fraction = exp.Max(this=exp.Sub(this=h.copy(), expression=exp.Floor(this=h.copy())))
    return exp.Add(
        this=low,
        expression=exp.Mul(
            this=fraction, expression=exp.paren(exp.Sub(this=high, expression=low.copy()))
        ),
    )
