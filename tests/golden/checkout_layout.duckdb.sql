-- unit_rows
CREATE TEMPORARY TABLE unit_rows AS
WITH first_exposure AS (
  SELECT
    x.unit_id AS unit,
    MIN(x.ts) AS first_ts,
    CASE
      WHEN MIN(CASE WHEN x.variant = 'control' THEN x.ts END) = MIN(x.ts)
      THEN 'control'
      WHEN MIN(CASE WHEN x.variant = 'treatment' THEN x.ts END) = MIN(x.ts)
      THEN 'treatment'
      ELSE MIN(x.variant)
    END AS variant,
    MIN(x.variant) < MAX(x.variant) AS two_variants,
    CAST(SUM(x.n_rows) - COUNT(*) AS BIGINT) AS dq_duplicate_exposures
  FROM (
    SELECT
      unit_id,
      variant,
      ts,
      COUNT(*) AS n_rows
    FROM exposures
    WHERE
      experiment = 'checkout_layout'
      AND NOT unit_id IS NULL
      AND NOT variant IS NULL
      AND ts >= CAST('2026-09-15 00:00:00' AS TIMESTAMP)
      AND ts < CAST('2026-09-29 00:00:00' AS TIMESTAMP)
    GROUP BY
      unit_id,
      variant,
      ts
  ) AS x
  GROUP BY
    x.unit_id
), sessions AS (
  SELECT
    f.unit,
    e.session_id AS session,
    COUNT(CASE WHEN e.ts >= f.first_ts THEN 1 END) AS n_events,
    COUNT(CASE WHEN NOT (
      e.ts >= f.first_ts
    ) THEN 1 END) AS n_pre_events,
    BOOL_OR(
      CAST((
        CONTAINS(LOWER(e.user_agent), 'bot')
        OR CONTAINS(LOWER(e.user_agent), 'crawler')
        OR CONTAINS(LOWER(e.user_agent), 'spider')
        OR CONTAINS(LOWER(e.user_agent), 'headless')
      )
      AND e.ts >= f.first_ts AS BOOLEAN)
    ) AS bot_rule_0,
    MIN(
      CASE
        WHEN e.ts >= f.first_ts AND NOT e.device IS NULL
        THEN LPAD(CAST(EPOCH_MS(e.ts) AS TEXT), 20, '0') || e.device
      END
    ) AS segkey_device,
    MIN(
      CASE
        WHEN e.ts >= f.first_ts AND NOT e.country IS NULL
        THEN LPAD(CAST(EPOCH_MS(e.ts) AS TEXT), 20, '0') || e.country
      END
    ) AS segkey_country,
    SUM(
      CASE
        WHEN e.event = 'purchase' AND e.ts >= f.first_ts
        THEN TRY_CAST(e.value AS DECIMAL(28, 10))
      END
    ) AS s_revenue,
    COUNT(CASE WHEN e.event = 'purchase' AND e.ts >= f.first_ts THEN e.value END) - COUNT(
      CASE
        WHEN e.event = 'purchase' AND e.ts >= f.first_ts
        THEN TRY_CAST(e.value AS DECIMAL(28, 10))
      END
    ) AS dq_ignored_revenue,
    COUNT(
      CASE
        WHEN (
          e.event = 'purchase' AND e.ts >= f.first_ts
        )
        AND (
          e.value
        ) < 0
        AND NOT CASE
          WHEN e.event = 'purchase' AND e.ts >= f.first_ts
          THEN TRY_CAST(e.value AS DECIMAL(28, 10))
        END IS NULL
        THEN 1
      END
    ) AS dq_negative_revenue,
    SUM(
      CASE
        WHEN e.event = 'purchase' AND NOT (
          e.ts >= f.first_ts
        )
        THEN TRY_CAST(e.value AS DECIMAL(28, 10))
      END
    ) AS spre_revenue,
    COUNT(CASE WHEN e.event = 'unsubscribe' AND e.ts >= f.first_ts THEN 1 END) AS s_unsubscribes,
    COUNT(CASE WHEN e.event = 'unsubscribe' AND NOT (
      e.ts >= f.first_ts
    ) THEN 1 END) AS spre_unsubscribes,
    SUM(
      CASE
        WHEN e.event = 'page_load' AND e.ts >= f.first_ts
        THEN TRY_CAST(e.latency_ms AS DECIMAL(28, 10))
      END
    ) AS s_page_latency,
    COUNT(
      CASE
        WHEN e.event = 'page_load' AND e.ts >= f.first_ts
        THEN TRY_CAST(e.latency_ms AS DECIMAL(28, 10))
      END
    ) AS c_page_latency,
    COUNT(CASE WHEN e.event = 'page_load' AND e.ts >= f.first_ts THEN e.latency_ms END) - COUNT(
      CASE
        WHEN e.event = 'page_load' AND e.ts >= f.first_ts
        THEN TRY_CAST(e.latency_ms AS DECIMAL(28, 10))
      END
    ) AS dq_ignored_page_latency,
    COUNT(
      CASE
        WHEN (
          e.event = 'page_load' AND e.ts >= f.first_ts
        )
        AND (
          e.latency_ms
        ) < 0
        AND NOT CASE
          WHEN e.event = 'page_load' AND e.ts >= f.first_ts
          THEN TRY_CAST(e.latency_ms AS DECIMAL(28, 10))
        END IS NULL
        THEN 1
      END
    ) AS dq_negative_page_latency,
    SUM(
      CASE
        WHEN e.event = 'page_load' AND NOT (
          e.ts >= f.first_ts
        )
        THEN TRY_CAST(e.latency_ms AS DECIMAL(28, 10))
      END
    ) AS spre_page_latency,
    COUNT(
      CASE
        WHEN e.event = 'page_load' AND NOT (
          e.ts >= f.first_ts
        )
        THEN TRY_CAST(e.latency_ms AS DECIMAL(28, 10))
      END
    ) AS cpre_page_latency,
    COUNT(
      CASE
        WHEN (
          e.event = 'page_load' AND e.ts >= f.first_ts
        ) AND NOT e.latency_ms IS NULL
        THEN 1
      END
    ) AS s_page_latency_p95,
    ARRAY_AGG(CAST(e.latency_ms AS DOUBLE)) FILTER(WHERE
      (
        e.event = 'page_load' AND e.ts >= f.first_ts
      ) AND NOT e.latency_ms IS NULL) AS l_page_latency_p95,
    COUNT(
      CASE
        WHEN (
          e.event = 'page_load' AND NOT (
            e.ts >= f.first_ts
          )
        )
        AND NOT e.latency_ms IS NULL
        THEN 1
      END
    ) AS spre_page_latency_p95,
    COUNT(CASE WHEN e.event = 'purchase' AND e.ts >= f.first_ts THEN 1 END) AS s_purchases,
    COUNT(CASE WHEN e.event = 'purchase' AND NOT (
      e.ts >= f.first_ts
    ) THEN 1 END) AS spre_purchases,
    COUNT(CASE WHEN e.event = 'refund' AND e.ts >= f.first_ts THEN 1 END) AS s_refunds,
    COUNT(CASE WHEN e.event = 'refund' AND NOT (
      e.ts >= f.first_ts
    ) THEN 1 END) AS spre_refunds,
    COUNT(CASE WHEN e.event = 'purchase' AND e.ts >= f.first_ts THEN 1 END) AS s_buyer_share,
    COUNT(CASE WHEN e.event = 'purchase' AND NOT (
      e.ts >= f.first_ts
    ) THEN 1 END) AS spre_buyer_share,
    COUNT(
      CASE
        WHEN (
          e.event = 'purchase' AND (
            e.device = 'mobile'
          )
        )
        AND e.ts >= f.first_ts
        THEN 1
      END
    ) AS s_mobile_purchases,
    COUNT(
      CASE
        WHEN (
          e.event = 'purchase' AND (
            e.device = 'mobile'
          )
        )
        AND NOT (
          e.ts >= f.first_ts
        )
        THEN 1
      END
    ) AS spre_mobile_purchases,
    COUNT(CASE WHEN e.event = 'click' AND e.ts >= f.first_ts THEN 1 END) AS s_clicks,
    COUNT(CASE WHEN e.event = 'click' AND NOT (
      e.ts >= f.first_ts
    ) THEN 1 END) AS spre_clicks,
    COUNT(CASE WHEN e.event = 'impression' AND e.ts >= f.first_ts THEN 1 END) AS s_impressions,
    COUNT(CASE WHEN e.event = 'impression' AND NOT (
      e.ts >= f.first_ts
    ) THEN 1 END) AS spre_impressions,
    CASE
      WHEN COUNT(CASE WHEN e.event = 'click' AND e.ts >= f.first_ts THEN 1 END) = 0
      THEN 0
      WHEN COUNT(CASE WHEN e.event = 'back' AND e.ts >= f.first_ts THEN 1 END) = 0
      THEN 1
      WHEN ARRAY_LENGTH(
        LIST_FILTER(
          ARRAY_AGG(EPOCH_MS(e.ts)) FILTER(WHERE
            e.event = 'click' AND e.ts >= f.first_ts),
          LAMBDA c : ARRAY_LENGTH(
            LIST_FILTER(
              ARRAY_AGG(EPOCH_MS(e.ts)) FILTER(WHERE
                e.event = 'back' AND e.ts >= f.first_ts),
              LAMBDA b : b > c AND b <= (
                c + 30000
              )
            )
          ) = 0
        )
      ) > 0
      THEN 1
      ELSE 0
    END AS s_session_success,
    CASE
      WHEN COUNT(CASE WHEN e.event = 'click' AND NOT (
        e.ts >= f.first_ts
      ) THEN 1 END) = 0
      THEN 0
      WHEN COUNT(CASE WHEN e.event = 'back' AND NOT (
        e.ts >= f.first_ts
      ) THEN 1 END) = 0
      THEN 1
      WHEN ARRAY_LENGTH(
        LIST_FILTER(
          ARRAY_AGG(EPOCH_MS(e.ts)) FILTER(WHERE
            e.event = 'click' AND NOT (
              e.ts >= f.first_ts
            )),
          LAMBDA c : ARRAY_LENGTH(
            LIST_FILTER(
              ARRAY_AGG(EPOCH_MS(e.ts)) FILTER(WHERE
                e.event = 'back' AND NOT (
                  e.ts >= f.first_ts
                )),
              LAMBDA b : b > c AND b <= (
                c + 30000
              )
            )
          ) = 0
        )
      ) > 0
      THEN 1
      ELSE 0
    END AS spre_session_success,
    SUM(
      CASE
        WHEN e.event = 'purchase' AND e.ts >= f.first_ts
        THEN TRY_CAST(e.value AS DECIMAL(28, 10))
      END
    ) AS s_revenue_winsorised,
    COUNT(CASE WHEN e.event = 'purchase' AND e.ts >= f.first_ts THEN e.value END) - COUNT(
      CASE
        WHEN e.event = 'purchase' AND e.ts >= f.first_ts
        THEN TRY_CAST(e.value AS DECIMAL(28, 10))
      END
    ) AS dq_ignored_revenue_winsorised,
    COUNT(
      CASE
        WHEN (
          e.event = 'purchase' AND e.ts >= f.first_ts
        )
        AND (
          e.value
        ) < 0
        AND NOT CASE
          WHEN e.event = 'purchase' AND e.ts >= f.first_ts
          THEN TRY_CAST(e.value AS DECIMAL(28, 10))
        END IS NULL
        THEN 1
      END
    ) AS dq_negative_revenue_winsorised,
    SUM(
      CASE
        WHEN e.event = 'purchase' AND NOT (
          e.ts >= f.first_ts
        )
        THEN TRY_CAST(e.value AS DECIMAL(28, 10))
      END
    ) AS spre_revenue_winsorised
  FROM first_exposure AS f
  LEFT JOIN events AS e
    ON e.cookie_id = f.unit
    AND e.ts >= (
      f.first_ts - INTERVAL '14' DAY
    )
    AND e.ts < (
      f.first_ts + INTERVAL '14' DAY
    )
    AND e.ts >= CAST('2026-09-01 00:00:00' AS TIMESTAMP)
    AND e.ts < CAST('2026-10-13 00:00:00' AS TIMESTAMP)
  GROUP BY
    f.unit,
    e.session_id
), units AS (
  SELECT
    f.variant,
    f.two_variants,
    f.first_ts,
    f.dq_duplicate_exposures,
    u.*
  FROM (
    SELECT
      unit,
      CAST(SUM(n_events) AS BIGINT) AS n_events,
      MAX(n_events) AS max_session_events,
      COUNT(session) AS n_sessions,
      CAST(SUM(n_pre_events) AS BIGINT) AS n_pre_events,
      BOOL_OR(CAST(bot_rule_0 AS BOOLEAN)) AS bot_rule_0,
      CAST(SUM(dq_ignored_revenue) AS BIGINT) AS dq_ignored_revenue,
      CAST(SUM(dq_negative_revenue) AS BIGINT) AS dq_negative_revenue,
      CAST(SUM(dq_ignored_page_latency) AS BIGINT) AS dq_ignored_page_latency,
      CAST(SUM(dq_negative_page_latency) AS BIGINT) AS dq_negative_page_latency,
      CAST(SUM(dq_ignored_revenue_winsorised) AS BIGINT) AS dq_ignored_revenue_winsorised,
      CAST(SUM(dq_negative_revenue_winsorised) AS BIGINT) AS dq_negative_revenue_winsorised,
      MIN(segkey_device) AS segkey_device,
      MIN(segkey_country) AS segkey_country,
      CAST(COALESCE(SUM(s_revenue), 0) AS DOUBLE) AS u_revenue,
      CAST(COALESCE(SUM(spre_revenue), 0) AS DOUBLE) AS upre_revenue,
      CAST(COALESCE(SUM(s_unsubscribes), 0) AS BIGINT) AS u_unsubscribes,
      CAST(COALESCE(SUM(spre_unsubscribes), 0) AS BIGINT) AS upre_unsubscribes,
      CASE
        WHEN SUM(c_page_latency) > 0
        THEN CAST(SUM(s_page_latency) AS DOUBLE) / CAST(SUM(c_page_latency) AS DOUBLE)
      END AS u_page_latency,
      CASE
        WHEN SUM(cpre_page_latency) > 0
        THEN CAST(SUM(spre_page_latency) AS DOUBLE) / CAST(SUM(cpre_page_latency) AS DOUBLE)
      END AS upre_page_latency,
      CAST(COALESCE(SUM(s_page_latency_p95), 0) AS BIGINT) AS u_page_latency_p95,
      LIST_SORT(
        FLATTEN(ARRAY_AGG(l_page_latency_p95) FILTER(WHERE
          NOT l_page_latency_p95 IS NULL))
      ) AS l_page_latency_p95,
      CAST(COALESCE(SUM(spre_page_latency_p95), 0) AS BIGINT) AS upre_page_latency_p95,
      CAST(COALESCE(SUM(s_purchases), 0) AS BIGINT) AS u_purchases,
      CAST(COALESCE(SUM(spre_purchases), 0) AS BIGINT) AS upre_purchases,
      CAST(COALESCE(SUM(s_refunds), 0) AS BIGINT) AS u_refunds,
      CAST(COALESCE(SUM(spre_refunds), 0) AS BIGINT) AS upre_refunds,
      CASE WHEN COALESCE(SUM(s_buyer_share), 0) > 0 THEN 1 ELSE 0 END AS u_buyer_share,
      CASE WHEN COALESCE(SUM(spre_buyer_share), 0) > 0 THEN 1 ELSE 0 END AS upre_buyer_share,
      CAST(COALESCE(SUM(s_mobile_purchases), 0) AS BIGINT) AS u_mobile_purchases,
      CAST(COALESCE(SUM(spre_mobile_purchases), 0) AS BIGINT) AS upre_mobile_purchases,
      CAST(COALESCE(SUM(s_clicks), 0) AS BIGINT) AS u_clicks,
      CAST(COALESCE(SUM(spre_clicks), 0) AS BIGINT) AS upre_clicks,
      CAST(COALESCE(SUM(s_impressions), 0) AS BIGINT) AS u_impressions,
      CAST(COALESCE(SUM(spre_impressions), 0) AS BIGINT) AS upre_impressions,
      CAST(COALESCE(SUM(s_session_success), 0) AS BIGINT) AS u_session_success,
      COUNT(CASE WHEN n_events > 0 THEN session END) AS d_session_success,
      CAST(COALESCE(SUM(spre_session_success), 0) AS BIGINT) AS upre_session_success,
      COUNT(CASE WHEN n_pre_events > 0 THEN session END) AS dpre_session_success,
      CAST(COALESCE(SUM(s_revenue_winsorised), 0) AS DOUBLE) AS u_revenue_winsorised,
      CAST(COALESCE(SUM(spre_revenue_winsorised), 0) AS DOUBLE) AS upre_revenue_winsorised
    FROM sessions
    GROUP BY
      unit
  ) AS u
  JOIN first_exposure AS f
    ON u.unit = f.unit
)
SELECT
  unit,
  variant,
  n_events,
  (
    COALESCE(bot_rule_0, FALSE) OR max_session_events > 60
  ) AS is_bot,
  two_variants AS contaminated,
  two_variants,
  first_ts,
  dq_duplicate_exposures,
  dq_ignored_revenue,
  dq_negative_revenue,
  dq_ignored_page_latency,
  dq_negative_page_latency,
  dq_ignored_revenue_winsorised,
  dq_negative_revenue_winsorised,
  SUBSTRING(segkey_device, 21) AS seg_device,
  SUBSTRING(segkey_country, 21) AS seg_country,
  n_pre_events > 0 AS has_pre,
  CAST(u_revenue AS DOUBLE) AS x_revenue,
  CAST(upre_revenue AS DOUBLE) AS xpre_revenue,
  CAST(u_unsubscribes AS DOUBLE) AS x_unsubscribes,
  CAST(upre_unsubscribes AS DOUBLE) AS xpre_unsubscribes,
  CAST(u_page_latency AS DOUBLE) AS x_page_latency,
  CAST(upre_page_latency AS DOUBLE) AS xpre_page_latency,
  CASE WHEN u_page_latency_p95 > 0 THEN CAST(u_page_latency_p95 AS DOUBLE) END AS x_page_latency_p95,
  CASE WHEN upre_page_latency_p95 > 0 THEN CAST(upre_page_latency_p95 AS DOUBLE) END AS xpre_page_latency_p95,
  l_page_latency_p95 AS v_page_latency_p95,
  CAST(u_purchases AS DOUBLE) AS x_purchases,
  CAST(upre_purchases AS DOUBLE) AS xpre_purchases,
  CAST(u_refunds AS DOUBLE) AS x_refunds,
  CAST(upre_refunds AS DOUBLE) AS xpre_refunds,
  CAST(u_buyer_share AS DOUBLE) AS x_buyer_share,
  CAST(upre_buyer_share AS DOUBLE) AS xpre_buyer_share,
  CAST(u_mobile_purchases AS DOUBLE) AS x_mobile_purchases,
  CAST(upre_mobile_purchases AS DOUBLE) AS xpre_mobile_purchases,
  CAST(u_clicks AS DOUBLE) AS x_clicks,
  CAST(upre_clicks AS DOUBLE) AS xpre_clicks,
  CAST(u_impressions AS DOUBLE) AS x_impressions,
  CAST(upre_impressions AS DOUBLE) AS xpre_impressions,
  CAST(u_clicks AS DOUBLE) AS x_click_through,
  CAST(u_impressions AS DOUBLE) AS y_click_through,
  CAST(upre_clicks AS DOUBLE) AS xpre_click_through,
  CAST(upre_impressions AS DOUBLE) AS ypre_click_through,
  CAST(u_session_success AS DOUBLE) AS x_session_success,
  CAST(d_session_success AS DOUBLE) AS y_session_success,
  CAST(upre_session_success AS DOUBLE) AS xpre_session_success,
  CAST(dpre_session_success AS DOUBLE) AS ypre_session_success,
  (
    CAST(1.0 AS DOUBLE) * CAST(u_revenue AS DOUBLE) + CAST(-25.0 AS DOUBLE) * CAST(u_unsubscribes AS DOUBLE)
  ) AS x_net_value,
  (
    CAST(1.0 AS DOUBLE) * CAST(upre_revenue AS DOUBLE) + CAST(-25.0 AS DOUBLE) * CAST(upre_unsubscribes AS DOUBLE)
  ) AS xpre_net_value,
  CAST(u_revenue_winsorised AS DOUBLE) AS x_revenue_winsorised,
  CAST(upre_revenue_winsorised AS DOUBLE) AS xpre_revenue_winsorised
