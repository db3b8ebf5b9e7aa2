"""The demo scorecards against an independent computation in plain polars.

The reference below is written from the metric definitions' meaning, not from the
compiler: it joins, windows, filters bots and aggregates with polars' own operations.
"""

from __future__ import annotations

import datetime as dt
import json
import math
import tomllib
from pathlib import Path
from typing import Any

import polars as pl
import pytest
from typer.testing import CliRunner

from metricforge.cli import app
from tests.conftest import DEMO_EXPERIMENTS, PIPELINES, SAMPLE, successful_sessions

START, END, WINDOW = dt.datetime(2026, 9, 15), dt.datetime(2026, 9, 29), dt.timedelta(days=14)
UA_TOKENS = ("bot", "crawler", "spider", "headless")  # bots@2 rule 1
SESSION_LIMIT = 60  # bots@2 rule 2
REVENUE_CAP_LEVEL = 0.999  # metric_defs: revenue_winsorised winsorise
P95 = 0.95  # metric_defs: page_latency_p95 q


@pytest.fixture(scope="module")
def events() -> pl.DataFrame:
    return pl.read_parquet(SAMPLE / "events" / "**" / "*.parquet", hive_partitioning=False)


def analysed(events: pl.DataFrame, experiment: str) -> tuple[pl.DataFrame, pl.DataFrame]:
    """(analysed units with variant and first exposure, their events in their windows)."""
    exp = (
        pl.read_parquet(SAMPLE / "exposures.parquet")
        .filter(
            (pl.col("experiment") == experiment) & (pl.col("ts") >= START) & (pl.col("ts") < END)
        )
        .group_by("unit_id")
        .agg(
            pl.col("ts").min().alias("first_ts"),
            pl.col("variant").min(),
            pl.col("variant").n_unique().alias("n_var"),
        )
    )
    joined = events.join(exp, left_on="cookie_id", right_on="unit_id").filter(
        (pl.col("ts") >= pl.col("first_ts")) & (pl.col("ts") < pl.col("first_ts") + WINDOW)
    )
    ua = pl.col("user_agent").str.to_lowercase()
    ua_bot = joined.filter(pl.any_horizontal([ua.str.contains(t, literal=True) for t in UA_TOKENS]))
    big = joined.group_by("cookie_id", "session_id").len().filter(pl.col("len") > SESSION_LIMIT)
    bots = set(ua_bot["cookie_id"]) | set(big["cookie_id"])
    units = exp.filter((pl.col("n_var") == 1) & ~pl.col("unit_id").is_in(list(bots)))
    return units, joined.filter(pl.col("cookie_id").is_in(units["unit_id"].implode()))


