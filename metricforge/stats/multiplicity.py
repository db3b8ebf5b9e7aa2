"""Adjusted p-values for a family of tests.

- ``holm``: Holm's step-down procedure; controls the family-wise error rate.
- ``benjamini_hochberg``: the Benjamini–Hochberg step-up procedure; controls the false
  discovery rate (independent or positively dependent tests).
- ``bonferroni``: m·p, capped at 1.

NaN p-values (tests that could not be computed) are left out of the family and stay NaN.
A hypothesis is rejected at level q when its adjusted p-value is at most q.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np

from metricforge.stats.moments import FloatArray


def _adjust(
    p_values: Sequence[float] | FloatArray, step: Callable[[FloatArray], FloatArray]
) -> FloatArray:
    p = np.asarray(p_values, dtype=np.float64)
    out = np.full(p.shape, np.nan)
    kept = np.flatnonzero(~np.isnan(p))
    if kept.size:
        order = kept[np.argsort(p[kept], kind="stable")]
        out[order] = np.minimum(step(p[order]), 1.0)
    return out


def holm(p_values: Sequence[float] | FloatArray) -> FloatArray:
    """Holm: the i-th smallest of m gets max over j ≤ i of (m − j + 1)·p_(j)."""

    def step(sorted_p: FloatArray) -> FloatArray:
        m = sorted_p.size
        return np.maximum.accumulate((m - np.arange(m)) * sorted_p)

    return _adjust(p_values, step)


def benjamini_hochberg(p_values: Sequence[float] | FloatArray) -> FloatArray:
    """Benjamini–Hochberg: the i-th smallest of m gets min over j ≥ i of m·p_(j)/j."""

    def step(sorted_p: FloatArray) -> FloatArray:
        m = sorted_p.size
        scaled = m * sorted_p / np.arange(1, m + 1)
        return np.minimum.accumulate(scaled[::-1])[::-1]

    return _adjust(p_values, step)


def bonferroni(p_values: Sequence[float] | FloatArray) -> FloatArray:
    """Bonferroni: m·p for a family of m tests."""
    return _adjust(p_values, lambda sorted_p: sorted_p.size * sorted_p)
