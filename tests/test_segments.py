"""Segment breakdowns ([segments]): the rows against an independent computation from the
raw demo logs and reference libraries, the minimum cell size, no unit ids, spec errors,
specs without [segments] unchanged, and byte-identical reruns."""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl
import pyarrow.parquet as pq
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from statsmodels.stats.multitest import multipletests
from statsmodels.stats.proportion import confint_proportions_2indep
from typer.testing import CliRunner

from metricforge.cli import app
from metricforge.stats.cells import plan_cells
from metricforge.stats.moments import Moments, merge_moments
from tests.conftest import PIPELINES, SAMPLE, event, exposure, write_case
from tests.test_demo_independent import analysed

DEMO = PIPELINES / "checkout_layout.toml"
MIN_UNITS = 500  # pipelines/checkout_layout.toml [segments] min_units


def invoke(*args: object) -> Any:
    return CliRunner().invoke(app, [str(a) for a in args])


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("seg") / "checkout_layout"
    result = invoke("run", DEMO, "--out", out, "--threads", "1")
    assert result.exit_code == 0, result.output
    return out


@pytest.fixture(scope="module")
def units() -> pl.DataFrame:
    """The demo's analysed units with revenue, purchases and each unit's device and country:
    the value on its earliest event in its window that has one (to the millisecond, ties:
    the smallest value), computed here from the raw logs with polars alone."""
    events = pl.read_parquet(SAMPLE / "events" / "**" / "*.parquet", hive_partitioning=False)
    kept, ev = analysed(events, "checkout_layout")
    ms = pl.col("ts").dt.epoch("ms")
    table = kept.select("unit_id", "variant")
    for column in ("device", "country"):
        first = (
            ev.filter(pl.col(column).is_not_null())
            .with_columns(ms.alias("ms"))
            .sort("cookie_id", "ms", column)
            .group_by("cookie_id")
            .agg(pl.col(column).first())
        )
        table = table.join(first, left_on="unit_id", right_on="cookie_id", how="left")
    purchase = pl.col("event") == "purchase"
    money = ev.group_by("cookie_id").agg(
        pl.col("value").filter(purchase).sum().alias("revenue"),
        purchase.sum().alias("purchases"),
    )
    return table.join(money, left_on="unit_id", right_on="cookie_id", how="left").with_columns(
        pl.col("revenue").fill_null(0.0), pl.col("purchases").fill_null(0)
    )


def segment_rows(out: Path) -> list[dict[str, Any]]:
    rows: list[dict[str, Any]] = pq.read_table(out / "segments.parquet").to_pylist()
    return rows


def groups(units: pl.DataFrame, column: str) -> dict[str, pl.DataFrame]:
    """The shown values under the minimum-cell rule, computed here: a value with both
    cells at MIN_UNITS or more stands alone, the rest pool into (other)."""
    sizes = units.group_by(column, "variant").len()
    small = set(sizes.filter(pl.col("len") < MIN_UNITS)[column].to_list())
    small |= {v for v in units[column].unique() if sizes.filter(pl.col(column) == v).height < 2}
    out = {
        str(v): units.filter(pl.col(column) == v) for v in units[column].unique() if v not in small
    }
    if small:
        out["(other)"] = units.filter(pl.col(column).is_in(list(small)))
    return out


@pytest.mark.slow
@pytest.mark.parametrize("column", ["device", "country"])
def test_revenue_rows_equal_independent_welch(demo: Path, units: pl.DataFrame, column: str) -> None:
    rows = {
        r["segment_value"]: r
        for r in segment_rows(demo)
        if r["segment_column"] == column and r["metric"] == "revenue"
    }
    want = groups(units, column)
    assert set(rows) == set(want)
    if column == "country":  # the demo pools GB and SE (below 500 units per cell)
        assert rows["(other)"]["segment_kind"] == "other"
    for value, frame in want.items():
        row = rows[value]
        t = frame.filter(pl.col("variant") == "treatment")["revenue"].to_numpy()
        c = frame.filter(pl.col("variant") == "control")["revenue"].to_numpy()
        assert (row["n_units"], row["n_units_control"]) == (t.size, c.size)
        assert row["value"] == pytest.approx(t.mean(), rel=1e-10)
        assert row["control_value"] == pytest.approx(c.mean(), rel=1e-10)
        # reference: scipy.stats.ttest_ind(equal_var=False) (Welch), two-sided
        ref = stats.ttest_ind(t, c, equal_var=False)
        assert row["method"] == "welch"
        assert row["p_value"] == pytest.approx(ref.pvalue, rel=1e-8)
        low, high = ref.confidence_interval(0.95)
        assert row["abs_ci_low"] == pytest.approx(low, rel=1e-8)
        assert row["abs_ci_high"] == pytest.approx(high, rel=1e-8)
        assert row["rel_effect"] == pytest.approx(t.mean() / c.mean() - 1, rel=1e-10)


