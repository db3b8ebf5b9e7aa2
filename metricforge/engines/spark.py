"""Apache Spark: the same compiled trees, rendered in Spark's dialect, on a cluster or locally.

This is the only module that imports pyspark, and only when a Spark engine is first used,
so that the package works without the optional extra (``pip install 'metricforge[spark]'``).

The engine registers the same two views as DuckDB (``events`` with only the needed columns,
``exposures``), runs the materialisation (``CACHE TABLE unit_rows AS ...``), then each
result query, and returns Arrow tables typed as DuckDB's (engines/base.py: arrow_result).
The statements run under the same timeout watchdog as DuckDB's (engines/watchdog.py): they
run in a job group of their own (Spark Connect: under an operation tag), and once the
deadline passes that group's jobs are cancelled with their tasks interrupted (Connect:
``interruptTag``); other work of a shared session runs on.
"""

from __future__ import annotations

import os
import posixpath
import re
import shutil
import socket
import uuid
import warnings
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager, suppress
from pathlib import Path, PurePosixPath
from typing import TYPE_CHECKING, Any
from urllib.parse import urlsplit

import pyarrow as pa

from metricforge.compile.query import CompiledRun
from metricforge.compile.sqlparts import UNIT_TABLE
from metricforge.data_errors import CAST, DIVISION, OVERFLOW, DataValueError
from metricforge.engines.base import EngineInputs, arrow_result, check_statements, rendered
from metricforge.engines.watchdog import DEFAULT_TIMEOUT_S, Watchdog
from metricforge.errors import EngineError
from metricforge.schema import EXPOSURE_COLUMNS

if TYPE_CHECKING:
    from pyspark.sql import DataFrame, SparkSession

DEFAULT_MASTER = "local[2]"
CONNECT_PORT = 15002  # Spark Connect's default
CONNECT_TIMEOUT_S = 10.0
INSTALL_HINT = "pip install 'metricforge[spark]'"
VIEWS = ("events", "exposures")
# Settings of every session: naive timestamps mean UTC, exactly as in DuckDB, and TIMESTAMP
# (the type of the compiled literals and of the views' `ts`) is Spark's instant type.
SESSION_CONF: Mapping[str, str] = {
    "spark.sql.session.timeZone": "UTC",
    "spark.sql.timestampType": "TIMESTAMP_LTZ",
}
# Settings of a session this process starts itself (not of a Spark Connect server's).
LAUNCH_CONF: Mapping[str, str] = {
    "spark.ui.enabled": "false",
    "spark.ui.showConsoleProgress": "false",
    "spark.driver.memory": "2g",
}
# Local mode: a few shuffle partitions instead of 200 tiny ones.
LOCAL_CONF: Mapping[str, str] = {"spark.sql.shuffle.partitions": "4"}
LOG4J = Path(__file__).with_name("spark-log4j2.properties")
# Characters that make Spark expand a path as a glob pattern: inputs must not hold them.
GLOB_CHARACTERS = "{}[]*?\\"
# The Hadoop connector each URI scheme needs on Spark's classpath (hadoop-aws: the version
# of Spark's own hadoop-client jars).
CONNECTORS: Mapping[str, str] = {
    "s3a": "org.apache.hadoop:hadoop-aws (the version of Spark's hadoop-client jars)",
    "gs": "the GCS connector (com.google.cloud.bigdataoss:gcs-connector)",
    "abfs": "org.apache.hadoop:hadoop-azure",
    "abfss": "org.apache.hadoop:hadoop-azure",
}
# Hadoop knows these file systems by class name even where their jar is missing.
CONNECTOR_CLASSES: Mapping[str, str] = {
    "S3AFileSystem": "s3a",
    "AzureBlobFileSystem": "abfss",
    "GoogleHadoopFileSystem": "gs",
}


