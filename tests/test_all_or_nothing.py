"""All or nothing on disk: `metricforge run` killed with SIGKILL at 20 moments.

Each time the output folder holds either the previous complete result, the new complete
result, or nothing (only between the two renames) — never a partial one: all three files
parse and carry the same stamp. Hidden leftovers of the killed run are never a result and
the next run's first step (``recover``) removes them, restoring a previous result that the
killed run had moved aside.

Six kills land at the steps of the publish (the test hook METRICFORGE_TEST_KILL_AT, inert
unless set); fourteen are spread over the duration of a whole run, denser towards its
end (in a trial run the first eight left the previous result, the last six the new one).
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from metricforge.report.publish import KILL_AT_ENV, STEPS, recover
from tests.conftest import write_case
from tests.hostile_env import good_logs

pytestmark = pytest.mark.slow

# Fractions of a measured run's duration; denser towards the end, where the files are written.
FRACTIONS = (0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 0.94, 0.97, 0.99, 1.0, 1.02)


def state(out: Path) -> str | None:
    """None when there is no result; else the spec hash all three files agree on."""
    if not out.exists():
        return None
    assert sorted(os.listdir(out)) == ["manifest.json", "scorecard.json", "scorecard.parquet"]
    card = json.loads((out / "scorecard.json").read_text(encoding="utf-8"))
    manifest = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
    table = pq.read_table(out / "scorecard.parquet")
    assert table.num_rows == len(card["metrics"]) > 0
    for key in ("spec_sha256", "inputs_fingerprint", "definitions_sha256"):
        seen = {card["stamp"][key], manifest["stamp"][key], *table[key].to_pylist()}
        assert len(seen) == 1, (key, seen)
    sha: str = card["stamp"]["spec_sha256"]
    return sha


def leftovers(out: Path) -> list[str]:
    return sorted(p.name for p in out.parent.iterdir() if p.name.startswith(f".{out.name}."))


def start(spec: Path, out: Path, kill_at: str | None = None) -> subprocess.Popen[bytes]:
    env = {k: v for k, v in os.environ.items() if k != KILL_AT_ENV}
    if kill_at is not None:
        env[KILL_AT_ENV] = kill_at
    command = [sys.executable, "-m", "metricforge.cli", "run", str(spec), "--out", str(out)]
    return subprocess.Popen(command, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)


@pytest.fixture(scope="module")
def case(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path, Path, Path]:
    """(previous spec, new spec, output folder, a pristine copy of the previous result)."""
    folder = tmp_path_factory.mktemp("kill")
    old_spec = write_case(folder, *good_logs())
    new_spec = folder / "spec_new.toml"
    new_spec.write_text(old_spec.read_text().replace("alpha = 0.05", "alpha = 0.1"))
    out = folder / "results" / "out"
    proc = start(old_spec, out)
    assert proc.wait(timeout=300) == 0, proc.stderr.read() if proc.stderr else ""
    pristine = folder / "pristine"
    shutil.copytree(out, pristine)
    return old_spec, new_spec, out, pristine


def reset(out: Path, pristine: Path) -> None:
    for name in leftovers(out):
        shutil.rmtree(out.parent / name)
    if out.exists():
        shutil.rmtree(out)
    shutil.copytree(pristine, out)


def check_after_kill(out: Path, previous: str | None, new: str | None) -> str | None:
    found = state(out)
    assert found in (previous, new, None)
    recover(out.absolute())  # what the next run does first
    assert leftovers(out) == []
    restored = state(out)
    assert restored in (previous, new)  # never nothing after recovery: a result existed
    return found


def test_killed_at_each_publish_step(case: tuple[Path, Path, Path, Path]) -> None:
    old_spec, new_spec, out, pristine = case
    previous = state(pristine)
    new = hashlib.sha256(new_spec.read_bytes()).hexdigest()  # the stamp's spec_sha256
    for step in STEPS:
        reset(out, pristine)
        proc = start(new_spec, out, kill_at=step)
        assert proc.wait(timeout=300) == -signal.SIGKILL, step
        found = check_after_kill(out, previous, new)
        if step in ("created", "written", "synced"):
            assert found == previous, step
        elif step == "moved-old":
            assert found is None and state(out) == previous  # restored by recover
        else:
            assert found == new, step


def test_killed_at_moments_spread_over_a_run(case: tuple[Path, Path, Path, Path]) -> None:
    old_spec, new_spec, out, pristine = case
    previous = state(pristine)
    reset(out, pristine)
    began = time.monotonic()
    proc = start(new_spec, out)
    assert proc.wait(timeout=300) == 0
    duration = time.monotonic() - began
    new = state(out)
    assert new not in (previous, None)
    killed, outcomes = 0, set()
    for fraction in FRACTIONS:
        reset(out, pristine)
        proc = start(new_spec, out)
        time.sleep(duration * fraction)
        proc.send_signal(signal.SIGKILL)
        code = proc.wait(timeout=300)
        killed += code == -signal.SIGKILL
        outcomes.add(check_after_kill(out, previous, new))
    assert killed >= len(FRACTIONS) // 2  # most kills land before the run ends
    assert previous in outcomes
    # the next real run ends with the new result and no leftovers
    reset(out, pristine)
    proc = start(new_spec, out)
    assert proc.wait(timeout=300) == 0
    assert state(out) == new and leftovers(out) == []
