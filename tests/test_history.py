"""The run history: one line per complete run in the output root, safe under concurrency."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import pytest
from typer.testing import CliRunner

from metricforge.cli import app
from metricforge.history import HISTORY_NAME, read_history
from tests.conftest import ROOT
from tests.test_rerun import partitioned_case


def invoke(*args: str | Path) -> Any:
    return CliRunner().invoke(app, [str(a) for a in args])


@pytest.fixture
def case(tmp_path: Path) -> Path:
    shutil.copytree(ROOT / "metric_defs", tmp_path / "defs")
    return partitioned_case(tmp_path / "exp", tmp_path / "defs")


def lines(root: Path) -> list[dict[str, Any]]:
    return [json.loads(li) for li in (root / HISTORY_NAME).read_text().splitlines()]


def test_every_run_and_rerun_is_catalogued(case: Path, tmp_path: Path) -> None:
    root = tmp_path / "results"
    assert invoke("run", case, "--out", root / "a").exit_code == 0
    assert invoke("run", case, "--out", root / "b", "--bot-filter", "bots@2").exit_code == 0
    assert invoke("rerun", root / "a", "--out", root / "a_again").exit_code == 0
    entries = lines(root)
    assert [e["command"] for e in entries] == ["run", "run", "rerun"]
    assert [e["bot_filter"] for e in entries] == ["bots@1", "bots@2", "bots@1"]
    first = entries[0]
    manifest = json.loads((root / "a" / "manifest.json").read_text())
    stamp = manifest["stamp"]
    assert first["experiment"] == "case" and first["run_at"] == manifest["run_at"]
    for key in ("definitions_sha256", "spec_sha256", "inputs_fingerprint", "bot_filter_sha256"):
        assert first[key] == stamp[key]
    assert first["out"] == "a" and first["out_absolute"] == (root / "a").as_posix()
    assert first["decision"][0]["metric"] == "revenue"
    assert entries[2]["reproduced"] is True
    assert entries[2]["rerun_of"] == (root / "a" / "manifest.json").as_posix()


def test_history_command_lists_and_filters(case: Path, tmp_path: Path) -> None:
    root = tmp_path / "results"
    assert invoke("run", case, "--out", root / "a").exit_code == 0
    listed = invoke("history", root)
    assert listed.exit_code == 0 and "case" in listed.output and "1 run(s)" in listed.output
    assert "revenue: treatment" in listed.output  # the decision per variant, named
    other = invoke("history", root, "--experiment", "checkout_layout")
    assert other.exit_code == 0 and "0 run(s)" in other.output
    assert "no run of experiment 'checkout_layout'" in other.output
    typo = invoke("history", root, "--experiment", "cas")
    assert "(did you mean 'case'?)" in typo.output and "catalogued: case" in typo.output
    assert invoke("history", tmp_path / "nowhere").exit_code == 2


def test_failed_run_leaves_no_line(case: Path, tmp_path: Path) -> None:
    root = tmp_path / "results"
    assert invoke("run", case, "--out", root / "a").exit_code == 0
    case.write_text(case.read_text().replace('decision = "revenue"', 'decision = "revenu"'))
    assert invoke("run", case, "--out", root / "b").exit_code == 2
    assert len(lines(root)) == 1 and not (root / "b").exists()


def test_unwritable_history_keeps_the_complete_result(case: Path, tmp_path: Path) -> None:
    root = tmp_path / "results"
    (root / HISTORY_NAME).mkdir(parents=True)  # a folder where the file should be
    result = invoke("run", case, "--out", root / "a")
    assert result.exit_code == 0, result.output
    assert "warning: the result is complete but was not added" in result.output
    assert {p.name for p in (root / "a").iterdir()} == {
        "scorecard.parquet",
        "scorecard.json",
        "manifest.json",
    }


def test_broken_line_is_skipped_with_a_warning(case: Path, tmp_path: Path) -> None:
    root = tmp_path / "results"
    assert invoke("run", case, "--out", root / "a").exit_code == 0
    with (root / HISTORY_NAME).open("a") as fh:
        fh.write('{"experiment": "cut sho\n')
    assert invoke("run", case, "--out", root / "b").exit_code == 0
    entries, warnings = read_history(root)
    assert [e["out"] for e in entries] == ["a", "b"]
    assert len(warnings) == 1 and f"{HISTORY_NAME}:2" in warnings[0]


WRITER = """
import sys, time
from pathlib import Path
from metricforge.history import append
root, worker, count = Path(sys.argv[1]), sys.argv[2], int(sys.argv[3])
(root / ("ready-" + worker)).touch()
while not (root / "go").exists():  # start together
    time.sleep(0.001)
for i in range(count):  # each line larger than a pipe buffer: a torn write would show
    append(root, {"experiment": "w" + worker, "i": i, "padding": "x" * 6000})
"""


def test_concurrent_appends_never_interleave(tmp_path: Path) -> None:
    """Four processes append at once; a writer that splits its line gets caught here."""
    workers, count = 4, 200
    procs = [
        subprocess.Popen([sys.executable, "-c", WRITER, str(tmp_path), str(w), str(count)])
        for w in range(workers)
    ]
    while len(list(tmp_path.glob("ready-*"))) < workers:
        assert all(p.poll() is None for p in procs)
        time.sleep(0.01)
    (tmp_path / "go").touch()
    assert [p.wait(timeout=120) for p in procs] == [0] * workers
    entries, warnings = read_history(tmp_path)
    assert warnings == [] and len(entries) == workers * count
    for w in range(workers):
        mine = [e["i"] for e in entries if e["experiment"] == f"w{w}"]
        assert mine == list(range(count))
