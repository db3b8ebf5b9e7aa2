"""Treatment versus control: absolute and relative effects with CIs and p-values.

``compare_batch`` works on arrays of moments (many variants, or many simulated
experiments at once); ``compare`` validates one pair of ``Moments`` and calls it.

Methods, written to ``Effect.method`` as ``<difference>[+<test>][+fieller]``:

- ``welch``: per-unit means (count, sum, mean, composite): Welch's t-test and CI with the
  Welch–Satterthwaite degrees of freedom.
- ``delta``: ratio metrics: the delta-method variance of each arm's ratio, z-test and CI.
- ``newcombe+z`` / ``newcombe+fisher``: proportions: Newcombe's hybrid score interval for
  the difference; the pooled two-sample z-test, or Fisher's exact test when an expected
  cell count is below 5. ``newcombe+wald`` when a non-inferiority margin is tested (the
  Wald z with each arm's own variance).
- the relative effect t/c − 1 uses the delta method; ``+fieller`` marks Fieller's
  interval instead, used when the control mean is too close to zero for the delta method
  (see ``stats/relative.py``).

``side`` and ``margin`` choose the hypothesis of the p-value: side 0 is two-sided
(H0: no difference). side +1 (higher is worse) or −1 (lower is worse) makes it one-sided
against that bad direction: without a margin H1 is "the treatment is worse" (a harm
test); with a relative margin m, H0 is "worse by m·|control| or more" and H1 "worse by
less" (non-inferiority). The CIs stay two-sided at 1 − alpha.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields

import numpy as np
import numpy.typing as npt

from metricforge.errors import StatsError
from metricforge.stats.dist import norm_ppf, t_ppf, t_sf
from metricforge.stats.moments import (
    FloatArray,
    Moments,
    MomentsBatch,
    delta_ratio,
    ratio_point_and_variance,
)
from metricforge.stats.proportions import newcombe, proportion_test
from metricforge.stats.relative import relative_interval


@dataclass(frozen=True, slots=True)
class Effect:
    value: float
    control_value: float
    abs_effect: float
    abs_ci_low: float
    abs_ci_high: float
    rel_effect: float
    rel_ci_low: float
    rel_ci_high: float
    p_value: float
    method: str


@dataclass(frozen=True)
class EffectBatch:
    """``Effect`` fields as arrays, one element per compared pair."""

    value: FloatArray
    control_value: FloatArray
    abs_effect: FloatArray
    abs_ci_low: FloatArray
    abs_ci_high: FloatArray
    rel_effect: FloatArray
    rel_ci_low: FloatArray
    rel_ci_high: FloatArray
    p_value: FloatArray
    method: npt.NDArray[np.str_]

    def item(self, i: int = 0) -> Effect:
        values = {f.name: getattr(self, f.name)[i] for f in fields(self)}
        return Effect(
            **{k: float(v) for k, v in values.items() if k != "method"},
            method=str(values["method"]),
        )


def welch_df_batch(
    v_t: FloatArray, n_t: FloatArray, v_c: FloatArray, n_c: FloatArray
) -> FloatArray:
    """Welch–Satterthwaite degrees of freedom from the per-arm estimator variances."""
    with np.errstate(all="ignore"):
        total = v_t + v_c
        w_t, w_c = v_t / total, v_c / total  # scale-free: no under/overflow of the squares
        df = 1.0 / (w_t * w_t / (n_t - 1) + w_c * w_c / (n_c - 1))
    return np.where(total == 0, np.inf, df)


def welch_df(v_t: float, n_t: int, v_c: float, n_c: int) -> float:
    """Welch–Satterthwaite degrees of freedom from the per-arm estimator variances."""
    arrays = (np.array([v], np.float64) for v in (v_t, n_t, v_c, n_c))
    return float(welch_df_batch(*arrays)[0])


def _tail(stat: FloatArray, df: FloatArray) -> FloatArray:
    """P(T ≥ stat) for Student's t with df degrees of freedom (df = inf: the normal)."""
    with np.errstate(all="ignore"):
        return t_sf(stat, df)


def check_hypothesis(side: int, margin: float | None) -> None:
    """A StatsError unless ``side`` is 0 or ±1 and a margin is positive and one-sided."""
    if side not in (-1, 0, 1) or (margin is not None and (side == 0 or not margin > 0)):
        raise StatsError("a margin needs a one-sided test (side ±1) and must be positive")


def margin_factor(c_val: FloatArray, side: int, margin: float | None) -> FloatArray | float:
    """k of the tested contrast t − k·c: 1, or 1 ± margin for non-inferiority (the margin
    taken on the bad side of the control's absolute value)."""
    if margin is None:
        return 1.0
    return 1.0 + side * margin * np.where(c_val < 0, -1.0, 1.0)


