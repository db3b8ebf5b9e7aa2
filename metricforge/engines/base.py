"""The engine interface: run one compiled run over two registered inputs."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Protocol

import pyarrow as pa
import sqlglot
import sqlglot.expressions as exp

from metricforge.compile.query import UNIT_TABLE, CompiledRun
from metricforge.errors import EngineError


@dataclass(frozen=True)
class EngineInputs:
    events: list[Path]
    exposures: list[Path]
    event_columns: tuple[str, ...]  # only these are read
    hive: bool


class Engine(Protocol):
    name: str
    dialect: str

    def version(self) -> str: ...

    def run(self, compiled: CompiledRun, inputs: EngineInputs) -> dict[str, pa.Table]:
        """Materialise ``compiled.unit_rows``, then return each result query's table by name."""
        ...

    def run_statements(
        self, statements: Sequence[tuple[str, str]], inputs: EngineInputs
    ) -> dict[str, pa.Table]:
        """The same from SQL text of the engine's dialect (as ``rendered`` gives it)."""
        ...


def arrow_result(table: pa.Table) -> pa.Table:
    """One Arrow typing of result tables on every engine: strings as ``string`` (not
    ``large_string``), and integer sums as ``int64`` (DuckDB's SUM of BIGINT is a 128-bit
    integer, Arrow ``decimal128(38, 0)``; Spark's is BIGINT). Real decimals stay decimals."""
    fields = []
    for field in table.schema:
        kind = field.type
        if pa.types.is_large_string(kind):
            kind = pa.string()
        elif pa.types.is_large_binary(kind):
            kind = pa.binary()
        elif pa.types.is_decimal(kind) and kind.scale == 0:
            kind = pa.int64()  # a checked cast: a sum past 2**63 fails loudly
        fields.append(pa.field(field.name, kind, field.nullable))
    schema = pa.schema(fields)
    return table if schema.equals(table.schema) else table.cast(schema)


def rendered(compiled: CompiledRun, dialect: str) -> list[tuple[str, str]]:
    """The run's statements as SQL text of ``dialect``, named, in execution order."""
    queries = [compiled.unit_rows, *(q for _, q in compiled.results)]
    if not all(isinstance(q, exp.Select) for q in queries):
        raise EngineError("refusing to run anything but SELECT queries")
    return [(name, tree.sql(dialect=dialect)) for name, tree in compiled.statements(dialect)]


def check_statements(statements: Sequence[tuple[str, str]], dialect: str) -> None:
    """SQL text an engine may run: first the statement storing a SELECT as ``unit_rows``
    (a temporary table or a cache), then SELECTs only."""
    if len(statements) < 2:
        raise EngineError("a run needs the unit_rows statement and at least one result query")
    for i, (name, text) in enumerate(statements):
        try:
            trees = sqlglot.parse(text, read=dialect)
        except sqlglot.errors.SqlglotError as err:
            first = (str(err).splitlines() or [""])[0]
            raise EngineError(f"cannot parse statement '{name}': {first}") from None
        tree = trees[0] if len(trees) == 1 else None
        if i == 0:
            ok = (
                isinstance(tree, exp.Create | exp.Cache)
                and isinstance(tree.this, exp.Table)
                and tree.this.name == UNIT_TABLE
                and isinstance(tree.expression, exp.Select)
            )
        else:
            ok = isinstance(tree, exp.Select)
        if not ok:
            raise EngineError(f"refusing to run statement '{name}': not the expected query")
