"""Coverage of CUPED-adjusted and quantile effects by simulation, through the package's
own statistics on moments.

Per-unit data are drawn directly with numpy (vectorised, fixed seeds) with a known
injected effect (property tests on invented data). Each run is one simulated experiment;
its moments are computed with numpy as the engine would report them and passed to
``stats.cuped.cuped_compare`` / ``stats.quantiles``. A correct 95% interval covers the
truth in 95% of runs; with R runs the share's standard error is sqrt(0.95·0.05/R), so the
band 94–96% is about ±2.9 SE at R = 4,000 and ±3.6 SE at R = 6,000. A too-wide interval
fails as surely as a too-narrow one. For A/A runs, the share with p < 0.05 must lie inside
the binomial 99% band around 5% (common practice: about 5% of A/A tests are significant).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats as sst

from metricforge.stats.cuped import PER_UNIT, RATIO, UnitVectors, cuped_compare
from metricforge.stats.moments import Moments
from metricforge.stats.quantiles import QuantileSummary, quantile_compare, rank_band

ALPHA = 0.05


def arm_vectors(data: np.ndarray, names: tuple[str, ...]) -> list[UnitVectors]:
    """data: (runs, units, variables) -> one UnitVectors per run (divisor n - 1)."""
    runs, n, _ = data.shape
    mean = data.mean(axis=1)
    centred = data - mean[:, None, :]
    cov = np.einsum("rui,ruj->rij", centred, centred) / (n - 1)
    return [UnitVectors(n, names, tuple(mean[r]), tuple(map(tuple, cov[r]))) for r in range(runs)]


def per_unit_arm(rng: np.random.Generator, runs: int, n: int, effect: float) -> np.ndarray:
    """(x, c, h): a skewed per-unit metric, its pre-period value for the 60% of units that
    have pre-period data (0 for the rest) and the indicator."""
    level = rng.gamma(2.0, 1.0, size=(runs, n))  # the unit's persistent propensity
    h = (rng.random((runs, n)) < 0.6).astype(float)
    c = h * (level + rng.normal(0.0, 0.8, size=(runs, n)))
    x = level + rng.normal(0.0, 1.0, size=(runs, n)) + effect
    return np.stack([x, c, h], axis=2)


def ratio_arm(rng: np.random.Generator, runs: int, n: int, lift: float) -> np.ndarray:
    """(x, y, xpre, ypre, h): clicks and impressions per unit; the unit's click rate and
    traffic persist into the pre-period, which 70% of units have."""
    rate = rng.beta(2.0, 6.0, size=(runs, n))  # E = 0.25
    traffic = rng.gamma(3.0, 2.0, size=(runs, n))
    y = rng.poisson(traffic) + 1.0
    x = rng.binomial(y.astype(np.int64), np.clip(rate * (1.0 + lift), 0.0, 1.0)).astype(float)
    h = (rng.random((runs, n)) < 0.7).astype(float)
    ypre = h * (rng.poisson(traffic) + 1.0)
    xpre = rng.binomial(ypre.astype(np.int64), rate).astype(float)
    return np.stack([x, y, xpre, ypre, h], axis=2)


def run_cuped(
    treatment: list[UnitVectors], control: list[UnitVectors]
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    low, high, p, reduction = (np.empty(len(treatment)) for _ in range(4))
    for r, (t, c) in enumerate(zip(treatment, control, strict=True)):
        result = cuped_compare({"control": c, "treatment": t}, "treatment", "control", alpha=ALPHA)
        low[r], high[r] = result.effect.abs_ci_low, result.effect.abs_ci_high
        p[r], reduction[r] = result.effect.p_value, result.variance_reduction
    return low, high, p, reduction


def aa_band(runs: int) -> tuple[float, float]:
    return (
        float(sst.binom.ppf(0.005, runs, ALPHA)) / runs,
        float(sst.binom.ppf(0.995, runs, ALPHA)) / runs,
    )


@pytest.mark.parametrize("effect", [0.3, 0.0], ids=["effect", "aa"])
def test_cuped_per_unit_metric_coverage(effect: float) -> None:
    runs, n = 5000, 300
    rng = np.random.default_rng(20260915 if effect else 20260916)
    control = arm_vectors(per_unit_arm(rng, runs, n, 0.0), PER_UNIT)
    treatment = arm_vectors(per_unit_arm(rng, runs, n, effect), PER_UNIT)
    low, high, p, reduction = run_cuped(treatment, control)
    covered = np.mean((low <= effect) & (effect <= high))
    assert 0.94 <= covered <= 0.96, covered
    assert np.median(reduction) > 0.3  # the pre-period value explains much of the metric
    if effect == 0.0:
        share = float(np.mean(p < ALPHA))
        lo, hi = aa_band(runs)
        assert lo <= share <= hi, (share, lo, hi)


@pytest.mark.parametrize("lift", [0.08, 0.0], ids=["effect", "aa"])
def test_cuped_ratio_metric_coverage(lift: float) -> None:
    runs, n = 4000, 300
    rng = np.random.default_rng(20260917 if lift else 20260920)
    control = arm_vectors(ratio_arm(rng, runs, n, 0.0), RATIO)
    treatment = arm_vectors(ratio_arm(rng, runs, n, lift), RATIO)
    truth = 0.25 * lift  # E[click rate] · lift, the rate independent of traffic
    low, high, p, reduction = run_cuped(treatment, control)
    covered = np.mean((low <= truth) & (truth <= high))
    assert 0.94 <= covered <= 0.96, covered
    assert np.median(reduction) > 0.1
    if lift == 0.0:
        share = float(np.mean(p < ALPHA))
        lo, hi = aa_band(runs)
        assert lo <= share <= hi, (share, lo, hi)


# --------------------------------------------------------------------------- quantiles

Q = 0.95  # a p95 guardrail
MU, UNIT_SD, EVENT_SD = 5.8, 0.3, 0.4  # log latency: per-unit level and per-event noise
MAX_EVENTS = 8


def latency_arm(
    rng: np.random.Generator, runs: int, n: int, factor: float
) -> tuple[np.ndarray, np.ndarray]:
    """Event latencies (runs, units, MAX_EVENTS), NaN where a unit has fewer events, and
    each unit's count. The count does not depend on the unit's level, so the event-level
    distribution is lognormal(MU, sqrt(UNIT_SD² + EVENT_SD²)) times ``factor``."""
    counts = 1 + rng.binomial(MAX_EVENTS - 1, 0.4, size=(runs, n))
    level = rng.normal(0.0, UNIT_SD, size=(runs, n, 1))
    logs = MU + level + rng.normal(0.0, EVENT_SD, size=(runs, n, MAX_EVENTS))
    values = np.exp(logs) * factor
    values[np.arange(MAX_EVENTS)[None, None, :] >= counts[:, :, None]] = np.nan
    return values, counts


def linear_quantile(sorted_values: np.ndarray, sizes: np.ndarray, level: np.ndarray) -> np.ndarray:
    """Per run: the quantile at ``level`` of the first ``sizes`` sorted values (linear)."""
    h = (sizes - 1) * level
    lo, hi = np.floor(h).astype(np.int64), np.ceil(h).astype(np.int64)
    rows = np.arange(len(sizes))
    a, b = sorted_values[rows, lo], sorted_values[rows, hi]
    return a + (h - lo) * (b - a)


def summaries(values: np.ndarray, counts: np.ndarray) -> list[QuantileSummary]:
    """What the engine's quantile query reports, computed with numpy per run."""
    runs, n, _ = values.shape
    flat = np.sort(values.reshape(runs, -1), axis=1)  # NaN last
    sizes = counts.sum(axis=1)
    point = linear_quantile(flat, sizes, np.full(runs, Q))
    below = (values <= point[:, None, None]).sum(axis=2).astype(float)  # NaN compares False
    m = counts.astype(float)
    mean_s, mean_m = below.mean(axis=1), m.mean(axis=1)
    var_s, var_m = below.var(axis=1, ddof=1), m.var(axis=1, ddof=1)
    cov = ((below - mean_s[:, None]) * (m - mean_m[:, None])).sum(axis=1) / (n - 1)
    moments = [Moments(n, mean_s[r], mean_m[r], var_s[r], var_m[r], cov[r]) for r in range(runs)]
    levels = np.array([rank_band(mo, Q, ALPHA) for mo in moments])
    ends_low = linear_quantile(flat, sizes, levels[:, 0])
    ends_high = linear_quantile(flat, sizes, levels[:, 1])
    return [
        QuantileSummary(
            quantile=float(point[r]),
            n_values=int(sizes[r]),
            below=moments[r],
            level_low=float(levels[r, 0]),
            level_high=float(levels[r, 1]),
            value_low=float(ends_low[r]),
            value_high=float(ends_high[r]),
        )
        for r in range(runs)
    ]


