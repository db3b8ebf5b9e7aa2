"""A/A replay of a quantile metric from its buckets' values near the pooled quantile.

The result query ``qreplay_<metric>`` (``compile.replay_quantiles``) gives per bucket the
counts of every distinct value inside a window about the pooled quantile, the steps each
adds to ΣS² and ΣS·M, and per bucket the sums of M, M², L, L², L·M (L: a unit's values
below the window). A replay's variant sums them over its buckets (one matrix product);
running sums over the window then give, at every window value u, the variant's number of
values ≤ u, ΣS, ΣS² and ΣS·M with S = each unit's values ≤ u: whole numbers, exact.

From those each variant's figures are rebuilt, for all replays at once, as the
scorecard's query builds them: the quantile by linear interpolation between order
statistics, the moments of S and M at it, the outer band's levels
(``stats.quantiles.rank_bands``) and the quantiles there; the p-value is the scorecard's
(``stats.quantiles.compare_quantiles``). An order statistic outside the window (never seen at the
window's width, see ``compile.replay_quantiles.window_z``) leaves that replay without a
p-value (NaN), and the report counts it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from metricforge.errors import StatsError
from metricforge.stats.moments import MomentsBatch, delta_ratio
from metricforge.stats.quantiles import compare_quantiles, rank_bands, two_sided_z

Array = npt.NDArray[np.float64]
BASE = ("units", "m", "m2", "l", "l2", "lm")
CELL = ("c", "s2_step", "sm_step")
CELLS_PER_BLOCK = 4_000_000  # replays × cells per block: bounds the memory of a block


@dataclass(frozen=True)
class QuantileBuckets:
    """``values`` (V,) the window's distinct values, ascending; ``base`` (buckets, 6) the
    sums named in BASE; the cells, one per bucket and window value holding any, sorted by
    value: ``bucket`` and ``value`` (indices), ``cells`` (3, cells) the sums named in CELL,
    ``starts`` the first cell of each value."""

    values: Array
    base: Array
    bucket: npt.NDArray[np.int64]
    value: npt.NDArray[np.int64]
    cells: Array
    starts: npt.NDArray[np.int64]

    @classmethod
    def of(cls, rows: dict[str, list[float | None]], buckets: int) -> QuantileBuckets:
        """From the query's columns (base rows have ``units`` set, cell rows NULL)."""
        bucket = np.asarray(rows["bucket"], dtype=np.int64)
        v = np.asarray([math.nan if x is None else x for x in rows["v"]], dtype=np.float64)
        is_cell = np.asarray([x is None for x in rows["units"]], dtype=np.bool_)

        def column(name: str) -> Array:
            return np.asarray([x or 0.0 for x in rows[name]], dtype=np.float64)

        base = np.zeros((buckets, len(BASE)))
        for k, name in enumerate(BASE):
            base[bucket[~is_cell], k] = column(name)[~is_cell]
        values, where = np.unique(v[is_cell], return_inverse=True)
        order = np.argsort(where, kind="stable")
        value = where[order].astype(np.int64)
        cells = np.stack([column(name)[is_cell][order] for name in CELL])
        starts = np.flatnonzero(np.r_[True, value[1:] != value[:-1]]).astype(np.int64)
        return cls(values, base, bucket[is_cell][order], value, cells, starts)

    def sums(self, chosen: Array) -> tuple[Array, Array]:
        """A variant's sums in each replay, given ``chosen`` (replays, buckets) 1 where the
        bucket is the variant's: base (replays, 6) and cells (replays, 3, V)."""
        weights = chosen[:, self.bucket]
        cells = np.stack(
            [np.add.reduceat(weights * row, self.starts, axis=1) for row in self.cells], axis=1
        )
        return chosen @ self.base, cells


