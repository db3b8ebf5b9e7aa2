"""A/A replay: does every metric's p-value behave under re-randomisation?

One pass over the events: the run's per-unit table is reduced to each reported metric's
moments in 4096 hash buckets of the unit id (the result query ``buckets``). Each replay
then assigns the buckets to the variants by the planned split with a salted hash (the
salt names the experiment, the seed and the replay), merges the bucket moments per variant
and computes every metric's p-value with the scorecard's own functions: ``compare_batch``
with the metric's hypothesis (two-sided; a guardrail's one-sided harm or non-inferiority
test with its margin), proportions by z or Fisher, winsorised metrics capped at the cap of
the replayed period's pooled values (a cap does not depend on the split), and with CUPED
the adjusted statistic (``cuped_batch``). Whole buckets move together, but bucket
membership is a hash of the unit id, unrelated to anything measured, so a bucket split is
a valid random split of the units.

``--period pre`` replays the units' pre-period (the spec's ``pre_period_days``, or as many
days as the analysis window when it sets none), where no treatment acted; ``experiment``
replays the experiment period itself (any real effect is spread over both arms). CUPED
metrics are replayed adjusted in the experiment period; in the pre-period, which has no
earlier period to adjust by, they are replayed unadjusted (the report says so).

A quantile metric is not a merge of per-unit moments: its buckets keep instead the exact
values in a wide window about the pooled quantile (``compile.replay_quantiles``), from
which each replay rebuilds every variant's quantile, outer band and p-value
(``stats.replay_quantiles``).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from dataclasses import dataclass, field
from enum import StrEnum
from typing import Any

import numpy as np
import pyarrow as pa

from metricforge.compile.checks import (
    BUCKET_DIGITS,
    bucket_column,
    bucket_moments,
    replay_scope,
    replay_variables,
    replayable,
)
from metricforge.compile.extras import reported
from metricforge.compile.query import CompiledRun, compile_unit_rows
from metricforge.compile.replay_quantiles import quantile_replay, quantile_replay_name
from metricforge.data_errors import run_naming_failures
from metricforge.engines.base import Engine
from metricforge.errors import StatsError
from metricforge.report.inference import hypothesis
from metricforge.runner import gather_inputs
from metricforge.spec.model import Kind, Plan
from metricforge.stats.calibration import Calibration, calibration
from metricforge.stats.cuped import PER_UNIT, RATIO
from metricforge.stats.quantiles import METHOD as QUANTILE_METHOD
from metricforge.stats.replay import (
    BucketMoments,
    BucketSplitter,
    assign,
    bucket_hashes,
    p_values,
)
from metricforge.stats.replay_quantiles import QuantileBuckets, quantile_p_values

N_BUCKETS = 16**BUCKET_DIGITS
CHUNK = 256  # replays per block: bounds memory at CHUNK × buckets numbers per array
# A non-inferiority test's H0 ("worse by the margin or more") is false in an A/A: its share
# of p < alpha is its power to show non-inferiority, not a false-positive rate.
NOT_JUDGED = "not judged: non-inferiority, its H0 is false in an A/A (the share is its power)"


class Period(StrEnum):
    PRE = "pre"
    EXPERIMENT = "experiment"


@dataclass(frozen=True)
class ReplayReport:
    experiment: str
    period: Period
    period_days: int
    replays: int
    seed: int
    units: int
    buckets: int  # buckets holding at least one analysed unit
    alpha: float
    rows: list[dict[str, Any]] = field(default_factory=list)  # one per metric and variant
    skipped: list[dict[str, str]] = field(default_factory=list)  # metric, role, reason
    notes: list[str] = field(default_factory=list)  # how the replay's statistics were chosen

    def as_json(self) -> dict[str, Any]:
        """The report, floats to 10 significant digits: the unordered bucket sums may
        differ in the last bits between runs, the rounded figures do not."""

        def rounded(value: Any) -> Any:
            if isinstance(value, float):
                return float(f"{value:.10g}")
            if isinstance(value, dict):
                return {k: rounded(v) for k, v in value.items()}
            if isinstance(value, list):
                return [rounded(v) for v in value]
            return value

        return {k: rounded(v) for k, v in dataclasses.asdict(self).items()}


def replay_plan(plan: Plan, period: Period) -> Plan:
    """The plan whose scan yields the columns the replay reads."""
    if period is Period.EXPERIMENT:
        return plan
    days = plan.spec.pre_period_days or plan.spec.window_days
    lists = any(m.kind is Kind.QUANTILE for m in reported(plan))
    return dataclasses.replace(plan, pre_period_days=days, pre_values=lists)


def compiled_replay(plan: Plan, period: Period, dialect: str) -> CompiledRun:
    """The run's one scan of the events, then only the bucket moments."""
    # Unordered: ordering ~40 aggregates by unit inside 4,096 groups would cost more than
    # all the replays; a bucket's few floats may then add up in another order, so figures
    # can differ in their last bits between runs (see ReplayReport.as_json).
    query = bucket_moments(plan, _prefix(period), ordered=False)
    quantiles = [
        (quantile_replay_name(m), quantile_replay(plan, m, _prefix(period)))
        for m in reported(plan)
        if m.kind is Kind.QUANTILE
    ]
    return CompiledRun(
        unit_rows=compile_unit_rows(plan, dialect), results=(("buckets", query), *quantiles)
    )


