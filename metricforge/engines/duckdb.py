"""The embedded default engine: DuckDB, locked down before any compiled query runs.

The connection is hardened in this order, then its configuration is locked:
extension auto-install and auto-load off, community extensions and persistent secrets
off, a memory limit and a private temporary directory, external access off with exactly
the input files readable (``allowed_paths``; ``allowed_directories`` holds only the private
temporary folder: DuckDB lets both lists be written as well as read, so no input folder is
on them), time zone UTC. Only the statements that ``engines/guard.py`` checked run on it,
under a timeout watchdog.

The unit query runs on every thread and stores ``unit_rows``; the result queries then run
over it in unit order on one thread (``unit_order.py``), so runs are bit-identical.
"""

from __future__ import annotations

import re
import tempfile
from collections.abc import Sequence
from pathlib import Path

import duckdb
import pyarrow as pa
import sqlglot.expressions as exp

from metricforge.compile.query import CompiledRun
from metricforge.data_errors import CAST, DIVISION, OVERFLOW, DataValueError
from metricforge.engines.base import EngineInputs, arrow_result, check_statements, rendered
from metricforge.engines.unit_order import results_in_unit_order
from metricforge.engines.watchdog import DEFAULT_TIMEOUT_S, Watchdog
from metricforge.errors import EngineError
from metricforge.inputs import find_unreadable
from metricforge.progress import DisplayFactory, watch

DEFAULT_MEMORY_LIMIT = "3.5GB"  # beyond it DuckDB spills; the process stays under 4 GB
_MEMORY = re.compile(r"\d+(\.\d+)?\s*([KMGT]i?B|B)", re.IGNORECASE)
_STATEMENT_TYPES = {"unit_rows": "CREATE"}
# Errors of the data's values or of the query, not of reading a file: no need to look
# for a broken input (which reads every file).
_NOT_A_FILE_PROBLEM = (
    duckdb.ConversionException,
    duckdb.OutOfRangeException,
    duckdb.BinderException,
    duckdb.InterruptException,
    duckdb.OutOfMemoryException,
)


def _value_failure(err: duckdb.Error) -> str | None:
    """The kind of failure on a value of the data (data_errors.py), if it is one."""
    if isinstance(err, duckdb.ConversionException):
        return CAST
    if isinstance(err, duckdb.OutOfRangeException):
        return OVERFLOW
    if isinstance(err, duckdb.InvalidInputException) and "Division by zero" in str(err):
        return DIVISION
    return None


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
    """A connection that can read only ``files`` and whose settings are locked; with
    ``progress``, DuckDB tracks its progress figure (it prints no bar of its own)."""
    config: dict[str, str | bool | int | float | list[str]] = {
        "autoinstall_known_extensions": False,
        "autoload_known_extensions": False,
        "allow_community_extensions": False,
        "allow_persistent_secrets": False,
        "memory_limit": memory_limit,
        "temp_directory": str(temp_dir),
        # Parquet min/max statistics leave NaN out; with them DuckDB folds `isnan(x)` to false
        # and `abs(x) < 1e18` to true for a column holding NaN (and may take a TRY_CAST for one
        # that cannot fail), so NaN values would slip past the checks of compile/quality.py.
        # Values are decided row by row instead.
        "disabled_optimizers": "statistics_propagation",
    }
    if threads:
        config["threads"] = threads
    con = duckdb.connect(":memory:", config=config)
    paths = sorted({str(p) for f in files for p in (f.absolute(), f.resolve())})
    spill = str(temp_dir.resolve()) + "/"
    settings: list[tuple[str, exp.Expr]] = [
        ("TimeZone", exp.Literal.string("UTC")),
        ("allowed_paths", exp.Array(expressions=[exp.Literal.string(p) for p in paths])),
        ("allowed_directories", exp.Array(expressions=[exp.Literal.string(spill)])),
        ("enable_external_access", exp.false()),
    ]
    if progress:
        settings += [
            ("enable_progress_bar", exp.true()),
            ("enable_progress_bar_print", exp.false()),
        ]
    settings.append(("lock_configuration", exp.true()))  # last: nothing can change after it
    for name, value in settings:
        con.execute(_set(name, value))
    return con


