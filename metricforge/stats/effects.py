"""Treatment versus control: absolute and relative effects with CIs and p-values."""

from __future__ import annotations

import math
from dataclasses import dataclass

from scipy import stats as st

from metricforge.errors import StatsError
from metricforge.stats.moments import Moments, ratio_point_and_variance


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


def welch_df(v_t: float, n_t: int, v_c: float, n_c: int) -> float:
    """Welch–Satterthwaite degrees of freedom from the per-arm estimator variances."""
    total = v_t + v_c
    if total == 0:
        return math.inf
    w_t, w_c = v_t / total, v_c / total  # scale-free: no under/overflow of the squares
    return 1.0 / (w_t * w_t / (n_t - 1) + w_c * w_c / (n_c - 1))


def _relative(
    t_val: float, v_t: float, c_val: float, v_c: float, z: float
) -> tuple[float, float, float]:
    """t/c − 1 with Var ≈ V_t/c² + t²V_c/c⁴ (independent arms).

    NaN when c is 0, or so close to 0 that t/c overflows.
    """
    ratio = t_val / c_val if c_val != 0 else math.inf
    if not math.isfinite(ratio):
        return math.nan, math.nan, math.nan
    se = math.hypot(math.sqrt(v_t), ratio * math.sqrt(v_c)) / abs(c_val)
    half = z * se if se > 0 else 0.0
    rel = ratio - 1.0
    return rel, rel - half, rel + half


def compare(treatment: Moments, control: Moments, *, alpha: float = 0.05) -> Effect:
    """Welch t for per-unit means, the delta method (z) for ratios; relative effect by delta."""
    if not 0.0 < alpha < 1.0:
        raise StatsError(f"alpha must lie strictly between 0 and 1, is {alpha}")
    t_val, v_t = ratio_point_and_variance(treatment)
    c_val, v_c = ratio_point_and_variance(control)
    diff = t_val - c_val
    se = math.sqrt(v_t + v_c)
    ratio = treatment.is_ratio or control.is_ratio
    z = float(st.norm.ppf(1.0 - alpha / 2.0))
    if se == 0:  # both arms without variance: the difference is known exactly
        p, half = (1.0 if diff == 0 else 0.0), 0.0
    elif ratio:
        p, half = 2.0 * float(st.norm.sf(abs(diff) / se)), z * se
    else:
        df = welch_df(v_t, treatment.n, v_c, control.n)
        p = 2.0 * float(st.t.sf(abs(diff) / se, df))
        half = float(st.t.ppf(1.0 - alpha / 2.0, df)) * se
    rel, rel_low, rel_high = _relative(t_val, v_t, c_val, v_c, z)
    return Effect(
        value=t_val,
        control_value=c_val,
        abs_effect=diff,
        abs_ci_low=diff - half,
        abs_ci_high=diff + half,
        rel_effect=rel,
        rel_ci_low=rel_low,
        rel_ci_high=rel_high,
        p_value=p,
        method="delta" if ratio else "welch",
    )
