-- The windows `plimsoll report` draws for each alert: the alert's series (check, key, split value)
-- from $before windows before its first breaching window to $after windows after the window that
-- closed it (to the series' last window while it is open). The plotted value is the EWMA statistic
-- where the baseline has one, else the window's value. A span longer than $max_points windows is
-- thinned into buckets of consecutive windows, each keeping its lowest and highest window and its
-- first breaching one, so spikes and every bucket with a breach stay visible. Only the alert's own
-- breaching windows (from its opening to its last breach) are marked: the span drawn can hold
-- another alert of the same series, before or after it, whose windows are not this alert's.
WITH chosen AS (
    SELECT alert_id, check_name, key, split_value, opened_at, closed_at, last_breach_at
    FROM alerts
    WHERE list_contains($alert_ids, alert_id)
),
series AS (
    SELECT
        c.alert_id, c.opened_at, c.closed_at,
        w.window_number, w.window_start, w.window_end, w.sessions, w.bad, w.value, w.statistic, w.threshold,
        coalesce(w.breach AND w.window_end BETWEEN c.opened_at AND c.last_breach_at, false) AS breach,
        coalesce(w.statistic, w.value) AS plotted,
        row_number() OVER (PARTITION BY c.alert_id ORDER BY w.window_number) AS n
    FROM chosen AS c
    JOIN windows AS w
        ON w.check_name = c.check_name AND w.key = c.key AND w.split_value IS NOT DISTINCT FROM c.split_value
),
bounds AS (
    SELECT
        alert_id,
        coalesce(min(n) FILTER (WHERE window_end >= opened_at), max(n)) - $before AS lo,
        coalesce(max(n) FILTER (WHERE window_end <= closed_at), max(n)) + $after AS hi
    FROM series
    GROUP BY alert_id
),
spanned AS (
    SELECT s.*, count(*) OVER (PARTITION BY s.alert_id) AS span_windows, b.lo
    FROM series AS s
    JOIN bounds AS b ON b.alert_id = s.alert_id AND s.n BETWEEN b.lo AND b.hi
),
bucketed AS (
    SELECT
        *,
        -- one bucket per window when the span fits, else about $max_points / 3 buckets
        (n - greatest(lo, 1)) // greatest(1, ceil(span_windows / ($max_points / 3))::BIGINT) AS bucket,
        span_windows > $max_points AS thinned
    FROM spanned
),
ranked AS (
    SELECT
        *,
        row_number() OVER (PARTITION BY alert_id, bucket ORDER BY plotted DESC NULLS LAST, window_number) AS from_top,
        row_number() OVER (PARTITION BY alert_id, bucket ORDER BY plotted ASC NULLS LAST, window_number) AS from_bottom,
        row_number() OVER (PARTITION BY alert_id, bucket ORDER BY NOT breach, window_number) AS first_breach
    FROM bucketed
)
SELECT
    alert_id, window_number, window_start, window_end, sessions, bad, value, statistic, threshold, breach, plotted,
    span_windows, thinned
FROM ranked
WHERE NOT thinned OR from_top = 1 OR from_bottom = 1 OR (breach AND first_breach = 1)
ORDER BY alert_id, window_number;
