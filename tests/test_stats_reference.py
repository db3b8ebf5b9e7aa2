"""Statistics against published worked examples and reference libraries.

Every check names its source and the provenance label of /work/shared/REFERENCES.md:
READ (read in the source), READ-2nd (quoted by a secondary source), MEMORY (recalled,
verified numerically with the reference library named beside it).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm
from hypothesis import given
from hypothesis import strategies as st
from scipy import stats as sst

from metricforge.errors import StatsError
from metricforge.stats import Moments, compare, ratio_point_and_variance, srm_test, welch_df

# --------------------------------------------------------------------------- helpers


def mean_moments(x: np.ndarray) -> Moments:
    return Moments.of_mean(len(x), float(x.mean()), float(x.var(ddof=1)))


def ratio_moments(x: np.ndarray, y: np.ndarray) -> Moments:
    """Moments of per-unit sums X, Y with the divisor n - 1, as the engine reports them."""
    return Moments(
        n=len(x),
        mean_x=float(x.mean()),
        mean_y=float(y.mean()),
        var_x=float(x.var(ddof=1)),
        var_y=float(y.var(ddof=1)),
        cov_xy=float(np.cov(x, y, ddof=1)[0, 1]),
    )


def population(m: Moments) -> Moments:
    """The same moments with the divisor n instead of n - 1."""
    k = (m.n - 1) / m.n
    return Moments(m.n, m.mean_x, m.mean_y, m.var_x * k, m.var_y * k, m.cov_xy * k)


# --------------------------------------------------------------------------- SRM


@pytest.mark.parametrize(
    ("observed", "weights", "chi2", "df", "p", "p_tol"),
    [
        # "Sample ratio mismatch", Wikipedia: 600 vs 400 at a planned 50:50 -> chi2 = 40,
        # p = 2.54e-10 (REFERENCES.md, READ); p is quoted to 3 digits.
        ((600, 400), (0.5, 0.5), 40.0, 1, 2.54e-10, 0.005e-10),
        # Uniform goodness of fit over 10 cells, R chisq.test output in a public tutorial:
        # chi2 = 6.3, df 9, p = 0.7096 (REFERENCES.md, READ); p is quoted to 4 digits.
        ((24, 23, 14, 18, 23, 21, 21, 17, 24, 15), (1,) * 10, 6.3, 9, 0.7096, 0.00005),
    ],
    ids=["wikipedia-srm-600-400-READ", "r-chisq-uniform-10-cells-READ"],
)
def test_srm_worked_examples(
    observed: tuple[int, ...],
    weights: tuple[float, ...],
    chi2: float,
    df: int,
    p: float,
    p_tol: float,
) -> None:
    result = srm_test(observed, weights)
    assert result.chi2 == pytest.approx(chi2, rel=1e-12)
    assert result.df == df
    assert result.p_value == pytest.approx(p, abs=p_tol)
    assert result.observed == observed
    assert math.fsum(result.expected) == pytest.approx(sum(observed), rel=1e-12)


@pytest.mark.parametrize("scale", [1.0, 0.01, 37.0])
def test_srm_normalises_the_planned_weights(scale: float) -> None:
    """Weights 50:25:25 in any units give the expected counts 500, 250, 250."""
    result = srm_test((520, 240, 240), (2 * scale, scale, scale))
    assert result.expected == pytest.approx((500.0, 250.0, 250.0), rel=1e-12)
    assert result.chi2 == pytest.approx(400 / 500 + 100 / 250 + 100 / 250, rel=1e-12)


@pytest.mark.parametrize(
    ("observed", "weights", "match"),
    [
        ((5, 5), (1.0,), "planned weights"),
        ((5,), (1.0,), "two or more"),
        ((-1, 5), (1, 1), "negative"),
        ((2.5, 5), (1, 1), "whole"),
        ((0, 0), (1, 1), "no units"),
        ((5, 5), (0, 1), "positive"),
        ((5, 5), (-1, 1), "positive"),
        ((5, 5), (math.nan, 1), "finite"),
    ],
    ids=["lengths", "one-cell", "negative", "fraction", "zero-total", "zero-w", "neg-w", "nan-w"],
)
def test_srm_rejects_bad_input(
    observed: tuple[float, ...], weights: tuple[float, ...], match: str
) -> None:
    with pytest.raises(StatsError, match=match):
        srm_test(observed, weights)  # type: ignore[arg-type]


# --------------------------------------------------------------------------- Welch


@pytest.mark.parametrize("alpha", [0.05, 0.1, 0.01])
@pytest.mark.parametrize(
    ("seed", "n_t", "n_c"), [(1, 400, 300), (2, 50, 2000), (3, 3, 2), (4, 2, 2)]
)
def test_welch_equals_scipy(seed: int, n_t: int, n_c: int, alpha: float) -> None:
    """Reference library: scipy.stats.ttest_ind(equal_var=False), its df and its CI."""
    rng = np.random.default_rng(seed)
    t, c = rng.lognormal(1.0, 1.0, n_t), rng.lognormal(1.1, 0.7, n_c)
    mt, mc = mean_moments(t), mean_moments(c)
    effect = compare(mt, mc, alpha=alpha)
    ref = sst.ttest_ind(t, c, equal_var=False)
    ci = ref.confidence_interval(1 - alpha)
    assert effect.method.removesuffix("+fieller") == "welch"
    assert effect.abs_effect == pytest.approx(t.mean() - c.mean(), rel=1e-12)
    assert effect.p_value == pytest.approx(ref.pvalue, rel=1e-10)
    assert effect.abs_ci_low == pytest.approx(ci.low, rel=1e-10)
    assert effect.abs_ci_high == pytest.approx(ci.high, rel=1e-10)
    v_t, v_c = mt.var_x / mt.n, mc.var_x / mc.n
    assert welch_df(v_t, mt.n, v_c, mc.n) == pytest.approx(ref.df, rel=1e-10)


# --------------------------------------------------------------------------- delta method


def _clustered_events(
    rng: np.random.Generator, n_units: int, arm: int, binary: bool
) -> tuple[np.ndarray, np.ndarray]:
    """Per-unit clustered events: unit i has k_i >= 1 events with outcomes y_ij."""
    k = 1 + rng.poisson(3.0, n_units)
    unit_level = rng.normal(0.0, 1.0, n_units)  # outcomes within a unit are correlated
    unit = np.repeat(np.arange(n_units), k)
    if binary:
        rate = 1 / (1 + np.exp(-(unit_level[unit] - 1.0 + 0.2 * arm)))
        y = rng.binomial(1, rate).astype(float)
    else:
        y = np.exp(unit_level[unit] + 0.1 * arm + rng.normal(0, 0.5, unit.size)) + 0.1 * k[unit]
    return unit, y


@pytest.mark.parametrize(
    ("seed", "binary"), [(4, True), (5, True), (6, False), (7, False)], ids=str
)
def test_delta_method_equals_clustered_ols(seed: int, binary: bool) -> None:
    """Delta method for a ratio of per-unit means (Deng, Knoblich, Lu, KDD 2018; formula
    MEMORY) against the reference library statsmodels (REFERENCES.md).

    Per-event OLS y_ij ~ 1 + T with standard errors clustered by unit and
    use_correction=False: its T coefficient is the difference of the arms' sum(X)/sum(Y),
    and its sandwich variance, inside each arm, is sum_i (X_i - r Y_i)^2 / (n Ybar)^2,
    i.e. the delta-method variance built with divisor n. The engine's moments use the
    divisor n - 1, so for this check the variances and covariance computed with numpy
    (ddof=1) are rescaled by (n - 1)/n. The default correction would instead multiply
    the variance by G/(G - 1) (N - 1)/(N - K).
    """
    rng = np.random.default_rng(seed)
    arms = {arm: _clustered_events(rng, n, arm, binary) for arm, n in ((0, 300), (1, 250))}
    y = np.concatenate([arms[0][1], arms[1][1]])
    treated = np.concatenate([np.zeros(arms[0][1].size), np.ones(arms[1][1].size)])
    groups = np.concatenate([arms[0][0], arms[1][0] + 300])
    fit = sm.OLS(y, sm.add_constant(treated)).fit(
        cov_type="cluster", cov_kwds={"groups": groups, "use_correction": False}
    )
    moments = {}
    for arm, (unit, y_arm) in arms.items():
        x_unit = np.bincount(unit, weights=y_arm)  # X_i = sum_j y_ij
        k_unit = np.bincount(unit).astype(float)  # Y_i = k_i
        moments[arm] = ratio_moments(x_unit, k_unit)
    mt, mc = population(moments[1]), population(moments[0])
    effect = compare(mt, mc)
    (t_val, v_t), (c_val, v_c) = ratio_point_and_variance(mt), ratio_point_and_variance(mc)
    assert effect.method == "delta"
    assert effect.control_value == pytest.approx(fit.params[0], rel=1e-10)
    assert effect.abs_effect == pytest.approx(fit.params[1], rel=1e-10)
    assert math.sqrt(v_t + v_c) == pytest.approx(fit.bse[1], rel=1e-10)
    # statsmodels' default small-sample correction multiplies the variance by
    # G/(G − 1)·(N − 1)/(N − K) (REFERENCES.md): G clusters, N events, K = 2 parameters
    corrected = sm.OLS(y, sm.add_constant(treated)).fit(
        cov_type="cluster", cov_kwds={"groups": groups}
    )
    g, n_events = 550, y.size
    factor = g / (g - 1) * (n_events - 1) / (n_events - 2)
    assert corrected.bse[1] ** 2 == pytest.approx((v_t + v_c) * factor, rel=1e-10)
    # Relative effect: the same delta step applied to statsmodels' clustered covariance of
    # (a, b) = (control, treatment - control); rel = b/a, gradient (-b/a^2, 1/a).
    a, b = fit.params
    grad = np.array([-b / a**2, 1 / a])
    rel_se = math.sqrt(grad @ fit.cov_params() @ grad)
    z = sst.norm.ppf(0.975)
    assert effect.rel_effect == pytest.approx(b / a, rel=1e-10)
    assert (effect.rel_ci_high - effect.rel_ci_low) / (2 * z) == pytest.approx(rel_se, rel=1e-10)
    assert t_val / c_val - 1 == pytest.approx(effect.rel_effect, rel=1e-12)


# --------------------------------------------------------------------------- properties

n_units = st.integers(2, 10_000)
finite = st.floats(min_value=-1e6, max_value=1e6, allow_nan=False)
variance = st.floats(min_value=0.0, max_value=1e6, allow_nan=False)


@st.composite
def ratio_arm(draw: st.DrawFn) -> Moments:
    """Consistent ratio moments: |cov| <= sd_x sd_y."""
    sd_x, sd_y = draw(st.floats(0, 1e3)), draw(st.floats(0, 1e3))
    rho = draw(st.floats(-1, 1))
    return Moments(
        n=draw(n_units),
        mean_x=draw(st.floats(-1e3, 1e3)),
        mean_y=draw(st.floats(0.1, 100)),
        var_x=sd_x * sd_x,
        var_y=sd_y * sd_y,
        cov_xy=rho * sd_x * sd_y,
    )


mean_arm = st.builds(Moments.of_mean, n_units, finite, variance)
any_arm = st.one_of(mean_arm, ratio_arm())


@given(n=n_units, mean=finite, var=variance)
def test_mean_metric_variance_is_var_over_n(n: int, mean: float, var: float) -> None:
    value, v = ratio_point_and_variance(Moments(n, mean, 1.0, var, 0.0, 0.0))
    assert value == mean
    assert v == var / n


@given(a=any_arm, b=any_arm, alpha=st.sampled_from([0.01, 0.05, 0.2]))
def test_compare_is_antisymmetric_and_well_formed(a: Moments, b: Moments, alpha: float) -> None:
    ab, ba = compare(a, b, alpha=alpha), compare(b, a, alpha=alpha)
    base = "delta" if a.is_ratio or b.is_ratio else "welch"
    # the relative CI (Fieller or delta) depends on which arm is the control
    assert ab.method.removesuffix("+fieller") == ba.method.removesuffix("+fieller") == base
    assert ab.abs_effect == -ba.abs_effect
    assert (ab.abs_ci_low, ab.abs_ci_high) == (-ba.abs_ci_high, -ba.abs_ci_low)
    assert ab.p_value == ba.p_value
    assert ab.abs_ci_low <= ab.abs_effect <= ab.abs_ci_high
    assert 0.0 <= ab.p_value <= 1.0
    if not math.isnan(ab.rel_effect):
        assert ab.rel_ci_low <= ab.rel_effect <= ab.rel_ci_high


@given(arm=ratio_arm(), scale=st.floats(1e-3, 1e3))
def test_ratio_is_invariant_to_the_units_of_x_and_y(arm: Moments, scale: float) -> None:
    """Scaling every unit's X and Y by the same constant changes neither r nor Var(r)."""
    s2 = scale * scale
    scaled = Moments(
        arm.n, arm.mean_x * scale, arm.mean_y * scale, arm.var_x * s2, arm.var_y * s2,
        arm.cov_xy * s2,
    )  # fmt: skip
    (r0, v0), (r1, v1) = ratio_point_and_variance(arm), ratio_point_and_variance(scaled)
    assert r1 == pytest.approx(r0, rel=1e-12, abs=1e-300)
    scale_of_v = (arm.var_x + arm.var_y * r0 * r0) / (arm.n * arm.mean_y**2)
    assert v1 == pytest.approx(v0, rel=1e-9, abs=1e-12 * scale_of_v + 1e-300)


