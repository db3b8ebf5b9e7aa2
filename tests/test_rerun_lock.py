"""A rerun compares with the lock file the run compared with: the manifest's copy, never the
lock beside the spec as it is today (its check is part of scorecard.json)."""

from __future__ import annotations

import hashlib
import json
import shutil
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest

from metricforge.checks.lock import lock_path
from metricforge.rerun import RERUN_DIFFERS_EXIT
from tests.conftest import PIPELINES, ROOT, SAMPLE
from tests.test_rerun import _rewrite, case, edit_library, invoke, run_ok, same_bytes

__all__ = ["case"]  # the fixture, used by name


def lock_status(result: Path) -> dict[str, Any]:
    card = json.loads((result / "scorecard.json").read_text())
    checks = {c["check"]: c for c in card["trust"]["checks"]}
    found: dict[str, Any] = checks["decision_locked"]
    return found


def _alpha_relocked(spec: Path) -> None:
    """Today's lock says another alpha: a fresh run's lock check fails."""
    path = lock_path(spec)
    data = json.loads(path.read_text())
    data["alpha"] = 0.1
    path.write_text(json.dumps(data, indent=2) + "\n")


def _removed(spec: Path) -> None:
    lock_path(spec).unlink()


EDITS: list[Callable[[Path], None]] = [_alpha_relocked, _removed]


@pytest.mark.parametrize("edit", EDITS, ids=lambda f: f.__name__.strip("_"))
def test_rerun_uses_the_lock_copy_not_todays_lock(
    case: Path, tmp_path: Path, edit: Callable[[Path], None]
) -> None:
    results = tmp_path / "results"
    run_ok("lock", case)
    run_ok("run", case, "--out", results / "first")
    before = lock_status(results / "first")
    edit(case)
    run_ok("run", case, "--out", results / "today")
    assert lock_status(results / "today") != before  # the edit matters to a fresh run
    result = run_ok("rerun", results / "first", "--out", results / "again")
    assert "REPRODUCED byte for byte" in result.output
    assert same_bytes(results / "first", results / "again")
    assert lock_status(results / "again") == before


def test_run_without_lock_reruns_without_one(case: Path, tmp_path: Path) -> None:
    results = tmp_path / "results"
    run_ok("run", case, "--out", results / "first")
    assert lock_status(results / "first")["status"] == "warn"
    run_ok("lock", case)  # made after the run: the rerun must not see it
    result = run_ok("rerun", results / "first", "--out", results / "again")
    assert "REPRODUCED byte for byte" in result.output
    assert lock_status(results / "again")["locked_at"] is None


def test_manifest_holds_the_lock_as_read(case: Path, tmp_path: Path) -> None:
    results = tmp_path / "results"
    run_ok("run", case, "--out", results / "none")
    assert json.loads((results / "none" / "manifest.json").read_text())["lock"] is None
    run_ok("lock", case)
    text = lock_path(case).read_text(encoding="utf-8")
    run_ok("run", case, "--out", results / "locked")
    record = json.loads((results / "locked" / "manifest.json").read_text())["lock"]
    assert record["text"] == text
    assert record["sha256"] == hashlib.sha256(text.encode()).hexdigest()
    assert record["path"] == lock_path(case).name


def test_tampered_lock_copy_is_refused(case: Path, tmp_path: Path) -> None:
    results = tmp_path / "results"
    run_ok("lock", case)
    run_ok("run", case, "--out", results / "first")

    def tamper(data: dict[str, Any]) -> None:
        data["lock"]["text"] = data["lock"]["text"].replace('"alpha": 0.05', '"alpha": 0.1')

    _rewrite(results / "first" / "manifest.json", tamper)
    result = invoke("rerun", results / "first", "--out", results / "again")
    assert result.exit_code == 2, result.output
    assert len(result.output.strip().splitlines()) == 1
    assert "manifest.json: lock.text: the copy does not match its recorded sha256" in result.output
    assert not (results / "again").exists()


def test_manifest_without_lock_copy_names_the_lock_as_a_reason(case: Path, tmp_path: Path) -> None:
    """A manifest written before lock files were copied: today's lock is read, and a
    different trust section is explained by it, not called a bug."""
    results = tmp_path / "results"
    run_ok("lock", case)
    run_ok("run", case, "--out", results / "first")
    _rewrite(results / "first" / "manifest.json", lambda data: data.pop("lock"))
    _alpha_relocked(case)
    result = invoke("rerun", results / "first", "--out", results / "again")
    assert result.exit_code == RERUN_DIFFERS_EXIT, result.output
    assert "scorecard.json differs" in result.output
    assert "lock file: the old manifest holds no copy of it" in result.output
    assert "bug" not in result.output


def _demo_layout(folder: Path) -> None:
    """The repository layout with its pipelines (and their locks) and library copied."""
    shutil.copytree(PIPELINES, folder / "pipelines")
    shutil.copytree(ROOT / "metric_defs", folder / "metric_defs")
    (folder / "sample_data").symlink_to(SAMPLE, target_is_directory=True)


@pytest.mark.slow
@pytest.mark.parametrize("spec", sorted(PIPELINES.glob("*.toml")), ids=lambda p: p.stem)
def test_every_demo_pipeline_reruns_byte_for_byte_after_library_and_lock_edits(
    tmp_path: Path, spec: Path
) -> None:
    _demo_layout(tmp_path)
    copy = tmp_path / "pipelines" / spec.name
    assert lock_path(copy).is_file()  # every demo pipeline is locked
    results = tmp_path / "results"
    run_ok("run", copy, "--out", results / "before")
    edit_library(tmp_path / "metric_defs")
    _alpha_relocked(copy)
    result = run_ok("rerun", results / "before", "--out", results / "after")
    assert "REPRODUCED byte for byte" in result.output
    assert same_bytes(results / "before", results / "after")