def _register_views(con: duckdb.DuckDBPyConnection, inputs: EngineInputs) -> None:
    """The views ``events`` and ``exposures`` over the inputs; ``ts`` as UTC TIMESTAMP."""

    def column(name: str) -> duckdb.Expression:
        if name == "ts":  # naive (UTC by contract) and zoned files alike become UTC
            return duckdb.ColumnExpression(name).cast(duckdb.sqltypes.TIMESTAMP).alias(name)
        return duckdb.ColumnExpression(name)

    events = con.read_parquet(
        [str(p.absolute()) for p in inputs.events],
        hive_partitioning=inputs.hive,
        union_by_name=True,
    )
    events.select(*[column(c) for c in inputs.event_columns]).create_view("events")
    exposures = con.read_parquet([str(p.absolute()) for p in inputs.exposures], union_by_name=True)
    exposures.select(*[column(c) for c in ("unit_id", "experiment", "variant", "ts")]).create_view(
        "exposures"
    )


def _check_with_duckdb(statements: Sequence[tuple[str, str]]) -> None:
    """DuckDB's own parser must see exactly one statement of the expected type in each."""
    for name, sql in statements:
        parsed = duckdb.extract_statements(sql)
        expected = _STATEMENT_TYPES.get(name, "SELECT")
        if len(parsed) != 1 or parsed[0].type.name != expected:
            raise EngineError(f"refusing to run statement '{name}': not one {expected} statement")


class DuckDBEngine:
    name = "duckdb"
    dialect = "duckdb"

    def __init__(
        self,
        *,
        threads: int | None = None,
        memory_limit: str | None = DEFAULT_MEMORY_LIMIT,
        temp_dir: Path | None = None,
        timeout_s: float | None = DEFAULT_TIMEOUT_S,
        progress: DisplayFactory | None = None,
    ) -> None:
        self.threads = threads
        self.memory_limit = checked_memory_limit(memory_limit)
        self.temp_dir = temp_dir
        self.timeout_s = timeout_s
        self.progress = progress  # draws a bar while unit_rows is built (terminals only)

    def version(self) -> str:
        return str(duckdb.__version__)

    def storage_settings(self) -> None:
        """None: external access is off, only local files are read (file:// URIs as paths)."""
        return None

    def run(self, compiled: CompiledRun, inputs: EngineInputs) -> dict[str, pa.Table]:
        # rendered() checks every statement as a tree and parses its text back (guard.py)
        return self._execute(rendered(compiled, self.dialect), inputs)

    def run_statements(
        self, statements: Sequence[tuple[str, str]], inputs: EngineInputs
    ) -> dict[str, pa.Table]:
        """Run DuckDB SQL text: first the statement storing ``unit_rows``, then named
        SELECTs over it (in unit order, on one thread); returns each SELECT's result."""
        check_statements(statements, self.dialect)
        return self._execute(statements, inputs)

    def _execute(
        self, statements: Sequence[tuple[str, str]], inputs: EngineInputs
    ) -> dict[str, pa.Table]:
        """Checked statements: DuckDB's own parser must agree, then they run."""
        _check_with_duckdb(statements)
        (_, store), results = statements[0], statements[1:]
        with tempfile.TemporaryDirectory(prefix="metricforge-spill-", dir=self.temp_dir) as tmp:
            try:
                con = hardened_connection(
                    inputs.events + inputs.exposures,
                    Path(tmp),
                    memory_limit=self.memory_limit,
                    threads=self.threads,
                    progress=self.progress is not None,
                )
            except duckdb.Error as err:
                raise EngineError(f"DuckDB failed to start: {_first_line(err)}") from None
            running = [con]  # the connection a timeout interrupts: the second one, once open
            try:
                with Watchdog(lambda: running[-1].interrupt(), self.timeout_s) as dog:
                    try:
                        _register_views(con, inputs)
                        with watch(con, self.progress):
                            con.execute(store)
                        tables = results_in_unit_order(
                            con,
                            results,
                            memory_limit=self.memory_limit,
                            temp_dir=Path(tmp) / "ordered",
                            on_open=running.append,
                        )
                        tables = {name: arrow_result(t) for name, t in tables.items()}
                    except duckdb.Error as err:
                        if dog.fired:
                            raise dog.timeout_error() from None
                        broken = None
                        if not isinstance(err, _NOT_A_FILE_PROBLEM):  # name a broken file
                            broken = find_unreadable(inputs.events + inputs.exposures)
                        if broken is not None:
                            raise broken from None
                        message = f"DuckDB failed: {_first_line(err)}"
                        kind = _value_failure(err)
                        if kind is not None:
                            raise DataValueError(message, kind) from None
                        raise EngineError(message) from None
                    if dog.fired:
                        raise dog.timeout_error()
                    return tables
            finally:
                con.close()


def _first_line(err: BaseException) -> str:
    return (str(err).splitlines() or [type(err).__name__])[0]
