"""Proportions, multiple testing, one-sided guardrail tests and power against published
worked examples (REFERENCES.md, with their provenance labels) and reference libraries.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats as sst
from statsmodels.stats.multitest import multipletests
from statsmodels.stats.power import NormalIndPower
from statsmodels.stats.proportion import (
    confint_proportions_2indep,
    proportion_confint,
    proportions_ztest,
)

from metricforge.errors import StatsError
from metricforge.stats import Moments, compare
from metricforge.stats.multiplicity import benjamini_hochberg, bonferroni, holm
from metricforge.stats.power import (
    detectable_effect,
    linearised_correlation,
    power,
    units_needed,
)
from metricforge.stats.proportions import fisher_test, needs_exact, newcombe, wilson

Z95 = float(sst.norm.ppf(0.975))


def arr(*values: float) -> np.ndarray:
    return np.array(values, dtype=np.float64)


# --------------------------------------------------------------------------- proportions


@pytest.mark.parametrize(
    ("s_t", "n_t", "s_c", "n_c", "low", "high"),
    [
        (56, 70, 48, 80, 0.0524, 0.3339),
        (9, 10, 3, 10, 0.1705, 0.8090),
        (5, 56, 0, 29, -0.0381, 0.1926),
        (0, 10, 0, 20, -0.1611, 0.2775),
        (10, 10, 0, 20, 0.6791, 1.0000),
    ],
    ids=["56/70-48/80", "9/10-3/10", "5/56-0/29", "0/10-0/20", "10/10-0/20"],
)
def test_newcombe_table_ii_method_10(
    s_t: int, n_t: int, s_c: int, n_c: int, low: float, high: float
) -> None:
    """Newcombe (1998), Statistics in Medicine 17:873–890, Table II, method 10 (READ-2nd),
    quoted to 4 decimals; through compare() on proportion moments as well."""
    lo, hi = newcombe(arr(s_t), arr(n_t), arr(s_c), arr(n_c), Z95)
    assert (lo[0], hi[0]) == pytest.approx((low, high), abs=5e-5)
    effect = compare(Moments.of_proportion(n_t, s_t), Moments.of_proportion(n_c, s_c))
    assert (effect.abs_ci_low, effect.abs_ci_high) == pytest.approx((low, high), abs=5e-5)
    assert effect.method.startswith("newcombe+")


def test_wilson_interval_56_of_70() -> None:
    """Wilson interval for 56/70: (0.6918, 0.8770), Newcombe (1998) (READ-2nd)."""
    lo, hi = wilson(arr(56), arr(70), Z95)
    assert (lo[0], hi[0]) == pytest.approx((0.6918, 0.8770), abs=5e-5)


@given(
    n_t=st.integers(1, 3000),
    n_c=st.integers(1, 3000),
    share_t=st.floats(0, 1),
    share_c=st.floats(0, 1),
    alpha=st.sampled_from([0.01, 0.05, 0.1]),
)
def test_newcombe_and_wilson_equal_statsmodels(
    n_t: int, n_c: int, share_t: float, share_c: float, alpha: float
) -> None:
    """Reference library: statsmodels confint_proportions_2indep(method='newcomb') and
    proportion_confint(method='wilson')."""
    s_t, s_c = round(share_t * n_t), round(share_c * n_c)
    z = float(sst.norm.ppf(1 - alpha / 2))
    lo, hi = newcombe(arr(s_t), arr(n_t), arr(s_c), arr(n_c), z)
    ref = confint_proportions_2indep(s_t, n_t, s_c, n_c, method="newcomb", alpha=alpha)
    assert (lo[0], hi[0]) == pytest.approx(ref, abs=1e-12)
    w_lo, w_hi = wilson(arr(s_t), arr(n_t), z)
    assert (w_lo[0], w_hi[0]) == pytest.approx(
        proportion_confint(s_t, n_t, alpha=alpha, method="wilson"), abs=1e-12
    )


def test_fisher_lady_tasting_tea() -> None:
    """Fisher, The Design of Experiments (1935), ch. 2; R fisher.test documentation
    (READ): [[3, 1], [1, 3]] → one-sided (greater) p = 17/70, two-sided p = 34/70."""
    assert fisher_test(3, 4, 1, 4, side=1) == pytest.approx(17 / 70, rel=1e-12)
    assert fisher_test(3, 4, 1, 4) == pytest.approx(34 / 70, rel=1e-12)
    # The same table as two proportion metrics' counts: expected cells 2 < 5, so the
    # scorecard takes Fisher's test (common practice), two-sided and, for a guardrail whose
    # higher values are worse, one-sided.
    t, c = Moments.of_proportion(4, 3), Moments.of_proportion(4, 1)
    two = compare(t, c)
    assert two.method == "newcombe+fisher+fieller"  # 1 of 4: the control is near zero
    assert two.p_value == pytest.approx(34 / 70, rel=1e-12)
    assert compare(t, c, side=1).p_value == pytest.approx(17 / 70, rel=1e-12)


@pytest.mark.parametrize(
    ("s_t", "n_t", "s_c", "n_c", "exact"),
    [
        (3, 4, 1, 4, True),  # expected 2
        (5, 100, 5, 100, False),  # expected successes 5 per arm: the z-test
        (4, 100, 5, 100, True),  # expected 4.5
        (95, 100, 96, 100, True),  # few failures: expected 4.5
        (300, 1000, 10, 40, False),  # smallest expected 40 * 310/1040 = 11.9
    ],
)
def test_fisher_when_an_expected_cell_count_is_below_5(
    s_t: int, n_t: int, s_c: int, n_c: int, exact: bool
) -> None:
    """Common practice: Fisher's exact test when any expected count of the 2×2 table is
    below 5, the z-test otherwise."""
    assert bool(needs_exact(arr(s_t), arr(n_t), arr(s_c), arr(n_c))[0]) is exact
    effect = compare(Moments.of_proportion(n_t, s_t), Moments.of_proportion(n_c, s_c))
    assert effect.method.startswith("newcombe+fisher" if exact else "newcombe+z")
    if exact:
        ref = sst.fisher_exact([[s_t, n_t - s_t], [s_c, n_c - s_c]]).pvalue
        assert effect.p_value == pytest.approx(ref, rel=1e-12)


@pytest.mark.parametrize(
    ("side", "alternative"), [(0, "two-sided"), (1, "larger"), (-1, "smaller")]
)
@pytest.mark.parametrize(("s_t", "n_t", "s_c", "n_c"), [(620, 2000, 560, 1900), (41, 300, 52, 310)])
def test_z_test_equals_statsmodels(
    s_t: int, n_t: int, s_c: int, n_c: int, side: int, alternative: str
) -> None:
    """Reference library: statsmodels proportions_ztest (pooled variance)."""
    _, ref = proportions_ztest([s_t, s_c], [n_t, n_c], alternative=alternative)
    effect = compare(Moments.of_proportion(n_t, s_t), Moments.of_proportion(n_c, s_c), side=side)
    assert effect.method.startswith("newcombe+z")
    assert effect.p_value == pytest.approx(ref, rel=1e-10)


@pytest.mark.parametrize(("n", "s"), [(10, 11), (10, -1), (10, 2.5)])
def test_proportion_counts_must_be_whole_and_in_range(n: int, s: float) -> None:
    with pytest.raises(StatsError, match="whole counts"):
        Moments.of_proportion(n, s)  # type: ignore[arg-type]


# --------------------------------------------------------------------------- multiplicity

BH_1995 = [0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459,
           0.3240, 0.4262, 0.5719, 0.6528, 0.7590, 1.000]  # fmt: skip


def test_benjamini_hochberg_worked_example() -> None:
    """Benjamini & Hochberg (1995), JRSS B 57:289–300, §3.2 (READ-2nd): the 15 p-values
    give 4 rejections at q = 0.05; Bonferroni rejects 3 (MEMORY; statsmodels
    multipletests agrees)."""
    assert int(np.sum(benjamini_hochberg(BH_1995) <= 0.05)) == 4
    assert int(np.sum(bonferroni(BH_1995) <= 0.05)) == 3
    assert int(np.sum(multipletests(BH_1995, alpha=0.05, method="bonferroni")[0])) == 3
    assert int(np.sum(multipletests(BH_1995, alpha=0.05, method="fdr_bh")[0])) == 4


@pytest.mark.parametrize(
    ("ours", "method"),
    [(holm, "holm"), (benjamini_hochberg, "fdr_bh"), (bonferroni, "bonferroni")],
    ids=["holm", "bh", "bonferroni"],
)
@settings(max_examples=30, deadline=None)  # multipletests' Holm takes ~0.1 s a call
@given(p=st.lists(st.floats(0, 1), min_size=1, max_size=40))
def test_adjusted_p_values_equal_multipletests(ours, method: str, p: list[float]) -> None:  # type: ignore[no-untyped-def]
    """Reference library: statsmodels multipletests, adjusted p-values and rejections."""
    reject, adjusted, _, _ = multipletests(p, alpha=0.05, method=method)
    mine = ours(p)
    assert mine == pytest.approx(adjusted, abs=1e-12)
    assert np.array_equal(mine <= 0.05, reject)


def test_nan_p_values_stay_out_of_the_family() -> None:
    p = [0.01, math.nan, 0.04]
    assert holm(p)[[0, 2]] == pytest.approx(holm([0.01, 0.04]))
    assert math.isnan(holm(p)[1]) and math.isnan(benjamini_hochberg(p)[1])
    assert holm([]).size == 0


# --------------------------------------------------------------------------- one-sided


@pytest.mark.parametrize("side", [1, -1])
@pytest.mark.parametrize("margin", [None, 0.02, 0.1])
@pytest.mark.parametrize("seed", [1, 2])
def test_guardrail_tests_equal_scipy_welch(side: int, margin: float | None, seed: int) -> None:
    """Reference library: scipy.stats.ttest_ind(equal_var=False, alternative=...).

    Harm (no margin), higher is worse (side +1): H1 treatment > control, 'greater'.
    Non-inferiority with a relative margin m: H0 treatment worse by m·control or more,
    i.e. the Welch test of the treatment's values against the control's values times
    k = 1 + side·m, with H1 on the good side ('less' when higher is worse).
    """
    rng = np.random.default_rng(seed)
    t, c = rng.lognormal(5.8, 0.4, 800), rng.lognormal(5.8, 0.4, 900)
    mt = Moments.of_mean(t.size, float(t.mean()), float(t.var(ddof=1)))
    mc = Moments.of_mean(c.size, float(c.mean()), float(c.var(ddof=1)))
    effect = compare(mt, mc, side=side, margin=margin)
    if margin is None:
        alternative = "greater" if side == 1 else "less"
        ref = sst.ttest_ind(t, c, equal_var=False, alternative=alternative)
    else:
        alternative = "less" if side == 1 else "greater"
        ref = sst.ttest_ind(t, (1 + side * margin) * c, equal_var=False, alternative=alternative)
    assert effect.p_value == pytest.approx(ref.pvalue, rel=1e-9)
    assert effect.method.startswith("welch")
    two_sided = compare(mt, mc)  # the CI does not depend on the hypothesis
    assert (effect.abs_ci_low, effect.abs_ci_high) == (two_sided.abs_ci_low, two_sided.abs_ci_high)


def test_one_sided_ratio_and_proportion_tests_halve_the_two_sided_p() -> None:
    """A z-test's one-sided p in the observed direction is half the two-sided p."""
    ratio_t, ratio_c = (
        Moments(400, 3.2, 10.0, 4.0, 9.0, 5.0),
        Moments(420, 3.0, 10.0, 4.0, 9.0, 5.0),
    )
    prop_t, prop_c = Moments.of_proportion(2000, 640), Moments.of_proportion(2100, 600)
    for t, c in ((ratio_t, ratio_c), (prop_t, prop_c)):
        two = compare(t, c)
        assert compare(t, c, side=1).p_value == pytest.approx(two.p_value / 2, rel=1e-10)
        assert compare(t, c, side=-1).p_value == pytest.approx(1 - two.p_value / 2, rel=1e-10)


