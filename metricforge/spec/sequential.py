"""[sequential] of an experiment spec: settings of the always-valid section.

[sequential]
effect = 0.05                                # relative effect to be most sensitive to
baseline = { revenue = 3.2, purchases = 0.41 }  # optional: expected control values
"""

from __future__ import annotations

import math

from metricforge.errors import closest
from metricforge.spec.model import Sequential
from metricforge.spec.tomlfile import Section

MAX_EFFECT = 10.0


def load_sequential(sec: Section, reported: tuple[str, ...]) -> Sequential:
    """The [sequential] table; ``reported`` are the spec's decision, guardrails, diagnostics."""
    sec.check_keys({"effect", "baseline"})
    effect = sec.number("effect")
    if effect is None:
        raise sec.error("required key is missing", "effect")
    if not 0.0 < effect <= MAX_EFFECT:
        raise sec.error(
            f"effect is a relative effect (0.05 = 5%), 0 < effect <= {MAX_EFFECT:g}", "effect"
        )
    baselines: list[tuple[str, float]] = []
    if sec.has("baseline"):
        table = sec.sub("baseline")
        for name in table.table:
            if name not in reported:
                raise table.error(
                    f"'{name}' is not a metric of this spec {list(reported)}",
                    name,
                    suggestion=closest(name, reported),
                )
            value = table.number(name)
            if not (math.isfinite(value) and value != 0.0):
                raise table.error("a baseline is the metric's expected control value, not 0", name)
            baselines.append((name, value))
    return Sequential(effect=effect, baselines=tuple(baselines))
