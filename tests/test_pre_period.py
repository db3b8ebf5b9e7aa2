"""Each unit's pre-period, read in the same scan as its experiment window.

The reference is an independent polars computation from the definitions' meaning: the
events of a unit in [first exposure − D days, first exposure).
"""

from __future__ import annotations

import dataclasses
import datetime as dt

import polars as pl
import pytest
import sqlglot.expressions as exp

from metricforge.compile.query import UNIT_TABLE, CompiledRun, compile_plan
from metricforge.engines.duckdb import DuckDBEngine
from metricforge.runner import gather_inputs
from metricforge.spec import load_plan
from metricforge.spec.model import Plan
from tests.conftest import PIPELINES, SAMPLE

START, END = dt.datetime(2026, 9, 15), dt.datetime(2026, 9, 29)
PRE_DAYS = 14


def unit_rows(plan: Plan) -> pl.DataFrame:
    """The materialised per-unit table itself (tests only: it holds unit ids)."""
    compiled = compile_plan(plan)
    everything = exp.select("*").from_(UNIT_TABLE)
    probe = CompiledRun(unit_rows=compiled.unit_rows, results=(("all", everything),))
    inputs, _ = gather_inputs(plan)
    table = DuckDBEngine().run(probe, inputs)["all"]
    return pl.from_arrow(table).sort("unit")  # type: ignore[return-value]


@pytest.fixture(scope="module")
def plans() -> tuple[Plan, Plan]:
    plan = load_plan(PIPELINES / "checkout_layout.toml")
    return plan, dataclasses.replace(plan, pre_period_days=PRE_DAYS)


@pytest.fixture(scope="module")
def rows(plans: tuple[Plan, Plan]) -> tuple[pl.DataFrame, pl.DataFrame]:
    return unit_rows(plans[0]), unit_rows(plans[1])


def test_experiment_period_columns_do_not_change(rows: tuple[pl.DataFrame, pl.DataFrame]) -> None:
    without, with_pre = rows
    assert with_pre.height == without.height
    for column in without.columns:
        assert with_pre[column].equals(without[column]), column
    assert {c for c in with_pre.columns if c.startswith("xpre_")} == {
        f"xpre_{c[2:]}" for c in without.columns if c.startswith("x_")
    }


def first_exposures() -> pl.DataFrame:
    """Each exposed unit's first exposure to the demo's checkout_layout (polars)."""
    return (
        pl.read_parquet(SAMPLE / "exposures.parquet")
        .filter(
            (pl.col("experiment") == "checkout_layout")
            & (pl.col("ts") >= START)
            & (pl.col("ts") < END)
        )
        .group_by("unit_id")
        .agg(pl.col("ts").min().alias("first_ts"))
    )


def test_pre_period_values_match_independent_computation(
    rows: tuple[pl.DataFrame, pl.DataFrame],
) -> None:
    with_pre = rows[1]
    exposures = first_exposures()
    events = pl.read_parquet(SAMPLE / "events" / "**" / "*.parquet", hive_partitioning=False)
    pre = events.join(exposures, left_on="cookie_id", right_on="unit_id").filter(
        (pl.col("ts") < pl.col("first_ts"))
        & (pl.col("ts") >= pl.col("first_ts") - dt.timedelta(days=PRE_DAYS))
    )
    is_ = lambda e: pl.col("event") == e  # noqa: E731
    expected = (
        exposures.join(
            pre.group_by("cookie_id").agg(
                pl.col("value").filter(is_("purchase")).sum().alias("revenue"),
                is_("click").sum().alias("clicks"),
                is_("impression").sum().alias("impressions"),
                pl.len().alias("events"),
            ),
            left_on="unit_id",
            right_on="cookie_id",
            how="left",
        )
        .fill_null(0)
        .sort("unit_id")
    )
    assert with_pre["unit"].to_list() == expected["unit_id"].to_list()
    assert with_pre["has_pre"].to_list() == (expected["events"] > 0).to_list()
    assert with_pre["xpre_revenue"].to_list() == pytest.approx(
        expected["revenue"].to_list(), rel=1e-12, abs=1e-9
    )
    assert with_pre["xpre_click_through"].to_list() == expected["clicks"].cast(float).to_list()
    assert with_pre["ypre_click_through"].to_list() == expected["impressions"].cast(float).to_list()
    assert expected["events"].sum() > 0  # the demo has a pre-period to read
