"""The embedded default engine: DuckDB, locked down before any compiled query runs."""

from __future__ import annotations

import tempfile
from collections.abc import Sequence
from pathlib import Path

import duckdb
import pyarrow as pa
import sqlglot.expressions as exp

from metricforge.compile.query import CompiledRun
from metricforge.engines.base import EngineInputs, arrow_result, check_statements, rendered
from metricforge.errors import EngineError

DEFAULT_MEMORY_LIMIT = "4GB"


def _set(name: str, value: exp.Expr) -> str:
    item = exp.SetItem(this=exp.EQ(this=exp.column(name), expression=value))
    return exp.Set(expressions=[item]).sql(dialect="duckdb")


class DuckDBEngine:
    name = "duckdb"
    dialect = "duckdb"

    def __init__(
        self,
        *,
        threads: int | None = None,
        memory_limit: str = DEFAULT_MEMORY_LIMIT,
        temp_dir: Path | None = None,
    ) -> None:
        self.threads = threads
        self.memory_limit = memory_limit
        self.temp_dir = temp_dir

    def version(self) -> str:
        return str(duckdb.__version__)

    def _connect(self, inputs: EngineInputs, temp_dir: Path) -> duckdb.DuckDBPyConnection:
        config: dict[str, str | bool | int | float | list[str]] = {
            "autoinstall_known_extensions": False,
            "autoload_known_extensions": False,
            "memory_limit": self.memory_limit,
            "temp_directory": str(temp_dir),
        }
        if self.threads:
            config["threads"] = self.threads
        con = duckdb.connect(":memory:", config=config)
        folders = sorted({str(p.resolve().parent) + "/" for p in inputs.events + inputs.exposures})
        folders.append(str(temp_dir.resolve()) + "/")
        con.execute(
            _set(
                "allowed_directories",
                exp.Array(expressions=[exp.Literal.string(f) for f in folders]),
            )
        )
        con.execute(_set("enable_external_access", exp.false()))
        con.execute(_set("lock_configuration", exp.true()))
        events = con.read_parquet(
            [str(p) for p in inputs.events], hive_partitioning=inputs.hive, union_by_name=True
        )
        events.select(*[duckdb.ColumnExpression(c) for c in inputs.event_columns]).create_view(
            "events"
        )
        exposures = con.read_parquet([str(p) for p in inputs.exposures], union_by_name=True)
        exposures.select(
            *[duckdb.ColumnExpression(c) for c in ("unit_id", "experiment", "variant", "ts")]
        ).create_view("exposures")
        return con

    def run(self, compiled: CompiledRun, inputs: EngineInputs) -> dict[str, pa.Table]:
        return self.run_statements(rendered(compiled, self.dialect), inputs)

    def run_statements(
        self, statements: Sequence[tuple[str, str]], inputs: EngineInputs
    ) -> dict[str, pa.Table]:
        """Run DuckDB SQL text: first the statement storing ``unit_rows``, then named
        SELECTs over it; returns each SELECT's result by name."""
        check_statements(statements, self.dialect)
        with tempfile.TemporaryDirectory(prefix="metricforge-spill-", dir=self.temp_dir) as tmp:
            try:
                con = self._connect(inputs, Path(tmp))
                try:
                    con.execute(statements[0][1])
                    return {name: _fetch(con.sql(text)) for name, text in statements[1:]}
                finally:
                    con.close()
            except duckdb.Error as err:
                first = str(err).splitlines()[0]
                raise EngineError(f"DuckDB failed: {first}") from None


def _fetch(relation: duckdb.DuckDBPyRelation) -> pa.Table:
    fetch = getattr(relation, "to_arrow_table", None) or relation.arrow
    table: pa.Table = fetch()
    return arrow_result(table)
