"""Power of the two-sided two-sample z-test, the units it needs, the effect it detects.

For a difference Δ between two means with per-unit standard deviation σ and n1, n2 units,
the test statistic has mean λ = Δ / (σ sqrt(1/n1 + 1/n2)); its power at level α is
Φ(λ − z) + Φ(−λ − z) with z = Φ⁻¹(1 − α/2) (both rejection regions). The approximation
without the far region gives the textbook n1 = (z + z_power)² σ² (1 + 1/k) / Δ² for
n2 = k·n1, i.e. about 15.7σ²/Δ² per variant at α = 0.05, 80% power; these functions solve
the exact equation.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
from scipy import optimize
from scipy import stats as st

from metricforge.errors import StatsError


def _check(alpha: float, power: float | None = None) -> float:
    if not 0.0 < alpha < 1.0:
        raise StatsError(f"alpha must lie strictly between 0 and 1, is {alpha}")
    if power is not None and not alpha < power < 1.0:
        raise StatsError(f"power must lie strictly between alpha and 1, is {power}")
    return float(st.norm.ppf(1.0 - alpha / 2.0))


def _power(shift: float, z: float) -> float:
    return float(st.norm.sf(z - shift) + st.norm.cdf(-z - shift))


def power(effect: float, sd: float, n1: float, n2: float, *, alpha: float) -> float:
    """Power to detect a difference ``effect`` with ``n1`` and ``n2`` units."""
    z = _check(alpha)
    if not (sd > 0 and n1 > 0 and n2 > 0):
        raise StatsError("power needs a positive standard deviation and unit counts")
    return _power(abs(effect) / (sd * math.sqrt(1.0 / n1 + 1.0 / n2)), z)


def units_needed(
    effect: float, sd: float, *, alpha: float, power: float, ratio: float = 1.0
) -> float:
    """Units n1 (and n2 = ratio·n1) for ``power`` to detect ``effect``; not rounded."""
    z = _check(alpha, power)
    if not (sd > 0 and effect != 0 and math.isfinite(effect) and ratio > 0):
        raise StatsError("units_needed needs a non-zero effect, sd > 0 and ratio > 0")
    z_power = float(st.norm.ppf(power))
    d = abs(effect) / sd
    upper = (z + z_power) ** 2 * (1.0 + 1.0 / ratio) / (d * d)  # far region ignored: n ≥ exact

    def gap(n1: float) -> float:
        return _power(d / math.sqrt(1.0 / n1 + 1.0 / (ratio * n1)), z) - power

    if gap(upper) <= 0.0:
        return upper
    return float(optimize.brentq(gap, upper * 1e-6, upper, xtol=1e-12 * upper, rtol=1e-15))


def detectable_effect(sd: float, n1: float, n2: float, *, alpha: float, power: float) -> float:
    """The smallest difference detected with ``power`` by ``n1`` and ``n2`` units."""
    z = _check(alpha, power)
    if not (sd > 0 and n1 > 0 and n2 > 0):
        raise StatsError("detectable_effect needs sd > 0 and positive unit counts")
    se = sd * math.sqrt(1.0 / n1 + 1.0 / n2)
    upper = (z + float(st.norm.ppf(power))) * se  # far region ignored: effect ≥ exact

    def gap(effect: float) -> float:
        return _power(effect / se, z) - power

    if gap(upper) <= 0.0:
        return upper
    return float(optimize.brentq(gap, 0.0, upper, xtol=1e-14 * upper, rtol=1e-15))


def linearised_correlation(means: Sequence[float], cov: Sequence[Sequence[float]]) -> float:
    """Correlation of two per-unit metric values, each a ratio X_k / Y_k by the delta method.

    ``means`` and ``cov`` are over (X1, X2) for per-unit means, or (X1, X2, Y1, Y2) for
    ratios; the delta method linearises X_k / Y_k as X_k − r_k Y_k (the common factor
    1/mean(Y_k) cancels in the correlation). NaN when either has no variance.
    """
    sigma = np.asarray(cov, dtype=np.float64)
    m = np.asarray(means, dtype=np.float64)
    if m.size == 2:
        g1, g2 = np.array([1.0, 0.0]), np.array([0.0, 1.0])
    elif m.size == 4:
        g1 = np.array([1.0, 0.0, -m[0] / m[2], 0.0])
        g2 = np.array([0.0, 1.0, 0.0, -m[1] / m[3]])
    else:
        raise StatsError("means of (X1, X2) or (X1, X2, Y1, Y2) are needed")
    if sigma.shape != (m.size, m.size) or not np.all(np.isfinite(sigma)):
        raise StatsError("the covariance matrix must be finite and match the means")
    v1, v2 = float(g1 @ sigma @ g1), float(g2 @ sigma @ g2)
    if not (v1 > 0 and v2 > 0):
        return math.nan
    return max(-1.0, min(1.0, float(g1 @ sigma @ g2) / math.sqrt(v1 * v2)))
