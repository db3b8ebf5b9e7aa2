"""Result queries for the trust checks and the A/A replay; each reads only ``unit_rows``.

exposure_days   exposed units per (variant, day of first exposure), and how many of them
                were seen in two variants: the sample-ratio checks, overall and per day
bot_events      per variant, over every exposed unit: moments of the events the bot
                filter removed and of all events (the removed-event share, delta method)
identities      with identity stitching: units and cookies per identity kind
buckets         (A/A replay only, see ``bucket_moments``) per hash bucket of the unit id,
                each reported metric's (n, mean, M2) of the analysed units
"""

from __future__ import annotations

import sqlglot.expressions as exp

from metricforge.compile.sqlparts import (
    BIGINT,
    DOUBLE,
    UNIT_TABLE,
    aggregate,
    analysed,
    col,
    lit,
    one_if,
)
from metricforge.spec.model import Plan

BUCKET_DIGITS = 3  # hex digits of MD5(unit): 16**3 = 4096 buckets
HEX = "0123456789abcdef"


def exposure_days() -> exp.Select:
    day = exp.cast(col("first_ts"), exp.DataType.build("DATE"))
    return (
        exp.select(
            col("variant"),
            exp.alias_(day, "first_day"),
            exp.alias_(exp.Count(this=exp.Star()), "n_units"),
            exp.alias_(exp.cast(exp.Sum(this=one_if(col("two_variants"))), BIGINT), "n_two"),
        )
        .from_(UNIT_TABLE)
        .group_by(col("variant"), day.copy())
        .order_by(col("variant"), day.copy())
    )


def bot_events(ordered: bool) -> exp.Select:
    removed = exp.cast(exp.Case().when(col("is_bot"), col("n_events")).else_(lit(0)), DOUBLE)
    events = exp.cast(col("n_events"), DOUBLE)

    def agg(cls: type[exp.Func], x: exp.Expr, y: exp.Expr | None = None) -> exp.Expr:
        return aggregate(cls, x.copy(), y.copy() if y is not None else None, ordered=ordered)

    return (
        exp.select(
            col("variant"),
            exp.alias_(exp.Count(this=exp.Star()), "n_units"),
            exp.alias_(agg(exp.Avg, removed), "mean_removed"),
            exp.alias_(agg(exp.Avg, events), "mean_events"),
            exp.alias_(agg(exp.Variance, removed), "var_removed"),
            exp.alias_(agg(exp.Variance, events), "var_events"),
            exp.alias_(agg(exp.CovarSamp, removed, events), "cov_removed_events"),
        )
        .from_(UNIT_TABLE)
        .group_by(col("variant"))
        .order_by(col("variant"))
    )


def identities() -> exp.Select:
    several = col("n_cookies") > lit(1)
    return (
        exp.select(
            col("identity"),
            exp.alias_(exp.Count(this=exp.Star()), "n_units"),
            exp.alias_(exp.cast(exp.Sum(this=col("n_cookies")), BIGINT), "n_cookies"),
            exp.alias_(exp.cast(exp.Sum(this=one_if(several)), BIGINT), "n_merged_units"),
            exp.alias_(
                exp.cast(
                    exp.Sum(this=exp.Case().when(several.copy(), col("n_cookies")).else_(lit(0))),
                    BIGINT,
                ),
                "n_merged_cookies",
            ),
        )
        .from_(UNIT_TABLE)
        .group_by(col("identity"))
        .order_by(col("identity"))
    )


def check_results(plan: Plan, ordered: bool) -> tuple[tuple[str, exp.Select], ...]:
    """The trust checks' result queries of a run."""
    out = [("exposure_days", exposure_days()), ("bot_events", bot_events(ordered))]
    if plan.spec.stitch_to:
        out.append(("identities", identities()))
    return tuple(out)


def bucket_of_unit() -> exp.Expr:
    """The unit's hash bucket: the first hex digits of MD5(unit) read as an integer.

    Built from MD5, SUBSTRING and STRPOS only, which render to the same values in DuckDB
    and Spark (no base-conversion function is common to both).
    """
    digest = exp.MD5(this=col("unit"))
    total: exp.Expr | None = None
    for k in range(BUCKET_DIGITS):
        char = exp.Substring(this=digest.copy(), start=lit(k + 1), length=lit(1))
        digit = exp.Sub(
            this=exp.StrPosition(this=exp.Literal.string(HEX), substr=char), expression=lit(1)
        )
        term = exp.Mul(this=exp.paren(digit), expression=lit(16 ** (BUCKET_DIGITS - 1 - k)))
        total = term if total is None else exp.Add(this=total, expression=term)
    assert total is not None
    return total


def bucket_moments(plan: Plan, period: str, ordered: bool) -> exp.Select:
    """Per hash bucket, over the analysed units: each reported metric's unit count, means
    and sums of squared (cross) deviations from the bucket mean (M2 = n · population var).

    ``period`` is "" (experiment) or "pre" (the pre-period columns ``xpre_``/``ypre_``).
    """
    bucket = bucket_of_unit()
    select = exp.select(
        exp.alias_(bucket, "bucket"), exp.alias_(exp.Count(this=exp.Star()), "n_units")
    )
    for name, _role in plan.reported:
        metric = plan.metric(name)
        x = col(f"x{period}_{name}")
        n = exp.Count(this=x.copy())
        select = select.select(
            exp.alias_(n, f"{name}__n"),
            exp.alias_(aggregate(exp.Avg, x.copy(), ordered=ordered), f"{name}__mean_x"),
            exp.alias_(
                exp.Mul(
                    this=aggregate(exp.VariancePop, x.copy(), ordered=ordered), expression=n.copy()
                ),
                f"{name}__m2_x",
            ),
        )
        if metric.is_ratio:
            y = col(f"y{period}_{name}")
            select = select.select(
                exp.alias_(aggregate(exp.Avg, y.copy(), ordered=ordered), f"{name}__mean_y"),
                exp.alias_(
                    exp.Mul(
                        this=aggregate(exp.VariancePop, y.copy(), ordered=ordered),
                        expression=n.copy(),
                    ),
                    f"{name}__m2_y",
                ),
                exp.alias_(
                    exp.Mul(
                        this=aggregate(exp.CovarPop, x.copy(), y.copy(), ordered=ordered),
                        expression=n.copy(),
                    ),
                    f"{name}__c_xy",
                ),
            )
    return (
        select.from_(UNIT_TABLE).where(analysed()).group_by(bucket.copy()).order_by(bucket.copy())
    )
