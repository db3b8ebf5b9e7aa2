"""The A/A calibration's distribution functions against scipy.stats (the reference library).

metricforge/stats/calibration.py computes them on scipy.special so that `metricforge aa`
does not import scipy.stats. scipy.stats.kstwo computes the two-sided Kolmogorov–Smirnov
tail exactly (n ≤ 140; or n·d^1.5 ≤ 1.4), by the one-sided tail doubled (n·d² above 2.2,
above 4 when n ≤ 140), and by the Pelz–Good asymptotic series elsewhere: there our exact
value may differ from scipy's series by its approximation error (seen up to 2e-5).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats as sst

from metricforge.stats.calibration import EXACT_UP_TO, exact_interval, ks_sf, ks_uniform


def tolerance(n: int, d: float) -> float:
    """Relative agreement expected with scipy.stats.kstwo.sf(d, n)."""
    if n > EXACT_UP_TO and n * d * d <= 2.2:
        return 2e-3  # Stephens' asymptotic form against scipy's series
    scipy_exact = n <= 140 or n * d**1.5 <= 1.4 or n * d * d > 2.2 or d >= 0.5
    return 1e-8 if scipy_exact else 1e-4


@pytest.mark.parametrize("n", [1, 2, 3, 10, 50, 140, 141, 500, 1000, 5000, 20_000, 50_000])
@pytest.mark.parametrize("z", [0.3, 0.6, 0.8, 1.0, 1.2, 1.36, 1.63, 1.95, 2.5, 4.0])
def test_ks_tail_equals_scipy_kstwo(n: int, z: float) -> None:
    d = min(z / math.sqrt(n), 0.999)
    expected = float(sst.kstwo.sf(d, n))
    assert ks_sf(n, d) == pytest.approx(expected, rel=tolerance(n, d), abs=1e-300)


@pytest.mark.parametrize("n", [5, 140, 1000])
def test_ks_tail_at_the_ends_of_the_support(n: int) -> None:
    assert ks_sf(n, 1.0) == 0.0 and ks_sf(n, 0.5 / n) == 1.0
    for d in (0.5 / n + 1e-9, 1 / n, 0.999):
        assert ks_sf(n, d) == pytest.approx(float(sst.kstwo.sf(d, n)), rel=1e-8, abs=1e-300)


@pytest.mark.parametrize(
    ("n", "power"), [(20, 1.0), (300, 1.0), (1000, 1.0), (1000, 1.3), (1000, 0.8), (4000, 1.05)]
)
def test_ks_test_of_p_values_equals_scipy_kstest(n: int, power: float) -> None:
    p = np.random.default_rng(n).random(n) ** power
    distance, p_value = ks_uniform(p)
    reference = sst.kstest(p, "uniform")
    assert distance == pytest.approx(float(reference.statistic), rel=1e-14)
    assert p_value == pytest.approx(float(reference.pvalue), rel=tolerance(n, distance))


@settings(max_examples=200, deadline=None)
@given(
    trials=st.integers(1, 100_000),
    share=st.floats(0.0, 1.0),
    confidence=st.sampled_from([0.9, 0.99]),
)
def test_exact_interval_equals_scipy_beta_quantiles(
    trials: int, share: float, confidence: float
) -> None:
    hits = round(share * trials)
    tail = (1 - confidence) / 2
    low = sst.beta.ppf(tail, hits, trials - hits + 1) if hits > 0 else 0.0
    high = sst.beta.ppf(1 - tail, hits + 1, trials - hits) if hits < trials else 1.0
    assert exact_interval(hits, trials, confidence) == pytest.approx(
        (low, high), rel=1e-9, abs=1e-15
    )
