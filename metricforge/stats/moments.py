"""Per-variant sufficient statistics and the delta method for a ratio of per-unit means."""

from __future__ import annotations

import math
from dataclasses import dataclass

from metricforge.errors import StatsError


@dataclass(frozen=True, slots=True)
class Moments:
    """Sufficient statistics of a metric that is a ratio of per-unit sums X / Y.

    For a per-unit mean metric Y is 1 for every unit: mean_y = 1, var_y = cov_xy = 0.
    Variances and the covariance use the divisor n - 1.
    """

    n: int
    mean_x: float
    mean_y: float
    var_x: float
    var_y: float
    cov_xy: float

    @classmethod
    def of_mean(cls, n: int, mean: float, var: float) -> Moments:
        return cls(n=n, mean_x=mean, mean_y=1.0, var_x=var, var_y=0.0, cov_xy=0.0)

    @property
    def is_ratio(self) -> bool:
        return self.var_y > 0 or self.mean_y != 1.0


def ratio_point_and_variance(m: Moments) -> tuple[float, float]:
    """mean_x / mean_y and the delta-method variance of that estimator.

    Var ≈ (1/n)[σx²/μy² − 2μx σxy/μy³ + μx² σy²/μy⁴]; for a mean metric this is σx²/n.
    """
    if m.n < 2:
        raise StatsError(f"needs at least 2 units, has {m.n}")
    if m.mean_y == 0 or not math.isfinite(m.mean_y):
        raise StatsError("the denominator's mean is zero for this variant")
    mx, my = m.mean_x, m.mean_y
    var = (m.var_x / my**2 - 2.0 * mx * m.cov_xy / my**3 + mx**2 * m.var_y / my**4) / m.n
    return mx / my, max(var, 0.0)
