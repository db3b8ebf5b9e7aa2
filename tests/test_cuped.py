"""CUPED against the least-squares fit it is equal to, and its edge cases.

Source of the method: Deng, Xu, Kohavi, Walker, WSDM 2013 (REFERENCES.md, formulas MEMORY):
θ = cov(Y, X)/var(X), Y_cv = Y − θ(X − X̄), variance reduced by the factor 1 − ρ².
Cross-check (REFERENCES.md): with the within-variant pooled slope, the CUPED effect equals
the treatment coefficient of statsmodels OLS Y ~ 1 + T + X, here with the indicator of
pre-period data as a second covariate (Y ~ 1 + T + X + H), to 1e-10.
Per-unit data are invented (property tests); the reference is statsmodels.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import polars as pl
import pytest
import statsmodels.api as sm
from hypothesis import given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from metricforge.cli import app
from metricforge.engines.duckdb import DuckDBEngine
from metricforge.errors import StatsError
from metricforge.report.scorecard import build
from metricforge.runner import execute
from metricforge.spec import load_plan
from metricforge.stats import Moments, compare, ratio_point_and_variance
from metricforge.stats.cuped import PER_UNIT, RATIO, UnitVectors, cuped_compare
from tests.conftest import PIPELINES, event, exposure, write_case
from tests.test_pre_period import unit_rows


def vectors(data: np.ndarray, names: tuple[str, ...]) -> UnitVectors:
    """What the engine reports for one variant: count, means, covariance (divisor n − 1)."""
    cov = np.atleast_2d(np.cov(data, rowvar=False, ddof=1))
    return UnitVectors(len(data), names, tuple(data.mean(axis=0)), tuple(map(tuple, cov)))


def per_unit_data(rng: np.random.Generator, n: int, shift: float) -> np.ndarray:
    """(x, c, h): a skewed metric, its pre-period value (0 without pre-period data), h."""
    level = rng.lognormal(0.0, 0.8, n)
    h = (rng.random(n) < 0.65).astype(float)
    c = h * (level * rng.lognormal(0.0, 0.3, n))
    x = level * rng.lognormal(0.0, 0.5, n) + shift
    return np.column_stack([x, c, h])


def ols_treatment_coefficients(
    y: np.ndarray, arm: np.ndarray, *covariates: np.ndarray
) -> list[float]:
    """OLS y ~ 1 + one dummy per non-control arm + covariates; the dummies' coefficients."""
    dummies = [(arm == k).astype(float) for k in range(1, int(arm.max()) + 1)]
    design = sm.add_constant(np.column_stack([*dummies, *covariates]))
    params = sm.OLS(y, design).fit().params
    return [float(p) for p in params[1 : 1 + len(dummies)]]


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n_t=st.integers(20, 400), n_c=st.integers(20, 400))
def test_effect_equals_ols_with_covariate_and_indicator(seed: int, n_t: int, n_c: int) -> None:
    rng = np.random.default_rng(seed)
    control, treatment = per_unit_data(rng, n_c, 0.0), per_unit_data(rng, n_t, 0.4)
    arms = {"control": vectors(control, PER_UNIT), "treatment": vectors(treatment, PER_UNIT)}
    result = cuped_compare(arms, "treatment", "control")
    both = np.vstack([control, treatment])
    arm = np.r_[np.zeros(n_c), np.ones(n_t)]
    (expected,) = ols_treatment_coefficients(both[:, 0], arm, both[:, 1], both[:, 2])
    assert result.effect.abs_effect == pytest.approx(expected, abs=1e-10)
    assert result.effect.method == "welch+cuped"
    # value and control_value stay the observed means
    assert result.effect.value == pytest.approx(treatment[:, 0].mean(), rel=1e-14)
    assert result.effect.control_value == pytest.approx(control[:, 0].mean(), rel=1e-14)


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n_t=st.integers(20, 400), n_c=st.integers(20, 400))
def test_every_unit_with_pre_period_data_is_ols_y_on_t_and_x(seed: int, n_t: int, n_c: int) -> None:
    """REFERENCES.md's cross-check in its own form: every unit has pre-period data (the
    indicator is constant, its slope 0), so the CUPED effect is the treatment coefficient
    of statsmodels OLS Y ~ 1 + T + X and θ its X coefficient, the within-arm pooled slope."""
    rng = np.random.default_rng(seed)
    control, treatment = per_unit_data(rng, n_c, 0.0), per_unit_data(rng, n_t, 0.4)
    for d, shift in ((control, 0.0), (treatment, 0.4)):  # a pre-period value for every unit
        d[:, 1], d[:, 2] = (d[:, 0] - shift) * rng.lognormal(0.0, 0.4, len(d)), 1.0
    arms = {"control": vectors(control, PER_UNIT), "treatment": vectors(treatment, PER_UNIT)}
    result = cuped_compare(arms, "treatment", "control")
    both = np.vstack([control, treatment])
    arm = np.r_[np.zeros(n_c), np.ones(n_t)]
    fit = sm.OLS(both[:, 0], sm.add_constant(np.column_stack([arm, both[:, 1]]))).fit()
    assert result.effect.abs_effect == pytest.approx(fit.params[1], abs=1e-10)
    assert result.theta[0] == pytest.approx(fit.params[2], rel=1e-10)
    assert result.theta[1] == 0.0


