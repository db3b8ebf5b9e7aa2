"""A/A replay on hash buckets: re-randomise whole buckets of units, many times at once.

Units were reduced once to a few thousand hash buckets, each holding every metric's count,
means and sums of squared and cross deviations (M2) of its per-unit variables (x; x and y
for a ratio; with CUPED also the covariates) over its units. A replay assigns every
bucket to a variant (a salted 64-bit hash of replay and bucket against the planned split),
so a variant's moments are a merge of bucket moments. Merging uses deviations from the
overall mean, never raw power sums: with d_b = mean_b − μ,
    Σ(x − μ)² over an arm = Σ_b (M2_b + n_b d_b²),   Σ(x − μ) = Σ_b n_b d_b,
    M2_arm = Σ(x − μ)² − (Σ(x − μ))² / n_arm,
(and likewise for every pair of variables), where the subtracted term is about 1/n of the
first (the arm mean lies within a standard error of μ), so nothing cancels. All replays'
sums are one matrix product per arm. The p-values then come from the scorecard's own
functions (``p_values``).
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from metricforge.errors import StatsError
from metricforge.stats.cuped import PER_UNIT, RATIO, VectorsBatch, cuped_batch
from metricforge.stats.effects import compare_batch
from metricforge.stats.moments import MomentsBatch
from metricforge.stats.proportions import needs_exact

Array = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]
_U64 = npt.NDArray[np.uint64]


@dataclass(frozen=True)
class BucketMoments:
    """One metric's moments per bucket of its named per-unit variables: ``x`` (and ``y``
    for a ratio; with CUPED also the covariates, see ``stats.cuped``). ``n`` (buckets,),
    ``mean`` (buckets, k), ``m2`` (buckets, k, k): sums of products of deviations from the
    bucket's means (M2 = n · population (co)variance)."""

    names: tuple[str, ...]
    n: Array
    mean: Array
    m2: Array


@dataclass(frozen=True)
class ArmMoments:
    """One variant's moments of a metric's variables, per replay: ``n`` (R,), ``mean``
    (R, k), ``cov`` (R, k, k) with divisor n − 1."""

    names: tuple[str, ...]
    n: Array
    mean: Array
    cov: Array

    def mean_of(self, name: str) -> Array:
        return self.mean[:, self.names.index(name)]

    def cov_of(self, a: str, b: str) -> Array:
        return self.cov[:, self.names.index(a), self.names.index(b)]


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
    """One metric's bucket moments as deviation columns about its overall means: n, then
    Σ n_b d_b per variable, then Σ (M2_b + n_b d_b d_bᵀ) per pair of variables."""

    names: tuple[str, ...]
    mu: Array  # (k,) the overall means
    columns: Array  # (buckets, 1 + k + k(k+1)/2)

    @classmethod
    def of(cls, b: BucketMoments) -> _Columns:
        n = np.nan_to_num(b.n)
        total = n.sum()
        if total <= 0:
            raise StatsError("no units in any bucket")
        mean = np.where(n[:, None] > 0, np.nan_to_num(b.mean), 0.0)
        mu = (n @ mean) / total
        d = np.where(n[:, None] > 0, mean - mu, 0.0)
        s2 = np.nan_to_num(b.m2) + n[:, None, None] * d[:, :, None] * d[:, None, :]
        upper = np.triu_indices(len(b.names))
        return cls(b.names, mu, np.column_stack([n, n[:, None] * d, s2[:, upper[0], upper[1]]]))

    def arm(self, sums: Array) -> ArmMoments:
        """Moments of one arm per replay from its summed columns."""
        k = len(self.names)
        n, s1 = sums[:, 0], sums[:, 1 : 1 + k]
        upper = np.triu_indices(k)
        s2 = np.zeros((len(n), k, k))
        s2[:, upper[0], upper[1]] = sums[:, 1 + k :]
        s2[:, upper[1], upper[0]] = sums[:, 1 + k :]
        with np.errstate(divide="ignore", invalid="ignore"):
            mean = self.mu + s1 / n[:, None]
            cov = (s2 - s1[:, :, None] * s1[:, None, :] / n[:, None, None]) / (n - 1.0)[
                :, None, None
            ]
        return ArmMoments(self.names, n, mean, cov)


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


def _plain(arm: ArmMoments, proportion: bool, independent_events: bool) -> MomentsBatch:
    """The moments ``compare_batch`` takes, from an arm's variables x (and y).

    A proportion's count of units with value 1 is n · mean, a whole number up to rounding.
    ``independent_events`` (ratios, test-only) replaces the delta-method variance by the
    deliberately wrong binomial r(1 − r)/ΣY, as if every denominator event were
    independent: the residual variance is set to r(1 − r)·ȳ.
    """
    n, mean_x, var_x = arm.n, arm.mean_of("x"), arm.cov_of("x", "x")
    if "y" not in arm.names:
        if proportion:
            return MomentsBatch.of_proportions(n, np.rint(n * mean_x))
        return MomentsBatch.of_means(n, mean_x, var_x)
    mean_y, zero = arm.mean_of("y"), np.zeros_like(n)
    if independent_events:
        with np.errstate(divide="ignore", invalid="ignore"):
            r = mean_x / mean_y
        return MomentsBatch(n, mean_x, mean_y, r * (1.0 - r) * mean_y, zero, zero)
    return MomentsBatch(n, mean_x, mean_y, var_x, arm.cov_of("y", "y"), arm.cov_of("x", "y"))


def p_values(
    arms: Sequence[ArmMoments],
    *,
    proportion: bool = False,
    alpha: float = 0.05,
    side: int = 0,
    margin: float | None = None,
    independent_events: bool = False,
) -> list[Array]:
    """Per treatment arm (arms[1:]), its p-value against arms[0] in every replay, from the
    scorecard's own code: ``compare_batch`` with the metric's hypothesis (``side``,
    ``margin``) on the arms' moments; when the variables carry CUPED covariates
    (``stats.cuped.PER_UNIT`` or ``RATIO``), on the moments adjusted by ``cuped_batch``
    (θ pooled over all arms), falling back to the unadjusted test where an arm has no
    pre-period data or a proportion's 2×2 table needs Fisher's exact test, as the
    scorecard does. NaN where an arm has fewer than two units."""

    def tested(t: MomentsBatch, c: MomentsBatch) -> Array:
        return compare_batch(t, c, alpha=alpha, side=side, margin=margin).p_value

    plain = [_plain(a, proportion, independent_events) for a in arms]
    names = arms[0].names
    adjusted = (
        cuped_batch(names, [VectorsBatch(a.n, a.mean, a.cov) for a in arms])
        if names in (PER_UNIT, RATIO)
        else None
    )
    out = []
    for k in range(1, len(arms)):
        p = tested(plain[k], plain[0])
        if adjusted is not None:
            usable = adjusted.has_pre[k] & adjusted.has_pre[0]
            t, c = plain[k], plain[0]
            if t.successes is not None and c.successes is not None:  # small counts: exact
                usable &= ~needs_exact(t.successes, t.n, c.successes, c.n)
            p = np.where(usable, tested(adjusted.adjusted[k], adjusted.adjusted[0]), p)
        few = (arms[k].n < 2) | (arms[0].n < 2)
        out.append(np.where(few, np.nan, p).astype(np.float64))
    return out
