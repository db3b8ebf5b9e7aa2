"""Pure statistics on sufficient statistics; nothing here touches engines or files."""

from metricforge.stats.effects import Effect, EffectBatch, compare, compare_batch, welch_df
from metricforge.stats.moments import Moments, MomentsBatch, ratio_point_and_variance
from metricforge.stats.srm import SrmResult, srm_test

__all__ = [
    "Effect",
    "EffectBatch",
    "Moments",
    "MomentsBatch",
    "SrmResult",
    "compare",
    "compare_batch",
    "ratio_point_and_variance",
    "srm_test",
    "welch_df",
]
