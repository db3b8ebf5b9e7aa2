"""Reading only what is needed: date partitions outside the window and unused columns.

The evidence is DuckDB's own query plan (EXPLAIN ANALYZE): the Parquet scan of the events
reads only the partitions of the analysis window and only the columns the metrics and the
bot filter use, and no stage stores the joined event stream. Results do not change.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
import tempfile
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from metricforge.compile.query import CompiledRun, compile_plan
from metricforge.engines.base import EngineInputs
from metricforge.engines.duckdb import DuckDBEngine, _register_views, hardened_connection
from metricforge.errors import InputDataError
from metricforge.inputs import parquet_files
from metricforge.partitions import event_window, inside_window, partition_day, prune
from metricforge.runner import gather_inputs
from metricforge.sample import EVENT_SCHEMA
from metricforge.spec import load_plan
from metricforge.spec.model import Plan
from tests.conftest import PIPELINES, SAMPLE, event

DEMO_DAYS = 28  # 14 pre-period days, then 14 experiment days
EXPERIMENT_DAYS = [f"2026-09-{d:02d}" for d in range(15, 29)]


@pytest.fixture(scope="module")
def plan() -> Plan:
    """checkout_layout without its CUPED pre-period: the experiment window alone."""
    full = load_plan(PIPELINES / "checkout_layout.toml")
    return dataclasses.replace(
        full,
        spec=dataclasses.replace(full.spec, cuped=False, pre_period_days=0),
        pre_period_days=0,
    )


def _scans(inputs: EngineInputs, plan: Plan) -> list[dict[str, Any]]:
    """The operators of the unit query's plan, as EXPLAIN ANALYZE reports them (JSON)."""
    sql = compile_plan(plan).unit_rows.sql(dialect="duckdb")
    with tempfile.TemporaryDirectory() as tmp:
        con = hardened_connection(inputs.events + inputs.exposures, Path(tmp))
        try:
            _register_views(con, inputs)
            text = con.execute(f"EXPLAIN (ANALYZE, FORMAT JSON) {sql}").fetchall()[0][1]
        finally:
            con.close()
    operators: list[dict[str, Any]] = []
    stack = list(json.loads(text)["operator"])
    while stack:
        node = stack.pop()
        operators.append(node)
        stack.extend(node.get("children", []))
    return operators


def _event_scan(operators: list[dict[str, Any]]) -> dict[str, Any]:
    scans = [
        op
        for op in operators
        if op["name"] == "PARQUET_SCAN" and "events" in op["extra_info"].get("Filename(s)", "")
    ]
    assert len(scans) == 1  # one scan of the events
    info: dict[str, Any] = scans[0]["extra_info"]
    return info


def test_only_the_window_partitions_are_listed(plan: Plan) -> None:
    inputs, files = gather_inputs(plan)
    days = [str(partition_day(p)) for p in inputs.events]
    assert days == EXPERIMENT_DAYS  # [start, end + window) meets 14 of the 28 days
    assert len(parquet_files(SAMPLE / "events")) == DEMO_DAYS
    # the fingerprint and the manifest describe the files read: these 14 and the exposures
    assert len(files) == len(EXPERIMENT_DAYS) + 1


def test_a_pre_period_widens_the_window(plan: Plan) -> None:
    inputs, _ = gather_inputs(dataclasses.replace(plan, pre_period_days=7))
    days = [str(partition_day(p)) for p in inputs.events]
    assert days == [f"2026-09-{d:02d}" for d in range(8, 29)]  # from start - 7 days


def test_query_plan_reads_fewer_files_and_only_needed_columns(plan: Plan) -> None:
    pruned, _ = gather_inputs(plan)
    everything = dataclasses.replace(pruned, events=parquet_files(SAMPLE / "events"))
    scan = _event_scan(_scans(pruned, plan))
    assert int(scan["Total Files Read"]) == len(EXPERIMENT_DAYS)
    assert int(_event_scan(_scans(everything, plan))["Total Files Read"]) == DEMO_DAYS
    # columns: those of the metrics' definitions and the bot filter, nothing else
    # (country: a segment column of the spec's [segments])
    needed = {"ts", "cookie_id", "session_id", "event", "value", "latency_ms", "device"}
    assert set(scan["Projections"]) == needed | {"user_agent", "country"}
    assert not {"page", "ip_hash", "account_id", "date"} & set(scan["Projections"])


