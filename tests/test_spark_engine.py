"""The Spark engine from the command line: choosing it, its one-line errors, local mode and a
Spark Connect server (``sc://``) giving the DuckDB scorecard."""

from __future__ import annotations

import dataclasses
import json
import os
import re
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
import sqlglot.expressions as exp
from typer.testing import CliRunner

from metricforge.cli import app
from metricforge.compile.query import UNIT_TABLE, compile_plan
from metricforge.engines.base import EngineInputs, rendered
from metricforge.engines.choose import EngineName, open_engine, spark_conf
from metricforge.engines.spark import SparkEngine, _base_path
from metricforge.engines.watchdog import QueryTimeoutError
from metricforge.errors import EngineError
from metricforge.runner import gather_inputs
from metricforge.spec import load_plan
from tests.conftest import PIPELINES, SKIP_SPARK, event, exposure, write_case
from tests.hostile_env import snapshot
from tests.parity import assert_same_scorecard, tolerance


def _run(cli: CliRunner, *args: str) -> tuple[int, str]:
    result = cli.invoke(app, ["run", *args])
    return result.exit_code, result.output


def _scorecard(folder: Path) -> dict[str, object]:
    data: dict[str, object] = json.loads((folder / "scorecard.json").read_text())
    return data


def test_without_pyspark_the_spark_engine_says_how_to_install_it(
    cli: CliRunner, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setitem(sys.modules, "pyspark", None)  # as if it were not installed
    monkeypatch.setitem(sys.modules, "pyspark.sql", None)
    code, out = _run(
        cli, str(PIPELINES / "homepage_aa.toml"), "--out", str(tmp_path / "o"), "--engine", "spark"
    )
    assert code == 2
    assert out == "error: the Spark engine needs pyspark: pip install 'metricforge[spark]'\n"
    assert not (tmp_path / "o").exists()


def test_without_java_local_spark_says_so_in_one_line(
    cli: CliRunner, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.delenv("JAVA_HOME", raising=False)
    monkeypatch.setattr("shutil.which", lambda name: None)
    code, out = _run(
        cli, str(PIPELINES / "homepage_aa.toml"), "--out", str(tmp_path / "o"), "--engine", "spark"
    )
    assert code == 2
    assert out.startswith("error: the Spark engine needs a Java 17+ runtime")
    assert out.count("\n") == 1


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--spark-master", "local[1]"], "--spark-master and --spark-conf need --engine spark"),
        (["--engine", "spark", "--spark-conf", "spark.driver.memory"], "expected KEY=VALUE"),
        (["--engine", "flink"], "Invalid value for '--engine'"),
    ],
)
def test_engine_options_are_checked(
    cli: CliRunner, tmp_path: Path, args: list[str], message: str
) -> None:
    code, out = _run(cli, str(PIPELINES / "homepage_aa.toml"), "--out", str(tmp_path / "o"), *args)
    assert code == 2 and message in out
    assert not (tmp_path / "o").exists()


def test_spark_settings_are_key_value_pairs() -> None:
    assert spark_conf(["spark.executor.memory=8g", " a = b=c "]) == {
        "spark.executor.memory": "8g",
        "a": "b=c",
    }
    with pytest.raises(EngineError):
        spark_conf(["=8g"])


class _EndlessSession:
    """Stands in for a SparkSession (and its SparkContext) whose every query runs until its
    job group is cancelled (Spark Connect: its operation tag interrupted)."""

    def __init__(self) -> None:
        self.properties: dict[str, str] = {"spark.jobGroup.id": "notebook"}
        self.tags: list[str] = []
        self.stopped: list[str] = []
        self.stop = threading.Event()
        self.catalog = self
        self.sparkContext = self

    def dropTempView(self, name: str) -> None:  # noqa: N802 - pyspark's names
        pass

    def getLocalProperty(self, key: str) -> str | None:  # noqa: N802
        return self.properties.get(key)

    def setLocalProperty(self, key: str, value: str | None) -> None:  # noqa: N802
        if value is None:
            self.properties.pop(key, None)
        else:
            self.properties[key] = value

    def setJobGroup(self, group: str, description: str, interruptOnCancel: bool) -> None:  # noqa: N802, N803
        assert interruptOnCancel  # without it, running tasks are not stopped
        self.properties["spark.jobGroup.id"] = group

    def cancelJobGroup(self, group: str) -> None:  # noqa: N802
        assert group == self.properties["spark.jobGroup.id"]
        self.stopped.append(group)
        self.stop.set()

    def addTag(self, tag: str) -> None:  # noqa: N802
        self.tags.append(tag)

    def removeTag(self, tag: str) -> None:  # noqa: N802
        self.tags.remove(tag)

    def interruptTag(self, tag: str) -> list[str]:  # noqa: N802
        assert tag in self.tags
        self.stopped.append(tag)
        self.stop.set()
        return ["op-1"]

    def sql(self, query: str) -> None:
        if not self.stop.wait(60):
            raise AssertionError("the query was never interrupted")
        raise RuntimeError("An error occurred while calling o28.sql.")


