"""Which engine a command runs on: DuckDB (default, embedded) or Spark (optional extra)."""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from enum import StrEnum
from typing import TYPE_CHECKING

from metricforge.errors import EngineError
from metricforge.progress import DisplayFactory

if TYPE_CHECKING:  # the engines (and pyarrow, numpy) load when one is opened
    from metricforge.engines.base import Engine


class EngineName(StrEnum):
    duckdb = "duckdb"
    spark = "spark"


def spark_conf(items: Sequence[str]) -> dict[str, str]:
    """``KEY=VALUE`` settings, e.g. ``spark.executor.memory=8g``."""
    conf: dict[str, str] = {}
    for item in items:
        key, sep, value = item.partition("=")
        if not sep or not key.strip() or not value.strip():
            raise EngineError(f"--spark-conf '{item}': expected KEY=VALUE")
        conf[key.strip()] = value.strip()
    return conf


@contextmanager
def open_engine(
    name: EngineName,
    *,
    threads: int | None = None,
    memory_limit: str | None = None,
    timeout_s: float | None = None,
    progress: DisplayFactory | None = None,
    spark_master: str | None = None,
    spark_settings: Sequence[str] = (),
) -> Iterator[Engine]:
    """The engine for a command; a Spark session is stopped when the command ends.

    ``timeout_s`` stops the queries of either engine (None: the default timeout);
    ``memory_limit`` and ``progress`` are DuckDB's (None: its defaults); Spark takes its
    memory from ``--spark-conf``."""
    from metricforge.engines.watchdog import DEFAULT_TIMEOUT_S

    timeout = timeout_s if timeout_s is not None else DEFAULT_TIMEOUT_S
    if name is EngineName.duckdb:
        if spark_master is not None or spark_settings:
            raise EngineError("--spark-master and --spark-conf need --engine spark")
        from metricforge.engines.duckdb import DuckDBEngine

        yield DuckDBEngine(
            threads=threads,
            memory_limit=memory_limit,
            timeout_s=timeout,
            progress=progress,
        )
        return
    if memory_limit is not None:
        raise EngineError("--memory-limit is DuckDB's; for Spark use --spark-conf")
    from metricforge.engines.spark import DEFAULT_MASTER, SparkEngine

    master = spark_master or (f"local[{threads}]" if threads else DEFAULT_MASTER)
    engine = SparkEngine(master, spark_conf(spark_settings), timeout_s=timeout)
    try:
        yield engine
    finally:
        engine.close()
