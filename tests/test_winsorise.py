"""Winsorising: the cap is the `winsorise` quantile (linear rule) of the pooled per-unit
values of all analysed units, computed in SQL; and the spec errors of the new keys.

The reference is numpy on the per-unit values the case was built from.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest
from scipy import stats as sst
from typer.testing import CliRunner

from metricforge.cli import app
from tests.conftest import ROOT, event, exposure, write_case

LEVEL = 0.9

DEFS = f"""\
[metric.spend]
kind = "sum"
event = "purchase"
value = "value"
winsorise = {LEVEL}

[metric.orders]
kind = "count"
event = "purchase"

[metric.per_order]
kind = "ratio"
numerator = "spend"
denominator = "orders"
winsorise = {LEVEL}

[metric.basket]
kind = "mean"
event = "purchase"
value = "value"
winsorise = {LEVEL}
"""


def _defs(folder: Path, text: str) -> Path:
    defs = folder / "defs"
    shutil.copytree(ROOT / "metric_defs" / "filters", defs / "filters")
    (defs / "case.toml").write_text(text)
    return defs


def _case(folder: Path) -> tuple[Path, dict[str, np.ndarray]]:
    """40 units; unit i buys i % 4 times (0 to 3), each order worth more for a few units."""
    rng = np.random.default_rng(1)
    events, exposures = [], []
    spend, orders, variant = [], [], []
    for i in range(40):
        unit, arm = f"u{i:03d}", ("control" if i % 2 else "treatment")
        exposures.append(exposure(unit, arm))
        events.append(event(unit, "impression"))
        values = [float(round(rng.lognormal(3.0, 1.2), 2)) for _ in range(i % 4)]
        for k, v in enumerate(values):
            events.append(event(unit, "purchase", 2 + k, value=v))
        spend.append(sum(values))
        orders.append(len(values))
        variant.append(arm)
    spec = write_case(
        folder,
        events,
        exposures,
        decision="spend",
        diagnostics=("per_order", "basket"),
        defs=_defs(folder, DEFS),
    )
    data = {"spend": np.array(spend), "orders": np.array(orders, dtype=float)}
    data["treatment"] = np.array(variant) == "treatment"
    return spec, data


def test_caps_equal_numpy_quantiles_of_the_pooled_per_unit_values(tmp_path: Path) -> None:
    spec, d = _case(tmp_path)
    out = tmp_path / "out"
    result = CliRunner().invoke(app, ["run", str(spec), "--out", str(out)])
    assert result.exit_code == 0, result.output
    rows = {r["metric"]: r for r in json.loads((out / "scorecard.json").read_text())["metrics"]}
    t = d["treatment"]

    # sum: every unit's spend (0 for units without orders) is in the pooled distribution
    cap = np.quantile(d["spend"], LEVEL)
    capped = np.minimum(d["spend"], cap)
    assert rows["spend"]["cap"] == pytest.approx(cap, rel=1e-12)
    assert rows["spend"]["value"] == pytest.approx(capped[t].mean(), rel=1e-12)
    assert rows["spend"]["control_value"] == pytest.approx(capped[~t].mean(), rel=1e-12)
    # the test and CI are on the capped values (reference library: scipy's Welch test)
    welch = sst.ttest_ind(capped[t], capped[~t], equal_var=False)
    ci = welch.confidence_interval(0.95)
    assert rows["spend"]["p_value"] == pytest.approx(welch.pvalue, rel=1e-9)
    assert (rows["spend"]["abs_ci_low"], rows["spend"]["abs_ci_high"]) == pytest.approx(
        (ci.low, ci.high), rel=1e-9
    )

    # ratio: the numerator is capped (the same per-unit spend), the denominator is not
    assert rows["per_order"]["cap"] == pytest.approx(cap, rel=1e-12)
    assert rows["per_order"]["value"] == pytest.approx(
        capped[t].sum() / d["orders"][t].sum(), rel=1e-12
    )

    # mean: units without orders have no value; they are not part of the distribution
    has = d["orders"] > 0
    basket = d["spend"][has] / d["orders"][has]
    basket_cap = np.quantile(basket, LEVEL)
    assert rows["basket"]["cap"] == pytest.approx(basket_cap, rel=1e-12)
    assert rows["basket"]["n_units"] == int(np.sum(has & t))
    assert rows["basket"]["value"] == pytest.approx(
        np.minimum(basket, basket_cap)[t[has]].mean(), rel=1e-12
    )


def _check(tmp_path: Path, defs_text: str, spec_edit: tuple[str, str] = ("", "")) -> str:
    events, exposures = [event("u1", "purchase", value=1.0)], [exposure("u1", "control")]
    spec = write_case(tmp_path, events, exposures, defs=_defs(tmp_path, defs_text))
    if spec_edit[0]:
        spec.write_text(spec.read_text().replace(*spec_edit))
    result = CliRunner().invoke(app, ["check", str(spec)])
    assert result.exit_code == 2, result.output
    assert len(result.stderr.strip().splitlines()) == 1
    return result.stderr


REVENUE = '[metric.revenue]\nkind = "sum"\nevent = "purchase"\nvalue = "value"\n'


@pytest.mark.parametrize(
    ("defs", "spec_edit", "needles"),
    [
        (REVENUE + "winsorise = 1.5\n", None, ["metric.revenue.winsorise", "between 0.5 and 1"]),
        (
            REVENUE
            + '[metric.buyers]\nkind = "proportion"\nevent = "purchase"\nwinsorise = 0.99\n',
            None,
            ["metric.buyers.winsorise", "unknown key"],
        ),
        (
            REVENUE + '[metric.p]\nkind = "quantile"\nevent = "page_load"\nvalue = "latency_ms"\n',
            None,
            ["metric.p.q", "required key is missing"],
        ),
        (
            REVENUE + '[metric.p]\nkind = "quantile"\nvalue = "latency_ms"\nq = 95\n',
            None,
            ["metric.p.q", "strictly between 0 and 1"],
        ),
        (
            REVENUE,
            ("window_days = 14\n", "window_days = 14\ncuped = true\n"),
            ["experiment.cuped", "pre_period_days > 0"],
        ),
        (
            REVENUE,
            ("window_days = 14\n", 'window_days = 14\npre_period_days = 7\ncuped = "yes"\n'),
            ["experiment.cuped", "expected true or false"],
        ),
    ],
    ids=[
        "winsorise-out-of-range",
        "winsorise-on-proportion",
        "quantile-without-q",
        "quantile-q-as-percent",
        "cuped-without-pre-period",
        "cuped-not-a-boolean",
    ],
)
def test_new_keys_are_checked(
    tmp_path: Path, defs: str, spec_edit: tuple[str, str] | None, needles: list[str]
) -> None:
    message = _check(tmp_path, defs, spec_edit or ("", ""))
    for needle in needles:
        assert needle in message, message
