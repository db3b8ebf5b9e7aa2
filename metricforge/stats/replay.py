"""A/A replay on hash buckets: re-randomise whole buckets of units, many times at once.

Units were reduced once to a few thousand hash buckets, each holding every metric's
(n, mean, M2) and, for ratios, (mean_y, M2_y, C_xy) over its units. A replay assigns every
bucket to a variant (a salted 64-bit hash of replay and bucket against the planned split),
so a variant's moments are a merge of bucket moments. Merging uses deviations from the
overall mean, never raw power sums: with d_b = mean_b − μ,
    Σ(x − μ)² over an arm = Σ_b (M2_b + n_b d_b²),   Σ(x − μ) = Σ_b n_b d_b,
    M2_arm = Σ(x − μ)² − (Σ(x − μ))² / n_arm,
where the subtracted term is about 1/n of the first (the arm mean lies within a standard
error of μ), so nothing cancels. All replays' sums are one matrix product per arm.
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy import stats as st

from metricforge.errors import StatsError

Array = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]
_U64 = npt.NDArray[np.uint64]


@dataclass(frozen=True)
class BucketMoments:
    """One metric's moments per bucket; the y parts are None for a per-unit mean metric."""

    n: Array
    mean_x: Array
    m2_x: Array
    mean_y: Array | None = None
    m2_y: Array | None = None
    c_xy: Array | None = None

    @property
    def is_ratio(self) -> bool:
        return self.mean_y is not None


@dataclass(frozen=True)
class ArmMoments:
    """Per replay (arrays of one value per replay): a variant's moments of one metric."""

    n: Array
    mean_x: Array
    var_x: Array
    mean_y: Array | None = None
    var_y: Array | None = None
    cov_xy: Array | None = None


_GAMMA = np.uint64(0x9E3779B97F4A7C15)  # the 64-bit golden-ratio increment


