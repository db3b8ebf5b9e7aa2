"""The DuckDB connection is locked down, only checked statements run, and a timeout holds.

Each hardening step is verified on a real connection: what it should block fails, what a
run needs still works.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import duckdb
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import sqlglot
import sqlglot.expressions as exp
from typer.testing import CliRunner

from metricforge.cli import app
from metricforge.compile.query import UNIT_TABLE, CompiledRun, compile_plan
from metricforge.engines.duckdb import DuckDBEngine, hardened_connection
from metricforge.engines.guard import checked_statements
from metricforge.engines.unit_order import one_thread_connection
from metricforge.engines.watchdog import QueryTimeoutError, Watchdog
from metricforge.errors import EngineError
from metricforge.runner import gather_inputs
from metricforge.spec import load_plan
from tests.conftest import PIPELINES
from tests.hostile_env import CANARY, snapshot


@pytest.fixture
def locked(tmp_path: Path) -> tuple[duckdb.DuckDBPyConnection, Path, Path]:
    data, secret, spill = tmp_path / "data", tmp_path / "secret", tmp_path / "spill"
    for folder in (data, secret, spill):
        folder.mkdir()
    pq.write_table(pa.table({"x": [1, 2, 3]}), data / "part-0.parquet")
    pq.write_table(pa.table({"x": [9]}), data / "other.parquet")
    (secret / "canary.txt").write_text(CANARY, encoding="utf-8")
    pq.write_table(pa.table({"secret": [CANARY]}), secret / "canary.parquet")
    con = hardened_connection([data / "part-0.parquet"], spill, memory_limit="512MB", threads=1)
    yield con, data, secret
    con.close()


def _fails(con: duckdb.DuckDBPyConnection, sql: str) -> str:
    with pytest.raises(duckdb.Error) as err:
        con.execute(sql).fetchall()
    assert CANARY not in str(err.value)
    return str(err.value)


def test_an_input_file_can_be_read(locked: tuple[duckdb.DuckDBPyConnection, Path, Path]) -> None:
    con, data, _ = locked
    assert con.execute(
        f"SELECT sum(x) FROM read_parquet('{data / 'part-0.parquet'}')"
    ).fetchone() == (6,)


@pytest.mark.parametrize(
    "sql",
    [
        "SELECT content FROM read_text('{secret}/canary.txt')",
        "SELECT * FROM read_csv('{secret}/canary.txt')",
        "SELECT * FROM read_parquet('{secret}/canary.parquet')",
        "SELECT * FROM '{secret}/canary.parquet'",
        "SELECT * FROM read_parquet('{data}/../secret/canary.parquet')",
        "SELECT * FROM read_parquet('{data}/other.parquet')",  # same folder, not an input
        "SELECT * FROM glob('{secret}/*')",
        "SELECT * FROM read_parquet('{data}/*.parquet')",
    ],
    ids=[
        "read_text",
        "read_csv",
        "read_parquet",
        "replacement_scan",
        "traversal",
        "sibling",
        "glob",
        "wildcard",
    ],
)
def test_reading_anything_but_the_inputs_fails(
    locked: tuple[duckdb.DuckDBPyConnection, Path, Path], sql: str
) -> None:
    con, data, secret = locked
    assert "disabled by configuration" in _fails(con, sql.format(data=data, secret=secret))


@pytest.mark.parametrize(
    "sql",
    [
        "COPY (SELECT 1) TO '{secret}/stolen.csv'",
        "COPY (SELECT 1) TO '{data}/part-0.parquet'",  # overwrite an input
        "COPY (SELECT 1) TO '{data}/new.csv'",
        "ATTACH '{data}/db.duckdb' AS other",
        "EXPORT DATABASE '{data}/export'",
        "INSTALL httpfs",
        "LOAD httpfs",
    ],
    ids=[
        "copy_out",
        "copy_over_input",
        "copy_into_input_folder",
        "attach",
        "export",
        "install",
        "load",
    ],
)
def test_writing_and_extensions_fail(
    locked: tuple[duckdb.DuckDBPyConnection, Path, Path], sql: str
) -> None:
    con, data, secret = locked
    before = snapshot(data.parent)
    _fails(con, sql.format(data=data, secret=secret))
    assert snapshot(data.parent) == before


@pytest.mark.parametrize(
    "sql",
    [
        "SET enable_external_access = true",
        "SET lock_configuration = false",
        "SET allowed_directories = ['/']",
        "SET allowed_paths = ['/etc/passwd']",
        "SET memory_limit = '100GB'",
        "RESET memory_limit",
        "SET autoload_known_extensions = true",
        "SET TimeZone = 'Europe/Berlin'",
    ],
)
def test_settings_cannot_change_after_lock(
    locked: tuple[duckdb.DuckDBPyConnection, Path, Path], sql: str
) -> None:
    assert "configuration has been locked" in _fails(locked[0], sql)


def test_settings_hold_the_hardened_values(
    locked: tuple[duckdb.DuckDBPyConnection, Path, Path], tmp_path: Path
) -> None:
    names = [
        "enable_external_access",
        "autoinstall_known_extensions",
        "autoload_known_extensions",
        "allow_community_extensions",
        "allow_persistent_secrets",
        "lock_configuration",
        "TimeZone",
        "temp_directory",
        "memory_limit",
        "allowed_directories",
        "threads",
        "disabled_optimizers",
    ]
    got = dict(
        zip(
            names,
            locked[0]
            .execute(f"SELECT {', '.join(f'current_setting({n!r})' for n in names)}")
            .fetchone(),
            strict=True,
        )
    )
    assert got["enable_external_access"] is False
    assert got["autoinstall_known_extensions"] is False
    assert got["autoload_known_extensions"] is False
    assert got["allow_community_extensions"] is False
    assert got["allow_persistent_secrets"] is False
    assert got["lock_configuration"] is True
    assert got["TimeZone"] == "UTC"
    assert got["temp_directory"] == str(tmp_path / "spill")
    assert got["memory_limit"] in ("488.2 MiB", "512.0 MB", "512MB")
    assert got["allowed_directories"] == [str((tmp_path / "spill").resolve()) + "/"]
    assert got["threads"] == 1
    assert got["disabled_optimizers"] == "statistics_propagation"  # NaN-blind statistics


# -- only checked statements run -----------------------------------------------------------


@pytest.fixture(scope="module")
def compiled() -> CompiledRun:
    return compile_plan(load_plan(PIPELINES / "checkout_layout.toml"))


def _with_result(run: CompiledRun, sql: str) -> CompiledRun:
    return dataclasses.replace(run, results=((("probe", sqlglot.parse_one(sql, read="duckdb")),)))


@pytest.mark.parametrize(
    ("sql", "needle"),
    [
        ("SELECT * FROM events", "it reads 'events'"),
        ("SELECT * FROM exposures", "it reads 'exposures'"),
        ("SELECT content FROM read_text('/etc/passwd')", "not a plain table name"),
        ("SELECT * FROM 'secret.parquet'", "allowed"),
        ("SELECT read_text('/etc/passwd') FROM unit_rows", "Anonymous"),
        ("SELECT current_setting('threads') FROM unit_rows", "Anonymous"),
        ("SELECT 1 FROM unit_rows UNION SELECT 2 FROM unit_rows", "single SELECT"),
        ("COPY unit_rows TO 'x.csv'", "single SELECT"),
        ("SELECT * FROM other.main.unit_rows", "plain table name"),
        ("SELECT x FROM unit_rows, UNNEST(range(9)) AS t(x)", "only a column"),
        ("SELECT x FROM unit_rows, UNNEST([1, 2, 3]) AS t(x)", "only a column"),
        ("SELECT * FROM unit_rows WHERE unit = ?", "Placeholder"),
    ],
)
def test_result_queries_are_checked(compiled: CompiledRun, sql: str, needle: str) -> None:
    with pytest.raises(EngineError) as err:
        checked_statements(_with_result(compiled, sql), "duckdb")
    assert "refusing to run statement 'probe'" in str(err.value)
    assert needle in str(err.value)


def test_materialisation_is_checked(compiled: CompiledRun, monkeypatch: pytest.MonkeyPatch) -> None:
    hostile = exp.Create(
        this=exp.to_table("unit_rows"),
        kind="TABLE",
        expression=compiled.unit_rows,
        replace=True,
    )
    monkeypatch.setattr(CompiledRun, "materialise", lambda self, dialect: hostile)
    with pytest.raises(EngineError, match="CREATE TEMPORARY TABLE"):
        checked_statements(compiled, "duckdb")
    other = exp.Create(
        this=exp.to_table("events"),
        kind="TABLE",
        expression=compiled.unit_rows,
        properties=exp.Properties(expressions=[exp.TemporaryProperty()]),
    )
    monkeypatch.setattr(CompiledRun, "materialise", lambda self, dialect: other)
    with pytest.raises(EngineError, match="must store the table unit_rows"):
        checked_statements(compiled, "duckdb")


def test_unit_query_reading_a_file_is_refused(compiled: CompiledRun) -> None:
    sneaky = compiled.unit_rows.copy()
    sneaky.set(
        "where",
        exp.Where(this=exp.func("read_text", exp.Literal.string("/etc/passwd")).is_(exp.null())),
    )
    with pytest.raises(EngineError, match="unit_rows.*Anonymous"):
        checked_statements(dataclasses.replace(compiled, unit_rows=sneaky), "duckdb")


def test_a_list_column_may_be_spread_into_rows(compiled: CompiledRun) -> None:
    spread = "SELECT variant, v FROM unit_rows CROSS JOIN UNNEST(list_col) AS t(v)"
    assert [n for n, _ in checked_statements(_with_result(compiled, spread), "duckdb")][
        -1
    ] == "probe"


def test_checked_statements_of_a_real_run(compiled: CompiledRun) -> None:
    names = [name for name, _ in checked_statements(compiled, "duckdb")]
    assert names == [UNIT_TABLE, *(name for name, _ in compiled.results)]
    assert names[:3] == [UNIT_TABLE, "moments", "data_quality"]
    for name, sql in checked_statements(compiled, "duckdb"):
        kinds = [s.type.name for s in duckdb.extract_statements(sql)]
        assert kinds == (["CREATE"] if name == UNIT_TABLE else ["SELECT"])


def test_the_result_connection_spills_only_into_its_private_folder(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The second, one-thread DuckDB (engines/unit_order.py) under a memory limit it must
    exceed: it spills into the folder it was given, never into ``.tmp`` of the current
    folder, and it stays locked (no file access, no setting changes)."""
    cwd, spill, secret = tmp_path / "cwd", tmp_path / "spill", tmp_path / "secret"
    for folder in (cwd, secret):
        folder.mkdir()
    (secret / "canary.txt").write_text(CANARY, encoding="utf-8")
    monkeypatch.chdir(cwd)
    n = 1_000_000
    units = pa.table(
        {"unit": pa.array(range(n)), "label": pa.array([f"{i:09d}" for i in range(n)])}
    )
    con = one_thread_connection(units, "30MB", spill)
    seen: set[str] = set()
    try:
        setting = con.sql("SELECT current_setting('temp_directory')").fetchall()
        assert setting == [(str(spill),)]
        query = f"SELECT label, COUNT(*) AS n FROM {UNIT_TABLE} GROUP BY label ORDER BY label DESC"
        assert con.sql(query).to_arrow_table().num_rows == n
        seen.update(p.name for p in spill.iterdir())  # kept until the connection closes
        assert "disabled by configuration" in _fails(
            con, f"SELECT * FROM read_text('{secret}/canary.txt')"
        )
        assert "configuration has been locked" in _fails(con, "SET temp_directory = '.tmp'")
    finally:
        con.close()
    assert any(name.startswith("duckdb_temp") for name in seen), seen
    assert list(cwd.iterdir()) == []