def reference(events: pl.DataFrame, experiment: str) -> dict[str, dict[str, tuple[float, int]]]:
    """metric -> variant -> (value, n units)."""
    units, ev = analysed(events, experiment)

    def per_unit(expr: pl.Expr, name: str, frame: pl.DataFrame = ev) -> pl.DataFrame:
        agg = frame.group_by("cookie_id").agg(expr.alias(name))
        out = units.join(agg, left_on="unit_id", right_on="cookie_id", how="left")
        return out.with_columns(pl.col(name).fill_null(0))

    is_ = lambda e: pl.col("event") == e  # noqa: E731
    cols = {
        "revenue": pl.col("value").filter(is_("purchase")).sum(),
        "purchases": is_("purchase").sum(),
        "refunds": is_("refund").sum(),
        "unsubscribes": is_("unsubscribe").sum(),
        "mobile_purchases": (is_("purchase") & (pl.col("device") == "mobile")).sum(),
        "impressions": is_("impression").sum(),
        "clicks": is_("click").sum(),
    }
    table = units
    for name, expr in cols.items():
        table = table.join(per_unit(expr, name).select("unit_id", name), on="unit_id")
    table = table.with_columns(
        (pl.col("purchases") > 0).cast(pl.Float64).alias("buyer_share"),
        (pl.col("revenue") - 25.0 * pl.col("unsubscribes")).alias("net_value"),
    )
    # revenue_winsorised: revenue capped at its 0.999 quantile (linear interpolation) over
    # the pooled per-unit values of all analysed units of all variants
    revenue = table["revenue"].cast(pl.Float64)
    cap = float(revenue.quantile(REVENUE_CAP_LEVEL, "linear"))
    table = table.with_columns(revenue.clip(upper_bound=cap).alias("revenue_winsorised"))
    # dwell success per session: a click with no back within (t, t + 30 s]
    sessions = (
        ev.filter(pl.col("session_id").is_not_null())
        .group_by("cookie_id", "session_id")
        .agg(
            pl.col("ts").filter(is_("click")).alias("clicks"),
            pl.col("ts").filter(is_("back")).alias("backs"),
        )
    )
    good = successful_sessions(sessions["clicks"], sessions["backs"])
    sessions = sessions.with_columns(pl.Series("good", good, dtype=pl.Float64))
    sess = sessions.group_by("cookie_id").agg(pl.col("good").sum(), pl.len().alias("n_sess"))
    table = table.join(sess, left_on="unit_id", right_on="cookie_id", how="left").with_columns(
        pl.col("good").fill_null(0), pl.col("n_sess").fill_null(0)
    )
    latency = (
        ev.filter(is_("page_load") & pl.col("latency_ms").is_not_null())
        .group_by("cookie_id")
        .agg(pl.col("latency_ms").mean().alias("lat"))
    )
    out: dict[str, dict[str, tuple[float, int]]] = {"revenue_cap": {"all": (cap, table.height)}}
    # p95 of the event-level latencies of each variant's analysed units (linear rule)
    loads = ev.filter(is_("page_load") & pl.col("latency_ms").is_not_null()).join(
        units.select("unit_id", "variant"), left_on="cookie_id", right_on="unit_id"
    )
    for variant, frame in loads.group_by("variant"):
        p95 = float(frame["latency_ms"].quantile(P95, "linear"))
        out.setdefault("page_latency_p95", {})[str(variant[0])] = (
            p95,
            frame["cookie_id"].n_unique(),
        )
    for variant, frame in table.group_by("variant"):
        v = str(variant[0])
        n = frame.height
        for name in (*cols, "buyer_share", "net_value", "revenue_winsorised"):
            out.setdefault(name, {})[v] = (float(frame[name].cast(pl.Float64).mean()), n)
        out.setdefault("click_through", {})[v] = (
            frame["clicks"].sum() / frame["impressions"].sum(),
            n,
        )
        out.setdefault("session_success", {})[v] = (frame["good"].sum() / frame["n_sess"].sum(), n)
        lat = frame.join(latency, left_on="unit_id", right_on="cookie_id")
        out.setdefault("page_latency", {})[v] = (float(lat["lat"].mean()), lat.height)
    return out


