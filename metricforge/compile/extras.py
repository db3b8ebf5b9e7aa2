"""Result queries beyond `moments`: winsorising caps, CUPED statistics, quantile metrics.

Each reads only the materialised per-unit table and returns a few rows. Analysed units are
those that are neither bots nor seen in two variants.

caps          one row: every winsorised metric's cap, the ``winsorise`` quantile of the
              pooled per-unit values of all analysed units (``<metric>__cap``), and with
              CUPED the cap of its pre-period covariate (``<metric>__cap_pre``)
cuped         per variant, for every CUPED-adjusted metric: count, means and the covariance
              matrix of the per-unit outcome and covariates (``<metric>__cv_...``)
quantile_<m>  per variant, for a quantile metric: the quantile of the event-level values,
              the moments of the per-unit counts below it, the rank band of its outer
              confidence interval and the values at the band's ends
"""

from __future__ import annotations

import sqlglot.expressions as exp

from metricforge.compile.ranks import ranked, value_at
from metricforge.compile.sqlparts import (
    DOUBLE,
    aggregate,
    analysed,
    moment_aggregates,
    with_ctes,
)
from metricforge.spec.model import Kind, MetricDef, Plan
from metricforge.stats.quantiles import two_sided_z

CAPS = "caps"


def _lit(value: str | float) -> exp.Expr:
    if isinstance(value, str):
        return exp.Literal.string(value)
    return exp.cast(exp.Literal.number(repr(float(value))), DOUBLE)


def _double(e: exp.Expr) -> exp.Expr:
    return exp.cast(e, DOUBLE)


# -- which metrics ---------------------------------------------------------------------------
def reported(plan: Plan) -> list[MetricDef]:
    return [plan.metric(name) for name, _ in plan.reported]


def cuped_metrics(plan: Plan) -> list[MetricDef]:
    """Metrics adjusted by their pre-period value: every reported one but quantiles."""
    if not (plan.spec.cuped and plan.pre_period_days > 0):
        return []
    return [m for m in reported(plan) if m.kind is not Kind.QUANTILE]


def capped_metrics(plan: Plan) -> list[MetricDef]:
    return [m for m in reported(plan) if m.winsorise is not None]


def quantile_metrics(plan: Plan) -> list[MetricDef]:
    return [m for m in reported(plan) if m.kind is Kind.QUANTILE]


# -- caps -------------------------------------------------------------------------------------
def cap_column(metric: MetricDef, pre: bool = False) -> str:
    return f"{metric.name}__cap_pre" if pre else f"{metric.name}__cap"


def capped(value: exp.Expr, metric: MetricDef, pre: bool = False) -> exp.Expr:
    """``value`` capped at the metric's cap (NULL stays NULL); unchanged if not winsorised."""
    if metric.winsorise is None:
        return value
    cap = exp.column(cap_column(metric, pre), table=CAPS)
    return exp.Case().when(value.copy() > cap, cap.copy()).else_(value)


def _covariate(metric: MetricDef) -> tuple[exp.Expr, exp.Expr]:
    """A non-ratio metric's pre-period covariate (0 without pre-period data) and indicator.

    A mean metric has a pre-period value only if the unit had matching events then; every
    other kind has one whenever the unit had any pre-period event (`has_pre`).
    """
    xpre = exp.column(f"xpre_{metric.name}")
    if metric.kind is Kind.MEAN:
        has = xpre.is_(exp.null()).not_()
        return exp.Coalesce(this=xpre, expressions=[_lit(0.0)]), has
    return xpre, exp.column("has_pre")


def _pre_value(metric: MetricDef) -> exp.Expr:
    """The pre-period value that is capped: the covariate, or a ratio's pre numerator."""
    if metric.is_ratio:
        return exp.column(f"xpre_{metric.name}")
    return _covariate(metric)[0]


