-- unit_rows
CREATE TEMPORARY TABLE unit_rows AS
WITH first_exposure AS (
  SELECT
    x.unit_id AS unit,
    MIN(x.ts) AS first_ts,
    MIN(x.variant) AS variant,
    COUNT(DISTINCT x.variant) AS n_variants
  FROM exposures AS x
  WHERE
    x.experiment = 'checkout_layout'
    AND NOT x.unit_id IS NULL
    AND NOT x.variant IS NULL
    AND x.ts >= CAST('2026-09-15 00:00:00' AS TIMESTAMP)
    AND x.ts < CAST('2026-09-29 00:00:00' AS TIMESTAMP)
  GROUP BY
    x.unit_id
), sessions AS (
  SELECT
    f.unit,
    ANY_VALUE(f.variant) AS variant,
    ANY_VALUE(f.n_variants) AS n_variants,
    e.session_id AS session,
    COUNT(e.ts) AS n_events,
    BOOL_OR(
      CAST(CONTAINS(LOWER(e.user_agent), 'bot')
      OR CONTAINS(LOWER(e.user_agent), 'crawler')
      OR CONTAINS(LOWER(e.user_agent), 'spider')
      OR CONTAINS(LOWER(e.user_agent), 'headless') AS BOOLEAN)
    ) AS bot_rule_0,
    SUM(CASE WHEN e.event IN ('purchase') THEN CAST(e.value AS DECIMAL(38, 10)) END) AS s_revenue,
    COUNT(CASE WHEN e.event IN ('unsubscribe') THEN 1 END) AS s_unsubscribes,
    SUM(
      CASE WHEN e.event IN ('page_load') THEN CAST(e.latency_ms AS DECIMAL(38, 10)) END
    ) AS s_page_latency,
    COUNT(CASE WHEN e.event IN ('page_load') AND NOT e.latency_ms IS NULL THEN 1 END) AS c_page_latency,
    COUNT(CASE WHEN e.event IN ('purchase') THEN 1 END) AS s_purchases,
    COUNT(CASE WHEN e.event IN ('refund') THEN 1 END) AS s_refunds,
    COUNT(CASE WHEN e.event IN ('purchase') THEN 1 END) AS s_buyer_share,
    COUNT(CASE WHEN e.event IN ('purchase') AND (
      e.device = 'mobile'
    ) THEN 1 END) AS s_mobile_purchases,
    COUNT(CASE WHEN e.event IN ('click') THEN 1 END) AS s_clicks,
    COUNT(CASE WHEN e.event IN ('impression') THEN 1 END) AS s_impressions,
    CASE
      WHEN COUNT(CASE WHEN e.event = 'click' THEN 1 END) = 0
      THEN 0
      WHEN COUNT(CASE WHEN e.event = 'back' THEN 1 END) = 0
      THEN 1
      WHEN ARRAY_LENGTH(
        LIST_FILTER(
          ARRAY_AGG(EPOCH_MS(e.ts)) FILTER(WHERE
            e.event = 'click'),
          LAMBDA c : ARRAY_LENGTH(
            LIST_FILTER(
              ARRAY_AGG(EPOCH_MS(e.ts)) FILTER(WHERE
                e.event = 'back'),
              LAMBDA b : b > c AND b <= (
                c + 30000
              )
            )
          ) = 0
        )
      ) > 0
      THEN 1
      ELSE 0
    END AS s_session_success
  FROM first_exposure AS f
  LEFT JOIN events AS e
    ON e.cookie_id = f.unit
    AND e.ts >= f.first_ts
    AND e.ts < (
      f.first_ts + INTERVAL '14' DAY
    )
    AND e.ts >= CAST('2026-09-15 00:00:00' AS TIMESTAMP)
    AND e.ts < CAST('2026-10-13 00:00:00' AS TIMESTAMP)
  GROUP BY
    f.unit,
    e.session_id
), units AS (
  SELECT
    unit,
    ANY_VALUE(variant) AS variant,
    ANY_VALUE(n_variants) AS n_variants,
    CAST(SUM(n_events) AS BIGINT) AS n_events,
    MAX(n_events) AS max_session_events,
    COUNT(session) AS n_sessions,
    BOOL_OR(CAST(bot_rule_0 AS BOOLEAN)) AS bot_rule_0,
    CAST(COALESCE(SUM(s_revenue), 0) AS DOUBLE) AS u_revenue,
    CAST(COALESCE(SUM(s_unsubscribes), 0) AS BIGINT) AS u_unsubscribes,
    CASE
      WHEN SUM(c_page_latency) > 0
      THEN CAST(SUM(s_page_latency) AS DOUBLE) / CAST(SUM(c_page_latency) AS DOUBLE)
    END AS u_page_latency,
    CAST(COALESCE(SUM(s_purchases), 0) AS BIGINT) AS u_purchases,
    CAST(COALESCE(SUM(s_refunds), 0) AS BIGINT) AS u_refunds,
    CASE WHEN COALESCE(SUM(s_buyer_share), 0) > 0 THEN 1 ELSE 0 END AS u_buyer_share,
    CAST(COALESCE(SUM(s_mobile_purchases), 0) AS BIGINT) AS u_mobile_purchases,
    CAST(COALESCE(SUM(s_clicks), 0) AS BIGINT) AS u_clicks,
    CAST(COALESCE(SUM(s_impressions), 0) AS BIGINT) AS u_impressions,
    CAST(COALESCE(SUM(s_session_success), 0) AS BIGINT) AS u_session_success,
    COUNT(session) AS d_session_success
  FROM sessions
  GROUP BY
    unit
)
SELECT
  unit,
  variant,
  n_events,
  (
    COALESCE(bot_rule_0, FALSE) OR max_session_events > 60
  ) AS is_bot,
  n_variants > 1 AS contaminated,
  CAST(u_revenue AS DOUBLE) AS x_revenue,
  CAST(u_unsubscribes AS DOUBLE) AS x_unsubscribes,
  CAST(u_page_latency AS DOUBLE) AS x_page_latency,
  CAST(u_purchases AS DOUBLE) AS x_purchases,
  CAST(u_refunds AS DOUBLE) AS x_refunds,
  CAST(u_buyer_share AS DOUBLE) AS x_buyer_share,
  CAST(u_mobile_purchases AS DOUBLE) AS x_mobile_purchases,
  CAST(u_clicks AS DOUBLE) AS x_clicks,
  CAST(u_impressions AS DOUBLE) AS x_impressions,
  CAST(u_clicks AS DOUBLE) AS x_click_through,
  CAST(u_impressions AS DOUBLE) AS y_click_through,
  CAST(u_session_success AS DOUBLE) AS x_session_success,
  CAST(d_session_success AS DOUBLE) AS y_session_success,
  (
    CAST(1.0 AS DOUBLE) * CAST(u_revenue AS DOUBLE) + CAST(-25.0 AS DOUBLE) * CAST(u_unsubscribes AS DOUBLE)
  ) AS x_net_value
