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
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from metricforge.errors import StatsError
from metricforge.stats.effects import Effect, compare
from metricforge.stats.moments import FloatArray, Moments, MomentsBatch

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


@dataclass(frozen=True)
class VectorsBatch:
    """``UnitVectors`` of one variant in many replays (or one run) at once: ``n`` (R,),
    ``mean`` (R, k), ``cov`` (R, k, k); the variables are named by the caller."""

    n: FloatArray
    mean: FloatArray
    cov: FloatArray

    @classmethod
    def of(cls, vectors: UnitVectors) -> VectorsBatch:
        mean, cov = vectors.arrays()
        return cls(np.array([float(vectors.n)]), mean[None, :], cov[None, :, :])


@dataclass(frozen=True)
class CupedBatch:
    """Per variant (in the order given to ``cuped_batch``), arrays over replays."""

    adjusted: list[MomentsBatch]  # n, the adjusted value, the variance of the residual
    observed: list[FloatArray]  # the unadjusted value (mean, or ratio)
    plain: list[FloatArray]  # the variance of the unadjusted estimate (already over n)
    has_pre: list[npt.NDArray[np.bool_]]  # some unit of the variant has pre-period data
    theta: FloatArray  # (R, 2): slopes on the covariate and the indicator


@dataclass(frozen=True, slots=True)
class CupedEffect:
    effect: Effect  # adjusted effect; value and control_value are the observed values
    variance_reduction: float  # 1 − Var(adjusted effect) / Var(unadjusted effect)
    theta: tuple[float, ...]  # slopes on (covariate, indicator)
    variance: float = math.nan  # Var(adjusted effect): the sum of the arms' estimator variances


def _index(names: tuple[str, ...], name: str) -> FloatArray:
    e = np.zeros(len(names))
    e[names.index(name)] = 1.0
    return e


def _outcome(
    names: tuple[str, ...], mean: FloatArray, ratio: bool
) -> tuple[FloatArray, FloatArray]:
    """Per replay: a variant's metric value (R,) and the weights (R, k) of its
    (linearised) per-unit outcome."""
    x = _index(names, "x")
    if not ratio:
        return mean[:, names.index("x")], np.broadcast_to(x, mean.shape)
    mean_x, mean_y = mean[:, names.index("x")], mean[:, names.index("y")]
    with np.errstate(all="ignore"):
        r = mean_x / mean_y
        w = (x[None, :] - r[:, None] * _index(names, "y")[None, :]) / mean_y[:, None]
    return r, w


def _pooled(arms: Sequence[VectorsBatch], values: FloatArray) -> FloatArray:
    """The mean over all units of every variant: ``values`` (variants, R, ...) weighted
    by the variants' unit counts."""
    n = np.stack([a.n for a in arms]).reshape(len(arms), -1, *([1] * (values.ndim - 2)))
    with np.errstate(all="ignore"):
        return np.asarray(np.sum(n * values, axis=0) / np.sum(n, axis=0), np.float64)


def _covariates(names: tuple[str, ...], arms: Sequence[VectorsBatch], ratio: bool) -> FloatArray:
    """Weights (R, variables, 2) of the covariate and the indicator."""
    h = _index(names, "h")
    shape = (*arms[0].mean.shape, 2)
    if not ratio:
        return np.broadcast_to(np.column_stack([_index(names, "c"), h]), shape)
    xpre = _pooled(arms, np.stack([a.mean[:, names.index("xpre")] for a in arms]))
    ypre = _pooled(arms, np.stack([a.mean[:, names.index("ypre")] for a in arms]))
    e_xpre, e_ypre = _index(names, "xpre"), _index(names, "ypre")
    with np.errstate(all="ignore"):
        linear = (e_xpre[None, :] - (xpre / ypre)[:, None] * e_ypre[None, :]) / ypre[:, None]
    # no pre-period denominator anywhere: the numerator alone
    first = np.where((ypre == 0)[:, None], e_xpre[None, :], linear)
    return np.stack([first, np.broadcast_to(h, first.shape)], axis=-1)


def pooled_theta(
    names: tuple[str, ...], arms: Sequence[VectorsBatch], weights: FloatArray, ratio: bool
) -> FloatArray:
    """Per replay, the within-variant slope of the outcome on the covariates (``weights``),
    pooled over the variants ``arms``.

    A covariate without within-variant variation (all units alike, or collinear with the
    other) gets the least-squares minimum-norm share, 0 if it never varies.
    """
    w_t = np.swapaxes(weights, 1, 2)
    s_cc = np.zeros((weights.shape[0], 2, 2))
    s_cy = np.zeros((weights.shape[0], 2))
    for arm in arms:
        _, w = _outcome(names, arm.mean, ratio)
        dof = arm.n - 1
        s_cc += dof[:, None, None] * (w_t @ arm.cov @ weights)
        s_cy += dof[:, None] * (w_t @ arm.cov @ w[:, :, None])[:, :, 0]
    scale = np.sqrt(np.clip(np.diagonal(s_cc, axis1=1, axis2=2), 0.0, None))
    keep = scale > 0
    safe = np.where(keep, scale, 1.0)
    both = keep[:, :, None] & keep[:, None, :]
    with np.errstate(all="ignore"):
        sub = np.where(both, s_cc / (safe[:, :, None] * safe[:, None, :]), 0.0)
        rhs = np.where(keep, s_cy / safe, 0.0)
    # the minimum-norm least-squares solution; a covariate left out has a zero row
    solved = (np.linalg.pinv(sub, rcond=1e-12) @ rhs[:, :, None])[:, :, 0]
    return np.where(keep, solved / safe, 0.0)


