"""The decision metric fixed up front: lock files and what `run` says about them."""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
import shutil
from pathlib import Path

import pytest
from typer.testing import CliRunner

from metricforge.checks.lock import definition_sha256, lock_check, lock_path, write_lock
from metricforge.cli import STRICT_EXIT, app
from metricforge.errors import SpecError
from metricforge.spec import load_plan
from metricforge.spec.model import Plan
from tests.conftest import PIPELINES, ROOT, event, exposure, write_case

BEFORE = dt.datetime(2026, 9, 1, 9, 30, tzinfo=dt.UTC)  # the case starts 2026-09-15
AFTER = dt.datetime(2026, 9, 20, tzinfo=dt.UTC)


def case(folder: Path, defs: Path | None = None) -> Path:
    events, exposures = [], []
    for i in range(20):
        unit = f"u{i:02d}"
        events.append(event(unit, "purchase", 2, value=10.0 + i))
        exposures.append(exposure(unit, "control" if i % 2 else "treatment"))
    return write_case(folder, events, exposures, defs=defs, diagnostics=("purchases",))


def with_guardrails(spec: Path, guardrails: str) -> None:
    spec.write_text(spec.read_text().replace("guardrails = []", f"guardrails = {guardrails}"))


def test_a_lock_made_before_the_start_passes(tmp_path: Path) -> None:
    spec = case(tmp_path)
    with_guardrails(spec, '["unsubscribes"]')
    path = write_lock(load_plan(spec), BEFORE)
    assert path == tmp_path / "spec.lock.json"
    lock = json.loads(path.read_text())
    assert lock["locked_at"] == "2026-09-01T09:30:00Z"
    assert lock["decision"]["metric"] == "revenue"
    assert [g["metric"] for g in lock["guardrails"]] == ["unsubscribes"]
    result = lock_check(load_plan(spec))
    assert result["status"] == "pass", result["figure"]
    assert result["changes"] == []


def test_no_lock_and_a_late_lock_are_warnings(tmp_path: Path) -> None:
    spec = case(tmp_path)
    missing = lock_check(load_plan(spec))
    assert missing["status"] == "warn" and "no lock file spec.lock.json" in missing["figure"]
    write_lock(load_plan(spec), AFTER)
    late = lock_check(load_plan(spec))
    assert late["status"] == "warn" and "after the experiment's start" in late["figure"]


@pytest.mark.parametrize(
    ("edit", "finding"),
    [
        (('decision = "revenue"', 'decision = "refunds"'), "decision metric changed"),
        (("alpha = 0.05", "alpha = 0.1"), "alpha changed from 0.05 to 0.1"),
        (("guardrails = []", 'guardrails = ["refunds"]'), "guardrail 'refunds' added"),
    ],
    ids=["decision", "alpha", "guardrail"],
)
def test_a_spec_changed_after_the_lock_fails(
    tmp_path: Path, edit: tuple[str, str], finding: str
) -> None:
    spec = case(tmp_path)
    write_lock(load_plan(spec), BEFORE)
    spec.write_text(spec.read_text().replace(*edit))
    result = lock_check(load_plan(spec))
    assert result["status"] == "fail"
    assert any(finding in c for c in result["changes"]), result["changes"]


ADJUSTED = (
    "window_days = 14\npre_period_days = 14\ncuped = true",
    'guardrails = ["unsubscribes"]\nguardrail_margins = { unsubscribes = 0.05 }',
)


@pytest.mark.parametrize(
    ("edit", "finding"),
    [
        (
            ("unsubscribes = 0.05", "unsubscribes = 0.1"),
            "margin of guardrail 'unsubscribes' changed from 5% to 10%",
        ),
        (
            ("guardrail_margins = { unsubscribes = 0.05 }", ""),
            "margin of guardrail 'unsubscribes' changed from 5% to none",
        ),
        (("cuped = true", "cuped = false"), "CUPED turned off"),
        (("pre_period_days = 14", "pre_period_days = 7"), "pre_period_days changed from 14 to 7"),
    ],
    ids=["margin", "margin-removed", "cuped", "pre-period"],
)
def test_margins_cuped_and_pre_period_changed_after_the_lock_fail(
    tmp_path: Path, edit: tuple[str, str], finding: str
) -> None:
    spec = case(tmp_path)
    text = spec.read_text()
    text = text.replace("window_days = 14", ADJUSTED[0]).replace("guardrails = []", ADJUSTED[1])
    spec.write_text(text)
    write_lock(load_plan(spec), BEFORE)
    lock = json.loads(lock_path(spec).read_text())
    assert lock["guardrail_margins"] == {"unsubscribes": 0.05}
    assert lock["cuped"] is True and lock["pre_period_days"] == 14
    assert lock_check(load_plan(spec))["status"] == "pass"
    spec.write_text(text.replace(*edit))
    result = lock_check(load_plan(spec))
    assert result["status"] == "fail"
    assert result["changes"] == [finding]