wild = st.floats(allow_nan=False, allow_infinity=False)
wild_arm = st.builds(
    Moments, st.integers(2, 10**9), wild, wild, st.floats(min_value=0.0, max_value=1e308),
    st.floats(min_value=0.0, max_value=1e308), wild,
)  # fmt: skip


@pytest.mark.filterwarnings("error")
@given(a=wild_arm, b=wild_arm)
def test_any_finite_moments_give_a_result_or_a_stats_error(a: Moments, b: Moments) -> None:
    """Extreme or inconsistent inputs: a StatsError or a result without NaN in the abs fields."""
    try:
        effect = compare(a, b)
    except StatsError:
        return
    if math.isfinite(effect.abs_effect):
        assert effect.abs_ci_low <= effect.abs_effect <= effect.abs_ci_high
        assert 0.0 <= effect.p_value <= 1.0


# --------------------------------------------------------------------------- edge cases


@pytest.mark.filterwarnings("error")
@pytest.mark.parametrize(
    ("treatment", "control", "p", "method"),
    [
        (Moments.of_mean(10, 2.0, 0.0), Moments.of_mean(10, 2.0, 0.0), 1.0, "welch"),
        (Moments.of_mean(10, 3.0, 0.0), Moments.of_mean(12, 2.0, 0.0), 0.0, "welch"),
        # X = 2Y and X = 3Y in every unit: the ratio has no variance
        (Moments(10, 4.0, 2.0, 4.0, 1.0, 2.0), Moments(8, 4.0, 2.0, 4.0, 1.0, 2.0), 1.0, "delta"),
        (Moments(10, 6.0, 2.0, 9.0, 1.0, 3.0), Moments(8, 4.0, 2.0, 4.0, 1.0, 2.0), 0.0, "delta"),
    ],
    ids=["mean-equal", "mean-differ", "ratio-equal", "ratio-differ"],
)
def test_zero_variance_in_both_arms(
    treatment: Moments, control: Moments, p: float, method: str
) -> None:
    effect = compare(treatment, control)
    diff = effect.value - effect.control_value
    assert effect.method == method
    assert effect.p_value == p
    assert effect.abs_ci_low == effect.abs_effect == effect.abs_ci_high == diff
    assert effect.rel_ci_low == effect.rel_effect == effect.rel_ci_high


