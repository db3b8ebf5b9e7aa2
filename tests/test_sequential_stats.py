"""Always-valid p-values and confidence sequences (metricforge/stats/sequential.py).

Formula: Johari, Koomen, Pekelis, Walsh, "Always Valid Inference", Operations Research
2022, as in /work/shared/REFERENCES.md ("Methods with a reference-library cross-check"):
MEMORY, cross-checked here by numerical integration of the likelihood ratio over the
normal mixing distribution (scipy.integrate.quad), and by seeded simulation of A/A
streams under continuous monitoring.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate
from scipy import stats as sst

from metricforge.stats.sequential import (
    half_width,
    log_mixture_ratio,
    look_interval,
    look_p_value,
    mixing_variance,
    mixture_ratio,
    running_interval,
    running_p_value,
)


def integrated_ratio(d: float, v: float, tau2: float, theta0: float) -> float:
    """∫ N(d; θ, v) / N(d; θ₀, v) · N(θ; θ₀, τ²) dθ by scipy.integrate.quad."""
    tau = math.sqrt(tau2)

    def integrand(theta: float) -> float:
        ratio = math.exp(
            (-((d - theta) ** 2) + (d - theta0) ** 2) / (2.0 * v)
        )  # likelihood ratio of θ against θ₀
        return ratio * float(sst.norm.pdf(theta, theta0, tau))

    # the integrand's mass lies between θ₀ and d (shrunk towards θ₀): give quad that range
    centre = theta0 + tau2 / (tau2 + v) * (d - theta0)
    spread = math.sqrt(tau2 * v / (tau2 + v))
    lo, hi = centre - 40 * spread, centre + 40 * spread
    value, _ = integrate.quad(integrand, lo, hi, points=[centre], limit=200, epsabs=0, epsrel=1e-12)
    return float(value)


@pytest.mark.parametrize(
    ("d", "v", "tau2", "theta0"),
    [
        (0.0, 1.0, 1.0, 0.0),
        (0.3, 0.01, 0.04, 0.0),
        (-0.25, 0.004, 0.0025, 0.05),
        (2.0, 0.5, 3.0, -1.0),
        (1e-3, 1e-6, 4e-6, 0.0),
        (120.0, 400.0, 25.0, 100.0),
    ],
)
def test_mixture_ratio_equals_the_integrated_likelihood_ratio(
    d: float, v: float, tau2: float, theta0: float
) -> None:
    """MEMORY formula of Λ against scipy.integrate.quad of the mixture (REFERENCES.md)."""
    expected = integrated_ratio(d, v, tau2, theta0)
    assert float(mixture_ratio(d, v, tau2, theta0)) == pytest.approx(expected, rel=1e-8)


@settings(max_examples=150, deadline=None)
@given(
    z=st.floats(-6.0, 6.0),
    log_v=st.floats(-8.0, 4.0),
    ratio=st.floats(0.01, 100.0),
    theta0=st.floats(-10.0, 10.0),
)
def test_mixture_ratio_matches_quad_everywhere(
    z: float, log_v: float, ratio: float, theta0: float
) -> None:
    """Property: for any difference (z standard errors from θ₀), variance and τ²/v, the
    closed form equals the numerical mixture (MEMORY formula, scipy.integrate.quad)."""
    v = math.exp(log_v)
    tau2 = ratio * v
    d = theta0 + z * math.sqrt(v)
    expected = integrated_ratio(d, v, tau2, theta0)
    assert float(mixture_ratio(d, v, tau2, theta0)) == pytest.approx(expected, rel=1e-7)


@pytest.mark.parametrize("alpha", [0.01, 0.05, 0.1])
@pytest.mark.parametrize(("d", "v", "tau2"), [(0.0, 1.0, 1.0), (0.4, 0.01, 0.09), (-3.0, 2.0, 0.5)])
def test_interval_ends_solve_lambda_equals_one_over_alpha(
    alpha: float, d: float, v: float, tau2: float
) -> None:
    low, high = look_interval(d, v, tau2, alpha)
    for end in (float(low), float(high)):
        assert float(mixture_ratio(d, v, tau2, end)) == pytest.approx(1.0 / alpha, rel=1e-9)
    # inside: Λ < 1/α; just outside: Λ > 1/α; and the p-value of each θ₀ agrees
    h = float(half_width(v, tau2, alpha))
    assert float(mixture_ratio(d, v, tau2, d + 0.999 * h)) < 1.0 / alpha
    assert float(mixture_ratio(d, v, tau2, d + 1.001 * h)) > 1.0 / alpha
    assert float(look_p_value(d, v, tau2, float(high))) == pytest.approx(alpha, rel=1e-9)


def test_the_interval_excludes_zero_exactly_when_the_p_value_is_below_alpha() -> None:
    rng = np.random.default_rng(7)
    d = rng.normal(0, 0.2, 500)
    v = rng.uniform(0.001, 0.02, 500)
    tau2 = rng.uniform(0.001, 0.05, 500)
    low, high = look_interval(d, v, tau2, 0.05)
    excluded = (low > 0) | (high < 0)
    assert np.array_equal(excluded, look_p_value(d, v, tau2) < 0.05)


def test_invalid_inputs_give_nan_and_running_values_skip_them() -> None:
    assert np.isnan(look_p_value(0.1, 0.0, 1.0)) and np.isnan(look_p_value(0.1, 1.0, 0.0))
    assert np.isnan(half_width(-1.0, 1.0, 0.05)) and np.isnan(log_mixture_ratio(np.nan, 1.0, 1.0))
    assert list(running_p_value([0.5, np.nan, 0.7, 0.2])) == [0.5, 0.5, 0.5, 0.2]
    low, high = running_interval([-1.0, np.nan, -2.0, -0.5], [1.0, np.nan, 0.5, 2.0])
    assert list(low) == [-1.0, -1.0, -1.0, -0.5] and list(high) == [1.0, 1.0, 0.5, 0.5]
    assert float(mixing_variance(0.05, -4.0)) == pytest.approx(0.04)
    with pytest.raises(ValueError, match="alpha"):
        half_width(1.0, 1.0, 1.5)


def test_an_overwhelming_difference_gives_p_zero_not_an_error() -> None:
    assert float(look_p_value(1e6, 1e-6, 1.0)) == 0.0


# ------------------------------------------------------------------ monitoring by simulation

Draw = Callable[[np.random.Generator, float, tuple[int, ...]], np.ndarray]
DRAWS: dict[str, tuple[float, Draw]] = {
    # name: (control mean, draw(rng, mean, shape))
    "normal": (10.0, lambda rng, m, s: rng.normal(m, 4.0, s)),
    "bernoulli": (0.1, lambda rng, m, s: (rng.random(s) < m).astype(np.float64)),
    "exponential": (3.0, lambda rng, m, s: rng.exponential(m, s)),
}
REPLAYS, LOOKS, BATCH = 2000, 100, 20  # experiments, looks each, units per arm per look
ALPHA, EFFECT = 0.05, 0.05


def _merge(
    n: float, mean: np.ndarray, m2: np.ndarray, batch: np.ndarray
) -> tuple[float, np.ndarray, np.ndarray]:
    """Merged (n, mean, M2) of a running summary and a new batch (rows: experiments)."""
    k = batch.shape[1]
    b_mean = batch.mean(axis=1)
    b_m2 = ((batch - b_mean[:, None]) ** 2).sum(axis=1)
    total = n + k
    delta = b_mean - mean
    return total, mean + delta * k / total, m2 + b_m2 + delta * delta * n * k / total


def simulate_looks(name: str, lift: float, seed: int, pooled_scale: bool) -> dict[str, np.ndarray]:
    """Per experiment and look: the difference, its variance, the ordinary (z) p-value, the
    always-valid p-value and the confidence sequence; treatment mean = control · (1 + lift)."""
    base, draw = DRAWS[name]
    rng = np.random.default_rng(seed)
    summaries = [(0.0, np.zeros(REPLAYS), np.zeros(REPLAYS)) for _ in range(2)]
    out: dict[str, list[np.ndarray]] = {k: [] for k in ("d", "v", "p", "p_av", "low", "high")}
    for _ in range(LOOKS):
        summaries = [
            _merge(*s, draw(rng, base * (1.0 + lift * arm), (REPLAYS, BATCH)))
            for arm, s in enumerate(summaries)
        ]
        (n_c, mean_c, m2_c), (n_t, mean_t, m2_t) = summaries
        d = mean_t - mean_c
        v = m2_t / (n_t - 1) / n_t + m2_c / (n_c - 1) / n_c
        scale = (n_t * mean_t + n_c * mean_c) / (n_t + n_c) if pooled_scale else base
        tau2 = mixing_variance(EFFECT, scale)
        low, high = look_interval(d, v, tau2, ALPHA)
        out["d"].append(d)
        out["v"].append(v)
        with np.errstate(all="ignore"):  # a Bernoulli arm without successes: v = 0
            out["p"].append(2.0 * sst.norm.sf(np.abs(d) / np.sqrt(v)))
        out["p_av"].append(look_p_value(d, v, tau2))
        out["low"].append(low)
        out["high"].append(high)
    return {k: np.stack(vals, axis=1) for k, vals in out.items()}


MC_TOLERANCE = 3.0 * math.sqrt(ALPHA * (1 - ALPHA) / REPLAYS)  # three Monte-Carlo SEs: 0.0146


@pytest.mark.parametrize("pooled_scale", [False, True], ids=["fixed-scale", "pooled-scale"])
@pytest.mark.parametrize("name", sorted(DRAWS))
def test_monitoring_an_aa_stream_keeps_false_positives_at_most_alpha(
    name: str, pooled_scale: bool
) -> None:
    """A/A streams looked at 100 times: the always-valid p-value ever falls below α in at
    most α of them (plus three Monte-Carlo standard errors; Ville's inequality, the
    REFERENCES.md cross-check); the ordinary p-value checked at every look crosses α far
    more often (common practice: peeking inflates false positives)."""
    looks = simulate_looks(name, 0.0, seed=11, pooled_scale=pooled_scale)
    ever_av = np.mean(running_p_value(looks["p_av"], axis=1)[:, -1] < ALPHA)
    ever_plain = np.mean(np.min(looks["p"], axis=1) < ALPHA)
    assert ever_av <= ALPHA + MC_TOLERANCE
    assert ever_plain > 3 * ALPHA
    # the running p-value never rises, and it rejects exactly when the running
    # intersection of the intervals excludes zero
    running = running_p_value(looks["p_av"], axis=1)
    assert np.all(np.diff(running, axis=1) <= 0)
    low, high = running_interval(looks["low"], looks["high"], axis=1)
    np.testing.assert_array_equal(((low > 0) | (high < 0))[:, -1], running[:, -1] < ALPHA)


@pytest.mark.parametrize("pooled_scale", [False, True], ids=["fixed-scale", "pooled-scale"])
@pytest.mark.parametrize("name", sorted(DRAWS))
def test_the_confidence_sequence_covers_an_injected_effect_at_every_look(
    name: str, pooled_scale: bool
) -> None:
    """Property with a known injected effect (+5%): the running intersection of the looks'
    intervals holds the true difference at all 100 looks in at least 1 − α of the
    experiments (minus three Monte-Carlo standard errors)."""
    base, _ = DRAWS[name]
    lift = 0.05
    looks = simulate_looks(name, lift, seed=23, pooled_scale=pooled_scale)
    truth = base * lift
    low, high = running_interval(looks["low"], looks["high"], axis=1)
    covered = np.all((low <= truth) & (truth <= high), axis=1)
    assert np.mean(covered) >= 1 - ALPHA - MC_TOLERANCE
    # and the effect is found: by the last look the interval excludes zero in most runs
    # of the normal stream (power check, not a guarantee for the skewed ones)
    if name == "normal":
        assert np.mean(low[:, -1] > 0) > 0.5