@pytest.fixture(scope="module")
def scorecards(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    out = {}
    for name in DEMO_EXPERIMENTS:
        target = tmp_path_factory.mktemp(name) / "out"
        result = CliRunner().invoke(
            app, ["run", str(PIPELINES / f"{name}.toml"), "--out", str(target)]
        )
        assert result.exit_code == 0, result.output
        out[name] = target
    return out


def contrast_weights(spec: dict[str, Any]) -> dict[str, dict[str, float]]:
    """The main effects and the interaction of a 2×2 spec as weights per variant, written
    from their textbook definitions: main effect = mean of the two variants at a factor's
    other level minus the mean of the two at the control's level; interaction
    = (μ11 − μ10) − (μ01 − μ00)."""
    control, factors = spec["experiment"]["control"], spec["factors"]
    f, g = factors
    other = {
        name: {v: level != levels[control] for v, level in levels.items()}
        for name, levels in factors.items()
    }
    weights = {
        f"main:{name}": {v: 0.5 if up else -0.5 for v, up in other[name].items()} for name in (f, g)
    }
    weights[f"interaction:{f}*{g}"] = {
        v: 1.0 if other[f][v] == other[g][v] else -1.0 for v in factors[f]
    }
    return weights


@pytest.mark.parametrize("experiment", DEMO_EXPERIMENTS)
def test_every_value_matches_independent_computation(
    experiment: str, events: pl.DataFrame, scorecards: dict[str, Path]
) -> None:
    expected = reference(events, experiment)
    spec = tomllib.loads((PIPELINES / f"{experiment}.toml").read_text())
    metrics = spec["metrics"]
    reported = {metrics["decision"], *metrics["guardrails"], *metrics["diagnostics"]}
    rows = json.loads((scorecards[experiment] / "scorecard.json").read_text())["metrics"]
    assert {r["metric"] for r in rows} == reported
    assert reported <= set(expected)
    control = spec["experiment"]["control"]
    arms = [v for v in spec["experiment"]["variants"] if v != control]
    contrasts = contrast_weights(spec) if "factors" in spec else {}
    assert len(rows) == len(reported) * (len(arms) + len(contrasts))
    for row in rows:
        ref = expected[row["metric"]]
        where = (row["metric"], row["variant"])
        if row["contrast"] is None:
            assert row["value"] == pytest.approx(ref[row["variant"]][0], rel=1e-9), where
            assert row["control_value"] == pytest.approx(ref[control][0], rel=1e-9), where
            assert row["n_units"] == ref[row["variant"]][1], where
            assert row["n_units_control"] == ref[control][1], where
        else:  # a factorial contrast of the variants' values
            weights = contrasts[row["variant"]]
            plus = {v: w for v, w in weights.items() if w > 0}
            minus = {v: -w for v, w in weights.items() if w < 0}
            effect = sum(w * ref[v][0] for v, w in weights.items())
            assert row["abs_effect"] == pytest.approx(effect, rel=1e-9, abs=1e-12), where
            assert row["value"] == pytest.approx(
                sum(w * ref[v][0] for v, w in plus.items()), rel=1e-9
            )
            assert row["control_value"] == pytest.approx(
                sum(w * ref[v][0] for v, w in minus.items()), rel=1e-9
            )
            assert row["n_units"] == sum(ref[v][1] for v in plus), where
            assert row["n_units_control"] == sum(ref[v][1] for v in minus), where
            assert row["abs_ci_low"] < row["abs_effect"] < row["abs_ci_high"], where
        if row["metric"] == "revenue_winsorised":
            assert row["cap"] == pytest.approx(expected["revenue_cap"]["all"][0], rel=1e-12)
        else:
            assert row["cap"] is None, row["metric"]
    assert {r["variant"] for r in rows} == {*arms, *contrasts}


def test_true_effect_inside_decision_ci(scorecards: dict[str, Path]) -> None:
    truth = json.loads((SAMPLE / "TRUE_EFFECTS.json").read_text())["experiments"]
    card = json.loads((scorecards["checkout_layout"] / "scorecard.json").read_text())
    decision = next(r for r in card["metrics"] if r["role"] == "decision")
    true_rel = truth["checkout_layout"]["relative_effects"][decision["metric"]]
    assert decision["rel_ci_low"] < true_rel < decision["rel_ci_high"]


def test_true_factorial_effects_inside_their_cis(scorecards: dict[str, Path]) -> None:
    """product_cards: TRUE_EFFECTS states session_success under every variant for the same
    human sessions and its main effects and interaction; each lies inside the scorecard's
    CI (as does each arm's true difference), and the interaction's CI excludes 0: the demo
    shows that the two changes together do less than the sum of each alone."""
    truth = json.loads((SAMPLE / "TRUE_EFFECTS.json").read_text())["experiments"]
    truth = truth["product_cards"]
    spec = tomllib.loads((PIPELINES / "product_cards.toml").read_text())
    assert spec["metrics"]["decision"] == "session_success"
    card = json.loads((scorecards["product_cards"] / "scorecard.json").read_text())
    rows = {r["variant"]: r for r in card["metrics"] if r["metric"] == "session_success"}
    stated = truth["session_success"]
    for term, weights in contrast_weights(spec).items():
        true = truth["contrasts"]["session_success"][term]
        assert true == pytest.approx(sum(w * stated[v] for v, w in weights.items()), abs=1e-9)
        assert rows[term]["abs_ci_low"] < true < rows[term]["abs_ci_high"], term
    for arm in ("wide_photo", "price_badge", "wide_photo_badge"):
        true = stated[arm] - stated["control"]
        assert rows[arm]["abs_ci_low"] < true < rows[arm]["abs_ci_high"], arm
    interaction = rows["interaction:photo*badge"]
    assert truth["contrasts"]["session_success"]["interaction:photo*badge"] < 0
    assert interaction["abs_ci_high"] < 0 and interaction["p_value"] < 0.05


def test_aa_has_no_sample_ratio_mismatch(scorecards: dict[str, Path]) -> None:
    card = json.loads((scorecards["homepage_aa"] / "scorecard.json").read_text())
    srm = next(c for c in card["trust"]["checks"] if c["check"] == "sample_ratio_mismatch")
    assert srm["passed"] and srm["p_value"] > 0.001


def test_every_row_is_stamped_and_holds_no_unit_ids(scorecards: dict[str, Path]) -> None:
    card_path = scorecards["checkout_layout"]
    table = pl.read_parquet(card_path / "scorecard.parquet")
    for column in (
        "bot_filter",
        "bot_filter_version",
        "bot_filter_sha256",
        "definitions_sha256",
        "spec_sha256",
        "inputs_fingerprint",
        "tool_version",
    ):
        assert table[column].null_count() == 0
    some_units = pl.read_parquet(SAMPLE / "exposures.parquet")["unit_id"].unique().head(500)
    for name in ("scorecard.json", "scorecard.parquet"):
        blob = (card_path / name).read_bytes()
        assert not any(u.encode() in blob for u in some_units)


def test_two_runs_are_byte_identical(scorecards: dict[str, Path], tmp_path: Path) -> None:
    again = tmp_path / "again"
    result = CliRunner().invoke(
        app, ["run", str(PIPELINES / "checkout_layout.toml"), "--out", str(again)]
    )
    assert result.exit_code == 0, result.output
    for name in ("scorecard.parquet", "scorecard.json"):
        assert (again / name).read_bytes() == (scorecards["checkout_layout"] / name).read_bytes()


def test_values_are_finite(scorecards: dict[str, Path]) -> None:
    for path in scorecards.values():
        for row in json.loads((path / "scorecard.json").read_text())["metrics"]:
            assert row["p_value"] is not None and 0 <= row["p_value"] <= 1
            assert math.isfinite(row["value"])


def test_methods_hypotheses_and_adjusted_p_values(scorecards: dict[str, Path]) -> None:
    """The demo shows the method of every row, each guardrail's one-sided test and the
    adjusted p-values: Holm for the decision metric across arms, Benjamini–Hochberg
    across the diagnostics (statsmodels multipletests as the reference library)."""
    from statsmodels.stats.multitest import multipletests

    methods = {  # checkout_layout has CUPED on; homepage_aa has not
        "checkout_layout": {
            "revenue": "welch+cuped",
            "buyer_share": "welch+cuped",
            "click_through": "delta+cuped",
            "session_success": "delta+cuped",
            "net_value": "welch+cuped",
            "page_latency_p95": "outer-ci",
        },
        "homepage_aa": {
            "revenue": "welch",
            "buyer_share": "newcombe+z",
            "click_through": "delta",
            "session_success": "delta",
            "net_value": "welch",
        },
    }
    for experiment, expected in methods.items():
        card = json.loads((scorecards[experiment] / "scorecard.json").read_text())
        got = {r["metric"]: r["method"] for r in card["metrics"]}
        for metric, method in expected.items():
            assert got[metric] == method, (experiment, metric)
    rows = json.loads((scorecards["checkout_layout"] / "scorecard.json").read_text())["metrics"]
    by_metric = {r["metric"]: r for r in rows}
    decision = by_metric["revenue"]
    assert decision["p_value_adjusted"] == decision["p_value"]  # Holm over one arm
    assert decision["adjustment"].startswith("holm")
    diagnostics = [r for r in rows if r["role"] == "diagnostic"]
    bh = multipletests([r["p_value"] for r in diagnostics], method="fdr_bh")[1]
    assert [r["p_value_adjusted"] for r in diagnostics] == pytest.approx(bh, rel=1e-12)
    assert {r["adjustment"] for r in diagnostics} == {
        "bh: 8 diagnostic tests (8 metrics x 1 arm(s))"
    }
    unsub, latency = by_metric["unsubscribes"], by_metric["page_latency"]
    assert unsub["hypothesis"] == "one-sided harm: higher is worse"
    assert latency["hypothesis"] == "non-inferiority, margin 2% of control: higher is worse"
    assert latency["margin"] == 0.02
    assert unsub["p_value_adjusted"] is None and latency["p_value_adjusted"] is None
    # the true +50% on unsubscribes is the harm the guardrail is there to catch
    assert unsub["p_value"] < 0.05
