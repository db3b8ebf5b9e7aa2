"""Shared fixtures: paths of the repository, a CLI runner and the engines."""

from __future__ import annotations

import os
from collections.abc import Iterator
from pathlib import Path

import pytest
from typer.testing import CliRunner

from metricforge.engines.base import Engine
from metricforge.engines.duckdb import DuckDBEngine

ROOT = Path(__file__).resolve().parent.parent
PIPELINES = ROOT / "pipelines"
SAMPLE = ROOT / "sample_data"
# Verbatim copies of the NIST StRD files (see nist/SOURCES.txt and SHA256SUMS.txt).
REFERENCE = ROOT / "tests" / "reference_data"
DEMO_EXPERIMENTS = (
    "checkout_layout",
    "homepage_aa",
    "promo_banner",
    "image_autoload",
    "product_cards",
)


# The Spark tests run unless this switch is set: a machine without pyspark or Java makes them
# fail, never pass silently. CI runs them (local mode).
SKIP_SPARK = os.environ.get("METRICFORGE_SKIP_SPARK") == "1"
SPARK_MASTER = "local[2]"


@pytest.fixture
def cli() -> CliRunner:
    return CliRunner()


@pytest.fixture(scope="session")
def spark_engine() -> Iterator[Engine]:
    """One local SparkSession for the whole test session, reused by every Spark test."""
    if SKIP_SPARK:
        pytest.skip("METRICFORGE_SKIP_SPARK=1: the Spark tests are switched off")
    from metricforge.engines.spark import SparkEngine

    engine = SparkEngine(SPARK_MASTER)
    engine.session()  # fails here, loudly, when pyspark or Java is missing
    yield engine
    engine.close()


@pytest.fixture(
    params=["duckdb", pytest.param("spark", marks=[pytest.mark.spark, pytest.mark.slow])]
)
def engine(request: pytest.FixtureRequest) -> Engine:
    """Each engine in turn: a test taking ``engine`` is one shared suite for both."""
    if request.param == "spark":
        spark: Engine = request.getfixturevalue("spark_engine")
        return spark
    return DuckDBEngine()


import datetime as dt  # noqa: E402
from typing import Any  # noqa: E402

import pyarrow as pa  # noqa: E402
import pyarrow.parquet as pq  # noqa: E402

from metricforge.sample import EVENT_SCHEMA, EXPOSURE_SCHEMA  # noqa: E402

T0 = dt.datetime(2026, 9, 15, 12)


def event(unit: str, name: str, minutes: float = 1.0, **extra: Any) -> dict[str, Any]:
    row: dict[str, Any] = {
        "ts": T0 + dt.timedelta(minutes=minutes),
        "cookie_id": unit,
        "session_id": f"s-{unit}",
        "event": name,
        "user_agent": "Mozilla/5.0",
        "device": "desktop",
    }
    row.update(extra)
    return row


def exposure(unit: str, variant: str, experiment: str = "case") -> dict[str, Any]:
    return {"unit_id": unit, "experiment": experiment, "variant": variant, "ts": T0}


SPEC = """\
[experiment]
name = "case"
unit = "cookie_id"
control = "control"
variants = {{ control = 50, treatment = 50 }}
start = 2026-09-15T00:00:00Z
end = 2026-09-29T00:00:00Z
window_days = 14
alpha = 0.05
bot_filter = "bots@1"

[data]
events = "events"
exposures = "exposures.parquet"
definitions = ["{defs}"]

[metrics]
decision = "{decision}"
guardrails = []
diagnostics = {diagnostics}
"""


def write_case(
    folder: Path,
    events: list[dict[str, Any]],
    exposures: list[dict[str, Any]],
    *,
    decision: str = "revenue",
    diagnostics: tuple[str, ...] = (),
    defs: Path | None = None,
    spec_text: str | None = None,
) -> Path:
    """A small experiment in ``folder``: events/, exposures.parquet and spec.toml."""
    (folder / "events").mkdir(parents=True, exist_ok=True)
    pq.write_table(
        pa.Table.from_pylist(events, schema=EVENT_SCHEMA), folder / "events" / "part-0.parquet"
    )
    pq.write_table(
        pa.Table.from_pylist(exposures, schema=EXPOSURE_SCHEMA), folder / "exposures.parquet"
    )
    text = spec_text or SPEC.format(
        defs=(defs or ROOT / "metric_defs").as_posix(),
        decision=decision,
        diagnostics=list(diagnostics).__repr__().replace("'", '"'),
    )
    spec = folder / "spec.toml"
    spec.write_text(text, encoding="utf-8")
    return spec


def successful_sessions(clicks: Any, backs: Any) -> list[bool]:
    """Per session (lists of click and back times): a click with no back within 30 s."""
    return [
        any(not any(c < b <= c + dt.timedelta(seconds=30) for b in bs) for c in cs)
        for cs, bs in zip(clicks, backs, strict=True)
    ]