@pytest.mark.filterwarnings("error")
@pytest.mark.parametrize(
    "control",
    [Moments.of_mean(10, 0.0, 1.0), Moments(10, 0.0, 2.0, 1.0, 1.0, 0.5)],
    ids=["mean", "ratio"],
)
def test_zero_control_gives_nan_relative_fields(control: Moments) -> None:
    effect = compare(Moments.of_mean(10, 1.0, 1.0), control)
    assert all(math.isnan(v) for v in (effect.rel_effect, effect.rel_ci_low, effect.rel_ci_high))
    assert all(math.isfinite(v) for v in (effect.abs_effect, effect.abs_ci_low, effect.p_value))


@pytest.mark.filterwarnings("error")
def test_tiny_control_value_raises_nothing() -> None:
    effect = compare(Moments.of_mean(10, 1.0, 1.0), Moments.of_mean(10, 1e-200, 1.0))
    assert effect.rel_effect > 0 and effect.rel_ci_low <= effect.rel_effect
    overflow = compare(Moments.of_mean(10, 1e200, 1.0), Moments.of_mean(10, 1e-200, 1.0))
    assert math.isnan(overflow.rel_effect) and math.isfinite(overflow.p_value)


@pytest.mark.filterwarnings("error")
def test_tiny_denominator_mean_does_not_underflow() -> None:
    value, v = ratio_point_and_variance(Moments(10, 1e-170, 1e-170, 1e-300, 1e-300, 0.0))
    assert value == 1.0 and math.isfinite(v) and v > 0


