"""The quantile metric kind: the engine's quantile query against numpy on the per-unit
table, the outer interval's respect for clustering, and its failure modes.

Method (REFERENCES.md names the delta method for ratios; the outer interval inverts the
delta-method interval of the proportion at or below the quantile): per variant, the
proportion of values ≤ q̂ is ΣS/ΣM over units (S values ≤ q̂, M values); its delta-method
variance gives the band q ∓ z·σ of levels, whose quantiles bound q̂.
"""

from __future__ import annotations

import dataclasses
import json
import math
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats as sst
from typer.testing import CliRunner

from metricforge.cli import app
from metricforge.compile.query import compile_plan
from metricforge.engines.duckdb import DuckDBEngine
from metricforge.errors import StatsError
from metricforge.runner import gather_inputs
from metricforge.spec import load_plan
from metricforge.stats.moments import Moments
from metricforge.stats.quantiles import (
    QuantileSummary,
    quantile_compare,
    quantile_contrast,
    rank_band,
    two_sided_z,
)
from tests.conftest import PIPELINES, event, exposure, write_case
from tests.test_pre_period import unit_rows

Q = 0.95  # metric_defs: page_latency_p95


def below_moments(values: list[np.ndarray], point: float) -> Moments:
    """Moments over units of S (values ≤ point) and M (values), divisor n − 1."""
    s = np.array([np.sum(v <= point) for v in values], dtype=float)
    m = np.array([len(v) for v in values], dtype=float)
    return Moments(
        len(values), s.mean(), m.mean(), s.var(ddof=1), m.var(ddof=1), np.cov(s, m)[0, 1]
    )


def test_engine_quantile_query_equals_numpy_on_unit_rows() -> None:
    plan = load_plan(PIPELINES / "checkout_layout.toml")
    inputs, _ = gather_inputs(plan)
    table = DuckDBEngine().run(compile_plan(plan), inputs)["quantile_page_latency_p95"]
    engine = {r["variant"]: r for r in table.to_pylist()}
    rows = unit_rows(plan).filter(~pl.col("is_bot") & ~pl.col("contaminated"))
    assert set(engine) == {"control", "treatment"}
    for variant, got in engine.items():
        lists = [
            np.array(v)
            for v in rows.filter(pl.col("variant") == variant)["v_page_latency_p95"].to_list()
            if v
        ]
        values = np.concatenate(lists)
        point = float(np.quantile(values, Q))  # linear interpolation, numpy's default
        below = below_moments(lists, point)
        low, high = rank_band(below, Q, plan.spec.alpha)
        assert got["quantile"] == pytest.approx(point, rel=1e-12)
        assert got["n_values"] == len(values)
        assert got["n_units"] == len(lists)
        for name, expected in (
            ("mean_below", below.mean_x),
            ("mean_count", below.mean_y),
            ("var_below", below.var_x),
            ("var_count", below.var_y),
            ("cov_below_count", below.cov_xy),
        ):
            assert got[name] == pytest.approx(expected, rel=1e-12), name
        assert got["level_low"] == pytest.approx(low, abs=1e-12)
        assert got["level_high"] == pytest.approx(high, abs=1e-12)
        assert got["value_low"] == pytest.approx(np.quantile(values, low), rel=1e-12)
        assert got["value_high"] == pytest.approx(np.quantile(values, high), rel=1e-12)
        assert 0 < low < Q < high < 1


@settings(max_examples=30, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), copies=st.integers(2, 6))
def test_band_respects_clustering(seed: int, copies: int) -> None:
    """Repeating every value of a unit k times adds no information: the band of levels is
    unchanged, where treating values as independent would narrow it by √k."""
    rng = np.random.default_rng(seed)
    lists = [rng.lognormal(6.0, 0.5, rng.integers(1, 6)) for _ in range(200)]
    point = float(np.quantile(np.concatenate(lists), Q))
    once = rank_band(below_moments(lists, point), Q, 0.05)
    repeated = rank_band(below_moments([np.repeat(v, copies) for v in lists], point), Q, 0.05)
    assert repeated == pytest.approx(once, abs=1e-12)
    n = sum(len(v) for v in lists)
    iid_half = two_sided_z(0.05) * math.sqrt(Q * (1 - Q) / (n * copies))
    assert once[1] - Q > 1.2 * iid_half