def test_three_variants_pool_the_slope_like_ols_with_two_dummies() -> None:
    rng = np.random.default_rng(7)
    data = [per_unit_data(rng, n, s) for n, s in ((300, 0.0), (250, 0.2), (280, -0.1))]
    arms = {v: vectors(d, PER_UNIT) for v, d in zip(("control", "b", "c"), data, strict=True)}
    both = np.vstack(data)
    arm = np.repeat([0, 1, 2], [len(d) for d in data])
    expected = ols_treatment_coefficients(both[:, 0], arm, both[:, 1], both[:, 2])
    for variant, coefficient in zip(("b", "c"), expected, strict=True):
        effect = cuped_compare(arms, variant, "control").effect
        assert effect.abs_effect == pytest.approx(coefficient, abs=1e-10)


def ratio_data(rng: np.random.Generator, n: int, lift: float) -> np.ndarray:
    """(x, y, xpre, ypre, h): clicks and impressions now and in the pre-period."""
    rate = rng.beta(2, 5, n)
    traffic = rng.gamma(2.0, 3.0, n)
    y = rng.poisson(traffic) + 1.0
    x = rng.binomial(y.astype(int), np.minimum(rate * (1 + lift), 1.0)).astype(float)
    h = (rng.random(n) < 0.7).astype(float)
    ypre = h * (rng.poisson(traffic) + 1.0)
    xpre = rng.binomial(ypre.astype(int), rate).astype(float)
    return np.column_stack([x, y, xpre, ypre, h])


def test_ratio_effect_equals_ols_on_the_linearised_metric() -> None:
    """The linearised outcome (X − R·Y)/Ȳ with each variant's own R and Ȳ, the covariate the
    pre-period linearisation with pooled constants: OLS L ~ 1 + T + Lpre + H."""
    rng = np.random.default_rng(11)
    control, treatment = ratio_data(rng, 400, 0.0), ratio_data(rng, 380, 0.1)
    arms = {"control": vectors(control, RATIO), "treatment": vectors(treatment, RATIO)}
    result = cuped_compare(arms, "treatment", "control")

    def linearised(d: np.ndarray) -> np.ndarray:
        r = d[:, 0].mean() / d[:, 1].mean()
        return (d[:, 0] - r * d[:, 1]) / d[:, 1].mean() + r

    both = np.vstack([control, treatment])
    r_pre = both[:, 2].sum() / both[:, 3].sum()
    l_pre = (both[:, 2] - r_pre * both[:, 3]) / both[:, 3].mean()
    outcome = np.r_[linearised(control), linearised(treatment)]
    arm = np.r_[np.zeros(len(control)), np.ones(len(treatment))]
    (expected,) = ols_treatment_coefficients(outcome, arm, l_pre, both[:, 4])
    assert result.effect.abs_effect == pytest.approx(expected, abs=1e-10)
    assert result.effect.method == "delta+cuped"
    # the reduction is measured against the delta method's variance of the unadjusted effect
    plain = sum(
        ratio_point_and_variance(
            Moments(
                len(d),
                d[:, 0].mean(),
                d[:, 1].mean(),
                d[:, 0].var(ddof=1),
                d[:, 1].var(ddof=1),
                np.cov(d[:, 0], d[:, 1])[0, 1],
            )
        )[1]
        for d in (control, treatment)
    )
    theta_c, theta_h = result.theta
    residual = outcome - theta_c * l_pre - theta_h * both[:, 4]
    adjusted = sum(residual[arm == k].var(ddof=1) / np.sum(arm == k) for k in (0, 1))
    assert result.variance_reduction == pytest.approx(1 - adjusted / plain, rel=1e-9)


