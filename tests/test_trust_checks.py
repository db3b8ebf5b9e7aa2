"""Trust checks end to end on small experiments with known, injected counts.

The sample-ratio figures are checked against published worked examples (REFERENCES.md):
  "Sample ratio mismatch", Wikipedia: 600 vs 400 at 50:50 -> chi2 = 40, p = 2.54e-10 (READ)
  R chisq.test in a public tutorial: 24 23 14 18 23 21 21 17 24 15 uniform -> chi2 = 6.3,
  df 9, p = 0.7096 (READ)
"""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path
from typing import Any

import pytest
from typer.testing import CliRunner

from metricforge.cli import STRICT_EXIT, app
from tests.conftest import ROOT, T0, event, write_case

WIKIPEDIA_SRM = {"chi2": 40.0, "p": 2.54e-10, "p_tol": 0.005e-10}  # READ
R_UNIFORM_10 = {"counts": (24, 23, 14, 18, 23, 21, 21, 17, 24, 15), "chi2": 6.3, "p": 0.7096}


def exposure_at(unit: str, variant: str, when: dt.datetime) -> dict[str, Any]:
    return {"unit_id": unit, "experiment": "case", "variant": variant, "ts": when}


def arm(prefix: str, variant: str, count: int, when: dt.datetime) -> tuple[list[Any], list[Any]]:
    """``count`` units of one variant first exposed at ``when``, each with one purchase."""
    units = [f"{prefix}{i:05d}" for i in range(count)]
    events = [event(u, "purchase", 2, value=float(i % 7), ts=when) for i, u in enumerate(units)]
    return events, [exposure_at(u, variant, when) for u in units]


def spec_with(folder: Path, variants: dict[str, int], extra: str = "") -> str:
    listed = ", ".join(f"{v} = {s}" for v, s in variants.items())
    control = next(iter(variants))
    return f"""\
[experiment]
name = "case"
unit = "cookie_id"
control = "{control}"
variants = {{ {listed} }}
start = 2026-09-15T00:00:00Z
end = 2026-09-29T00:00:00Z
window_days = 14
bot_filter = "bots@1"
{extra}
[data]
events = "events"
exposures = "exposures.parquet"
definitions = ["{(ROOT / "metric_defs").as_posix()}"]

[metrics]
decision = "revenue"
"""


def run_case(folder: Path, parts: list[tuple[list[Any], list[Any]]], spec: str) -> dict[str, Any]:
    events = [e for p in parts for e in p[0]]
    exposures = [x for p in parts for x in p[1]]
    path = write_case(folder, events, exposures, spec_text=spec)
    result = CliRunner().invoke(app, ["run", str(path), "--out", str(folder / "out")])
    assert result.exit_code == 0, result.output
    card: dict[str, Any] = json.loads((folder / "out" / "scorecard.json").read_text())
    return card


def checks(card: dict[str, Any]) -> dict[str, dict[str, Any]]:
    return {c["check"]: c for c in card["trust"]["checks"]}


DAY1, DAY2 = T0, T0 + dt.timedelta(days=1)


def test_srm_through_the_pipeline_equals_the_wikipedia_example(tmp_path: Path) -> None:
    parts = [arm("c", "control", 600, DAY1), arm("t", "treatment", 400, DAY1)]
    card = run_case(tmp_path, parts, spec_with(tmp_path, {"control": 50, "treatment": 50}))
    srm = checks(card)["sample_ratio_mismatch"]
    assert srm["observed"] == {"control": 600, "treatment": 400}
    assert srm["figure"].startswith("chi2=40, df=1")
    assert srm["p_value"] == pytest.approx(WIKIPEDIA_SRM["p"], abs=WIKIPEDIA_SRM["p_tol"])
    assert srm["status"] == "fail" and card["trust"]["verdict"] == "fail"


def test_ten_variant_split_equals_the_r_chisq_example(tmp_path: Path) -> None:
    variants = {f"v{k}": 1 for k in range(10)}
    parts = [
        arm(f"u{k}-", f"v{k}", n, DAY1)
        for k, n in enumerate(R_UNIFORM_10["counts"])  # type: ignore[arg-type]
    ]
    card = run_case(tmp_path, parts, spec_with(tmp_path, variants))
    srm = checks(card)["sample_ratio_mismatch"]
    assert srm["figure"].startswith("chi2=6.3, df=9")
    assert srm["p_value"] == pytest.approx(R_UNIFORM_10["p"], abs=0.00005)
    assert srm["status"] == "pass"


def test_a_mismatch_on_single_days_is_caught_where_the_total_is_balanced(tmp_path: Path) -> None:
    """600:400 on the first day, 400:600 on the second: 1000:1000 overall."""
    parts = [
        arm("a", "control", 600, DAY1),
        arm("b", "treatment", 400, DAY1),
        arm("c", "control", 400, DAY2),
        arm("d", "treatment", 600, DAY2),
    ]
    card = run_case(tmp_path, parts, spec_with(tmp_path, {"control": 50, "treatment": 50}))
    by = checks(card)
    assert by["sample_ratio_mismatch"]["p_value"] == 1.0
    daily = by["sample_ratio_mismatch_by_day"]
    assert daily["status"] == "fail"
    assert daily["threshold"] == pytest.approx(0.001 / 2)  # Bonferroni over the two days
    assert [d["day"] for d in daily["days"]] == ["2026-09-15", "2026-09-16"]
    for day in daily["days"]:
        assert day["chi2"] == pytest.approx(WIKIPEDIA_SRM["chi2"], rel=1e-12)
        assert day["p_value"] == pytest.approx(WIKIPEDIA_SRM["p"], abs=WIKIPEDIA_SRM["p_tol"])
    assert "mismatch on 2026-09-15, 2026-09-16" in daily["figure"]