def cap_ctes(plan: Plan, table: str) -> list[tuple[str, exp.Select]]:
    """CTEs ending in the one-row table ``caps``; empty if no reported metric is capped."""
    metrics = capped_metrics(plan)
    if not metrics:
        return []
    adjusted = {m.name for m in cuped_metrics(plan)}
    branches: list[exp.Select] = []
    keys: list[tuple[str, str]] = []
    for metric in metrics:
        assert metric.winsorise is not None
        x = exp.column(f"x_{metric.name}")
        sources: list[tuple[str, exp.Expr, str]] = [(metric.name, x, cap_column(metric))]
        if metric.name in adjusted:
            sources.append((f"{metric.name}:pre", _pre_value(metric), cap_column(metric, True)))
        for key, value, column in sources:
            branches.append(
                exp.select(
                    exp.alias_(_lit(key), "k"),
                    exp.alias_(_double(value), "v"),
                    exp.alias_(_lit(metric.winsorise), "lvl"),
                )
                .from_(table)
                .where(exp.and_(analysed(), x.is_(exp.null()).not_()))
            )
            keys.append((key, column))
    values: exp.Query = branches[0]
    for branch in branches[1:]:
        values = exp.union(values, branch, distinct=False)
    levels = (
        exp.select(exp.column("k"), exp.alias_(value_at(exp.column("lvl")), "cap"))
        .from_("cap_ranked")
        .group_by(exp.column("k"))
    )
    pivot = exp.select(
        *[
            exp.alias_(
                exp.Max(this=exp.Case().when(exp.column("k").eq(_lit(k)), exp.column("cap"))), c
            )
            for k, c in keys
        ]
    ).from_("cap_levels")
    return [
        ("cap_values", values),  # type: ignore[list-item]
        ("cap_ranked", ranked("cap_values", "k", "v", "lvl")),
        ("cap_levels", levels),
        (CAPS, pivot),
    ]


def caps_query(plan: Plan, table: str) -> exp.Select:
    return with_ctes(exp.select(exp.Star()).from_(CAPS), cap_ctes(plan, table))


# -- CUPED ------------------------------------------------------------------------------------
def cuped_variables(metric: MetricDef) -> list[tuple[str, exp.Expr]]:
    """The per-unit variables whose moments CUPED needs, named as in the result columns:
    (x, c, h) for per-unit metrics, (x, y, xpre, ypre, h) for ratios; h is the indicator of
    pre-period data, c the covariate (0 where h is 0)."""
    name = metric.name
    x = capped(exp.column(f"x_{name}"), metric)
    if metric.is_ratio:
        has: exp.Expr = exp.column("has_pre")
        found: list[tuple[str, exp.Expr]] = [
            ("x", x),
            ("y", exp.column(f"y_{name}")),
            ("xpre", capped(exp.column(f"xpre_{name}"), metric, pre=True)),
            ("ypre", exp.column(f"ypre_{name}")),
        ]
    else:
        covariate, has = _covariate(metric)
        found = [("x", x), ("c", capped(covariate, metric, pre=True))]
    one, zero = exp.Literal.number(1), exp.Literal.number(0)
    found.append(("h", exp.Case().when(has, one).else_(zero)))
    if metric.kind is Kind.MEAN:  # units without a value are not part of a mean metric
        present = exp.column(f"x_{name}").is_(exp.null()).not_()
        found = [(k, exp.Case().when(present.copy(), v)) for k, v in found]
    return [(k, _double(v)) for k, v in found]


def cuped_column(metric: MetricDef, stat: str, a: str = "", b: str = "") -> str:
    """``<metric>__cv_n``, ``<metric>__cv_mean_<a>``, ``<metric>__cv_cov_<a>_<b>``."""
    suffix = "_".join(p for p in (stat, a, b) if p)
    return f"{metric.name}__cv_{suffix}"


def cuped_query(plan: Plan, table: str) -> exp.Select:
    """Reads ``table`` straight (with the one-row caps joined, as ``moments``), so its
    aggregates need no ORDER BY: engines feed result queries the units in one fixed order."""
    select = exp.select(exp.column("variant"))
    for metric in cuped_metrics(plan):
        for stat, a, b, agg in moment_aggregates(cuped_variables(metric), ordered=False):
            select = select.select(exp.alias_(agg, cuped_column(metric, stat, a, b)))
    source: exp.Select = select.from_(table)
    ctes = cap_ctes(plan, table)
    if ctes:
        source = source.join(exp.to_table(CAPS), join_type="cross")
    query = source.where(analysed()).group_by(exp.column("variant")).order_by("variant")
    return with_ctes(query, ctes)


