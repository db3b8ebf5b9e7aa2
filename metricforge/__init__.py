"""metricforge: declarative experiment metrics compiled to SQL, with stamped scorecards."""

__version__ = "0.1.0"
