"""Treatment versus control: absolute and relative effects with CIs and p-values."""

from __future__ import annotations

import math
from dataclasses import dataclass

from scipy import stats as st

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


def _degenerate(diff: float) -> tuple[float, float, float]:
    """Both arms without variance: the difference is known exactly."""
    return (1.0 if diff == 0 else 0.0), diff, diff


def welch_df(v_t: float, n_t: int, v_c: float, n_c: int) -> float:
    """Welch–Satterthwaite degrees of freedom from the per-arm estimator variances."""
    num = (v_t + v_c) ** 2
    den = v_t**2 / (n_t - 1) + v_c**2 / (n_c - 1)
    return num / den if den > 0 else math.inf


def compare(treatment: Moments, control: Moments, *, alpha: float = 0.05) -> Effect:
    """Welch t for per-unit means, the delta method (z) for ratios; relative effect by delta."""
    t_val, v_t = ratio_point_and_variance(treatment)
    c_val, v_c = ratio_point_and_variance(control)
    diff = t_val - c_val
    se = math.sqrt(v_t + v_c)
    ratio = treatment.is_ratio or control.is_ratio
    method = "delta" if ratio else "welch"
    if se == 0:
        p, low, high = _degenerate(diff)
    elif ratio:
        z = st.norm.ppf(1 - alpha / 2)
        p = float(2 * st.norm.sf(abs(diff) / se))
        low, high = diff - z * se, diff + z * se
    else:
        df = welch_df(v_t, treatment.n, v_c, control.n)
        q = st.t.ppf(1 - alpha / 2, df)
        p = float(2 * st.t.sf(abs(diff) / se, df))
        low, high = diff - q * se, diff + q * se
    rel = rel_low = rel_high = math.nan
    if abs(c_val) > 1e-150:
        ratio_tc = t_val / c_val
        rel_var = (v_t + ratio_tc**2 * v_c) / c_val**2 if abs(ratio_tc) < 1e150 else math.inf
        if math.isfinite(rel_var):
            rel_se = math.sqrt(rel_var)
            z = st.norm.ppf(1 - alpha / 2)
            rel = ratio_tc - 1.0
            rel_low, rel_high = rel - z * rel_se, rel + z * rel_se
    return Effect(
        value=t_val,
        control_value=c_val,
        abs_effect=diff,
        abs_ci_low=float(low),
        abs_ci_high=float(high),
        rel_effect=rel,
        rel_ci_low=float(rel_low),
        rel_ci_high=float(rel_high),
        p_value=float(p),
        method=method,
    )