def test_a_lock_without_margins_cuped_and_pre_period_is_compared_on_what_it_holds(
    tmp_path: Path,
) -> None:
    """A lock written before those were recorded: its other keys are still compared."""
    spec = case(tmp_path)
    spec.write_text(spec.read_text().replace("window_days = 14", ADJUSTED[0]))
    write_lock(load_plan(spec), BEFORE)
    lock = json.loads(lock_path(spec).read_text())
    for key in ("guardrail_margins", "cuped", "pre_period_days"):
        del lock[key]
    lock_path(spec).write_text(json.dumps(lock))
    assert lock_check(load_plan(spec))["status"] == "pass"
    spec.write_text(spec.read_text().replace("alpha = 0.05", "alpha = 0.1"))
    assert lock_check(load_plan(spec))["changes"] == ["alpha changed from 0.05 to 0.1"]


def test_a_definition_changed_after_the_lock_fails_the_run(tmp_path: Path) -> None:
    defs = tmp_path / "defs"
    shutil.copytree(ROOT / "metric_defs", defs)
    spec = case(tmp_path, defs)
    write_lock(load_plan(spec), BEFORE)
    shop = defs / "shop.toml"
    text = shop.read_text()
    # a changed description changes no number: still locked
    shop.write_text(text.replace("Revenue from purchases", "Money from purchases"))
    assert lock_check(load_plan(spec))["status"] == "pass"
    shop.write_text(text.replace('value = "value"\ndirection', 'value = "value * 2"\ndirection'))
    result = CliRunner().invoke(app, ["run", str(spec), "--out", str(tmp_path / "o"), "--strict"])
    assert result.exit_code == STRICT_EXIT, result.output
    card = json.loads((tmp_path / "o" / "scorecard.json").read_text())
    first = card["trust"]["checks"][0]
    assert first["check"] == "decision_locked" and first["status"] == "fail"
    assert first["changes"] == ["definition of decision metric 'revenue' changed"]
    assert "FAIL decision_locked: changed after the lock" in result.stdout.splitlines()[1]


def test_a_ratio_hash_covers_its_parts() -> None:
    plan = load_plan(PIPELINES / "checkout_layout.toml")
    before = definition_sha256(plan, "click_through")
    clicks = plan.metric("clicks")
    changed = dataclasses.replace(clicks, raw={**clicks.raw, "event": "back"})
    other = dataclasses.replace(
        plan, metrics=tuple(changed if m.name == "clicks" else m for m in plan.metrics)
    )
    assert definition_sha256(other, "click_through") != before
    assert definition_sha256(other, "revenue") == definition_sha256(plan, "revenue")


def test_lock_command_refuses_to_replace_a_lock_without_force(tmp_path: Path) -> None:
    spec = case(tmp_path)
    runner = CliRunner()
    first = runner.invoke(app, ["lock", str(spec)])
    assert first.exit_code == 0, first.output
    assert "locked decision metric revenue" in first.stdout
    made = lock_path(spec).read_text()
    again = runner.invoke(app, ["lock", str(spec)])
    assert again.exit_code == 2
    assert "a lock already exists" in again.stderr and len(again.stderr.splitlines()) == 1
    assert lock_path(spec).read_text() == made
    forced = runner.invoke(app, ["lock", str(spec), "--force"])
    assert forced.exit_code == 0, forced.output


@pytest.mark.parametrize(
    ("content", "needle"),
    [
        ("{not json", "unreadable lock file"),
        ('{"experiment": "case"}', "locked_at"),
        ('"cuped": false', "cuped"),
        ('"guardrail_margins": {}', "guardrail_margins"),
    ],
    ids=["malformed", "incomplete", "cuped", "margins"],
)
def test_a_broken_lock_is_bad_input(tmp_path: Path, content: str, needle: str) -> None:
    spec = case(tmp_path)
    if content.startswith('"'):  # one value of a well-formed lock made malformed
        write_lock(load_plan(spec), BEFORE)
        key = content.split(":")[0]
        good = lock_path(spec).read_text()
        assert content in good
        content = good.replace(content, f'{key}: "yes"')
    lock_path(spec).write_text(content)
    with pytest.raises(SpecError, match=needle):
        lock_check(load_plan(spec))
    result = CliRunner().invoke(app, ["run", str(spec), "--out", str(tmp_path / "o")])
    assert result.exit_code == 2 and "spec.lock.json" in result.stderr
    assert not (tmp_path / "o").exists()


@pytest.mark.parametrize("pipeline", sorted(p.stem for p in PIPELINES.glob("*.toml")))
def test_every_demo_pipeline_carries_its_lock_unchanged(pipeline: str) -> None:
    """The demo's locks were made when the demo was assembled, after its invented dates:
    each holds its real time, so `run` reports it as made after the start."""
    plan: Plan = load_plan(PIPELINES / f"{pipeline}.toml")
    lock = json.loads(lock_path(plan.spec.path).read_text())
    assert lock["guardrail_margins"] == dict(plan.spec.guardrail_margins)
    assert (lock["cuped"], lock["pre_period_days"]) == (plan.spec.cuped, plan.spec.pre_period_days)
    result = lock_check(plan)
    assert result["changes"] == []
    assert result["status"] == "warn" and result["locked_at"] > "2026-09-15"