@pytest.mark.parametrize("factor", [1.05, 1.0], ids=["effect", "aa"])
def test_quantile_difference_coverage(factor: float) -> None:
    runs, n = 6000, 350  # about 1,300 values per variant
    rng = np.random.default_rng(20260918 if factor != 1.0 else 20260919)
    control = summaries(*latency_arm(rng, runs, n, 1.0))
    treatment = summaries(*latency_arm(rng, runs, n, factor))
    true_control = float(np.exp(MU + sst.norm.ppf(Q) * np.hypot(UNIT_SD, EVENT_SD)))
    truth = (factor - 1.0) * true_control
    low, high, p = (np.empty(runs) for _ in range(3))
    for r in range(runs):
        effect = quantile_compare(treatment[r], control[r], q=Q, alpha=ALPHA)
        low[r], high[r], p[r] = effect.abs_ci_low, effect.abs_ci_high, effect.p_value
    covered = np.mean((low <= truth) & (truth <= high))
    assert 0.94 <= covered <= 0.96, covered
    if factor == 1.0:
        share = float(np.mean(p < ALPHA))
        lo, hi = aa_band(runs)
        assert lo <= share <= hi, (share, lo, hi)


DEVICE_MEDIAN_MS = (250.0, 380.0, 320.0)  # the demo generator's latency model (sample.py)
DEVICE_SHARE = (0.5, 0.4, 0.1)


