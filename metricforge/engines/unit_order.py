"""Result queries over ``unit_rows`` in one fixed order, on one thread (DuckDB).

A floating-point aggregate (AVG, VARIANCE, COVAR_SAMP) depends on the order in which it
sees its values; with several threads that order changes from run to run. Ordering every
aggregate by unit (``AVG(x ORDER BY unit)``) makes it stable but sorts the units once per
aggregate. Instead, the per-unit table is read back sorted by unit once and the result
queries run over it in a second DuckDB with a single thread: a query that scans
``unit_rows`` directly then feeds every aggregate the units in unit order, and gives the
same bits as the ordered aggregates (tests/test_result_order.py).

The second DuckDB is locked down like the first: no file access, no extensions, its own
private temporary folder for spilling (without one DuckDB spills into ``.tmp`` in the
current folder), its configuration locked before any result query runs.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from pathlib import Path

import duckdb
import pyarrow as pa
import sqlglot.expressions as exp

from metricforge.compile.sqlparts import UNIT_TABLE

IN_UNIT_ORDER = exp.select("*").from_(UNIT_TABLE).order_by("unit").sql(dialect="duckdb")


def _set(name: str, value: exp.Expr) -> str:
    item = exp.SetItem(this=exp.EQ(this=exp.column(name), expression=value))
    return exp.Set(expressions=[item]).sql(dialect="duckdb")


def one_thread_connection(
    units: pa.Table, memory_limit: str, temp_dir: Path
) -> duckdb.DuckDBPyConnection:
    """A locked, single-threaded DuckDB holding ``units`` as the table ``unit_rows``; it
    spills only into ``temp_dir`` (created if missing)."""
    temp_dir.mkdir(parents=True, exist_ok=True)
    con = duckdb.connect(
        ":memory:",
        config={
            "threads": 1,
            "memory_limit": memory_limit,
            "temp_directory": str(temp_dir),
            "autoinstall_known_extensions": False,
            "autoload_known_extensions": False,
            "allow_community_extensions": False,
            "allow_persistent_secrets": False,
        },
    )
    # DuckDB refuses a temporary folder in the same config as external access off: the
    # folder is set first, then access is closed (the folder alone stays writable), then
    # the configuration is locked.
    spill = exp.Array(expressions=[exp.Literal.string(str(temp_dir.resolve()) + "/")])
    for name, value in (
        ("allowed_directories", spill),
        ("enable_external_access", exp.false()),
        ("lock_configuration", exp.true()),
    ):
        con.execute(_set(name, value))
    con.register(UNIT_TABLE, units)
    return con


def results_in_unit_order(
    con: duckdb.DuckDBPyConnection,
    results: Iterable[tuple[str, str]],
    *,
    memory_limit: str,
    temp_dir: Path,
    on_open: Callable[[duckdb.DuckDBPyConnection], None] | None = None,
) -> dict[str, pa.Table]:
    """Each (name, SQL) result query's table, run over ``con``'s unit_rows in unit order;
    ``on_open`` is told the second connection (e.g. so that a timeout can interrupt it);
    the second connection spills into ``temp_dir``."""
    units = con.sql(IN_UNIT_ORDER).to_arrow_table()
    ordered = one_thread_connection(units, memory_limit, temp_dir)
    if on_open is not None:
        on_open(ordered)
    try:
        return {name: ordered.sql(sql).to_arrow_table() for name, sql in results}
    finally:
        ordered.close()