# Spark's error classes of a failure on a value of the data (ANSI mode, Spark 4's default).
VALUE_FAILURES: Mapping[str, str] = {
    "CAST_INVALID_INPUT": CAST,
    "CAST_OVERFLOW": OVERFLOW,
    "DIVIDE_BY_ZERO": DIVISION,
    "REMAINDER_BY_ZERO": DIVISION,
    "ARITHMETIC_OVERFLOW": OVERFLOW,
    "NUMERIC_VALUE_OUT_OF_RANGE": OVERFLOW,
}
_ERROR_CLASS = re.compile(r"\[([A-Z_]+)(\.[A-Z_]+)?\]")


def _value_failure(message: str) -> str | None:
    found = _ERROR_CLASS.search(message)
    return VALUE_FAILURES.get(found.group(1)) if found else None


def is_connect(master: str) -> bool:
    return master.startswith("sc://")


_MASTER = re.compile(
    r"(local(\[[0-9*]+(,[0-9]+)?\])?|local-cluster\[.+\]|yarn|(spark|k8s|sc)://.+)"
)


def check_master(master: str) -> None:
    if not _MASTER.fullmatch(master):
        raise EngineError(
            f"--spark-master '{master}': expected local[N], spark://host:port, yarn,"
            " k8s://https://host:port or sc://host:port"
        )


def connect_address(master: str) -> tuple[str, int]:
    """Host and port of a Spark Connect URL ``sc://host[:port][/;param=value...]``."""
    netloc = master[len("sc://") :].split("/", 1)[0].split(";", 1)[0]
    host, _, port = netloc.rpartition(":") if ":" in netloc else (netloc, "", "")
    if not host or (port and not port.isdigit()):
        raise EngineError(f"--spark-master '{master}': expected sc://host:port")
    return host.strip("[]"), int(port) if port else CONNECT_PORT


def _reachable(master: str) -> None:
    """Fail in one line at once, instead of after the client's minutes of retries."""
    host, port = connect_address(master)
    try:
        socket.create_connection((host, port), timeout=CONNECT_TIMEOUT_S).close()
    except OSError as err:
        raise EngineError(
            f"cannot reach the Spark Connect server at {host}:{port}: {err.strerror or err}"
        ) from None


def is_local(master: str) -> bool:
    return master == "local" or master.startswith("local[")


def _first_line(err: BaseException) -> str:
    """The error's first line; for a Java error behind py4j ("An error occurred while
    calling o41.parquet."), the Java exception's line."""
    lines = [line.strip() for line in str(err).splitlines() if line.strip()]
    if len(lines) > 1 and lines[0].startswith("An error occurred while calling"):
        return lines[1].removeprefix(": ")
    return lines[0] if lines else type(err).__name__


