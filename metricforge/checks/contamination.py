"""Units exposed to more than one variant.

Such a unit is counted once, in the variant of its first exposure (ties in the spec's
order), and by default left out of the analysis (``two_variant_units = "exclude"``;
``"first_exposure"`` analyses it in that variant instead). The check fails when their share
of the exposed units differs between variants (chi-square at srm_alpha: the exclusion would
then remove units unevenly) or exceeds ``max_two_variant_share`` (default 5%, a project
choice: beyond that the assignment itself is broken, even if evenly).
"""

from __future__ import annotations

from typing import Any

from metricforge.checks.result import check, verdict
from metricforge.runner import RunData
from metricforge.stats.independence import share_differs


def two_variant_counts(data: RunData) -> tuple[dict[str, int], dict[str, int]]:
    """Per variant: units seen in two variants, and exposed units (from ``exposure_days``)."""
    names = data.plan.spec.variant_names
    two, exposed = dict.fromkeys(names, 0), dict.fromkeys(names, 0)
    for row in data.tables["exposure_days"].to_pylist():
        if row["variant"] in two:
            two[row["variant"]] += int(row["n_two"])
            exposed[row["variant"]] += int(row["n_units"])
    return two, exposed


def two_variants(data: RunData) -> dict[str, Any]:
    spec = data.plan.spec
    names = spec.variant_names
    two, exposed = two_variant_counts(data)
    test = share_differs([two[v] for v in names], [exposed[v] for v in names])
    total = sum(exposed.values())
    share = sum(two.values()) / total if total else 0.0
    per_variant = ", ".join(
        f"{v} {two[v]} ({two[v] / exposed[v]:.2%})" if exposed[v] else f"{v} 0" for v in names
    )
    fate = "excluded" if spec.two_variant_units.value == "exclude" else "kept in first variant"
    return check(
        "units_in_two_variants",
        verdict(test.p_value >= spec.srm_alpha and share <= spec.max_two_variant_share),
        f"{per_variant} of exposed units, {fate}; chi2={test.chi2:.4g}, p={test.p_value:.4g};"
        f" {share:.2%} overall (at most {spec.max_two_variant_share:.2%})",
        p_value=test.p_value,
        threshold=spec.srm_alpha,
        share=share,
        max_share=spec.max_two_variant_share,
        units=two,
        exposed_units=exposed,
        policy=spec.two_variant_units.value,
    )
