"""The statistics run on scipy.special (a fast import); scipy.stats is the reference library.

Reference library: scipy.stats (chisquare, chi2_contingency, t, norm). The run path computes
the same formulas from scipy.special, so the results must be equal bit for bit, not merely
close: scorecards of earlier runs stay byte-identical.
"""

from __future__ import annotations

import math
import subprocess
import sys

from hypothesis import given
from hypothesis import strategies as st
from scipy import stats as sst

from metricforge.stats import Moments, compare, ratio_point_and_variance, srm_test, welch_df
from metricforge.stats.independence import share_differs

counts = st.integers(min_value=1, max_value=10_000_000)
weights = st.floats(min_value=0.01, max_value=100.0)


@given(st.lists(st.tuples(counts, weights), min_size=2, max_size=6))
def test_srm_equals_scipy_chisquare_exactly(cells: list[tuple[int, float]]) -> None:
    observed = [c for c, _ in cells]
    planned = [w for _, w in cells]
    result = srm_test(observed, planned)
    chi2, p = sst.chisquare(observed, result.expected)
    assert (result.chi2, result.p_value) == (float(chi2), float(p))


@given(st.lists(st.tuples(counts, st.floats(0.0, 1.0)), min_size=2, max_size=6))
def test_share_test_equals_scipy_chi2_contingency_exactly(groups: list[tuple[int, float]]) -> None:
    total = [t for t, _ in groups]
    flagged = [round(t * share) for t, share in groups]
    result = share_differs(flagged, total)
    if 0 < sum(flagged) < sum(total):
        table = [flagged, [t - f for f, t in zip(flagged, total, strict=True)]]
        chi2, p, df, _ = sst.chi2_contingency(table, correction=False)
        assert (result.chi2, result.p_value, result.df) == (float(chi2), float(p), int(df))


def _reference(treatment: Moments, control: Moments, alpha: float) -> tuple[float, float]:
    """p-value and CI half-width the way scipy.stats states them (Welch t or normal)."""
    t_val, v_t = ratio_point_and_variance(treatment)
    c_val, v_c = ratio_point_and_variance(control)
    se = math.sqrt(v_t + v_c)
    diff = abs(t_val - c_val)
    if treatment.is_ratio or control.is_ratio:
        z = float(sst.norm.ppf(1.0 - alpha / 2.0))
        return 2.0 * float(sst.norm.sf(diff / se)), z * se
    df = welch_df(v_t, treatment.n, v_c, control.n)
    return 2.0 * float(sst.t.sf(diff / se, df)), float(sst.t.ppf(1.0 - alpha / 2.0, df)) * se


sizes = st.integers(min_value=2, max_value=10_000_000)
means = st.floats(min_value=-1e6, max_value=1e6)
variances = st.floats(min_value=1e-6, max_value=1e6)


@given(sizes, means, variances, sizes, means, variances, st.sampled_from([0.01, 0.05, 0.1]))
def test_welch_effect_equals_scipy_t_exactly(
    n_t: int, m_t: float, v_t: float, n_c: int, m_c: float, v_c: float, alpha: float
) -> None:
    treatment, control = Moments.of_mean(n_t, m_t, v_t), Moments.of_mean(n_c, m_c, v_c)
    effect = compare(treatment, control, alpha=alpha)
    p, half = _reference(treatment, control, alpha)
    assert effect.p_value == p
    assert effect.abs_ci_high == effect.abs_effect + half


@given(sizes, st.floats(0.1, 100.0), st.floats(1.0, 100.0), st.floats(0.01, 0.5), sizes)
def test_delta_effect_equals_scipy_norm_exactly(
    n_t: int, mean_x: float, mean_y: float, spread: float, n_c: int
) -> None:
    def moments(n: int, shift: float) -> Moments:
        var = (spread * mean_x) ** 2
        return Moments(n, mean_x + shift, mean_y, var, var, 0.5 * var)

    treatment, control = moments(n_t, spread), moments(n_c, 0.0)
    effect = compare(treatment, control, alpha=0.05)
    p, half = _reference(treatment, control, 0.05)
    assert effect.p_value == p
    assert effect.abs_ci_high == effect.abs_effect + half


def test_run_path_does_not_import_scipy_stats() -> None:
    """scipy.stats costs more than half a second of start-up; the run path avoids it."""
    modules = "metricforge.cli, metricforge.runner, metricforge.report.files"
    code = f"import sys, {modules}; print('scipy.stats' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