@pytest.mark.parametrize(
    ("seed", "n", "q"), [(1, 2000, 0.95), (2, 500, 0.5), (3, 5000, 0.99), (4, 300, 0.9)]
)
def test_band_with_one_value_per_unit_is_the_order_statistic_interval(
    seed: int, n: int, q: float
) -> None:
    """Reference library: with one value per unit the outer interval is the normal
    approximation of the distribution-free confidence interval of a quantile, whose ends
    are order statistics chosen from the binomial distribution (scipy.stats.quantile_test
    ... confidence_interval). The band's ends, as positions in the sorted values, lie
    within 1.5 positions of scipy's order statistics (the exact interval is never
    narrower than the stated level, so it is the wider one by about a position)."""
    rng = np.random.default_rng(seed)
    values = np.sort(rng.lognormal(6.0, 0.5, n))
    point = float(np.quantile(values, q))
    low, high = rank_band(below_moments([np.array([v]) for v in values], point), q, 0.05)
    exact = sst.quantile_test(values, q=point, p=q).confidence_interval(0.95)
    exact_low = int(np.searchsorted(values, exact.low))
    exact_high = int(np.searchsorted(values, exact.high))
    assert values[exact_low] == exact.low and values[exact_high] == exact.high
    assert low * (n - 1) == pytest.approx(exact_low, abs=1.5)
    assert high * (n - 1) == pytest.approx(exact_high, abs=1.5)


def summary(q_hat: float, low: float, high: float, below: Moments) -> QuantileSummary:
    band = rank_band(below, Q, 0.05)
    return QuantileSummary(q_hat, 1000, below, band[0], band[1], low, high)


BELOW = Moments(400, 2.4, 2.5, 1.1, 1.3, 1.0)


def test_difference_and_its_interval_from_the_band_widths() -> None:
    z = two_sided_z(0.05)
    t = summary(700.0, 680.0, 724.0, BELOW)
    c = summary(690.0, 671.0, 711.0, BELOW)
    effect = quantile_compare(t, c, q=Q, alpha=0.05)
    se = math.hypot(44.0 / (2 * z), 40.0 / (2 * z))
    assert effect.abs_effect == 10.0
    assert effect.abs_ci_low == pytest.approx(10.0 - z * se, rel=1e-12)
    assert effect.abs_ci_high == pytest.approx(10.0 + z * se, rel=1e-12)
    assert effect.rel_effect == pytest.approx(700 / 690 - 1, rel=1e-12)
    assert effect.method == "outer-ci"


def test_contrast_of_quantiles_from_the_band_widths() -> None:
    """A factorial contrast of a quantile metric: Σ w·q̂ with the variance Σ w²·se² of
    independent variants, each se its band's width over 2z; z-test (scipy's normal). With
    the weights (1, −1) it is the difference that quantile_compare reports."""
    z = two_sided_z(0.05)
    bands = [(690.0, 671.0, 711.0), (700.0, 680.0, 724.0), (695.0, 676.0, 716.0)]
    bands.append((720.0, 698.0, 746.0))
    cells = [summary(q, lo, hi, BELOW) for q, lo, hi in bands]
    result = quantile_contrast(cells, [1.0, -1.0, -1.0, 1.0], q=Q, alpha=0.05)
    se = math.sqrt(sum(((hi - lo) / (2 * z)) ** 2 for _, lo, hi in bands))
    assert result.estimate == 720.0 - 695.0 - 700.0 + 690.0
    assert (result.ci_low, result.ci_high) == pytest.approx((15 - z * se, 15 + z * se), rel=1e-12)
    assert result.p_value == pytest.approx(2 * sst.norm.sf(15 / se), rel=1e-12)
    assert (result.positive, result.negative) == (1410.0, 1395.0)
    assert result.method == "outer-ci"
    pair = quantile_contrast(cells[1::-1], [1.0, -1.0], q=Q, alpha=0.05)
    effect = quantile_compare(cells[1], cells[0], q=Q, alpha=0.05)
    assert (pair.estimate, pair.ci_low, pair.ci_high, pair.p_value) == pytest.approx(
        (effect.abs_effect, effect.abs_ci_low, effect.abs_ci_high, effect.p_value), rel=1e-12
    )


