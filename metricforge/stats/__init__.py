"""Pure statistics on sufficient statistics; nothing here touches engines or files."""

from metricforge.stats.effects import Effect, compare, welch_df
from metricforge.stats.moments import Moments, ratio_point_and_variance
from metricforge.stats.srm import SrmResult, srm_test

__all__ = [
    "Effect",
    "Moments",
    "SrmResult",
    "compare",
    "ratio_point_and_variance",
    "srm_test",
    "welch_df",
]
