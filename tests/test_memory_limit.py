"""The engine's memory limit: 3.5GB by default, settable with --memory-limit, checked early."""

from __future__ import annotations

import tempfile
from pathlib import Path

import pytest
from typer.testing import CliRunner

from metricforge.cli import app
from metricforge.engines.duckdb import (
    DEFAULT_MEMORY_LIMIT,
    DuckDBEngine,
    checked_memory_limit,
    hardened_connection,
)
from metricforge.errors import EngineError
from metricforge.runner import gather_inputs
from metricforge.spec import load_plan
from tests.conftest import PIPELINES


@pytest.mark.parametrize(
    ("given", "kept"),
    [(None, DEFAULT_MEMORY_LIMIT), ("512MiB", "512MiB"), (" 3.5GB ", "3.5GB"), ("none", "none")],
)
def test_accepted_limits(given: str | None, kept: str) -> None:
    assert checked_memory_limit(given) == kept


@pytest.mark.parametrize("given", ["4", "4 gigs", "-1GB", "GB", ""])
def test_refused_limits(given: str) -> None:
    with pytest.raises(EngineError, match="--memory-limit"):
        checked_memory_limit(given)


@pytest.mark.parametrize(("given", "setting"), [(None, "3.2 GiB"), ("300MB", "286.1 MiB")])
def test_the_connection_carries_the_limit(given: str | None, setting: str) -> None:
    inputs, _ = gather_inputs(load_plan(PIPELINES / "checkout_layout.toml"))
    engine = DuckDBEngine(memory_limit=given)
    with tempfile.TemporaryDirectory() as tmp:
        files = inputs.events + inputs.exposures
        con = hardened_connection(files, Path(tmp), memory_limit=engine.memory_limit)
        found = con.execute("SELECT current_setting('memory_limit')").fetchall()[0][0]
        con.close()
    assert found == setting  # DuckDB reports sizes given in GB (10^9 bytes) in GiB


def test_bad_limit_on_the_command_line_is_one_line(tmp_path: Path) -> None:
    out = tmp_path / "out"
    spec = str(PIPELINES / "checkout_layout.toml")
    result = CliRunner().invoke(app, ["run", spec, "--out", str(out), "--memory-limit", "4 gigs"])
    assert result.exit_code == 2
    assert result.output.strip().splitlines() == [
        "error: --memory-limit: memory limit '4 gigs' is not a size such as 4GB or 512MiB,"
        " or 'none'"
    ]
    assert not out.exists()