@pytest.mark.parametrize("rho", [0.0, 0.3, 0.8, -0.95])
def test_variance_reduction_is_rho_squared(rho: float) -> None:
    """Both variants with the same covariance and every unit with pre-period data: the
    effect's variance is reduced by the factor 1 − ρ² (Deng et al. 2013, MEMORY)."""
    var_x, var_c = 4.0, 9.0
    cov = ((var_x, rho * 6.0, 0.0), (rho * 6.0, var_c, 0.0), (0.0, 0.0, 0.0))
    arms = {
        "control": UnitVectors(500, PER_UNIT, (10.0, 3.0, 1.0), cov),
        "treatment": UnitVectors(700, PER_UNIT, (10.5, 3.1, 1.0), cov),
    }
    result = cuped_compare(arms, "treatment", "control")
    assert result.variance_reduction == pytest.approx(rho * rho, abs=1e-12)
    assert result.theta[0] == pytest.approx(rho * 6.0 / var_c, rel=1e-12)
    assert result.theta[1] == 0.0  # the indicator never varies


def test_zero_variance_covariate_leaves_the_indicator() -> None:
    """Units have pre-period data or not, but the metric was 0 for all of them then: the
    covariate is dropped, the indicator still adjusts (OLS Y ~ 1 + T + H)."""
    rng = np.random.default_rng(3)
    control, treatment = per_unit_data(rng, 300, 0.0), per_unit_data(rng, 300, 0.3)
    control[:, 1] = treatment[:, 1] = 0.0
    control[:, 0] += 2.0 * control[:, 2]  # units with pre-period data buy more
    treatment[:, 0] += 2.0 * treatment[:, 2]
    arms = {"control": vectors(control, PER_UNIT), "treatment": vectors(treatment, PER_UNIT)}
    result = cuped_compare(arms, "treatment", "control")
    assert result.theta[0] == 0.0
    both = np.vstack([control, treatment])
    arm = np.r_[np.zeros(300), np.ones(300)]
    (expected,) = ols_treatment_coefficients(both[:, 0], arm, both[:, 2])
    assert result.effect.abs_effect == pytest.approx(expected, abs=1e-10)
    assert result.variance_reduction > 0.1


def test_no_covariate_variation_at_all_gives_the_unadjusted_welch_result() -> None:
    rng = np.random.default_rng(5)
    control, treatment = per_unit_data(rng, 200, 0.0), per_unit_data(rng, 250, 0.3)
    for d in (control, treatment):
        d[:, 1], d[:, 2] = 0.0, 1.0
    arms = {"control": vectors(control, PER_UNIT), "treatment": vectors(treatment, PER_UNIT)}
    result = cuped_compare(arms, "treatment", "control")
    plain = compare(
        Moments.of_mean(250, treatment[:, 0].mean(), treatment[:, 0].var(ddof=1)),
        Moments.of_mean(200, control[:, 0].mean(), control[:, 0].var(ddof=1)),
    )
    assert result.theta == (0.0, 0.0)
    assert result.variance_reduction == 0.0
    for field in ("abs_effect", "abs_ci_low", "abs_ci_high", "p_value", "rel_effect"):
        assert getattr(result.effect, field) == pytest.approx(getattr(plain, field), rel=1e-12)