FROM units;

-- moments
WITH cap_values AS (
  SELECT
    'revenue_winsorised' AS k,
    CAST(x_revenue_winsorised AS DOUBLE) AS v,
    CAST(0.999 AS DOUBLE) AS lvl
  FROM unit_rows
  WHERE
    (
      NOT is_bot AND NOT contaminated
    ) AND NOT x_revenue_winsorised IS NULL
  UNION ALL
  SELECT
    'revenue_winsorised:pre' AS k,
    CAST(xpre_revenue_winsorised AS DOUBLE) AS v,
    CAST(0.999 AS DOUBLE) AS lvl
  FROM unit_rows
  WHERE
    (
      NOT is_bot AND NOT contaminated
    ) AND NOT x_revenue_winsorised IS NULL
), cap_ranked AS (
  SELECT
    k,
    lvl,
    v,
    ROW_NUMBER() OVER (PARTITION BY k ORDER BY v) - 1 AS r,
    COUNT(*) OVER (PARTITION BY k) AS n
  FROM cap_values
), cap_levels AS (
  SELECT
    k,
    MAX(CASE WHEN r = FLOOR(CAST(n - 1 AS DOUBLE) * lvl) THEN v END) + MAX(CAST(n - 1 AS DOUBLE) * lvl - FLOOR(CAST(n - 1 AS DOUBLE) * lvl)) * (
      MAX(CASE WHEN r = CEIL(CAST(n - 1 AS DOUBLE) * lvl) THEN v END) - MAX(CASE WHEN r = FLOOR(CAST(n - 1 AS DOUBLE) * lvl) THEN v END)
    ) AS cap
  FROM cap_ranked
  GROUP BY
    k
), caps AS (
  SELECT
    MAX(CASE WHEN k = 'revenue_winsorised' THEN cap END) AS revenue_winsorised__cap,
    MAX(CASE WHEN k = 'revenue_winsorised:pre' THEN cap END) AS revenue_winsorised__cap_pre
  FROM cap_levels
)
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
  COUNT(x_page_latency_p95) AS page_latency_p95__n,
  AVG(x_page_latency_p95) AS page_latency_p95__mean_x,
  VARIANCE(x_page_latency_p95) AS page_latency_p95__var_x,
  COUNT(x_purchases) AS purchases__n,
  AVG(x_purchases) AS purchases__mean_x,
  VARIANCE(x_purchases) AS purchases__var_x,
  COUNT(x_refunds) AS refunds__n,
  AVG(x_refunds) AS refunds__mean_x,
  VARIANCE(x_refunds) AS refunds__var_x,
  COUNT(x_buyer_share) AS buyer_share__n,
  AVG(x_buyer_share) AS buyer_share__mean_x,
  VARIANCE(x_buyer_share) AS buyer_share__var_x,
  CAST(SUM(CAST(x_buyer_share AS BIGINT)) AS BIGINT) AS buyer_share__successes,
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
  VARIANCE(x_net_value) AS net_value__var_x,
  COUNT(x_revenue_winsorised) AS revenue_winsorised__n,
  AVG(
    CASE
      WHEN x_revenue_winsorised > caps.revenue_winsorised__cap
      THEN caps.revenue_winsorised__cap
      ELSE x_revenue_winsorised
    END
  ) AS revenue_winsorised__mean_x,
  VARIANCE(
    CASE
      WHEN x_revenue_winsorised > caps.revenue_winsorised__cap
      THEN caps.revenue_winsorised__cap
      ELSE x_revenue_winsorised
    END
  ) AS revenue_winsorised__var_x