@pytest.mark.slow
def test_buyer_share_rows_equal_statsmodels_newcombe(demo: Path, units: pl.DataFrame) -> None:
    rows = {
        r["segment_value"]: r
        for r in segment_rows(demo)
        if r["segment_column"] == "device" and r["metric"] == "buyer_share"
    }
    for value, frame in groups(units, "device").items():
        row = rows[value]
        t = (frame.filter(pl.col("variant") == "treatment")["purchases"] > 0).to_numpy()
        c = (frame.filter(pl.col("variant") == "control")["purchases"] > 0).to_numpy()
        assert row["value"] == pytest.approx(t.mean(), rel=1e-12)
        # reference: statsmodels confint_proportions_2indep(method="newcomb") (Newcombe)
        low, high = confint_proportions_2indep(
            int(t.sum()), t.size, int(c.sum()), c.size, method="newcomb", compare="diff"
        )
        assert (row["abs_ci_low"], row["abs_ci_high"]) == pytest.approx((low, high), rel=1e-8)
        # reference: the pooled two-proportion z-test, scipy.stats.norm
        p = (t.sum() + c.sum()) / (t.size + c.size)
        z = (t.mean() - c.mean()) / math.sqrt(p * (1 - p) * (1 / t.size + 1 / c.size))
        assert row["method"] == "newcombe+z"
        assert row["p_value"] == pytest.approx(2 * stats.norm.sf(abs(z)), rel=1e-8)


@pytest.mark.slow
def test_adjusted_p_values_are_bh_across_all_segment_rows(demo: Path) -> None:
    rows = segment_rows(demo)
    p = [r["p_value"] for r in rows if r["p_value"] is not None]
    # reference: statsmodels multipletests(method="fdr_bh")
    want = multipletests(p, method="fdr_bh")[1]
    got = [r["p_value_adjusted"] for r in rows if r["p_value"] is not None]
    assert got == pytest.approx(list(want), rel=1e-12)
    assert all(r["adjustment"].startswith("bh (exploratory)") for r in rows if r["p_value"])
    assert {r["hypothesis"] for r in rows} == {"two-sided"}


@pytest.mark.slow
def test_demo_cells_section_and_no_unit_ids(demo: Path, units: pl.DataFrame) -> None:
    rows = segment_rows(demo)
    assert min(min(r["cell_units"], r["cell_units_control"]) for r in rows) >= MIN_UNITS
    card = json.loads((demo / "scorecard.json").read_text())
    section = card["segments"]
    assert section["exploratory"] is True and section["min_units"] == MIN_UNITS
    country = next(c for c in section["columns"] if c["column"] == "country")
    assert (country["values_pooled"], country["other"]) == (2, "shown")
    assert section["not_broken_down"] == [
        {"metric": "page_latency_p95", "reason": "quantile metric: not a per-unit statistic"}
    ]
    assert "revenue" in section["not_cuped_adjusted"]
    text = (demo / "segments.parquet").read_bytes() + json.dumps(section).encode()
    ids = set(units["unit_id"].to_list())
    for row in rows:  # no value of any row is a unit id
        assert not ids & {v for v in row.values() if isinstance(v, str)}
    assert not any(i.encode() in text for i in list(ids)[:2000])
    manifest = json.loads((demo / "manifest.json").read_text())
    digest = manifest["outputs"]["segments.parquet"]["sha256"]
    import hashlib

    assert hashlib.sha256((demo / "segments.parquet").read_bytes()).hexdigest() == digest


@pytest.mark.slow
def test_rerun_reproduces_segments_byte_for_byte(demo: Path, tmp_path: Path) -> None:
    result = invoke("rerun", demo / "manifest.json", "--out", tmp_path / "again", "--threads", "2")
    assert result.exit_code == 0, result.output
    assert "segments.parquet" in result.output and "REPRODUCED" in result.output
    same = (demo / "segments.parquet").read_bytes() == (
        tmp_path / "again" / "segments.parquet"
    ).read_bytes()
    assert same
    compared = invoke("compare", demo, tmp_path / "again", "--out", tmp_path / "cmp")
    assert "not compared: segment breakdowns" in compared.output
    history = (demo.parent / "metricforge-history.jsonl").read_text().splitlines()
    assert "segments.parquet" in json.loads(history[-1])["sha256"]