@pytest.mark.parametrize(
    ("moments", "match"),
    [
        (Moments.of_mean(1, 1.0, 0.0), "at least 2 units"),
        (Moments(10, 0.0, 0.0, 0.0, 0.0, 0.0), "denominator"),
        (Moments.of_mean(10, 1.0, math.nan), "finite, var_x"),
        (Moments(10, 1.0, math.inf, 1.0, 1.0, 0.0), "finite, mean_y"),
        (Moments.of_mean(10, 1.0, -1e-3), "negative"),
        (Moments(10, 1e200, 1e-200, 1.0, 1.0, 0.0), "overflows"),
    ],
    ids=["one-unit", "zero-denom", "nan-variance", "inf-mean", "negative-variance", "overflow"],
)
def test_unusable_moments_are_errors(moments: Moments, match: str) -> None:
    with pytest.raises(StatsError, match=match):
        ratio_point_and_variance(moments)
    with pytest.raises(StatsError, match=match):
        compare(moments, Moments.of_mean(10, 1.0, 1.0))


@pytest.mark.parametrize("alpha", [0.0, 1.0, -0.1, math.nan])
def test_alpha_outside_the_unit_interval_is_an_error(alpha: float) -> None:
    with pytest.raises(StatsError, match="alpha"):
        compare(Moments.of_mean(10, 1.0, 1.0), Moments.of_mean(10, 1.0, 1.0), alpha=alpha)


