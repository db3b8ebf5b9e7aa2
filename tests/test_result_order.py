"""Bit-identical results without a sort per aggregate.

The moments query carries no ORDER BY inside its aggregates; the DuckDB engine reads
unit_rows back in unit order into a one-thread DuckDB instead (engines/unit_order.py). The
values must equal those of aggregates explicitly ordered by unit (the earlier formulation)
bit for bit, and must not depend on the number of threads.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import duckdb
import numpy as np
import pyarrow as pa
import pytest
import sqlglot.expressions as exp

from metricforge.compile.history import history_results
from metricforge.compile.query import CompiledRun, compile_plan
from metricforge.compile.sqlparts import UNIT_TABLE
from metricforge.engines.base import arrow_result
from metricforge.engines.duckdb import DuckDBEngine
from metricforge.engines.unit_order import one_thread_connection
from metricforge.runner import gather_inputs
from metricforge.spec import load_plan
from tests.conftest import PIPELINES

ORDER_SENSITIVE = (exp.Avg, exp.Variance, exp.CovarSamp)
CHECKOUT = PIPELINES / "checkout_layout.toml"  # winsorised, CUPED and quantile metrics
Demo = tuple[CompiledRun, pa.Table, dict[int, pa.Table]]  # compiled run, unit rows, moments


def ordered_by_unit(query: exp.Select) -> exp.Select:
    """The same query with every floating-point aggregate ordered by unit."""

    def order(node: exp.Expr) -> exp.Expr:
        if isinstance(node, ORDER_SENSITIVE):
            node = node.copy()
            last = "expression" if node.args.get("expression") is not None else "this"
            by = [exp.Ordered(this=exp.column("unit"))]
            node.set(last, exp.Order(this=node.args[last], expressions=by))
        return node

    return query.transform(order)


def _ordered_aggregates(query: exp.Select) -> list[exp.Expr]:
    return [node for node in query.find_all(*ORDER_SENSITIVE) if node.find(exp.Order)]


def _ordered_reference(units: pa.Table, query: exp.Select) -> pa.Table:
    con = duckdb.connect(config={"threads": 2})
    con.register(UNIT_TABLE, units)
    table: pa.Table = con.sql(ordered_by_unit(query).sql(dialect="duckdb")).to_arrow_table()
    return arrow_result(table)  # the engines' one Arrow typing of result tables


@pytest.fixture(scope="module")
def demo() -> Demo:
    plan = load_plan(CHECKOUT)
    compiled = compile_plan(plan)
    inputs, _ = gather_inputs(plan)
    everything = exp.select("*").from_(UNIT_TABLE)
    probe = CompiledRun(unit_rows=compiled.unit_rows, results=(("all", everything),))
    units = DuckDBEngine().run(probe, inputs)["all"]  # tests only: it holds unit ids
    by_threads = {n: DuckDBEngine(threads=n).run(compiled, inputs)["moments"] for n in (1, 2)}
    return compiled, units, by_threads


def test_units_arrive_in_unit_order(demo: Demo) -> None:
    units = demo[1].column("unit").to_pylist()
    assert units == sorted(units)


def test_moments_equal_unit_ordered_aggregates_bit_for_bit(demo: Demo) -> None:
    compiled, units, by_threads = demo
    reference = _ordered_reference(units, dict(compiled.results)["moments"])
    assert by_threads[2].equals(reference)


@pytest.mark.parametrize("name", ["bot_events", "cuped"])
def test_other_unordered_result_queries_equal_ordered_aggregates(demo: Demo, name: str) -> None:
    """Result queries that read unit_rows straight carry no ORDER BY in their aggregates."""
    compiled, units, _ = demo
    query = dict(compiled.results)[name]
    assert not _ordered_aggregates(query), name
    found = DuckDBEngine(threads=2).run(compiled, gather_inputs(load_plan(CHECKOUT))[0])[name]
    assert found.equals(_ordered_reference(units, query))


def test_planning_history_equals_ordered_aggregates() -> None:
    plan = dataclasses.replace(load_plan(CHECKOUT), pre_period_days=14, history_split=True)
    compiled = compile_plan(plan)
    inputs, _ = gather_inputs(plan)
    everything = exp.select("*").from_(UNIT_TABLE)
    probe = CompiledRun(unit_rows=compiled.unit_rows, results=(("all", everything),))
    units = DuckDBEngine().run(probe, inputs)["all"]
    (name, query), _ = history_results(plan)
    assert not _ordered_aggregates(query)
    found = DuckDBEngine(threads=2).run(CompiledRun(compiled.unit_rows, ((name, query),)), inputs)
    assert found[name].equals(_ordered_reference(units, query))


def test_moments_do_not_depend_on_threads(demo: Demo) -> None:
    assert demo[2][1].equals(demo[2][2])


def test_one_thread_reading_in_order_matches_ordered_aggregates_at_scale(tmp_path: Path) -> None:
    """Many row groups and batches (300,000 units): the mechanism itself, on skewed data."""
    rng = np.random.default_rng(8)
    n = 300_000
    units = pa.table(
        {
            "unit": [f"{i:08x}" for i in rng.permutation(n)],
            "variant": rng.choice(["control", "treatment"], n),
            "x": rng.lognormal(3.0, 2.0, n),
            "y": rng.poisson(4.0, n).astype(float) + 1.0,
        }
    ).sort_by("unit")
    query = (
        exp.select(
            "variant",
            exp.alias_(exp.Avg(this=exp.column("x")), "mean_x"),
            exp.alias_(exp.Variance(this=exp.column("x")), "var_x"),
            exp.alias_(exp.CovarSamp(this=exp.column("x"), expression=exp.column("y")), "cov"),
        )
        .from_(UNIT_TABLE)
        .group_by("variant")
        .order_by("variant")
    )
    con = one_thread_connection(units, "1GB", tmp_path / "spill")
    found = con.sql(query.sql(dialect="duckdb")).to_arrow_table()
    assert found.equals(_ordered_reference(units, query))
