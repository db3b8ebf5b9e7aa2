"""Stage 2 of the unit query: events joined to first exposures, grouped per (unit, session).

One grouping computes, for every metric and period, its session-level part (counts,
exact sums, the dwell verdict from click/back time lists, a quantile metric's values),
the bot rules' per-event flags and the event counts the later stages need. The unit
stage (``compile/query.py``) rolls these columns up per unit.

Periods: "" is the experiment period (events from the first exposure on); with a
pre-period, ``pre`` (and for planning ``pre1``/``pre2``, its two halves) are the events
before the first exposure.
"""

from __future__ import annotations

import datetime as dt

import sqlglot.expressions as exp

from metricforge.compile.expressions import qualify
from metricforge.compile.quality import exact, value_checks
from metricforge.compile.segments import session_keys
from metricforge.compile.sqlparts import DOUBLE, one_of, timestamp
from metricforge.compile.sqlparts import all_of as _and
from metricforge.compile.sqlparts import case as _case
from metricforge.compile.sqlparts import col as _col
from metricforge.compile.sqlparts import lit as _lit
from metricforge.spec.model import BotRule, Kind, MetricDef, Plan, RuleKind


def periods(plan: Plan, e: str = "e", f: str = "f") -> list[tuple[str, exp.Expr]]:
    """The periods before the first exposure: (column suffix, condition on an event)."""
    days = plan.pre_period_days
    if not days:
        return []
    ts, first = _col("ts", e), _col("first_ts", f)
    out: list[tuple[str, exp.Expr]] = [("pre", exp.paren(ts >= first).not_())]
    if plan.history_split:  # halves, in hours so that an odd D splits evenly
        half = exp.Interval(this=_lit(str(days * 12)), unit=exp.var("HOUR"))
        middle = exp.Sub(this=first.copy(), expression=half)
        out.append(("pre1", ts.copy() < middle))
        out.append(("pre2", _and(ts.copy() >= middle.copy(), ts.copy() < first.copy())))
    return out


def sessions(plan: Plan, *, ts_bounds: bool = True) -> exp.Select:
    """The CTE ``sessions``: one row per (unit, session) of each unit's window.

    With ``ts_bounds`` the join also bounds ``ts`` by constants ([start − pre-period, end +
    window)): implied by each unit's window, but a constant the engine can push into the scan
    to skip row groups. The runner leaves it out when every file read lies inside it."""
    spec = plan.spec
    e, f = "e", "f"
    window = exp.Interval(this=_lit(str(spec.window_days)), unit=exp.var("DAY"))
    last = spec.end + dt.timedelta(days=spec.window_days)
    pre = plan.pre_period_days
    first: exp.Expr = _col("first_ts", f)
    if pre:  # also read each unit's pre-period: [first exposure - pre days, first exposure)
        pre_interval = exp.Interval(this=_lit(str(pre)), unit=exp.var("DAY"))
        first = exp.Sub(this=first, expression=pre_interval)
    join_on = _and(
        _col(spec.unit, e).eq(_col("unit", f)),
        _col("ts", e) >= first,
        _col("ts", e) < exp.Add(this=_col("first_ts", f), expression=window),
        _col("ts", e) >= timestamp(spec.start - dt.timedelta(days=pre)) if ts_bounds else None,
        _col("ts", e) < timestamp(last) if ts_bounds else None,
        # a look at time as_of (`metricforge looks`): nothing later has happened yet
        _col("ts", e) < timestamp(plan.as_of) if plan.as_of is not None else None,
    )
    # With a pre-period, every experiment-period part is limited to events at or after
    # the first exposure, and each metric gets a twin per earlier period (`pre`, and for
    # planning `pre1`/`pre2`, the two halves of the pre-period).
    in_window = _col("ts", e) >= _col("first_ts", f) if pre else None
    earlier = periods(plan, e, f)
    n_events: exp.Expr = (
        exp.Count(this=_case(in_window, _lit(1)))
        if in_window is not None
        else exp.Count(this=_col("ts", e))
    )
    select = exp.select(
        _col("unit", f),
        exp.alias_(_col("session_id", e), "session"),
        exp.alias_(n_events, "n_events"),
    )
    if spec.stitch_to:  # the stitch ids seen in the experiment window
        ident: exp.Expr = _col(spec.stitch_to, e)
        if in_window is not None:
            ident = _case(in_window.copy(), ident)
        select = select.select(
            exp.alias_(exp.Min(this=ident), "id_min"),
            exp.alias_(exp.Max(this=ident.copy()), "id_max"),
        )
    for period, cond in earlier:
        select = select.select(
            exp.alias_(exp.Count(this=_case(cond.copy(), _lit(1))), f"n_{period}_events")
        )
    for i, rule in enumerate(plan.bot_filter.rules):
        flag = _rule_flag(rule, e)
        if flag is not None:
            flag = _and(flag, in_window.copy() if in_window is not None else None)
            select = select.select(exp.alias_(exp.LogicalOr(this=flag), f"bot_rule_{i}"))
    select = select.select(*session_keys(plan, e, in_window))
    for metric in plan.metrics:
        select = select.select(*_session_parts(metric, e, "", in_window, listed=True))
        for period, cond in earlier:
            listed = plan.lists_values(period)
            select = select.select(*_session_parts(metric, e, period, cond, listed=listed))
    return (
        select.from_(exp.alias_(exp.to_table("first_exposure"), f, table=True))
        .join(exp.alias_(exp.to_table("events"), e, table=True), on=join_on, join_type="left")
        .group_by(_col("unit", f), _col("session_id", e))
    )


