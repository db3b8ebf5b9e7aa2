"""A/A replay of a quantile metric (page_latency_p95): the window of values and the rebuilt
test, against numpy on the units' own value lists.

References: numpy's quantile with its default linear interpolation (the rule the scorecard
states), on the demo's units and on invented units with many ties (a property check, not a
check value); the outer interval of ``stats.quantiles`` is itself checked against numpy and
scipy in ``test_quantile_metric.py``. The scorecard equality of a replayed split, in the
experiment period, is in ``test_aa_split.py``.
"""

from __future__ import annotations

import dataclasses
import hashlib

import duckdb
import numpy as np
import polars as pl
import pyarrow as pa
import pytest
from scipy.stats import binom

import metricforge.compile.replay_quantiles as replay_window
from metricforge.checks.aa import (
    N_BUCKETS,
    Period,
    compiled_replay,
    quantile_arrays,
    replay_plan,
    run_aa,
)
from metricforge.compile.replay_quantiles import quantile_replay
from metricforge.engines.duckdb import DuckDBEngine
from metricforge.runner import gather_inputs
from metricforge.spec import load_plan
from metricforge.spec.model import Plan
from metricforge.stats.moments import Moments
from metricforge.stats.quantiles import QuantileSummary, quantile_compare, rank_band
from metricforge.stats.replay import assign, bucket_hashes
from metricforge.stats.replay_quantiles import QuantileBuckets, quantile_p_values
from tests.conftest import PIPELINES
from tests.test_pre_period import unit_rows

Q = 0.95  # metric_defs: page_latency_p95
METRIC = "page_latency_p95"


@pytest.fixture(scope="module")
def pre_scan() -> tuple[Plan, Plan, pl.DataFrame]:
    """homepage_aa, its pre-period replay plan and that plan's analysed unit rows."""
    plan = load_plan(PIPELINES / "homepage_aa.toml")
    scan = replay_plan(plan, Period.PRE)
    rows = unit_rows(scan).filter(~pl.col("is_bot") & ~pl.col("contaminated"))
    return plan, scan, rows


def test_pre_period_lists_hold_each_units_pre_period_values(
    pre_scan: tuple[Plan, Plan, pl.DataFrame],
) -> None:
    """The replay plan lists the pre-period values: as many as the unit's pre-period count
    (``xpre_``), sorted; the experiment period's lists are those of a plain run."""
    plan, scan, rows = pre_scan
    assert scan.pre_values and not plan.pre_values
    counts = rows["xpre_page_latency_p95"].fill_null(0).to_list()
    lists = rows["vpre_page_latency_p95"].to_list()
    assert sum(counts) > 10_000
    for count, values in zip(counts, lists, strict=True):
        values = values or []
        assert len(values) == count
        assert values == sorted(values)
    plain = unit_rows(plan).filter(~pl.col("is_bot") & ~pl.col("contaminated"))
    assert plain["v_page_latency_p95"].to_list() == rows["v_page_latency_p95"].to_list()


def numpy_summary(lists: list[np.ndarray], alpha: float) -> QuantileSummary:
    """A variant's quantile, S/M moments, outer band and band values, by numpy."""
    values = np.concatenate(lists)
    point = float(np.quantile(values, Q))
    s = np.array([np.sum(v <= point) for v in lists], dtype=float)
    m = np.array([len(v) for v in lists], dtype=float)
    below = Moments(
        len(lists), s.mean(), m.mean(), s.var(ddof=1), m.var(ddof=1), np.cov(s, m)[0, 1]
    )
    low, high = rank_band(below, Q, alpha)
    return QuantileSummary(
        point,
        len(values),
        below,
        low,
        high,
        float(np.quantile(values, low)),
        float(np.quantile(values, high)),
    )