def device_mixture_arm(
    rng: np.random.Generator, runs: int, n: int
) -> tuple[np.ndarray, np.ndarray]:
    """Latencies drawn as the demo draws them: a lognormal (sigma 0.45) about the median of
    the unit's device, rounded to whole milliseconds (ties), at least 20 ms."""
    counts = 1 + rng.binomial(MAX_EVENTS - 1, 0.35, size=(runs, n))
    device = rng.choice(len(DEVICE_SHARE), size=(runs, n, 1), p=DEVICE_SHARE)
    median = np.asarray(DEVICE_MEDIAN_MS)[device]
    noise = np.exp(rng.normal(0.0, 0.45, size=(runs, n, MAX_EVENTS)))
    values = np.maximum(np.round(median * noise), 20.0)
    values[np.arange(MAX_EVENTS)[None, None, :] >= counts[:, :, None]] = np.nan
    return values, counts


@pytest.mark.slow
@pytest.mark.parametrize("side", [0, 1], ids=["two-sided", "one-sided harm"])
def test_quantile_aa_on_the_demos_latency_model(side: int) -> None:
    """Common practice: about alpha of A/A comparisons are significant. Each run draws a
    new population (2,700 units, about 9,000 values per variant, as in the demo's
    pre-period), so this is the test's calibration over populations; an A/A replay of one
    fixed population (``metricforge aa``) judges it for that population only."""
    runs, n = 2000, 2700
    rng = np.random.default_rng(20261203 + side)
    control = summaries(*device_mixture_arm(rng, runs, n))
    treatment = summaries(*device_mixture_arm(rng, runs, n))
    p = np.array(
        [
            quantile_compare(t, c, q=Q, alpha=ALPHA, side=side).p_value
            for t, c in zip(treatment, control, strict=True)
        ]
    )
    lo, hi = aa_band(runs)
    assert lo <= float(np.mean(p < ALPHA)) <= hi
