"""``python -m metricforge`` runs the command line, with its exit codes."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path


def test_module_runs_the_command_line(tmp_path: Path) -> None:
    shown = subprocess.run(
        [sys.executable, "-m", "metricforge", "--help"], capture_output=True, text=True
    )
    assert shown.returncode == 0 and "rerun" in shown.stdout and "history" in shown.stdout
    missing = subprocess.run(
        [sys.executable, "-m", "metricforge", "history", str(tmp_path)],
        capture_output=True,
        text=True,
    )
    assert missing.returncode == 2 and missing.stderr.startswith("error: ")
