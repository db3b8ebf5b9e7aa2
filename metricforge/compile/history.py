"""Result queries for planning: pooled pre-period moments and daily arrivals of units.

They read only ``unit_rows`` of a plan with ``pre_period_days > 0`` and ``history_split``
(see ``spec.model.Plan``), over the units a scorecard would analyse (not bots, not seen
in two variants), all variants pooled: before its first exposure no unit is treated.

history    one row: for every reported metric, the moments of its pre-period values
           (``<m>__n``, ``__mean_x``, ``__var_x`` and for ratios ``__mean_y``, ``__var_y``,
           ``__cov_xy``) and, over the units with values in both halves of the
           pre-period, the moments of the halves (suffixes ``1`` and ``2``: ``__h_n``,
           ``__mean_x1``, ``__var_x1``, ``__cov_x1x2``, ..., see ``half_columns``).
arrivals   one row per day since the experiment start: units first exposed that day.
"""

from __future__ import annotations

import itertools

import sqlglot.expressions as exp

from metricforge.compile.sqlparts import UNIT_TABLE, aggregate, analysed
from metricforge.spec.model import Plan


def half_columns(ratio: bool) -> list[tuple[str, str, str | None]]:
    """(result column suffix, value, other value or None) of the halves' moments."""
    values = ["x1", "x2"] + (["y1", "y2"] if ratio else [])
    out: list[tuple[str, str, str | None]] = []
    for v in values:
        out += [(f"mean_{v}", v, None), (f"var_{v}", v, None)]
    for a, b in itertools.combinations(values, 2):
        out.append((f"cov_{a}{b}", a, b))
    return out


def _history(plan: Plan) -> exp.Select:
    # Reads unit_rows straight: engines feed it the units in one fixed order (no ORDER BY).
    select = exp.select(exp.alias_(exp.Count(this=exp.Star()), "n_units"))
    for name, _role in plan.reported:
        metric = plan.metric(name)
        x, y = exp.column(f"xpre_{name}"), exp.column(f"ypre_{name}")
        parts: list[tuple[str, exp.Expr]] = [
            ("n", exp.Count(this=x)),
            ("mean_x", aggregate(exp.Avg, x, ordered=False)),
            ("var_x", aggregate(exp.Variance, x, ordered=False)),
        ]
        if metric.is_ratio:
            parts += [
                ("mean_y", aggregate(exp.Avg, y.copy(), ordered=False)),
                ("var_y", aggregate(exp.Variance, y.copy(), ordered=False)),
                ("cov_xy", aggregate(exp.CovarSamp, x.copy(), y.copy(), ordered=False)),
            ]
        # the halves, over the units with a value in each (a mean metric may have none)
        raw = {
            v: exp.column(f"{v[0]}pre{v[1]}_{name}")
            for v in (["x1", "x2", "y1", "y2"] if metric.is_ratio else ["x1", "x2"])
        }
        both = exp.and_(*[c.copy().is_(exp.null()).not_() for c in raw.values()])

        def kept(v: str, both: exp.Expr = both, raw: dict[str, exp.Column] = raw) -> exp.Expr:
            return exp.Case().when(both.copy(), raw[v].copy())

        parts.append(("h_n", exp.Count(this=kept("x1"))))
        for suffix, a, b in half_columns(metric.is_ratio):
            if b is not None:
                agg = aggregate(exp.CovarSamp, kept(a), kept(b), ordered=False)
            else:
                cls = exp.Avg if suffix.startswith("mean") else exp.Variance
                agg = aggregate(cls, kept(a), ordered=False)
            parts.append((suffix, agg))
        select = select.select(*[exp.alias_(e, f"{name}__{s}") for s, e in parts])
    return select.from_(UNIT_TABLE).where(analysed())


def _arrivals() -> exp.Select:
    return (
        exp.select(exp.column("first_day"), exp.alias_(exp.Count(this=exp.Star()), "n_units"))
        .from_(UNIT_TABLE)
        .where(analysed())
        .group_by(exp.column("first_day"))
        .order_by(exp.column("first_day"))
    )


def history_results(plan: Plan) -> tuple[tuple[str, exp.Select], ...]:
    """The planning result queries of ``plan`` (pre-period and halves in ``unit_rows``)."""
    if not (plan.pre_period_days and plan.history_split):
        raise ValueError("planning queries need a plan with a split pre-period")
    return (("history", _history(plan)), ("arrivals", _arrivals()))