FROM unit_rows
CROSS JOIN caps
GROUP BY
  variant,
  is_bot,
  contaminated
ORDER BY
  variant,
  is_bot,
  contaminated;

-- data_quality
SELECT
  variant,
  COUNT(*) AS units,
  CAST(SUM(CASE WHEN n_events = 0 THEN 1 ELSE 0 END) AS BIGINT) AS units_without_events,
  CAST(SUM(dq_duplicate_exposures) AS BIGINT) AS dq_duplicate_exposures,
  CAST(SUM(dq_ignored_revenue) AS BIGINT) AS dq_ignored_revenue,
  CAST(SUM(dq_negative_revenue) AS BIGINT) AS dq_negative_revenue,
  CAST(SUM(dq_ignored_page_latency) AS BIGINT) AS dq_ignored_page_latency,
  CAST(SUM(dq_negative_page_latency) AS BIGINT) AS dq_negative_page_latency,
  CAST(SUM(dq_ignored_revenue_winsorised) AS BIGINT) AS dq_ignored_revenue_winsorised,
  CAST(SUM(dq_negative_revenue_winsorised) AS BIGINT) AS dq_negative_revenue_winsorised
FROM unit_rows
GROUP BY
  variant
ORDER BY
  variant;

-- exposure_days
SELECT
  variant,
  CAST(first_ts AS DATE) AS first_day,
  COUNT(*) AS n_units,
  CAST(SUM(CASE WHEN two_variants THEN 1 ELSE 0 END) AS BIGINT) AS n_two
