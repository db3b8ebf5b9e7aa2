"""Small SQL building blocks shared by the compiler's modules, as sqlglot trees.

One implementation of each: the aggregate ordered by unit (bit-stable float sums in
DuckDB), the filter of analysed units, the flattened sorted list of a quantile metric's
values, and the short constructors the query builders use everywhere.
"""

from __future__ import annotations

import datetime as dt

import sqlglot.expressions as exp

UNIT_TABLE = "unit_rows"
DOUBLE = exp.DataType.build("DOUBLE")
BIGINT = exp.DataType.build("BIGINT")


def col(name: str, table: str | None = None) -> exp.Column:
    return exp.column(name, table=table)


def lit(value: str | int | float) -> exp.Expr:
    if isinstance(value, str):
        return exp.Literal.string(value)
    return exp.Literal.number(value)


def timestamp(value: dt.datetime) -> exp.Expr:
    """A TIMESTAMP literal (the spec's times are UTC)."""
    return exp.cast(exp.Literal.string(value.isoformat(sep=" ")), "TIMESTAMP")


def one_of(column: exp.Expr, values: list[str]) -> exp.Expr:
    """``column = v`` for one value, ``column IN (...)`` for several: DuckDB evaluates a
    one-element IN list more slowly than the equality (bench/RESULTS.md)."""
    if len(values) == 1:
        return exp.EQ(this=column, expression=lit(values[0]))
    return column.isin(*[lit(v) for v in values])


def case(cond: exp.Expr, then: exp.Expr, default: exp.Expr | None = None) -> exp.Case:
    """CASE WHEN cond THEN then [ELSE default] END."""
    out = exp.Case().when(cond, then)
    return out.else_(default) if default is not None else out


def all_of(*parts: exp.Expr | None) -> exp.Expr:
    """The conjunction of the given conditions (None ones left out; none at all: TRUE)."""
    kept = [p for p in parts if p is not None]
    return exp.and_(*kept) if kept else exp.true()


def one_if(cond: exp.Expr) -> exp.Expr:
    """1 where ``cond`` holds, else 0."""
    return case(cond, lit(1), lit(0))


def analysed() -> exp.Expr:
    """The units a scorecard analyses: neither bots nor excluded for two variants."""
    return exp.and_(col("is_bot").not_(), col("contaminated").not_())


def aggregate(
    cls: type[exp.Func],
    this: exp.Expr,
    other: exp.Expr | None = None,
    *,
    ordered: bool,
    unit: exp.Expr | None = None,
) -> exp.Expr:
    """An aggregate of one or two per-unit values; with ``ordered`` its input ordered by
    ``unit`` (default: the column ``unit``).

    DuckDB's float aggregates depend on the order rows arrive in; ordering them by unit
    makes parallel runs bit-identical. DuckDB takes the ORDER BY after the last argument.
    """
    if ordered:
        by = [exp.Ordered(this=unit.copy() if unit is not None else col("unit"))]
        if other is None:
            this = exp.Order(this=this, expressions=by)
        else:
            other = exp.Order(this=other, expressions=by)
    return cls(this=this) if other is None else cls(this=this, expression=other)


def moment_aggregates(
    variables: list[tuple[str, exp.Expr]], *, ordered: bool, population: bool = False
) -> list[tuple[str, str, str, exp.Expr]]:
    """(stat, a, b, aggregate) of named per-unit variables: ("n", "", "", count of the
    first), ("mean", a, "", mean of a) per variable, ("cov", a, b, (co)variance) per pair
    a ≤ b in order; divisor n − 1, or n with ``population``."""
    out: list[tuple[str, str, str, exp.Expr]] = [
        ("n", "", "", exp.Count(this=variables[0][1].copy()))
    ]
    for a, va in variables:
        out.append(("mean", a, "", aggregate(exp.Avg, va.copy(), ordered=ordered)))
    var, cov = (exp.VariancePop, exp.CovarPop) if population else (exp.Variance, exp.CovarSamp)
    for i, (a, va) in enumerate(variables):
        for b, vb in variables[i:]:
            agg = (
                aggregate(var, va.copy(), ordered=ordered)
                if a == b
                else aggregate(cov, va.copy(), vb.copy(), ordered=ordered)
            )
            out.append(("cov", a, b, agg))
    return out


def sorted_concat(lists: exp.Expr) -> exp.Expr:
    """An aggregate: the non-NULL lists of the group concatenated and sorted ascending."""
    kept = exp.Where(this=lists.is_(exp.null()).not_())
    flat = exp.Flatten(this=exp.Filter(this=exp.ArrayAgg(this=lists.copy()), expression=kept))
    return exp.ArraySort(this=flat)


def with_ctes(query: exp.Select, ctes: list[tuple[str, exp.Select]]) -> exp.Select:
    """``query`` with the named CTEs, in order."""
    for name, cte in ctes:
        query = query.with_(name, as_=cte)
    return query
