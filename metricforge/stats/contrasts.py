"""Linear contrasts of variant values, and the contrasts of a two-level factorial design.

A contrast Σ w_v·r_v of the variants' values r_v (per-unit means, or ratios by the delta
method) has the variance Σ w_v²·V_v (independent variants). For per-unit means the test
and CI use Student's t with the Welch–Satterthwaite degrees of freedom
(Σ w²V)² / Σ (w²V)²/(n − 1); with a ratio among the cells, the normal.

In a full 2^k factorial design with one variant per cell, level 0 of each factor being the
control's, the effect of a set S of factors (a main effect for one factor, an interaction
for more) has the weights w_v = 2^(|S| − k) · Π_{f∈S} (±1) with +1 at level 1, −1 at level 0.
A main effect is then the mean over cells at level 1 minus the mean over cells at level 0;
the two-factor interaction of a 2×2 is (μ11 − μ10) − (μ01 − μ00). These are the
coefficients of a least-squares fit of the saturated model with ±1/2 coding per factor.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

from metricforge.errors import StatsError
from metricforge.stats.dist import t_ppf, t_sf
from metricforge.stats.moments import Moments, ratio_point_and_variance


@dataclass(frozen=True, slots=True)
class ContrastResult:
    estimate: float
    ci_low: float
    ci_high: float
    p_value: float
    positive: float  # Σ w·r over the cells with a positive weight
    negative: float  # −Σ w·r over the cells with a negative weight: estimate = pos − neg
    method: str


def contrast(
    cells: Sequence[Moments], weights: Sequence[float], *, alpha: float = 0.05
) -> ContrastResult:
    """Σ w·r with its two-sided test of 0 and its CI."""
    if len(cells) != len(weights) or not cells:
        raise StatsError("a contrast needs one weight per cell")
    points = [ratio_point_and_variance(m) for m in cells]
    terms = [w * w * v for w, (_, v) in zip(weights, points, strict=True)]
    ratio = any(m.is_ratio for m in cells)
    if ratio:
        df = math.inf
    else:
        var = math.fsum(terms)
        spread = math.fsum(q * q / (m.n - 1) for q, m in zip(terms, cells, strict=True))
        df = var * var / spread if spread > 0 else math.inf
    return combine(
        [r for r, _ in points],
        [v for _, v in points],
        weights,
        df=df,
        alpha=alpha,
        method="delta" if ratio else "welch",
    )


def combine(
    points: Sequence[float],
    variances: Sequence[float],
    weights: Sequence[float],
    *,
    df: float,
    alpha: float,
    method: str,
) -> ContrastResult:
    """Σ w·r of independent estimates r with variances V: variance Σ w²·V, Student's t with
    ``df`` degrees of freedom (the normal when infinite), two-sided."""
    if not len(points) == len(variances) == len(weights) or not points:
        raise StatsError("a contrast needs one weight per cell")
    if not 0.0 < alpha < 1.0:
        raise StatsError(f"alpha must lie strictly between 0 and 1, is {alpha}")
    parts = [w * r for w, r in zip(weights, points, strict=True)]
    estimate = math.fsum(parts)
    var = math.fsum(w * w * v for w, v in zip(weights, variances, strict=True))
    if var > 0:
        se = math.sqrt(var)
        p = 2.0 * float(t_sf(abs(estimate) / se, df))
        half = float(t_ppf(1.0 - alpha / 2.0, df)) * se
    else:
        p, half = (1.0 if estimate == 0 else 0.0), 0.0
    return ContrastResult(
        estimate=estimate,
        ci_low=estimate - half,
        ci_high=estimate + half,
        p_value=p,
        positive=math.fsum(x for x, w in zip(parts, weights, strict=True) if w > 0),
        negative=0.0 - math.fsum(x for x, w in zip(parts, weights, strict=True) if w < 0),
        method=method,
    )


@dataclass(frozen=True)
class FactorialTerm:
    name: str  # "main:photo_size", "interaction:photo_size*button_colour"
    factors: tuple[str, ...]
    weights: dict[str, float]  # variant -> weight


def factorial_terms(
    factors: Sequence[str], levels: Mapping[str, Sequence[int]]
) -> list[FactorialTerm]:
    """Every main effect and interaction of a full 2^k design.

    ``levels`` maps each variant to its level (0 or 1) of every factor, in the order of
    ``factors``; every one of the 2^k level combinations must be exactly one variant.
    """
    k = len(factors)
    cells = {tuple(lv) for lv in levels.values()}
    if k == 0 or len(cells) != len(levels) or cells != set(itertools.product((0, 1), repeat=k)):
        raise StatsError("a factorial design needs exactly one variant per level combination")
    terms = []
    for size in range(1, k + 1):
        for subset in itertools.combinations(range(k), size):
            scale = 2.0 ** (size - k)
            weights = {
                variant: scale * math.prod(1.0 if lv[f] else -1.0 for f in subset)
                for variant, lv in levels.items()
            }
            names = tuple(factors[f] for f in subset)
            kind = "main" if size == 1 else "interaction"
            terms.append(FactorialTerm(f"{kind}:{'*'.join(names)}", names, weights))
    return terms
