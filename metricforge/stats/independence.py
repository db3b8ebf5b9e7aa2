"""Is a share (e.g. of units the bot filter removed) the same in every variant?"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from metricforge.errors import StatsError
from metricforge.stats.dist import pearson_independence


@dataclass(frozen=True, slots=True)
class IndependenceResult:
    chi2: float
    df: int
    p_value: float


def share_differs(flagged: Sequence[int], total: Sequence[int]) -> IndependenceResult:
    """Pearson chi-square (no continuity correction): is flagged/total equal across groups?"""
    if len(flagged) != len(total) or len(flagged) < 2:
        raise StatsError("flagged and total counts must pair up, two groups or more")
    if any(f < 0 or f > t for f, t in zip(flagged, total, strict=True)):
        raise StatsError("flagged counts must lie between 0 and the group total")
    table = [list(flagged), [t - f for f, t in zip(flagged, total, strict=True)]]
    if sum(table[0]) == 0 or sum(table[1]) == 0:
        return IndependenceResult(0.0, len(flagged) - 1, 1.0)
    chi2, p, df = pearson_independence(table)
    return IndependenceResult(float(chi2), int(df), float(p))
