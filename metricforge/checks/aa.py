"""A/A replay: does every metric's p-value behave under re-randomisation?

One pass over the events: the run's per-unit table is reduced to each reported metric's
moments in 4096 hash buckets of the unit id (the result query ``buckets``). Each replay
then assigns the buckets to the variants by the planned split with a salted hash (the
salt names the experiment, the seed and the replay), merges the bucket moments per variant
and computes every metric's p-value exactly as the scorecard does (Welch / delta method).
Whole buckets move together, but bucket membership is a hash of the unit id, unrelated to
anything measured, so a bucket split is a valid random split of the units.

``--period pre`` replays the units' pre-period (the spec's ``pre_period_days``, or as many
days as the analysis window when it sets none), where no treatment acted; ``experiment``
replays the experiment period itself (any real effect is spread over both arms).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from enum import StrEnum
from typing import Any

import numpy as np
import pyarrow as pa

from metricforge.compile.checks import BUCKET_DIGITS, bucket_moments
from metricforge.compile.query import CompiledRun, compile_plan
from metricforge.engines.base import Engine
from metricforge.errors import StatsError
from metricforge.runner import gather_inputs
from metricforge.spec.model import Plan
from metricforge.stats.calibration import Calibration, calibration
from metricforge.stats.replay import (
    BucketMoments,
    BucketSplitter,
    assign,
    bucket_hashes,
    p_values,
)

N_BUCKETS = 16**BUCKET_DIGITS
CHUNK = 256  # replays per block: bounds memory at CHUNK × buckets numbers per array


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
    return dataclasses.replace(plan, pre_period_days=days)


def compiled_replay(plan: Plan, period: Period, dialect: str) -> CompiledRun:
    """The run's one scan of the events, then only the bucket moments."""
    prefix = "pre" if period is Period.PRE else ""
    # Unordered: ordering ~40 aggregates by unit inside 4,096 groups would cost more than
    # all the replays; a bucket's few floats may then add up in another order, so figures
    # can differ in their last bits between runs (see ReplayReport.as_json).
    query = bucket_moments(plan, prefix, ordered=False)
    return CompiledRun(
        unit_rows=compile_plan(plan, dialect).unit_rows, results=(("buckets", query),)
    )


def bucket_arrays(plan: Plan, table: pa.Table) -> tuple[dict[str, BucketMoments], int]:
    """Every reported metric's moments as arrays over all buckets (empty ones zero)."""
    index = np.asarray(table.column("bucket").to_pylist(), dtype=np.int64)

    def full(name: str) -> np.ndarray[Any, np.dtype[np.float64]]:
        out = np.zeros(N_BUCKETS)
        values = [v if v is not None else 0.0 for v in table.column(name).to_pylist()]
        out[index] = np.asarray(values, dtype=np.float64)
        return out

    metrics = {}
    for name, _role in plan.reported:
        ratio = plan.metric(name).is_ratio
        metrics[name] = BucketMoments(
            n=full(f"{name}__n"),
            mean_x=full(f"{name}__mean_x"),
            m2_x=full(f"{name}__m2_x"),
            mean_y=full(f"{name}__mean_y") if ratio else None,
            m2_y=full(f"{name}__m2_y") if ratio else None,
            c_xy=full(f"{name}__c_xy") if ratio else None,
        )
    return metrics, int(sum(table.column("n_units").to_pylist()))


def replay(
    plan: Plan,
    buckets: dict[str, BucketMoments],
    *,
    replays: int,
    seed: int,
    independent_events: frozenset[str] = frozenset(),
) -> dict[str, dict[str, Calibration]]:
    """Per metric and treatment variant, the calibration of its p-values over ``replays``.

    ``independent_events`` names ratio metrics to analyse with a deliberately wrong
    variance, as if their denominator events were independent: a test-only switch that
    shows the replay catches a broken variance.
    """
    spec = plan.spec
    if replays < 2:
        raise StatsError("needs at least two replays")
    salt = f"metricforge-aa|{spec.name}|{seed}"
    shares = [s for _, s in spec.variants]
    names = list(buckets)
    splitter = BucketSplitter(buckets)
    p: dict[str, dict[str, list[np.ndarray[Any, Any]]]] = {
        m: {v: [] for v in spec.variant_names[1:]} for m in names
    }
    for first in range(0, replays, CHUNK):
        count = min(CHUNK, replays - first)
        arms = assign(bucket_hashes(salt, first, count, N_BUCKETS), shares)
        arms_moments = splitter.split(arms, len(shares))
        for name in names:
            per_variant = arms_moments[name]
            for k, variant in enumerate(spec.variant_names[1:], start=1):
                p[name][variant].append(
                    p_values(
                        per_variant[k],
                        per_variant[0],
                        independent_events=name in independent_events,
                    )
                )
    return {
        name: {v: calibration(np.concatenate(chunks), spec.alpha) for v, chunks in by.items()}
        for name, by in p.items()
    }


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
    table = engine.run(compiled_replay(scan_plan, period, engine.dialect), inputs)["buckets"]
    if table.num_rows == 0:
        raise StatsError(f"experiment '{plan.spec.name}' has no analysed units to replay")
    buckets, units = bucket_arrays(plan, table)
    results = replay(
        plan, buckets, replays=replays, seed=seed, independent_events=independent_events
    )
    rows = []
    for name, role in plan.reported:
        for variant, cal in results[name].items():
            rows.append(
                {
                    "metric": name,
                    "role": role.value,
                    "variant": variant,
                    **dataclasses.asdict(cal),
                    "verdict": cal.verdict.value,
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
    )
