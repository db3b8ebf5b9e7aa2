"""Bot-filter impact by variant: the share of units and of events the filter removed.

The alarm is a chi-square test that the removed share of exposed units is the same in every
variant (a treatment that changes how its traffic is classified is itself a finding). The
removed share of events is reported with a unit-level test for information only: events of
one unit are not independent, so it is a ratio of per-unit sums (removed events / events)
compared by the delta method; a few heavy bots with thousands of events dominate it, which
makes its normal approximation too rough to raise an alarm at p < 0.001.
"""

from __future__ import annotations

from typing import Any

from metricforge.checks.result import check, verdict
from metricforge.errors import StatsError
from metricforge.runner import RunData
from metricforge.stats import Moments, compare
from metricforge.stats.independence import share_differs


def _event_moments(data: RunData) -> dict[str, Moments]:
    out = {}
    for row in data.tables["bot_events"].to_pylist():
        out[row["variant"]] = Moments(
            n=int(row["n_units"]),
            mean_x=float(row["mean_removed"]),
            mean_y=float(row["mean_events"]),
            var_x=float(row["var_removed"] or 0.0),
            var_y=float(row["var_events"] or 0.0),
            cov_xy=float(row["cov_removed_events"] or 0.0),
        )
    return out


def event_shares(data: RunData) -> tuple[dict[str, float | None], dict[str, float | None]]:
    """Per variant the removed share of events; per treatment variant the delta-method
    p-value of its difference from control (None where it cannot be computed)."""
    spec = data.plan.spec
    moments = _event_moments(data)
    shares: dict[str, float | None] = {}
    for v in spec.variant_names:
        m = moments.get(v)
        shares[v] = m.mean_x / m.mean_y if m is not None and m.mean_y > 0 else None
    p_values: dict[str, float | None] = {}
    for v in spec.variant_names[1:]:
        try:
            p_values[v] = compare(moments[v], moments[spec.control]).p_value
        except (KeyError, StatsError):
            p_values[v] = None
    return shares, p_values


def _pct(value: float | None) -> str:
    return "–" if value is None else f"{value:.2%}"


def bot_share(data: RunData) -> dict[str, Any]:
    spec = data.plan.spec
    names = spec.variant_names
    exposed = [data.counts[v].exposed for v in names]
    bots = [data.counts[v].bot_units for v in names]
    units = share_differs(bots, exposed)
    shares, p_events = event_shares(data)
    unit_shares = ", ".join(
        f"{v} {b / e:.2%}" for v, b, e in zip(names, bots, exposed, strict=True) if e
    )
    event_text = ", ".join(f"{v} {_pct(shares[v])}" for v in names)
    event_p = ", ".join(
        f"p={p:.4g}" if p is not None else "p=–" for p in (p_events[v] for v in names[1:])
    )
    return check(
        "bot_share_by_variant",
        verdict(units.p_value >= spec.srm_alpha),
        f"units removed {unit_shares}; chi2={units.chi2:.4g}, p={units.p_value:.4g};"
        f" events removed {event_text} (delta method {event_p}, not an alarm)",
        p_value=units.p_value,
        threshold=spec.srm_alpha,
        bot_units=dict(zip(names, bots, strict=True)),
        exposed_units=dict(zip(names, exposed, strict=True)),
        event_share=shares,
        event_share_p_value=p_events,
    )
