"""Golden files of the compiled SQL per dialect, and the shape of the one query.

Regenerate after an intended compiler change with:
    METRICFORGE_UPDATE_GOLDEN=1 python -m pytest tests/test_sql_golden.py
"""

from __future__ import annotations

import os

import pytest
import sqlglot
import sqlglot.expressions as exp

from metricforge.compile.query import UNIT_TABLE, compile_plan, render
from metricforge.spec import load_plan
from tests.conftest import DEMO_EXPERIMENTS, PIPELINES, ROOT

GOLDEN = ROOT / "tests" / "golden"


@pytest.mark.parametrize("dialect", ["duckdb", "spark"])
@pytest.mark.parametrize("experiment", DEMO_EXPERIMENTS[:1])
def test_compiled_sql_matches_golden_file(experiment: str, dialect: str) -> None:
    sql = render(load_plan(PIPELINES / f"{experiment}.toml"), dialect) + "\n"
    path = GOLDEN / f"{experiment}.{dialect}.sql"
    if os.environ.get("METRICFORGE_UPDATE_GOLDEN"):
        path.write_text(sql, encoding="utf-8")
    assert sql == path.read_text(encoding="utf-8")


def test_one_scan_one_unit_grouping() -> None:
    """All metrics share one read of the events and one per-unit aggregation; the result
    queries read only the materialised per-unit table."""
    plan = load_plan(PIPELINES / "checkout_layout.toml")
    run = compile_plan(plan)
    sql = run.unit_rows.sql(dialect="duckdb")
    reparsed = sqlglot.parse(sql, read="duckdb")
    assert len(reparsed) == 1 and isinstance(reparsed[0], exp.Select)
    tables = [t.name for t in run.unit_rows.find_all(exp.Table)]
    assert tables.count("events") == 1
    assert tables.count("exposures") == 1
    ctes = [c.alias for c in run.unit_rows.find_all(exp.CTE)]
    assert ctes == ["first_exposure", "sessions", "units"]
    assert [name for name, _ in run.results] == [
        "moments",
        "data_quality",
        "exposure_days",
        "bot_events",
        "caps",
        "cuped",
        "quantile_page_latency_p95",
        "segments_device",
        "segments_country",
    ]
    for name, query in run.results:
        assert isinstance(query, exp.Select), name
        own = {cte.alias for cte in query.find_all(exp.CTE)}  # its own stages
        assert {t.name for t in query.find_all(exp.Table)} <= {UNIT_TABLE} | own, name


@pytest.mark.parametrize("dialect", ["duckdb", "spark"])
def test_no_constructs_that_transpile_wrongly(dialect: str) -> None:
    sql = render(load_plan(PIPELINES / "checkout_layout.toml"), dialect).upper()
    flat = " ".join(sql.split())
    for banned in ("ASOF", "POSITIONAL", "READ_PARQUET", "EPOCH(", "QUANTILE_CONT"):
        assert banned not in sql
    # quantiles (caps, quantile metrics) are exact order statistics, the same in every
    # dialect: no quantile aggregate, discrete, interpolated or approximate
    for banned in ("QUANTILE(", "PERCENTILE", "APPROX", "MEDIAN("):
        assert banned not in sql
    assert "ROW_NUMBER() OVER (PARTITION BY" in sql
    if dialect == "spark":
        assert " -> " in sql and "SIZE(" in sql and "LENGTH(" not in sql
        assert "ARRAY_SORT( FLATTEN(COLLECT_LIST(" in flat and "LATERAL VIEW EXPLODE(" in flat
    else:
        assert "LAMBDA " in sql
