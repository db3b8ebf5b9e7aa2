"""Trust checks: is the experiment healthy enough for its numbers to be read?

One module per check; ``trust_section`` runs them all on a run's data, in the order the
scorecard lists them. A/A replay (``aa``) is a command of its own.
"""

from __future__ import annotations

from typing import Any

from metricforge.checks.bots import bot_share
from metricforge.checks.contamination import two_variants
from metricforge.checks.lock import lock_check
from metricforge.checks.result import FAIL, WARN
from metricforge.checks.srm import sample_ratio, sample_ratio_by_day
from metricforge.runner import RunData


def trust_section(data: RunData) -> dict[str, Any]:
    checks = [
        lock_check(data.plan, data.provenance),
        sample_ratio(data),
        sample_ratio_by_day(data),
        bot_share(data),
        two_variants(data),
    ]
    return {
        "verdict": FAIL if any(c["status"] == FAIL for c in checks) else "pass",
        "warnings": sum(c["status"] == WARN for c in checks),
        "checks": checks,
    }
