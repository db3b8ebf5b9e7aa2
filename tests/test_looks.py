"""`metricforge looks` and the cut-off time ``Plan.as_of`` of the one scan."""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
from pathlib import Path

import pytest
from typer.testing import CliRunner

from metricforge.cli import app
from metricforge.compile.query import compile_plan
from metricforge.engines.base import Engine
from metricforge.looks import cutoffs, parse_every
from metricforge.runner import execute
from metricforge.spec import load_plan
from tests.conftest import PIPELINES
from tests.test_compare import independent
from tests.test_demo_independent import SESSION_LIMIT
from tests.test_sequential_spec import spec_with

DEMO = PIPELINES / "checkout_layout.toml"
START, END, WINDOW = dt.datetime(2026, 9, 15), dt.datetime(2026, 9, 29), dt.timedelta(days=14)


@pytest.mark.parametrize(
    ("text", "expected"),
    [("1d", dt.timedelta(days=1)), ("12h", dt.timedelta(hours=12)), ("7d", dt.timedelta(days=7))],
)
def test_every_parses(text: str, expected: dt.timedelta) -> None:
    assert parse_every(text) == expected


@pytest.mark.parametrize(
    ("every", "count", "last_but_one"),
    [("1d", 28, dt.datetime(2026, 10, 12)), ("5d", 6, dt.datetime(2026, 10, 10))],
)
def test_cutoffs_run_from_the_start_to_the_last_possible_event(
    every: str, count: int, last_but_one: dt.datetime
) -> None:
    times = cutoffs(load_plan(DEMO), parse_every(every))
    assert len(times) == count and times[0] == START + parse_every(every)
    assert times[-2] == last_but_one and times[-1] == END + WINDOW  # every event is in by then


@pytest.mark.parametrize(
    ("args", "needle"),
    [
        (["--every", "1w"], "--every: --every must be a whole number of days or hours"),
        (["--every", "0d"], "--every: --every must be a whole number of days or hours"),
        (["--every", "1h"], "--every: --every gives 672 looks; at most 400"),
    ],
)
def test_bad_options_are_one_line_errors(args: list[str], needle: str) -> None:
    result = CliRunner().invoke(app, ["looks", str(DEMO), *args])
    assert result.exit_code == 2
    assert len(result.output.strip().splitlines()) == 1 and needle in result.output


def test_looks_needs_a_sequential_table(tmp_path: Path) -> None:
    spec = spec_with(tmp_path, None)
    result = CliRunner().invoke(app, ["looks", str(spec)])
    assert result.exit_code == 2
    line = result.output.strip()
    assert line.startswith(f"error: {spec}:") and " sequential: looks needs a [sequential]" in line


@pytest.mark.parametrize("dialect", ["duckdb", "spark"])
def test_the_cutoff_bounds_exposures_and_events_in_the_one_scan(dialect: str) -> None:
    plan = load_plan(DEMO)
    cut = dataclasses.replace(plan, as_of=dt.datetime(2026, 9, 20, 6))
    sql = compile_plan(cut, dialect).unit_rows.sql(dialect)
    plain = compile_plan(plan, dialect).unit_rows.sql(dialect)
    literal = "CAST('2026-09-20 06:00:00' AS TIMESTAMP)"
    assert sql.count(literal) == 2 and literal not in plain  # exposures, events
    assert "ts < " + literal in sql and "e.ts < " + literal in sql


@pytest.mark.slow
def test_a_look_sees_only_what_had_happened_by_its_cutoff(engine: Engine) -> None:
    """The as-of run (DuckDB and Spark) against an independent polars cut of the raw demo
    logs (tests/test_compare.py: units and mean revenue per variant, bots@2 rules)."""
    cutoff = dt.datetime(2026, 9, 18, 12)
    data = execute(dataclasses.replace(load_plan(DEMO), as_of=cutoff), engine)
    expected = independent(SESSION_LIMIT, cutoff)
    everything = independent(SESSION_LIMIT)
    assert sorted(expected) == ["control", "treatment"]
    for variant, (units, revenue) in expected.items():
        assert data.counts[variant].units == units
        assert data.moments["revenue"][variant].mean_x == pytest.approx(revenue, rel=1e-9)
        assert units < everything[variant][0]  # later units are truly left out


@pytest.mark.slow
def test_the_last_look_is_the_full_scorecard(tmp_path: Path) -> None:
    runner = CliRunner()
    result = runner.invoke(app, ["looks", str(DEMO), "--every", "7d", "--json"])
    assert result.exit_code == 0, result.output
    report = json.loads(result.output)
    ran = runner.invoke(app, ["run", str(DEMO), "--out", str(tmp_path / "out")])
    assert ran.exit_code == 0, ran.output
    card = json.loads((tmp_path / "out" / "scorecard.json").read_text())
    looks = report["looks"]
    assert [look["as_of"] for look in looks] == [
        "2026-09-22T00:00:00Z",
        "2026-09-29T00:00:00Z",
        "2026-10-06T00:00:00Z",
        "2026-10-13T00:00:00Z",
    ]
    last = {r["metric"]: r for r in looks[-1]["rows"]}
    assert list(last) == [card["metrics"][i]["metric"] for i in range(4)]  # decision, guardrails
    assert looks[-1]["units"] == {v["variant"]: v["units"] for v in card["variants"]}
    rows = {r["metric"]: r for r in card["metrics"]}
    seq = {r["metric"]: r for r in card["sequential"]["rows"]}
    for name, row in last.items():
        for key in ("value", "control_value", "abs_effect", "p_value"):
            assert row[key] == rows[name][key], (name, key)
        assert row["look_p"] == seq[name]["always_valid_p"]
        assert (row["look_cs_low"], row["look_cs_high"]) == (
            seq[name]["cs_low"],
            seq[name]["cs_high"],
        )
        if row["look_p"] is None:  # the quantile guardrail: left out, and said so
            assert "quantile" in row["method"]
            continue
        mine = [r for look in looks for r in look["rows"] if r["metric"] == name]
        assert row["always_valid_p"] == min(r["look_p"] for r in mine)
        assert row["cs_low"] == max(r["look_cs_low"] for r in mine)
        assert row["cs_high"] == min(r["look_cs_high"] for r in mine)
    # units only grow over the looks; each first-significant look is a look's time
    totals = [sum(look["units"].values()) for look in looks]
    assert totals == sorted(totals) and totals[0] < totals[-1]
    times = {look["as_of"] for look in looks}
    for entry in report["first_significant"]:
        assert entry["ordinary"] in times | {None} and entry["always_valid"] in times | {None}
