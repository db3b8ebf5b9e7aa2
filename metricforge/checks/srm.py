"""Sample-ratio mismatch: all exposed units against the planned split, overall and per day.

Every exposed unit counts (before the bot filter and the two-variant rule), in the variant
of its first exposure. The per-day check tests each day of first exposure on its own and
controls the chance of a false alarm over all days together with a Bonferroni bound: a day
alarms at p < srm_alpha / days, so an experiment without a mismatch raises a per-day alarm
with probability at most srm_alpha however long it runs.
"""

from __future__ import annotations

from typing import Any

from metricforge.checks.result import check, verdict
from metricforge.runner import RunData
from metricforge.stats import srm_test


def _figure(chi2: float, df: int, p: float) -> str:
    return f"chi2={chi2:.4g}, df={df}, p={p:.4g}"


def sample_ratio(data: RunData) -> dict[str, Any]:
    spec = data.plan.spec
    names = spec.variant_names
    exposed = [data.counts[v].exposed for v in names]
    srm = srm_test(exposed, [s for _, s in spec.variants])
    return check(
        "sample_ratio_mismatch",
        verdict(srm.p_value >= spec.srm_alpha),
        _figure(srm.chi2, srm.df, srm.p_value),
        p_value=srm.p_value,
        threshold=spec.srm_alpha,
        observed=dict(zip(names, exposed, strict=True)),
        expected=dict(zip(names, [round(e, 6) for e in srm.expected], strict=True)),
    )


def sample_ratio_by_day(data: RunData) -> dict[str, Any]:
    spec = data.plan.spec
    names = spec.variant_names
    counts: dict[str, dict[str, int]] = {}
    for row in data.tables["exposure_days"].to_pylist():
        day = row["first_day"].isoformat()
        counts.setdefault(day, dict.fromkeys(names, 0))[row["variant"]] = int(row["n_units"])
    threshold = spec.srm_alpha / max(len(counts), 1)
    days: list[dict[str, Any]] = []
    for day in sorted(counts):
        observed = [counts[day][v] for v in names]
        result = srm_test(observed, [s for _, s in spec.variants])
        days.append(
            {
                "day": day,
                "observed": dict(zip(names, observed, strict=True)),
                "chi2": result.chi2,
                "p_value": result.p_value,
                "passed": bool(result.p_value >= threshold),
            }
        )
    worst = min(days, key=lambda d: d["p_value"])
    alarms = [d["day"] for d in days if not d["passed"]]
    figure = (
        f"{len(days)} days, smallest p={worst['p_value']:.4g} on {worst['day']};"
        f" alarm below {threshold:.3g} (srm_alpha / days)"
    )
    if alarms:
        figure += f"; mismatch on {', '.join(alarms)}"
    return check(
        "sample_ratio_mismatch_by_day",
        verdict(not alarms),
        figure,
        p_value=worst["p_value"],
        threshold=threshold,
        days=days,
    )
