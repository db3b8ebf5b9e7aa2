"""What identity stitching did: how many unit ids were merged into how many stitch ids."""

from __future__ import annotations

from typing import Any

from metricforge.compile.stitch import NO_ID, SEVERAL_IDS, STITCHED
from metricforge.runner import RunData


def identity_section(data: RunData) -> dict[str, Any] | None:
    """None without stitching; else the counts (of exposed ids, before the bot filter)."""
    spec = data.plan.spec
    if not spec.stitch_to:
        return None
    rows = {r["identity"]: r for r in data.tables["identities"].to_pylist()}

    def get(kind: str, col: str) -> int:
        return int(rows[kind][col]) if kind in rows else 0

    return {
        "unit": spec.unit,
        "stitch_to": spec.stitch_to,
        "exposed_ids": sum(int(r["n_cookies"]) for r in rows.values()),
        "on_one_stitch_id": get(STITCHED, "n_cookies"),
        "without_stitch_id": get(NO_ID, "n_cookies"),
        "on_several_stitch_ids": get(SEVERAL_IDS, "n_cookies"),
        "stitch_ids": get(STITCHED, "n_units"),
        "merged_ids": get(STITCHED, "n_merged_cookies"),
        "stitch_ids_of_several": get(STITCHED, "n_merged_units"),
        "units": sum(int(r["n_units"]) for r in rows.values()),
    }


def describe(section: dict[str, Any]) -> str:
    unit, to = section["unit"], section["stitch_to"]
    return (
        f"identity: {section['merged_ids']} {unit}s merged into"
        f" {section['stitch_ids_of_several']} {to}s; {section['on_one_stitch_id']} of"
        f" {section['exposed_ids']} exposed {unit}s analysed as their {to},"
        f" {section['without_stitch_id']} without one, {section['on_several_stitch_ids']}"
        f" with several kept as they are: {section['units']} units"
    )
