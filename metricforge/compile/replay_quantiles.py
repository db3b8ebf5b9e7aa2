"""The A/A replay's result query for a quantile metric: each bucket's values near the
pooled quantile.

A quantile metric's test (``stats.quantiles``) needs, per variant, order statistics of
the event-level values and, per unit, S (its values at or below the variant's quantile)
and M (all its values). In a replay every variant's quantile and outer band lie close to
the pooled quantile, so the query keeps exactly the values inside a wide window about it:
the pooled outer band at ``window_z`` (delta method, clustered by unit; see
``window_z``). One result query ``qreplay_<metric>`` of two kinds of rows:

base rows (v NULL)  per bucket: ``units`` (units with values), ``m``/``m2`` (Σ M, Σ M²)
                    and, with L a unit's values below the window, ``l``/``l2``/``lm``
                    (Σ L, Σ L², Σ L·M)
cell rows           per bucket and distinct value v inside the window: ``c`` (values equal
                    to v) and the steps v adds, summed over the bucket's units, to S² and
                    S·M (a unit with c values equal to v and S_before values below v:
                    S² grows by c·(2·S_before + c), S·M by c·M)

A variant's ΣS, ΣS², ΣS·M at any window value are then running sums over the window:
exact whole numbers (``stats.replay_quantiles``).
"""

from __future__ import annotations

import math

import sqlglot.expressions as exp

from metricforge.compile.checks import bucket_of_unit
from metricforge.compile.extras import quantile_query, value_rows
from metricforge.compile.sqlparts import DOUBLE, UNIT_TABLE, col, lit, with_ctes
from metricforge.errors import CompileError
from metricforge.spec.model import MetricDef, Plan
from metricforge.stats.quantiles import two_sided_z

# Standard errors of slack beyond a variant's own band: a replayed variant's quantile lies
# within a few of its standard errors of the pooled one.
SLACK = 8.0


def window_z(plan: Plan) -> float:
    """The pooled band's z: (z + SLACK) standard errors of the smallest variant, whose
    standard error is the pooled one over √share."""
    shares = [s for _, s in plan.spec.variants]
    smallest = min(shares) / sum(shares)
    return (two_sided_z(plan.spec.alpha) + SLACK) / math.sqrt(smallest)


def quantile_replay_name(metric: MetricDef) -> str:
    return f"qreplay_{metric.name}"


def _double(e: exp.Expr) -> exp.Expr:
    return exp.cast(e, DOUBLE)


def _sum(e: exp.Expr) -> exp.Expr:
    return exp.Sum(this=_double(e))


def _count_if(condition: exp.Expr) -> exp.Expr:
    return exp.Count(this=exp.Case().when(condition, lit(1)))