# ---------------------------------------------------------------- the minimum cell size


@settings(max_examples=300, deadline=None)
@given(
    counts=st.dictionaries(
        st.text(min_size=1, max_size=3),
        st.fixed_dictionaries({}, optional={"a": st.integers(0, 50), "b": st.integers(0, 50)}),
        max_size=8,
    ),
    min_units=st.integers(1, 60),
)
def test_no_shown_cell_below_min_units(counts: dict[str, dict[str, int]], min_units: int) -> None:
    plan = plan_cells(counts, ("a", "b"), min_units)
    assert set(plan.shown) | set(plan.pooled) == set(counts)
    assert not set(plan.shown) & set(plan.pooled)
    for value in plan.shown:
        assert min(counts[value].get("a", 0), counts[value].get("b", 0)) >= min_units
    other = [sum(counts[v].get(k, 0) for v in plan.pooled) for k in ("a", "b")]
    assert plan.other_shown == (bool(plan.pooled) and min(other) >= min_units)
    assert plan.suppressed == (bool(plan.pooled) and not plan.other_shown)


@settings(max_examples=200, deadline=None)
@given(
    values=st.lists(st.floats(-1e3, 1e3), min_size=2, max_size=40),
    cuts=st.lists(st.integers(1, 39), max_size=4),
)
def test_merged_moments_equal_the_whole(values: list[float], cuts: list[int]) -> None:
    x = np.array(values)
    edges = sorted({c for c in cuts if c < x.size})
    parts = np.split(x, edges)
    merged = merge_moments(
        [
            Moments.of_mean(p.size, float(p.mean()), float(p.var(ddof=1)) if p.size > 1 else 0.0)
            for p in parts
        ]
    )
    # reference: numpy mean and var(ddof=1) of the whole
    assert merged.n == x.size
    assert merged.mean_x == pytest.approx(x.mean(), rel=1e-9, abs=1e-9)
    assert merged.var_x == pytest.approx(x.var(ddof=1), rel=1e-9, abs=1e-6)


def _case(tmp_path: Path, sizes: dict[str, tuple[int, int]], min_units: int) -> Path:
    """Units per device and variant: (control, treatment); each buys once for 1 + i % 7."""
    events, exposures = [], []
    for device, (n_c, n_t) in sizes.items():
        for variant, n in (("control", n_c), ("treatment", n_t)):
            for i in range(n):
                unit = f"u-{device}-{variant}-{i}"
                exposures.append(exposure(unit, variant))
                events.append(event(unit, "purchase", device=device, value=1.0 + i % 7))
    spec = write_case(tmp_path, events, exposures)
    text = spec.read_text() + f'\n[segments]\nby = ["device"]\nmin_units = {min_units}\n'
    spec.write_text(text)
    return spec


@pytest.mark.parametrize(
    ("sizes", "shown", "pooled", "other"),
    [
        ({"desktop": (30, 30), "mobile": (25, 31)}, {"desktop", "mobile"}, 0, "none"),
        (
            {"desktop": (30, 30), "mobile": (12, 9), "tablet": (9, 12)},
            {"desktop", "(other)"},
            2,
            "shown",
        ),
        ({"desktop": (30, 30), "mobile": (3, 29)}, {"desktop"}, 1, "suppressed"),
        ({"desktop": (30, 30), "tv": (0, 41)}, {"desktop"}, 1, "suppressed"),
    ],
)
def test_pooling_and_suppression_end_to_end(
    tmp_path: Path, sizes: dict[str, tuple[int, int]], shown: set[str], pooled: int, other: str
) -> None:
    spec = _case(tmp_path, sizes, min_units=20)
    out = tmp_path / "out"
    result = invoke("run", spec, "--out", out, "--threads", "1")
    assert result.exit_code == 0, result.output
    rows = segment_rows(out)
    assert {r["segment_value"] for r in rows} == shown
    assert min(min(r["cell_units"], r["cell_units_control"]) for r in rows) >= 20
    column = json.loads((out / "scorecard.json").read_text())["segments"]["columns"][0]
    assert (column["values_pooled"], column["other"]) == (pooled, other)
    if other == "suppressed":  # the suppressed cell's size is nowhere in the outputs
        small = {str(n) for d, cells in sizes.items() if d != "desktop" for n in cells if n}
        section = json.loads((out / "scorecard.json").read_text())["segments"]
        assert not small & {str(v) for r in section["rows"] for v in r.values()}
        assert not small & {str(v) for v in column.values()}
    for r in rows:  # no unit id anywhere in a row
        assert not any(isinstance(v, str) and v.startswith("u-") for v in r.values())