def cuped_batch(names: tuple[str, ...], arms: Sequence[VectorsBatch]) -> CupedBatch:
    """Every variant's CUPED-adjusted moments, for many replays at once; θ is pooled over
    all of ``arms``. The arithmetic of the scorecard (``cuped_compare``) and of the A/A
    replay. Unusable moments give non-finite values, not errors."""
    if names not in (PER_UNIT, RATIO):
        raise StatsError(f"CUPED moments must name the variables {PER_UNIT} or {RATIO}")
    ratio = names == RATIO
    weights = _covariates(names, arms, ratio)
    theta = pooled_theta(names, arms, weights, ratio)
    w_t = np.swapaxes(weights, 1, 2)
    centre = _pooled(arms, np.stack([(w_t @ a.mean[:, :, None])[:, :, 0] for a in arms]))
    out = CupedBatch([], [], [], [], theta)
    for arm in arms:
        value, w = _outcome(names, arm.mean, ratio)
        with np.errstate(all="ignore"):
            residual = w - (weights @ theta[:, :, None])[:, :, 0]
            shift = np.sum(theta * ((w_t @ arm.mean[:, :, None])[:, :, 0] - centre), axis=1)
            variance = np.einsum("rk,rkl,rl->r", residual, arm.cov, residual)
            plain = np.einsum("rk,rkl,rl->r", w, arm.cov, w)
            out.adjusted.append(
                MomentsBatch.of_means(arm.n, value - shift, np.maximum(variance, 0.0))
            )
            out.plain.append(np.maximum(plain, 0.0) / arm.n)
        out.observed.append(value)
        out.has_pre.append(arm.mean[:, names.index("h")] != 0)
    return out


@dataclass(frozen=True)
class CupedArms:
    """Every variant's CUPED-adjusted moments from ``cuped_arms``, by variant name."""

    ratio: bool
    adjusted: dict[str, Moments]  # n, the adjusted value, the variance of the residual
    observed: dict[str, float]  # the unadjusted value (mean, or ratio)
    plain: dict[str, float]  # the variance of the unadjusted estimate (already over n)
    theta: tuple[float, float]  # slopes on (covariate, indicator)

    @property
    def method(self) -> str:
        return ("delta" if self.ratio else "welch") + "+cuped"


def cuped_arms(arms: Mapping[str, UnitVectors], compared: Sequence[str]) -> CupedArms:
    """The CUPED-adjusted moments of every variant in ``arms`` (all analysed variants of
    the experiment; θ is pooled over them). A StatsError unless each ``compared`` variant
    has at least 2 units and some unit with pre-period data."""
    layouts = {a.names for a in arms.values()}
    if len(layouts) != 1 or next(iter(layouts)) not in (PER_UNIT, RATIO):
        raise StatsError(f"CUPED moments must name the variables {PER_UNIT} or {RATIO}")
    names = layouts.pop()
    for variant in compared:
        if arms[variant].n < 2:
            raise StatsError(f"needs at least 2 units, has {arms[variant].n}")
        if arms[variant].mean[arms[variant].names.index("h")] == 0:
            raise StatsError(f"no unit of variant '{variant}' has pre-period data")
    order = list(arms)
    batches = [VectorsBatch.of(arms[v]) for v in order]
    if names == RATIO and any(b.mean[0, names.index("y")] == 0 for b in batches):
        raise StatsError("the denominator's mean is zero for this variant")
    result = cuped_batch(names, batches)
    adjusted = {
        v: Moments.of_mean(
            arms[v].n, float(result.adjusted[k].mean_x[0]), float(result.adjusted[k].var_x[0])
        )
        for k, v in enumerate(order)
    }
    theta = result.theta[0]
    return CupedArms(
        ratio=names == RATIO,
        adjusted=adjusted,
        observed={v: float(result.observed[k][0]) for k, v in enumerate(order)},
        plain={v: float(result.plain[k][0]) for k, v in enumerate(order)},
        theta=(float(theta[0]), float(theta[1])),
    )


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
    cuped = cuped_arms(arms, (treatment, control))
    t, c = cuped.adjusted[treatment], cuped.adjusted[control]
    effect = compare(t, c, alpha=alpha, **test)
    after = t.var_x / t.n + c.var_x / c.n
    plain = cuped.plain[treatment] + cuped.plain[control]
    effect = dataclasses.replace(
        effect,
        value=cuped.observed[treatment],
        control_value=cuped.observed[control],
        method=cuped.method,
    )
    reduction = 1.0 - after / plain if plain > 0 else 0.0
    return CupedEffect(effect, reduction, cuped.theta, after)
