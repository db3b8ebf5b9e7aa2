"""Is a p-value calibrated? The share of A/A replays below alpha, and uniformity."""

from __future__ import annotations

from dataclasses import dataclass
from enum import StrEnum

import numpy as np
import numpy.typing as npt
from scipy import stats as st

from metricforge.errors import StatsError

CONFIDENCE = 0.99  # of the binomial interval around the false-positive share
KS_ALPHA = 0.001  # uniformity is rejected below this (many metrics are judged at once)


class Verdict(StrEnum):
    CALIBRATED = "calibrated"
    TOO_MANY = "too many false positives"
    TOO_FEW = "too few false positives"


@dataclass(frozen=True)
class Calibration:
    replays: int  # replays with a p-value
    alpha: float
    false_positives: int  # replays with p < alpha
    share: float
    ci_low: float  # exact (Clopper–Pearson) binomial interval of the share
    ci_high: float
    ks_statistic: float  # Kolmogorov–Smirnov distance of the p-values from uniform
    ks_p_value: float
    uniform: bool  # KS does not reject uniformity at KS_ALPHA
    verdict: Verdict


def exact_interval(hits: int, trials: int, confidence: float) -> tuple[float, float]:
    """The exact (Clopper–Pearson) binomial interval: quantiles of beta distributions."""
    tail = (1.0 - confidence) / 2.0
    low = float(st.beta.ppf(tail, hits, trials - hits + 1)) if hits > 0 else 0.0
    high = float(st.beta.ppf(1.0 - tail, hits + 1, trials - hits)) if hits < trials else 1.0
    return low, high


def calibration(p_values: npt.NDArray[np.float64], alpha: float) -> Calibration:
    """The verdict on the false-positive share at alpha: too many (few) when its 99%
    interval lies above (below) alpha, else calibrated.

    The KS test judges the whole p-value distribution and is reported beside the verdict
    (``uniform``): a metric can hold its rate at alpha while its p-values are not uniform,
    typically when a few units dominate its variance.
    """
    p = p_values[np.isfinite(p_values)]
    if len(p) < 2:
        raise StatsError("needs at least two replays with a p-value")
    if not 0 < alpha < 1:
        raise StatsError(f"alpha must lie strictly between 0 and 1, is {alpha}")
    hits = int((p < alpha).sum())
    low, high = exact_interval(hits, len(p), CONFIDENCE)
    ks = st.kstest(p, "uniform")
    if low > alpha:
        verdict = Verdict.TOO_MANY
    elif high < alpha:
        verdict = Verdict.TOO_FEW
    else:
        verdict = Verdict.CALIBRATED
    return Calibration(
        replays=len(p),
        alpha=alpha,
        false_positives=hits,
        share=hits / len(p),
        ci_low=low,
        ci_high=high,
        ks_statistic=float(ks.statistic),
        ks_p_value=float(ks.pvalue),
        uniform=bool(ks.pvalue >= KS_ALPHA),
        verdict=verdict,
    )