def quantile_replay(plan: Plan, metric: MetricDef, period: str) -> exp.Select:
    """The query ``qreplay_<metric>`` over ``unit_rows`` for ``period`` ("" the
    experiment, "pre" the pre-period, whose values must be listed: ``Plan.pre_values``)."""
    if not plan.lists_values(period):
        raise CompileError(
            f"metric '{metric.name}': the plan does not list its values for period"
            f" '{period}' (make the plan with checks.aa.replay_plan)"
        )
    source = exp.select(
        exp.alias_(exp.Literal.string("pooled"), "variant"),
        col("unit"),
        col("is_bot"),
        col("contaminated"),
        exp.alias_(bucket_of_unit(), "bucket"),
        exp.alias_(col(f"v{period}_{metric.name}"), f"v_{metric.name}"),
    ).from_(UNIT_TABLE)
    band = quantile_query(metric, "qr_source", plan.spec.alpha, ordered=False, z=window_z(plan))
    window = exp.select(
        exp.alias_(col("value_low"), "lo"), exp.alias_(col("value_high"), "hi")
    ).from_(exp.alias_(exp.Subquery(this=band), "b", table=True))
    values = value_rows(metric, "qr_source", col("bucket"), col("unit"))
    v, lo, hi = col("v", "x"), col("lo", "w"), col("hi", "w")
    per_unit = (
        exp.select(
            col("bucket", "x"),
            col("unit", "x"),
            exp.alias_(_double(exp.Count(this=exp.Star())), "m"),
            exp.alias_(_double(_count_if(v.copy() < lo.copy())), "l"),
        )
        .from_(exp.alias_(exp.to_table("qr_values"), "x", table=True))
        .join(exp.alias_(exp.to_table("qr_window"), "w", table=True), join_type="cross")
        .group_by(col("bucket", "x"), col("unit", "x"))
    )
    inside = exp.and_(v.copy() >= lo.copy(), v.copy() <= hi.copy())
    counts = (
        exp.select(
            col("unit", "x"),
            v.copy(),
            exp.alias_(_double(exp.Count(this=exp.Star())), "c"),
        )
        .from_(exp.alias_(exp.to_table("qr_values"), "x", table=True))
        .join(exp.alias_(exp.to_table("qr_window"), "w", table=True), join_type="cross")
        .where(inside)
        .group_by(col("unit", "x"), v.copy())
    )
    running = exp.Window(
        this=exp.Sum(this=col("c", "k")),
        partition_by=[col("unit", "k")],
        order=exp.Order(expressions=[exp.Ordered(this=col("v", "k"))]),
    )
    c = col("c", "k")
    before = exp.paren(
        exp.Sub(this=exp.Add(this=col("l", "u"), expression=running), expression=c.copy())
    )
    steps = (
        exp.select(
            col("bucket", "u"),
            col("v", "k"),
            c.copy(),
            exp.alias_(
                exp.Mul(
                    this=c.copy(),
                    expression=exp.paren(
                        exp.Add(this=exp.Mul(this=lit(2), expression=before), expression=c.copy())
                    ),
                ),
                "s2_step",
            ),
            exp.alias_(exp.Mul(this=c.copy(), expression=col("m", "u")), "sm_step"),
        )
        .from_(exp.alias_(exp.to_table("qr_counts"), "k", table=True))
        .join(
            exp.alias_(exp.to_table("qr_units"), "u", table=True),
            on=col("unit", "k").eq(col("unit", "u")),
        )
    )
    null = exp.cast(exp.null(), DOUBLE)
    cell_stats = ("c", "s2_step", "sm_step")
    base_stats = ("units", "m", "m2", "l", "l2", "lm")
    base = (
        exp.select(
            col("bucket"),
            exp.alias_(null.copy(), "v"),
            *[exp.alias_(null.copy(), name) for name in cell_stats],
            exp.alias_(_double(exp.Count(this=exp.Star())), "units"),
            exp.alias_(_sum(col("m")), "m"),
            exp.alias_(_sum(exp.Mul(this=col("m"), expression=col("m"))), "m2"),
            exp.alias_(_sum(col("l")), "l"),
            exp.alias_(_sum(exp.Mul(this=col("l"), expression=col("l"))), "l2"),
            exp.alias_(_sum(exp.Mul(this=col("l"), expression=col("m"))), "lm"),
        )
        .from_("qr_units")
        .group_by(col("bucket"))
    )
    cells = (
        exp.select(
            col("bucket"),
            col("v"),
            *[exp.alias_(_sum(col(name)), name) for name in cell_stats],
            *[exp.alias_(null.copy(), name) for name in base_stats],
        )
        .from_("qr_steps")
        .group_by(col("bucket"), col("v"))
    )
    union = exp.union(base, cells, distinct=False)
    final = (
        exp.select(exp.Star())
        .from_(exp.alias_(exp.Subquery(this=union), "r", table=True))
        .order_by(col("bucket"), exp.Ordered(this=col("v"), nulls_first=True))
    )
    return with_ctes(
        final,
        [
            ("qr_source", source),
            ("qr_window", window),
            ("qr_values", values),
            ("qr_units", per_unit),
            ("qr_counts", counts),
            ("qr_steps", steps),
        ],
    )
