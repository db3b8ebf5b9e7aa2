"""Is a p-value calibrated? The share of A/A replays below alpha, and uniformity.

Built on scipy.special only: importing scipy.stats would cost the ``aa`` command about
0.4 s of CPU, a third of a scorecard run. The exact binomial interval is the inverse
regularised incomplete beta function (what scipy.stats.beta.ppf computes); the two-sided
one-sample Kolmogorov–Smirnov p-value is exact (Marsaglia, Tsang and Wang's matrix method)
where scipy.stats.kstwo computes it exactly or by an asymptotic series, and the Smirnov
doubling ``2 · smirnov(n, d)`` in its far tail, as scipy.stats.kstwo does
(tests/test_calibration_reference.py compares both with scipy.stats).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from enum import StrEnum

import numpy as np
import numpy.typing as npt
from scipy import special

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
    low = float(special.betaincinv(hits, trials - hits + 1, tail)) if hits > 0 else 0.0
    high = float(special.betaincinv(hits + 1, trials - hits, 1.0 - tail)) if hits < trials else 1.0
    return low, high


EXACT_UP_TO = 20_000  # p-values: beyond, the matrix method's size (~2·n·d) costs too much


def _kolmogorov_cdf(n: int, d: float) -> float:
    """P(D_n < d), exactly: Marsaglia, Tsang and Wang's (2003) matrix method. The n-th power
    of the (2k − 1)-square matrix H is taken by squaring, rescaled as it grows."""
    k = int(n * d) + 1
    m = 2 * k - 1
    h = k - n * d
    lag = np.arange(m)[:, None] - np.arange(m)[None, :] + 1  # i − j + 1
    matrix = (lag >= 0).astype(np.float64)
    powers = h ** np.arange(1, m + 1, dtype=np.float64)
    matrix[:, 0] -= powers
    matrix[m - 1, :] -= powers[::-1]
    if 2 * h - 1 > 0:
        matrix[m - 1, 0] += (2 * h - 1) ** m
    matrix = np.where(lag > 0, matrix / special.factorial(np.maximum(lag, 0)), matrix)
    result, log_result = np.eye(m), 0.0
    base, log_base = matrix, 0.0
    exponent = n
    while exponent:
        if exponent & 1:
            result = result @ base
            scale = float(np.abs(result).max())
            result, log_result = result / scale, log_result + log_base + math.log(scale)
        exponent >>= 1
        if exponent:
            base = base @ base
            scale = float(np.abs(base).max())
            base, log_base = base / scale, 2 * log_base + math.log(scale)
    corner = float(result[k - 1, k - 1])
    if corner <= 0.0:
        return 0.0
    return math.exp(math.log(corner) + log_result + math.lgamma(n + 1) - n * math.log(n))


def ks_sf(n: int, d: float) -> float:
    """P(D_n ≥ d): the two-sided one-sample Kolmogorov–Smirnov p-value of the distance d.

    The far tail (n·d² above 2.2, above 4 when n ≤ 140, or d ≥ 0.5) is 2 · smirnov(n, d),
    the one-sided exact tail doubled, as scipy.stats.kstwo computes it; elsewhere one minus
    the exact distribution function. Beyond EXACT_UP_TO values, Stephens' modified
    asymptotic form K((√n + 0.12 + 0.11/√n)·d), within 0.2% there (p above 0.02).
    """
    if d >= 1.0:
        return 0.0
    if d <= 0.5 / n:
        return 1.0
    if d >= 0.5 or n * d * d > (4.0 if n <= 140 else 2.2):
        return min(1.0, 2.0 * float(special.smirnov(n, d)))
    if n > EXACT_UP_TO:
        root = math.sqrt(n)
        return float(special.kolmogorov((root + 0.12 + 0.11 / root) * d))
    return min(1.0, max(0.0, 1.0 - _kolmogorov_cdf(n, d)))


def ks_uniform(p: npt.NDArray[np.float64]) -> tuple[float, float]:
    """The Kolmogorov–Smirnov distance of the values from the uniform on [0, 1] and its
    two-sided p-value (scipy.stats.kstest(p, "uniform"))."""
    x = np.sort(np.clip(p, 0.0, 1.0))
    n = len(x)
    steps = np.arange(1, n + 1) / n
    distance = float(max(np.max(steps - x), np.max(x - (steps - 1.0 / n))))
    return distance, ks_sf(n, distance)


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
    ks_statistic, ks_p_value = ks_uniform(p)
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
        ks_statistic=ks_statistic,
        ks_p_value=ks_p_value,
        uniform=bool(ks_p_value >= KS_ALPHA),
        verdict=verdict,
    )
