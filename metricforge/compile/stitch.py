"""Identity stitching: cookies whose events carry exactly one account are merged into it.

Two stages follow ``units`` (one row per exposed cookie) when the spec sets ``stitch_to``:
  identified  each cookie with its identity: ``stitched`` (exactly one stitch id seen in
              its experiment window; its key is that id), ``no_id`` (none) or
              ``several_ids`` (more than one; kept as its own unit); per-cookie bot flags
              of the unit deny list
  stitched    one row per key: per-unit columns re-aggregated over the key's cookies
              (counts and sums add, a mean is its summed values over its summed count, a
              quantile metric's sorted value lists are concatenated and sorted again, a
              proportion and every bot flag take the maximum, the first exposure the
              minimum); the variant is the one the key saw first, and a key whose cookies
              saw different variants counts as seen in two variants
``stitched`` has the columns of ``units`` (with ``unit`` now the key), plus ``identity``
and ``n_cookies``, so the unit select reads it in place of ``units``.
"""

from __future__ import annotations

import sqlglot.expressions as exp

from metricforge.compile.quality import DUPLICATE_EXPOSURES, unit_columns
from metricforge.compile.segments import merged_keys
from metricforge.compile.sqlparts import BIGINT, DOUBLE, aggregate, case, col, sorted_concat
from metricforge.spec.model import Kind, Plan, RuleKind

STITCHED, NO_ID, SEVERAL_IDS = "stitched", "no_id", "several_ids"


def _identified(plan: Plan) -> exp.Select:
    u, f = "u", "f"
    lo, hi = col("id_min", u), col("id_max", u)
    one = lo.eq(hi)
    identity = (
        exp.Case()
        .when(one.copy(), exp.Literal.string(STITCHED))
        .when(lo.copy().is_(exp.null()), exp.Literal.string(NO_ID))
        .else_(exp.Literal.string(SEVERAL_IDS))
    )
    select = exp.select(
        exp.Column(this=exp.Star(), table=exp.to_identifier(u)),
        exp.alias_(identity, "identity"),
        exp.alias_(case(one.copy(), lo.copy(), col("unit", u)), "stitch_key"),
    )
    select = select.select(
        *[
            exp.alias_(col(f"first_ts_{i}", f), f"first_ts_{i}")
            for i in range(len(plan.spec.variants))
        ]
    )
    for i, rule in enumerate(plan.bot_filter.rules):
        if rule.kind is RuleKind.DENY_UNIT:
            listed = col("unit", u).isin(*[exp.Literal.string(t) for t in rule.tokens])
            flag = case(listed, exp.Literal.number(1), exp.Literal.number(0))
            select = select.select(exp.alias_(flag, f"bot_rule_{i}"))
    return select.from_(exp.alias_(exp.to_table("units"), u, table=True)).join(
        exp.alias_(exp.to_table("first_exposure"), f, table=True),
        on=col("unit", u).eq(col("unit", f)),
    )


def _merged_metric(plan: Plan, name: str, period: str, ordered: bool) -> list[exp.Expr]:
    """A metric's per-unit columns of one period, re-aggregated over a key's cookies."""
    metric = plan.metric(name)
    i = "i"
    u = f"u{period}_{name}"
    cookie = col("unit", i)  # a stable order of the cookies inside each key

    def count(column: str) -> exp.Expr:  # whole numbers: exact in any order
        return exp.cast(exp.Sum(this=col(column, i)), BIGINT)

    def total(column: str) -> exp.Expr:  # floats: in a stable order
        return aggregate(exp.Sum, col(column, i), ordered=ordered, unit=cookie)

    if metric.kind is Kind.COUNT:
        return [exp.alias_(count(u), u)]
    if metric.kind is Kind.SUM:
        return [exp.alias_(total(u), u)]
    if metric.kind is Kind.PROPORTION:
        return [exp.alias_(exp.Max(this=col(u, i)), u)]
    if metric.kind is Kind.MEAN:
        n = count(f"c{period}_{name}")
        mean = exp.Div(this=total(f"sv{period}_{name}"), expression=exp.cast(n.copy(), DOUBLE))
        return [exp.alias_(case(n > exp.Literal.number(0), mean), u)]
    if metric.kind is Kind.QUANTILE:  # the counts add; the sorted value lists merge
        parts = [exp.alias_(count(u), u)]
        if plan.lists_values(period):
            values = f"l{period}_{name}"
            parts.append(exp.alias_(sorted_concat(col(values, i)), values))
        return parts
    if metric.kind is Kind.DWELL_SUCCESS:
        d = f"d{period}_{name}"
        return [exp.alias_(count(u), u), exp.alias_(count(d), d)]
    return []  # ratio and composite are built from other metrics' per-unit columns


def _stitched(plan: Plan, ordered: bool, periods: list[str]) -> exp.Select:
    i = "i"
    names = plan.spec.variant_names
    first = exp.Min(this=col("first_ts", i))
    chosen = exp.Case()
    for k, name in enumerate(names):
        chosen = chosen.when(
            exp.Min(this=col(f"first_ts_{k}", i)).eq(first.copy()), exp.Literal.string(name)
        )
    variants = exp.or_(  # a cookie seen in two variants, or cookies in different ones
        exp.LogicalOr(this=col("two_variants", i)),
        exp.Min(this=col("variant", i)) < exp.Max(this=col("variant", i)),
    )
    select = exp.select(
        exp.alias_(col("stitch_key", i), "unit"),
        col("identity", i),
        exp.alias_(chosen.else_(exp.Min(this=col("variant", i))), "variant"),
        exp.alias_(variants, "two_variants"),
        exp.alias_(first, "first_ts"),
        exp.alias_(exp.cast(exp.Sum(this=col("n_events", i)), BIGINT), "n_events"),
        exp.alias_(exp.Max(this=col("max_session_events", i)), "max_session_events"),
        exp.alias_(exp.cast(exp.Sum(this=col("n_sessions", i)), BIGINT), "n_sessions"),
        exp.alias_(exp.Count(this=exp.Star()), "n_cookies"),
    )
    for period in periods:
        events = f"n_{period}_events"
        select = select.select(exp.alias_(exp.cast(exp.Sum(this=col(events, i)), BIGINT), events))
    for column in (DUPLICATE_EXPOSURES, *unit_columns(plan)):  # data-quality counts add
        select = select.select(exp.alias_(exp.cast(exp.Sum(this=col(column, i)), BIGINT), column))
    for k, rule in enumerate(plan.bot_filter.rules):
        if rule.kind is not RuleKind.SESSION_EVENTS:
            select = select.select(
                exp.alias_(exp.Max(this=col(f"bot_rule_{k}", i)), f"bot_rule_{k}")
            )
    select = select.select(*merged_keys(plan, i))
    for metric in plan.metrics:
        for period in ("", *periods):
            select = select.select(*_merged_metric(plan, metric.name, period, ordered))
    return select.from_(exp.alias_(exp.to_table("identified"), i, table=True)).group_by(
        col("identity", i), col("stitch_key", i)
    )


def stitch_stages(plan: Plan, ordered: bool, periods: list[str]) -> list[tuple[str, exp.Select]]:
    """The CTEs that merge cookies into stitched units, in order, after ``units``;
    ``periods`` are the suffixes of the periods before the first exposure (e.g. ``pre``)."""
    return [("identified", _identified(plan)), ("stitched", _stitched(plan, ordered, periods))]