FROM units;

-- moments
SELECT
  variant,
  is_bot,
  contaminated,
  COUNT(*) AS n_units,
  CAST(SUM(n_events) AS BIGINT) AS n_events,
  COUNT(x_revenue) AS revenue__n,
  AVG(x_revenue) AS revenue__mean_x,
  VARIANCE(x_revenue) AS revenue__var_x,
  COUNT(x_unsubscribes) AS unsubscribes__n,
  AVG(x_unsubscribes) AS unsubscribes__mean_x,
  VARIANCE(x_unsubscribes) AS unsubscribes__var_x,
  COUNT(x_page_latency) AS page_latency__n,
  AVG(x_page_latency) AS page_latency__mean_x,
  VARIANCE(x_page_latency) AS page_latency__var_x,
  COUNT(x_purchases) AS purchases__n,
  AVG(x_purchases) AS purchases__mean_x,
  VARIANCE(x_purchases) AS purchases__var_x,
  COUNT(x_refunds) AS refunds__n,
  AVG(x_refunds) AS refunds__mean_x,
  VARIANCE(x_refunds) AS refunds__var_x,
  COUNT(x_buyer_share) AS buyer_share__n,
  AVG(x_buyer_share) AS buyer_share__mean_x,
  VARIANCE(x_buyer_share) AS buyer_share__var_x,
  COUNT(x_mobile_purchases) AS mobile_purchases__n,
  AVG(x_mobile_purchases) AS mobile_purchases__mean_x,
  VARIANCE(x_mobile_purchases) AS mobile_purchases__var_x,
  COUNT(x_click_through) AS click_through__n,
  AVG(x_click_through) AS click_through__mean_x,
  VARIANCE(x_click_through) AS click_through__var_x,
  AVG(y_click_through) AS click_through__mean_y,
  VARIANCE(y_click_through) AS click_through__var_y,
  COVAR_SAMP(x_click_through, y_click_through) AS click_through__cov_xy,
  COUNT(x_session_success) AS session_success__n,
  AVG(x_session_success) AS session_success__mean_x,
  VARIANCE(x_session_success) AS session_success__var_x,
  AVG(y_session_success) AS session_success__mean_y,
  VARIANCE(y_session_success) AS session_success__var_y,
  COVAR_SAMP(x_session_success, y_session_success) AS session_success__cov_xy,
  COUNT(x_net_value) AS net_value__n,
  AVG(x_net_value) AS net_value__mean_x,
  VARIANCE(x_net_value) AS net_value__var_x
FROM unit_rows
GROUP BY
  variant,
  is_bot,
  contaminated
ORDER BY
  variant,
  is_bot,
  contaminated;
