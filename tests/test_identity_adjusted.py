"""Identity stitching with a pre-period: quantile metrics, CUPED and winsorising.

Two checks on the demo logs, written from the meaning rather than from the compiler:
- a cookie that stays a unit of its own (no account) has, in the stitched per-unit table,
  exactly the row it has without stitching: every metric column, the pre-period twins
  (``xpre_``, ``ypre_``, ``has_pre``, the planning halves ``xpre1_``/``xpre2_``) and a
  quantile metric's sorted values;
- for the merged accounts, an independent polars computation from the raw events: a
  quantile metric is the quantile of the values of all cookies of all analysed accounts
  (numpy's linear rule); the CUPED effect of revenue equals the treatment coefficient of
  the least-squares fit revenue ~ 1 + T + pre-period revenue + indicator (the equality
  CUPED rests on, see tests/test_cuped.py); a winsorised metric's cap is the 0.999
  quantile of the analysed accounts' values.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl
import pytest

from metricforge.engines.duckdb import DuckDBEngine
from metricforge.report.scorecard import build
from metricforge.runner import execute
from metricforge.spec import load_plan
from metricforge.spec.model import Plan
from tests.conftest import PIPELINES, SAMPLE
from tests.test_cuped import ols_treatment_coefficients
from tests.test_identity import per_cookie
from tests.test_pre_period import unit_rows

PRE = dt.timedelta(days=14)
WINDOW = dt.timedelta(days=14)


def accounts_spec(folder: Path) -> Path:
    """checkout_accounts with a 14-day pre-period, CUPED, a quantile and a winsorised
    metric (paths made absolute so the spec can live in ``folder``)."""
    text = (PIPELINES / "checkout_accounts.toml").read_text(encoding="utf-8")
    text = text.replace('"../', f'"{PIPELINES.parent.as_posix()}/')
    text = text.replace("window_days = 14", "window_days = 14\npre_period_days = 14\ncuped = true")
    text = text.replace(
        'guardrails = ["unsubscribes", "page_latency"]',
        'guardrails = ["unsubscribes", "page_latency", "page_latency_p95"]',
    )
    text = text.replace('"net_value"]', '"net_value", "revenue_winsorised"]')
    spec = folder / "accounts.toml"
    spec.write_text(text, encoding="utf-8")
    return spec


@pytest.fixture(scope="module")
def plan(tmp_path_factory: pytest.TempPathFactory) -> Plan:
    plan = load_plan(accounts_spec(tmp_path_factory.mktemp("accounts")))
    assert plan.spec.stitch_to == "account_id" and plan.spec.cuped
    assert plan.metric("page_latency_p95").kind.value == "quantile"
    return plan


@pytest.mark.slow
def test_cookies_that_stay_units_keep_every_column(plan: Plan) -> None:
    halves = dataclasses.replace(plan, history_split=True)  # as `metricforge plan` scans
    plain = dataclasses.replace(halves, spec=dataclasses.replace(plan.spec, stitch_to=None))
    stitched, alone = unit_rows(halves), unit_rows(plain)
    for name in ("xpre1_revenue", "xpre2_click_through", "ypre_click_through", "has_pre"):
        assert name in stitched.columns
    assert "v_page_latency_p95" in stitched.columns
    own = stitched.filter(pl.col("identity") == "no_id").drop("identity", "n_cookies")
    assert own.height > 1000
    same = alone.join(own.select("unit"), on="unit").sort("unit")
    own = own.sort("unit").select(same.columns)
    for column in same.columns:
        assert own[column].equals(same[column]), column
    assert own["v_page_latency_p95"].list.len().sum() > 10_000  # the lists are compared


def reference() -> pl.DataFrame:
    """Per account (or cookie without one): variant, exclusion flags, revenue and its
    pre-period value, whether there was any pre-period event, and all page-load latencies
    of the analysis windows, from the raw demo events."""
    events = pl.read_parquet(SAMPLE / "events" / "**" / "*.parquet", hive_partitioning=False)
    cookies = per_cookie(events, "checkout_layout")
    firsts = cookies.select("unit_id", "first_ts")
    joined = events.join(firsts, left_on="cookie_id", right_on="unit_id")
    before = (pl.col("ts") >= pl.col("first_ts") - PRE) & (pl.col("ts") < pl.col("first_ts"))
    within = (pl.col("ts") >= pl.col("first_ts")) & (pl.col("ts") < pl.col("first_ts") + WINDOW)
    loads = (pl.col("event") == "page_load") & pl.col("latency_ms").is_not_null()
    extra = joined.group_by("cookie_id").agg(
        pl.col("value").filter(before & (pl.col("event") == "purchase")).sum().alias("pre_rev"),
        before.any().alias("has_pre"),
        pl.col("latency_ms").filter(within & loads).alias("latencies"),
    )
    cookies = cookies.join(extra, left_on="unit_id", right_on="cookie_id", how="left")
    one = pl.col("accounts").list.len() == 1
    keyed = cookies.with_columns(
        pl.when(one)
        .then(pl.col("accounts").list.first())
        .otherwise(pl.col("unit_id"))
        .alias("key"),
        pl.col("pre_rev").fill_null(0.0),
        pl.col("has_pre").fill_null(False),
        pl.col("latencies").fill_null([]),
    )
    return keyed.group_by(one.alias("account"), "key").agg(
        pl.col("variant").sort_by("first_ts").first(),
        ((pl.col("variant").n_unique() > 1) | (pl.col("n_var").max() > 1)).alias("two"),
        pl.col("bot").any(),
        pl.col("revenue").sum(),
        pl.col("pre_rev").sum(),
        pl.col("has_pre").any(),
        pl.col("latencies").list.explode(keep_nulls=False, empty_as_null=False).drop_nulls(),
        pl.len().alias("n_cookies"),
    )


@pytest.fixture(scope="module")
def card_and_reference(plan: Plan) -> tuple[dict[str, dict[str, Any]], pl.DataFrame]:
    rows = build(execute(plan, DuckDBEngine())).rows
    clean = reference().filter(~pl.col("two") & ~pl.col("bot"))
    return {r["metric"]: r for r in rows}, clean


@pytest.mark.slow
def test_stitched_quantile_equals_the_reference(
    card_and_reference: tuple[dict[str, dict[str, Any]], pl.DataFrame],
) -> None:
    card, clean = card_and_reference
    row = card["page_latency_p95"]
    assert clean.filter(pl.col("n_cookies") > 1).height > 20  # merged accounts take part
    for variant, value, n in (
        ("treatment", row["value"], row["n_units"]),
        ("control", row["control_value"], row["n_units_control"]),
    ):
        frame = clean.filter(pl.col("variant") == variant)
        values = frame["latencies"].explode().drop_nulls().to_numpy()
        assert value == pytest.approx(np.quantile(values, 0.95), rel=1e-12), variant
        assert n == frame.filter(pl.col("latencies").list.len() > 0).height
    assert row["method"].startswith("outer-ci")


@pytest.mark.slow
def test_stitched_cuped_and_cap_equal_the_reference(
    card_and_reference: tuple[dict[str, dict[str, Any]], pl.DataFrame],
) -> None:
    card, clean = card_and_reference
    arm = (clean["variant"] == "treatment").cast(int).to_numpy()
    revenue = clean["revenue"].cast(pl.Float64).to_numpy()
    pre = clean["pre_rev"].cast(pl.Float64).to_numpy()
    has = clean["has_pre"].cast(pl.Float64).to_numpy()
    assert 0.1 < has.mean() < 0.9  # units with and without pre-period data
    (expected,) = ols_treatment_coefficients(revenue, arm, pre, has)
    row = card["revenue"]
    assert row["method"] == "welch+cuped"
    assert row["abs_effect"] == pytest.approx(expected, rel=1e-9)
    assert row["value"] == pytest.approx(revenue[arm == 1].mean(), rel=1e-12)
    capped = card["revenue_winsorised"]
    cap = np.quantile(revenue, 0.999)
    assert capped["cap"] == pytest.approx(cap, rel=1e-12)
    pre_capped = np.minimum(pre, np.quantile(pre, 0.999))
    (expected,) = ols_treatment_coefficients(np.minimum(revenue, cap), arm, pre_capped, has)
    assert capped["abs_effect"] == pytest.approx(expected, rel=1e-9)