# --------------------------------------------------------------------------- A/B/n


def test_each_arm_against_control_equals_clustered_ols_with_arm_dummies() -> None:
    """A/B/n (three treatments): per-event OLS y ~ 1 + T1 + T2 + T3, clustered by unit
    without correction (statsmodels, REFERENCES.md): each T_k coefficient and its standard
    error are the delta-method comparison of arm k with the control, to 1e-10."""
    rng = np.random.default_rng(8)
    arms = [
        _clustered_events(rng, n, arm, binary=False) for arm, n in enumerate((300, 250, 280, 260))
    ]
    y = np.concatenate([a[1] for a in arms])
    arm_of = np.concatenate([np.full(a[1].size, k) for k, a in enumerate(arms)])
    offsets = np.cumsum([0] + [a[0].max() + 1 for a in arms[:-1]])
    groups = np.concatenate([a[0] + off for a, off in zip(arms, offsets, strict=True)])
    design = sm.add_constant(np.column_stack([(arm_of == k).astype(float) for k in (1, 2, 3)]))
    fit = sm.OLS(y, design).fit(
        cov_type="cluster", cov_kwds={"groups": groups, "use_correction": False}
    )
    moments = [
        population(ratio_moments(np.bincount(u, weights=v), np.bincount(u).astype(float)))
        for u, v in arms
    ]
    for k in (1, 2, 3):
        effect = compare(moments[k], moments[0])
        assert effect.abs_effect == pytest.approx(fit.params[k], rel=1e-10)
        half = (effect.abs_ci_high - effect.abs_ci_low) / 2
        assert half / sst.norm.ppf(0.975) == pytest.approx(fit.bse[k], rel=1e-10)
        assert effect.p_value == pytest.approx(fit.pvalues[k], rel=1e-8)


