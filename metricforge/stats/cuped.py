"""CUPED: the effect adjusted by each unit's pre-period value of the same metric.

Per variant the engine reports, over analysed units, the count, means and covariance
matrix (divisor n − 1) of a few per-unit variables:

  per-unit metrics   x (the metric), c (its pre-period value, 0 without pre-period data),
                     h (1 if the unit has pre-period data, else 0)
  ratio metrics      x, y (numerator, denominator), xpre, ypre (the same over the
                     pre-period), h

The outcome is x, or for a ratio its delta-method linearisation (x − R·y)/ȳ with the
variant's own R = x̄/ȳ, whose variance over n is the delta-method variance of R. The
covariates are c (a ratio: the pre-period linearisation (xpre − R_pre·ypre)/ȳpre with R_pre
and ȳpre pooled over all variants) and the indicator h, so units without pre-period data
are kept: they get covariate 0, and the indicator's own slope absorbs their level. θ is the
within-variant regression slope of the outcome on both covariates, pooled over all
variants; each variant's adjusted mean is m − θ·(c̄_variant − c̄_all), and its variance the
variance of the per-unit residual outcome − θ·covariates over n. The adjusted effect equals
the treatment coefficient of the least-squares fit outcome ~ 1 + variant dummies + c + h.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from metricforge.errors import StatsError
from metricforge.stats.effects import Effect, compare
from metricforge.stats.moments import Moments

PER_UNIT = ("x", "c", "h")
RATIO = ("x", "y", "xpre", "ypre", "h")


@dataclass(frozen=True, slots=True)
class UnitVectors:
    """One variant's count, means and covariance matrix (divisor n − 1) of named per-unit
    variables."""

    n: int
    names: tuple[str, ...]
    mean: tuple[float, ...]
    cov: tuple[tuple[float, ...], ...]

    def arrays(self) -> tuple[np.ndarray, np.ndarray]:
        mean = np.asarray(self.mean, dtype=float)
        cov = np.asarray(self.cov, dtype=float)
        k = len(self.names)
        if mean.shape != (k,) or cov.shape != (k, k):
            raise StatsError("CUPED moments must hold one mean and one covariance row per variable")
        if not (np.all(np.isfinite(mean)) and np.all(np.isfinite(cov))):
            raise StatsError("CUPED moments must be finite")
        return mean, cov


@dataclass(frozen=True, slots=True)
class CupedEffect:
    effect: Effect  # adjusted effect; value and control_value are the observed values
    variance_reduction: float  # 1 − Var(adjusted effect) / Var(unadjusted effect)
    theta: tuple[float, ...]  # slopes on (covariate, indicator)


def _index(names: tuple[str, ...], name: str) -> np.ndarray:
    e = np.zeros(len(names))
    e[names.index(name)] = 1.0
    return e


def _outcome(names: tuple[str, ...], mean: np.ndarray, ratio: bool) -> tuple[float, np.ndarray]:
    """A variant's metric value and the weights of its (linearised) per-unit outcome."""
    x = _index(names, "x")
    if not ratio:
        return float(mean[names.index("x")]), x
    mean_x, mean_y = mean[names.index("x")], mean[names.index("y")]
    if mean_y == 0:
        raise StatsError("the denominator's mean is zero for this variant")
    r = mean_x / mean_y
    return float(r), (x - r * _index(names, "y")) / mean_y


def _covariates(
    names: tuple[str, ...], arms: list[tuple[int, np.ndarray, np.ndarray]], ratio: bool
) -> np.ndarray:
    """Weights (variables × 2) of the covariate and the indicator."""
    h = _index(names, "h")
    if not ratio:
        return np.column_stack([_index(names, "c"), h])
    total = sum(n for n, _, _ in arms)
    xpre = sum(n * mean[names.index("xpre")] for n, mean, _ in arms) / total
    ypre = sum(n * mean[names.index("ypre")] for n, mean, _ in arms) / total
    if ypre == 0:  # no pre-period denominator anywhere: the numerator alone
        return np.column_stack([_index(names, "xpre"), h])
    linear = (_index(names, "xpre") - (xpre / ypre) * _index(names, "ypre")) / ypre
    return np.column_stack([linear, h])


