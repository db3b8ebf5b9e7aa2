"""The embedded default engine: DuckDB, locked down before any compiled query runs.

The unit query runs on every thread and stores ``unit_rows``; the result queries then run
over it in unit order on one thread (``unit_order.py``), so runs are bit-identical.
"""

from __future__ import annotations

import re
import tempfile
from pathlib import Path

import duckdb
import pyarrow as pa
import sqlglot.expressions as exp

from metricforge.compile.query import CompiledRun
from metricforge.engines.base import EngineInputs
from metricforge.engines.unit_order import results_in_unit_order
from metricforge.errors import EngineError
from metricforge.progress import DisplayFactory, watch

DEFAULT_MEMORY_LIMIT = "3.5GB"  # beyond it DuckDB spills; the process stays under 4 GB
_MEMORY = re.compile(r"\d+(\.\d+)?\s*([KMGT]i?B|B)", re.IGNORECASE)


def checked_memory_limit(text: str | None) -> str:
    """A checked memory limit: e.g. 4GB or 512MiB; 'none' is DuckDB's default (80% of RAM)."""
    if text is None:
        return DEFAULT_MEMORY_LIMIT
    if text.strip().lower() == "none" or _MEMORY.fullmatch(text.strip()):
        return text.strip()
    raise EngineError(
        f"memory limit '{text}' is not a size such as 4GB or 512MiB, or 'none'",
        key="--memory-limit",
    )


def _set(name: str, value: exp.Expr) -> str:
    item = exp.SetItem(this=exp.EQ(this=exp.column(name), expression=value))
    return exp.Set(expressions=[item]).sql(dialect="duckdb")


def hardened_connection(
    files: list[Path],
    temp_dir: Path,
    *,
    memory_limit: str = DEFAULT_MEMORY_LIMIT,
    threads: int | None = None,
    progress: bool = False,
) -> duckdb.DuckDBPyConnection:
    """A connection that can read only the folders of ``files``, its settings locked;
    with ``progress``, DuckDB tracks its progress figure (it prints no bar of its own)."""
    config: dict[str, str | bool | int | float | list[str]] = {
        "autoinstall_known_extensions": False,
        "autoload_known_extensions": False,
        "memory_limit": memory_limit,
        "temp_directory": str(temp_dir),
    }
    if threads:
        config["threads"] = threads
    con = duckdb.connect(":memory:", config=config)
    folders = sorted({str(p.resolve().parent) + "/" for p in files})
    folders.append(str(temp_dir.resolve()) + "/")
    con.execute(
        _set("allowed_directories", exp.Array(expressions=[exp.Literal.string(f) for f in folders]))
    )
    con.execute(_set("enable_external_access", exp.false()))
    if progress:
        con.execute(_set("enable_progress_bar", exp.true()))
        con.execute(_set("enable_progress_bar_print", exp.false()))
    con.execute(_set("lock_configuration", exp.true()))
    return con


def _register_views(con: duckdb.DuckDBPyConnection, inputs: EngineInputs) -> None:
    """The views ``events`` and ``exposures`` over the inputs, with only the needed columns."""
    events = con.read_parquet(
        [str(p) for p in inputs.events], hive_partitioning=inputs.hive, union_by_name=True
    )
    events.select(*[duckdb.ColumnExpression(c) for c in inputs.event_columns]).create_view("events")
    exposures = con.read_parquet([str(p) for p in inputs.exposures], union_by_name=True)
    exposures.select(
        *[duckdb.ColumnExpression(c) for c in ("unit_id", "experiment", "variant", "ts")]
    ).create_view("exposures")


class DuckDBEngine:
    name = "duckdb"
    dialect = "duckdb"

    def __init__(
        self,
        *,
        threads: int | None = None,
        memory_limit: str | None = DEFAULT_MEMORY_LIMIT,
        temp_dir: Path | None = None,
        progress: DisplayFactory | None = None,
    ) -> None:
        self.threads = threads
        self.memory_limit = checked_memory_limit(memory_limit)
        self.temp_dir = temp_dir
        self.progress = progress  # draws a bar while unit_rows is built (terminals only)

    def version(self) -> str:
        return str(duckdb.__version__)

    def run(self, compiled: CompiledRun, inputs: EngineInputs) -> dict[str, pa.Table]:
        queries = [compiled.unit_rows, *(q for _, q in compiled.results)]
        if not all(isinstance(q, exp.Select) for q in queries):
            raise EngineError("refusing to run anything but SELECT queries")
        store = compiled.materialise(self.dialect).sql(dialect=self.dialect)
        results = [(name, query.sql(dialect=self.dialect)) for name, query in compiled.results]
        with tempfile.TemporaryDirectory(prefix="metricforge-spill-", dir=self.temp_dir) as tmp:
            try:
                con = hardened_connection(
                    inputs.events + inputs.exposures,
                    Path(tmp),
                    memory_limit=self.memory_limit,
                    threads=self.threads,
                    progress=self.progress is not None,
                )
                try:
                    _register_views(con, inputs)
                    with watch(con, self.progress):
                        con.execute(store)
                    return results_in_unit_order(con, results, memory_limit=self.memory_limit)
                finally:
                    con.close()
            except duckdb.Error as err:
                first = str(err).splitlines()[0]
                raise EngineError(f"DuckDB failed: {first}") from None