# -- the timeout --------------------------------------------------------------------------


def test_watchdog_strikes_after_the_deadline_and_not_before() -> None:
    calls: list[int] = []
    with Watchdog(lambda: calls.append(1), 0.0) as dog:
        while not calls:
            pass
    assert dog.fired and calls
    with Watchdog(lambda: calls.append(2), 3600.0) as quiet:
        pass
    assert not quiet.fired and 2 not in calls
    with Watchdog(lambda: calls.append(3), None) as off:
        pass
    assert not off.fired and 3 not in calls


def test_a_runaway_query_is_interrupted(compiled: CompiledRun) -> None:
    plan = load_plan(PIPELINES / "checkout_layout.toml")
    inputs, _ = gather_inputs(plan)
    # A legitimate-looking but endless result: unit_rows joined with itself five times.
    runaway = exp.select(exp.Count(this=exp.Star())).from_(
        exp.alias_(exp.to_table(UNIT_TABLE), "a", table=True)
    )
    for alias in "bcde":
        runaway = runaway.join(
            exp.alias_(exp.to_table(UNIT_TABLE), alias, table=True), join_type="cross"
        )
    run = dataclasses.replace(compiled, results=(("runaway", runaway),))
    with pytest.raises(QueryTimeoutError, match="timeout of 0.5 s"):
        DuckDBEngine(timeout_s=0.5, threads=1).run(run, inputs)


def test_run_with_a_tiny_timeout_fails_cleanly(tmp_path: Path) -> None:
    before = snapshot(tmp_path)
    result = CliRunner().invoke(
        app,
        [
            "run",
            str(PIPELINES / "checkout_layout.toml"),
            "--out",
            str(tmp_path / "out"),
            "--timeout",
            "0.001",
        ],
    )
    assert result.exit_code == 2, result.output
    message = result.stderr.strip()
    assert len(message.splitlines()) == 1
    assert "timeout of 0.001 s" in message and "--timeout" in message
    assert snapshot(tmp_path) == before