@pytest.mark.parametrize("replay", [0, 7, 311])
def test_replayed_p_value_equals_numpy_on_the_split_units(
    pre_scan: tuple[Plan, Plan, pl.DataFrame], replay: int
) -> None:
    """Each unit goes to the variant of its MD5 bucket in that replay; numpy computes the
    two variants' quantile summaries from the units' pre-period lists and the one-sided
    harm test (a guardrail: higher is worse) from them."""
    plan, scan, rows = pre_scan
    inputs, _ = gather_inputs(scan)
    tables = DuckDBEngine().run(compiled_replay(scan, Period.PRE, "duckdb"), inputs)
    window = quantile_arrays(plan, tables)[METRIC]
    arms = assign(bucket_hashes("any salt", replay, 1, N_BUCKETS), [0.5, 0.5])
    [replayed] = quantile_p_values(window, arms, 2, q=Q, alpha=plan.spec.alpha, side=1)

    by_arm: list[list[np.ndarray]] = [[], []]
    for unit, values in zip(
        rows["unit"].to_list(), rows["vpre_page_latency_p95"].to_list(), strict=True
    ):
        if values:
            bucket = int(hashlib.md5(unit.encode()).hexdigest()[:3], 16)
            by_arm[int(arms[0, bucket])].append(np.asarray(values))
    control, treatment = (numpy_summary(lists, plan.spec.alpha) for lists in by_arm)
    expected = quantile_compare(treatment, control, q=Q, alpha=plan.spec.alpha, side=1)
    assert replayed[0] == pytest.approx(expected.p_value, rel=1e-9, abs=1e-12)


def test_the_window_holds_the_values_a_replay_reads(
    pre_scan: tuple[Plan, Plan, pl.DataFrame],
) -> None:
    """The window lies about the pooled quantile, its counts add up to the values there,
    and no replay of 200 reads outside it."""
    plan, scan, rows = pre_scan
    inputs, _ = gather_inputs(scan)
    tables = DuckDBEngine().run(compiled_replay(scan, Period.PRE, "duckdb"), inputs)
    window = quantile_arrays(plan, tables)[METRIC]
    pooled = np.concatenate([np.asarray(v) for v in rows["vpre_page_latency_p95"].to_list() if v])
    assert window.values[0] < np.quantile(pooled, Q) < window.values[-1]
    inside = (pooled >= window.values[0]) & (pooled <= window.values[-1])
    assert window.cells[0].sum() == inside.sum()
    assert window.base[:, 1].sum() == len(pooled)  # Σ M
    assert window.base[:, 3].sum() == (pooled < window.values[0]).sum()  # Σ L
    arms = assign(bucket_hashes("any salt", 0, 200, N_BUCKETS), [0.5, 0.5])
    [p] = quantile_p_values(window, arms, 2, q=Q, alpha=plan.spec.alpha, side=1)
    assert np.isfinite(p).all()


