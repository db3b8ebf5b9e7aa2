"""Statistics against published worked examples and reference libraries."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from hypothesis import given
from hypothesis import strategies as st
from scipy import stats as sst

from metricforge.errors import StatsError
from metricforge.stats import Moments, compare, ratio_point_and_variance, srm_test


@pytest.mark.parametrize(
    ("observed", "weights", "chi2", "df", "p"),
    [
        # "Sample ratio mismatch", Wikipedia: 600 vs 400 at 50:50 (REFERENCES.md, READ)
        ((600, 400), (0.5, 0.5), 40.0, 1, 2.54e-10),
        # uniform goodness of fit over 10 cells, R chisq.test output (REFERENCES.md, READ)
        ((24, 23, 14, 18, 23, 21, 21, 17, 24, 15), (1,) * 10, 6.3, 9, 0.7096),
    ],
    ids=["srm-600-400", "uniform-10-cells"],
)
def test_srm_worked_examples(observed, weights, chi2, df, p) -> None:  # type: ignore[no-untyped-def]
    result = srm_test(observed, weights)
    assert result.chi2 == pytest.approx(chi2, rel=1e-9)
    assert result.df == df
    assert result.p_value == pytest.approx(p, rel=2e-3)


@pytest.mark.parametrize(
    "bad", [((1,), (1.0,)), ((5, 5), (1.0,)), ((-1, 5), (1, 1)), ((0, 0), (1, 1)), ((5, 5), (0, 1))]
)
def test_srm_rejects_bad_input(bad) -> None:  # type: ignore[no-untyped-def]
    with pytest.raises(StatsError):
        srm_test(*bad)


def _moments(x: np.ndarray, y: np.ndarray | None = None, ddof: int = 1) -> Moments:
    if y is None:
        return Moments.of_mean(len(x), float(x.mean()), float(x.var(ddof=ddof)))
    return Moments(
        len(x),
        float(x.mean()),
        float(y.mean()),
        float(x.var(ddof=ddof)),
        float(y.var(ddof=ddof)),
        float(np.cov(x, y, ddof=ddof)[0, 1]),
    )


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_welch_equals_scipy(seed: int) -> None:
    """Reference library: scipy.stats.ttest_ind(equal_var=False) and its CI."""
    rng = np.random.default_rng(seed)
    t, c = rng.lognormal(1.0, 1.0, 400), rng.lognormal(1.1, 0.7, 300)
    effect = compare(_moments(t), _moments(c))
    ref = sst.ttest_ind(t, c, equal_var=False)
    ci = ref.confidence_interval(0.95)
    assert effect.method == "welch"
    assert effect.p_value == pytest.approx(ref.pvalue, rel=1e-10)
    assert effect.abs_ci_low == pytest.approx(ci.low, rel=1e-10)
    assert effect.abs_ci_high == pytest.approx(ci.high, rel=1e-10)


@pytest.mark.parametrize("seed", [4, 5])
def test_delta_method_equals_clustered_ols(seed: int) -> None:
    """Delta method (Deng, Knoblich, Lu, KDD 2018; formula MEMORY) versus statsmodels.

    A per-event OLS of the outcome on a treatment dummy with standard errors clustered
    by unit and no small-sample correction equals the delta method with divisor n
    (REFERENCES.md), so the moments here use ddof=0.
    """
    rng = np.random.default_rng(seed)
    ys, ts, groups, per_unit = [], [], [], {0: ([], []), 1: ([], [])}
    unit = 0
    for arm, n in ((0, 300), (1, 250)):
        for _ in range(n):
            k = int(rng.integers(1, 8))
            rate = rng.beta(2, 5) + 0.05 * arm
            y = rng.binomial(1, rate, k).astype(float)
            ys += list(y)
            ts += [arm] * k
            groups += [unit] * k
            per_unit[arm][0].append(y.sum())
            per_unit[arm][1].append(k)
            unit += 1
    fit = sm.OLS(np.array(ys), sm.add_constant(np.array(ts, dtype=float))).fit(
        cov_type="cluster", cov_kwds={"groups": np.array(groups), "use_correction": False}
    )
    mt = _moments(np.array(per_unit[1][0]), np.array(per_unit[1][1], dtype=float), ddof=0)
    mc = _moments(np.array(per_unit[0][0]), np.array(per_unit[0][1], dtype=float), ddof=0)
    effect = compare(mt, mc)
    _, v_t = ratio_point_and_variance(mt)
    _, v_c = ratio_point_and_variance(mc)
    assert effect.method == "delta"
    assert effect.abs_effect == pytest.approx(fit.params[1], rel=1e-10)
    assert np.sqrt(v_t + v_c) == pytest.approx(fit.bse[1], rel=1e-10)


finite = st.floats(min_value=-1e6, max_value=1e6, allow_nan=False)
positive = st.floats(min_value=1e-3, max_value=1e6, allow_nan=False)


@given(n=st.integers(2, 10_000), mean=finite, var=positive)
def test_mean_metric_variance_is_var_over_n(n: int, mean: float, var: float) -> None:
    value, v = ratio_point_and_variance(Moments.of_mean(n, mean, var))
    assert value == mean
    assert v == pytest.approx(var / n, rel=1e-12)


@given(
    a=st.tuples(st.integers(2, 5000), finite, positive),
    b=st.tuples(st.integers(2, 5000), finite, positive),
)
def test_compare_is_antisymmetric_and_ci_holds_point(a, b) -> None:  # type: ignore[no-untyped-def]
    ta, tb = Moments.of_mean(*a), Moments.of_mean(*b)
    ab, ba = compare(ta, tb), compare(tb, ta)
    assert ab.abs_effect == pytest.approx(-ba.abs_effect, abs=1e-9)
    assert ab.abs_ci_low == pytest.approx(-ba.abs_ci_high, rel=1e-9, abs=1e-9)
    assert ab.abs_ci_low <= ab.abs_effect <= ab.abs_ci_high
    assert 0.0 <= ab.p_value <= 1.0
    assert ab.p_value == pytest.approx(ba.p_value, rel=1e-9)


def test_zero_variance_and_zero_control() -> None:
    same = compare(Moments.of_mean(10, 2.0, 0.0), Moments.of_mean(10, 2.0, 0.0))
    assert same.p_value == 1.0 and same.abs_ci_low == same.abs_ci_high == 0.0
    zero = compare(Moments.of_mean(10, 1.0, 1.0), Moments.of_mean(10, 0.0, 1.0))
    assert np.isnan(zero.rel_effect) and np.isfinite(zero.abs_effect)


def test_ratio_with_zero_denominator_is_an_error() -> None:
    with pytest.raises(StatsError, match="denominator"):
        ratio_point_and_variance(Moments(10, 0.0, 0.0, 0.0, 0.0, 0.0))


def _coverage(
    rng: np.random.Generator, ratio: bool, effect: float, runs: int = 2000
) -> tuple[float, float]:
    """Share of runs whose 95% CI covers the truth, and share with p < 0.05."""
    n = 500
    covered = rejected = 0
    for _ in range(runs):
        arms = []
        for shift in (0.0, effect):
            if ratio:
                y = rng.integers(1, 10, n).astype(float)
                x = rng.binomial(y.astype(int), 0.3 + shift).astype(float)
                arms.append(_moments(x, y))
            else:
                arms.append(_moments(rng.exponential(1.0, n) + shift))
        e = compare(arms[1], arms[0])
        covered += e.abs_ci_low <= effect <= e.abs_ci_high
        rejected += e.p_value < 0.05
    return covered / runs, rejected / runs


@pytest.mark.parametrize("ratio", [False, True], ids=["mean", "ratio"])
def test_coverage_and_aa_false_positive_rate(ratio: bool) -> None:
    """Fact of the trade: about 5% of A/A comparisons are significant at 5% (common practice)."""
    rng = np.random.default_rng(11)
    cover, _ = _coverage(rng, ratio, effect=0.02)
    assert 0.94 <= cover <= 0.96
    _, false_pos = _coverage(rng, ratio, effect=0.0)
    low, high = sst.binom.interval(0.99, 2000, 0.05)
    assert low / 2000 <= false_pos <= high / 2000
