"""A small experiment with a canary outside its data folder, for the hostile corpus.

The canary is a text file and a Parquet file in a sibling folder ``secret/``; their
content (``CANARY``) must never appear in any output or error. ``snapshot`` lists every
path below the test folder so that a test can check that nothing was written.
"""

from __future__ import annotations

import json
import shutil
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from typer.testing import CliRunner, Result

from metricforge.cli import app
from tests.conftest import ROOT, event, exposure, write_case

CANARY = "Zq8-SECRET-41f9"


@dataclass
class Env:
    root: Path
    data: Path
    spec: Path
    defs: Path
    canary: Path
    canary_parquet: Path
    out: Path

    def define(self, body: str, decision: str = "hostile") -> None:
        """Add ``body`` (TOML) as defs/hostile.toml and make ``decision`` the OEC."""
        (self.defs / "hostile.toml").write_text(body, encoding="utf-8")
        self.edit_spec('decision = "revenue"', f"decision = {toml_str(decision)}")

    def edit_spec(self, old: str, new: str) -> None:
        text = self.spec.read_text(encoding="utf-8")
        assert old in text, old
        self.spec.write_text(text.replace(old, new), encoding="utf-8")

    def run(self, *extra: str, out: Path | None = None) -> Result:
        args = ["run", str(self.spec), "--out", str(out or self.out), *extra]
        return CliRunner().invoke(app, args)


def toml_str(text: str) -> str:
    """``text`` as a TOML basic string (JSON string escapes are valid TOML escapes)."""
    return json.dumps(text, ensure_ascii=False)


def good_logs(
    experiment: str = "case", variants: tuple[str, str] = ("control", "treatment")
) -> tuple[list[dict[str, Any]], list[dict[str, Any]]]:
    events, exposures = [], []
    for i in range(20):
        arm = variants[i % 2]
        unit = f"u{i:03d}"
        events += [event(unit, "impression"), event(unit, "purchase", 2, value=10.0 + i)]
        exposures.append(exposure(unit, arm, experiment))
    return events, exposures


def make_env(root: Path, *, spec_text: str | None = None, **logs: Any) -> Env:
    data = root / "data"
    defs = data / "defs"
    shutil.copytree(ROOT / "metric_defs", defs)
    events, exposures = good_logs(**logs)
    spec = write_case(data, events, exposures, defs=defs, spec_text=spec_text)
    secret = root / "secret"
    secret.mkdir()
    canary = secret / "canary.txt"
    canary.write_text(CANARY + "\n", encoding="utf-8")
    canary_parquet = secret / "canary.parquet"
    pq.write_table(pa.table({"secret": [CANARY], "ts": [1]}), canary_parquet)
    (root / "systmp").mkdir()
    return Env(root, data, spec, defs, canary, canary_parquet, root / "results" / "out")


def snapshot(root: Path) -> dict[str, tuple[bool, int, int]]:
    """Every path below ``root``: (is folder, size, modification time)."""
    out = {}
    for path in sorted(root.rglob("*")):
        st = path.lstat()
        out[str(path.relative_to(root))] = (path.is_dir(), st.st_size, st.st_mtime_ns)
    return out


def setup_env(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, **kwargs: Any) -> Env:
    """The experiment, with the process's temporary folder moved into the test folder."""
    made = make_env(tmp_path, **kwargs)
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path / "systmp"))
    return made


def assert_rejected(env: Env, result: Result, needles: list[str], before: dict[str, Any]) -> None:
    """Exit 2, one line naming the problem, no canary, and nothing written anywhere."""
    text = result.stdout + result.stderr
    assert result.exit_code == 2, text
    message = result.stderr.strip()
    assert len(message.splitlines()) == 1, message
    assert message.startswith("error: "), message
    for needle in needles:
        assert needle in message, message
    assert CANARY not in text
    assert snapshot(env.root) == before


def assert_harmless(env: Env, result: Result, before: dict[str, Any]) -> dict[str, Any]:
    """Exit 0, no canary anywhere, and nothing new outside the output folder but the run
    history beside it (metricforge-history.jsonl in the output root)."""
    text = result.stdout + result.stderr
    assert result.exit_code == 0, text
    assert CANARY not in text
    after = snapshot(env.root)
    out = str(env.out.relative_to(env.root))
    history = str((env.out.parent / "metricforge-history.jsonl").relative_to(env.root))
    new = {p for p in after if p not in before and p != history}
    assert all(p == out or p.startswith(out + "/") or out.startswith(p + "/") for p in new), new
    if history in after:
        assert CANARY.encode() not in (env.root / history).read_bytes()
    changed = {p for p in before if p in after and before[p] != after[p] and not after[p][0]}
    assert not changed, changed
    for path in env.out.iterdir():
        assert CANARY.encode() not in path.read_bytes()
    card: dict[str, Any] = json.loads((env.out / "scorecard.json").read_text(encoding="utf-8"))
    return card
