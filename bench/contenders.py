"""The benchmark's hand-written contenders, each run as its own process.

    python bench/contenders.py fused|per_metric|polars --data DIR --out FILE [--threads N]

Each computes the per-variant sufficient statistics of bench/scorecard.toml (the same
columns as the tool's ``moments`` result query) from DIR/events and DIR/exposures.parquet
and writes them to FILE as JSON. The bench turns them into scorecards with the tool's own
statistics and compares them with `metricforge run`'s scorecard.

- fused: bench/fused.sql, one hand-written DuckDB query for all ten metrics;
- per_metric: one hand-written DuckDB query per metric (ten scans of the events);
- polars: the same numbers with polars' streaming engine.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import sys
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent

# bench/scorecard.toml, written out by hand (scorecard_bench.py checks they agree)
EXPERIMENT = "checkout_layout"
START, END = dt.datetime(2026, 9, 15), dt.datetime(2026, 10, 17)
WINDOW = dt.timedelta(days=14)
LAST = END + WINDOW  # no event after this can be in any unit's window
THRESHOLD_MS = 30_000
SESSION_LIMIT = 60
BOT_TOKENS = ("bot", "crawler", "spider", "headless")
RATIOS = ("click_through", "session_success")
METRICS = (
    "revenue",
    "unsubscribes",
    "page_latency",
    "purchases",
    "refunds",
    "buyer_share",
    "mobile_purchases",
    "click_through",
    "session_success",
    "net_value",
)


def _duckdb(data: Path, threads: int | None) -> Any:
    import duckdb

    con = duckdb.connect(config={"memory_limit": "4GB"})
    if threads:
        con.execute(f"SET threads = {int(threads)}")
    events = (data / "events").as_posix() + "/*/*.parquet"
    con.execute("SET VARIABLE events = ?", [events])
    con.execute("SET VARIABLE exposures = ?", [(data / "exposures.parquet").as_posix()])
    return con


def _rows(con: Any, sql: str) -> list[dict[str, Any]]:
    cursor = con.execute(sql)
    names = [d[0] for d in cursor.description]
    return [dict(zip(names, row, strict=True)) for row in cursor.fetchall()]


def fused(data: Path, threads: int | None) -> list[dict[str, Any]]:
    return _rows(_duckdb(data, threads), (HERE / "fused.sql").read_text(encoding="utf-8"))


# -- one query per metric ----------------------------------------------------------------
# Each query repeats the exposure, join, session and bot-verdict work and adds one metric:
# its session-level aggregates, then its per-unit X (and Y for a ratio).
_UA = " OR ".join(f"contains(lower(e.user_agent), '{t}')" for t in BOT_TOKENS)
_PER_METRIC = """
WITH first_exposure AS (
    SELECT unit_id AS unit, min(ts) AS first_ts, min(variant) AS variant,
           count(DISTINCT variant) > 1 AS contaminated
    FROM read_parquet(getvariable('exposures'))
    WHERE experiment = 'checkout_layout' AND unit_id IS NOT NULL AND variant IS NOT NULL
      AND ts >= TIMESTAMP '2026-09-15' AND ts < TIMESTAMP '2026-10-17'
    GROUP BY unit_id
),
sessions AS (
    SELECT f.unit, any_value(f.variant) AS variant, any_value(f.contaminated) AS contaminated,
           e.session_id, count(e.ts) AS n_events, bool_or({ua}) AS ua_bot, {session}
    FROM first_exposure AS f
    LEFT JOIN read_parquet(getvariable('events'), hive_partitioning = true) AS e
        ON e.cookie_id = f.unit AND e.ts >= f.first_ts AND e.ts < f.first_ts + INTERVAL 14 DAY
       AND e.date >= DATE '2026-09-15' AND e.date < DATE '2026-10-31'
    GROUP BY f.unit, e.session_id
),
units AS (
    SELECT unit, any_value(variant) AS variant, any_value(contaminated) AS contaminated,
           sum(n_events) AS n_events, bool_or(ua_bot) OR max(n_events) > 60 AS is_bot, {unit}
    FROM sessions
    GROUP BY unit
)
SELECT variant, is_bot, contaminated, count(*) AS n_units, sum(n_events)::BIGINT AS n_events,
       {moments}
