"""The compiler: a Plan becomes sqlglot syntax trees, never pasted strings.

A run is ONE scan of the events, materialised as one row per exposed unit (the table
``unit_rows``), followed by small result queries over that table. The unit query's
stages (CTEs):
  first_exposure  each unit's first exposure inside the experiment, its variant and
                  how many distinct variants it saw
  sessions        events joined to first exposures (inside the analysis window),
                  grouped once per (unit, session): every metric's session-level part,
                  the bot rules' inputs and, for dwell metrics, click/back time lists
  units           one row per unit holding every metric's per-unit value
  (unit select)   per-unit bot verdict and contamination flag; final metric columns

Result queries read only ``unit_rows`` and return a few rows each:
  moments         per-variant sufficient statistics with centred aggregates

The unit query reads two views, ``events`` and ``exposures``, that the engine registers.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

import sqlglot.expressions as exp

from metricforge.compile.expressions import qualify
from metricforge.spec.model import BotRule, Kind, MetricDef, Plan, RuleKind

UNIT_TABLE = "unit_rows"
EXACT = exp.DataType.build("DECIMAL(38, 10)")
DOUBLE = exp.DataType.build("DOUBLE")
BIGINT = exp.DataType.build("BIGINT")


@dataclass(frozen=True)
class MetricColumns:
    """Names of a metric's columns in the final result."""

    n: str
    mean_x: str
    var_x: str
    mean_y: str | None = None
    var_y: str | None = None
    cov_xy: str | None = None


def result_columns(metric: MetricDef) -> MetricColumns:
    base = metric.name
    if metric.is_ratio:
        return MetricColumns(
            f"{base}__n",
            f"{base}__mean_x",
            f"{base}__var_x",
            f"{base}__mean_y",
            f"{base}__var_y",
            f"{base}__cov_xy",
        )
    return MetricColumns(f"{base}__n", f"{base}__mean_x", f"{base}__var_x")


def _col(name: str, table: str | None = None) -> exp.Column:
    return exp.column(name, table=table)


def _lit(value: str | int | float) -> exp.Expr:
    if isinstance(value, str):
        return exp.Literal.string(value)
    return exp.Literal.number(value)


def _ts(value: dt.datetime) -> exp.Expr:
    return exp.cast(exp.Literal.string(value.isoformat(sep=" ")), "TIMESTAMP")


def _case(cond: exp.Expr, then: exp.Expr, default: exp.Expr | None = None) -> exp.Case:
    case = exp.Case().when(cond, then)
    return case.else_(default) if default is not None else case


def _and(*parts: exp.Expr | None) -> exp.Expr:
    kept = [p for p in parts if p is not None]
    return exp.and_(*kept) if kept else exp.true()


def _event_condition(metric: MetricDef, events: str) -> exp.Expr:
    kinds: exp.Expr | None = None
    if metric.events:
        kinds = _col("event", events).isin(*[_lit(e) for e in metric.events])
    where = exp.paren(qualify(metric.where, events)) if metric.where is not None else None
    return _and(kinds, where)


