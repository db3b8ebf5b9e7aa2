"""Trust-check figures against computations written in the test, not taken from the tool.

- Bot-filter impact by variant: the removed share of units and of events per variant, and
  the delta-method p-value of the event share (Deng, Knoblich, Lu, KDD 2018; formula
  MEMORY, REFERENCES.md), computed here with numpy and scipy from the per-unit counts the
  test itself wrote.
- The sample-ratio alarm threshold `srm_alpha` is configurable: 560:440 at 50:50 gives
  chi2 = 14.4, p = 1.478e-4 (scipy `chi2.sf`, reference library), an alarm at the default
  0.001 (common practice) and none at 1e-4.
- The terminal names the units seen in two variants, and how many of them were excluded.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from scipy import stats as sst
from typer.testing import CliRunner

from metricforge.cli import app
from tests.conftest import event, exposure, write_case
from tests.test_trust_checks import DAY1, arm, checks, run_case, spec_with, two_variant_case

BOT_AGENT = "Mozilla/5.0 (compatible; Googlebot/2.1)"  # token "bot" of bots@1


def population(variant: str, humans: int, bots: int) -> tuple[list[Any], list[Any], list[Any]]:
    """Per-unit (removed events, events) of one variant, with its events and exposures.

    Humans have 1 to 5 events (one of them a purchase), bots 5 to 40, all inside the window.
    """
    events: list[Any] = []
    exposures: list[Any] = []
    per_unit: list[Any] = []
    for i in range(humans + bots):
        unit, bot = f"{variant[0]}{i:04d}", i >= humans
        k = 5 + (7 * i) % 36 if bot else 1 + i % 5
        agent = BOT_AGENT if bot else "Mozilla/5.0"
        for j in range(k):
            name = "purchase" if j == 0 else "page_load"
            events.append(
                event(unit, name, 1 + j, user_agent=agent, value=float(1 + i % 9), latency_ms=90)
            )
        exposures.append(exposure(unit, variant))
        per_unit.append((k if bot else 0, k))
    return events, exposures, per_unit


def delta_share(per_unit: list[Any]) -> tuple[float, float]:
    """sum(removed) / sum(events) and its delta-method variance, with sample moments (n−1):
    Var(X̄/Ȳ) ≈ (1/n)[s²x/ȳ² − 2x̄ sxy/ȳ³ + x̄² s²y/ȳ⁴]."""
    x, y = np.array(per_unit, dtype=float).T
    n, mx, my = len(x), x.mean(), y.mean()
    cov = np.cov(x, y, ddof=1)
    var = (cov[0, 0] / my**2 - 2 * mx * cov[0, 1] / my**3 + mx**2 * cov[1, 1] / my**4) / n
    return float(x.sum() / y.sum()), float(var)


def test_bot_shares_and_the_event_share_test_equal_a_computation_in_the_test(
    tmp_path: Path,
) -> None:
    ev_c, ex_c, units_c = population("control", humans=60, bots=6)
    ev_t, ex_t, units_t = population("treatment", humans=55, bots=18)
    path = write_case(tmp_path, ev_c + ev_t, ex_c + ex_t)
    result = CliRunner().invoke(app, ["run", str(path), "--out", str(tmp_path / "out")])
    assert result.exit_code == 0, result.output
    card = json.loads((tmp_path / "out" / "scorecard.json").read_text())
    bots = checks(card)["bot_share_by_variant"]
    assert bots["bot_units"] == {"control": 6, "treatment": 18}
    assert bots["exposed_units"] == {"control": 66, "treatment": 73}
    # Pearson chi-square of the 2x2 table bots/humans by variant (scipy, no continuity
    # correction)
    table = [[6, 60], [18, 55]]
    chi2, p, _, _ = sst.chi2_contingency(table, correction=False)
    assert bots["p_value"] == pytest.approx(p, rel=1e-9)
    assert f"chi2={chi2:.4g}" in bots["figure"]
    (share_c, var_c), (share_t, var_t) = delta_share(units_c), delta_share(units_t)
    assert bots["event_share"]["control"] == pytest.approx(share_c, rel=1e-12)
    assert bots["event_share"]["treatment"] == pytest.approx(share_t, rel=1e-12)
    z = (share_t - share_c) / math.sqrt(var_t + var_c)
    expected_p = 2 * sst.norm.sf(abs(z))
    assert bots["event_share_p_value"]["treatment"] == pytest.approx(expected_p, rel=1e-8)
    variants = {v["variant"]: v for v in card["variants"]}
    for name, units in (("control", units_c), ("treatment", units_t)):
        removed = sum(r for r, _ in units)
        assert variants[name]["bot_events"] == removed
        assert variants[name]["bot_event_share"] == pytest.approx(
            removed / sum(k for _, k in units), rel=1e-12
        )


@pytest.mark.parametrize(("srm_alpha", "status"), [(None, "fail"), (1e-4, "pass")])
def test_the_srm_alarm_threshold_is_configurable(
    tmp_path: Path, srm_alpha: float | None, status: str
) -> None:
    parts = [arm("c", "control", 560, DAY1), arm("t", "treatment", 440, DAY1)]
    extra = "" if srm_alpha is None else f"srm_alpha = {srm_alpha}\n"
    card = run_case(tmp_path, parts, spec_with(tmp_path, {"control": 50, "treatment": 50}, extra))
    srm = checks(card)["sample_ratio_mismatch"]
    assert srm["p_value"] == pytest.approx(sst.chi2.sf(14.4, 1), rel=1e-9)
    assert srm["threshold"] == (0.001 if srm_alpha is None else srm_alpha)
    assert srm["status"] == status
    assert card["trust"]["verdict"] == status


@pytest.mark.parametrize(("policy", "excluded"), [("exclude", (4, 1)), ("first_exposure", (0, 0))])
def test_the_terminal_names_units_seen_in_two_variants_and_the_excluded(
    tmp_path: Path, policy: str, excluded: tuple[int, int]
) -> None:
    parts = two_variant_case()
    extra = f'two_variant_units = "{policy}"\n'
    spec = spec_with(tmp_path, {"control": 50, "treatment": 50}, extra)
    path = write_case(
        tmp_path, [e for p in parts for e in p[0]], [x for p in parts for x in p[1]], spec_text=spec
    )
    result = CliRunner().invoke(app, ["run", str(path), "--out", str(tmp_path / "out")])
    assert result.exit_code == 0, result.output
    lines = result.stdout.splitlines()
    control = next(line for line in lines if line.startswith("  control: "))
    treatment = next(line for line in lines if line.startswith("  treatment: "))
    assert f"4 seen in two variants ({excluded[0]} of them excluded for it)" in control
    assert f"1 seen in two variants ({excluded[1]} of them excluded for it)" in treatment
