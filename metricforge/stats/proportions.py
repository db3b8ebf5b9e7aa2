"""Two proportions from exact counts: Wilson and Newcombe intervals, z and Fisher tests.

- Wilson's score interval for one proportion s/n.
- Newcombe's hybrid score interval for p_t − p_c (method 10 of his 1998 comparison),
  built from the two Wilson intervals.
- The test of p_t = p_c: the two-sample z-test with the pooled proportion, or Fisher's
  exact test when any expected cell count of the 2×2 table is below 5 (common practice).
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from metricforge.stats.dist import norm_sf
from metricforge.stats.moments import FloatArray, Moments

FISHER_BELOW = 5.0  # smallest expected cell count for which the z-test is used


def wilson(s: FloatArray, n: FloatArray, z: float) -> tuple[FloatArray, FloatArray]:
    """Wilson score interval for s successes in n trials at the normal quantile z."""
    with np.errstate(all="ignore"):
        z2 = z * z
        centre = (s + z2 / 2.0) / (n + z2)
        half = z * np.sqrt(s * (n - s) / n + z2 / 4.0) / (n + z2)
    return np.maximum(centre - half, 0.0), np.minimum(centre + half, 1.0)


def newcombe(
    s_t: FloatArray, n_t: FloatArray, s_c: FloatArray, n_c: FloatArray, z: float
) -> tuple[FloatArray, FloatArray]:
    """Newcombe's hybrid score interval for s_t/n_t − s_c/n_c."""
    p_t, p_c = s_t / n_t, s_c / n_c
    lo_t, hi_t = wilson(s_t, n_t, z)
    lo_c, hi_c = wilson(s_c, n_c, z)
    d = p_t - p_c
    below = np.hypot(p_t - lo_t, hi_c - p_c)
    above = np.hypot(hi_t - p_t, p_c - lo_c)
    return d - below, d + above


def needs_exact(
    s_t: FloatArray, n_t: FloatArray, s_c: FloatArray, n_c: FloatArray
) -> npt.NDArray[np.bool_]:
    """True where the smallest expected count of the 2×2 table is below FISHER_BELOW."""
    total = n_t + n_c
    hits = s_t + s_c
    smallest = np.minimum(n_t, n_c) * np.minimum(hits, total - hits) / total
    return smallest < FISHER_BELOW


def small_counts(treatment: Moments, control: Moments) -> bool:
    """True when both are proportions and their 2×2 table needs Fisher's exact test."""
    if treatment.successes is None or control.successes is None:
        return False
    counts = (treatment.successes, treatment.n, control.successes, control.n)
    return bool(needs_exact(*(np.array([float(v)]) for v in counts))[0])


def z_test(
    s_t: FloatArray, n_t: FloatArray, s_c: FloatArray, n_c: FloatArray, side: int = 0
) -> FloatArray:
    """Pooled two-sample z-test of p_t = p_c.

    side 0: two-sided; +1: H1 p_t > p_c; −1: H1 p_t < p_c. With no variation at all
    (every unit 0, or every unit 1) the difference is 0 and the p-value 1 (0.5 one-sided).
    """
    with np.errstate(all="ignore"):
        pooled = (s_t + s_c) / (n_t + n_c)
        se = np.sqrt(pooled * (1.0 - pooled) * (1.0 / n_t + 1.0 / n_c))
        stat = (s_t / n_t - s_c / n_c) / se
        stat = np.where(se > 0, stat, 0.0)
    if side == 0:
        return np.asarray(2.0 * norm_sf(np.abs(stat)), np.float64)
    return norm_sf(side * stat)


def fisher_test(s_t: int, n_t: int, s_c: int, n_c: int, side: int = 0) -> float:
    """Fisher's exact test on [[s_t, n_t − s_t], [s_c, n_c − s_c]] (side as in z_test)."""
    from scipy import stats as st  # only for small counts: scipy.stats is slow to import

    alternative = {0: "two-sided", 1: "greater", -1: "less"}[side]
    table = [[s_t, n_t - s_t], [s_c, n_c - s_c]]
    return float(st.fisher_exact(table, alternative=alternative).pvalue)


def proportion_test(
    s_t: FloatArray, n_t: FloatArray, s_c: FloatArray, n_c: FloatArray, side: int = 0
) -> tuple[FloatArray, npt.NDArray[np.bool_]]:
    """p-values (z-test, or Fisher's where an expected count is small) and where Fisher."""
    p = z_test(s_t, n_t, s_c, n_c, side)
    exact = needs_exact(s_t, n_t, s_c, n_c)
    for i in np.flatnonzero(exact):
        a, b, c, d = (int(x.flat[i]) for x in (s_t, n_t, s_c, n_c))
        p.flat[i] = fisher_test(a, b, c, d, side)
    return p, exact
