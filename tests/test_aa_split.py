"""An A/A replay's p-value for a split is the p-value the scorecard prints for that split.

The split of one replay is written out as an exposure log (every analysed unit in the
variant its hash bucket got) and run through the ordinary pipeline; every metric's
scorecard p-value must equal the replay's. checkout_layout covers every kind of test the
scorecard has: CUPED (per-unit and ratio metrics), a winsorised metric, a proportion, a
one-sided harm guardrail and a non-inferiority guardrail with a margin.
"""

from __future__ import annotations

import hashlib
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl
import pyarrow.parquet as pq
import pytest
from typer.testing import CliRunner

from metricforge.checks.aa import (
    N_BUCKETS,
    NOT_JUDGED,
    Period,
    bucket_arrays,
    compiled_replay,
    quantile_arrays,
    replay_p_values,
)
from metricforge.cli import app
from metricforge.engines.duckdb import DuckDBEngine
from metricforge.report.scorecard import build
from metricforge.runner import execute, gather_inputs
from metricforge.sample import EXPOSURE_SCHEMA
from metricforge.spec import load_plan
from metricforge.stats.replay import BucketSplitter, assign, bucket_hashes
from tests.conftest import PIPELINES, SAMPLE
from tests.test_aa import aa_json

REPLAY = 5  # any replay
SEED = 1


def split_exposures(folder: Path, name: str, variants: list[str], arms: np.ndarray) -> Path:
    """The experiment's exposures inside its dates, units seen in two variants left out
    (the replay leaves them out too), each unit moved to the variant of its bucket."""
    spec = load_plan(PIPELINES / f"{name}.toml").spec
    exposures = pl.read_parquet(SAMPLE / "exposures.parquet").filter(
        (pl.col("experiment") == name) & (pl.col("ts") >= spec.start) & (pl.col("ts") < spec.end)
    )
    single = exposures.group_by("unit_id").agg(pl.col("variant").n_unique().alias("k"))
    kept = exposures.join(single.filter(pl.col("k") == 1), on="unit_id").drop("k")
    buckets = [int(hashlib.md5(u.encode()).hexdigest()[:3], 16) for u in kept["unit_id"]]
    moved = kept.with_columns(pl.Series("variant", [variants[arms[b]] for b in buckets]))
    path = folder / "exposures.parquet"
    pq.write_table(moved.to_arrow().select(EXPOSURE_SCHEMA.names).cast(EXPOSURE_SCHEMA), path)
    return path


def replay_and_card(
    folder: Path, name: str
) -> tuple[dict[str, dict[str, np.ndarray]], list[dict[str, Any]]]:
    """The p-values of replay REPLAY of the experiment period, and the scorecard rows of a
    run whose exposure log assigns every unit as that replay did."""
    plan = load_plan(PIPELINES / f"{name}.toml")
    spec = plan.spec
    inputs, _ = gather_inputs(plan)
    run = compiled_replay(plan, Period.EXPERIMENT, "duckdb")
    tables = DuckDBEngine().run(run, inputs)
    buckets, _ = bucket_arrays(plan, tables["buckets"], Period.EXPERIMENT)
    quantiles = quantile_arrays(plan, tables)
    replayed = replay_p_values(
        plan, BucketSplitter(buckets), REPLAY, 1, seed=SEED, quantiles=quantiles
    )
    salt = f"metricforge-aa|{spec.name}|{SEED}"
    arms = assign(bucket_hashes(salt, REPLAY, 1, N_BUCKETS), [s for _, s in spec.variants])[0]
    exposures = split_exposures(folder, spec.name, list(spec.variant_names), arms)
    text = (PIPELINES / f"{name}.toml").read_text(encoding="utf-8")
    text = text.replace('"../sample_data/exposures.parquet"', f'"{exposures.as_posix()}"')
    text = text.replace('"../', f'"{PIPELINES.parent.as_posix()}/')
    (folder / "split.toml").write_text(text, encoding="utf-8")
    return replayed, build(execute(load_plan(folder / "split.toml"), DuckDBEngine())).rows


@pytest.mark.slow
def test_a_replay_p_value_is_the_scorecard_p_value_of_its_split(tmp_path: Path) -> None:
    replayed, rows = replay_and_card(tmp_path, "checkout_layout")
    assert {row["metric"] for row in rows} == set(replayed)
    for row in rows:
        expected = replayed[row["metric"]][row["variant"]][0]
        assert row["p_value"] == pytest.approx(expected, rel=1e-8, abs=1e-12), row["metric"]
    # every kind of test took part
    methods = {r["metric"]: r["method"] for r in rows}
    assert {"welch+cuped", "delta+cuped", "outer-ci"} <= set(methods.values())
    assert methods["buyer_share"] == "welch+cuped"  # a proportion, CUPED-adjusted
    hypotheses = {r["hypothesis"].split(":")[0] for r in rows}
    assert {"two-sided", "one-sided harm"} <= hypotheses
    assert any(h.startswith("non-inferiority") for h in hypotheses)
    assert any(r["cap"] is not None for r in rows)


@pytest.mark.slow
def test_a_replay_of_proportions_without_cuped_is_the_scorecard_p_value(tmp_path: Path) -> None:
    """homepage_aa has no CUPED: its proportion is tested by z (or Fisher) in both."""
    replayed, rows = replay_and_card(tmp_path, "homepage_aa")
    methods = set()
    assert {row["metric"] for row in rows} == set(replayed)
    for row in rows:
        expected = replayed[row["metric"]][row["variant"]][0]
        assert row["p_value"] == pytest.approx(expected, rel=1e-8, abs=1e-12), row["metric"]
        methods.add(row["method"])
    assert {"welch", "delta", "newcombe+z", "outer-ci"} <= methods


def test_the_report_names_what_it_replays_and_how() -> None:
    report = aa_json("checkout_layout.toml", "--replays", "40", "--period", "experiment")
    rows = {r["metric"]: r for r in report["rows"]}
    assert rows["page_latency"]["margin"] == 0.02
    assert rows["page_latency"]["verdict"] == NOT_JUDGED
    assert rows["unsubscribes"]["hypothesis"].startswith("one-sided harm")
    statistics = {name: r["statistic"] for name, r in rows.items()}
    assert statistics.pop("page_latency_p95") == "outer-ci"
    assert set(statistics.values()) == {"cuped-adjusted"}
    assert report["skipped"] == []
    assert any(n.startswith("CUPED: metrics are replayed adjusted") for n in report["notes"])
    assert any(n.startswith("quantile metrics are replayed") for n in report["notes"])
    report = aa_json("checkout_layout.toml", "--replays", "40")
    assert {r["statistic"] for r in report["rows"]} == {"unadjusted", "outer-ci"}
    assert any("checks the unadjusted variance" in n for n in report["notes"])
    shown = CliRunner().invoke(
        app, ["aa", str(PIPELINES / "checkout_layout.toml"), "--replays", "40"]
    )
    [p95] = [line for line in shown.stdout.splitlines() if "page_latency_p95" in line]
    assert "one-sided harm, outer CI" in p95 and "cuped" not in p95
    assert "not replayable" not in shown.stdout