class _Builder:
    def __init__(self, plan: Plan, dialect: str) -> None:
        self.plan = plan
        self.spec = plan.spec
        self.dialect = dialect

    # -- stage 1 -------------------------------------------------------------------------
    def first_exposure(self) -> exp.Select:
        x = "x"
        return (
            exp.select(
                exp.alias_(_col("unit_id", x), "unit"),
                exp.alias_(exp.Min(this=_col("ts", x)), "first_ts"),
                exp.alias_(exp.Min(this=_col("variant", x)), "variant"),
                exp.alias_(
                    exp.Count(this=exp.Distinct(expressions=[_col("variant", x)])), "n_variants"
                ),
            )
            .from_(exp.alias_(exp.to_table("exposures"), x, table=True))
            .where(
                _and(
                    _col("experiment", x).eq(_lit(self.spec.name)),
                    _col("unit_id", x).is_(exp.null()).not_(),
                    _col("variant", x).is_(exp.null()).not_(),
                    _col("ts", x) >= _ts(self.spec.start),
                    _col("ts", x) < _ts(self.spec.end),
                )
            )
            .group_by(_col("unit_id", x))
        )

    # -- stage 2 -------------------------------------------------------------------------
    def sessions(self) -> exp.Select:
        e, f = "e", "f"
        window = exp.Interval(this=_lit(str(self.spec.window_days)), unit=exp.var("DAY"))
        last = self.spec.end + dt.timedelta(days=self.spec.window_days)
        pre = self.plan.pre_period_days
        first: exp.Expr = _col("first_ts", f)
        if pre:  # also read each unit's pre-period: [first exposure - pre days, first exposure)
            pre_interval = exp.Interval(this=_lit(str(pre)), unit=exp.var("DAY"))
            first = exp.Sub(this=first, expression=pre_interval)
        join_on = _and(
            _col(self.spec.unit, e).eq(_col("unit", f)),
            _col("ts", e) >= first,
            _col("ts", e) < exp.Add(this=_col("first_ts", f), expression=window),
            _col("ts", e) >= _ts(self.spec.start - dt.timedelta(days=pre)),
            _col("ts", e) < _ts(last),
        )
        # With a pre-period, every experiment-period part is limited to events at or after
        # the first exposure, and each metric gets a pre-period twin (prefix `pre`).
        in_window = _col("ts", e) >= _col("first_ts", f) if pre else None
        n_events: exp.Expr = (
            exp.Count(this=_case(in_window, _lit(1)))
            if in_window is not None
            else exp.Count(this=_col("ts", e))
        )
        select = exp.select(
            _col("unit", f),
            *self._carried(f),
            exp.alias_(_col("session_id", e), "session"),
            exp.alias_(n_events, "n_events"),
        )
        if in_window is not None:
            before = exp.paren(in_window.copy()).not_()
            select = select.select(
                exp.alias_(exp.Count(this=_case(before, _lit(1))), "n_pre_events")
            )
        for i, rule in enumerate(self.plan.bot_filter.rules):
            flag = self._rule_flag(rule, e)
            if flag is not None:
                flag = _and(flag, in_window.copy() if in_window is not None else None)
                select = select.select(exp.alias_(exp.LogicalOr(this=flag), f"bot_rule_{i}"))
        for metric in self.plan.metrics:
            select = select.select(*self._session_parts(metric, e, "", in_window))
            if in_window is not None:
                before = exp.paren(in_window.copy()).not_()
                select = select.select(*self._session_parts(metric, e, "pre", before))
        return (
            select.from_(exp.alias_(exp.to_table("first_exposure"), f, table=True))
            .join(exp.alias_(exp.to_table("events"), e, table=True), on=join_on, join_type="left")
            .group_by(_col("unit", f), _col("session_id", e))
        )

    @staticmethod
    def _carried(table: str | None = None) -> list[exp.Expr]:
        """A unit's variant and variant count, carried through a grouping by unit: they
        depend on the unit alone, so they are not grouping keys (fewer keys to hash)."""
        return [
            exp.alias_(exp.AnyValue(this=_col(name, table)), name)
            for name in ("variant", "n_variants")
        ]

    def _rule_flag(self, rule: BotRule, e: str) -> exp.Expr | None:
        if rule.kind is RuleKind.USER_AGENT:
            ua = exp.Lower(this=_col("user_agent", e))
            hits = [exp.Contains(this=ua.copy(), expression=_lit(t)) for t in rule.tokens]
            return exp.or_(*hits)
        if rule.kind is RuleKind.DENY_IP:
            return _col("ip_hash", e).isin(*[_lit(t) for t in rule.tokens])
        return None  # unit-level rules are applied in `classified`

    def _session_parts(
        self, metric: MetricDef, e: str, period: str, period_cond: exp.Expr | None
    ) -> list[exp.Expr]:
        """A metric's session-level columns for one period ("" = experiment, "pre")."""
        s = f"s{period}_{metric.name}"
        cond = _and(
            _event_condition(metric, e), period_cond.copy() if period_cond is not None else None
        )
        if metric.kind in (Kind.COUNT, Kind.PROPORTION):
            return [exp.alias_(exp.Count(this=_case(cond, _lit(1))), s)]
        if metric.kind in (Kind.SUM, Kind.MEAN):
            assert metric.value is not None
            value = exp.cast(qualify(metric.value, e), EXACT)
            parts: list[exp.Expr] = [exp.alias_(exp.Sum(this=_case(cond, value)), s)]
            if metric.kind is Kind.MEAN:
                has = _and(cond, qualify(metric.value, e).is_(exp.null()).not_())
                parts.append(
                    exp.alias_(exp.Count(this=_case(has, _lit(1))), f"c{period}_{metric.name}")
                )
            return parts
        if metric.kind is Kind.DWELL_SUCCESS:
            return [exp.alias_(self._dwell_success(metric, e, period_cond), s)]
        return []  # ratio and composite are built from other metrics' per-unit columns

    def _dwell_success(self, metric: MetricDef, e: str, period_cond: exp.Expr | None) -> exp.Expr:
        """1 when the session has a click with no back within the threshold after it."""
        where = qualify(metric.where, e) if metric.where is not None else None

        def times(event: str) -> tuple[exp.Expr, exp.Expr]:
            cond = _and(
                _col("event", e).eq(_lit(event)),
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

    # -- stage 3 -------------------------------------------------------------------------
    def units(self) -> exp.Select:
        select = exp.select(
            _col("unit"),
            *self._carried(),
            exp.alias_(exp.cast(exp.Sum(this=_col("n_events")), BIGINT), "n_events"),
            exp.alias_(exp.Max(this=_col("n_events")), "max_session_events"),
            exp.alias_(exp.Count(this=_col("session")), "n_sessions"),
        )
        pre = bool(self.plan.pre_period_days)
        if pre:
            select = select.select(
                exp.alias_(exp.cast(exp.Sum(this=_col("n_pre_events")), BIGINT), "n_pre_events")
            )
        for i, rule in enumerate(self.plan.bot_filter.rules):
            if rule.kind in (RuleKind.USER_AGENT, RuleKind.DENY_IP):
                select = select.select(
                    exp.alias_(exp.LogicalOr(this=_col(f"bot_rule_{i}")), f"bot_rule_{i}")
                )
        for metric in self.plan.metrics:
            select = select.select(*self._unit_parts(metric, "", "n_events" if pre else None))
            if pre:
                select = select.select(*self._unit_parts(metric, "pre", "n_pre_events"))
        return select.from_("sessions").group_by(_col("unit"))

    def _unit_parts(self, metric: MetricDef, period: str, active: str | None) -> list[exp.Expr]:
        """A metric's per-unit columns for one period; ``active`` names the session column
        counting the period's events (sessions without any are not the period's)."""
        s, u = _col(f"s{period}_{metric.name}"), f"u{period}_{metric.name}"
        total = exp.Coalesce(this=exp.Sum(this=s), expressions=[_lit(0)])
        if metric.kind is Kind.COUNT:
            return [exp.alias_(exp.cast(total, BIGINT), u)]
        if metric.kind is Kind.SUM:
            return [exp.alias_(exp.cast(total, DOUBLE), u)]
        if metric.kind is Kind.PROPORTION:
            return [exp.alias_(_case(total > _lit(0), _lit(1), _lit(0)), u)]
        if metric.kind is Kind.MEAN:
            count = exp.Sum(this=_col(f"c{period}_{metric.name}"))
            mean = exp.Div(
                this=exp.cast(exp.Sum(this=s), DOUBLE), expression=exp.cast(count, DOUBLE)
            )
            return [exp.alias_(_case(count > _lit(0), mean), u)]
        if metric.kind is Kind.DWELL_SUCCESS:
            session: exp.Expr = _col("session")
            if active is not None:
                session = _case(_col(active) > _lit(0), session)
            return [
                exp.alias_(exp.cast(total, BIGINT), u),
                exp.alias_(exp.Count(this=session), f"d{period}_{metric.name}"),
            ]
        return []

    # -- stage 4 -------------------------------------------------------------------------
    def _per_unit(self, name: str, period: str = "") -> exp.Expr:
        """A per-unit metric's value as a DOUBLE expression over the `units` columns."""
        metric = self.plan.metric(name)
        if metric.kind is Kind.COMPOSITE:
            terms = [
                exp.Mul(
                    this=exp.cast(exp.Literal.number(repr(float(w))), DOUBLE),
                    expression=self._per_unit(t, period),
                )
                for t, w in metric.terms
            ]
            total: exp.Expr = terms[0]
            for term in terms[1:]:
                total = exp.Add(this=total, expression=term)
            return exp.paren(total)
        return exp.cast(_col(f"u{period}_{name}"), DOUBLE)

    def _x_y(self, metric: MetricDef, period: str) -> tuple[exp.Expr, exp.Expr | None]:
        """The per-unit numerator X and, for ratio kinds, denominator Y of a metric."""
        if metric.kind is Kind.RATIO:
            assert metric.numerator and metric.denominator
            return self._per_unit(metric.numerator, period), self._per_unit(
                metric.denominator, period
            )
        if metric.kind is Kind.DWELL_SUCCESS:
            return (
                exp.cast(_col(f"u{period}_{metric.name}"), DOUBLE),
                exp.cast(_col(f"d{period}_{metric.name}"), DOUBLE),
            )
        return self._per_unit(metric.name, period), None

    def classified(self) -> exp.Select:
        flags: list[exp.Expr] = []
        for i, rule in enumerate(self.plan.bot_filter.rules):
            if rule.kind in (RuleKind.USER_AGENT, RuleKind.DENY_IP):
                # NULL when the unit has no event in its window (or no user agent)
                flags.append(exp.Coalesce(this=_col(f"bot_rule_{i}"), expressions=[exp.false()]))
            elif rule.kind is RuleKind.SESSION_EVENTS:
                flags.append(_col("max_session_events") > _lit(rule.max_events))
            elif rule.kind is RuleKind.DENY_UNIT:
                flags.append(_col("unit").isin(*[_lit(t) for t in rule.tokens]))
        is_bot = exp.paren(exp.or_(*flags)) if flags else exp.false()
        select = exp.select(
            _col("unit"),
            _col("variant"),
            _col("n_events"),
            exp.alias_(is_bot, "is_bot"),
            exp.alias_(_col("n_variants") > _lit(1), "contaminated"),
        )
        periods = ("", "pre") if self.plan.pre_period_days else ("",)
        if self.plan.pre_period_days:
            select = select.select(exp.alias_(_col("n_pre_events") > _lit(0), "has_pre"))
        for metric in self.plan.metrics:
            for period in periods:
                x, y = self._x_y(metric, period)
                select = select.select(exp.alias_(x, f"x{period}_{metric.name}"))
                if y is not None:
                    select = select.select(exp.alias_(y, f"y{period}_{metric.name}"))
        return select.from_("units")

    # -- stage 5 -------------------------------------------------------------------------
    def _agg(self, cls: type[exp.Func], col: str, other: str | None = None) -> exp.Expr:
        # No ORDER BY inside the aggregates: engines feed the result queries the units in one
        # fixed order (DuckDB: unit_rows read back sorted by unit, queried on one thread), so
        # runs are bit-identical without a sort per aggregate.
        if other is not None:
            return cls(this=_col(col), expression=_col(other))
        return cls(this=_col(col))

    def moments(self) -> exp.Select:
        select = exp.select(
            _col("variant"),
            _col("is_bot"),
            _col("contaminated"),
            exp.alias_(exp.Count(this=exp.Star()), "n_units"),
            exp.alias_(exp.cast(exp.Sum(this=_col("n_events")), BIGINT), "n_events"),
        )
        for metric in self.plan.metrics:
            if metric.kind in (Kind.COMPOSITE, Kind.COUNT, Kind.SUM, Kind.PROPORTION) and not any(
                metric.name == name for name, _ in self.plan.reported
            ):
                continue  # only needed as a part of another metric
            cols = result_columns(metric)
            x = f"x_{metric.name}"
            select = select.select(
                exp.alias_(exp.Count(this=_col(x)), cols.n),
                exp.alias_(self._agg(exp.Avg, x), cols.mean_x),
                exp.alias_(self._agg(exp.Variance, x), cols.var_x),
            )
            if metric.is_ratio:
                y = f"y_{metric.name}"
                assert cols.mean_y and cols.var_y and cols.cov_xy
                select = select.select(
                    exp.alias_(self._agg(exp.Avg, y), cols.mean_y),
                    exp.alias_(self._agg(exp.Variance, y), cols.var_y),
                    exp.alias_(self._agg(exp.CovarSamp, x, y), cols.cov_xy),
                )
        keys = [_col("variant"), _col("is_bot"), _col("contaminated")]
        return select.from_(UNIT_TABLE).group_by(*keys).order_by(*keys)

    def unit_rows(self) -> exp.Select:
        query = self.classified()
        for name, cte in (
            ("first_exposure", self.first_exposure()),
            ("sessions", self.sessions()),
            ("units", self.units()),
        ):
            query = query.with_(name, as_=cte)
        return query

    def build(self) -> CompiledRun:
        return CompiledRun(unit_rows=self.unit_rows(), results=(("moments", self.moments()),))


@dataclass(frozen=True)
class CompiledRun:
    """What an engine executes for one run.

    ``unit_rows`` is the only query that reads the events: one row per exposed unit. The
    engine materialises it as the table ``unit_rows``; each of ``results`` (name, query)
    then reads only that table and returns a small result.
    """

    unit_rows: exp.Select
    results: tuple[tuple[str, exp.Select], ...]

    def materialise(self, dialect: str) -> exp.Expr:
        """The statement that stores ``unit_rows``: a temporary table, or Spark's cache."""
        table = exp.to_table(UNIT_TABLE)
        if dialect == "spark":
            return exp.Cache(this=table, expression=self.unit_rows)
        return exp.Create(
            this=table,
            kind="TABLE",
            expression=self.unit_rows,
            properties=exp.Properties(expressions=[exp.TemporaryProperty()]),
        )

    def statements(self, dialect: str) -> list[tuple[str, exp.Expr]]:
        """Every statement in execution order, named: the materialisation, then results."""
        return [(UNIT_TABLE, self.materialise(dialect)), *self.results]


def compile_plan(plan: Plan, dialect: str = "duckdb") -> CompiledRun:
    """The statements of a run, as sqlglot trees for ``dialect`` (duckdb or spark)."""
    return _Builder(plan, dialect).build()


def render(plan: Plan, dialect: str = "duckdb", *, pretty: bool = True) -> str:
    """All statements of a run as SQL text, each headed by a comment with its name."""
    parts = [
        f"-- {name}\n{tree.sql(dialect=dialect, pretty=pretty)};"
        for name, tree in compile_plan(plan, dialect).statements(dialect)
    ]
    return "\n\n".join(parts)