def test_proportion_non_inferiority_is_a_wald_test() -> None:
    """H0: p_t ≥ (1 + m) p_c; the Wald z of p_t − (1 + m) p_c with each arm's variance."""
    t, c = Moments.of_proportion(3000, 300), Moments.of_proportion(3000, 290)
    effect = compare(t, c, side=1, margin=0.2)
    v_t, v_c = t.var_x / t.n, c.var_x / c.n
    stat = (t.mean_x - 1.2 * c.mean_x) / math.sqrt(v_t + 1.44 * v_c)
    assert effect.method == "newcombe+wald"
    assert effect.p_value == pytest.approx(sst.norm.cdf(stat), rel=1e-10)


@pytest.mark.parametrize(("side", "margin"), [(0, 0.05), (2, None), (1, 0.0), (1, -0.1)])
def test_a_margin_needs_a_one_sided_test(side: int, margin: float | None) -> None:
    with pytest.raises(StatsError):
        compare(
            Moments.of_mean(10, 1.0, 1.0), Moments.of_mean(10, 1.0, 1.0), side=side, margin=margin
        )


# --------------------------------------------------------------------------- power


def test_sixteen_sigma_squared_rule() -> None:
    """n ≈ 16σ²/Δ² per variant at two-sided α = 0.05 and 80% power (van Belle, Statistical
    Rules of Thumb, ch. 2, READ): Δ/σ = 0.5 → 64. The exact normal-theory value is
    2(z_0.975 + z_0.8)²σ²/Δ² → 62.79 (MEMORY; statsmodels NormalIndPower agrees): the rule
    is about 2% conservative."""
    exact = units_needed(0.5, 1.0, alpha=0.05, power=0.8)
    assert exact == pytest.approx(62.79, abs=0.005)
    rule = 16 * 1.0**2 / 0.5**2
    assert rule == 64
    assert 0.015 < rule / exact - 1 < 0.025
    ref = NormalIndPower().solve_power(effect_size=0.5, alpha=0.05, power=0.8, ratio=1.0)
    assert exact == pytest.approx(ref, rel=1e-6)