def test_a_single_extreme_day_needs_the_bonferroni_bound(tmp_path: Path) -> None:
    """A day at p = 1.5e-4 would alarm alone (< 0.001) but not as one of 14 days (bound
    0.001/14 = 7.1e-5): testing many days does not multiply false alarms."""
    # 560:440 -> chi2 = 14.4, df 1 (scipy chi2.sf(14.4, 1) = 1.478e-4)
    parts = [arm("a", "control", 560, DAY1), arm("b", "treatment", 440, DAY1)]
    for k in range(1, 14):  # balanced days
        when = DAY1 + dt.timedelta(days=k)
        parts += [arm(f"c{k}-", "control", 20, when), arm(f"t{k}-", "treatment", 20, when)]
    card = run_case(tmp_path, parts, spec_with(tmp_path, {"control": 50, "treatment": 50}))
    daily = checks(card)["sample_ratio_mismatch_by_day"]
    assert len(daily["days"]) == 14
    assert daily["threshold"] == pytest.approx(0.001 / 14)
    assert daily["days"][0]["chi2"] == pytest.approx(14.4, rel=1e-12)
    assert 0.001 / 14 < daily["days"][0]["p_value"] < 0.001
    assert daily["status"] == "pass"


def two_variant_case() -> list[tuple[list[Any], list[Any]]]:
    """100 clean units per arm; 3 units seen control-first, 1 treatment-first, 1 tie."""
    parts = [arm("c", "control", 100, DAY1), arm("t", "treatment", 100, DAY1)]
    later = DAY1 + dt.timedelta(hours=1)
    for unit, first, second, when in (
        ("x1", "control", "treatment", later),
        ("x2", "control", "treatment", later),
        ("x3", "control", "treatment", later),
        ("y1", "treatment", "control", later),
        ("z1", "treatment", "control", DAY1),  # same moment: the spec's order decides
    ):
        parts.append(
            (
                [event(unit, "purchase", 2, value=100.0, ts=DAY1)],
                [exposure_at(unit, first, DAY1), exposure_at(unit, second, when)],
            )
        )
    return parts


@pytest.mark.parametrize("policy", ["exclude", "first_exposure"])
def test_units_in_two_variants_are_counted_once_in_their_first_variant(
    tmp_path: Path, policy: str
) -> None:
    extra = f'two_variant_units = "{policy}"\n'
    spec = spec_with(tmp_path, {"control": 50, "treatment": 50}, extra)
    card = run_case(tmp_path, two_variant_case(), spec)
    variants = {v["variant"]: v for v in card["variants"]}
    # x1..x3 and the tie z1 count in control, y1 in treatment
    assert variants["control"]["seen_in_two_variants"] == 4
    assert variants["treatment"]["seen_in_two_variants"] == 1
    assert variants["control"]["exposed_units"] == 104
    assert variants["treatment"]["exposed_units"] == 101
    check = checks(card)["units_in_two_variants"]
    assert check["units"] == {"control": 4, "treatment": 1}
    revenue = next(r for r in card["metrics"] if r["metric"] == "revenue")
    if policy == "exclude":
        assert variants["control"]["contaminated_units"] == 4
        assert (revenue["n_units_control"], revenue["n_units"]) == (100, 100)
        assert "excluded" in check["figure"]
    else:
        assert variants["control"]["contaminated_units"] == 0
        assert (revenue["n_units_control"], revenue["n_units"]) == (104, 101)
        assert "kept in first variant" in check["figure"]


def test_too_many_units_in_two_variants_fail_the_run_under_strict(tmp_path: Path) -> None:
    spec = spec_with(tmp_path, {"control": 50, "treatment": 50}, "max_two_variant_share = 0.01\n")
    path = write_case(
        tmp_path,
        [e for p in two_variant_case() for e in p[0]],
        [x for p in two_variant_case() for x in p[1]],
        spec_text=spec,
    )
    result = CliRunner().invoke(app, ["run", str(path), "--out", str(tmp_path / "o"), "--strict"])
    assert result.exit_code == STRICT_EXIT, result.output
    card = json.loads((tmp_path / "o" / "scorecard.json").read_text())
    failed = [c["check"] for c in card["trust"]["checks"] if c["status"] == "fail"]
    assert failed == ["units_in_two_variants"]  # 5 of 205 = 2.4% > 1%
    assert "FAIL units_in_two_variants" in result.stdout


def test_trust_section_leads_and_lists_every_check_in_order(tmp_path: Path) -> None:
    parts = [arm("c", "control", 50, DAY1), arm("t", "treatment", 50, DAY1)]
    card = run_case(tmp_path, parts, spec_with(tmp_path, {"control": 50, "treatment": 50}))
    assert next(iter(card)) == "trust"
    assert [c["check"] for c in card["trust"]["checks"]] == [
        "decision_locked",
        "sample_ratio_mismatch",
        "sample_ratio_mismatch_by_day",
        "bot_share_by_variant",
        "units_in_two_variants",
    ]
    for c in card["trust"]["checks"]:
        assert c["status"] in ("pass", "fail", "warn") and c["figure"]
        assert c["passed"] == (c["status"] != "fail")
    assert card["trust"]["warnings"] == 1  # no lock
    assert card["trust"]["verdict"] == "pass"