# -- quantile metrics -------------------------------------------------------------------------
def value_rows(metric: MetricDef, table: str, *columns: exp.Expr) -> exp.Select:
    """One row per value of a quantile metric (``v``) of the analysed units of ``table``
    (its list column ``v_<metric>``), with ``columns`` of the unit."""
    return (
        exp.select(*columns, exp.column("v"))
        .from_(table)
        .join(
            exp.Unnest(
                expressions=[exp.column(f"v_{metric.name}")],
                alias=exp.TableAlias(this=exp.to_identifier("t"), columns=[exp.to_identifier("v")]),
            ),
            join_type="cross",
        )
        .where(exp.and_(analysed(), exp.column("v").is_(exp.null()).not_()))
    )


def quantile_query(
    metric: MetricDef, table: str, alpha: float, *, ordered: bool, z: float | None = None
) -> exp.Select:
    """Per variant: the quantile of the event-level values and its outer confidence band
    (at ``z``, by default the two-sided normal quantile of ``alpha``).

    q_values  the analysed units' values, one row per value
    q_ranked  each value's position within its variant
    q_point   the variant's quantile q̂ (linear interpolation) and its number of values
    q_units   per unit: values at or below q̂ (S) and all values (M)
    q_spread  per variant: moments of S and M over units (centred aggregates)
    q_band    the levels q ∓ z·σ, clipped to [0, 1], with σ² the delta-method variance of
              ΣS/ΣM (the proportion at or below q̂ respects clustering by unit)
    (final)   the quantiles at the band's levels (the outer confidence interval)
    """
    var = exp.column("variant")
    values = value_rows(metric, table, exp.column("variant"), exp.column("unit"))
    point = (
        exp.select(
            var.copy(),
            exp.alias_(exp.Max(this=exp.column("n")), "n_values"),
            exp.alias_(value_at(_lit(metric.q)), "quantile"),
        )
        .from_("q_ranked")
        .group_by(var.copy())
    )
    below = exp.Case().when(
        exp.column("v", "rk") <= exp.column("quantile", "p"), exp.Literal.number(1)
    )
    units = (
        exp.select(
            exp.column("variant", "rk"),
            exp.column("unit", "rk"),
            exp.alias_(exp.cast(exp.Count(this=below), DOUBLE), "s"),
            exp.alias_(exp.cast(exp.Count(this=exp.Star()), DOUBLE), "m"),
        )
        .from_(exp.alias_(exp.to_table("q_ranked"), "rk", table=True))
        .join(
            exp.alias_(exp.to_table("q_point"), "p", table=True),
            on=exp.column("variant", "rk").eq(exp.column("variant", "p")),
        )
        .group_by(exp.column("variant", "rk"), exp.column("unit", "rk"))
    )
    s, m = exp.column("s"), exp.column("m")
    spread = (
        exp.select(
            var.copy(),
            exp.alias_(exp.Count(this=exp.Star()), "n_units"),
            exp.alias_(aggregate(exp.Avg, s.copy(), ordered=ordered), "mean_below"),
            exp.alias_(aggregate(exp.Avg, m.copy(), ordered=ordered), "mean_count"),
            exp.alias_(aggregate(exp.Variance, s.copy(), ordered=ordered), "var_below"),
            exp.alias_(aggregate(exp.Variance, m.copy(), ordered=ordered), "var_count"),
            exp.alias_(
                aggregate(exp.CovarSamp, s.copy(), m.copy(), ordered=ordered), "cov_below_count"
            ),
        )
        .from_("q_units")
        .group_by(var.copy())
    )
    band = exp.select(
        exp.column("variant", "s"),
        exp.column("n_units", "s"),
        exp.column("n_values", "p"),
        exp.column("quantile", "p"),
        *[
            exp.column(c, "s")
            for c in ("mean_below", "mean_count", "var_below", "var_count", "cov_below_count")
        ],
        *_band_levels(metric.q, two_sided_z(alpha) if z is None else z),
    ).from_(exp.alias_(exp.to_table("q_spread"), "s", table=True))
    band = band.join(
        exp.alias_(exp.to_table("q_point"), "p", table=True),
        on=exp.column("variant", "s").eq(exp.column("variant", "p")),
    )
    ends = (
        exp.select(
            exp.column("variant", "rk"),
            exp.alias_(value_at(exp.column("level_low", "b"), table="rk"), "value_low"),
            exp.alias_(value_at(exp.column("level_high", "b"), table="rk"), "value_high"),
        )
        .from_(exp.alias_(exp.to_table("q_ranked"), "rk", table=True))
        .join(
            exp.alias_(exp.to_table("q_band"), "b", table=True),
            on=exp.column("variant", "rk").eq(exp.column("variant", "b")),
        )
        .group_by(exp.column("variant", "rk"))
    )
    final = (
        exp.select(
            exp.Column(this=exp.Star(), table=exp.to_identifier("b")),
            exp.column("value_low", "e"),
            exp.column("value_high", "e"),
        )
        .from_(exp.alias_(exp.to_table("q_band"), "b", table=True))
        .join(
            exp.alias_(exp.to_table("q_ends"), "e", table=True),
            on=exp.column("variant", "b").eq(exp.column("variant", "e")),
        )
        .order_by(exp.column("variant", "b"))
    )
    return with_ctes(
        final,
        [
            ("q_values", values),
            ("q_ranked", ranked("q_values", "variant", "v", "unit")),
            ("q_point", point),
            ("q_units", units),
            ("q_spread", spread),
            ("q_band", band),
            ("q_ends", ends),
        ],
    )