FROM units
GROUP BY ALL
ORDER BY ALL
"""
_GOOD_SESSION = """CASE WHEN count(*) FILTER (WHERE e.event = 'click') = 0 THEN 0
    WHEN count(*) FILTER (WHERE e.event = 'back') = 0 THEN 1
    WHEN len(list_filter(list(epoch_ms(e.ts)) FILTER (WHERE e.event = 'click'),
        lambda c: len(list_filter(list(epoch_ms(e.ts)) FILTER (WHERE e.event = 'back'),
                                  lambda b: b > c AND b <= c + 30000)) = 0)) > 0 THEN 1
    ELSE 0 END"""
# metric: (session-level aggregates, per-unit X, per-unit Y or None)
_PARTS: dict[str, tuple[str, str, str | None]] = {
    "revenue": (
        "sum(e.value) FILTER (WHERE e.event = 'purchase') AS s",
        "coalesce(sum(s), 0)",
        None,
    ),
    "unsubscribes": (
        "count(*) FILTER (WHERE e.event = 'unsubscribe') AS s",
        "sum(s)::DOUBLE",
        None,
    ),
    "page_latency": (
        "sum(e.latency_ms) FILTER (WHERE e.event = 'page_load') AS s,"
        " count(e.latency_ms) FILTER (WHERE e.event = 'page_load') AS c",
        "sum(s) / nullif(sum(c), 0)",
        None,
    ),
    "purchases": ("count(*) FILTER (WHERE e.event = 'purchase') AS s", "sum(s)::DOUBLE", None),
    "refunds": ("count(*) FILTER (WHERE e.event = 'refund') AS s", "sum(s)::DOUBLE", None),
    "buyer_share": (
        "count(*) FILTER (WHERE e.event = 'purchase') AS s",
        "(sum(s) > 0)::DOUBLE",
        None,
    ),
    "mobile_purchases": (
        "count(*) FILTER (WHERE e.event = 'purchase' AND e.device = 'mobile') AS s",
        "sum(s)::DOUBLE",
        None,
    ),
    "click_through": (
        "count(*) FILTER (WHERE e.event = 'click') AS s,"
        " count(*) FILTER (WHERE e.event = 'impression') AS c",
        "sum(s)::DOUBLE",
        "sum(c)::DOUBLE",
    ),
    "session_success": (f"{_GOOD_SESSION} AS s", "sum(s)::DOUBLE", "count(session_id)::DOUBLE"),
    "net_value": (
        "sum(e.value) FILTER (WHERE e.event = 'purchase') AS s,"
        " count(*) FILTER (WHERE e.event = 'unsubscribe') AS c",
        "coalesce(sum(s), 0) - 25 * sum(c)",
        None,
    ),
}


def per_metric_sql(metric: str) -> str:
    session, x, y = _PARTS[metric]
    unit = f"{x} AS x" + (f", {y} AS y" if y else "")
    moments = f"count(x) AS {metric}__n, avg(x) AS {metric}__mean_x, var_samp(x) AS {metric}__var_x"
    if y:
        moments += (
            f", avg(y) AS {metric}__mean_y, var_samp(y) AS {metric}__var_y,"
            f" covar_samp(x, y) AS {metric}__cov_xy"
        )
    return _PER_METRIC.format(ua=_UA, session=session, unit=unit, moments=moments)


def per_metric(data: Path, threads: int | None) -> list[dict[str, Any]]:
    con = _duckdb(data, threads)
    merged: dict[tuple[Any, ...], dict[str, Any]] = {}
    for metric in METRICS:
        for row in _rows(con, per_metric_sql(metric)):
            key = (row["variant"], row["is_bot"], row["contaminated"])
            merged.setdefault(key, {}).update(row)
    return [merged[k] for k in sorted(merged)]


# -- polars -------------------------------------------------------------------------------
def polars_rows(data: Path, threads: int | None) -> list[dict[str, Any]]:
    import polars as pl

    c = pl.col
    first = (
        pl.scan_parquet(data / "exposures.parquet")
        .filter(
            (c("experiment") == EXPERIMENT)
            & c("unit_id").is_not_null()
            & c("variant").is_not_null()
            & (c("ts") >= START)
            & (c("ts") < END)
        )
        .group_by("unit_id")
        .agg(
            first_ts=c("ts").min(),
            variant=c("variant").min(),
            contaminated=c("variant").n_unique() > 1,
        )
    )

    def in_window(columns: list[str], keep: pl.Expr | None = None) -> pl.LazyFrame:
        """Event rows inside their unit's window (a fresh scan per use: nothing is stored)."""
        scan = pl.scan_parquet(data / "events", hive_partitioning=True).filter(
            (c("date") >= START.date()) & (c("date") < LAST.date())
        )
        if keep is not None:
            scan = scan.filter(keep)
        return (
            scan.select(columns)
            .join(first.select("unit_id", "first_ts"), left_on="cookie_id", right_on="unit_id")
            .filter((c("ts") >= c("first_ts")) & (c("ts") < c("first_ts") + WINDOW))
            .with_columns(ms=c("ts").dt.epoch("ms"))
        )

    is_ = lambda name: c("event") == name  # noqa: E731
    keys = ["cookie_id", "session_id"]
    base = ["ts", *keys]
    # Per click, the first back strictly after it (an as-of join forward on time + 1 ms):
    # a session is a success when one of its clicks has no back within the threshold.
    clicks = in_window([*base], is_("click")).select(*keys, "ms", after=c("ms") + 1)
    backs = in_window([*base], is_("back")).select(*keys, back=c("ms"))
    good = (
        clicks.sort("after")
        .join_asof(
            backs.sort("back"), left_on="after", right_on="back", by=keys, strategy="forward"
        )
        .group_by(keys)
        .agg(good=(c("back").is_null() | (c("back") > c("ms") + THRESHOLD_MS)).any())
    )
    columns = [*base, "event", "value", "latency_ms", "user_agent", "device"]
    sessions = (
        in_window(columns)
        .with_columns(  # row-wise first, so that the grouping only sums, counts and ORs
            ua_bot=c("user_agent").str.to_lowercase().str.contains_any(list(BOT_TOKENS)),
            revenue=pl.when(is_("purchase")).then(c("value")),
            latency=pl.when(is_("page_load")).then(c("latency_ms")),
            mobile_purchase=is_("purchase") & (c("device") == "mobile"),
        )
        .group_by(keys)
        .agg(
            n_events=pl.len(),
            ua_bot=c("ua_bot").any(),
            revenue=c("revenue").sum(),
            unsubscribes=is_("unsubscribe").sum(),
            latency_sum=c("latency").sum(),
            latency_n=c("latency").count(),
            purchases=is_("purchase").sum(),
            refunds=is_("refund").sum(),
            mobile_purchases=c("mobile_purchase").sum(),
            clicks=is_("click").sum(),
            impressions=is_("impression").sum(),
        )
        .join(good, on=keys, how="left", nulls_equal=True)
    )
    units = sessions.group_by("cookie_id").agg(
        n_events=c("n_events").sum(),
        is_bot=c("ua_bot").any() | (c("n_events").max() > SESSION_LIMIT),
        revenue=c("revenue").sum(),
        unsubscribes=c("unsubscribes").sum(),
        page_latency=pl.when(c("latency_n").sum() > 0).then(
            c("latency_sum").sum() / c("latency_n").sum()
        ),
        purchases=c("purchases").sum(),
        refunds=c("refunds").sum(),
        mobile_purchases=c("mobile_purchases").sum(),
        clicks=c("clicks").sum(),
        impressions=c("impressions").sum(),
        good=c("good").sum(),
        n_sessions=c("session_id").count(),
    )
    counts = ("n_events", "unsubscribes", "purchases", "refunds", "mobile_purchases", "clicks")
    zero = [*counts, "impressions", "good", "n_sessions", "revenue"]
    per_unit = (
        first.join(units, left_on="unit_id", right_on="cookie_id", how="left")
        .with_columns(*[c(k).fill_null(0) for k in zero], c("is_bot").fill_null(False))
        .with_columns(
            c(k).cast(pl.Float64)
            for k in (*counts[1:], "impressions", "good", "n_sessions", "revenue")
        )
        .with_columns(
            buyer_share=(c("purchases") > 0).cast(pl.Float64),
            net_value=c("revenue") - 25 * c("unsubscribes"),
        )
    )
    aggs: list[pl.Expr] = [pl.len().alias("n_units"), c("n_events").sum().alias("n_events")]
    sources = {
        "click_through": ("clicks", "impressions"),
        "session_success": ("good", "n_sessions"),
    }
    for metric in METRICS:
        x, y = sources.get(metric, (metric, None))
        aggs += [
            c(x).count().alias(f"{metric}__n"),
            c(x).mean().alias(f"{metric}__mean_x"),
            c(x).var().alias(f"{metric}__var_x"),
        ]
        if y is not None:
            aggs += [
                c(y).mean().alias(f"{metric}__mean_y"),
                c(y).var().alias(f"{metric}__var_y"),
                pl.cov(x, y).alias(f"{metric}__cov_xy"),
            ]
    result = (
        per_unit.group_by("variant", "is_bot", "contaminated")
        .agg(aggs)
        .sort("variant", "is_bot", "contaminated")
        .collect(engine="streaming")
    )
    rows: list[dict[str, Any]] = result.to_dicts()
    return rows


CONTENDERS = {"fused": fused, "per_metric": per_metric, "polars": polars_rows}


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("contender", choices=sorted(CONTENDERS))
    parser.add_argument("--data", type=Path, required=True)
    parser.add_argument("--out", type=Path, required=True)
    parser.add_argument("--threads", type=int, default=None)
    args = parser.parse_args(argv)
    if args.threads and args.contender == "polars":
        os.environ["POLARS_MAX_THREADS"] = str(args.threads)  # before polars is imported
    rows = CONTENDERS[args.contender](args.data, args.threads)
    args.out.write_text(json.dumps({"moments": rows}, default=str) + "\n", encoding="utf-8")


if __name__ == "__main__":
    sys.exit(main())
