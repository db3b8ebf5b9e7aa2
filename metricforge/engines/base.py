"""The engine interface: run one compiled run over two registered inputs."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Protocol

import pyarrow as pa
import sqlglot

from metricforge.compile.query import CompiledRun
from metricforge.compile.sqlparts import UNIT_TABLE
from metricforge.engines.guard import check_materialisation, check_select, checked_statements
from metricforge.errors import EngineError


@dataclass(frozen=True)
class EngineInputs:
    events: list[Path]  # local files: paths, or those of file:// URIs; none for remote data
    exposures: list[Path]
    event_columns: tuple[str, ...]  # only these are read
    hive: bool
    # When the spec named URIs: the same files as the URIs an engine reading URIs is given
    # (s3a://, hdfs://, file:/...; see locations.py), in the same order.
    event_uris: tuple[str, ...] = ()
    exposure_uris: tuple[str, ...] = ()


class Engine(Protocol):
    name: str
    dialect: str

    def version(self) -> str: ...

    def storage_settings(self) -> Mapping[str, str] | None:
        """Settings of the remote file systems the engine reads (Hadoop keys such as
        ``fs.s3a.endpoint``), used to list the inputs too; None when the engine reads only
        local files (paths and file:// URIs)."""
        ...

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
    """The run's statements as SQL text of ``dialect``, named, in execution order, each
    checked by ``engines/guard.py``."""
    return checked_statements(compiled, dialect)


def check_statements(statements: Sequence[tuple[str, str]], dialect: str) -> None:
    """SQL text an engine may run (e.g. a golden file): first the statement storing a
    SELECT as ``unit_rows``, then SELECTs over it; the same rules as ``engines/guard.py``."""
    if len(statements) < 2:
        raise EngineError("a run needs the unit_rows statement and at least one result query")
    for i, (name, text) in enumerate(statements):
        try:
            trees = [t for t in sqlglot.parse(text, read=dialect) if t is not None]
        except sqlglot.errors.SqlglotError as err:
            first = (str(err).splitlines() or [""])[0]
            raise EngineError(f"cannot parse statement '{name}': {first}") from None
        if len(trees) != 1:
            raise EngineError(f"refusing to run statement '{name}': not exactly one statement")
        if i == 0:
            check_materialisation(trees[0], dialect)
        else:
            check_select(name, trees[0], frozenset({UNIT_TABLE}))
