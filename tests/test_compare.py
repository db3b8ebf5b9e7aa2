"""compare A B: the demo under bot filters v1 and v2, comparability, shared columns, outputs."""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import shutil
from pathlib import Path
from typing import Any

import polars as pl
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from typer.testing import CliRunner

from metricforge.cli import app
from metricforge.compare import NOT_COMPARABLE_EXIT
from tests.conftest import PIPELINES, ROOT, SAMPLE
from tests.test_rerun import partitioned_case

START, END, WINDOW = dt.datetime(2026, 9, 15), dt.datetime(2026, 9, 29), dt.timedelta(days=14)
UA_TOKENS = ("bot", "crawler", "spider", "headless")  # the user-agent rule of bots@1 and @2
SESSION_LIMIT = 60  # bots@2 only


def invoke(*args: str | Path) -> Any:
    return CliRunner().invoke(app, [str(a) for a in args])


def independent(
    session_limit: int | None, cutoff: dt.datetime | None = None
) -> dict[str, tuple[int, float]]:
    """variant -> (units analysed, mean revenue per unit) of checkout_layout, in plain polars,
    under the user-agent rule and (bots@2) the per-session event limit; with ``cutoff``, as
    seen at that time (only exposures and events before it)."""
    last = END if cutoff is None else min(END, cutoff)
    first = (
        pl.read_parquet(SAMPLE / "exposures.parquet")
        .filter(pl.col("experiment") == "checkout_layout")
        .filter(pl.col("ts").is_between(START, last, closed="left"))
        .group_by("unit_id")
        .agg(
            pl.col("ts").min().alias("t0"),
            pl.col("variant").min(),
            pl.col("variant").n_unique().alias("n_var"),
        )
    )
    events = pl.read_parquet(SAMPLE / "events" / "**" / "*.parquet", hive_partitioning=False)
    if cutoff is not None:
        events = events.filter(pl.col("ts") < cutoff)
    seen = events.join(first, left_on="cookie_id", right_on="unit_id").filter(
        (pl.col("ts") >= pl.col("t0")) & (pl.col("ts") < pl.col("t0") + WINDOW)
    )
    agent = pl.col("user_agent").str.to_lowercase()
    bots = set(
        seen.filter(pl.any_horizontal([agent.str.contains(t) for t in UA_TOKENS]))["cookie_id"]
    )
    if session_limit is not None:
        sizes = seen.group_by("cookie_id", "session_id").len()
        bots |= set(sizes.filter(pl.col("len") > session_limit)["cookie_id"])
    kept = first.filter((pl.col("n_var") == 1) & ~pl.col("unit_id").is_in(list(bots)))
    spend = (
        seen.filter(pl.col("event") == "purchase").group_by("cookie_id").agg(pl.col("value").sum())
    )
    per_unit = kept.join(spend, left_on="unit_id", right_on="cookie_id", how="left").fill_null(0)
    out = per_unit.group_by("variant").agg(pl.len(), pl.col("value").mean())
    return {r["variant"]: (r["len"], r["value"]) for r in out.iter_rows(named=True)}


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("demo")
    spec = PIPELINES / "checkout_layout.toml"
    for name, ref in (("v1", "bots@1"), ("v2", "bots@2")):
        result = invoke("run", spec, "--out", root / name, "--bot-filter", ref)
        assert result.exit_code == 0, result.output
    return root


def test_demo_under_v1_and_v2_is_flagged_not_comparable(demo: Path) -> None:
    result = invoke("compare", demo / "v1", demo / "v2", "--out", demo / "cmp_refused")
    assert result.exit_code == NOT_COMPARABLE_EXIT
    assert "NOT COMPARABLE: bot filter: A bots@1" in result.output
    assert "error: the results are not comparable" in result.output
    assert "--force" in result.output
    assert not (demo / "cmp_refused").exists()