@pytest.mark.parametrize("effect_size", [0.02, 0.1, 0.5, 1.2])
@pytest.mark.parametrize(("alpha", "target"), [(0.05, 0.8), (0.01, 0.9), (0.1, 0.5)])
@pytest.mark.parametrize("ratio", [1.0, 0.5, 3.0])
def test_power_equals_normal_ind_power(
    effect_size: float, alpha: float, target: float, ratio: float
) -> None:
    """Reference library: statsmodels NormalIndPower (two-sided), to 1e-6: the units for
    a power, the power of given units, and the detectable effect of given units."""
    sd = 2.5
    ref = NormalIndPower()
    n1 = units_needed(effect_size * sd, sd, alpha=alpha, power=target, ratio=ratio)
    want = ref.solve_power(effect_size=effect_size, alpha=alpha, power=target, ratio=ratio)
    assert n1 == pytest.approx(want, rel=1e-6)
    got = power(effect_size * sd, sd, 500.0, 500.0 * ratio, alpha=alpha)
    assert got == pytest.approx(ref.power(effect_size, 500.0, alpha, ratio=ratio), rel=1e-6)
    mde = detectable_effect(sd, 500.0, 500.0 * ratio, alpha=alpha, power=target)
    # NormalIndPower's own power at our detectable effect is the target (its effect-size
    # solver stops about 1e-5 short of the root, so the power is compared instead)
    assert ref.power(mde / sd, 500.0, alpha, ratio=ratio) == pytest.approx(target, rel=1e-9)
    want_es = ref.solve_power(nobs1=500.0, alpha=alpha, power=target, ratio=ratio)
    assert mde / sd == pytest.approx(want_es, rel=1e-4)


@pytest.mark.parametrize("seed", [3, 4])
@pytest.mark.parametrize("ratio", [False, True])
def test_linearised_correlation_equals_numpy(seed: int, ratio: bool) -> None:
    """The delta-method correlation of two halves' ratios X_k/Y_k from moments equals the
    correlation of the per-unit linearisations X_k − r_k Y_k (numpy.corrcoef)."""
    rng = np.random.default_rng(seed)
    level = rng.gamma(2.0, 1.0, 4000)
    y1, y2 = 1 + rng.poisson(3 * level), 1 + rng.poisson(3 * level)
    x1, x2 = rng.binomial(y1, 0.3), rng.binomial(y2, 0.3)
    if not ratio:
        y1 = y2 = np.ones_like(x1)
    data = np.vstack([x1, x2, y1, y2]).astype(float) if ratio else np.vstack([x1, x2]).astype(float)
    means, cov = data.mean(axis=1), np.cov(data, ddof=1)
    r1, r2 = x1.mean() / y1.mean(), x2.mean() / y2.mean()
    expected = np.corrcoef(x1 - r1 * y1, x2 - r2 * y2)[0, 1]
    assert linearised_correlation(means, cov) == pytest.approx(expected, rel=1e-10)