@pytest.mark.parametrize("master", ["local[2]", "sc://localhost:15002"])
def test_spark_queries_are_interrupted_after_the_timeout(
    monkeypatch: pytest.MonkeyPatch, master: str
) -> None:
    """The watchdog stops exactly the run's own jobs (a job group of its own; Spark Connect:
    an operation tag), the error is the one-line timeout, and the thread's own job group is
    restored afterwards (no Spark needed)."""
    statements = rendered(compile_plan(load_plan(PIPELINES / "homepage_aa.toml"), "spark"), "spark")
    engine = SparkEngine(master, timeout_s=0.2)
    session = _EndlessSession()
    engine._spark = session  # type: ignore[assignment]
    monkeypatch.setattr(engine, "_register", lambda spark, inputs: None)
    inputs = EngineInputs([], [], ("ts",), hive=False)
    with pytest.raises(QueryTimeoutError, match="timeout of 0.2 s"):
        engine.run_statements(statements, inputs)
    assert session.stopped and set(session.stopped) == {session.stopped[0]}
    assert session.stopped[0].startswith("metricforge-")
    assert session.properties == {"spark.jobGroup.id": "notebook"} and session.tags == []


@pytest.mark.parametrize(("given", "expected"), [(7.5, 7.5), (None, 3600.0)])
def test_the_timeout_reaches_the_spark_engine(given: float | None, expected: float) -> None:
    with open_engine(EngineName.spark, timeout_s=given) as engine:  # no session is started
        assert isinstance(engine, SparkEngine) and engine.timeout_s == expected


def test_hive_folders_are_read_from_the_folder_above_the_partitions(tmp_path: Path) -> None:
    files = [tmp_path / "ev" / f"date=2026-09-0{d}" / "part-0.parquet" for d in (1, 2)]
    assert _base_path(files) == str((tmp_path / "ev").resolve())
    assert _base_path(files[:1]) == str((tmp_path / "ev").resolve())
    assert _base_path([tmp_path / "one.parquet"]) == str(tmp_path.resolve())


def _small_case(folder: Path) -> Path:
    """Forty units with purchases: enough for every statistic, quick on any engine."""
    units = [(f"u{i:03d}", "control" if i % 2 else "treatment") for i in range(40)]
    events = [event(u, "purchase", minutes=i, value=1.5 + i % 7) for i, (u, _) in enumerate(units)]
    spec = write_case(folder, events, [exposure(u, v) for u, v in units], decision="revenue")
    return spec


@pytest.mark.spark
@pytest.mark.slow
def test_run_on_local_spark_writes_the_duckdb_scorecard(
    cli: CliRunner, tmp_path: Path, spark_engine: object
) -> None:
    """In-process, the command reuses the test session's Spark (and leaves it running)."""
    spec = _small_case(tmp_path)
    assert _run(cli, str(spec), "--out", str(tmp_path / "duck"))[0] == 0
    code, out = _run(cli, str(spec), "--out", str(tmp_path / "spark"), "--engine", "spark")
    assert code == 0, out
    want, got = _scorecard(tmp_path / "duck"), _scorecard(tmp_path / "spark")
    assert got["stamp"]["engine"] == "spark"  # type: ignore[index]
    assert_same_scorecard(got["metrics"], want["metrics"], tolerance("spark"))  # type: ignore[arg-type]


