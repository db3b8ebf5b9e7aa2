"""Quantile metrics: the difference of two variants' quantiles with an outer confidence
interval that respects clustering by unit.

Per variant the engine reports the quantile q̂ of the event-level values (linear
interpolation), the per-unit counts S (values ≤ q̂) and M (all values) summarised as moments
over units, and the quantiles at the levels q ∓ z·σ, where σ² is the delta-method variance
of the proportion ΣS/ΣM: a ratio of per-unit sums, so units with many correlated values
count as what they are. Those two quantiles bound the variant's quantile (the outer
confidence interval); its standard error is the interval's width over 2z, and the
difference of the two independent variants is tested with z.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from metricforge.errors import StatsError
from metricforge.stats.contrasts import ContrastResult, combine
from metricforge.stats.dist import norm_ppf, norm_sf
from metricforge.stats.effects import (
    Effect,
    EffectBatch,
    check_hypothesis,
    evidence_sign,
    margin_factor,
    with_relative,
)
from metricforge.stats.moments import FloatArray, Moments, ratio_point_and_variance

METHOD = "outer-ci"


@lru_cache(maxsize=64)
def two_sided_z(alpha: float) -> float:
    """The standard normal quantile at 1 − α/2."""
    if not 0.0 < alpha < 1.0:
        raise StatsError(f"alpha must lie strictly between 0 and 1, is {alpha}")
    return float(norm_ppf(1.0 - alpha / 2.0))


@dataclass(frozen=True, slots=True)
class QuantileSummary:
    """One variant's quantile and its outer band, as the engine reports them."""

    quantile: float  # q̂
    n_values: int
    below: Moments  # per unit: X = values ≤ q̂, Y = all values
    level_low: float
    level_high: float
    value_low: float  # the quantile at level_low
    value_high: float  # the quantile at level_high

    @property
    def n_units(self) -> int:
        return self.below.n


def _check_level(q: float) -> None:
    if not 0.0 < q < 1.0:
        raise StatsError(f"the quantile's level must lie strictly between 0 and 1, is {q}")


def rank_band(below: Moments, q: float, alpha: float) -> tuple[float, float]:
    """The levels q ∓ z·σ, clipped to [0, 1], of the outer confidence interval."""
    _check_level(q)
    _, variance = ratio_point_and_variance(below)
    low, high = rank_bands(np.array([variance]), q, alpha)
    return float(low[0]), float(high[0])


def rank_bands(variance: FloatArray, q: float, alpha: float) -> tuple[FloatArray, FloatArray]:
    """``rank_band`` for many delta-method variances of ΣS/ΣM at once."""
    _check_level(q)
    half = two_sided_z(alpha) * np.sqrt(variance)
    return np.maximum(q - half, 0.0), np.minimum(q + half, 1.0)


def quantile_se(summary: QuantileSummary, q: float, alpha: float) -> float:
    """The standard error of q̂: the outer interval's width over 2z.

    The band levels the engine used are recomputed here from the same moments; a
    difference means the query and this module disagree, and nothing is reported.
    """
    low, high = rank_band(summary.below, q, alpha)
    if not (
        math.isclose(low, summary.level_low, abs_tol=1e-9)
        and math.isclose(high, summary.level_high, abs_tol=1e-9)
    ):
        raise StatsError(
            f"the engine's rank band ({summary.level_low}, {summary.level_high}) differs from"
            f" the delta method's ({low}, {high})"
        )
    if not (math.isfinite(summary.value_low) and math.isfinite(summary.value_high)):
        raise StatsError("the quantiles at the band's levels are missing")
    return (summary.value_high - summary.value_low) / (2.0 * two_sided_z(alpha))


def quantile_compare(
    treatment: QuantileSummary,
    control: QuantileSummary,
    *,
    q: float,
    alpha: float = 0.05,
    side: int = 0,
    margin: float | None = None,
) -> Effect:
    """Treatment minus control quantile, its CI (two-sided, 1 − alpha) and p-value by z
    (independent arms); the relative effect by the delta method.

    ``side`` 0 tests "no difference" two-sided; ±1 is one-sided against that bad direction
    (+1: higher is worse): a harm test, or with a relative ``margin`` m the
    non-inferiority test of H0 "worse by m·|control| or more".
    """
    check_hypothesis(side, margin)
    se_t = quantile_se(treatment, q, alpha)
    se_c = quantile_se(control, q, alpha)

    def one(v: float) -> FloatArray:
        return np.array([v], np.float64)

    return compare_quantiles(
        one(treatment.quantile),
        one(se_t),
        one(control.quantile),
        one(se_c),
        alpha=alpha,
        side=side,
        margin=margin,
    ).item()


def _hypot(a: FloatArray, b: FloatArray | float) -> FloatArray:
    """Python's ``math.hypot`` element by element: numpy's hypot can differ from it in the
    last bit, and the scorecard's figures must not move."""
    with np.errstate(invalid="ignore"):  # NaN in, NaN out
        out: FloatArray = np.vectorize(math.hypot, otypes=[np.float64])(a, b)
    return out


def compare_quantiles(
    t: FloatArray,
    se_t: FloatArray,
    c: FloatArray,
    se_c: FloatArray,
    *,
    alpha: float = 0.05,
    side: int = 0,
    margin: float | None = None,
) -> EffectBatch:
    """``quantile_compare`` on arrays of quantiles and their standard errors (one element
    per compared pair, e.g. per A/A replay); NaN standard errors give NaN effects."""
    check_hypothesis(side, margin)
    z = two_sided_z(alpha)
    diff = t - c
    half = z * _hypot(se_t, se_c)
    k = margin_factor(c, side, margin)  # the tested contrast is t − k·c
    contrast = t - k * c
    se = _hypot(se_t, k * se_c)
    sign = evidence_sign(side, margin)
    with np.errstate(divide="ignore", invalid="ignore"):
        statistic = contrast / se
    p = 2.0 * norm_sf(np.abs(statistic)) if side == 0 else norm_sf(sign * statistic)
    # no spread in either variant: the contrast is known exactly
    known = contrast == 0 if side == 0 else sign * contrast <= 0
    p = np.where(se == 0, np.where(known, 1.0, 0.0), p)
    return with_relative(
        t,
        se_t * se_t,
        c,
        se_c * se_c,
        z,
        diff=diff,
        low=diff - half,
        high=diff + half,
        p=p,
        method=np.full(len(t), METHOD),
    )


def quantile_contrast(
    cells: Sequence[QuantileSummary], weights: Sequence[float], *, q: float, alpha: float = 0.05
) -> ContrastResult:
    """Σ w·q̂ of independent variants' quantiles (e.g. a factorial main effect), two-sided
    z-test of 0 and CI, each variant's standard error from its outer interval; with the
    weights (1, −1) the difference ``quantile_compare`` reports."""
    ses = [quantile_se(c, q, alpha) for c in cells]
    points = [c.quantile for c in cells]
    return combine(points, [s * s for s in ses], weights, df=math.inf, alpha=alpha, method=METHOD)