def _prefix(period: Period) -> str:
    return "pre" if period is Period.PRE else ""


def bucket_arrays(
    plan: Plan, table: pa.Table, period: Period
) -> tuple[dict[str, BucketMoments], int]:
    """Every replayable metric's moments as arrays over all buckets (empty ones zero)."""
    index = np.asarray(table.column("bucket").to_pylist(), dtype=np.int64)

    def full(name: str) -> np.ndarray[Any, np.dtype[np.float64]]:
        out = np.zeros(N_BUCKETS)
        values = [v if v is not None else 0.0 for v in table.column(name).to_pylist()]
        out[index] = np.asarray(values, dtype=np.float64)
        return out

    scope = replay_scope(plan, _prefix(period))
    metrics = {}
    for metric in replayable(plan):
        names = tuple(a for a, _ in replay_variables(scope, metric))
        k = len(names)
        m2 = np.zeros((N_BUCKETS, k, k))
        for i in range(k):
            for j in range(i, k):
                m2[:, i, j] = m2[:, j, i] = full(bucket_column(metric, "m2", names[i], names[j]))
        metrics[metric.name] = BucketMoments(
            names=names,
            n=full(bucket_column(metric, "n", "")),
            mean=np.column_stack([full(bucket_column(metric, "mean", a)) for a in names]),
            m2=m2,
        )
    return metrics, int(sum(table.column("n_units").to_pylist()))


def quantile_arrays(plan: Plan, tables: dict[str, pa.Table]) -> dict[str, QuantileBuckets]:
    """Every quantile metric's window of values per bucket (``qreplay_<metric>``)."""
    return {
        m.name: QuantileBuckets.of(tables[quantile_replay_name(m)].to_pydict(), N_BUCKETS)
        for m in reported(plan)
        if m.kind is Kind.QUANTILE
    }


def replay_p_values(
    plan: Plan,
    splitter: BucketSplitter,
    first: int,
    count: int,
    *,
    seed: int,
    independent_events: frozenset[str] = frozenset(),
    quantiles: Mapping[str, QuantileBuckets] | None = None,
) -> dict[str, dict[str, np.ndarray[Any, np.dtype[np.float64]]]]:
    """Per metric and treatment variant, the p-values of replays first..first+count-1,
    each as the scorecard computes it for that split (``stats.replay.p_values``; quantile
    metrics: ``stats.replay_quantiles.quantile_p_values``)."""
    spec = plan.spec
    salt = f"metricforge-aa|{spec.name}|{seed}"
    shares = [s for _, s in spec.variants]
    arms = assign(bucket_hashes(salt, first, count, N_BUCKETS), shares)
    arms_moments = splitter.split(arms, len(shares))
    margins = dict(spec.guardrail_margins)
    roles = dict(plan.reported)
    out = {}
    for name, per_variant in arms_moments.items():
        metric = plan.metric(name)
        side, _ = hypothesis(metric, roles[name], margins.get(name))
        p = p_values(
            per_variant,
            proportion=metric.kind is Kind.PROPORTION,
            alpha=spec.alpha,
            side=side,
            margin=margins.get(name),
            independent_events=name in independent_events,
        )
        out[name] = dict(zip(spec.variant_names[1:], p, strict=True))
    for name, window in (quantiles or {}).items():
        metric = plan.metric(name)
        side, _ = hypothesis(metric, roles[name], margins.get(name))
        assert metric.q is not None
        p = quantile_p_values(
            window,
            arms,
            len(shares),
            q=metric.q,
            alpha=spec.alpha,
            side=side,
            margin=margins.get(name),
        )
        out[name] = dict(zip(spec.variant_names[1:], p, strict=True))
    return out