# --------------------------------------------------------------------------- Fieller


@pytest.mark.parametrize(
    ("t", "v_t", "c", "v_c"),
    [
        (0.5, 0.01, 0.3, 0.01),
        (-0.2, 0.02, 0.25, 0.004),
        (3.0, 1.0, 1.5, 0.2),
        (0.1, 1e-4, 1.0, 0.01),
    ],
)
def test_fieller_interval_is_where_the_pivot_does_not_reject(
    t: float, v_t: float, c: float, v_c: float
) -> None:
    """Fieller's set {R : (t − R c)² ≤ z² (V_t + R² V_c)} found by root-finding
    (scipy.optimize.brentq) on the pivot itself, against the closed form."""
    from scipy import optimize

    from metricforge.stats.relative import relative_interval

    z = float(sst.norm.ppf(0.975))
    arrays = [np.array([v]) for v in (t, v_t, c, v_c)]
    rel, low, high, fieller = relative_interval(*arrays, z)
    assert fieller[0]

    def pivot(r: float) -> float:
        return (t - r * c) ** 2 - z * z * (v_t + r * r * v_c)

    ratio = t / c
    span = 1e6 * (1 + abs(ratio))
    assert low[0] + 1 == pytest.approx(optimize.brentq(pivot, ratio - span, ratio), rel=1e-9)
    assert high[0] + 1 == pytest.approx(optimize.brentq(pivot, ratio, ratio + span), rel=1e-9)
    assert rel[0] == pytest.approx(ratio - 1, rel=1e-12)


def test_fieller_is_unbounded_when_the_control_is_not_distinguishable_from_zero() -> None:
    """g = z² V_c / c² ≥ 1: no finite interval; reported as (−inf, inf)."""
    effect = compare(Moments.of_mean(100, 1.0, 1.0), Moments.of_mean(100, 0.15, 1.0))
    assert effect.method == "welch+fieller"
    assert effect.rel_ci_low == -math.inf and effect.rel_ci_high == math.inf


def test_delta_and_fieller_agree_as_the_control_becomes_precise() -> None:
    """Fieller's interval tends to the delta interval as g → 0."""
    from metricforge.stats.relative import relative_interval

    z = float(sst.norm.ppf(0.975))
    t, c = np.array([1.1]), np.array([1.0])
    for v in (1e-4, 1e-6, 1e-8):
        _, low, high, _ = relative_interval(t, np.array([v]), c, np.array([v]), z)
        half = z * math.hypot(math.sqrt(v), 1.1 * math.sqrt(v))
        assert (low[0], high[0]) == pytest.approx((0.1 - half, 0.1 + half), rel=20 * v / 1e-4)


# --------------------------------------------------------------------------- batch = scalar


@given(pairs=st.lists(st.tuples(any_arm, any_arm), min_size=1, max_size=8))
def test_batch_equals_one_by_one(pairs: list[tuple[Moments, Moments]]) -> None:
    """compare_batch over stacked arms gives each pair's compare() result."""
    from metricforge.stats import MomentsBatch, compare_batch

    batch = compare_batch(
        MomentsBatch.of([a for a, _ in pairs]), MomentsBatch.of([b for _, b in pairs])
    )
    for i, (a, b) in enumerate(pairs):
        one, many = compare(a, b), batch.item(i)
        assert one.method == many.method
        fields = [f for f in one.__slots__ if f != "method"]  # type: ignore[attr-defined]
        got = np.array([getattr(many, f) for f in fields])
        assert np.array_equal(got, [getattr(one, f) for f in fields], equal_nan=True)