def test_joined_events_are_never_stored(plan: Plan) -> None:
    """A CTE that DuckDB materialises must not hold event rows (only exposures are small)."""
    inputs, _ = gather_inputs(plan)
    operators = _scans(inputs, plan)
    for op in operators:
        if op["name"] == "CTE":
            stored = [op["children"][0]]  # the materialised definition
            while stored:
                node = stored.pop()
                assert "events" not in node["extra_info"].get("Filename(s)", ""), op
                stored.extend(node.get("children", []))


def test_pruning_does_not_change_results(plan: Plan) -> None:
    pruned, _ = gather_inputs(plan)
    everything = dataclasses.replace(pruned, events=parquet_files(SAMPLE / "events"))
    engine = DuckDBEngine()
    compiled = compile_plan(plan)
    a = engine.run(compiled, pruned)["moments"]
    b = engine.run(compiled, everything)["moments"]
    assert a.equals(b)


def _write_day(root: Path, folder: str, when: dt.datetime) -> Path:
    path = root / folder / "part-0.parquet"
    path.parent.mkdir(parents=True)
    row = event("u1", "click") | {"ts": when}
    pq.write_table(pa.Table.from_pylist([row], schema=EVENT_SCHEMA), path)
    return path


WINDOW = (dt.datetime(2026, 9, 15, 6), dt.datetime(2026, 9, 20))


@pytest.mark.parametrize(
    ("folder", "kept"),
    [
        ("date=2026-09-14", False),  # ends before the window's start (06:00 on the 15th)
        ("date=2026-09-15", True),  # the window starts inside this day
        ("date=2026-09-19", True),
        ("date=2026-09-20", False),  # the window ends at midnight
        ("hour=07", True),  # not a date partition: always read
    ],
)
def test_day_meets_window(tmp_path: Path, folder: str, kept: bool) -> None:
    day = partition_day(tmp_path / folder / "part-0.parquet")
    when = dt.datetime.combine(day, dt.time(7)) if day else dt.datetime(2026, 9, 16, 7)
    inside = _write_day(tmp_path, "date=2026-09-16", dt.datetime(2026, 9, 16, 7))
    candidate = _write_day(tmp_path, folder, when)
    assert (candidate in prune([candidate, inside], *WINDOW, folder=tmp_path)) is kept


def test_partitions_that_break_their_day_are_not_trusted(tmp_path: Path) -> None:
    """A kept file whose ts lies outside its folder's day (e.g. local-time partitions):
    the names cannot be used to skip files, so every file is read."""
    early = _write_day(tmp_path, "date=2026-09-10", dt.datetime(2026, 9, 10, 7))
    shifted = _write_day(tmp_path, "date=2026-09-16", dt.datetime(2026, 9, 15, 23))
    assert prune([early, shifted], *WINDOW, folder=tmp_path) == [early, shifted]


def test_no_partition_in_the_window_is_one_clear_error(tmp_path: Path) -> None:
    early = _write_day(tmp_path, "date=2026-09-10", dt.datetime(2026, 9, 10, 7))
    with pytest.raises(InputDataError) as err:
        prune([early], *WINDOW, folder=tmp_path)
    assert "no date= partition between 2026-09-15 and 2026-09-19" in err.value.one_line()
    assert str(tmp_path) in err.value.one_line()


def test_inside_window_reads_each_files_ts_range(tmp_path: Path) -> None:
    inside = _write_day(tmp_path, "date=2026-09-16", dt.datetime(2026, 9, 16, 7))
    early = _write_day(tmp_path, "date=2026-09-10", dt.datetime(2026, 9, 10, 7))
    assert inside_window([inside], *WINDOW)
    assert not inside_window([inside, early], *WINDOW)


def test_scan_bound_on_ts_only_where_it_can_skip_rows(plan: Plan) -> None:
    """The constant bounds on ts are implied by each unit's window: left out when every file
    read lies inside it (the day partitions of the window), with the same results."""
    pruned, _ = gather_inputs(plan)
    assert inside_window(pruned.events, *event_window(plan))
    everything = dataclasses.replace(pruned, events=parquet_files(SAMPLE / "events"))
    assert not inside_window(everything.events, *event_window(plan))

    def bounds(compiled: CompiledRun) -> list[str]:
        sql = compiled.unit_rows.sql(dialect="duckdb")
        return [c for c in ("e.ts >= CAST('2026-09-15", "e.ts < CAST('2026-10-13") if c in sql]

    bounded, unbounded = compile_plan(plan), compile_plan(plan, ts_bounds=False)
    assert len(bounds(bounded)) == 2 and bounds(unbounded) == []
    engine = DuckDBEngine()
    reference = engine.run(bounded, everything)["moments"]
    assert engine.run(unbounded, pruned)["moments"].equals(reference)
    assert engine.run(bounded, pruned)["moments"].equals(reference)