def replay(
    plan: Plan,
    buckets: dict[str, BucketMoments],
    *,
    replays: int,
    seed: int,
    independent_events: frozenset[str] = frozenset(),
    quantiles: Mapping[str, QuantileBuckets] | None = None,
) -> dict[str, dict[str, Calibration]]:
    """Per metric and treatment variant, the calibration of its p-values over ``replays``.

    ``independent_events`` names ratio metrics to analyse with a deliberately wrong
    variance, as if their denominator events were independent: a test-only switch that
    shows the replay catches a broken variance (unadjusted ratios only).
    """
    if replays < 2:
        raise StatsError("needs at least two replays")
    splitter = BucketSplitter(buckets)
    treatments = plan.spec.variant_names[1:]
    p: dict[str, dict[str, list[np.ndarray[Any, Any]]]] = {
        m: {v: [] for v in treatments} for m in [*buckets, *(quantiles or {})]
    }
    for first in range(0, replays, CHUNK):
        count = min(CHUNK, replays - first)
        found = replay_p_values(
            plan,
            splitter,
            first,
            count,
            seed=seed,
            independent_events=independent_events,
            quantiles=quantiles,
        )
        for name, by_variant in found.items():
            for variant, values in by_variant.items():
                p[name][variant].append(values)
    out: dict[str, dict[str, Calibration]] = {}
    for name, by in p.items():
        gathered = {v: np.concatenate(chunks) for v, chunks in by.items()}
        if any(np.isfinite(values).sum() < 2 for values in gathered.values()):
            continue  # e.g. a quantile's window missed in (nearly) every replay: reported
        out[name] = {v: calibration(values, plan.spec.alpha) for v, values in gathered.items()}
    return out


def notes(plan: Plan, period: Period) -> list[str]:
    """One sentence per choice the replay made to match the scorecard."""
    spec, out = plan.spec, []
    if spec.guardrails:
        out.append(
            "guardrails are tested one-sided as in the scorecard: a calibrated harm test"
            " also has p < alpha in about alpha of the replays; a non-inferiority test (a"
            " guardrail with a margin) is not judged, since the treatment equals the control"
            " in an A/A and is therefore never worse by the margin"
        )
    if spec.cuped and period is Period.PRE:
        out.append(
            "CUPED: the pre-period has no earlier period to adjust by, so its metrics are"
            " replayed unadjusted: this checks the unadjusted variance (--period experiment"
            " replays the adjusted statistic)"
        )
    elif spec.cuped and plan.pre_period_days > 0:
        out.append(
            "CUPED: metrics are replayed adjusted by their pre-period values, as the"
            " scorecard computes them"
        )
    if any(m.winsorise is not None for m in replayable(plan)):
        out.append(
            "winsorised metrics are capped at the quantile of the replayed period's pooled"
            " per-unit values, as the scorecard caps them (the cap does not depend on the"
            " split)"
        )
    if any(m.kind is Kind.QUANTILE for m in reported(plan)):
        out.append(
            "quantile metrics are replayed from their exact values in a wide window about the"
            " pooled quantile, as the scorecard tests them (outer interval, clustered by"
            " unit); a replay whose quantiles fall outside the window has no p-value and is"
            " not counted in the row's replays"
        )
    return out


def statistic(names: tuple[str, ...]) -> str:
    """What a replay of a metric with these variables tests: adjusted or not."""
    return "cuped-adjusted" if names in (PER_UNIT, RATIO) else "unadjusted"


def run_aa(
    plan: Plan,
    engine: Engine,
    *,
    replays: int = 1000,
    period: Period = Period.PRE,
    seed: int = 1,
    independent_events: frozenset[str] = frozenset(),
) -> ReplayReport:
    """Scan once, reduce to bucket moments, replay: the ``metricforge aa`` command."""
    scan_plan = replay_plan(plan, period)
    inputs, _ = gather_inputs(scan_plan)
    compiled = compiled_replay(scan_plan, period, engine.dialect)
    tables = run_naming_failures(scan_plan, engine, compiled, inputs)
    table = tables["buckets"]
    if table.num_rows == 0:
        raise StatsError(f"experiment '{plan.spec.name}' has no analysed units to replay")
    buckets, units = bucket_arrays(plan, table, period)
    quantiles = quantile_arrays(plan, tables)
    results = replay(
        plan,
        buckets,
        replays=replays,
        seed=seed,
        independent_events=independent_events,
        quantiles=quantiles,
    )
    rows, skipped = [], []
    margins = dict(plan.spec.guardrail_margins)
    for name, role in plan.reported:
        if name not in results:
            reason = "no verdict: fewer than two replays gave it a p-value"
            if name in quantiles:
                reason += (
                    " (its quantiles fell outside the window of values kept about the"
                    " pooled quantile)"
                )
            skipped.append({"metric": name, "role": role.value, "reason": reason})
            continue
        margin = margins.get(name)
        _, tested = hypothesis(plan.metric(name), role, margin)
        for variant, cal in results[name].items():
            rows.append(
                {
                    "metric": name,
                    "role": role.value,
                    "variant": variant,
                    "hypothesis": tested,
                    "margin": margin,
                    "statistic": QUANTILE_METHOD
                    if name in quantiles
                    else statistic(buckets[name].names),
                    **dataclasses.asdict(cal),
                    "verdict": cal.verdict.value if margin is None else NOT_JUDGED,
                }
            )
    return ReplayReport(
        experiment=plan.spec.name,
        period=period,
        period_days=scan_plan.pre_period_days if period is Period.PRE else plan.spec.window_days,
        replays=replays,
        seed=seed,
        units=units,
        buckets=table.num_rows,
        alpha=plan.spec.alpha,
        rows=rows,
        skipped=skipped,
        notes=notes(plan, period),
    )