def pooled_theta(
    names: tuple[str, ...],
    arms: list[tuple[int, np.ndarray, np.ndarray]],
    weights: np.ndarray,
    ratio: bool,
) -> np.ndarray:
    """The within-variant slope of the outcome on the covariates (``weights``), pooled over
    the variants ``arms`` (n, means, covariance matrix).

    A covariate without within-variant variation (all units alike, or collinear with the
    other) gets the least-squares minimum-norm share, 0 if it never varies.
    """
    s_cc = np.zeros((2, 2))
    s_cy = np.zeros(2)
    for n, mean, cov in arms:
        _, w = _outcome(names, mean, ratio)
        s_cc += (n - 1) * (weights.T @ cov @ weights)
        s_cy += (n - 1) * (weights.T @ cov @ w)
    scale = np.sqrt(np.clip(np.diag(s_cc), 0.0, None))
    keep = scale > 0
    theta = np.zeros(2)
    if keep.any():
        sub = s_cc[np.ix_(keep, keep)] / np.outer(scale[keep], scale[keep])
        solved = np.linalg.lstsq(sub, s_cy[keep] / scale[keep], rcond=1e-12)[0]
        theta[keep] = solved / scale[keep]
    return theta


def cuped_compare(
    arms: Mapping[str, UnitVectors],
    treatment: str,
    control: str,
    *,
    alpha: float = 0.05,
    **test: Any,
) -> CupedEffect:
    """The CUPED-adjusted effect of ``treatment`` against ``control``; θ is pooled over every
    variant in ``arms`` (all analysed variants of the experiment). ``test`` holds further
    options of ``compare`` (the hypothesis of the p-value), passed on unchanged."""
    layouts = {a.names for a in arms.values()}
    if len(layouts) != 1 or next(iter(layouts)) not in (PER_UNIT, RATIO):
        raise StatsError(f"CUPED moments must name the variables {PER_UNIT} or {RATIO}")
    names = layouts.pop()
    ratio = names == RATIO
    for variant in (treatment, control):
        if arms[variant].n < 2:
            raise StatsError(f"needs at least 2 units, has {arms[variant].n}")
        if arms[variant].mean[arms[variant].names.index("h")] == 0:
            raise StatsError(f"no unit of variant '{variant}' has pre-period data")
    arrays = {v: (a.n, *a.arrays()) for v, a in arms.items()}
    every = list(arrays.values())
    weights = _covariates(names, every, ratio)
    theta = pooled_theta(names, every, weights, ratio)
    total = sum(n for n, _, _ in every)
    centre = sum(n * (weights.T @ mean) for n, mean, _ in every) / total
    adjusted: dict[str, Moments] = {}
    observed: dict[str, float] = {}
    plain = 0.0
    for variant in (treatment, control):
        n, mean, cov = arrays[variant]
        value, w = _outcome(names, mean, ratio)
        residual = w - weights @ theta
        shift = float(theta @ (weights.T @ mean - centre))
        variance = max(float(residual @ cov @ residual), 0.0)
        adjusted[variant] = Moments.of_mean(n, value - shift, variance)
        observed[variant] = value
        plain += max(float(w @ cov @ w), 0.0) / n
    effect = compare(adjusted[treatment], adjusted[control], alpha=alpha, **test)
    after = sum(m.var_x / m.n for m in adjusted.values())
    method = ("delta" if ratio else "welch") + "+cuped"
    effect = dataclasses.replace(
        effect,
        value=observed[treatment],
        control_value=observed[control],
        method=method,
    )
    reduction = 1.0 - after / plain if plain > 0 else 0.0
    return CupedEffect(effect, reduction, (float(theta[0]), float(theta[1])))
