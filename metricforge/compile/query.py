"""The compiler: a Plan becomes sqlglot syntax trees, never pasted strings.

A run is ONE scan of the events, materialised as one row per exposed unit (the table
``unit_rows``), followed by small result queries over that table. The unit query's
stages (CTEs):
  first_exposure  each unit's first exposure inside the experiment, its variant and
                  whether it saw two variants or more
  sessions        events joined to first exposures (inside the analysis window),
                  grouped once per (unit, session): every metric's session-level part,
                  the bot rules' inputs and, for dwell metrics, click/back time lists
                  (built in ``compile/sessions.py``)
  units           one row per unit holding every metric's per-unit value
  (unit select)   per-unit bot verdict and contamination flag; final metric columns

Result queries read only ``unit_rows`` and return a few rows each:
  moments         per-variant sufficient statistics with centred aggregates (winsorised
                  metrics capped at the cap computed in its own CTEs)
  caps, cuped, quantile_<metric>   see ``compile/extras.py``

A quantile metric adds ``v_<metric>`` to ``unit_rows``: the unit's sorted list of values
(its ``x_<metric>`` is the number of values, NULL without any).
  data_quality    per-variant counts of what the scan left out or found odd
                  (compile/quality.py)

The unit query reads two views, ``events`` and ``exposures``, that the engine registers.
"""

from __future__ import annotations

from dataclasses import dataclass

import sqlglot.expressions as exp

from metricforge.compile.checks import check_results
from metricforge.compile.extras import cap_ctes, capped, extra_results
from metricforge.compile.quality import (
    DUPLICATE_EXPOSURES,
    data_quality_query,
    unit_columns,
)
from metricforge.compile.segments import (
    merged_keys,
    result_name,
    segment_columns,
    unit_values,
    value_column,
)
from metricforge.compile.sessions import periods, sessions
from metricforge.compile.sqlparts import (
    BIGINT,
    DOUBLE,
    UNIT_TABLE,
    aggregate,
    analysed,
    sorted_concat,
    timestamp,
    with_ctes,
)
from metricforge.compile.sqlparts import all_of as _and
from metricforge.compile.sqlparts import case as _case
from metricforge.compile.sqlparts import col as _col
from metricforge.compile.sqlparts import lit as _lit
from metricforge.compile.stitch import stitch_stages
from metricforge.spec.model import Kind, MetricDef, Plan, RuleKind, TwoVariantPolicy


@dataclass(frozen=True)
class MetricColumns:
    """Names of a metric's columns in the final result."""

    n: str
    mean_x: str
    var_x: str
    mean_y: str | None = None
    var_y: str | None = None
    cov_xy: str | None = None
    successes: str | None = None  # proportions: the exact count of units with value 1


def result_columns(metric: MetricDef) -> MetricColumns:
    base = metric.name
    if metric.kind is Kind.PROPORTION:
        return MetricColumns(
            f"{base}__n", f"{base}__mean_x", f"{base}__var_x", successes=f"{base}__successes"
        )
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


