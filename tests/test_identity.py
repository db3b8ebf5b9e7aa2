"""Identity stitching and exclusion counts against an independent polars computation.

The reference is written from the meaning, not from the compiler: each exposed cookie's
window of events, the accounts seen in it, cookies with exactly one account merged into
that account (sums add, a mean is summed values over summed counts, "any" flags take the
maximum, the first exposure the earliest), a merged account whose cookies saw different
variants counted as seen in two variants, bots decided per cookie.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
from pathlib import Path
from typing import Any

import polars as pl
import pytest
import sqlglot
import sqlglot.expressions as exp
from typer.testing import CliRunner

from metricforge.cli import app
from metricforge.compile.query import compile_plan
from metricforge.engines.duckdb import DuckDBEngine
from metricforge.runner import execute
from metricforge.spec import load_plan
from metricforge.spec.model import BotRule, RuleKind
from tests.conftest import PIPELINES, SAMPLE, T0, event, successful_sessions, write_case

START, END, WINDOW = dt.datetime(2026, 9, 15), dt.datetime(2026, 9, 29), dt.timedelta(days=14)
UA_TOKENS = ("bot", "crawler", "spider", "headless")  # bots@2 rule 1
SESSION_LIMIT = 60  # bots@2 rule 2
SUMS = ("revenue", "purchases", "refunds", "unsubscribes", "mobile_purchases")


def per_cookie(events: pl.DataFrame, experiment: str) -> pl.DataFrame:
    """One row per exposed cookie: variant at first exposure, window sums, bot verdict."""
    exposures = pl.read_parquet(SAMPLE / "exposures.parquet").filter(
        (pl.col("experiment") == experiment) & (pl.col("ts") >= START) & (pl.col("ts") < END)
    )
    first = exposures.group_by("unit_id").agg(
        pl.col("ts").min().alias("first_ts"),
        pl.col("variant").sort_by("ts").first().alias("variant"),  # no ties in the demo
        pl.col("variant").n_unique().alias("n_var"),
    )
    joined = events.join(first, left_on="cookie_id", right_on="unit_id").filter(
        (pl.col("ts") >= pl.col("first_ts")) & (pl.col("ts") < pl.col("first_ts") + WINDOW)
    )
    is_ = lambda e: pl.col("event") == e  # noqa: E731
    ua = pl.col("user_agent").str.to_lowercase()
    sessions = joined.group_by("cookie_id", "session_id").agg(
        pl.len().alias("size"),
        pl.any_horizontal([ua.str.contains(t, literal=True) for t in UA_TOKENS])
        .any()
        .alias("ua_bot"),
        pl.col("ts").filter(is_("click")).alias("clicks"),
        pl.col("ts").filter(is_("back")).alias("backs"),
    )
    good = successful_sessions(sessions["clicks"], sessions["backs"])
    sessions = sessions.with_columns(pl.Series("good", good, dtype=pl.Int64))
    by_session = sessions.group_by("cookie_id").agg(
        ((pl.col("size") > SESSION_LIMIT) | pl.col("ua_bot")).any().alias("bot"),
        pl.col("good").sum(),
        pl.len().alias("n_sessions"),
    )
    sums = joined.group_by("cookie_id").agg(
        pl.col("value").filter(is_("purchase")).sum().alias("revenue"),
        is_("purchase").sum().alias("purchases"),
        is_("refund").sum().alias("refunds"),
        is_("unsubscribe").sum().alias("unsubscribes"),
        (is_("purchase") & (pl.col("device") == "mobile")).sum().alias("mobile_purchases"),
        is_("impression").sum().alias("impressions"),
        is_("click").sum().alias("clicks"),
        pl.col("latency_ms")
        .filter(is_("page_load") & pl.col("latency_ms").is_not_null())
        .sum()
        .alias("lat_sum"),
        (is_("page_load") & pl.col("latency_ms").is_not_null()).sum().alias("lat_n"),
        pl.col("account_id").drop_nulls().unique().alias("accounts"),
    )
    return (
        first.join(sums, left_on="unit_id", right_on="cookie_id", how="left")
        .join(by_session, left_on="unit_id", right_on="cookie_id", how="left")
        .with_columns(
            pl.col("bot").fill_null(False),
            pl.col("accounts").fill_null([]),
            *[pl.col(c).fill_null(0) for c in (*SUMS, "impressions", "clicks", "lat_sum")],
            *[pl.col(c).fill_null(0) for c in ("lat_n", "good", "n_sessions")],
        )
    )


def stitched(cookies: pl.DataFrame) -> pl.DataFrame:
    """Cookies with exactly one account merged per account; others stay as they are."""
    one = pl.col("accounts").list.len() == 1
    keyed = cookies.with_columns(
        pl.when(one).then(pl.lit("account")).otherwise(pl.lit("cookie")).alias("kind"),
        pl.when(one)
        .then(pl.col("accounts").list.first())
        .otherwise(pl.col("unit_id"))
        .alias("key"),
    )
    return keyed.group_by("kind", "key").agg(
        pl.len().alias("n_cookies"),
        pl.col("variant").sort_by("first_ts").first(),
        ((pl.col("variant").n_unique() > 1) | (pl.col("n_var").max() > 1)).alias("two"),
        pl.col("bot").any(),
        *[pl.col(c).sum() for c in (*SUMS, "impressions", "clicks", "lat_sum", "lat_n")],
        pl.col("good").sum(),
        pl.col("n_sessions").sum(),
    )


@pytest.fixture(scope="module")
def reference() -> pl.DataFrame:
    events = pl.read_parquet(SAMPLE / "events" / "**" / "*.parquet", hive_partitioning=False)
    return stitched(per_cookie(events, "checkout_layout"))


@pytest.fixture(scope="module")
def card_path(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("accounts") / "out"
    result = CliRunner().invoke(
        app, ["run", str(PIPELINES / "checkout_accounts.toml"), "--out", str(out)]
    )
    assert result.exit_code == 0, result.output
    assert "identity: " in result.stdout
    return out


@pytest.fixture(scope="module")
def card(card_path: Path) -> dict[str, Any]:
    data: dict[str, Any] = json.loads((card_path / "scorecard.json").read_text())
    return data


def test_stitched_runs_are_byte_identical(card_path: Path, tmp_path: Path) -> None:
    """Merged float sums are ordered by cookie, so parallel runs agree to the bit."""
    again = tmp_path / "again"
    result = CliRunner().invoke(
        app, ["run", str(PIPELINES / "checkout_accounts.toml"), "--out", str(again)]
    )
    assert result.exit_code == 0, result.output
    for name in ("scorecard.json", "scorecard.parquet"):
        assert (again / name).read_bytes() == (card_path / name).read_bytes()


def test_stitching_counts_equal_the_reference(
    reference: pl.DataFrame, card: dict[str, Any]
) -> None:
    accounts = reference.filter(pl.col("kind") == "account")
    identity = card["identity"]
    assert identity["unit"] == "cookie_id" and identity["stitch_to"] == "account_id"
    assert identity["exposed_ids"] == reference["n_cookies"].sum()
    assert identity["on_one_stitch_id"] == accounts["n_cookies"].sum()
    assert identity["stitch_ids"] == accounts.height
    several = accounts.filter(pl.col("n_cookies") > 1)
    assert identity["stitch_ids_of_several"] == several.height
    assert identity["merged_ids"] == several["n_cookies"].sum()
    assert identity["units"] == reference.height
    assert identity["on_several_stitch_ids"] == 0  # the demo has no shared devices
    assert identity["merged_ids"] > 100  # people who cleared their cookies: stitching works


def test_exclusion_counts_equal_the_reference(
    reference: pl.DataFrame, card: dict[str, Any]
) -> None:
    variants = {v["variant"]: v for v in card["variants"]}
    for name, frame in reference.group_by("variant"):
        got = variants[str(name[0])]
        assert got["exposed_units"] == frame.height
        assert got["bot_units"] == frame.filter(pl.col("bot")).height
        assert got["seen_in_two_variants"] == frame.filter(pl.col("two")).height
        assert got["contaminated_units"] == frame.filter(pl.col("two") & ~pl.col("bot")).height
        assert got["units"] == frame.filter(~pl.col("two") & ~pl.col("bot")).height
    assert reference.filter(pl.col("two")).height > 10  # accounts in both variants exist


def test_stitched_metric_values_equal_the_reference(
    reference: pl.DataFrame, card: dict[str, Any]
) -> None:
    clean = reference.filter(~pl.col("two") & ~pl.col("bot"))
    for row in card["metrics"]:
        for variant, value, n in (
            (row["variant"], row["value"], row["n_units"]),
            (row["control"], row["control_value"], row["n_units_control"]),
        ):
            frame = clean.filter(pl.col("variant") == variant)
            name = row["metric"]
            if name in SUMS:
                expected = frame[name].cast(pl.Float64).mean()
            elif name == "buyer_share":
                expected = (frame["purchases"] > 0).cast(pl.Float64).mean()
            elif name == "net_value":
                expected = (frame["revenue"] - 25.0 * frame["unsubscribes"]).mean()
            elif name == "click_through":
                expected = frame["clicks"].sum() / frame["impressions"].sum()
            elif name == "session_success":
                expected = frame["good"].sum() / frame["n_sessions"].sum()
            else:
                assert name == "page_latency"
                frame = frame.filter(pl.col("lat_n") > 0)
                expected = (frame["lat_sum"] / frame["lat_n"]).mean()
            assert value == pytest.approx(expected, rel=1e-9), (name, variant)
            assert n == frame.height, (name, variant)


def test_edge_cases_of_stitching(tmp_path: Path) -> None:
    """A shared cookie (two accounts) stays a unit; an account on a bot cookie is a bot;
    means merge as summed values over summed counts; first exposure decides the variant."""
    t1 = T0 + dt.timedelta(hours=1)
    rows = [
        # account A: two cookies, same variant; a mean of 100, 200 | 600 -> 300
        event("a1", "page_load", 1, account_id="A", latency_ms=100.0),
        event("a1", "page_load", 2, account_id="A", latency_ms=200.0),
        event("a2", "page_load", 1, account_id="A", latency_ms=600.0, session_id="s-a2"),
        # account B: two cookies in different variants -> seen in two variants
        event("b1", "purchase", 1, account_id="B", value=5.0),
        event("b2", "purchase", 90, account_id="B", value=7.0),  # after its exposure
        # cookie s: two accounts -> kept as cookie s
        event("s", "purchase", 1, account_id="C", value=1.0),
        event("s", "purchase", 2, account_id="D", value=1.0),
        # account E: one cookie a bot by user agent
        event("e1", "purchase", 1, account_id="E", value=3.0),
        event("e2", "page_load", 1, account_id="E", user_agent="SomeBot/1.0"),
        # plain cookies without an account
        *[event(f"n{i}", "purchase", 1, value=float(i)) for i in range(6)],
        *[event(f"n{i}", "page_load", 3, latency_ms=300.0 - 200 * (i % 2)) for i in range(4)],
    ]
    variant = {"a1": "control", "a2": "control", "b1": "treatment", "b2": "control"}
    variant |= {"s": "treatment", "e1": "treatment", "e2": "treatment"}
    variant |= {f"n{i}": ("control", "treatment")[i % 2] for i in range(6)}
    when = {"b2": t1}  # b1 (treatment) was first
    exposures = [
        {"unit_id": u, "experiment": "case", "variant": v, "ts": when.get(u, T0)}
        for u, v in variant.items()
    ]
    spec = write_case(tmp_path, rows, exposures, diagnostics=("page_latency",))
    stitch_case(spec)
    result = CliRunner().invoke(app, ["run", str(spec), "--out", str(tmp_path / "o")])
    assert result.exit_code == 0, result.output
    card = json.loads((tmp_path / "o" / "scorecard.json").read_text())
    check_edge_cards(card)
    # a unit deny list names cookies: denying cookie a2 makes all of account A a bot
    plan = load_plan(spec)
    denied = dataclasses.replace(
        plan.bot_filter, rules=(BotRule(RuleKind.DENY_UNIT, tokens=("a2",)),)
    )
    data = execute(dataclasses.replace(plan, bot_filter=denied), DuckDBEngine())
    assert data.counts["control"].bot_units == 1
    assert data.counts["control"].units == 3  # n0, n2, n4


def stitch_case(spec: Path) -> None:
    spec.write_text(
        spec.read_text().replace(
            'unit = "cookie_id"', 'unit = "cookie_id"\nstitch_to = "account_id"'
        )
    )


def check_edge_cards(card: dict[str, Any]) -> None:
    assert card["identity"] == {
        "unit": "cookie_id",
        "stitch_to": "account_id",
        "exposed_ids": 13,
        "on_one_stitch_id": 6,
        "without_stitch_id": 6,
        "on_several_stitch_ids": 1,
        "stitch_ids": 3,
        "merged_ids": 6,
        "stitch_ids_of_several": 3,
        "units": 10,
    }
    variants = {v["variant"]: v for v in card["variants"]}
    assert variants["treatment"]["seen_in_two_variants"] == 1  # B, first seen in treatment
    assert variants["treatment"]["bot_units"] == 1  # E
    latency = next(r for r in card["metrics"] if r["metric"] == "page_latency")
    # A's mean is (100 + 200 + 600) / 3 = 300 (not the mean of its cookies' means, 375),
    # n0 and n2 have 300 each; treatment n1 and n3 have 100 each
    assert latency["control_value"] == pytest.approx(300.0)
    assert latency["value"] == pytest.approx(100.0)
    revenue = next(r for r in card["metrics"] if r["metric"] == "revenue")
    assert revenue["n_units"] == 4  # n1, n3, n5 and the shared cookie s
    assert revenue["value"] == pytest.approx((1 + 3 + 5 + 2) / 4)
    assert revenue["n_units_control"] == 4  # A, n0, n2, n4


def test_stitch_to_must_name_another_id_column(tmp_path: Path) -> None:
    spec = write_case(tmp_path, [event("u", "purchase", value=1.0)], [])
    spec.write_text(
        spec.read_text().replace(
            'unit = "cookie_id"', 'unit = "cookie_id"\nstitch_to = "acount_id"'
        )
    )
    result = CliRunner().invoke(app, ["check", str(spec)])
    assert result.exit_code == 2
    assert "experiment.stitch_to" in result.stderr and "did you mean 'account_id'" in result.stderr


def test_without_stitching_nothing_changes(card: dict[str, Any], tmp_path: Path) -> None:
    result = CliRunner().invoke(
        app, ["run", str(PIPELINES / "checkout_layout.toml"), "--out", str(tmp_path / "o")]
    )
    assert result.exit_code == 0
    plain = json.loads((tmp_path / "o" / "scorecard.json").read_text())
    assert "identity" not in plain
    assert sum(v["exposed_units"] for v in plain["variants"]) == card["identity"]["exposed_ids"]


@pytest.mark.parametrize("dialect", ["duckdb", "spark"])
def test_stitching_stays_one_scan_and_renders_for_each_dialect(dialect: str) -> None:
    plan = load_plan(PIPELINES / "checkout_accounts.toml")
    run = compile_plan(plan, dialect)
    tables = [t.name for t in run.unit_rows.find_all(exp.Table)]
    assert tables.count("events") == 1 and tables.count("exposures") == 1
    ctes = [c.alias for c in run.unit_rows.find_all(exp.CTE)]
    assert ctes == ["first_exposure", "sessions", "units", "identified", "stitched"]
    assert [name for name, _ in run.results] == [
        "moments",
        "data_quality",
        "exposure_days",
        "bot_events",
        "identities",
    ]
    for _, tree in run.statements(dialect):
        sqlglot.parse_one(tree.sql(dialect=dialect), read=dialect)
