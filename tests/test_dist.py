"""The distribution functions of metricforge/stats/dist.py against scipy.stats (the
reference library), bit for bit: the scorecard's p-values and intervals must not change
when the statistics stop importing scipy.stats."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import stats as sst

from metricforge.errors import StatsError
from metricforge.stats import dist

REALS = st.floats(allow_nan=True, allow_infinity=True, width=64)
PROBS = st.one_of(st.floats(0.0, 1.0), st.sampled_from([0.0, 1.0, 0.5, 0.975, 0.995, -0.1, 1.1]))
DFS = st.one_of(
    st.floats(min_value=1e-3, max_value=1e12),
    st.sampled_from([np.inf, 1.0, 2.0, 0.0, -1.0, np.nan]),
)


def same_bits(a: object, b: object) -> bool:
    x, y = np.asarray(a, np.float64), np.asarray(b, np.float64)
    both_nan = np.isnan(x) & np.isnan(y)
    return bool(np.all(both_nan | (x.view(np.int64) == y.view(np.int64))))


@settings(deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(REALS)
def test_normal_tails_are_scipy_stats(x: float) -> None:
    assert same_bits(dist.norm_sf(x), sst.norm.sf(x))
    assert same_bits(dist.norm_cdf(x), sst.norm.cdf(x))


@settings(deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(PROBS)
def test_normal_quantile_is_scipy_stats(q: float) -> None:
    assert same_bits(dist.norm_ppf(q), sst.norm.ppf(q))


@settings(deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(REALS, DFS)
def test_student_tail_is_scipy_stats(x: float, df: float) -> None:
    with np.errstate(all="ignore"):
        assert same_bits(dist.t_sf(x, df), sst.t.sf(x, df))


@settings(deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(PROBS, DFS)
def test_student_quantile_is_scipy_stats(q: float, df: float) -> None:
    with np.errstate(all="ignore"):
        assert same_bits(dist.t_ppf(q, df), sst.t.ppf(q, df))


def test_arrays_broadcast_like_scipy_stats() -> None:
    rng = np.random.default_rng(7)
    x, df = rng.normal(0, 4, 500), np.exp(rng.uniform(-2, 14, 500))
    q = rng.uniform(0, 1, 500)
    assert same_bits(dist.t_sf(x, df), sst.t.sf(x, df))
    assert same_bits(dist.t_ppf(q, df), sst.t.ppf(q, df))
    assert same_bits(dist.t_ppf(0.975, df), sst.t.ppf(0.975, df))
    assert same_bits(dist.chi2_sf(np.abs(x), df), sst.chi2.sf(np.abs(x), df))


@settings(deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.integers(0, 10**9), min_size=2, max_size=6), st.data())
def test_goodness_of_fit_is_scipy_chisquare(counts: list[int], data: st.DataObject) -> None:
    total = sum(counts)
    if total == 0:
        return
    weights = data.draw(st.lists(st.floats(0.01, 100.0), min_size=len(counts), max_size=6))
    weights = weights[: len(counts)]
    if len(weights) < len(counts):
        return
    expected = [total * w / sum(weights) for w in weights]
    stat, p = dist.pearson_goodness_of_fit(counts, expected)
    ref = sst.chisquare(counts, expected)
    assert same_bits(stat, ref.statistic) and same_bits(p, ref.pvalue)


@settings(deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.tuples(st.integers(0, 10**7), st.integers(1, 10**7)), min_size=2, max_size=5))
def test_independence_is_scipy_chi2_contingency(groups: list[tuple[int, int]]) -> None:
    flagged = [min(f, t) for f, t in groups]
    table = [flagged, [t - f for f, (_, t) in zip(flagged, groups, strict=True)]]
    if sum(table[0]) == 0 or sum(table[1]) == 0:
        return
    stat, p, dof = dist.pearson_independence(table)
    ref = sst.chi2_contingency(table, correction=False)
    assert same_bits(stat, ref.statistic) and same_bits(p, ref.pvalue) and dof == ref.dof


def test_independence_refuses_an_empty_column() -> None:
    with pytest.raises(StatsError):
        dist.pearson_independence([[0, 3], [0, 5]])
