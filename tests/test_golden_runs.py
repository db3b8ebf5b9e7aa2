"""Every golden SQL file is executed on its own engine and must give DuckDB's numbers.

A golden file only shows what the compiler prints; SQL that a transpiler turned into
something else (ASOF and POSITIONAL joins, list-form read_parquet, epoch, quantile_cont
all translate silently wrongly to Spark) would still match its golden file. So each file
tests/golden/NAME.DIALECT.sql is split into its statements, run as text on that dialect's
engine over the inputs of pipelines/NAME.toml, and compared with the DuckDB engine's run
of the compiled trees: a golden file counts only if it ran.
"""

from __future__ import annotations

import functools
from pathlib import Path

import pyarrow as pa
import pytest
import sqlglot
from sqlglot.tokens import TokenType

from metricforge.compile.query import compile_plan
from metricforge.engines.base import Engine
from metricforge.engines.duckdb import DuckDBEngine
from metricforge.runner import gather_inputs
from metricforge.spec import load_plan
from tests.conftest import PIPELINES, ROOT
from tests.parity import assert_same_tables, tolerance

GOLDEN = ROOT / "tests" / "golden"
GOLDEN_FILES = sorted(GOLDEN.glob("*.sql"))


def statements_of(text: str, dialect: str) -> list[tuple[str, str]]:
    """The file's statements as (name, SQL text), split at the dialect's own semicolon
    tokens; each statement is headed by a comment ``-- name``."""
    out: list[tuple[str, str]] = []
    start = 0
    for token in sqlglot.Dialect.get_or_raise(dialect).tokenize(text):
        if token.token_type is TokenType.SEMICOLON:
            chunk = text[start : token.start].strip()
            first = chunk.splitlines()[0]
            assert first.startswith("-- "), f"statement without a '-- name' header: {first}"
            out.append((first[3:].strip(), chunk))
            start = token.end + 1
    assert not text[start:].strip(), "text after the last statement"
    return out


def dialect_of(path: Path) -> str:
    return path.suffixes[-2].lstrip(".")


def pipeline_of(path: Path) -> Path:
    spec = PIPELINES / f"{path.name.split('.')[0]}.toml"
    assert spec.is_file(), f"{path.name}: no pipeline {spec.name} to run it over"
    return spec


@functools.cache
def reference(spec: Path) -> dict[str, pa.Table]:
    plan = load_plan(spec)
    inputs, _ = gather_inputs(plan)
    return DuckDBEngine().run(compile_plan(plan, "duckdb"), inputs)


def _param(path: Path) -> object:
    marks = [pytest.mark.spark, pytest.mark.slow] if dialect_of(path) == "spark" else []
    return pytest.param(path, id=path.name, marks=marks)


def test_every_dialect_has_golden_files() -> None:
    assert {dialect_of(p) for p in GOLDEN_FILES} == {"duckdb", "spark"}


@pytest.mark.parametrize("golden", [_param(p) for p in GOLDEN_FILES])
def test_golden_file_runs_and_gives_the_reference_numbers(
    golden: Path, request: pytest.FixtureRequest
) -> None:
    dialect = dialect_of(golden)
    engine: Engine = (
        request.getfixturevalue("spark_engine") if dialect == "spark" else DuckDBEngine()
    )
    assert engine.dialect == dialect
    statements = statements_of(golden.read_text(encoding="utf-8"), dialect)
    names = [name for name, _ in statements]
    assert names[0] == "unit_rows" and len(set(names)) == len(names) >= 2
    spec = pipeline_of(golden)
    inputs, _ = gather_inputs(load_plan(spec))
    tables = engine.run_statements(statements, inputs)
    assert_same_tables(tables, reference(spec), tolerance(engine.name))
