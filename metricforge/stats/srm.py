"""Sample-ratio mismatch: chi-square goodness of fit against the planned split."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

from metricforge.errors import StatsError
from metricforge.stats.dist import pearson_goodness_of_fit


@dataclass(frozen=True, slots=True)
class SrmResult:
    chi2: float
    df: int
    p_value: float
    observed: tuple[int, ...]
    expected: tuple[float, ...]


def srm_test(observed: Sequence[int], planned_weights: Sequence[float]) -> SrmResult:
    """Pearson chi-square of the unit counts against the normalised planned weights."""
    if len(observed) != len(planned_weights):
        raise StatsError(
            f"{len(observed)} observed counts but {len(planned_weights)} planned weights"
        )
    if len(observed) < 2:
        raise StatsError("a split needs two or more variants")
    if any(o < 0 or o != int(o) for o in observed):
        raise StatsError("observed counts must be whole numbers, not negative")
    if any(not (math.isfinite(w) and w > 0) for w in planned_weights):
        raise StatsError("planned weights must be positive and finite")
    counts = tuple(int(o) for o in observed)
    total = sum(counts)
    if total == 0:
        raise StatsError("no units to test")
    weight_sum = math.fsum(planned_weights)
    expected = tuple(total * w / weight_sum for w in planned_weights)
    chi2, p = pearson_goodness_of_fit(counts, expected)
    return SrmResult(float(chi2), len(counts) - 1, float(p), counts, expected)
