"""Guardrail non-inferiority margins in the spec: keys, values and their errors."""

from __future__ import annotations

from pathlib import Path

import pytest

from metricforge.errors import SpecError
from metricforge.spec.experiment import load_spec
from tests.conftest import PIPELINES


def _spec(folder: Path, margins: str) -> Path:
    text = (PIPELINES / "checkout_layout.toml").read_text()
    start = text.index("guardrail_margins")
    end = text.index("\n", start)
    path = folder / "spec.toml"
    path.write_text(text[:start] + margins + text[end:])
    return path


def test_margins_load(tmp_path: Path) -> None:
    spec = load_spec(
        _spec(tmp_path, "guardrail_margins = { page_latency = 0.02, unsubscribes = 0.1 }")
    )
    assert spec.guardrail_margins == (("page_latency", 0.02), ("unsubscribes", 0.1))


@pytest.mark.parametrize(
    ("margins", "message"),
    [
        ("guardrail_margins = { page_latncy = 0.02 }", "did you mean 'page_latency'"),
        ("guardrail_margins = { revenue = 0.02 }", "'revenue' is not a guardrail"),
        ("guardrail_margins = { page_latency = 1.5 }", "0 < m < 1"),
        ("guardrail_margins = { page_latency = 0 }", "0 < m < 1"),
        ('guardrail_margins = { page_latency = "2%" }', "expected a number"),
        ("guardrail_margins = 0.02", "expected a table"),
    ],
    ids=["typo", "not-guardrail", "too-big", "zero", "text", "not-table"],
)
def test_bad_margins_are_one_line_errors(tmp_path: Path, margins: str, message: str) -> None:
    with pytest.raises(SpecError) as err:
        load_spec(_spec(tmp_path, margins))
    line = err.value.one_line()
    assert "spec.toml" in line and "guardrail_margins" in line and message in line
    assert "\n" not in line