def _band_levels(q: float, z: float) -> list[exp.Expr]:
    """level_low, level_high = q ∓ z·σ clipped to [0, 1]; σ² = Var(ΣS/ΣM) by the delta
    method, written as in ``stats.moments.ratio_point_and_variance``:
    (var_S − 2r·cov + r·(r·var_M)) / n / mean_M / mean_M with r = mean_S / mean_M."""

    def col(name: str) -> exp.Expr:
        return exp.column(name, "s")

    r = exp.paren(exp.Div(this=col("mean_below"), expression=col("mean_count")))
    resid = exp.Add(
        this=exp.Sub(
            this=col("var_below"),
            expression=exp.Mul(
                this=_lit(2.0),
                expression=exp.paren(exp.Mul(this=r.copy(), expression=col("cov_below_count"))),
            ),
        ),
        expression=exp.Mul(
            this=r.copy(),
            expression=exp.paren(exp.Mul(this=r.copy(), expression=col("var_count"))),
        ),
    )
    variance: exp.Expr = exp.Greatest(this=exp.paren(resid), expressions=[_lit(0.0)])
    for divisor in (_double(col("n_units")), col("mean_count"), col("mean_count")):
        variance = exp.Div(this=variance, expression=divisor)
    half = exp.Mul(this=_lit(z), expression=exp.Sqrt(this=variance))
    low = exp.Greatest(this=exp.Sub(this=_lit(q), expression=half), expressions=[_lit(0.0)])
    high = exp.Least(this=exp.Add(this=_lit(q), expression=half.copy()), expressions=[_lit(1.0)])
    return [exp.alias_(low, "level_low"), exp.alias_(high, "level_high")]


def extra_results(plan: Plan, table: str, *, ordered: bool) -> list[tuple[str, exp.Select]]:
    """The named result queries this module adds to a run."""
    out: list[tuple[str, exp.Select]] = []
    if capped_metrics(plan):
        out.append(("caps", caps_query(plan, table)))
    if cuped_metrics(plan):
        out.append(("cuped", cuped_query(plan, table)))
    for metric in quantile_metrics(plan):
        query = quantile_query(metric, table, plan.spec.alpha, ordered=ordered)
        out.append((f"quantile_{metric.name}", query))
    return out