def test_demo_filter_change_shown_and_checked_independently(demo: Path) -> None:
    result = invoke("compare", demo / "v1", demo / "v2", "--force", "--out", demo / "cmp")
    assert result.exit_code == 0, result.output
    assert "revenue" in result.output and "units analysed" in result.output
    data = json.loads((demo / "cmp" / "comparison.json").read_text())
    assert data["comparable"] is False and data["forced"] is True
    assert data["not_comparable_because"][0].startswith("bot filter: A bots@1")
    v1, v2 = independent(None), independent(SESSION_LIMIT)
    for row in data["variants"]:
        variant = row["variant"]
        assert (row["units_a"], row["units_b"]) == (v1[variant][0], v2[variant][0])
        assert row["units_change"] == v2[variant][0] - v1[variant][0] < 0  # v2 removes more
    decision = next(r for r in data["rows"] if r["role_a"] == "decision")
    assert decision["metric"] == "revenue"
    assert decision["value_a"] == pytest.approx(v1["treatment"][1], rel=1e-9)
    assert decision["value_b"] == pytest.approx(v2["treatment"][1], rel=1e-9)
    assert decision["control_value_a"] == pytest.approx(v1["control"][1], rel=1e-9)
    assert decision["value_change"] == pytest.approx(v2["treatment"][1] - v1["treatment"][1])
    assert decision["n_units_a"] == v1["treatment"][0]
    table = pq.read_table(demo / "cmp" / "comparison.parquet")
    assert table.num_rows == len(data["rows"])
    assert table.column("value_change").to_pylist() == [r["value_change"] for r in data["rows"]]


def test_two_runs_under_one_filter_are_comparable_and_equal(demo: Path, tmp_path: Path) -> None:
    shutil.copytree(demo / "v2", tmp_path / "copy")
    result = invoke("compare", demo / "v2", tmp_path / "copy", "--out", tmp_path / "cmp")
    assert result.exit_code == 0, result.output
    assert "comparable" in result.output and "NOT" not in result.output
    data = json.loads((tmp_path / "cmp" / "comparison.json").read_text())
    assert data["comparable"] is True and data["also_differs"] == []
    for row in data["rows"]:
        assert row["value_change"] == 0 and row["abs_effect_change"] == 0


def test_compares_on_shared_columns(demo: Path, tmp_path: Path) -> None:
    """B gained a column (as other scorecard versions do) and A lacks one: still compared."""
    for name in ("a", "b"):
        shutil.copytree(demo / "v2", tmp_path / name)
    path_a, path_b = tmp_path / "a" / "scorecard.parquet", tmp_path / "b" / "scorecard.parquet"
    pq.write_table(pq.read_table(path_a).drop_columns(["unit_label"]), path_a)
    b = pq.read_table(path_b)
    pq.write_table(
        b.append_column("figure_from_a_newer_tool", pa.array([0.5] * b.num_rows)), path_b
    )
    result = invoke("compare", tmp_path / "a", tmp_path / "b", "--out", tmp_path / "cmp")
    assert result.exit_code == 0, result.output
    data = json.loads((tmp_path / "cmp" / "comparison.json").read_text())
    assert "unit_label" not in data["columns"] and "figure_from_a_newer_tool" not in data["columns"]
    assert "value" in data["columns"] and "p_value" in data["columns"]


def test_different_definitions_are_not_comparable_and_named(tmp_path: Path) -> None:
    shutil.copytree(ROOT / "metric_defs", tmp_path / "defs")
    spec = partitioned_case(tmp_path / "exp", tmp_path / "defs")
    assert invoke("run", spec, "--out", tmp_path / "r" / "a").exit_code == 0
    shop = tmp_path / "defs" / "shop.toml"
    text = shop.read_text()
    old = 'event = "purchase"\nunit_label = "purchases per user"'
    assert old in text
    shop.write_text(text.replace(old, old.replace('"purchase"', '["purchase", "refund"]')))
    assert invoke("run", spec, "--out", tmp_path / "r" / "b").exit_code == 0
    result = invoke("compare", tmp_path / "r" / "a", tmp_path / "r" / "b")
    assert result.exit_code == NOT_COMPARABLE_EXIT
    assert "metric definitions: A" in result.output and "(differ in purchases)" in result.output


def test_compare_writes_all_or_nothing(demo: Path, tmp_path: Path) -> None:
    out = tmp_path / "cmp"
    for _ in range(2):  # a previous comparison is replaced whole
        assert invoke("compare", demo / "v2", demo / "v2", "--out", out).exit_code == 0
        assert sorted(p.name for p in out.iterdir()) == ["comparison.json", "comparison.parquet"]
    stale = tmp_path / "stale"
    stale.mkdir()
    (stale / "notes.txt").write_text("old")
    result = invoke("compare", demo / "v2", demo / "v2", "--out", stale)
    assert result.exit_code == 2 and "not empty" in result.output  # not ours to replace
    assert [p.name for p in stale.iterdir()] == ["notes.txt"]
    inside = invoke("compare", demo / "v2", demo / "v2", "--out", demo / "v2" / "cmp")
    assert inside.exit_code == 2 and not (demo / "v2" / "cmp").exists()
    blocked = tmp_path / "file"
    blocked.write_text("x")
    result = invoke("compare", demo / "v2", demo / "v2", "--out", blocked)
    assert result.exit_code == 2 and "not a folder" in result.output
    assert blocked.read_text() == "x"
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []


def test_not_a_result_folder(tmp_path: Path, demo: Path) -> None:
    result = invoke("compare", tmp_path, demo / "v2")
    assert result.exit_code == 2 and "scorecard.parquet" in result.output


def test_filters_lists_released_versions_with_hash_and_date() -> None:
    result = invoke("filters", ROOT / "metric_defs" / "filters")
    assert result.exit_code == 0, result.output
    for version, date in ((1, "2026-08-01"), (2, "2026-10-15")):
        path = ROOT / "metric_defs" / "filters" / f"bots-v{version}.toml"
        line = next(li for li in result.output.splitlines() if f"bots@{version}" in li)
        assert date in line and hashlib.sha256(path.read_bytes()).hexdigest() in line


def test_run_under_another_filter_version_is_stamped(demo: Path) -> None:
    card = json.loads((demo / "v1" / "scorecard.json").read_text())
    flt = ROOT / "metric_defs" / "filters" / "bots-v1.toml"
    assert (card["stamp"]["bot_filter"], card["stamp"]["bot_filter_version"]) == ("bots", 1)
    assert card["stamp"]["bot_filter_sha256"] == hashlib.sha256(flt.read_bytes()).hexdigest()
    manifest = json.loads((demo / "v1" / "manifest.json").read_text())
    assert manifest["options"]["bot_filter"] == "bots@1"
    assert 'bot_filter = "bots@2"' in manifest["spec"]["text"]  # the spec said otherwise


def test_unknown_filter_version_is_refused(tmp_path: Path) -> None:
    spec = PIPELINES / "checkout_layout.toml"
    result = invoke("run", spec, "--out", tmp_path / "out", "--bot-filter", "bots@3")
    assert result.exit_code == 2
    assert "'bots@3' is not released" in result.output and "did you mean" in result.output
    assert list(tmp_path.iterdir()) == []


def test_cuped_and_winsorise_columns_are_compared(demo: Path, tmp_path: Path) -> None:
    """checkout_layout adjusts by CUPED and caps revenue_winsorised: both columns compared."""
    result = invoke("compare", demo / "v1", demo / "v2", "--force", "--out", tmp_path / "cmp")
    assert result.exit_code == 0, result.output
    data = json.loads((tmp_path / "cmp" / "comparison.json").read_text())
    assert {"variance_reduction", "cap", "p_value_adjusted"} <= set(data["columns"])
    capped = next(r for r in data["rows"] if r["metric"] == "revenue_winsorised")
    assert capped["cap_a"] > 0 and capped["cap_b"] > 0
    assert capped["cap_change"] == pytest.approx(capped["cap_b"] - capped["cap_a"])
    adjusted = [r for r in data["rows"] if str(r["method_a"]).endswith("+cuped")]
    assert len(adjusted) == len(data["rows"]) - 1  # all but the quantile, page_latency_p95
    for row in adjusted:
        assert 0 < row["variance_reduction_a"] < 1 and 0 < row["variance_reduction_b"] < 1
        assert row["variance_reduction_change"] == pytest.approx(
            row["variance_reduction_b"] - row["variance_reduction_a"]
        )


def test_long_variant_names_are_shown_whole(demo: Path, tmp_path: Path) -> None:
    """Factorial contrasts share a prefix (main:…, interaction:…): never cut in the table."""
    long = "interaction:wide_photo*price_badge_and_more"
    for name in ("a", "b"):
        shutil.copytree(demo / "v2", tmp_path / name)
        path = tmp_path / name / "scorecard.parquet"
        table = pq.read_table(path)
        names = [long if v == "treatment" else v for v in table["variant"].to_pylist()]
        index = table.schema.get_field_index("variant")
        pq.write_table(table.set_column(index, "variant", pa.array(names)), path)
    result = invoke("compare", tmp_path / "a", tmp_path / "b")
    assert result.exit_code == 0, result.output
    assert result.output.count(long) == pq.read_table(path).num_rows
