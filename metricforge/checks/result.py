"""The shape every trust check returns: a name, a status, a one-line figure, details."""

from __future__ import annotations

from typing import Any

PASS, FAIL, WARN = "pass", "fail", "warn"


def check(name: str, status: str, figure: str, **details: Any) -> dict[str, Any]:
    """A check's entry in the trust section. ``warn`` is shown but does not fail the run."""
    assert status in (PASS, FAIL, WARN)
    return {"check": name, "status": status, "passed": status != FAIL, "figure": figure, **details}


def verdict(ok: bool) -> str:
    return PASS if ok else FAIL
