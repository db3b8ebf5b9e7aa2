"""The distribution functions and chi-square tests the scorecard needs, on scipy.special.

scipy.stats computes these with the same special functions (its normal tail is
``ndtr(-x)``, its Student t tail ``stdtr(df, -x)``, its quantiles ``ndtri`` and
``stdtrit``, its chi-square tail ``chdtrc``), so the values are the same bits
(tests/test_dist.py checks them against scipy.stats). Importing scipy.stats costs about
0.4 s of every run; scipy.special a fraction of that. Functions that are not on the
scorecard's path (Fisher's exact test, the A/A calibration) still use scipy.stats,
imported where they are called.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt
from scipy import special

from metricforge.errors import StatsError

FloatArray = npt.NDArray[np.float64]
ArrayLike = float | npt.NDArray[np.float64]


def norm_sf(x: ArrayLike) -> FloatArray:
    """P(Z ≥ x) for the standard normal."""
    return np.asarray(special.ndtr(-np.asarray(x, np.float64)), np.float64)


def norm_cdf(x: ArrayLike) -> FloatArray:
    """P(Z ≤ x) for the standard normal."""
    return np.asarray(special.ndtr(np.asarray(x, np.float64)), np.float64)


def norm_ppf(q: ArrayLike) -> FloatArray:
    """The standard normal quantile at q (+ 0.0: scipy.stats adds its location, 0)."""
    return np.asarray(special.ndtri(np.asarray(q, np.float64)) + 0.0, np.float64)


def t_sf(x: ArrayLike, df: ArrayLike) -> FloatArray:
    """P(T ≥ x) for Student's t with df degrees of freedom (df = inf: the normal)."""
    with np.errstate(all="ignore"):
        out = special.stdtr(np.asarray(df, np.float64), -np.asarray(x, np.float64))
    return np.asarray(out, np.float64)


def t_ppf(q: ArrayLike, df: ArrayLike) -> FloatArray:
    """Student's t quantile at q; the ends of the support at q = 0 and q = 1, as scipy.stats."""
    q_arr, df_arr = np.broadcast_arrays(np.asarray(q, np.float64), np.asarray(df, np.float64))
    with np.errstate(all="ignore"):
        out = special.stdtrit(df_arr, q_arr) + 0.0
        valid = df_arr > 0
    out = np.where(valid & (q_arr == 0.0), -np.inf, out)
    return np.asarray(np.where(valid & (q_arr == 1.0), np.inf, out), np.float64)


def chi2_sf(x: ArrayLike, df: ArrayLike) -> FloatArray:
    """P(X ≥ x) for the chi-square distribution with df degrees of freedom."""
    with np.errstate(all="ignore"):
        out = special.chdtrc(np.asarray(df, np.float64), np.asarray(x, np.float64))
    return np.asarray(out, np.float64)


def pearson_goodness_of_fit(
    observed: npt.ArrayLike, expected: npt.ArrayLike
) -> tuple[float, float]:
    """Pearson's chi-square statistic of counts against expected counts (same total) and
    its p-value with k − 1 degrees of freedom (scipy.stats.chisquare)."""
    f_obs = np.asarray(observed, np.float64)
    f_exp = np.asarray(expected, np.float64)
    stat = np.sum((f_obs - f_exp) ** 2 / f_exp)
    return float(stat), float(chi2_sf(stat, float(f_obs.size - 1)))


def pearson_independence(table: npt.ArrayLike) -> tuple[float, float, int]:
    """Pearson's chi-square test of independence of a two-way table of counts, without a
    continuity correction (scipy.stats.chi2_contingency(correction=False)):
    (statistic, p-value, degrees of freedom)."""
    observed = np.asarray(table, np.float64)
    if observed.ndim != 2 or np.any(observed < 0):
        raise StatsError("a contingency table is a two-way table of counts, none negative")
    expected = (
        observed.sum(axis=1, keepdims=True) * observed.sum(axis=0, keepdims=True)
    ) / observed.sum()
    if np.any(expected == 0):
        raise StatsError("a contingency table needs every row and column total above zero")
    dof = expected.size - sum(expected.shape) + expected.ndim - 1
    if dof == 0:
        return 0.0, 1.0, 0
    stat = np.sum((observed - expected) ** 2 / expected)
    return float(stat), float(chi2_sf(stat, float(dof))), int(dof)