def _event_condition(metric: MetricDef, events: str) -> exp.Expr:
    # A unit without events joins one all-NULL event row (LEFT JOIN); a condition that
    # could hold on it (no event types; `where = "device IS NULL"`) must not count it.
    kinds: exp.Expr = _col("ts", events).is_(exp.null()).not_()
    if metric.events:
        kinds = one_of(_col("event", events), list(metric.events))
    where = exp.paren(qualify(metric.where, events)) if metric.where is not None else None
    return _and(kinds, where)


def _rule_flag(rule: BotRule, e: str) -> exp.Expr | None:
    if rule.kind is RuleKind.USER_AGENT:
        ua = exp.Lower(this=_col("user_agent", e))
        hits = [exp.Contains(this=ua.copy(), expression=_lit(t)) for t in rule.tokens]
        return exp.or_(*hits)
    if rule.kind is RuleKind.DENY_IP:
        return _col("ip_hash", e).isin(*[_lit(t) for t in rule.tokens])
    return None  # unit-level rules are applied in the unit select


def _session_parts(
    metric: MetricDef, e: str, period: str, period_cond: exp.Expr | None, *, listed: bool
) -> list[exp.Expr]:
    """A metric's session-level columns for one period ("" = experiment, "pre");
    ``listed``: a quantile metric's values are listed too (``Plan.lists_values``)."""
    s = f"s{period}_{metric.name}"
    cond = _and(
        _event_condition(metric, e), period_cond.copy() if period_cond is not None else None
    )
    if metric.kind in (Kind.COUNT, Kind.PROPORTION):
        return [exp.alias_(exp.Count(this=_case(cond, _lit(1))), s)]
    if metric.kind in (Kind.SUM, Kind.MEAN):
        assert metric.value is not None
        raw = qualify(metric.value, e)
        # the exact value, NULL when NaN, infinite or too large (left out, and counted)
        value = _case(cond, exact(raw))
        parts: list[exp.Expr] = [exp.alias_(exp.Sum(this=value), s)]
        if metric.kind is Kind.MEAN:
            parts.append(exp.alias_(exp.Count(this=value.copy()), f"c{period}_{metric.name}"))
        if not period:
            parts += [
                exp.alias_(count, name) for name, count in value_checks(cond, raw, value, metric)
            ]
        return parts
    if metric.kind is Kind.DWELL_SUCCESS:
        return [exp.alias_(_dwell_success(metric, e, period_cond), s)]
    if metric.kind is Kind.QUANTILE:  # the number of values and, when listed, their list
        assert metric.value is not None
        listed_value = qualify(metric.value, e)
        has = _and(cond, listed_value.is_(exp.null()).not_())
        parts = [exp.alias_(exp.Count(this=_case(has, _lit(1))), s)]
        if listed:
            values = exp.ArrayAgg(this=exp.cast(listed_value.copy(), DOUBLE))
            where = exp.Where(this=has.copy())
            column = f"l{period}_{metric.name}"
            parts.append(exp.alias_(exp.Filter(this=values, expression=where), column))
        return parts
    return []  # ratio and composite are built from other metrics' per-unit columns


def _dwell_success(metric: MetricDef, e: str, period_cond: exp.Expr | None) -> exp.Expr:
    """1 when the session has a click with no back within the threshold after it."""
    where = qualify(metric.where, e) if metric.where is not None else None

    def times(event: str) -> tuple[exp.Expr, exp.Expr]:
        cond = _and(
            # written as a count metric's event condition: the engine then computes a count
            # of clicks that a metric also uses once (identical aggregates are shared)
            one_of(_col("event", e), [event]),
            where.copy() if where is not None else None,
            period_cond.copy() if period_cond is not None else None,
        )
        listed = exp.Filter(
            this=exp.ArrayAgg(this=exp.UnixMillis(this=_col("ts", e))),
            expression=exp.Where(this=cond),
        )
        return listed, exp.Count(this=_case(cond, _lit(1)))

    clicks, n_clicks = times("click")
    backs, n_backs = times("back")
    c, b = exp.to_identifier("c"), exp.to_identifier("b")
    threshold = _lit(int(round(metric.threshold_s * 1000)))
    quick_back = exp.ArrayFilter(
        this=backs,
        expression=exp.Lambda(
            this=_and(
                exp.column(b) > exp.column(c),
                exp.column(b) <= exp.Add(this=exp.column(c), expression=threshold),
            ),
            expressions=[b],
        ),
    )
    good_clicks = exp.ArrayFilter(
        this=clicks,
        expression=exp.Lambda(this=exp.ArraySize(this=quick_back).eq(_lit(0)), expressions=[c]),
    )
    # Empty lists are NULL in some engines: decide by counts first.
    return (
        exp.Case()
        .when(n_clicks.eq(_lit(0)), _lit(0))
        .when(n_backs.eq(_lit(0)), _lit(1))
        .when(exp.ArraySize(this=good_clicks) > _lit(0), _lit(1))
        .else_(_lit(0))
    )