def test_spec_without_segments_writes_no_segments(tmp_path: Path) -> None:
    spec = write_case(
        tmp_path,
        [event("a", "purchase", value=2.0), event("b", "purchase", value=1.0)],
        [exposure("a", "control"), exposure("b", "treatment")],
    )
    result = invoke("run", spec, "--out", tmp_path / "out", "--threads", "1")
    assert result.exit_code == 0, result.output
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == [
        "manifest.json",
        "scorecard.json",
        "scorecard.parquet",
    ]
    assert "segments" not in json.loads((tmp_path / "out" / "scorecard.json").read_text())
    assert "outputs" not in json.loads((tmp_path / "out" / "manifest.json").read_text())


# ---------------------------------------------------------------- spec errors


@pytest.mark.parametrize(
    ("table", "key", "words"),
    [
        ('by = ["devise"]', "segments.by", "did you mean 'device'"),
        ('by = ["cookie_id"]', "segments.by", "randomisation unit"),
        ('by = ["user_agent"]', "segments.by", "not a segment column"),
        ("by = []", "segments.by", "at least one"),
        ('by = ["device", "device"]', "segments.by", "listed twice"),
        ("min_units = 10", "segments.by", "required key is missing"),
        ('by = ["device"]\nmin_units = 0', "segments.min_units", "between 1 and"),
        ('by = ["device"]\nmin_units = 10000000000', "segments.min_units", "between 1 and"),
        ('by = ["device"]\nmin_units = 1.5', "segments.min_units", "expected an integer"),
        ('by = ["device"]\nmin_unit = 5', "segments.min_unit", "did you mean 'min_units'"),
    ],
)
def test_bad_segments_table_is_one_line_naming_file_and_key(
    tmp_path: Path, table: str, key: str, words: str
) -> None:
    spec = write_case(tmp_path, [event("a", "purchase", value=1.0)], [exposure("a", "control")])
    spec.write_text(spec.read_text() + f"\n[segments]\n{table}\n")
    result = invoke("run", spec, "--out", tmp_path / "out")
    assert result.exit_code == 2
    message = result.output.strip()
    assert len(message.splitlines()) == 1
    assert str(spec) in message and key in message and words in message
    assert not (tmp_path / "out").exists()


def test_segment_column_missing_from_the_events_is_one_line(tmp_path: Path) -> None:
    spec = write_case(tmp_path, [event("a", "purchase", value=1.0)], [exposure("a", "control")])
    events = pq.read_table(tmp_path / "events" / "part-0.parquet").drop(["country"])
    pq.write_table(events, tmp_path / "events" / "part-0.parquet")
    spec.write_text(spec.read_text() + '\n[segments]\nby = ["country"]\n')
    result = invoke("run", spec, "--out", tmp_path / "out")
    assert result.exit_code == 2
    assert len(result.output.strip().splitlines()) == 1
    assert "lacks column 'country'" in result.output
    assert not (tmp_path / "out").exists()


def test_metric_on_too_few_units_of_a_cell_is_withheld(tmp_path: Path) -> None:
    """page_latency (a mean of page loads) exists for 5 of each cell's 30 units: below
    min_units, so its rows carry no figures and no counts; revenue's rows are complete."""
    events, exposures = [], []
    for variant in ("control", "treatment"):
        for i in range(30):
            unit = f"u-{variant}-{i}"
            exposures.append(exposure(unit, variant))
            events.append(event(unit, "purchase", value=1.0 + i % 5))
            if i < 5:
                events.append(event(unit, "page_load", minutes=2.0, latency_ms=100.0 + i))
    spec = write_case(tmp_path, events, exposures, diagnostics=("page_latency",))
    spec.write_text(spec.read_text() + '\n[segments]\nby = ["device"]\nmin_units = 20\n')
    result = invoke("run", spec, "--out", tmp_path / "out", "--threads", "1")
    assert result.exit_code == 0, result.output
    rows = {r["metric"]: r for r in segment_rows(tmp_path / "out")}
    latency = rows["page_latency"]
    assert latency["method"].startswith("withheld")
    assert latency["n_units"] is None and latency["n_units_control"] is None
    assert all(latency[f] is None or math.isnan(latency[f]) for f in ("value", "p_value"))
    assert rows["revenue"]["n_units"] == 30 and rows["revenue"]["method"] == "welch"
    section = json.loads((tmp_path / "out" / "scorecard.json").read_text())["segments"]
    assert section["withheld_metric_rows"] == 1