def _value_at(level: Array, n: Array, below_window: Array, count: Array, values: Array) -> Array:
    """Per replay, the linear-rule quantile at ``level`` of n values, of which
    ``below_window`` lie below the window and count[:, k] at or below values[k]; NaN
    where an order statistic it needs lies outside the window."""
    h = (n - 1.0) * level
    low, high = np.floor(h), np.ceil(h)

    def order_statistic(j: Array) -> Array:  # the first window value whose count exceeds j
        index = (count <= j[:, None]).sum(axis=1)
        inside = (j >= below_window) & (index < len(values))
        return np.where(inside, values[np.minimum(index, len(values) - 1)], np.nan)

    v_low, v_high = order_statistic(low), order_statistic(high)
    return v_low + (h - low) * (v_high - v_low)


def _quantiles_and_errors(
    base: Array, cum: Array, values: Array, q: float, alpha: float
) -> tuple[Array, Array]:
    """One variant's quantile and its outer interval's standard error in every replay,
    from its summed base (R, 6) and running sums over the window (R, 3, V) of values,
    S²-steps and S·M-steps, as ``stats.quantiles`` computes them from the engine's row."""
    units, m, m2, lower, l2, lm = base.T  # lower: Σ L, the values below the window
    count = lower[:, None] + cum[:, 0, :]
    quantile = _value_at(np.full(len(units), q), m, lower, count, values)
    k = (values[None, :] <= quantile[:, None]).sum(axis=1) - 1  # the last value ≤ q̂
    at = np.maximum(k, 0)[:, None]
    s = np.take_along_axis(count, at, axis=1)[:, 0]
    s2 = l2 + np.take_along_axis(cum[:, 1, :], at, axis=1)[:, 0]
    sm = lm + np.take_along_axis(cum[:, 2, :], at, axis=1)[:, 0]
    with np.errstate(divide="ignore", invalid="ignore"):
        d = units - 1.0
        below = MomentsBatch(
            n=units,
            mean_x=s / units,
            mean_y=m / units,
            var_x=np.maximum((s2 - s * s / units) / d, 0.0),
            var_y=np.maximum((m2 - m * m / units) / d, 0.0),
            cov_xy=(sm - s * m / units) / d,
        )
        _, variance = delta_ratio(below)
        low, high = rank_bands(variance, q, alpha)
        value_low = _value_at(low, m, lower, count, values)
        value_high = _value_at(high, m, lower, count, values)
        se = (value_high - value_low) / (2.0 * two_sided_z(alpha))
    usable = (units >= 2) & (k >= 0) & np.isfinite(quantile)
    return np.where(usable, quantile, np.nan), np.where(usable, se, np.nan)


def quantile_p_values(
    buckets: QuantileBuckets,
    arms: npt.NDArray[np.int8],
    n_variants: int,
    *,
    q: float,
    alpha: float = 0.05,
    side: int = 0,
    margin: float | None = None,
) -> list[Array]:
    """Per treatment variant, its p-value against the control in each replay (rows of
    ``arms``, the variant index of every bucket), by ``stats.quantiles.compare_quantiles``;
    NaN where a variant has fewer than two units with values or an order statistic falls
    outside the window."""
    if arms.shape[1] != buckets.base.shape[0]:
        raise StatsError("the assignment and the quantile buckets disagree on the buckets")
    if not len(buckets.values):
        return [np.full(arms.shape[0], np.nan) for _ in range(n_variants - 1)]
    out: list[list[Array]] = [[] for _ in range(n_variants - 1)]
    block = max(1, CELLS_PER_BLOCK // len(buckets.value))
    for first in range(0, arms.shape[0], block):
        part = arms[first : first + block]
        found = []
        for variant in range(n_variants):
            base, cells = buckets.sums((part == variant).astype(np.float64))
            found.append(
                _quantiles_and_errors(base, np.cumsum(cells, axis=2), buckets.values, q, alpha)
            )
        (c, se_c), *treatments = found
        for k, (t, se_t) in enumerate(treatments):
            tested = compare_quantiles(t, se_t, c, se_c, alpha=alpha, side=side, margin=margin)
            out[k].append(tested.p_value)
    return [np.concatenate(parts) for parts in out]