def test_band_that_disagrees_with_the_moments_is_refused() -> None:
    t = dataclasses.replace(summary(700.0, 680.0, 724.0, BELOW), level_low=0.9)
    with pytest.raises(StatsError, match="rank band"):
        quantile_compare(t, t, q=Q, alpha=0.05)


def test_variant_without_values_shows_the_quantiles_but_no_effect(tmp_path: Path) -> None:
    """No treatment unit loaded a page: the row says why and keeps control's quantile."""
    events, exposures = [], []
    for i in range(30):
        unit, arm = f"u{i:03d}", ("control" if i % 2 else "treatment")
        exposures.append(exposure(unit, arm))
        events.append(event(unit, "purchase", 2, value=5.0))
        if arm == "control":
            for k in range(3):
                events.append(event(unit, "page_load", 3 + k, latency_ms=100.0 + 7 * i + k))
    spec = write_case(tmp_path, events, exposures, diagnostics=("page_latency_p95",))
    out = tmp_path / "out"
    result = CliRunner().invoke(app, ["run", str(spec), "--out", str(out)])
    assert result.exit_code == 0, result.output
    rows = json.loads((out / "scorecard.json").read_text())["metrics"]
    row = next(r for r in rows if r["metric"] == "page_latency_p95")
    assert row["method"].startswith("not computed:")
    expected = np.quantile([100.0 + 7 * i + k for i in range(1, 30, 2) for k in range(3)], Q)
    assert row["control_value"] == pytest.approx(expected, rel=1e-12)
    assert row["abs_effect"] is None


def test_quantile_metric_is_not_a_ratio_part(tmp_path: Path) -> None:
    defs = tmp_path / "defs"
    defs.mkdir()
    (defs / "m.toml").write_text(
        '[metric.p90]\nkind = "quantile"\nevent = "page_load"\nvalue = "latency_ms"\nq = 0.9\n'
        '[metric.loads]\nkind = "count"\nevent = "page_load"\n'
        '[metric.odd]\nkind = "ratio"\nnumerator = "p90"\ndenominator = "loads"\n'
    )
    spec = write_case(tmp_path, [event("u1", "page_load")], [exposure("u1", "control")], defs=defs)
    result = CliRunner().invoke(app, ["check", str(spec)])
    assert result.exit_code == 2
    assert "'p90' is a quantile metric" in result.stderr


@pytest.mark.parametrize(
    ("side", "margin", "below_half"),
    [(1, None, True), (-1, None, False), (1, 0.02, True), (-1, 0.02, True)],
    ids=["harm-higher-worse", "harm-lower-worse", "ni-higher-worse", "ni-lower-worse"],
)
def test_one_sided_hypotheses_of_a_guardrail(
    side: int, margin: float | None, below_half: bool
) -> None:
    """Treatment 10 above control (SEs from the band widths): a harm test against "higher
    is worse" has p < 1/2, against "lower is worse" p > 1/2; non-inferiority with a 2%
    margin (13.8) tests the contrast t − (1 ± 0.02)·c by z. The CI stays two-sided."""
    t = summary(700.0, 680.0, 724.0, BELOW)
    c = summary(690.0, 671.0, 711.0, BELOW)
    z = two_sided_z(0.05)
    se_t, se_c = 44.0 / (2 * z), 40.0 / (2 * z)
    k = 1.0 + side * margin if margin is not None else 1.0
    sign = side if margin is None else -side
    expected = float(sst.norm.sf(sign * (700.0 - k * 690.0) / math.hypot(se_t, k * se_c)))
    effect = quantile_compare(t, c, q=Q, side=side, margin=margin)
    two_sided = quantile_compare(t, c, q=Q)
    assert effect.p_value == pytest.approx(expected, rel=1e-12)
    assert (effect.p_value < 0.5) is below_half
    assert (effect.abs_ci_low, effect.abs_ci_high) == (two_sided.abs_ci_low, two_sided.abs_ci_high)


def test_margin_needs_a_one_sided_test() -> None:
    t = summary(700.0, 680.0, 724.0, BELOW)
    with pytest.raises(StatsError, match="margin"):
        quantile_compare(t, t, q=Q, margin=0.02)