def bucket_hashes(salt: str, first: int, count: int, n_buckets: int) -> _U64:
    """A salted 64-bit hash of (replay, bucket) for replays first..first+count-1.

    The splitmix64 sequence seeded by the salt: the i-th number is a mixing function of
    seed + i·γ, for i = replay · buckets + bucket; every input bit moves every output bit.
    """
    seed = np.uint64(int.from_bytes(hashlib.sha256(salt.encode()).digest()[:8], "big"))
    start = np.uint64(first * n_buckets + 1)
    index = np.arange(count * n_buckets, dtype=np.uint64).reshape(count, n_buckets)
    with np.errstate(over="ignore"):
        x = seed + (index + start) * _GAMMA
        x = (x ^ (x >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
        x = (x ^ (x >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    return x ^ (x >> np.uint64(31))


def assign(hashes: _U64, shares: Sequence[float]) -> npt.NDArray[np.int8]:
    """Each bucket's variant index under the planned split (shares in variant order): the
    hash read as a fraction of 2**64 against the split's cumulative edges."""
    weights = np.asarray(shares, dtype=np.float64)
    if weights.ndim != 1 or not 2 <= len(weights) <= 127 or not np.all(weights > 0):
        raise StatsError("a planned split needs two or more positive shares")
    edges = np.cumsum(weights / weights.sum())[:-1]
    out = np.zeros(hashes.shape, dtype=np.int8)
    for edge in edges:  # 2**64 · edge, rounded down to a whole number below 2**64
        out += hashes >= np.uint64(min(int(edge * 2.0**64), 2**64 - 1))
    return out


@dataclass(frozen=True)
class _Columns:
    """One metric's bucket moments as deviation columns about its overall mean."""

    mu_x: float
    mu_y: float
    columns: Array  # (buckets, 3), or (buckets, 6) for a ratio

    @classmethod
    def of(cls, b: BucketMoments) -> _Columns:
        n = np.nan_to_num(b.n)
        total = n.sum()
        if total <= 0:
            raise StatsError("no units in any bucket")

        def centre(mean: Array, m2: Array) -> tuple[float, Array, Array, Array]:
            mean = np.where(n > 0, np.nan_to_num(mean), 0.0)
            mu = float(np.dot(n, mean) / total)
            d = np.where(n > 0, mean - mu, 0.0)
            return mu, d, n * d, np.nan_to_num(m2) + n * d * d

        mu_x, dx, s1x, s2x = centre(b.mean_x, b.m2_x)
        if b.mean_y is None or b.m2_y is None or b.c_xy is None:
            return cls(mu_x, 1.0, np.column_stack([n, s1x, s2x]))
        mu_y, dy, s1y, s2y = centre(b.mean_y, b.m2_y)
        sxy = np.nan_to_num(b.c_xy) + n * dx * dy
        return cls(mu_x, mu_y, np.column_stack([n, s1x, s2x, s1y, s2y, sxy]))

    def arm(self, sums: Array) -> ArmMoments:
        """Moments of one arm per replay from its summed columns."""
        n = sums[:, 0]
        with np.errstate(divide="ignore", invalid="ignore"):
            dof = n - 1.0
            s1x = sums[:, 1]
            mean_x = self.mu_x + s1x / n
            var_x = (sums[:, 2] - s1x * s1x / n) / dof
            if sums.shape[1] == 3:
                return ArmMoments(n=n, mean_x=mean_x, var_x=var_x)
            s1y = sums[:, 3]
            return ArmMoments(
                n=n,
                mean_x=mean_x,
                var_x=var_x,
                mean_y=self.mu_y + s1y / n,
                var_y=(sums[:, 4] - s1y * s1y / n) / dof,
                cov_xy=(sums[:, 5] - s1x * s1y / n) / dof,
            )


class BucketSplitter:
    """Every metric's bucket columns side by side: one matrix product per variant gives
    all metrics' sums in all replays; the last variant is the total minus the others."""

    def __init__(self, buckets: Mapping[str, BucketMoments]) -> None:
        self.parts: dict[str, _Columns] = {}
        for name, b in buckets.items():
            try:
                self.parts[name] = _Columns.of(b)
            except StatsError as err:
                raise StatsError(f"metric '{name}': {err.message}") from None
        self.matrix = np.hstack([p.columns for p in self.parts.values()])
        self.total = self.matrix.sum(axis=0)
        self.slices: dict[str, slice] = {}
        start = 0
        for name, part in self.parts.items():
            self.slices[name] = slice(start, start + part.columns.shape[1])
            start += part.columns.shape[1]

    def split(self, arms: npt.NDArray[np.int8], n_variants: int) -> dict[str, list[ArmMoments]]:
        """Per metric, every variant's moments in every replay; ``arms`` is
        (replays, buckets) of variant indices."""
        if arms.shape[1] != self.matrix.shape[0]:
            raise StatsError("the assignment and the bucket moments disagree on the buckets")
        sums = [(arms == v).astype(np.float64) @ self.matrix for v in range(n_variants - 1)]
        sums.append(self.total[None, :] - sum(sums, np.zeros_like(sums[0])))
        return {
            name: [part.arm(s[:, self.slices[name]]) for s in sums]
            for name, part in self.parts.items()
        }


def _estimate(m: ArmMoments, independent_events: bool) -> tuple[Array, Array]:
    """Point estimate and its variance per replay: the mean, or the ratio by the delta
    method; ``independent_events`` is the deliberately wrong binomial variance r(1 − r)/ΣY
    that treats every denominator event as independent (test-only)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        if m.mean_y is None or m.var_y is None or m.cov_xy is None:
            return m.mean_x, m.var_x / m.n
        r = m.mean_x / m.mean_y
        if independent_events:
            return r, r * (1.0 - r) / (m.n * m.mean_y)
        resid = m.var_x - 2.0 * (r * m.cov_xy) + r * (r * m.var_y)
        return r, np.maximum(resid, 0.0) / m.n / m.mean_y / m.mean_y


def p_values(
    treatment: ArmMoments, control: ArmMoments, *, independent_events: bool = False
) -> Array:
    """Two-sided p-value per replay: Welch's t for means, a z test for ratios (as in
    ``stats.compare``); NaN where an arm has fewer than two units."""
    t_val, v_t = _estimate(treatment, independent_events)
    c_val, v_c = _estimate(control, independent_events)
    diff = t_val - c_val
    se = np.sqrt(v_t + v_c)
    with np.errstate(divide="ignore", invalid="ignore"):
        score = np.abs(diff) / se
        if treatment.mean_y is not None:
            p = 2.0 * st.norm.sf(score)
        else:
            w_t, w_c = v_t / (v_t + v_c), v_c / (v_t + v_c)
            df = 1.0 / (w_t * w_t / (treatment.n - 1) + w_c * w_c / (control.n - 1))
            p = 2.0 * st.t.sf(score, df)
    p = np.where(se == 0, np.where(diff == 0, 1.0, 0.0), p)
    return np.where((treatment.n < 2) | (control.n < 2), np.nan, p).astype(np.float64)
