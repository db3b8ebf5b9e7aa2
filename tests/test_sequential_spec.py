"""[sequential] in the spec: keys and errors, the lock, the scorecard's `sequential` section,
and outputs of specs without it (unchanged)."""

from __future__ import annotations

import datetime as dt
import json
import re
from pathlib import Path

import pyarrow.parquet as pq
import pytest
from typer.testing import CliRunner

from metricforge.checks.lock import lock_check, write_lock
from metricforge.cli import app
from metricforge.errors import SpecError
from metricforge.spec import load_plan
from metricforge.spec.experiment import load_spec
from metricforge.spec.model import Sequential
from tests.conftest import PIPELINES

DEMO = PIPELINES / "checkout_layout.toml"
BLOCK = re.compile(r"\n\[sequential\][^\[]*")  # the demo's [sequential] table, to the end


def spec_with(folder: Path, table: str | None) -> Path:
    """The checkout_layout spec in ``folder`` with absolute data paths and ``table`` as its
    [sequential] text (None: no such table)."""
    text = BLOCK.sub("\n", DEMO.read_text())
    for rel in ("../sample_data/events", "../sample_data/exposures.parquet", "../metric_defs"):
        text = text.replace(f'"{rel}"', json.dumps(str((PIPELINES / rel).resolve())))
    if table is not None:
        text += "\n" + table + "\n"
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "spec.toml"
    path.write_text(text)
    return path


def test_the_demo_table_loads(tmp_path: Path) -> None:
    spec = load_spec(DEMO)
    assert spec.sequential == Sequential(effect=0.1, baselines=(("revenue", 4.9),))
    assert load_spec(spec_with(tmp_path, None)).sequential is None


@pytest.mark.parametrize(
    ("table", "key", "message"),
    [
        ("[sequential]\nefect = 0.05", "sequential.efect", "did you mean 'effect'"),
        ("[sequential]\nbaseline = { revenue = 4.9 }", "sequential.effect", "required key"),
        ("[sequential]\neffect = 0", "sequential.effect", "0 < effect <= 10"),
        ("[sequential]\neffect = -0.1", "sequential.effect", "0 < effect <= 10"),
        ('[sequential]\neffect = "5%"', "sequential.effect", "expected a number"),
        ("[sequential]\neffect = true", "sequential.effect", "expected a number"),
        (
            "[sequential]\neffect = 0.05\nbaseline = { revenu = 4.9 }",
            "sequential.baseline.revenu",
            "did you mean 'revenue'",
        ),
        (
            "[sequential]\neffect = 0.05\nbaseline = { revenue = 0 }",
            "sequential.baseline.revenue",
            "not 0",
        ),
        ("[sequential]\neffect = 0.05\nbaseline = 4.9", "sequential.baseline", "expected a table"),
        (
            '[sequential]\neffect = 0.05\n[sequential.baseline]\nrevenue = "high"',
            "sequential.baseline.revenue",
            "expected a number",
        ),
    ],
    ids=[
        "typo",
        "missing",
        "zero",
        "negative",
        "text",
        "boolean",
        "unknown-metric",
        "zero-baseline",
        "baseline-not-table",
        "baseline-text",
    ],
)
def test_bad_tables_are_one_line_errors_and_run_writes_nothing(
    tmp_path: Path, table: str, key: str, message: str
) -> None:
    spec = spec_with(tmp_path / "spec", table)
    with pytest.raises(SpecError) as err:
        load_spec(spec)
    line = err.value.one_line()
    assert line.startswith(f"{spec}:") and f" {key}: " in line and message in line
    assert "\n" not in line
    out = tmp_path / "out"
    result = CliRunner().invoke(app, ["run", str(spec), "--out", str(out)])
    assert result.exit_code == 2
    assert result.output.strip().splitlines() == [f"error: {line}"]
    assert not out.exists()


