"""Planning from the pre-period: the split history in the one scan, and the sizes.

References: an independent polars computation of each unit's halves of the pre-period
and of its first-exposure day; the sizes recomputed with statsmodels NormalIndPower from
moments that polars computes from the per-unit table.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from statsmodels.stats.power import NormalIndPower
from typer.testing import CliRunner

from metricforge import planning
from metricforge.cli import app
from metricforge.engines.duckdb import DuckDBEngine
from metricforge.errors import SpecError
from metricforge.spec import load_plan
from metricforge.spec.model import Plan
from tests.conftest import PIPELINES, SAMPLE
from tests.test_pre_period import first_exposures, unit_rows

START, END = dt.datetime(2026, 9, 15), dt.datetime(2026, 9, 29)
DAYS = 14


@pytest.fixture(scope="module")
def history() -> Plan:
    return planning.history_plan(load_plan(PIPELINES / "checkout_layout.toml"), DAYS)


@pytest.fixture(scope="module")
def rows(history: Plan) -> pl.DataFrame:
    return unit_rows(history)


@pytest.fixture(scope="module")
def report(history: Plan) -> planning.PlanReport:
    return planning.estimate(history, DuckDBEngine(), mde=0.05, days=10)


def test_halves_and_first_day_match_independent_computation(rows: pl.DataFrame) -> None:
    exposures = first_exposures()
    events = pl.read_parquet(SAMPLE / "events" / "**" / "*.parquet", hive_partitioning=False)
    middle = pl.col("first_ts") - dt.timedelta(days=DAYS / 2)
    pre = events.join(exposures, left_on="cookie_id", right_on="unit_id").filter(
        (pl.col("ts") < pl.col("first_ts"))
        & (pl.col("ts") >= pl.col("first_ts") - dt.timedelta(days=DAYS))
    )
    early, buy, click = (
        pl.col("ts") < middle,
        pl.col("event") == "purchase",
        pl.col("event") == "click",
    )
    halves = pre.group_by("cookie_id").agg(
        pl.col("value").filter(buy & early).sum().alias("rev1"),
        pl.col("value").filter(buy & ~early).sum().alias("rev2"),
        (click & early).sum().alias("clicks1"),
        (click & ~early).sum().alias("clicks2"),
    )
    expected = (
        exposures.join(halves, left_on="unit_id", right_on="cookie_id", how="left")
        .fill_null(0)
        .with_columns(
            ((pl.col("first_ts") - START).dt.total_milliseconds() // 86_400_000).alias("day")
        )
        .sort("unit_id")
    )
    assert rows["unit"].to_list() == expected["unit_id"].to_list()
    for ours, theirs in (("xpre1_revenue", "rev1"), ("xpre2_revenue", "rev2")):
        assert rows[ours].to_list() == pytest.approx(
            expected[theirs].to_list(), rel=1e-12, abs=1e-9
        )
    assert rows["xpre1_click_through"].to_list() == expected["clicks1"].cast(float).to_list()
    assert rows["xpre2_click_through"].to_list() == expected["clicks2"].cast(float).to_list()
    assert rows["first_day"].to_list() == expected["day"].to_list()
    assert expected["rev1"].sum() > 0 and expected["rev2"].sum() > 0


def test_halves_add_up_to_the_pre_period(rows: pl.DataFrame) -> None:
    """For every additive per-unit metric the halves sum to the whole pre-period."""
    for name in ("revenue", "purchases", "unsubscribes", "net_value", "click_through"):
        whole = rows[f"xpre_{name}"].to_numpy()
        assert rows[f"xpre1_{name}"].to_numpy() + rows[f"xpre2_{name}"].to_numpy() == (
            pytest.approx(whole, rel=1e-12, abs=1e-9)
        )
    parts = rows["ypre1_session_success"].to_numpy() + rows["ypre2_session_success"].to_numpy()
    assert (parts >= rows["ypre_session_success"].to_numpy()).all()  # a session may span both


def test_experiment_columns_unchanged_by_the_split(rows: pl.DataFrame) -> None:
    plain = unit_rows(
        dataclasses.replace(load_plan(PIPELINES / "checkout_layout.toml"), pre_period_days=DAYS)
    )
    for column in plain.columns:
        assert rows[column].equals(plain[column]), column


def _analysed(rows: pl.DataFrame) -> pl.DataFrame:
    return rows.filter(~pl.col("is_bot") & ~pl.col("contaminated"))


@pytest.mark.parametrize("metric", ["revenue", "buyer_share", "page_latency"])
def test_sizes_recomputed_from_the_unit_table(
    metric: str, rows: pl.DataFrame, report: planning.PlanReport
) -> None:
    """Baseline, sd and ρ from polars over the per-unit table; units and the MDE from
    statsmodels NormalIndPower (REFERENCES.md)."""
    units = _analysed(rows)
    plan = next(m for m in report.metrics if m.metric == metric)
    x = units[f"xpre_{metric}"].drop_nulls().to_numpy()
    assert plan.baseline == pytest.approx(x.mean(), rel=1e-10)
    assert plan.sd == pytest.approx(x.std(ddof=1), rel=1e-10)
    both = units.select(f"xpre1_{metric}", f"xpre2_{metric}").drop_nulls().to_numpy()
    assert plan.rho == pytest.approx(np.corrcoef(both.T)[0, 1], rel=1e-9)
    ref = NormalIndPower()
    alpha = 0.05  # two arms: the decision metric's Holm step is alpha itself
    n = ref.solve_power(effect_size=0.05 * x.mean() / x.std(ddof=1), alpha=alpha, power=0.8)
    assert plan.units == pytest.approx(n, rel=1e-6)
    cuped_sd = x.std(ddof=1) * math.sqrt(1 - plan.rho**2)
    n_cuped = ref.solve_power(effect_size=0.05 * x.mean() / cuped_sd, alpha=alpha, power=0.8)
    assert plan.units_cuped == pytest.approx(n_cuped, rel=1e-6)
    per_arm = sum(report.arrivals[:10]) / 2
    assert ref.power(plan.mde * x.mean() / x.std(ddof=1), per_arm, alpha) == pytest.approx(0.8)


def test_quantile_metrics_are_not_planned_and_caps_are_named(
    report: planning.PlanReport,
) -> None:
    """The history of a quantile metric holds counts of values, not its quantile: no size
    is made up from them; a winsorised metric says it was sized on uncapped values."""
    by_name = {m.metric: m for m in report.metrics}
    p95 = by_name["page_latency_p95"]
    assert p95.note == planning.NOT_PLANNED
    assert all(math.isnan(v) for v in (p95.baseline, p95.sd, p95.units, p95.mde))
    assert "uncapped" in by_name["revenue_winsorised"].note
    assert by_name["revenue"].note == ""


def test_arrivals_and_days(rows: pl.DataFrame, report: planning.PlanReport) -> None:
    units = _analysed(rows)
    per_day = units.group_by("first_day").len().sort("first_day")["len"].to_list()
    assert list(report.arrivals) == per_day and len(per_day) == report.exposure_days
    for m in report.metrics:
        if m.days is not None and not m.days[1]:
            need = m.units * 2  # 50/50: all units
            day = m.days[0]
            assert sum(report.arrivals[:day]) >= need > sum(report.arrivals[: day - 1])


def test_cumulative_and_days_extrapolate_at_the_last_week_rate() -> None:
    arrivals = (100,) * 7 + (50,) * 7
    assert planning.cumulative(arrivals, 14) == (1050.0, False)
    assert planning.cumulative(arrivals, 16) == (1150.0, True)
    assert planning.days_for(1050, arrivals) == (14, False)
    assert planning.days_for(1051, arrivals) == (15, True)
    assert planning.days_for(700, arrivals) == (7, False)


@pytest.mark.parametrize(("text", "value"), [("2%", 0.02), ("0.02", 0.02), (" 5 % ", 0.05)])
def test_parse_mde(text: str, value: float) -> None:
    assert planning.parse_mde(text) == pytest.approx(value)


@pytest.mark.parametrize("text", ["two", "0", "-2%", "2%%", ""])
def test_parse_mde_refuses(text: str) -> None:
    with pytest.raises(SpecError, match="--mde"):
        planning.parse_mde(text)


def test_plan_command_runs_on_the_demo() -> None:
    result = CliRunner().invoke(
        app, ["plan", str(PIPELINES / "checkout_layout.toml"), "--mde", "2%", "--days", "14"]
    )
    assert result.exit_code == 0, result.output
    for text in ("revenue", "page_latency", "units/variant", "days CUPED", "MDE CUPED", "rho"):
        assert text in result.output


@pytest.mark.parametrize(
    ("args", "message"),
    [
        ([], "give --mde"),
        (["--mde", "lots"], "--mde"),
        (["--days", "0"], "--days: must be at least 1"),
        (["--mde", "2%", "--power", "1.5"], "--power: must lie strictly between"),
        (["--days", "7", "--power", "0.01"], "--power"),
    ],
)
def test_plan_command_bad_input(args: list[str], message: str, tmp_path: Path) -> None:
    result = CliRunner().invoke(app, ["plan", str(PIPELINES / "checkout_layout.toml"), *args])
    assert result.exit_code == 2
    assert message in result.output and result.output.count("\n") == 1