def test_a_window_too_narrow_leaves_the_metric_out_with_its_reason(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """No slack: the window is the pooled quantile alone, every replay's band reaches out
    of it, no replay has a p-value, and the report says so instead of a verdict."""
    monkeypatch.setattr(replay_window, "SLACK", -replay_window.two_sided_z(0.05))
    plan = load_plan(PIPELINES / "homepage_aa.toml")
    report = run_aa(plan, DuckDBEngine(), replays=20, period=Period.PRE)
    assert [s["metric"] for s in report.skipped] == [METRIC]
    assert "fewer than two replays" in report.skipped[0]["reason"]
    assert METRIC not in {r["metric"] for r in report.rows}


# ----------------------------------------------------------- a hand-built table of units


def three_arm_plan(shares: tuple[int, ...]) -> Plan:
    """homepage_aa's p95 guardrail with the variants v0 (control), v1, ... in ``shares``."""
    plan = load_plan(PIPELINES / "homepage_aa.toml")
    variants = tuple((f"v{i}", float(s)) for i, s in enumerate(shares))
    return dataclasses.replace(plan, spec=dataclasses.replace(plan.spec, variants=variants))


def tied_units(seed: int) -> pa.Table:
    """Invented units for a property test: rounded values (many ties, also within a unit),
    units without values, a NULL value inside a list, bots."""
    rng = np.random.default_rng(seed)
    units, lists, bots = [], [], []
    for i in range(3000):
        values: list[float | None] | None = None
        if rng.random() > 0.05:
            scale = rng.lognormal(0.0, 0.5)
            drawn = np.round(rng.lognormal(3.0, 0.6, int(rng.integers(1, 15))) * scale)
            values = sorted(drawn.tolist())
            if rng.random() < 0.05:
                values = [*values, None]
        units.append(f"unit-{seed}-{i}")
        lists.append(values)
        bots.append(bool(rng.random() < 0.02))
    return pa.table(
        {
            "unit": units,
            "is_bot": bots,
            "contaminated": [False] * len(units),
            f"v_{METRIC}": pa.array(lists, type=pa.list_(pa.float64())),
        }
    )


def window_of(plan: Plan, units: pa.Table) -> QuantileBuckets:
    """The query ``qreplay_<metric>`` run over ``units`` as ``unit_rows``."""
    sql = quantile_replay(plan, plan.metric(METRIC), "").sql(dialect="duckdb")
    with duckdb.connect() as con:
        con.register("unit_rows", units)
        rows = con.sql(sql).to_arrow_table().to_pydict()
    return QuantileBuckets.of(rows, N_BUCKETS)


def numpy_p_values(
    plan: Plan, units: pa.Table, arms: np.ndarray, side: int, margin: float | None
) -> list[float]:
    """Each treatment's p-value against v0 when every analysed unit with values goes to
    the variant of its MD5 bucket, by numpy on the units' lists."""
    alpha = plan.spec.alpha
    by_arm: list[list[np.ndarray]] = [[] for _ in plan.spec.variants]
    for unit, bot, values in zip(*(units.column(i).to_pylist() for i in (0, 1, 3)), strict=True):
        kept = [v for v in values or [] if v is not None]
        if bot or not kept:
            continue
        by_arm[int(arms[int(hashlib.md5(unit.encode()).hexdigest()[:3], 16)])].append(
            np.asarray(kept)
        )
    control, *treatments = (numpy_summary(lists, alpha) for lists in by_arm)
    return [
        quantile_compare(t, control, q=Q, alpha=alpha, side=side, margin=margin).p_value
        for t in treatments
    ]


@pytest.mark.parametrize(
    ("seed", "shares", "side", "margin"),
    [(1, (50, 50), 0, None), (2, (20, 40, 40), 1, None), (3, (34, 33, 33), 1, 0.05)],
)
def test_replay_with_ties_and_three_variants_equals_numpy(
    seed: int, shares: tuple[int, ...], side: int, margin: float | None
) -> None:
    plan = three_arm_plan(shares)
    units = tied_units(seed)
    window = window_of(plan, units)
    assert window.cells[0].max() > 1  # a value repeated within a unit: the c > 1 steps
    arms = assign(bucket_hashes("salt", 0, 6, N_BUCKETS), list(shares))
    replayed = quantile_p_values(
        window, arms, len(shares), q=Q, alpha=plan.spec.alpha, side=side, margin=margin
    )
    for r in range(len(arms)):
        expected = numpy_p_values(plan, units, arms[r], side, margin)
        got = [float(p[r]) for p in replayed]
        assert got == pytest.approx(expected, rel=1e-9, abs=1e-12)


def test_a_narrow_window_gives_no_p_value_only_where_it_misses(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """A window a little narrower than the bands: some replays miss it and get NaN, every
    other replay's p-value is still exact."""
    monkeypatch.setattr(replay_window, "SLACK", 0.6)
    plan = three_arm_plan((50, 50))
    units = tied_units(4)
    window = window_of(plan, units)
    arms = assign(bucket_hashes("salt", 0, 40, N_BUCKETS), [50, 50])
    [replayed] = quantile_p_values(window, arms, 2, q=Q, alpha=plan.spec.alpha, side=1)
    missed = np.isnan(replayed)
    assert 0 < missed.sum() < len(arms)
    for r in np.flatnonzero(~missed):
        [expected] = numpy_p_values(plan, units, arms[r], 1, None)
        assert replayed[r] == pytest.approx(expected, rel=1e-9, abs=1e-12)


@pytest.mark.slow
def test_over_populations_resampled_from_the_demos_units_the_p95_test_is_calibrated(
    pre_scan: tuple[Plan, Plan, pl.DataFrame],
) -> None:
    """Common practice: about alpha of A/A comparisons are significant. Each run resamples
    homepage_aa's pre-period units with replacement into a new population and splits it
    in two at random, so this judges the one-sided p95 test over populations, where the
    replay of the demo (one fixed population) calls it "too many" (README, "A/A replay").
    Measured at 4,000 runs: 5.2%."""
    plan, _, rows = pre_scan
    lists = [np.asarray(v) for v in rows["vpre_page_latency_p95"].to_list() if v]
    runs, alpha = 1000, plan.spec.alpha
    rng = np.random.default_rng(20261203)
    hits = 0
    for _ in range(runs):
        population = rng.integers(0, len(lists), len(lists))
        half = rng.random(len(lists)) < 0.5
        t, c = (numpy_summary([lists[i] for i in population[k]], alpha) for k in (half, ~half))
        hits += quantile_compare(t, c, q=Q, alpha=alpha, side=1).p_value < alpha
    low, high = (float(b) / runs for b in binom.ppf([0.005, 0.995], runs, alpha))
    assert low <= hits / runs <= high