def test_a_variant_without_any_pre_period_data_is_refused() -> None:
    rng = np.random.default_rng(9)
    control, treatment = per_unit_data(rng, 200, 0.0), per_unit_data(rng, 200, 0.0)
    treatment[:, 1:] = 0.0
    arms = {"control": vectors(control, PER_UNIT), "treatment": vectors(treatment, PER_UNIT)}
    with pytest.raises(StatsError, match="no unit of variant 'treatment' has pre-period data"):
        cuped_compare(arms, "treatment", "control")


# --------------------------------------------------------------------------- pipeline

CUPED_SPEC_LINES = "window_days = 14\npre_period_days = 7\ncuped = true\n"


def test_pipeline_falls_back_when_a_variant_has_no_pre_period(tmp_path: Path) -> None:
    """Only control units were active before their exposure: CUPED would compare a variant
    with pre-period data against one without, so the unadjusted effect is reported."""
    events, exposures = [], []
    for i in range(40):
        unit, arm = f"u{i:03d}", ("control" if i % 2 else "treatment")
        exposures.append(exposure(unit, arm))
        events.append(event(unit, "purchase", 5, value=10.0 + i % 7))
        if arm == "control":
            events.append(event(unit, "purchase", -60 * 24, value=5.0 + i % 5))
    spec = write_case(tmp_path, events, exposures, diagnostics=("purchases",))
    spec.write_text(spec.read_text().replace("window_days = 14\n", CUPED_SPEC_LINES))
    out = tmp_path / "out"
    result = CliRunner().invoke(app, ["run", str(spec), "--out", str(out)])
    assert result.exit_code == 0, result.output
    rows = json.loads((out / "scorecard.json").read_text())["metrics"]
    for row in rows:
        assert row["method"] == (
            "welch (cuped not applied: no unit of variant 'treatment' has pre-period data)"
        )
        assert row["variance_reduction"] is None


def test_pipeline_keeps_units_without_pre_period_data(tmp_path: Path) -> None:
    """Half the units of each variant have pre-period data: all are analysed, and the
    effect equals OLS on the per-unit rows with covariate 0 plus indicator."""
    events, exposures = [], []
    rng = np.random.default_rng(2)
    spend = rng.gamma(2.0, 10.0, 60)
    for i in range(60):
        unit, arm = f"u{i:03d}", ("control" if i % 2 else "treatment")
        exposures.append(exposure(unit, arm))
        events.append(event(unit, "purchase", 5, value=float(round(spend[i], 2))))
        if i % 4 < 2:
            events.append(event(unit, "purchase", -60 * 24, value=float(round(spend[i] / 2, 2))))
    spec = write_case(tmp_path, events, exposures)
    spec.write_text(spec.read_text().replace("window_days = 14\n", CUPED_SPEC_LINES))
    card = build(execute(load_plan(spec), DuckDBEngine()))
    (row,) = card.rows
    assert row["n_units"] + row["n_units_control"] == 60
    value = np.array([float(round(s, 2)) for s in spend])
    pre = np.where(np.arange(60) % 4 < 2, np.round(spend / 2, 2), 0.0)
    h = (np.arange(60) % 4 < 2).astype(float)
    arm = (np.arange(60) % 2 == 0).astype(int)
    (expected,) = ols_treatment_coefficients(value, arm, pre, h)
    assert row["abs_effect"] == pytest.approx(expected, rel=1e-10)
    assert row["method"] == "welch+cuped"


@pytest.fixture(scope="module")
def demo() -> tuple[list[dict[str, object]], pl.DataFrame]:
    plan = load_plan(PIPELINES / "checkout_layout.toml")
    rows = unit_rows(plan).filter(~pl.col("is_bot") & ~pl.col("contaminated"))
    return build(execute(plan, DuckDBEngine())).rows, rows


def _capped(values: np.ndarray, level: float) -> np.ndarray:
    return np.minimum(values, np.quantile(values, level))  # linear rule, as the engine


