"""URI inputs end to end on each engine: a demo pipeline whose data locations are file://
URIs gives the numbers of the local-path run, with the URIs as labels; Spark is handed the
URIs themselves (its ``file:`` scheme), reruns verify them, and a URI scheme Spark has no
connector for is named in one line."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pyarrow.parquet as pq
import pytest
from typer.testing import CliRunner

from metricforge.cli import app
from metricforge.compile.query import compile_plan
from metricforge.engines.base import Engine, EngineInputs
from metricforge.errors import EngineError
from metricforge.report.scorecard import build
from metricforge.runner import execute, needed_event_columns
from metricforge.spec import load_plan
from tests.conftest import PIPELINES, ROOT, SAMPLE
from tests.parity import assert_same_rows, assert_same_scorecard, assert_same_tables, tolerance
from tests.test_engine_parity import Recording, reference
from tests.test_uri_inputs import DAYS, write_logs, write_spec

STAMPED = ("spec_sha256", "inputs_fingerprint")  # a URI spec is another spec, with other labels


def uri_copy(pipeline: Path, folder: Path) -> Path:
    """``pipeline`` with its data named by file:// URIs (and absolute definitions)."""
    text = pipeline.read_text()
    text = text.replace('"../sample_data/', f'"file://{SAMPLE.as_posix()}/')
    text = text.replace('"../metric_defs"', f'"{(ROOT / "metric_defs").as_posix()}"')
    assert text.count("file://") == 2
    spec = folder / pipeline.name
    spec.write_text(text)
    shutil.copy(pipeline.with_suffix(".lock.json"), folder)  # the decision lock, unchanged
    return spec


def unstamped(rows: list[dict[str, object]]) -> list[dict[str, object]]:
    return [{k: v for k, v in row.items() if k not in STAMPED} for row in rows]


def test_a_demo_pipeline_by_file_uris_gives_the_local_path_numbers(
    engine: Engine, tmp_path: Path
) -> None:
    pipeline = PIPELINES / "checkout_layout.toml"
    want_tables, want = reference(pipeline)  # DuckDB over the local paths
    seeing = Recording(engine)
    data = execute(load_plan(uri_copy(pipeline, tmp_path)), seeing)
    card = build(data)
    rel = tolerance(engine.name)
    assert_same_tables(seeing.tables, want_tables, rel)
    assert_same_scorecard(unstamped(card.rows), unstamped(want.rows), rel)
    assert_same_rows(card.variants, want.variants, rel)
    assert_same_rows(card.trust["checks"], want.trust["checks"], rel)
    prefix = f"file://{SAMPLE.as_posix()}/"
    assert data.inputs and all(f.label.startswith(prefix) for f in data.inputs)
    assert seeing.inputs is not None
    # every engine is handed the same files: Spark by URI, DuckDB by local path
    assert seeing.inputs.event_uris == tuple(f.label for f in data.inputs[:-1])
    assert seeing.inputs.events == [
        Path(u.removeprefix("file://")) for u in seeing.inputs.event_uris
    ]


@pytest.mark.spark
@pytest.mark.slow
def test_spark_run_and_rerun_by_file_uris_verify_the_inputs(
    tmp_path: Path, spark_engine: Engine
) -> None:
    """In-process, the commands reuse the test session's Spark (and leave it running)."""
    data = tmp_path / "data"
    write_logs(data)
    spec = write_spec(tmp_path, f"file://{data}/events", f"file://{data}/exposures.parquet")
    cli = CliRunner()
    first = tmp_path / "first"
    done = cli.invoke(app, ["run", str(spec), "--out", str(first), "--engine", "spark"])
    assert done.exit_code == 0, done.output
    manifest = json.loads((first / "manifest.json").read_text())
    assert manifest["engine"]["name"] == "spark"
    assert [r["path"] for r in manifest["inputs"]["files"]] == [
        *(f"file://{data}/events/date={d}/part-0.parquet" for d in DAYS[1:]),
        f"file://{data}/exposures.parquet",
    ]
    again = ["rerun", str(first), "--out", str(tmp_path / "again"), "--engine", "spark"]
    done = cli.invoke(app, again)
    assert done.exit_code in (0, 5), done.output  # Spark's last digits may differ
    assert "every file matches the manifest" in done.output
    changed = data / "events" / f"date={DAYS[1]}" / "part-0.parquet"
    pq.write_table(pq.read_table(changed).slice(2), changed)
    done = cli.invoke(
        app, ["rerun", str(first), "--out", str(tmp_path / "third"), "--engine", "spark"]
    )
    assert done.exit_code == 2
    assert f"changed file://{changed} (size" in done.output and "rows 40 → 38" in done.output
    assert not (tmp_path / "third").exists()


@pytest.mark.spark
@pytest.mark.slow
def test_spark_without_the_connector_of_a_scheme_says_which(
    tmp_path: Path, spark_engine: Engine
) -> None:
    """Spark as installed by pip has no S3A file system: reading s3a:// fails at once, in
    one line naming the connector to add (no request is made: the class is missing)."""
    session = spark_engine.session()  # type: ignore[attr-defined]
    try:
        session._jvm.java.lang.Class.forName("org.apache.hadoop.fs.s3a.S3AFileSystem")
    except Exception:  # noqa: BLE001 - py4j wraps the ClassNotFoundException
        pass
    else:
        pytest.skip("this Spark has the S3A connector: reading would contact S3")
    data = tmp_path / "data"
    write_logs(data)
    plan = load_plan(write_spec(tmp_path, "data/events", "data/exposures.parquet"))
    inputs = EngineInputs(
        [],
        [],
        needed_event_columns(plan),
        False,
        event_uris=("s3a://bucket/events/part-0.parquet",),
        exposure_uris=("s3a://bucket/exposures.parquet",),
    )
    with pytest.raises(EngineError) as raised:
        spark_engine.run(compile_plan(plan, "spark"), inputs)
    message = raised.value.one_line()
    assert message.startswith("Spark failed: ") and "\n" not in message
    assert "Class org.apache.hadoop.fs.s3a.S3AFileSystem not found" in message
    assert "add org.apache.hadoop:hadoop-aws" in message