class _Builder:
    def __init__(self, plan: Plan, dialect: str, ts_bounds: bool = True) -> None:
        self.plan = plan
        self.ts_bounds = ts_bounds
        self.spec = plan.spec
        self.dialect = dialect
        # Aggregates ordered by unit where the engine's float sums depend on row order: in
        # DuckDB inside the unit query (stitching) and in result queries whose rows pass
        # through ranks or windows (quantile metrics). Result queries that read unit_rows
        # straight (moments, bot_events, cuped, history) rely on the engine's unit order.
        self.ordered = dialect == "duckdb"

    # -- stage 1 -------------------------------------------------------------------------
    def first_exposure(self) -> exp.Select:
        x = "x"
        # Exposure rows inside the experiment, exact repeats folded (and counted).
        rows = (
            exp.select(
                _col("unit_id"),
                _col("variant"),
                _col("ts"),
                exp.alias_(exp.Count(this=exp.Star()), "n_rows"),
            )
            .from_("exposures")
            .where(
                _and(
                    _col("experiment").eq(_lit(self.spec.name)),
                    _col("unit_id").is_(exp.null()).not_(),
                    _col("variant").is_(exp.null()).not_(),
                    _col("ts") >= timestamp(self.spec.start),
                    _col("ts") < timestamp(self.spec.end),
                    _col("ts") < timestamp(self.plan.as_of) if self.plan.as_of else None,
                )
            )
            .group_by(_col("unit_id"), _col("variant"), _col("ts"))
        )
        repeats = exp.Sub(
            this=exp.Sum(this=_col("n_rows", x)), expression=exp.Count(this=exp.Star())
        )
        ts, variant = _col("ts", x), _col("variant", x)
        # Each planned variant's first exposure time; the unit's variant is the one it saw
        # first (ties in the spec's order, control first), so a unit seen in two variants is
        # attributed to one of them the same way on every run.
        firsts = [exp.Min(this=_case(variant.eq(_lit(v)), ts)) for v in self.spec.variant_names]
        chosen = exp.Case()
        for name, first in zip(self.spec.variant_names, firsts, strict=True):
            chosen = chosen.when(first.copy().eq(exp.Min(this=ts.copy())), _lit(name))
        select = exp.select(
            exp.alias_(_col("unit_id", x), "unit"),
            exp.alias_(exp.Min(this=ts.copy()), "first_ts"),
            exp.alias_(chosen.else_(exp.Min(this=variant.copy())), "variant"),
            # seen in two variants or more: a MIN/MAX pair, not a DISTINCT count (which DuckDB
            # runs as a grouping and a join of its own)
            exp.alias_(exp.Min(this=variant.copy()) < exp.Max(this=variant.copy()), "two_variants"),
            exp.alias_(exp.cast(repeats, BIGINT), DUPLICATE_EXPOSURES),
        )
        if self.spec.stitch_to:
            select = select.select(
                *[exp.alias_(f, f"first_ts_{i}") for i, f in enumerate(firsts)], copy=False
            )
        return select.from_(exp.alias_(exp.Subquery(this=rows), x, table=True)).group_by(
            _col("unit_id", x)
        )

    # -- stage 2: compile/sessions.py -------------------------------------------------------
    # -- stage 3 -------------------------------------------------------------------------
    def units(self) -> exp.Select:
        """One row per unit: its sessions rolled up, joined to its exposure facts (variant,
        variant count, first exposure, repeated exposure rows). The facts depend on the unit
        alone, so they join the 1-per-unit rollup instead of riding through both groupings."""
        u, f = "u", "f"
        facts = ("variant", "two_variants", "first_ts", DUPLICATE_EXPOSURES)
        rollup = exp.alias_(exp.Subquery(this=self._rollup()), u, table=True)
        return (
            exp.select(
                *[_col(name, f) for name in facts],
                exp.Column(this=exp.Star(), table=exp.to_identifier(u)),
            )
            .from_(rollup)
            .join(
                exp.alias_(exp.to_table("first_exposure"), f, table=True),
                on=_col("unit", u).eq(_col("unit", f)),
            )
        )

    def _rollup(self) -> exp.Select:
        select = exp.select(
            _col("unit"),
            exp.alias_(exp.cast(exp.Sum(this=_col("n_events")), BIGINT), "n_events"),
            exp.alias_(exp.Max(this=_col("n_events")), "max_session_events"),
            exp.alias_(exp.Count(this=_col("session")), "n_sessions"),
        )
        pre = bool(self.plan.pre_period_days)
        earlier = [p for p, _ in periods(self.plan)]
        for period in earlier:
            total = exp.cast(exp.Sum(this=_col(f"n_{period}_events")), BIGINT)
            select = select.select(exp.alias_(total, f"n_{period}_events"))
        if self.spec.stitch_to:
            select = select.select(
                exp.alias_(exp.Min(this=_col("id_min")), "id_min"),
                exp.alias_(exp.Max(this=_col("id_max")), "id_max"),
            )
        for i, rule in enumerate(self.plan.bot_filter.rules):
            if rule.kind in (RuleKind.USER_AGENT, RuleKind.DENY_IP):
                select = select.select(
                    exp.alias_(exp.LogicalOr(this=_col(f"bot_rule_{i}")), f"bot_rule_{i}")
                )
        for column in unit_columns(self.plan):
            select = select.select(exp.alias_(exp.cast(exp.Sum(this=_col(column)), BIGINT), column))
        select = select.select(*merged_keys(self.plan))
        for metric in self.plan.metrics:
            select = select.select(*self._unit_parts(metric, "", "n_events" if pre else None))
            for period in earlier:
                select = select.select(*self._unit_parts(metric, period, f"n_{period}_events"))
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
            parts: list[exp.Expr] = [exp.alias_(_case(count > _lit(0), mean), u)]
            if self.spec.stitch_to:  # merged units need the sum and the count
                total_value = exp.cast(exp.Sum(this=s.copy()), DOUBLE)
                parts += [
                    exp.alias_(total_value, f"sv{period}_{metric.name}"),
                    exp.alias_(count.copy(), f"c{period}_{metric.name}"),
                ]
            return parts
        if metric.kind is Kind.QUANTILE:
            parts = [exp.alias_(exp.cast(total, BIGINT), u)]
            if self.plan.lists_values(period):  # one sorted list per unit (NULL: none)
                lists = sorted_concat(_col(f"l{period}_{metric.name}"))
                parts.append(exp.alias_(lists, f"l{period}_{metric.name}"))
            return parts
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
        if metric.kind is Kind.QUANTILE:  # its number of values; NULL without any
            count = _col(f"u{period}_{metric.name}")
            return _case(count > _lit(0), exp.cast(count.copy(), DOUBLE)), None
        return self._per_unit(metric.name, period), None

    def classified(self) -> exp.Select:
        stitched = bool(self.spec.stitch_to)
        flags: list[exp.Expr] = []
        for i, rule in enumerate(self.plan.bot_filter.rules):
            if rule.kind in (RuleKind.USER_AGENT, RuleKind.DENY_IP):
                # NULL when the unit has no event in its window (or no user agent)
                flags.append(exp.Coalesce(this=_col(f"bot_rule_{i}"), expressions=[exp.false()]))
            elif rule.kind is RuleKind.SESSION_EVENTS:
                flags.append(_col("max_session_events") > _lit(rule.max_events))
            elif rule.kind is RuleKind.DENY_UNIT and stitched:  # decided per cookie, merged
                flags.append(_col(f"bot_rule_{i}").eq(_lit(1)))
            elif rule.kind is RuleKind.DENY_UNIT:
                flags.append(_col("unit").isin(*[_lit(t) for t in rule.tokens]))
        is_bot = exp.paren(exp.or_(*flags)) if flags else exp.false()
        two_variants = _col("two_variants")
        excluded = two_variants if self.spec.two_variant_units is TwoVariantPolicy.EXCLUDE else None
        select = exp.select(
            _col("unit"),
            _col("variant"),
            _col("n_events"),
            exp.alias_(is_bot, "is_bot"),
            exp.alias_(excluded.copy() if excluded is not None else exp.false(), "contaminated"),
            two_variants.copy(),
            _col("first_ts"),
            _col(DUPLICATE_EXPOSURES),
            *[_col(column) for column in unit_columns(self.plan)],
            *unit_values(self.plan),
        )
        if stitched:
            select = select.select(_col("identity"), _col("n_cookies"))
        suffixes = ["", *(p for p, _ in periods(self.plan))]
        if self.plan.pre_period_days:
            select = select.select(exp.alias_(_col("n_pre_events") > _lit(0), "has_pre"))
        if self.plan.history_split:  # whole days from the experiment start to first exposure
            since = exp.Sub(
                this=exp.UnixMillis(this=_col("first_ts")),
                expression=exp.UnixMillis(this=timestamp(self.spec.start)),
            )
            day = exp.Floor(this=exp.Div(this=exp.paren(since), expression=_lit(86_400_000)))
            select = select.select(exp.alias_(exp.cast(day, BIGINT), "first_day"))
        for metric in self.plan.metrics:
            for period in suffixes:
                x, y = self._x_y(metric, period)
                select = select.select(exp.alias_(x, f"x{period}_{metric.name}"))
                if y is not None:
                    select = select.select(exp.alias_(y, f"y{period}_{metric.name}"))
            if metric.kind is Kind.QUANTILE:  # the unit's values of a quantile metric
                for period in suffixes:
                    if self.plan.lists_values(period):
                        values = _col(f"l{period}_{metric.name}")
                        select = select.select(exp.alias_(values, f"v{period}_{metric.name}"))
        return select.from_("stitched" if stitched else "units")

    # -- stage 5 -------------------------------------------------------------------------
    def _agg(self, cls: type[exp.Func], col: str | exp.Expr, other: str | None = None) -> exp.Expr:
        # No ORDER BY inside the moments' aggregates: engines feed the result queries the
        # units in one fixed order (DuckDB: unit_rows read back sorted by unit, queried on
        # one thread), so runs are bit-identical without a sort per aggregate.
        this: exp.Expr = _col(col) if isinstance(col, str) else col
        second = _col(other) if other is not None else None
        return aggregate(cls, this, second, ordered=False)

    def moments(self, segment: str | None = None) -> exp.Select:
        """Per-variant moments of every reported metric; with ``segment`` (a ``[segments]``
        column) per variant and segment value instead, of the analysed units only."""
        keys: list[exp.Expr] = [_col("variant"), _col("is_bot"), _col("contaminated")]
        if segment is not None:
            keys = [_col("variant"), exp.alias_(_col(value_column(segment)), "segment")]
        select = exp.select(
            *keys,
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
            capped_x = capped(_col(x), metric)  # winsorised: x (a ratio's numerator) capped
            select = select.select(
                exp.alias_(exp.Count(this=_col(x)), cols.n),
                exp.alias_(self._agg(exp.Avg, capped_x), cols.mean_x),
                exp.alias_(self._agg(exp.Variance, capped_x.copy()), cols.var_x),
            )
            if cols.successes is not None:  # per-unit 0/1: an integer sum is exact
                # BIGINT (DuckDB's SUM of BIGINT is a 128-bit integer, which the Arrow
                # typing of results would cast, paying for Arrow's compute set-up)
                ones = exp.cast(exp.Sum(this=exp.cast(_col(x), BIGINT)), BIGINT)
                select = select.select(exp.alias_(ones, cols.successes))
            if metric.is_ratio:
                y = f"y_{metric.name}"
                assert cols.mean_y and cols.var_y and cols.cov_xy
                select = select.select(
                    exp.alias_(self._agg(exp.Avg, y), cols.mean_y),
                    exp.alias_(self._agg(exp.Variance, y), cols.var_y),
                    exp.alias_(self._agg(exp.CovarSamp, capped_x.copy(), y), cols.cov_xy),
                )
        source = select.from_(UNIT_TABLE)
        caps = cap_ctes(self.plan, UNIT_TABLE)
        if caps:
            source = source.join(exp.to_table(caps[-1][0]), join_type="cross")
        groups = [k.unalias() for k in keys]
        if segment is not None:
            source = source.where(analysed())
            # NULL (no value) first on every engine, so the rows come in one order
            order = [groups[0], exp.Ordered(this=groups[1].copy(), nulls_first=True)]
            return with_ctes(source.group_by(*groups).order_by(*order), caps)
        return with_ctes(source.group_by(*groups).order_by(*groups), caps)

    def unit_rows(self) -> exp.Select:
        query = self.classified()
        stages = [
            ("first_exposure", self.first_exposure()),
            ("sessions", sessions(self.plan, ts_bounds=self.ts_bounds)),
            ("units", self.units()),
        ]
        if self.spec.stitch_to:
            earlier = [p for p, _ in periods(self.plan)]
            stages += stitch_stages(self.plan, self.ordered, earlier)
        for name, cte in stages:
            query = query.with_(name, as_=cte)
        return query

    def build(self) -> CompiledRun:
        results = (
            ("moments", self.moments()),
            ("data_quality", data_quality_query(self.plan, UNIT_TABLE)),
            *check_results(self.plan),
            *extra_results(self.plan, UNIT_TABLE, ordered=self.ordered),
            *[(result_name(c), self.moments(segment=c)) for c in segment_columns(self.plan)],
        )
        return CompiledRun(unit_rows=self.unit_rows(), results=results)


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


def compile_plan(plan: Plan, dialect: str = "duckdb", *, ts_bounds: bool = True) -> CompiledRun:
    """The statements of a run, as sqlglot trees for ``dialect`` (duckdb or spark)."""
    return _Builder(plan, dialect, ts_bounds).build()


def compile_unit_rows(plan: Plan, dialect: str = "duckdb") -> exp.Select:
    """The run's one scan of the events alone (``CompiledRun.unit_rows``), for commands that
    put their own result queries on it (the A/A replay): the run's results go unbuilt."""
    return _Builder(plan, dialect).unit_rows()


def render(plan: Plan, dialect: str = "duckdb", *, pretty: bool = True) -> str:
    """All statements of a run as SQL text, each headed by a comment with its name."""
    parts = [
        f"-- {name}\n{tree.sql(dialect=dialect, pretty=pretty)};"
        for name, tree in compile_plan(plan, dialect).statements(dialect)
    ]
    return "\n\n".join(parts)
