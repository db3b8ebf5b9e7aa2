"""Per-variant sufficient statistics and the delta method for a ratio of per-unit means."""

from __future__ import annotations

import math
from dataclasses import dataclass

from metricforge.errors import StatsError


@dataclass(frozen=True, slots=True)
class Moments:
    """Per-variant sufficient statistics of a metric that is a ratio of per-unit sums X / Y.

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


def _checked(m: Moments) -> tuple[float, float, float, float, float]:
    """The moments as floats, or a StatsError saying why they cannot be used."""
    if m.n < 2:
        raise StatsError(f"needs at least 2 units, has {m.n}")
    mx, my, vx, vy, cxy = (float(v) for v in (m.mean_x, m.mean_y, m.var_x, m.var_y, m.cov_xy))
    named = {"mean_x": mx, "mean_y": my, "var_x": vx, "var_y": vy, "cov_xy": cxy}
    bad = [name for name, v in named.items() if not math.isfinite(v)]
    if bad:
        raise StatsError(f"moments must be finite, {', '.join(bad)} is not")
    if my == 0:
        raise StatsError("the denominator's mean is zero for this variant")
    if vx < 0 or vy < 0:
        raise StatsError("a variance is negative: the moments were computed unstably")
    return mx, my, vx, vy, cxy


def ratio_point_and_variance(m: Moments) -> tuple[float, float]:
    """mean_x / mean_y and the delta-method variance of that estimator.

    Var ≈ (1/n)[σx²/μy² − 2μx σxy/μy³ + μx² σy²/μy⁴], evaluated as the variance of the
    per-unit residual X − rY over n μy² with r = μx/μy (the same expression, without
    powers of μy that overflow). For a mean metric it is exactly σx²/n.
    """
    mx, my, vx, vy, cxy = _checked(m)
    r = mx / my
    if not math.isfinite(r):
        raise StatsError("the ratio overflows: the denominator's mean is too close to zero")
    resid = vx - 2.0 * (r * cxy) + r * (r * vy)  # no r² that overflows times a zero
    if not math.isfinite(resid):
        raise StatsError("the delta-method variance overflows: the moments are too large")
    # Rounding can push the residual variance of X ∝ Y slightly below zero. Dividing step
    # by step keeps a tiny mean_y from underflowing μy² to zero.
    return r, max(resid, 0.0) / m.n / my / my
