"""Loading and validating definitions, filters and experiment specs."""

from metricforge.spec.experiment import load_plan, load_spec
from metricforge.spec.metrics import load_library

__all__ = ["load_library", "load_plan", "load_spec"]
