"""Result queries for the trust checks and the A/A replay; each reads only ``unit_rows``.

exposure_days   exposed units per (variant, day of first exposure), and how many of them
                were seen in two variants: the sample-ratio checks, overall and per day
bot_events      per variant, over every exposed unit: moments of the events the bot
                filter removed and of all events (the removed-event share, delta method)
identities      with identity stitching: units and cookies per identity kind
buckets         (A/A replay only, see ``bucket_moments``) per hash bucket of the unit id,
                each replayable metric's count, means and M2 of its replay variables
                over the analysed units
"""

from __future__ import annotations

import dataclasses

import sqlglot.expressions as exp

from metricforge.compile.extras import (
    CAPS,
    cap_ctes,
    capped,
    cuped_metrics,
    cuped_variables,
    reported,
)
from metricforge.compile.sqlparts import (
    BIGINT,
    DOUBLE,
    UNIT_TABLE,
    aggregate,
    analysed,
    col,
    lit,
    moment_aggregates,
    one_if,
    with_ctes,
)
from metricforge.spec.model import Kind, MetricDef, Plan

BUCKET_DIGITS = 3  # hex digits of MD5(unit): 16**3 = 4096 buckets
HEX = "0123456789abcdef"
REPLAY_UNITS = "replay_units"


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


def bot_events() -> exp.Select:
    """Reads ``unit_rows`` straight, so its aggregates need no ORDER BY: engines feed result
    queries the units in one fixed order (DuckDB: engines/unit_order.py)."""
    removed = exp.cast(exp.Case().when(col("is_bot"), col("n_events")).else_(lit(0)), DOUBLE)
    events = exp.cast(col("n_events"), DOUBLE)

    def agg(cls: type[exp.Func], x: exp.Expr, y: exp.Expr | None = None) -> exp.Expr:
        return aggregate(cls, x.copy(), y.copy() if y is not None else None, ordered=False)

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


def check_results(plan: Plan) -> tuple[tuple[str, exp.Select], ...]:
    """The trust checks' result queries of a run."""
    out = [("exposure_days", exposure_days()), ("bot_events", bot_events())]
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


def replay_scope(plan: Plan, period: str) -> Plan:
    """The plan whose rules a replay of ``period`` follows: an earlier period ("pre") has
    no period before it to adjust by, so CUPED is off there (winsorising stays on, with
    caps computed from that period's values)."""
    if not period or not plan.spec.cuped:
        return plan
    return dataclasses.replace(plan, spec=dataclasses.replace(plan.spec, cuped=False))


def replayable(plan: Plan) -> list[MetricDef]:
    """The reported metrics a replay can re-randomise: every one but quantile metrics,
    whose statistic is not a merge of per-unit moments."""
    return [m for m in reported(plan) if m.kind is not Kind.QUANTILE]


def replay_variables(plan: Plan, metric: MetricDef) -> list[tuple[str, exp.Expr]]:
    """The per-unit variables whose bucket moments replay ``metric`` as the scorecard
    computes it: with CUPED the outcome and covariates (``extras.cuped_variables``), else
    x (capped when winsorised) and, for a ratio, y. ``plan`` is a ``replay_scope``."""
    if metric.name in {m.name for m in cuped_metrics(plan)}:
        return cuped_variables(metric)
    found = [("x", capped(col(f"x_{metric.name}"), metric))]
    if metric.is_ratio:
        found.append(("y", col(f"y_{metric.name}")))
    return found


def bucket_column(metric: MetricDef, stat: str, a: str = "", b: str = "") -> str:
    """``<metric>__n``, ``<metric>__mean_<a>``, ``<metric>__m2_<a>_<b>``."""
    return "__".join([metric.name, "_".join(p for p in (stat, a, b) if p)])


def bucket_moments(plan: Plan, period: str, ordered: bool) -> exp.Select:
    """Per hash bucket, over the analysed units: for each replayable metric the count, the
    means of its replay variables and their sums of squared and cross deviations from the
    bucket means (M2 = n · population (co)variance).

    ``period`` is "" (experiment) or "pre": then the pre-period columns (``xpre_``,
    ``ypre_``) are read under the experiment's names from the CTE ``replay_units``, so that
    caps and variables are built the same way for both periods.
    """
    scope = replay_scope(plan, period)
    source, ctes = UNIT_TABLE, []
    if period:
        renamed: list[exp.Expr] = [col("unit"), col("is_bot"), col("contaminated")]
        for metric in replayable(plan):
            names = ["x", "y"] if metric.is_ratio else ["x"]
            renamed += [
                exp.alias_(col(f"{v}{period}_{metric.name}"), f"{v}_{metric.name}") for v in names
            ]
        source, ctes = REPLAY_UNITS, [(REPLAY_UNITS, exp.select(*renamed).from_(UNIT_TABLE))]
    bucket = bucket_of_unit()
    # One select of every column at once: adding them one by one copies the growing tree
    # each time (sqlglot's builders copy), which cost the CUPED replay half a second.
    columns: list[exp.Expr] = [
        exp.alias_(bucket, "bucket"),
        exp.alias_(exp.Count(this=exp.Star()), "n_units"),
    ]
    for metric in replayable(plan):
        variables = replay_variables(scope, metric)
        parts = moment_aggregates(variables, ordered=ordered, population=True)
        n = parts[0][3]
        for stat, a, b, agg in parts:
            if stat == "cov":  # M2 = n · population (co)variance
                stat, agg = "m2", exp.Mul(this=agg, expression=n.copy())
            columns.append(exp.alias_(agg, bucket_column(metric, stat, a, b)))
    query = exp.select(*columns).from_(source)
    caps = cap_ctes(scope, source)
    if caps:
        query = query.join(exp.to_table(CAPS), join_type="cross")
    query = query.where(analysed()).group_by(bucket.copy()).order_by(bucket.copy())
    return with_ctes(query, ctes + caps)
