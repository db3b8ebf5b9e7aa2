"""``python -m metricforge``: the same command line as the ``metricforge`` script."""

from metricforge.cli import app

app(prog_name="metricforge")
