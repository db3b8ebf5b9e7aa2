"""Sample-ratio mismatch: chi-square goodness of fit against the planned split."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from scipy import stats as st

from metricforge.errors import StatsError


@dataclass(frozen=True, slots=True)
class SrmResult:
    chi2: float
    df: int
    p_value: float
    observed: tuple[int, ...]
    expected: tuple[float, ...]


def srm_test(observed: Sequence[int], planned_weights: Sequence[float]) -> SrmResult:
    if len(observed) != len(planned_weights) or len(observed) < 2:
        raise StatsError("observed counts and planned weights must pair up, two or more")
    if any(o < 0 for o in observed):
        raise StatsError("observed counts must not be negative")
    if any(w <= 0 for w in planned_weights):
        raise StatsError("planned weights must be positive")
    total = sum(observed)
    if total == 0:
        raise StatsError("no units to test")
    weight_sum = float(sum(planned_weights))
    expected = [total * w / weight_sum for w in planned_weights]
    chi2, p = st.chisquare(list(observed), expected)
    return SrmResult(float(chi2), len(observed) - 1, float(p), tuple(observed), tuple(expected))