@contextmanager
def _quiet() -> Iterator[None]:
    """pyspark warns about library versions it has not been tested with; the run is checked
    against DuckDB by the tests instead."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*does not yet fully support")
        yield


def _base_path(files: Sequence[Path]) -> str:
    """The folder holding every event file, above any hive partition folders."""
    root = Path(os.path.commonpath([str(p.resolve().parent) for p in files]))
    while "=" in root.name:
        root = root.parent
    return str(root)


def _uri_base_path(uris: Sequence[str]) -> str:
    """The same for files given as URIs of one file system (``s3a://bucket/events/...``)."""
    parts = [urlsplit(u) for u in uris]
    prefix = f"{parts[0].scheme}://{parts[0].netloc}"
    root = PurePosixPath(posixpath.commonpath([posixpath.dirname(p.path) for p in parts]))
    while "=" in root.name:
        root = root.parent
    return prefix + str(root)


def _exact(locations: Sequence[str]) -> list[str]:
    """``locations`` unchanged, refusing one that Spark would read as a glob pattern."""
    for location in locations:
        if any(c in GLOB_CHARACTERS for c in location):
            raise EngineError(
                f"Spark would read '{location}' as a glob pattern (it holds one of"
                f" {GLOB_CHARACTERS}); rename the file or folder"
            )
    return list(locations)


def _connector_hint(message: str) -> str:
    """A hint when Spark lacks the file system of a URI scheme (e.g. hadoop-aws for s3a)."""
    found = re.search(r'No FileSystem for scheme "?([A-Za-z0-9+.-]+)', message)
    scheme = found.group(1) if found else None
    for name, its_scheme in CONNECTOR_CLASSES.items():
        if re.search(rf"Class \S*{name} not found", message):
            scheme = its_scheme
    if scheme is None:
        return ""
    package = CONNECTORS.get(scheme, "its Hadoop connector")
    return (
        f" (Spark has no file system for {scheme}:// here: add {package}, e.g. with"
        " --spark-conf spark.jars.packages=...)"
    )


class SparkEngine:
    """Runs compiled runs on Spark: ``local[N]``, ``spark://``, ``yarn`` or ``sc://`` (Connect)."""

    name = "spark"
    dialect = "spark"

    def __init__(
        self,
        master: str = DEFAULT_MASTER,
        conf: Mapping[str, str] | None = None,
        *,
        timeout_s: float | None = DEFAULT_TIMEOUT_S,
    ) -> None:
        self.master = master
        self.conf = dict(conf or {})
        self.timeout_s = timeout_s  # None: no timeout
        self._spark: SparkSession | None = None
        self._owned = False  # an already running session (a notebook's) is left running

    # -- session ----------------------------------------------------------------------------
    def session(self) -> SparkSession:
        """The engine's SparkSession, started on first use and reused afterwards."""
        if self._spark is None:
            self._spark = self._start()
        return self._spark

    def _start(self) -> SparkSession:
        try:
            from pyspark.sql import SparkSession
        except ImportError:
            raise EngineError(f"the Spark engine needs pyspark: {INSTALL_HINT}") from None
        check_master(self.master)
        remote = is_connect(self.master)
        if not remote and not (os.environ.get("JAVA_HOME") or shutil.which("java")):
            raise EngineError(
                "the Spark engine needs a Java 17+ runtime: none found on PATH or in JAVA_HOME"
                " (e.g. apt-get install openjdk-17-jre-headless)"
            )
        if remote:
            _reachable(self.master)
        builder: Any = SparkSession.builder.appName("metricforge")
        if remote:
            builder = builder.remote(self.master)
        else:
            builder = builder.master(self.master)
            launch = dict(LAUNCH_CONF)
            if is_local(self.master):
                launch.update(LOCAL_CONF)
            if LOG4J.is_file():
                launch["spark.driver.extraJavaOptions"] = f"-Dlog4j2.configurationFile={LOG4J}"
            for key, value in launch.items():
                builder = builder.config(key, value)
        for key, value in self.conf.items():
            builder = builder.config(key, value)
        try:
            self._owned = remote or SparkSession.getActiveSession() is None
            with _quiet():
                spark: SparkSession = builder.getOrCreate()
            for key, value in SESSION_CONF.items():
                spark.conf.set(key, value)
            if not remote:
                spark.sparkContext.setLogLevel("WARN")
        except Exception as err:  # noqa: BLE001 - py4j, gRPC and Spark errors alike
            raise EngineError(
                f"Spark could not start at {self.master}: {_first_line(err)}"
            ) from None
        return spark

    def version(self) -> str:
        return str(self.session().version)

    def storage_settings(self) -> dict[str, str]:
        """The Hadoop keys of ``--spark-conf spark.hadoop.KEY=VALUE`` (e.g. ``fs.s3a.endpoint``):
        the listing of URI inputs uses the same endpoint and keys as Spark."""
        prefix = "spark.hadoop."
        return {k[len(prefix) :]: v for k, v in self.conf.items() if k.startswith(prefix)}

    def close(self) -> None:
        """Stop the session if this engine started it."""
        if self._spark is not None and self._owned:
            self._spark.stop()
        self._spark = None

    # -- inputs -----------------------------------------------------------------------------
    def _register(self, spark: SparkSession, inputs: EngineInputs) -> None:
        from pyspark.sql import functions as F

        def read(
            files: Sequence[Path], uris: Sequence[str], columns: Sequence[str], hive: bool
        ) -> DataFrame:
            reader = spark.read.option("mergeSchema", "true")
            if hive:
                base = _uri_base_path(uris) if uris else _base_path(files)
                reader = reader.option("basePath", base)
            located = _exact(uris or [str(p.resolve()) for p in files])
            frame = reader.parquet(*located)
            # Naive timestamps are read as TIMESTAMP_NTZ; under the session's UTC they are
            # the same instants as TIMESTAMP, the type the compiled literals have.
            return frame.select(
                *[F.col(c).cast("timestamp").alias(c) if c == "ts" else F.col(c) for c in columns]
            )

        read(
            inputs.events, inputs.event_uris, inputs.event_columns, inputs.hive
        ).createOrReplaceTempView("events")
        read(
            inputs.exposures, inputs.exposure_uris, tuple(EXPOSURE_COLUMNS), False
        ).createOrReplaceTempView("exposures")

    def _drop(self, spark: SparkSession) -> None:
        for view in (UNIT_TABLE, *VIEWS):
            spark.catalog.dropTempView(view)  # also un-caches unit_rows

    # -- running ----------------------------------------------------------------------------
    def run(self, compiled: CompiledRun, inputs: EngineInputs) -> dict[str, pa.Table]:
        return self.run_statements(rendered(compiled, self.dialect), inputs)

    def run_statements(
        self, statements: Sequence[tuple[str, str]], inputs: EngineInputs
    ) -> dict[str, pa.Table]:
        """Run Spark SQL text: first the ``CACHE TABLE unit_rows AS SELECT ...``, then named
        SELECTs over it; returns each SELECT's result by name."""
        check_statements(statements, self.dialect)
        spark = self.session()
        with self._interruptible(spark) as interrupt, Watchdog(interrupt, self.timeout_s) as dog:
            try:
                self._drop(spark)
                self._register(spark, inputs)
                spark.sql(statements[0][1])  # CACHE TABLE ... AS is eager
                with _quiet():
                    tables = {
                        name: arrow_result(spark.sql(q).toArrow()) for name, q in statements[1:]
                    }
            except EngineError:
                raise
            except Exception as err:  # noqa: BLE001 - py4j, gRPC and Spark errors alike
                if dog.fired:
                    raise dog.timeout_error() from None
                first = _first_line(err)
                kind = _value_failure(first)
                if kind is not None:
                    raise DataValueError(f"Spark failed: {first}", kind) from None
                hint = _connector_hint(str(err))
                raise EngineError(f"Spark failed: {first}{hint}") from None
            finally:
                with suppress(Exception):  # a stopped session has nothing to drop
                    self._drop(spark)
            if dog.fired:
                raise dog.timeout_error()
            return tables

    @contextmanager
    def _interruptible(self, spark: SparkSession) -> Iterator[Callable[[], object]]:
        """Within it, this thread's Spark work can be stopped by the function it gives: a job
        group of its own whose cancellation interrupts the running tasks (an operation tag
        on Spark Connect, which has no SparkContext); the thread's own group is restored."""
        group = f"metricforge-{uuid.uuid4().hex}"
        if is_connect(self.master):
            spark.addTag(group)
            try:
                yield lambda: spark.interruptTag(group)
            finally:
                with suppress(Exception):
                    spark.removeTag(group)
            return
        context = spark.sparkContext
        keys = ("spark.jobGroup.id", "spark.job.description", "spark.job.interruptOnCancel")
        before = {key: context.getLocalProperty(key) for key in keys}
        context.setJobGroup(group, "metricforge", interruptOnCancel=True)
        try:
            yield lambda: context.cancelJobGroup(group)
        finally:
            with suppress(Exception):
                for key, value in before.items():
                    context.setLocalProperty(key, value)  # type: ignore[arg-type]