FROM unit_rows
GROUP BY
  variant,
  CAST(first_ts AS DATE)
ORDER BY
  variant,
  CAST(first_ts AS DATE);

-- bot_events
SELECT
  variant,
  COUNT(*) AS n_units,
  AVG(CAST(CASE WHEN is_bot THEN n_events ELSE 0 END AS DOUBLE)) AS mean_removed,
  AVG(CAST(n_events AS DOUBLE)) AS mean_events,
  VARIANCE(CAST(CASE WHEN is_bot THEN n_events ELSE 0 END AS DOUBLE)) AS var_removed,
  VARIANCE(CAST(n_events AS DOUBLE)) AS var_events,
  COVAR_SAMP(
    CAST(CASE WHEN is_bot THEN n_events ELSE 0 END AS DOUBLE),
    CAST(n_events AS DOUBLE)
  ) AS cov_removed_events
FROM unit_rows
GROUP BY
  variant
ORDER BY
  variant;

-- caps
WITH cap_values AS (
  SELECT
    'revenue_winsorised' AS k,
    CAST(x_revenue_winsorised AS DOUBLE) AS v,
    CAST(0.999 AS DOUBLE) AS lvl
  FROM unit_rows
  WHERE
    (
      NOT is_bot AND NOT contaminated
    ) AND NOT x_revenue_winsorised IS NULL
  UNION ALL
  SELECT
    'revenue_winsorised:pre' AS k,
    CAST(xpre_revenue_winsorised AS DOUBLE) AS v,
    CAST(0.999 AS DOUBLE) AS lvl
  FROM unit_rows
  WHERE
    (
      NOT is_bot AND NOT contaminated
    ) AND NOT x_revenue_winsorised IS NULL
), cap_ranked AS (
  SELECT
    k,
    lvl,
    v,
    ROW_NUMBER() OVER (PARTITION BY k ORDER BY v) - 1 AS r,
    COUNT(*) OVER (PARTITION BY k) AS n
  FROM cap_values
), cap_levels AS (
  SELECT
    k,
    MAX(CASE WHEN r = FLOOR(CAST(n - 1 AS DOUBLE) * lvl) THEN v END) + MAX(CAST(n - 1 AS DOUBLE) * lvl - FLOOR(CAST(n - 1 AS DOUBLE) * lvl)) * (
      MAX(CASE WHEN r = CEIL(CAST(n - 1 AS DOUBLE) * lvl) THEN v END) - MAX(CASE WHEN r = FLOOR(CAST(n - 1 AS DOUBLE) * lvl) THEN v END)
    ) AS cap
  FROM cap_ranked
  GROUP BY
    k
), caps AS (
  SELECT
    MAX(CASE WHEN k = 'revenue_winsorised' THEN cap END) AS revenue_winsorised__cap,
    MAX(CASE WHEN k = 'revenue_winsorised:pre' THEN cap END) AS revenue_winsorised__cap_pre
  FROM cap_levels
)
SELECT
  *
FROM caps;

