-- Budget recipes for a finance team: a budget per period and cost centre,
-- compared with what has happened so far plus what sidetrend forecasts for
-- the rest of the period.
--
-- Each recipe starts with a line "-- recipe: NAME"; run them in order with
-- psql (\i sql/budgets.sql) or paste the one you need. They create objects in
-- your own schema (the first on your search_path), never in sidetrend's, and
-- read only sidetrend's views, so a role with sidetrend_reader can run them.
-- The test TestBudgetRecipes (pgsync/analyst_budget_test.go) runs every
-- recipe in this file against numbers worked out from the estimator.
--
-- What the numbers mean
--
--   * A cost centre is a series: budgets.cost_centre is the series_key of a
--     tracker whose aggregate is sum or count (a period total of means,
--     minima or maxima means nothing, so other trackers are left out).
--   * Actual to date is the sum of the folded buckets in the period. The
--     newest bucket, still open (today, for daily buckets), is not an actual
--     yet: its rows so far are partial. It is counted by the forecast, which
--     is a forecast of the whole bucket.
--   * Forecast of the rest is the cumulative forecast cum_forecast of the buckets
--     from the next one to the last bucket of the period, with its 95 %
--     interval cum_lower95 .. cum_upper95. That interval accounts for the forecast
--     errors of one series being correlated across horizons (the trend
--     estimate is shared); it needs the tracker's horizon to reach the end of
--     the period. Set horizon => to cover the longest period you budget
--     (a quarter of daily buckets: 92; a year: 366, and horizons go to 1000).
--     Where the horizon is too short, the projection is NULL and the note
--     says so.
--   * Probability of ending below budget uses a normal approximation:
--         sd = (cum_upper95 - cum_lower95) / (2 * 1.959963984540054)
--         p  = Phi((budget - projected) / sd)
--     The intervals themselves use Student's t with T - p degrees of
--     freedom, which has heavier tails than the normal, so p is approximate:
--     close when the tracker has seen many points, too confident (too close
--     to 0 or 1) when it has seen few. Both rest on the model's assumptions
--     (local trend plus season, independent errors of constant variance).
--   * Buckets and periods that do not line up: a bucket belongs to the
--     period its start falls in. Day, hour and month buckets line up with
--     months, quarters and years exactly. A weekly bucket that starts on
--     30 March counts whole in March; for budgets by month, track in days.
--   * Periods: 'closed' when every bucket of the period is folded (the
--     projection is the actual, p is 0 or 1), 'current' when the next bucket
--     to forecast is in the period, 'future' when the period starts later:
--     then the projection is the sum of the point forecasts of its buckets
--     and there is no interval (the forecast arrays give intervals only for
--     sums that start at the next bucket).
--   * Rolling up cost centres: summing the per-series intervals is not an
--     interval for the total. The rollup recipe gives two: one that assumes
--     the cost centres' errors are independent (sd of the total =
--     sqrt(sum sd^2)), and the sum of the bounds, which is what perfectly
--     correlated errors would give and is never narrower than the truth
--     for positively correlated ones. The truth for cost centres that move
--     together (one economy, one calendar) is in between; p is given under
--     independence and is the optimistic one.

-- recipe: budgets_table
CREATE TABLE IF NOT EXISTS budgets (
    tracker      text NOT NULL,      -- the sidetrend tracker (sidetrend.tracker_settings.tracker)
    cost_centre  text NOT NULL,      -- its series_key
    period       text NOT NULL CHECK (period IN ('month', 'quarter', 'year')),
    period_start date NOT NULL,      -- first day of the month, quarter or year
    amount       numeric NOT NULL,
    PRIMARY KEY (tracker, cost_centre, period, period_start),
    CHECK (period_start = date_trunc(period, period_start)::date)
);