def evidence_sign(side: int, margin: float | None) -> float:
    """The sign that makes a large contrast evidence against H0 in a one-sided test: harm,
    large side·(t − c); non-inferiority, large −side·(t − k·c)."""
    return float(side) if margin is None else -float(side)


def with_relative(
    t_val: FloatArray,
    v_t: FloatArray,
    c_val: FloatArray,
    v_c: FloatArray,
    z: float,
    *,
    diff: FloatArray,
    low: FloatArray,
    high: FloatArray,
    p: FloatArray,
    method: npt.NDArray[np.str_],
) -> EffectBatch:
    """The effects with the relative effect t/c − 1 added (delta method, or Fieller's
    interval where ``relative_interval`` chooses it; ``method`` then gains "+fieller")."""
    rel, rel_low, rel_high, fieller = relative_interval(t_val, v_t, c_val, v_c, z)
    return EffectBatch(
        value=t_val,
        control_value=c_val,
        abs_effect=diff,
        abs_ci_low=low,
        abs_ci_high=high,
        rel_effect=rel,
        rel_ci_low=rel_low,
        rel_ci_high=rel_high,
        p_value=np.clip(p, 0.0, 1.0),
        method=np.char.add(method, np.where(fieller, "+fieller", "")),
    )


def compare_batch(
    t: MomentsBatch,
    c: MomentsBatch,
    *,
    alpha: float = 0.05,
    side: int = 0,
    margin: float | None = None,
) -> EffectBatch:
    """Treatment ``t`` against control ``c``, element by element (see the module doc)."""
    if not 0.0 < alpha < 1.0:
        raise StatsError(f"alpha must lie strictly between 0 and 1, is {alpha}")
    check_hypothesis(side, margin)
    t_val, v_t = delta_ratio(t)
    c_val, v_c = delta_ratio(c)
    ratio = t.is_ratio | c.is_ratio
    proportion = t.successes is not None and c.successes is not None
    normal = ratio | proportion  # z rather than Student's t
    z = float(norm_ppf(1.0 - alpha / 2.0))
    with np.errstate(all="ignore"):
        diff = t_val - c_val
        var = v_t + v_c
        df = np.where(normal, np.inf, welch_df_batch(v_t, t.n, v_c, c.n))
        half = t_ppf(1.0 - alpha / 2.0, df) * np.sqrt(var)
        half = np.where(var > 0, half, 0.0)  # no variance: the difference is known exactly
        low, high = diff - half, diff + half
        # The tested contrast is t − k·c: k = 1, or 1 ± margin for non-inferiority.
        k = margin_factor(c_val, side, margin)
        if margin is not None:
            var = v_t + k * k * v_c
            df = np.where(normal, np.inf, welch_df_batch(v_t, t.n, k * k * v_c, c.n))
        contrast = t_val - k * c_val
        if side == 0:
            stat, tails = np.abs(contrast) / np.sqrt(var), 2.0
            known = np.where(contrast == 0, 1.0, 0.0)  # no variance at all
        else:
            sign = evidence_sign(side, margin)
            stat, tails = sign * contrast / np.sqrt(var), 1.0
            known = np.where(sign * contrast > 0, 0.0, 1.0)
    p = np.where(var > 0, tails * _tail(stat, df), known)
    if proportion:
        assert t.successes is not None and c.successes is not None
        low, high = newcombe(t.successes, t.n, c.successes, c.n, z)
        if margin is None:
            exact_p, exact = proportion_test(t.successes, t.n, c.successes, c.n, side)
            p = exact_p
            method = np.where(exact, "newcombe+fisher", "newcombe+z")
        else:
            method = np.full(p.shape, "newcombe+wald")
    else:
        method = np.where(ratio, "delta", "welch")
    return with_relative(
        t_val, v_t, c_val, v_c, z, diff=diff, low=low, high=high, p=p, method=method
    )


def compare(
    treatment: Moments,
    control: Moments,
    *,
    alpha: float = 0.05,
    side: int = 0,
    margin: float | None = None,
) -> Effect:
    """One treatment against its control, with every input checked (see the module doc)."""
    for arm in (treatment, control):
        ratio_point_and_variance(arm)  # raises a StatsError on unusable moments
    batch = compare_batch(
        MomentsBatch.of([treatment]),
        MomentsBatch.of([control]),
        alpha=alpha,
        side=side,
        margin=margin,
    )
    effect = batch.item()
    if not math.isfinite(effect.abs_effect):
        raise StatsError("the difference overflows: the values are too large")
    return effect