-- cuped
WITH cap_values AS (
  SELECT
    'revenue_winsorised' AS k,
    CAST(x_revenue_winsorised AS DOUBLE) AS v,
    CAST(0.999 AS DOUBLE) AS lvl
  FROM unit_rows
  WHERE
    (
      NOT is_bot AND NOT contaminated
    ) AND NOT x_revenue_winsorised IS NULL
  UNION ALL
  SELECT
    'revenue_winsorised:pre' AS k,
    CAST(xpre_revenue_winsorised AS DOUBLE) AS v,
    CAST(0.999 AS DOUBLE) AS lvl
  FROM unit_rows
  WHERE
    (
      NOT is_bot AND NOT contaminated
    ) AND NOT x_revenue_winsorised IS NULL
), cap_ranked AS (
  SELECT
    k,
    lvl,
    v,
    ROW_NUMBER() OVER (PARTITION BY k ORDER BY v) - 1 AS r,
    COUNT(*) OVER (PARTITION BY k) AS n
  FROM cap_values
), cap_levels AS (
  SELECT
    k,
    MAX(CASE WHEN r = FLOOR(CAST(n - 1 AS DOUBLE) * lvl) THEN v END) + MAX(CAST(n - 1 AS DOUBLE) * lvl - FLOOR(CAST(n - 1 AS DOUBLE) * lvl)) * (
      MAX(CASE WHEN r = CEIL(CAST(n - 1 AS DOUBLE) * lvl) THEN v END) - MAX(CASE WHEN r = FLOOR(CAST(n - 1 AS DOUBLE) * lvl) THEN v END)
    ) AS cap
  FROM cap_ranked
  GROUP BY
    k
), caps AS (
  SELECT
    MAX(CASE WHEN k = 'revenue_winsorised' THEN cap END) AS revenue_winsorised__cap,
    MAX(CASE WHEN k = 'revenue_winsorised:pre' THEN cap END) AS revenue_winsorised__cap_pre
  FROM cap_levels
)
SELECT
  variant,
  COUNT(CAST(x_revenue AS DOUBLE)) AS revenue__cv_n,
  AVG(CAST(x_revenue AS DOUBLE)) AS revenue__cv_mean_x,
  AVG(CAST(xpre_revenue AS DOUBLE)) AS revenue__cv_mean_c,
  AVG(CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS revenue__cv_mean_h,
  VARIANCE(CAST(x_revenue AS DOUBLE)) AS revenue__cv_cov_x_x,
  COVAR_SAMP(CAST(x_revenue AS DOUBLE), CAST(xpre_revenue AS DOUBLE)) AS revenue__cv_cov_x_c,
  COVAR_SAMP(CAST(x_revenue AS DOUBLE), CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS revenue__cv_cov_x_h,
  VARIANCE(CAST(xpre_revenue AS DOUBLE)) AS revenue__cv_cov_c_c,
  COVAR_SAMP(CAST(xpre_revenue AS DOUBLE), CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS revenue__cv_cov_c_h,
  VARIANCE(CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS revenue__cv_cov_h_h,
  COUNT(CAST(x_unsubscribes AS DOUBLE)) AS unsubscribes__cv_n,
  AVG(CAST(x_unsubscribes AS DOUBLE)) AS unsubscribes__cv_mean_x,
  AVG(CAST(xpre_unsubscribes AS DOUBLE)) AS unsubscribes__cv_mean_c,
  AVG(CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS unsubscribes__cv_mean_h,
  VARIANCE(CAST(x_unsubscribes AS DOUBLE)) AS unsubscribes__cv_cov_x_x,
  COVAR_SAMP(CAST(x_unsubscribes AS DOUBLE), CAST(xpre_unsubscribes AS DOUBLE)) AS unsubscribes__cv_cov_x_c,
  COVAR_SAMP(
    CAST(x_unsubscribes AS DOUBLE),
    CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)
  ) AS unsubscribes__cv_cov_x_h,
  VARIANCE(CAST(xpre_unsubscribes AS DOUBLE)) AS unsubscribes__cv_cov_c_c,
  COVAR_SAMP(
    CAST(xpre_unsubscribes AS DOUBLE),
    CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)
  ) AS unsubscribes__cv_cov_c_h,
  VARIANCE(CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS unsubscribes__cv_cov_h_h,
  COUNT(CAST(CASE WHEN NOT x_page_latency IS NULL THEN x_page_latency END AS DOUBLE)) AS page_latency__cv_n,
  AVG(CAST(CASE WHEN NOT x_page_latency IS NULL THEN x_page_latency END AS DOUBLE)) AS page_latency__cv_mean_x,
  AVG(
    CAST(CASE
      WHEN NOT x_page_latency IS NULL
      THEN COALESCE(xpre_page_latency, CAST(0.0 AS DOUBLE))
    END AS DOUBLE)
  ) AS page_latency__cv_mean_c,
  AVG(
    CAST(CASE
      WHEN NOT x_page_latency IS NULL
      THEN CASE WHEN NOT xpre_page_latency IS NULL THEN 1 ELSE 0 END
    END AS DOUBLE)
  ) AS page_latency__cv_mean_h,
  VARIANCE(CAST(CASE WHEN NOT x_page_latency IS NULL THEN x_page_latency END AS DOUBLE)) AS page_latency__cv_cov_x_x,
  COVAR_SAMP(
    CAST(CASE WHEN NOT x_page_latency IS NULL THEN x_page_latency END AS DOUBLE),
    CAST(CASE
      WHEN NOT x_page_latency IS NULL
      THEN COALESCE(xpre_page_latency, CAST(0.0 AS DOUBLE))
    END AS DOUBLE)
  ) AS page_latency__cv_cov_x_c,
  COVAR_SAMP(
    CAST(CASE WHEN NOT x_page_latency IS NULL THEN x_page_latency END AS DOUBLE),
    CAST(CASE
      WHEN NOT x_page_latency IS NULL
      THEN CASE WHEN NOT xpre_page_latency IS NULL THEN 1 ELSE 0 END
    END AS DOUBLE)
  ) AS page_latency__cv_cov_x_h,
  VARIANCE(
    CAST(CASE
      WHEN NOT x_page_latency IS NULL
      THEN COALESCE(xpre_page_latency, CAST(0.0 AS DOUBLE))
    END AS DOUBLE)
  ) AS page_latency__cv_cov_c_c,
  COVAR_SAMP(
    CAST(CASE
      WHEN NOT x_page_latency IS NULL
      THEN COALESCE(xpre_page_latency, CAST(0.0 AS DOUBLE))
    END AS DOUBLE),
    CAST(CASE
      WHEN NOT x_page_latency IS NULL
      THEN CASE WHEN NOT xpre_page_latency IS NULL THEN 1 ELSE 0 END
    END AS DOUBLE)
  ) AS page_latency__cv_cov_c_h,
  VARIANCE(
    CAST(CASE
      WHEN NOT x_page_latency IS NULL
      THEN CASE WHEN NOT xpre_page_latency IS NULL THEN 1 ELSE 0 END
    END AS DOUBLE)
  ) AS page_latency__cv_cov_h_h,
  COUNT(CAST(x_purchases AS DOUBLE)) AS purchases__cv_n,
  AVG(CAST(x_purchases AS DOUBLE)) AS purchases__cv_mean_x,
  AVG(CAST(xpre_purchases AS DOUBLE)) AS purchases__cv_mean_c,
  AVG(CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS purchases__cv_mean_h,
  VARIANCE(CAST(x_purchases AS DOUBLE)) AS purchases__cv_cov_x_x,
  COVAR_SAMP(CAST(x_purchases AS DOUBLE), CAST(xpre_purchases AS DOUBLE)) AS purchases__cv_cov_x_c,
  COVAR_SAMP(CAST(x_purchases AS DOUBLE), CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS purchases__cv_cov_x_h,
  VARIANCE(CAST(xpre_purchases AS DOUBLE)) AS purchases__cv_cov_c_c,
  COVAR_SAMP(
    CAST(xpre_purchases AS DOUBLE),
    CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)
  ) AS purchases__cv_cov_c_h,
  VARIANCE(CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS purchases__cv_cov_h_h,
  COUNT(CAST(x_refunds AS DOUBLE)) AS refunds__cv_n,
  AVG(CAST(x_refunds AS DOUBLE)) AS refunds__cv_mean_x,
  AVG(CAST(xpre_refunds AS DOUBLE)) AS refunds__cv_mean_c,
  AVG(CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS refunds__cv_mean_h,
  VARIANCE(CAST(x_refunds AS DOUBLE)) AS refunds__cv_cov_x_x,
  COVAR_SAMP(CAST(x_refunds AS DOUBLE), CAST(xpre_refunds AS DOUBLE)) AS refunds__cv_cov_x_c,
  COVAR_SAMP(CAST(x_refunds AS DOUBLE), CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS refunds__cv_cov_x_h,
  VARIANCE(CAST(xpre_refunds AS DOUBLE)) AS refunds__cv_cov_c_c,
  COVAR_SAMP(CAST(xpre_refunds AS DOUBLE), CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS refunds__cv_cov_c_h,
  VARIANCE(CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS refunds__cv_cov_h_h,
  COUNT(CAST(x_buyer_share AS DOUBLE)) AS buyer_share__cv_n,
  AVG(CAST(x_buyer_share AS DOUBLE)) AS buyer_share__cv_mean_x,
  AVG(CAST(xpre_buyer_share AS DOUBLE)) AS buyer_share__cv_mean_c,
  AVG(CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS buyer_share__cv_mean_h,
  VARIANCE(CAST(x_buyer_share AS DOUBLE)) AS buyer_share__cv_cov_x_x,
  COVAR_SAMP(CAST(x_buyer_share AS DOUBLE), CAST(xpre_buyer_share AS DOUBLE)) AS buyer_share__cv_cov_x_c,
  COVAR_SAMP(CAST(x_buyer_share AS DOUBLE), CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS buyer_share__cv_cov_x_h,
  VARIANCE(CAST(xpre_buyer_share AS DOUBLE)) AS buyer_share__cv_cov_c_c,
  COVAR_SAMP(
    CAST(xpre_buyer_share AS DOUBLE),
    CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)
  ) AS buyer_share__cv_cov_c_h,
  VARIANCE(CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS buyer_share__cv_cov_h_h,
  COUNT(CAST(x_mobile_purchases AS DOUBLE)) AS mobile_purchases__cv_n,
  AVG(CAST(x_mobile_purchases AS DOUBLE)) AS mobile_purchases__cv_mean_x,
  AVG(CAST(xpre_mobile_purchases AS DOUBLE)) AS mobile_purchases__cv_mean_c,
  AVG(CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS mobile_purchases__cv_mean_h,
  VARIANCE(CAST(x_mobile_purchases AS DOUBLE)) AS mobile_purchases__cv_cov_x_x,
  COVAR_SAMP(CAST(x_mobile_purchases AS DOUBLE), CAST(xpre_mobile_purchases AS DOUBLE)) AS mobile_purchases__cv_cov_x_c,
  COVAR_SAMP(
    CAST(x_mobile_purchases AS DOUBLE),
    CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)
  ) AS mobile_purchases__cv_cov_x_h,
  VARIANCE(CAST(xpre_mobile_purchases AS DOUBLE)) AS mobile_purchases__cv_cov_c_c,
  COVAR_SAMP(
    CAST(xpre_mobile_purchases AS DOUBLE),
    CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)
  ) AS mobile_purchases__cv_cov_c_h,
  VARIANCE(CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS mobile_purchases__cv_cov_h_h,
  COUNT(CAST(x_click_through AS DOUBLE)) AS click_through__cv_n,
  AVG(CAST(x_click_through AS DOUBLE)) AS click_through__cv_mean_x,
  AVG(CAST(y_click_through AS DOUBLE)) AS click_through__cv_mean_y,
  AVG(CAST(xpre_click_through AS DOUBLE)) AS click_through__cv_mean_xpre,
  AVG(CAST(ypre_click_through AS DOUBLE)) AS click_through__cv_mean_ypre,
  AVG(CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS click_through__cv_mean_h,
  VARIANCE(CAST(x_click_through AS DOUBLE)) AS click_through__cv_cov_x_x,
  COVAR_SAMP(CAST(x_click_through AS DOUBLE), CAST(y_click_through AS DOUBLE)) AS click_through__cv_cov_x_y,
  COVAR_SAMP(CAST(x_click_through AS DOUBLE), CAST(xpre_click_through AS DOUBLE)) AS click_through__cv_cov_x_xpre,
  COVAR_SAMP(CAST(x_click_through AS DOUBLE), CAST(ypre_click_through AS DOUBLE)) AS click_through__cv_cov_x_ypre,
  COVAR_SAMP(
    CAST(x_click_through AS DOUBLE),
    CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)
  ) AS click_through__cv_cov_x_h,
  VARIANCE(CAST(y_click_through AS DOUBLE)) AS click_through__cv_cov_y_y,
  COVAR_SAMP(CAST(y_click_through AS DOUBLE), CAST(xpre_click_through AS DOUBLE)) AS click_through__cv_cov_y_xpre,
  COVAR_SAMP(CAST(y_click_through AS DOUBLE), CAST(ypre_click_through AS DOUBLE)) AS click_through__cv_cov_y_ypre,
  COVAR_SAMP(
    CAST(y_click_through AS DOUBLE),
    CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)
  ) AS click_through__cv_cov_y_h,
  VARIANCE(CAST(xpre_click_through AS DOUBLE)) AS click_through__cv_cov_xpre_xpre,
  COVAR_SAMP(CAST(xpre_click_through AS DOUBLE), CAST(ypre_click_through AS DOUBLE)) AS click_through__cv_cov_xpre_ypre,
  COVAR_SAMP(
    CAST(xpre_click_through AS DOUBLE),
    CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)
  ) AS click_through__cv_cov_xpre_h,
  VARIANCE(CAST(ypre_click_through AS DOUBLE)) AS click_through__cv_cov_ypre_ypre,
  COVAR_SAMP(
    CAST(ypre_click_through AS DOUBLE),
    CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)
  ) AS click_through__cv_cov_ypre_h,
  VARIANCE(CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS click_through__cv_cov_h_h,
  COUNT(CAST(x_session_success AS DOUBLE)) AS session_success__cv_n,
  AVG(CAST(x_session_success AS DOUBLE)) AS session_success__cv_mean_x,
  AVG(CAST(y_session_success AS DOUBLE)) AS session_success__cv_mean_y,
  AVG(CAST(xpre_session_success AS DOUBLE)) AS session_success__cv_mean_xpre,
  AVG(CAST(ypre_session_success AS DOUBLE)) AS session_success__cv_mean_ypre,
  AVG(CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS session_success__cv_mean_h,
  VARIANCE(CAST(x_session_success AS DOUBLE)) AS session_success__cv_cov_x_x,
  COVAR_SAMP(CAST(x_session_success AS DOUBLE), CAST(y_session_success AS DOUBLE)) AS session_success__cv_cov_x_y,
  COVAR_SAMP(CAST(x_session_success AS DOUBLE), CAST(xpre_session_success AS DOUBLE)) AS session_success__cv_cov_x_xpre,
  COVAR_SAMP(CAST(x_session_success AS DOUBLE), CAST(ypre_session_success AS DOUBLE)) AS session_success__cv_cov_x_ypre,
  COVAR_SAMP(
    CAST(x_session_success AS DOUBLE),
    CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)
  ) AS session_success__cv_cov_x_h,
  VARIANCE(CAST(y_session_success AS DOUBLE)) AS session_success__cv_cov_y_y,
  COVAR_SAMP(CAST(y_session_success AS DOUBLE), CAST(xpre_session_success AS DOUBLE)) AS session_success__cv_cov_y_xpre,
  COVAR_SAMP(CAST(y_session_success AS DOUBLE), CAST(ypre_session_success AS DOUBLE)) AS session_success__cv_cov_y_ypre,
  COVAR_SAMP(
    CAST(y_session_success AS DOUBLE),
    CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)
  ) AS session_success__cv_cov_y_h,
  VARIANCE(CAST(xpre_session_success AS DOUBLE)) AS session_success__cv_cov_xpre_xpre,
  COVAR_SAMP(CAST(xpre_session_success AS DOUBLE), CAST(ypre_session_success AS DOUBLE)) AS session_success__cv_cov_xpre_ypre,
  COVAR_SAMP(
    CAST(xpre_session_success AS DOUBLE),
    CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)
  ) AS session_success__cv_cov_xpre_h,
  VARIANCE(CAST(ypre_session_success AS DOUBLE)) AS session_success__cv_cov_ypre_ypre,
  COVAR_SAMP(
    CAST(ypre_session_success AS DOUBLE),
    CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)
  ) AS session_success__cv_cov_ypre_h,
  VARIANCE(CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS session_success__cv_cov_h_h,
  COUNT(CAST(x_net_value AS DOUBLE)) AS net_value__cv_n,
  AVG(CAST(x_net_value AS DOUBLE)) AS net_value__cv_mean_x,
  AVG(CAST(xpre_net_value AS DOUBLE)) AS net_value__cv_mean_c,
  AVG(CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS net_value__cv_mean_h,
  VARIANCE(CAST(x_net_value AS DOUBLE)) AS net_value__cv_cov_x_x,
  COVAR_SAMP(CAST(x_net_value AS DOUBLE), CAST(xpre_net_value AS DOUBLE)) AS net_value__cv_cov_x_c,
  COVAR_SAMP(CAST(x_net_value AS DOUBLE), CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS net_value__cv_cov_x_h,
  VARIANCE(CAST(xpre_net_value AS DOUBLE)) AS net_value__cv_cov_c_c,
  COVAR_SAMP(
    CAST(xpre_net_value AS DOUBLE),
    CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)
  ) AS net_value__cv_cov_c_h,
  VARIANCE(CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS net_value__cv_cov_h_h,
  COUNT(
    CAST(CASE
      WHEN x_revenue_winsorised > caps.revenue_winsorised__cap
      THEN caps.revenue_winsorised__cap
      ELSE x_revenue_winsorised
    END AS DOUBLE)
  ) AS revenue_winsorised__cv_n,
  AVG(
    CAST(CASE
      WHEN x_revenue_winsorised > caps.revenue_winsorised__cap
      THEN caps.revenue_winsorised__cap
      ELSE x_revenue_winsorised
    END AS DOUBLE)
  ) AS revenue_winsorised__cv_mean_x,
  AVG(
    CAST(CASE
      WHEN xpre_revenue_winsorised > caps.revenue_winsorised__cap_pre
      THEN caps.revenue_winsorised__cap_pre
      ELSE xpre_revenue_winsorised
    END AS DOUBLE)
  ) AS revenue_winsorised__cv_mean_c,
  AVG(CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS revenue_winsorised__cv_mean_h,
  VARIANCE(
    CAST(CASE
      WHEN x_revenue_winsorised > caps.revenue_winsorised__cap
      THEN caps.revenue_winsorised__cap
      ELSE x_revenue_winsorised
    END AS DOUBLE)
  ) AS revenue_winsorised__cv_cov_x_x,
  COVAR_SAMP(
    CAST(CASE
      WHEN x_revenue_winsorised > caps.revenue_winsorised__cap
      THEN caps.revenue_winsorised__cap
      ELSE x_revenue_winsorised
    END AS DOUBLE),
    CAST(CASE
      WHEN xpre_revenue_winsorised > caps.revenue_winsorised__cap_pre
      THEN caps.revenue_winsorised__cap_pre
      ELSE xpre_revenue_winsorised
    END AS DOUBLE)
  ) AS revenue_winsorised__cv_cov_x_c,
  COVAR_SAMP(
    CAST(CASE
      WHEN x_revenue_winsorised > caps.revenue_winsorised__cap
      THEN caps.revenue_winsorised__cap
      ELSE x_revenue_winsorised
    END AS DOUBLE),
    CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)
  ) AS revenue_winsorised__cv_cov_x_h,
  VARIANCE(
    CAST(CASE
      WHEN xpre_revenue_winsorised > caps.revenue_winsorised__cap_pre
      THEN caps.revenue_winsorised__cap_pre
      ELSE xpre_revenue_winsorised
    END AS DOUBLE)
  ) AS revenue_winsorised__cv_cov_c_c,
  COVAR_SAMP(
    CAST(CASE
      WHEN xpre_revenue_winsorised > caps.revenue_winsorised__cap_pre
      THEN caps.revenue_winsorised__cap_pre
      ELSE xpre_revenue_winsorised
    END AS DOUBLE),
    CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)
  ) AS revenue_winsorised__cv_cov_c_h,
  VARIANCE(CAST(CASE WHEN has_pre THEN 1 ELSE 0 END AS DOUBLE)) AS revenue_winsorised__cv_cov_h_h
FROM unit_rows
CROSS JOIN caps
WHERE
  NOT is_bot AND NOT contaminated
GROUP BY
  variant
ORDER BY
  variant NULLS FIRST;

-- quantile_page_latency_p95
WITH q_values AS (
  SELECT
    variant,
    unit,
    v
  FROM unit_rows
  CROSS JOIN UNNEST(v_page_latency_p95) AS t(v)
  WHERE
    (
      NOT is_bot AND NOT contaminated
    ) AND NOT v IS NULL
), q_ranked AS (
  SELECT
    variant,
    unit,
    v,
    ROW_NUMBER() OVER (PARTITION BY variant ORDER BY v) - 1 AS r,
    COUNT(*) OVER (PARTITION BY variant) AS n
  FROM q_values
), q_point AS (
  SELECT
    variant,
    MAX(n) AS n_values,
    MAX(CASE WHEN r = FLOOR(CAST(n - 1 AS DOUBLE) * CAST(0.95 AS DOUBLE)) THEN v END) + MAX(
      CAST(n - 1 AS DOUBLE) * CAST(0.95 AS DOUBLE) - FLOOR(CAST(n - 1 AS DOUBLE) * CAST(0.95 AS DOUBLE))
    ) * (
      MAX(CASE WHEN r = CEIL(CAST(n - 1 AS DOUBLE) * CAST(0.95 AS DOUBLE)) THEN v END) - MAX(CASE WHEN r = FLOOR(CAST(n - 1 AS DOUBLE) * CAST(0.95 AS DOUBLE)) THEN v END)
    ) AS quantile
  FROM q_ranked
  GROUP BY
    variant
), q_units AS (
  SELECT
    rk.variant,
    rk.unit,
    CAST(COUNT(CASE WHEN rk.v <= p.quantile THEN 1 END) AS DOUBLE) AS s,
    CAST(COUNT(*) AS DOUBLE) AS m
  FROM q_ranked AS rk
  JOIN q_point AS p
    ON rk.variant = p.variant
  GROUP BY
    rk.variant,
    rk.unit
), q_spread AS (
  SELECT
    variant,
    COUNT(*) AS n_units,
    AVG(s ORDER BY unit) AS mean_below,
    AVG(m ORDER BY unit) AS mean_count,
    VARIANCE(s ORDER BY unit) AS var_below,
    VARIANCE(m ORDER BY unit) AS var_count,
    COVAR_SAMP(s, m ORDER BY unit) AS cov_below_count
  FROM q_units
  GROUP BY
    variant
), q_band AS (
  SELECT
    s.variant,
    s.n_units,
    p.n_values,
    p.quantile,
    s.mean_below,
    s.mean_count,
    s.var_below,
    s.var_count,
    s.cov_below_count,
    CASE
      WHEN (
        CAST(0.95 AS DOUBLE) - CAST(1.959963984540054 AS DOUBLE) * SQRT(
          CASE
            WHEN (
              s.var_below - CAST(2.0 AS DOUBLE) * (
                (
                  s.mean_below / s.mean_count
                ) * s.cov_below_count
              ) + (
                s.mean_below / s.mean_count
              ) * (
                (
                  s.mean_below / s.mean_count
                ) * s.var_count
              )
            ) IS NULL
            OR CAST(0.0 AS DOUBLE) IS NULL
            THEN NULL
            ELSE GREATEST(
              (
                s.var_below - CAST(2.0 AS DOUBLE) * (
                  (
                    s.mean_below / s.mean_count
                  ) * s.cov_below_count
                ) + (
                  s.mean_below / s.mean_count
                ) * (
                  (
                    s.mean_below / s.mean_count
                  ) * s.var_count
                )
              ),
              CAST(0.0 AS DOUBLE)
            )
          END / CAST(s.n_units AS DOUBLE) / s.mean_count / s.mean_count
        )
      ) IS NULL
      OR CAST(0.0 AS DOUBLE) IS NULL
      THEN NULL
      ELSE GREATEST(
        CAST(0.95 AS DOUBLE) - CAST(1.959963984540054 AS DOUBLE) * SQRT(
          CASE
            WHEN (
              s.var_below - CAST(2.0 AS DOUBLE) * (
                (
                  s.mean_below / s.mean_count
                ) * s.cov_below_count
              ) + (
                s.mean_below / s.mean_count
              ) * (
                (
                  s.mean_below / s.mean_count
                ) * s.var_count
              )
            ) IS NULL
            OR CAST(0.0 AS DOUBLE) IS NULL
            THEN NULL
            ELSE GREATEST(
              (
                s.var_below - CAST(2.0 AS DOUBLE) * (
                  (
                    s.mean_below / s.mean_count
                  ) * s.cov_below_count
                ) + (
                  s.mean_below / s.mean_count
                ) * (
                  (
                    s.mean_below / s.mean_count
                  ) * s.var_count
                )
              ),
              CAST(0.0 AS DOUBLE)
            )
          END / CAST(s.n_units AS DOUBLE) / s.mean_count / s.mean_count
        ),
        CAST(0.0 AS DOUBLE)
      )
    END AS level_low,
    CASE
      WHEN (
        CAST(0.95 AS DOUBLE) + CAST(1.959963984540054 AS DOUBLE) * SQRT(
          CASE
            WHEN (
              s.var_below - CAST(2.0 AS DOUBLE) * (
                (
                  s.mean_below / s.mean_count
                ) * s.cov_below_count
              ) + (
                s.mean_below / s.mean_count
              ) * (
                (
                  s.mean_below / s.mean_count
                ) * s.var_count
              )
            ) IS NULL
            OR CAST(0.0 AS DOUBLE) IS NULL
            THEN NULL
            ELSE GREATEST(
              (
                s.var_below - CAST(2.0 AS DOUBLE) * (
                  (
                    s.mean_below / s.mean_count
                  ) * s.cov_below_count
                ) + (
                  s.mean_below / s.mean_count
                ) * (
                  (
                    s.mean_below / s.mean_count
                  ) * s.var_count
                )
              ),
              CAST(0.0 AS DOUBLE)
            )
          END / CAST(s.n_units AS DOUBLE) / s.mean_count / s.mean_count
        )
      ) IS NULL
      OR CAST(1.0 AS DOUBLE) IS NULL
      THEN NULL
      ELSE LEAST(
        CAST(0.95 AS DOUBLE) + CAST(1.959963984540054 AS DOUBLE) * SQRT(
          CASE
            WHEN (
              s.var_below - CAST(2.0 AS DOUBLE) * (
                (
                  s.mean_below / s.mean_count
                ) * s.cov_below_count
              ) + (
                s.mean_below / s.mean_count
              ) * (
                (
                  s.mean_below / s.mean_count
                ) * s.var_count
              )
            ) IS NULL
            OR CAST(0.0 AS DOUBLE) IS NULL
            THEN NULL
            ELSE GREATEST(
              (
                s.var_below - CAST(2.0 AS DOUBLE) * (
                  (
                    s.mean_below / s.mean_count
                  ) * s.cov_below_count
                ) + (
                  s.mean_below / s.mean_count
                ) * (
                  (
                    s.mean_below / s.mean_count
                  ) * s.var_count
                )
              ),
              CAST(0.0 AS DOUBLE)
            )
          END / CAST(s.n_units AS DOUBLE) / s.mean_count / s.mean_count
        ),
        CAST(1.0 AS DOUBLE)
      )
    END AS level_high
  FROM q_spread AS s
  JOIN q_point AS p
    ON s.variant = p.variant
), q_ends AS (
  SELECT
    rk.variant,
    MAX(CASE WHEN rk.r = FLOOR(CAST(rk.n - 1 AS DOUBLE) * b.level_low) THEN rk.v END) + MAX(
      CAST(rk.n - 1 AS DOUBLE) * b.level_low - FLOOR(CAST(rk.n - 1 AS DOUBLE) * b.level_low)
    ) * (
      MAX(CASE WHEN rk.r = CEIL(CAST(rk.n - 1 AS DOUBLE) * b.level_low) THEN rk.v END) - MAX(CASE WHEN rk.r = FLOOR(CAST(rk.n - 1 AS DOUBLE) * b.level_low) THEN rk.v END)
    ) AS value_low,
    MAX(CASE WHEN rk.r = FLOOR(CAST(rk.n - 1 AS DOUBLE) * b.level_high) THEN rk.v END) + MAX(
      CAST(rk.n - 1 AS DOUBLE) * b.level_high - FLOOR(CAST(rk.n - 1 AS DOUBLE) * b.level_high)
    ) * (
      MAX(CASE WHEN rk.r = CEIL(CAST(rk.n - 1 AS DOUBLE) * b.level_high) THEN rk.v END) - MAX(CASE WHEN rk.r = FLOOR(CAST(rk.n - 1 AS DOUBLE) * b.level_high) THEN rk.v END)
    ) AS value_high
  FROM q_ranked AS rk
  JOIN q_band AS b
    ON rk.variant = b.variant
  GROUP BY
    rk.variant
)
SELECT
  b.*,
  e.value_low,
  e.value_high
FROM q_band AS b
JOIN q_ends AS e
  ON b.variant = e.variant
ORDER BY
  b.variant;

-- segments_device
WITH cap_values AS (
  SELECT
    'revenue_winsorised' AS k,
    CAST(x_revenue_winsorised AS DOUBLE) AS v,
    CAST(0.999 AS DOUBLE) AS lvl
  FROM unit_rows
  WHERE
    (
      NOT is_bot AND NOT contaminated
    ) AND NOT x_revenue_winsorised IS NULL
  UNION ALL
  SELECT
    'revenue_winsorised:pre' AS k,
    CAST(xpre_revenue_winsorised AS DOUBLE) AS v,
    CAST(0.999 AS DOUBLE) AS lvl
  FROM unit_rows
  WHERE
    (
      NOT is_bot AND NOT contaminated
    ) AND NOT x_revenue_winsorised IS NULL
), cap_ranked AS (
  SELECT
    k,
    lvl,
    v,
    ROW_NUMBER() OVER (PARTITION BY k ORDER BY v) - 1 AS r,
    COUNT(*) OVER (PARTITION BY k) AS n
  FROM cap_values
), cap_levels AS (
  SELECT
    k,
    MAX(CASE WHEN r = FLOOR(CAST(n - 1 AS DOUBLE) * lvl) THEN v END) + MAX(CAST(n - 1 AS DOUBLE) * lvl - FLOOR(CAST(n - 1 AS DOUBLE) * lvl)) * (
      MAX(CASE WHEN r = CEIL(CAST(n - 1 AS DOUBLE) * lvl) THEN v END) - MAX(CASE WHEN r = FLOOR(CAST(n - 1 AS DOUBLE) * lvl) THEN v END)
    ) AS cap
  FROM cap_ranked
  GROUP BY
    k
), caps AS (
  SELECT
    MAX(CASE WHEN k = 'revenue_winsorised' THEN cap END) AS revenue_winsorised__cap,
    MAX(CASE WHEN k = 'revenue_winsorised:pre' THEN cap END) AS revenue_winsorised__cap_pre
  FROM cap_levels
)
SELECT
  variant,
  seg_device AS segment,
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
  COUNT(x_page_latency_p95) AS page_latency_p95__n,
  AVG(x_page_latency_p95) AS page_latency_p95__mean_x,
  VARIANCE(x_page_latency_p95) AS page_latency_p95__var_x,
  COUNT(x_purchases) AS purchases__n,
  AVG(x_purchases) AS purchases__mean_x,
  VARIANCE(x_purchases) AS purchases__var_x,
  COUNT(x_refunds) AS refunds__n,
  AVG(x_refunds) AS refunds__mean_x,
  VARIANCE(x_refunds) AS refunds__var_x,
  COUNT(x_buyer_share) AS buyer_share__n,
  AVG(x_buyer_share) AS buyer_share__mean_x,
  VARIANCE(x_buyer_share) AS buyer_share__var_x,
  CAST(SUM(CAST(x_buyer_share AS BIGINT)) AS BIGINT) AS buyer_share__successes,
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
  VARIANCE(x_net_value) AS net_value__var_x,
  COUNT(x_revenue_winsorised) AS revenue_winsorised__n,
  AVG(
    CASE
      WHEN x_revenue_winsorised > caps.revenue_winsorised__cap
      THEN caps.revenue_winsorised__cap
      ELSE x_revenue_winsorised
    END
  ) AS revenue_winsorised__mean_x,
  VARIANCE(
    CASE
      WHEN x_revenue_winsorised > caps.revenue_winsorised__cap
      THEN caps.revenue_winsorised__cap
      ELSE x_revenue_winsorised
    END
  ) AS revenue_winsorised__var_x
FROM unit_rows
CROSS JOIN caps
WHERE
  NOT is_bot AND NOT contaminated
GROUP BY
  variant,
  seg_device
ORDER BY
  variant,
  seg_device NULLS FIRST;

-- segments_country
WITH cap_values AS (
  SELECT
    'revenue_winsorised' AS k,
    CAST(x_revenue_winsorised AS DOUBLE) AS v,
    CAST(0.999 AS DOUBLE) AS lvl
  FROM unit_rows
  WHERE
    (
      NOT is_bot AND NOT contaminated
    ) AND NOT x_revenue_winsorised IS NULL
  UNION ALL
  SELECT
    'revenue_winsorised:pre' AS k,
    CAST(xpre_revenue_winsorised AS DOUBLE) AS v,
    CAST(0.999 AS DOUBLE) AS lvl
  FROM unit_rows
  WHERE
    (
      NOT is_bot AND NOT contaminated
    ) AND NOT x_revenue_winsorised IS NULL
), cap_ranked AS (
  SELECT
    k,
    lvl,
    v,
    ROW_NUMBER() OVER (PARTITION BY k ORDER BY v) - 1 AS r,
    COUNT(*) OVER (PARTITION BY k) AS n
  FROM cap_values
), cap_levels AS (
  SELECT
    k,
    MAX(CASE WHEN r = FLOOR(CAST(n - 1 AS DOUBLE) * lvl) THEN v END) + MAX(CAST(n - 1 AS DOUBLE) * lvl - FLOOR(CAST(n - 1 AS DOUBLE) * lvl)) * (
      MAX(CASE WHEN r = CEIL(CAST(n - 1 AS DOUBLE) * lvl) THEN v END) - MAX(CASE WHEN r = FLOOR(CAST(n - 1 AS DOUBLE) * lvl) THEN v END)
    ) AS cap
  FROM cap_ranked
  GROUP BY
    k
), caps AS (
  SELECT
    MAX(CASE WHEN k = 'revenue_winsorised' THEN cap END) AS revenue_winsorised__cap,
    MAX(CASE WHEN k = 'revenue_winsorised:pre' THEN cap END) AS revenue_winsorised__cap_pre
  FROM cap_levels
)
SELECT
  variant,
  seg_country AS segment,
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
  COUNT(x_page_latency_p95) AS page_latency_p95__n,
  AVG(x_page_latency_p95) AS page_latency_p95__mean_x,
  VARIANCE(x_page_latency_p95) AS page_latency_p95__var_x,
  COUNT(x_purchases) AS purchases__n,
  AVG(x_purchases) AS purchases__mean_x,
  VARIANCE(x_purchases) AS purchases__var_x,
  COUNT(x_refunds) AS refunds__n,
  AVG(x_refunds) AS refunds__mean_x,
  VARIANCE(x_refunds) AS refunds__var_x,
  COUNT(x_buyer_share) AS buyer_share__n,
  AVG(x_buyer_share) AS buyer_share__mean_x,
  VARIANCE(x_buyer_share) AS buyer_share__var_x,
  CAST(SUM(CAST(x_buyer_share AS BIGINT)) AS BIGINT) AS buyer_share__successes,
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
  VARIANCE(x_net_value) AS net_value__var_x,
  COUNT(x_revenue_winsorised) AS revenue_winsorised__n,
  AVG(
    CASE
      WHEN x_revenue_winsorised > caps.revenue_winsorised__cap
      THEN caps.revenue_winsorised__cap
      ELSE x_revenue_winsorised
    END
  ) AS revenue_winsorised__mean_x,
  VARIANCE(
    CASE
      WHEN x_revenue_winsorised > caps.revenue_winsorised__cap
      THEN caps.revenue_winsorised__cap
      ELSE x_revenue_winsorised
    END
  ) AS revenue_winsorised__var_x
FROM unit_rows
CROSS JOIN caps
WHERE
  NOT is_bot AND NOT contaminated
GROUP BY
  variant,
  seg_country
ORDER BY
  variant,
  seg_country NULLS FIRST;