@pytest.mark.spark
@pytest.mark.slow
def test_a_spark_run_past_its_timeout_fails_in_one_line_and_writes_nothing(
    cli: CliRunner, tmp_path: Path, spark_engine: object
) -> None:
    spec = _small_case(tmp_path)
    before = snapshot(tmp_path)
    args = ["--out", str(tmp_path / "o"), "--engine", "spark", "--timeout", "0.001"]
    result = cli.invoke(app, ["run", str(spec), *args])
    assert result.exit_code == 2, result.output
    message = result.stderr.strip()
    assert len(message.splitlines()) == 1 and "timeout of 0.001 s" in message, message
    assert snapshot(tmp_path) == before
    # the session is left usable: the next run on it completes
    assert _run(cli, str(spec), "--out", str(tmp_path / "o"), "--engine", "spark")[0] == 0


@pytest.mark.spark
@pytest.mark.slow
def test_a_runaway_spark_query_is_interrupted(
    tmp_path: Path, spark_engine: SparkEngine, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A result query that could not end in days (unit_rows crossed with itself eight
    times: 40**8 rows) is stopped by the timeout; the session stays usable."""
    plan = load_plan(_small_case(tmp_path))
    inputs, _ = gather_inputs(plan)
    compiled = compile_plan(plan, "spark")
    runaway = exp.select(exp.Count(this=exp.Star())).from_(
        exp.alias_(exp.to_table(UNIT_TABLE), "a", table=True)
    )
    for alias in "bcdefgh":
        runaway = runaway.join(
            exp.alias_(exp.to_table(UNIT_TABLE), alias, table=True), join_type="cross"
        )
    monkeypatch.setattr(spark_engine, "timeout_s", 3.0)
    with pytest.raises(QueryTimeoutError, match="timeout of 3 s"):
        spark_engine.run(dataclasses.replace(compiled, results=(("runaway", runaway),)), inputs)
    monkeypatch.setattr(spark_engine, "timeout_s", None)
    assert spark_engine.run(compiled, inputs)["moments"].num_rows > 0


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        port: int = sock.getsockname()[1]
        return port


@pytest.fixture(scope="module")
def connect_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    """A Spark Connect server on this machine's loopback, started from pyspark's own
    spark-submit and stopped (by its process id) after the module's tests."""
    if SKIP_SPARK:
        pytest.skip("METRICFORGE_SKIP_SPARK=1: the Spark tests are switched off")
    import pyspark

    home = Path(pyspark.__file__).parent
    port = _free_port()
    log = tmp_path_factory.mktemp("connect") / "server.log"
    command = [
        str(home / "bin" / "spark-submit"),
        "--class",
        "org.apache.spark.sql.connect.service.SparkConnectServer",
        "--master",
        "local[2]",
        "--conf",
        "spark.ui.enabled=false",
        "--conf",
        "spark.connect.grpc.binding.address=127.0.0.1",
        "--conf",
        f"spark.connect.grpc.binding.port={port}",
    ]
    env = {**os.environ, "SPARK_HOME": str(home)}
    with log.open("wb") as out:
        server = subprocess.Popen(command, stdout=out, stderr=subprocess.STDOUT, env=env)
    try:
        deadline = time.monotonic() + 180
        while True:
            assert server.poll() is None, log.read_text()[-2000:]
            assert time.monotonic() < deadline, "Spark Connect server did not start"
            with socket.socket() as sock:
                if sock.connect_ex(("127.0.0.1", port)) == 0:
                    break
            time.sleep(1)
        yield f"sc://127.0.0.1:{port}"
    finally:
        server.terminate()
        try:
            server.wait(timeout=60)
        except subprocess.TimeoutExpired:
            server.kill()
            server.wait()


@pytest.mark.spark
@pytest.mark.slow
def test_spark_connect_master_gives_the_duckdb_scorecard(
    cli: CliRunner, tmp_path: Path, connect_server: str
) -> None:
    """A separate process (a Connect client cannot share a process with a local session)."""
    pipeline = str(_small_case(tmp_path))
    assert _run(cli, pipeline, "--out", str(tmp_path / "duck"))[0] == 0
    command = [sys.executable, "-m", "metricforge.cli", "run", pipeline, "--out"]
    command += [str(tmp_path / "connect"), "--engine", "spark", "--spark-master", connect_server]
    done = subprocess.run(command, capture_output=True, text=True, timeout=600, check=False)
    assert done.returncode == 0, done.stderr[-2000:]
    want, got = _scorecard(tmp_path / "duck"), _scorecard(tmp_path / "connect")
    assert got["stamp"]["engine"] == "spark"  # type: ignore[index]
    assert_same_scorecard(got["metrics"], want["metrics"], tolerance("spark"))  # type: ignore[arg-type]
    assert got["variants"] == want["variants"]


@pytest.mark.spark
@pytest.mark.slow
def test_spark_reads_only_the_window_files_and_the_needed_columns(spark_engine: object) -> None:
    """Spark's own plan of the unit query: one file scan of the events, over only the listed
    files (the 14 experiment days of the 28 in sample_data) and only the needed columns."""
    from metricforge.compile.query import compile_plan
    from metricforge.engines.spark import SparkEngine
    from metricforge.runner import gather_inputs

    assert isinstance(spark_engine, SparkEngine)
    full = load_plan(PIPELINES / "checkout_layout.toml")
    plan = dataclasses.replace(
        full, spec=dataclasses.replace(full.spec, cuped=False, pre_period_days=0), pre_period_days=0
    )
    inputs, _ = gather_inputs(plan)
    assert len(inputs.events) == 14 and inputs.hive
    spark = spark_engine.session()
    spark_engine._register(spark, inputs)
    try:
        sql = compile_plan(plan, "spark").unit_rows.sql(dialect="spark")
        text = spark.sql(f"EXPLAIN FORMATTED {sql}").collect()[0][0]
    finally:
        spark_engine._drop(spark)
    scans = [
        block
        for block in text.split("\n\n")
        if "Scan parquet" in block and "events" in block.split("Location:")[-1]
    ]
    assert len(scans) == 1, text  # one scan of the events
    scan = scans[0]
    # "InMemoryFileIndex [file:/.../date=2026-09-15/part-0.parquet, ... 13 entries]"
    files = re.search(
        r"InMemoryFileIndex \[\S*date=2026-09-15/part-0\.parquet, \.\.\. (\d+) entries", scan
    )
    assert files is not None and int(files.group(1)) == 13, scan  # the first and 13 more
    schema = re.search(r"ReadSchema: struct<(.*)>", scan)
    assert schema is not None, scan
    read = {field.split(":")[0] for field in schema.group(1).split(",")}
    needed = {"ts", "cookie_id", "session_id", "event", "value", "latency_ms", "device"}
    assert read == needed | {"user_agent", "country"}, read  # country: a segment column


@pytest.mark.spark
@pytest.mark.slow
def test_a_file_spark_cannot_read_is_one_line_without_a_java_stack_trace(tmp_path: Path) -> None:
    """Its footer is sound (the run's own checks pass), its first data page is not: Spark fails
    the job, the user sees one line naming the file, and the JVM's log on stderr holds no
    stack trace; nothing is written. A separate process: the JVM writes to the stderr it was
    started with."""
    if SKIP_SPARK:
        pytest.skip("METRICFORGE_SKIP_SPARK=1: the Spark tests are switched off")
    import pyarrow.parquet as pq

    spec = _small_case(tmp_path)
    broken = tmp_path / "events" / "part-0.parquet"
    start = pq.ParquetFile(broken).metadata.row_group(0).column(0).data_page_offset
    data = bytearray(broken.read_bytes())
    data[start : start + 64] = b"\xab" * 64  # the first page's header
    broken.write_bytes(bytes(data))
    command = [sys.executable, "-m", "metricforge.cli", "run", str(spec), "--out"]
    command += [str(tmp_path / "o"), "--engine", "spark", "--spark-master", "local[1]"]
    done = subprocess.run(command, capture_output=True, text=True, timeout=600, check=False)
    assert done.returncode == 2, done.stderr[-3000:]
    last = done.stderr.strip().splitlines()[-1]
    assert last.startswith("error: Spark failed: ") and str(broken.resolve()) in last, last
    assert "\tat " not in done.stderr and "Caused by" not in done.stderr, done.stderr[-3000:]
    assert not (tmp_path / "o").exists()
