"""Always-valid inference for an experiment looked at repeatedly: the normal-mixture
sequential probability ratio test on an estimate ``d`` of a difference and its variance ``v``.

Johari, Koomen, Pekelis, Walsh, "Always Valid Inference", Operations Research 2022: with
the difference estimated by ``d`` (approximately normal, variance ``v``) and a normal
mixing distribution N(θ₀, τ²) over the alternative, the mixture likelihood ratio against
H0: θ = θ₀ is

    Λ = √(v / (v + τ²)) · exp(τ² (d − θ₀)² / (2 v (v + τ²)))

(the paper's Λₙ with v = V/n). Under H0, Λ over the looks is a nonnegative martingale
with mean 1, so the chance that it ever reaches 1/α is at most α (Ville's inequality):

- the always-valid p-value of one look is min(1, 1/Λ); over the looks it is the running
  minimum pₙ = min(pₙ₋₁, 1/Λₙ), and rejecting when it falls below α keeps the false
  positive rate at most α however often one looks;
- the confidence sequence is the set of θ₀ with Λ(θ₀) < 1/α: the interval d ± h with
  h² = 2 v (v + τ²)/τ² · (log(1/α) + ½ log((v + τ²)/v)); over the looks its running
  intersection covers the true difference at every look with probability at least 1 − α.

The mixing variance τ² must be fixed before the data it tests is seen (``mixing_variance``
turns a relative effect and a scale into it). Every function is vectorised: arrays of
looks or of simulated experiments at once. Invalid inputs (v ≤ 0, τ² ≤ 0, non-finite)
give NaN.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from metricforge.stats.moments import FloatArray

ArrayLike = float | npt.NDArray[np.float64]


def _valid(d: FloatArray, v: FloatArray, tau2: FloatArray) -> npt.NDArray[np.bool_]:
    return np.isfinite(d) & np.isfinite(v) & np.isfinite(tau2) & (v > 0) & (tau2 > 0)


def _arrays(*values: ArrayLike) -> tuple[FloatArray, ...]:
    return tuple(np.broadcast_arrays(*(np.asarray(x, np.float64) for x in values)))


def log_mixture_ratio(
    d: ArrayLike, v: ArrayLike, tau2: ArrayLike, theta0: ArrayLike = 0.0
) -> FloatArray:
    """log Λ of H0: θ = θ₀ (see the module doc); NaN where an input is invalid."""
    d_a, v_a, t_a, th_a = _arrays(d, v, tau2, theta0)
    ok = _valid(d_a, v_a, t_a) & np.isfinite(th_a)
    with np.errstate(all="ignore"):
        shift = d_a - th_a
        out = -0.5 * np.log1p(t_a / v_a) + t_a * shift * shift / (2.0 * v_a * (v_a + t_a))
    return np.asarray(np.where(ok, out, np.nan), np.float64)


def mixture_ratio(
    d: ArrayLike, v: ArrayLike, tau2: ArrayLike, theta0: ArrayLike = 0.0
) -> FloatArray:
    """Λ of H0: θ = θ₀ (may overflow to inf for an overwhelming difference)."""
    with np.errstate(over="ignore"):
        return np.asarray(np.exp(log_mixture_ratio(d, v, tau2, theta0)), np.float64)


def look_p_value(
    d: ArrayLike, v: ArrayLike, tau2: ArrayLike, theta0: ArrayLike = 0.0
) -> FloatArray:
    """min(1, 1/Λ) at one look: the always-valid p-value of a single look."""
    log_ratio = log_mixture_ratio(d, v, tau2, theta0)
    with np.errstate(under="ignore"):
        p = np.exp(-np.maximum(log_ratio, 0.0))
    return np.asarray(np.where(np.isnan(log_ratio), np.nan, p), np.float64)


def half_width(v: ArrayLike, tau2: ArrayLike, alpha: float) -> FloatArray:
    """Half the width of the confidence sequence at one look: the distance from d at which
    Λ = 1/α."""
    if not 0.0 < alpha < 1.0:
        raise ValueError(f"alpha must lie strictly between 0 and 1, is {alpha}")
    v_a, t_a = _arrays(v, tau2)
    ok = _valid(np.zeros_like(v_a), v_a, t_a)
    with np.errstate(all="ignore"):
        level = np.log(1.0 / alpha) + 0.5 * np.log1p(t_a / v_a)
        h = np.sqrt(2.0 * v_a * (v_a + t_a) / t_a * level)
    return np.asarray(np.where(ok, h, np.nan), np.float64)


def look_interval(
    d: ArrayLike, v: ArrayLike, tau2: ArrayLike, alpha: float
) -> tuple[FloatArray, FloatArray]:
    """(low, high) of the confidence sequence at one look: every θ₀ with Λ(θ₀) < 1/α."""
    d_a = np.asarray(d, np.float64)
    h = half_width(v, tau2, alpha)
    return d_a - h, d_a + h


def running_p_value(looks: ArrayLike, axis: int = -1) -> FloatArray:
    """pₙ = min(pₙ₋₁, 1/Λₙ): the running minimum of the looks' p-values along ``axis``
    (a look without a p-value, NaN, keeps the previous one)."""
    p = np.asarray(looks, np.float64)
    return np.asarray(np.fmin.accumulate(np.where(np.isnan(p), np.inf, p), axis=axis), np.float64)


def running_interval(
    low: ArrayLike, high: ArrayLike, axis: int = -1
) -> tuple[FloatArray, FloatArray]:
    """The running intersection of the looks' intervals along ``axis`` (NaN looks skipped)."""
    lo = np.asarray(low, np.float64)
    hi = np.asarray(high, np.float64)
    return (
        np.asarray(np.fmax.accumulate(np.where(np.isnan(lo), -np.inf, lo), axis=axis), np.float64),
        np.asarray(np.fmin.accumulate(np.where(np.isnan(hi), np.inf, hi), axis=axis), np.float64),
    )


def mixing_variance(effect: ArrayLike, scale: ArrayLike) -> FloatArray:
    """τ² = (effect · |scale|)²: a relative effect the test is most sensitive to, made
    absolute by a scale of the metric fixed without looking at the tested difference."""
    e, s = _arrays(effect, scale)
    return np.asarray((e * np.abs(s)) ** 2, np.float64)
