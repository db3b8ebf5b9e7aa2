-- Hand-written fused DuckDB query for bench/scorecard.toml (checkout_layout, bots@2, ten
-- metrics). The same sufficient statistics as `metricforge run`, written the way an
-- analyst who knows DuckDB would: one scan of the events (pruned by the hive `date`
-- partition), one grouping per (unit, session) that also collects each session's click and
-- back times, one per-unit rollup, then per-variant moments straight away (no stored
-- per-unit table, no ordered aggregates, DOUBLE sums). Measured choices (bench/RESULTS.md):
-- conditional aggregates as CASE inside the aggregate (faster in DuckDB than FILTER, which
-- only the list aggregates keep), the variant joined to the 1-per-unit rollup instead of
-- carried through both groupings, and two-variant units by MIN < MAX rather than a
-- DISTINCT count. The runner sets the variables `events` (a glob of the hive-partitioned
-- event files) and `exposures`.
WITH first_exposure AS (
    SELECT
        unit_id AS unit,
        min(ts) AS first_ts,
        min(variant) AS variant,
        min(variant) < max(variant) AS contaminated
    FROM read_parquet(getvariable('exposures'))
    WHERE experiment = 'checkout_layout'
      AND unit_id IS NOT NULL AND variant IS NOT NULL
      AND ts >= TIMESTAMP '2026-09-15' AND ts < TIMESTAMP '2026-10-17'
    GROUP BY unit_id
),
sessions AS (
    SELECT
        f.unit,
        e.session_id,
        count(e.ts) AS n_events,
        bool_or(
            contains(lower(e.user_agent), 'bot') OR contains(lower(e.user_agent), 'crawler')
            OR contains(lower(e.user_agent), 'spider') OR contains(lower(e.user_agent), 'headless')
        ) AS ua_bot,
        sum(CASE WHEN e.event = 'purchase' THEN e.value END) AS revenue,
        count(CASE WHEN e.event = 'unsubscribe' THEN 1 END) AS unsubscribes,
        sum(CASE WHEN e.event = 'page_load' THEN e.latency_ms END) AS latency_sum,
        count(CASE WHEN e.event = 'page_load' THEN e.latency_ms END) AS latency_n,
        count(CASE WHEN e.event = 'purchase' THEN 1 END) AS purchases,
        count(CASE WHEN e.event = 'refund' THEN 1 END) AS refunds,
        count(CASE WHEN e.event = 'purchase' AND e.device = 'mobile' THEN 1 END) AS mobile_purchases,
        count(CASE WHEN e.event = 'click' THEN 1 END) AS clicks,
        count(CASE WHEN e.event = 'impression' THEN 1 END) AS impressions,
        count(CASE WHEN e.event = 'back' THEN 1 END) AS backs,
        list(epoch_ms(e.ts)) FILTER (WHERE e.event = 'click') AS click_ms,
        list(epoch_ms(e.ts)) FILTER (WHERE e.event = 'back') AS back_ms
    FROM first_exposure AS f
    LEFT JOIN read_parquet(getvariable('events'), hive_partitioning = true) AS e
        ON e.cookie_id = f.unit
       AND e.ts >= f.first_ts AND e.ts < f.first_ts + INTERVAL 14 DAY
       AND e.date >= DATE '2026-09-15' AND e.date < DATE '2026-10-31'
    GROUP BY f.unit, e.session_id
),
units AS (
    SELECT f.variant, f.contaminated, u.*
    FROM (
      SELECT
        unit,
        sum(n_events) AS n_events,
        bool_or(ua_bot) OR max(n_events) > 60 AS is_bot,
        coalesce(sum(revenue), 0) AS revenue,
        sum(unsubscribes)::DOUBLE AS unsubscribes,
        sum(latency_sum) / nullif(sum(latency_n), 0) AS page_latency,
        sum(purchases)::DOUBLE AS purchases,
        sum(refunds)::DOUBLE AS refunds,
        (sum(purchases) > 0)::DOUBLE AS buyer_share,
        sum(mobile_purchases)::DOUBLE AS mobile_purchases,
        sum(clicks)::DOUBLE AS clicks,
        sum(impressions)::DOUBLE AS impressions,
        sum(
            CASE
                WHEN clicks = 0 THEN 0
                WHEN backs = 0 THEN 1
                WHEN len(list_filter(click_ms, lambda c: len(list_filter(
                    back_ms, lambda b: b > c AND b <= c + 30000)) = 0)) > 0 THEN 1
                ELSE 0
            END
        )::DOUBLE AS good_sessions,
        count(session_id)::DOUBLE AS n_sessions
      FROM sessions
      GROUP BY unit
    ) AS u
    JOIN first_exposure AS f ON f.unit = u.unit
)
SELECT
    variant, is_bot, contaminated,
    count(*) AS n_units,
    sum(n_events)::BIGINT AS n_events,
    count(revenue) AS revenue__n, avg(revenue) AS revenue__mean_x,
    var_samp(revenue) AS revenue__var_x,
    count(unsubscribes) AS unsubscribes__n, avg(unsubscribes) AS unsubscribes__mean_x,
    var_samp(unsubscribes) AS unsubscribes__var_x,
    count(page_latency) AS page_latency__n, avg(page_latency) AS page_latency__mean_x,
    var_samp(page_latency) AS page_latency__var_x,
    count(purchases) AS purchases__n, avg(purchases) AS purchases__mean_x,
    var_samp(purchases) AS purchases__var_x,
    count(refunds) AS refunds__n, avg(refunds) AS refunds__mean_x,
    var_samp(refunds) AS refunds__var_x,
    count(buyer_share) AS buyer_share__n, avg(buyer_share) AS buyer_share__mean_x,
    var_samp(buyer_share) AS buyer_share__var_x,
    count(mobile_purchases) AS mobile_purchases__n,
    avg(mobile_purchases) AS mobile_purchases__mean_x,
    var_samp(mobile_purchases) AS mobile_purchases__var_x,
    count(clicks) AS click_through__n, avg(clicks) AS click_through__mean_x,
    var_samp(clicks) AS click_through__var_x, avg(impressions) AS click_through__mean_y,
    var_samp(impressions) AS click_through__var_y,
    covar_samp(clicks, impressions) AS click_through__cov_xy,
    count(good_sessions) AS session_success__n,
    avg(good_sessions) AS session_success__mean_x,
    var_samp(good_sessions) AS session_success__var_x,
    avg(n_sessions) AS session_success__mean_y,
    var_samp(n_sessions) AS session_success__var_y,
    covar_samp(good_sessions, n_sessions) AS session_success__cov_xy,
    count(*) AS net_value__n, avg(revenue - 25 * unsubscribes) AS net_value__mean_x,
    var_samp(revenue - 25 * unsubscribes) AS net_value__var_x
FROM units
GROUP BY ALL
ORDER BY ALL