def test_the_lock_records_sequential_settings_and_run_flags_changes(tmp_path: Path) -> None:
    before = dt.datetime(2026, 9, 1, tzinfo=dt.UTC)
    plain = spec_with(tmp_path, None)
    write_lock(load_plan(plain), before)
    assert "sequential" not in json.loads(plain.with_suffix(".lock.json").read_text())
    assert lock_check(load_plan(plain))["status"] == "pass"
    added = spec_with(tmp_path, "[sequential]\neffect = 0.05")  # added after the lock
    result = lock_check(load_plan(added))
    assert result["status"] == "fail"
    assert result["changes"] == ["[sequential] changed from none to effect 0.05"]
    write_lock(load_plan(added), before, force=True)
    assert json.loads(added.with_suffix(".lock.json").read_text())["sequential"] == {
        "effect": 0.05,
        "baseline": {},
    }
    assert lock_check(load_plan(added))["status"] == "pass"
    changed = spec_with(tmp_path, "[sequential]\neffect = 0.05\nbaseline = { revenue = 4.9 }")
    assert lock_check(load_plan(changed))["changes"] == [
        "[sequential] changed from effect 0.05 to effect 0.05, baseline revenue 4.9"
    ]
    assert lock_check(load_plan(spec_with(tmp_path, None)))["changes"] == [
        "[sequential] changed from effect 0.05 to none"
    ]


def _run(spec: Path, out: Path) -> None:
    result = CliRunner().invoke(app, ["run", str(spec), "--out", str(out)])
    assert result.exit_code == 0, result.output


@pytest.mark.slow
def test_the_section_adds_to_outputs_and_changes_nothing_else(tmp_path: Path) -> None:
    """With and without [sequential]: scorecard.parquet and every other part of
    scorecard.json are the same (but for the spec's hash); only the `sequential` section
    is added. Specs without the table are byte-identical to the outputs before it existed
    (the golden, rerun and demo tests of the other pipelines keep holding)."""
    with_it = spec_with(tmp_path / "a", DEMO.read_text()[DEMO.read_text().index("[sequential]") :])
    without = spec_with(tmp_path / "b", None)
    _run(with_it, tmp_path / "out_a")
    _run(without, tmp_path / "out_b")
    a = json.loads((tmp_path / "out_a" / "scorecard.json").read_text())
    b = json.loads((tmp_path / "out_b" / "scorecard.json").read_text())
    assert "sequential" not in b and list(a) == [*b, "sequential"]
    hashes = (a["stamp"]["spec_sha256"], b["stamp"]["spec_sha256"])
    text_a = json.dumps({k: v for k, v in a.items() if k != "sequential"})
    assert text_a.replace(*hashes) == json.dumps(b)
    table_a = pq.read_table(tmp_path / "out_a" / "scorecard.parquet").drop(["spec_sha256"])
    table_b = pq.read_table(tmp_path / "out_b" / "scorecard.parquet").drop(["spec_sha256"])
    assert table_a.schema == table_b.schema
    assert repr(table_a.to_pylist()) == repr(table_b.to_pylist())  # NaN compares equal as text
    # the section itself: one row per reported metric and arm, the card's own effect
    section = a["sequential"]
    assert section["effect"] == 0.1 and section["baseline"] == {"revenue": 4.9}
    by_metric = {r["metric"]: r for r in section["rows"]}
    assert list(by_metric) == [m["metric"] for m in a["metrics"]]
    card = {m["metric"]: m for m in a["metrics"]}
    for name, row in by_metric.items():
        if card[name]["kind"] == "quantile":
            assert row["always_valid_p"] is None and "quantile" in row["method"]
            continue
        # the same difference as the scorecard's (CUPED-adjusted: checkout_layout has it on)
        assert row["abs_effect"] == pytest.approx(card[name]["abs_effect"], rel=1e-12)
        assert row["method"] == "normal-mixture+cuped"
        assert row["cs_low"] < row["abs_effect"] < row["cs_high"]
        # wider than the fixed-sample interval: it holds at every look
        assert (
            row["cs_low"] < card[name]["abs_ci_low"] and row["cs_high"] > card[name]["abs_ci_high"]
        )
        assert row["always_valid_p"] >= card[name]["p_value"] or card[name]["role"] == "guardrail"
    assert by_metric["revenue"]["scale_from"] == "baseline"
    assert by_metric["revenue"]["mixing_sd"] == pytest.approx(0.49)
    assert by_metric["purchases"]["scale_from"] == "pooled"
