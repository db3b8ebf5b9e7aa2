"""One suite for both engines: every demo pipeline gives the same numbers on each.

DuckDB is the reference. On DuckDB itself a second run must be bit-identical (its final
aggregates are ordered by unit); on Spark, which cannot order them, counts must match
exactly and the engine's floating values (the sufficient statistics) to 1e-12 relative;
scorecard effects to the error bound that this leaves a difference of means
(tests/parity.py). Every pipeline under
pipelines/ is run, so a new construct in the compiler is checked on both engines.
"""

from __future__ import annotations

import functools
import json
from collections.abc import Mapping
from pathlib import Path

import pyarrow as pa
import pytest

from metricforge.compile.query import CompiledRun
from metricforge.engines.base import Engine, EngineInputs, arrow_result
from metricforge.engines.duckdb import DuckDBEngine
from metricforge.report.scorecard import Scorecard, build
from metricforge.runner import execute
from metricforge.spec import load_plan
from metricforge.spec.metrics import load_library
from tests.conftest import PIPELINES, ROOT
from tests.parity import (
    assert_same_rows,
    assert_same_scorecard,
    assert_same_tables,
    same_value,
    tolerance,
)

PIPELINE_FILES = sorted(PIPELINES.glob("*.toml"))
# Every metric of the shared library at once, with a pre-period: a metric kind added to
# metric_defs/ is run on both engines without a new test.
LIBRARY_SPEC = """\
[experiment]
name = "checkout_layout"
unit = "cookie_id"
control = "control"
variants = {{ control = 50, treatment = 50 }}
start = 2026-09-15T00:00:00Z
end = 2026-09-29T00:00:00Z
window_days = 14
pre_period_days = 7
alpha = 0.05
bot_filter = "bots@2"

[data]
events = "{root}/sample_data/events"
exposures = "{root}/sample_data/exposures.parquet"
definitions = ["{root}/metric_defs"]

[metrics]
decision = "revenue"
guardrails = []
diagnostics = {others}
"""


class Recording:
    """An engine that keeps what it was handed and the tables it returned, so a test sees
    what the runner saw."""

    def __init__(self, engine: Engine) -> None:
        self.engine = engine
        self.name = engine.name
        self.dialect = engine.dialect
        self.tables: dict[str, pa.Table] = {}
        self.inputs: EngineInputs | None = None

    def version(self) -> str:
        return self.engine.version()

    def storage_settings(self) -> Mapping[str, str] | None:
        return self.engine.storage_settings()

    def run(self, compiled: CompiledRun, inputs: EngineInputs) -> dict[str, pa.Table]:
        self.inputs = inputs
        self.tables = self.engine.run(compiled, inputs)
        return self.tables


def scorecard(path: Path, engine: Engine) -> tuple[dict[str, pa.Table], Scorecard]:
    recording = Recording(engine)
    card = build(execute(load_plan(path), recording))
    return recording.tables, card


def library_pipeline(folder: Path) -> Path:
    names = sorted(load_library((ROOT / "metric_defs",)))
    others = json.dumps([n for n in names if n != "revenue"])
    spec = folder / "library.toml"
    spec.write_text(LIBRARY_SPEC.format(root=ROOT.as_posix(), others=others), encoding="utf-8")
    return spec


@functools.cache
def reference(path: Path) -> tuple[dict[str, pa.Table], Scorecard]:
    return scorecard(path, DuckDBEngine())


def test_there_are_demo_pipelines() -> None:
    assert len(PIPELINE_FILES) >= 4


@pytest.mark.parametrize("pipeline", PIPELINE_FILES, ids=lambda p: p.stem)
def test_demo_pipeline_gives_the_reference_numbers(engine: Engine, pipeline: Path) -> None:
    want_tables, want = reference(pipeline)
    tables, card = scorecard(pipeline, engine)
    rel = tolerance(engine.name)
    assert_same_tables(tables, want_tables, rel)  # the sufficient statistics
    assert_same_scorecard(card.rows, want.rows, rel)  # effects, intervals, p-values
    assert_same_rows(card.variants, want.variants, rel)  # units, bots, events per variant
    assert_same_rows(card.trust["checks"], want.trust["checks"], rel)
    if want.segments is not None:  # [segments]: the breakdown rows too
        assert card.segments is not None
        assert_same_rows(card.segments.rows, want.segments.rows, rel)
    assert card.stamp["engine"] == engine.name


def test_every_library_metric_with_a_pre_period_gives_the_reference_numbers(
    engine: Engine, tmp_path_factory: pytest.TempPathFactory
) -> None:
    spec = library_pipeline(tmp_path_factory.mktemp("library"))
    plan = load_plan(spec)
    assert plan.pre_period_days == 7 and len(plan.reported) == len(plan.metrics)
    want_tables, want = scorecard(spec, DuckDBEngine())
    tables, card = scorecard(spec, engine)
    rel = tolerance(engine.name)
    assert_same_tables(tables, want_tables, rel)
    assert_same_scorecard(card.rows, want.rows, rel)


def test_result_tables_have_one_arrow_typing() -> None:
    """DuckDB's integer SUM is a 128-bit integer, Spark's a BIGINT: both come back int64;
    real decimals stay decimals; a sum past int64 fails loudly instead of wrapping."""
    table = pa.table(
        {
            "n": pa.array([3, None], pa.decimal128(38, 0)),
            "exact": pa.array([1, 2], pa.decimal128(38, 10)),
            "name": pa.array(["a", "b"], pa.large_string()),
        }
    )
    out = arrow_result(table)
    assert [f.type for f in out.schema] == [pa.int64(), pa.decimal128(38, 10), pa.string()]
    assert out.to_pylist() == [
        {"n": 3, "exact": 1, "name": "a"},
        {"n": None, "exact": 2, "name": "b"},
    ]
    with pytest.raises(pa.ArrowInvalid):
        arrow_result(pa.table({"n": pa.array([2**70], pa.decimal128(38, 0))}))


@pytest.mark.parametrize(
    ("got", "want", "same"),
    [
        ({"t": [1.0, 2.0]}, {"t": [1.0, 2.0 * (1 + 1e-13)]}, True),
        ({"t": [1.0, 2.0]}, {"t": [1.0, 2.0 * (1 + 1e-11)]}, False),
        ({"t": 1}, {"t": 2}, False),
        ({"t": float("nan")}, {"t": float("nan")}, True),
        ({"t": None}, {"t": 0.0}, False),
        ({"t": 1.0}, {"u": 1.0}, False),
    ],
)
def test_parity_compares_nested_values(got: object, want: object, same: bool) -> None:
    assert same_value(got, want, 1e-12) is same
