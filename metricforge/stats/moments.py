"""Per-variant sufficient statistics and the delta method for a ratio of per-unit means."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from metricforge.errors import StatsError

FloatArray = npt.NDArray[np.float64]


@dataclass(frozen=True, slots=True)
class Moments:
    """Per-variant sufficient statistics of a metric that is a ratio of per-unit sums X / Y.

    For a per-unit mean metric Y is 1 for every unit: mean_y = 1, var_y = cov_xy = 0.
    Variances and the covariance use the divisor n - 1. A proportion metric (per-unit
    value 0 or 1) also carries its exact count of units with value 1 in ``successes``.
    """

    n: int
    mean_x: float
    mean_y: float
    var_x: float
    var_y: float
    cov_xy: float
    successes: int | None = None

    @classmethod
    def of_mean(cls, n: int, mean: float, var: float) -> Moments:
        return cls(n=n, mean_x=mean, mean_y=1.0, var_x=var, var_y=0.0, cov_xy=0.0)

    @classmethod
    def of_proportion(cls, n: int, successes: int) -> Moments:
        """n units of which ``successes`` have the value 1: mean s/n, variance s(n-s)/(n(n-1))."""
        if not (n == int(n) and successes == int(successes) and 0 <= successes <= n):
            raise StatsError(f"a proportion needs whole counts 0 <= {successes} <= {n}")
        n, successes = int(n), int(successes)
        var = successes * (n - successes) / n / (n - 1) if n > 1 else 0.0
        return cls(n, successes / n if n else math.nan, 1.0, var, 0.0, 0.0, successes)

    @property
    def is_ratio(self) -> bool:
        return self.var_y > 0 or self.mean_y != 1.0

    @property
    def is_proportion(self) -> bool:
        return self.successes is not None


@dataclass(frozen=True)
class MomentsBatch:
    """Many variants' (or many simulated experiments') moments as arrays of equal shape.

    The vectorised statistics take these; they do not validate (see ``Moments``).
    ``successes`` is set only when every element is a proportion.
    """

    n: FloatArray
    mean_x: FloatArray
    mean_y: FloatArray
    var_x: FloatArray
    var_y: FloatArray
    cov_xy: FloatArray
    successes: FloatArray | None = None

    @classmethod
    def of(cls, arms: Sequence[Moments]) -> MomentsBatch:
        def col(name: str) -> FloatArray:
            return np.array([float(getattr(m, name)) for m in arms], dtype=np.float64)

        props = all(m.successes is not None for m in arms)
        return cls(
            col("n"),
            col("mean_x"),
            col("mean_y"),
            col("var_x"),
            col("var_y"),
            col("cov_xy"),
            col("successes") if props else None,
        )

    @classmethod
    def of_means(cls, n: npt.ArrayLike, mean: npt.ArrayLike, var: npt.ArrayLike) -> MomentsBatch:
        m, v = np.asarray(mean, np.float64), np.asarray(var, np.float64)
        n_ = np.broadcast_to(np.asarray(n, np.float64), m.shape)
        return cls(n_, m, np.ones_like(m), v, np.zeros_like(m), np.zeros_like(m))

    @classmethod
    def of_proportions(cls, n: npt.ArrayLike, successes: npt.ArrayLike) -> MomentsBatch:
        s = np.asarray(successes, np.float64)
        n_ = np.broadcast_to(np.asarray(n, np.float64), s.shape)
        with np.errstate(all="ignore"):
            var = s * (n_ - s) / n_ / (n_ - 1)
        batch = cls.of_means(n_, s / n_, var)
        return cls(batch.n, batch.mean_x, batch.mean_y, batch.var_x, batch.var_y, batch.cov_xy, s)

    @property
    def is_ratio(self) -> npt.NDArray[np.bool_]:
        return np.asarray((self.var_y > 0) | (self.mean_y != 1.0), dtype=np.bool_)


def delta_ratio(b: MomentsBatch) -> tuple[FloatArray, FloatArray]:
    """Vectorised mean_x / mean_y and the delta-method variance of that estimator.

    Var ≈ (1/n)[σx²/μy² − 2μx σxy/μy³ + μx² σy²/μy⁴], evaluated as the variance of the
    per-unit residual X − rY over n μy² with r = μx/μy (the same expression, without
    powers of μy that overflow). For a mean metric it is exactly σx²/n. Non-finite
    results stand for unusable moments; ``ratio_point_and_variance`` turns them into errors.
    """
    with np.errstate(all="ignore"):
        r = b.mean_x / b.mean_y
        resid = b.var_x - 2.0 * (r * b.cov_xy) + r * (r * b.var_y)  # no r² times a zero
        # Rounding can push the residual variance of X ∝ Y slightly below zero. Dividing
        # step by step keeps a tiny mean_y from underflowing μy² to zero.
        var = np.maximum(resid, 0.0) / b.n / b.mean_y / b.mean_y
    return r, np.where(np.isfinite(resid), var, resid)


def _checked(m: Moments) -> None:
    """A StatsError saying why the moments cannot be used, if they cannot."""
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
    if m.successes is not None and not 0 <= m.successes <= m.n:
        raise StatsError(f"successes {m.successes} must lie between 0 and n = {m.n}")


def ratio_point_and_variance(m: Moments) -> tuple[float, float]:
    """mean_x / mean_y and the delta-method variance of that estimator (see ``delta_ratio``)."""
    _checked(m)
    r, var = delta_ratio(MomentsBatch.of([m]))
    if not math.isfinite(r[0]):
        raise StatsError("the ratio overflows: the denominator's mean is too close to zero")
    if not math.isfinite(var[0]):
        raise StatsError("the delta-method variance overflows: the moments are too large")
    return float(r[0]), float(var[0])


def merge_moments(parts: Sequence[Moments]) -> Moments:
    """The moments of the union of disjoint groups of units, from each group's moments.

    Deviations from the union's mean, never raw power sums: with d = mean_g − μ,
    M2 = Σ_g (M2_g + n_g d_x d_y) for every pair of variables (M2_g = (n_g − 1) (co)variance;
    a group of one unit has none). Proportions add their exact counts of ones.
    """
    kept = [m for m in parts if m.n > 0]
    if not kept:
        return Moments.of_mean(0, math.nan, 0.0)
    n = sum(m.n for m in kept)
    if all(m.successes is not None for m in kept):
        return Moments.of_proportion(n, sum(int(m.successes or 0) for m in kept))
    mx = math.fsum(m.n * m.mean_x for m in kept) / n
    my = math.fsum(m.n * m.mean_y for m in kept) / n

    def m2(var: str, a: str, b: str, mean_a: float, mean_b: float) -> float:
        total = math.fsum(
            (m.n - 1) * getattr(m, var) if m.n > 1 else 0.0 for m in kept
        ) + math.fsum(m.n * (getattr(m, a) - mean_a) * (getattr(m, b) - mean_b) for m in kept)
        return total / (n - 1) if n > 1 else math.nan

    return Moments(
        n=n,
        mean_x=mx,
        mean_y=my,
        var_x=m2("var_x", "mean_x", "mean_x", mx, mx),
        var_y=m2("var_y", "mean_y", "mean_y", my, my),
        cov_xy=m2("cov_xy", "mean_x", "mean_y", mx, my),
    )