@pytest.mark.parametrize(
    "metric", ["revenue", "purchases", "page_latency", "revenue_winsorised", "click_through"]
)
def test_demo_effect_equals_ols_on_unit_rows(
    metric: str, demo: tuple[list[dict[str, object]], pl.DataFrame]
) -> None:
    """The demo's CUPED effects from engine moments equal OLS on the per-unit table."""
    card, rows = demo
    row = next(r for r in card if r["metric"] == metric)
    frame = rows.filter(pl.col(f"x_{metric}").is_not_null())
    arm = (frame["variant"] == "treatment").cast(int).to_numpy()
    x = frame[f"x_{metric}"].to_numpy()
    xpre = frame[f"xpre_{metric}"]
    if metric == "page_latency":  # a mean: pre-period value only with pre-period loads
        h = xpre.is_not_null().cast(float).to_numpy()
    else:
        h = frame["has_pre"].cast(float).to_numpy()
    covariate = xpre.fill_null(0.0).to_numpy()
    if metric == "revenue_winsorised":
        x, covariate = _capped(x, 0.999), _capped(covariate, 0.999)
        assert row["cap"] == pytest.approx(np.quantile(frame["x_revenue_winsorised"], 0.999))
    if metric == "click_through":
        y, ypre = frame["y_click_through"].to_numpy(), frame["ypre_click_through"].to_numpy()
        outcome = np.empty_like(x)
        for k in (0, 1):
            mine = arm == k
            r = x[mine].mean() / y[mine].mean()
            outcome[mine] = (x[mine] - r * y[mine]) / y[mine].mean() + r
        covariate = (covariate - covariate.sum() / ypre.sum() * ypre) / ypre.mean()
        x = outcome
    (expected,) = ols_treatment_coefficients(x, arm, covariate, h)
    assert row["abs_effect"] == pytest.approx(expected, rel=1e-9)
    assert isinstance(row["variance_reduction"], float) and 0 < row["variance_reduction"] < 1
    assert math.isfinite(float(row["p_value"]))  # type: ignore[arg-type]


def test_small_count_proportion_keeps_fishers_exact_test(tmp_path: Path) -> None:
    """A proportion metric whose 2×2 table has an expected cell count below 5 (common
    practice: Fisher's exact test there, REFERENCES.md) is not CUPED-adjusted: a normal
    approximation on the adjusted values would replace the exact test. The row shows
    Fisher's p-value (scipy.stats.fisher_exact on the counted table, the reference
    library) and Newcombe's interval, and says why CUPED was not applied."""
    from scipy import stats as sst
    from statsmodels.stats.proportion import confint_proportions_2indep

    events, exposures = [], []
    buyers = {"treatment": 4, "control": 1}
    seen = {"treatment": 0, "control": 0}
    for i in range(80):
        unit, arm = f"u{i:03d}", ("control" if i % 2 else "treatment")
        exposures.append(exposure(unit, arm))
        events.append(event(unit, "page_view", 5))
        if seen[arm] < buyers[arm]:
            events.append(event(unit, "purchase", 6, value=10.0))
            seen[arm] += 1
        if i % 3 == 0:  # a third of the units bought before their exposure
            events.append(event(unit, "purchase", -60 * 24, value=5.0))
    spec = write_case(tmp_path, events, exposures, decision="buyer_share")
    spec.write_text(spec.read_text().replace("window_days = 14\n", CUPED_SPEC_LINES))
    card = build(execute(load_plan(spec), DuckDBEngine()))
    (row,) = card.rows
    fisher = sst.fisher_exact([[4, 36], [1, 39]]).pvalue
    method, why = row["method"].split(" ", 1)
    assert method.removesuffix("+fieller") == "newcombe+fisher"  # 1 of 40: control near 0
    assert why == "(cuped not applied: an expected cell count is below 5)"
    assert row["p_value"] == pytest.approx(fisher, rel=1e-12)
    newcombe = confint_proportions_2indep(4, 40, 1, 40, method="newcomb")
    assert (row["abs_ci_low"], row["abs_ci_high"]) == pytest.approx(newcombe, abs=1e-12)
    assert row["variance_reduction"] is None