-- recipe: budget_outlook
-- One row per budget: actual to date, forecast of the rest, projection with
-- its 95 % interval, and the probability of ending below the budget.
CREATE OR REPLACE VIEW budget_outlook AS
WITH b AS (
    SELECT b.tracker, b.cost_centre, b.period, b.period_start, b.amount::float8 AS budget,
           ts.horizon, st.last_bucket AS as_of,
           -- Buckets first_b .. end_b - 1 start inside the period (local
           -- midnights in the tracker's zone); folded is the newest folded one.
           sidetrend.bucket_ceil(sidetrend.wall_to_instant(b.period_start::timestamp, ts.tz), ts.bucket, ts.tz) AS first_b,
           sidetrend.bucket_ceil(sidetrend.wall_to_instant(
               b.period_start + CASE b.period WHEN 'month' THEN interval '1 month'
                                              WHEN 'quarter' THEN interval '3 months'
                                              ELSE interval '1 year' END, ts.tz), ts.bucket, ts.tz) AS end_b,
           sidetrend.bucket_index(st.last_bucket, ts.bucket, ts.tz) AS folded
    FROM budgets b
    JOIN sidetrend.tracker_settings ts ON ts.tracker = b.tracker AND ts.agg IN ('sum', 'count')
    JOIN sidetrend.series_status st ON st.tracker = b.tracker AND st.series_key = b.cost_centre
), k AS (
    SELECT b.*,
           CASE WHEN b.folded >= b.end_b - 1 THEN 'closed'
                WHEN b.folded + 1 >= b.first_b THEN 'current'
                ELSE 'future' END AS state,
           greatest(0, least(b.end_b, b.folded + 1) - b.first_b) AS buckets_observed,
           b.end_b - greatest(b.first_b, b.folded + 1) AS left_b
    FROM b
), v AS (
    SELECT k.*,
           greatest(k.left_b, 0) AS buckets_remaining,
           (SELECT coalesce(sum(a.value), 0) FROM sidetrend.actuals a
             WHERE a.tracker = k.tracker AND a.series_key = k.cost_centre
               AND a.bucket >= k.first_b AND a.bucket < k.end_b AND a.bucket <= k.folded) AS actual_to_date,
           f.cum_forecast, f.cum_lower95, f.cum_upper95,
           (SELECT sum(g.forecast) FROM sidetrend.forecasts g
             WHERE g.tracker = k.tracker AND g.series_key = k.cost_centre
               AND g.horizon BETWEEN k.first_b - k.folded AND k.end_b - 1 - k.folded
            HAVING count(*) = k.end_b - k.first_b) AS future_forecast,
           EXISTS (SELECT 1 FROM sidetrend.forecasts g
                    WHERE g.tracker = k.tracker AND g.series_key = k.cost_centre) AS ready
    FROM k
    LEFT JOIN sidetrend.forecasts f
        ON f.tracker = k.tracker AND f.series_key = k.cost_centre AND k.state = 'current'
       AND f.horizon = k.end_b - 1 - k.folded
)
SELECT v.tracker, v.cost_centre, v.period, v.period_start, v.budget, v.state, v.as_of,
       v.buckets_observed, v.buckets_remaining, v.actual_to_date,
       CASE v.state WHEN 'closed' THEN 0 WHEN 'current' THEN v.cum_forecast END AS forecast_remaining,
       CASE v.state WHEN 'closed' THEN v.actual_to_date
                    WHEN 'current' THEN v.actual_to_date + v.cum_forecast
                    ELSE v.future_forecast END AS projected,
       CASE v.state WHEN 'closed' THEN v.actual_to_date WHEN 'current' THEN v.actual_to_date + v.cum_lower95 END AS lower95,
       CASE v.state WHEN 'closed' THEN v.actual_to_date WHEN 'current' THEN v.actual_to_date + v.cum_upper95 END AS upper95,
       CASE v.state WHEN 'closed' THEN 0 WHEN 'current' THEN (v.cum_upper95 - v.cum_lower95) / (2 * 1.959963984540054) END AS sd,
       CASE v.state
           WHEN 'closed' THEN (v.actual_to_date < v.budget)::int::float8
           WHEN 'current' THEN sidetrend.normal_cdf(
               (v.budget - v.actual_to_date - v.cum_forecast) / nullif((v.cum_upper95 - v.cum_lower95) / (2 * 1.959963984540054), 0))
       END AS p_below_budget,
       CASE WHEN v.state <> 'closed' AND NOT v.ready THEN 'the series is still warming up: no forecast yet'
            WHEN v.state <> 'closed' AND v.end_b - 1 - v.folded > v.horizon
                THEN format('horizon too short: the period ends %s buckets ahead, the tracker forecasts %s', v.end_b - 1 - v.folded, v.horizon)
            WHEN v.state = 'current' AND v.cum_lower95 IS NULL THEN 'no interval yet (too few points)'
            WHEN v.state = 'future' THEN 'future period: point forecast only'
       END AS note
FROM v;

-- recipe: this_period
-- Will we hit budget? The periods under way, least likely to stay within
-- budget first.
SELECT tracker, cost_centre, period, period_start, budget, actual_to_date, projected, lower95, upper95,
       round(p_below_budget::numeric, 3) AS p_below_budget, note
FROM budget_outlook
WHERE state = 'current'
ORDER BY p_below_budget NULLS FIRST, tracker, cost_centre, period;

-- recipe: rollup
-- All cost centres of a tracker together, per budget period: two intervals
-- for the total (see the header), and p under independence.
SELECT tracker, period, period_start,
       count(*) AS cost_centres,
       sum(budget) AS budget,
       sum(actual_to_date) AS actual_to_date,
       CASE WHEN count(projected) = count(*) THEN sum(projected) END AS projected,
       CASE WHEN count(sd) = count(*) THEN sqrt(sum(sd * sd)) END AS sd_independent,
       CASE WHEN count(sd) = count(*) THEN sum(projected) - 1.959963984540054 * sqrt(sum(sd * sd)) END AS lower95_independent,
       CASE WHEN count(sd) = count(*) THEN sum(projected) + 1.959963984540054 * sqrt(sum(sd * sd)) END AS upper95_independent,
       CASE WHEN count(lower95) = count(*) THEN sum(lower95) END AS lower95_sum_of_bounds,
       CASE WHEN count(upper95) = count(*) THEN sum(upper95) END AS upper95_sum_of_bounds,
       CASE WHEN count(sd) = count(*) THEN
           CASE WHEN sum(sd * sd) > 0 THEN sidetrend.normal_cdf((sum(budget) - sum(projected)) / sqrt(sum(sd * sd)))
                ELSE (sum(projected) < sum(budget))::int::float8 END
       END AS p_below_budget_independent
FROM budget_outlook
GROUP BY tracker, period, period_start
ORDER BY tracker, period, period_start;
