{% import "macros.sql" as m %}
{% set check_lit = check.name | literal %}
{% set life = lifecycle %}
{% set peak = "greatest" if check.direction == "up" else "least" %}
-- ── stage 5 · lifecycle ─────────────────────────────────────────────────────────────────────
-- A breach opens an alert for its series unless one is open; more breaches update it. An open alert
-- closes as 'recovered' after {{ life.recover_after }} healthy windows in a row, or as 'expired' once the series
-- has had no window for {{ life.expire_after | interval }} (between two windows, or before the watermark). A breach
-- whose window starts within {{ life.reopen_within | interval }} of the series' last recovery reopens that alert (event
-- 'reopened'; its counts go on) instead of opening a new one. A window without a verdict (breach
-- NULL) is neither healthy nor a breach. All in data time, one pass over every series' new windows
-- in order.
-- prior_alerts: each series' latest alert of this definition: every open one (a series has at most
-- one), and for a series with new windows its last closed one, which a breach may reopen (when it
-- closed as 'recovered'). open_alerts: the open ones among them.
CREATE OR REPLACE TEMP TABLE prior_alerts AS
SELECT *
FROM alerts AS a
WHERE check_name = {{ check_lit }} AND definition_hash = $definition
  AND (status = 'open' OR EXISTS (SELECT 1 FROM judged AS j WHERE {{ m.same_series("j", "a") }}))
QUALIFY row_number() OVER (PARTITION BY key, split_value ORDER BY status = 'open' DESC, closed_at DESC, opened_at DESC) = 1;

CREATE OR REPLACE TEMP VIEW open_alerts AS
SELECT * FROM prior_alerts WHERE status = 'open';

CREATE OR REPLACE TEMP TABLE steps AS
WITH relevant AS (
    SELECT DISTINCT key, split_value FROM judged WHERE breach
    UNION
    SELECT key, split_value FROM open_alerts
),
ordered AS (
    SELECT
        j.key, j.key_text, j.split_value, j.window_number, j.window_start, j.window_end, j.value, j.threshold,
        j.bad, j.sessions, coalesce(j.breach, false) AS breach, j.viewer_sketch,
        -- breach NULL is no verdict (too little data, no value): neither healthy nor a breach
        coalesce(NOT j.breach, false) AND j.threshold IS NOT NULL AND j.value IS NOT NULL AS healthy,
        -- what a breaching window adds to its alert's affected and excess sessions
        CASE WHEN j.breach THEN coalesce(j.affected_sessions, 0) ELSE 0 END AS window_affected,
        CASE WHEN j.breach THEN j.excess_sessions END AS window_excess,
        coalesce(lag(j.window_end) OVER (PARTITION BY j.key, j.split_value ORDER BY j.window_number), l.last_end) AS prev_end,
        o.alert_id IS NOT NULL AS carried,
        coalesce(o.healthy_streak, 0) AS streak0,
        -- the series' last close before this run, if it was a recovery the next breach may reopen
        CASE WHEN p.status = 'closed' AND p.close_reason = 'recovered' THEN p.closed_at END AS prior_recovery
    FROM judged AS j
    SEMI JOIN relevant AS r ON {{ m.same_series("j", "r") }}
    LEFT JOIN key_state AS l ON l.check_name = {{ check_lit }} AND l.key = j.key
    LEFT JOIN open_alerts AS o ON {{ m.same_series("j", "o") }}
    LEFT JOIN prior_alerts AS p ON {{ m.same_series("j", "p") }}
),
stretched AS (
    -- stretch n: the windows after the n-th breach of this run, up to and including the next breach
    SELECT
        *,
        coalesce(prev_end + {{ life.expire_after | interval }} < window_end, false) AS gap,
        coalesce(count(*) FILTER (WHERE breach) OVER (
            PARTITION BY key, split_value ORDER BY window_number ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING
        ), 0) AS stretch
    FROM ordered
),
counted AS (
    SELECT
        *,
        coalesce(count(*) FILTER (WHERE healthy) OVER within, 0)
            + CASE WHEN stretch = 0 THEN streak0 ELSE 0 END AS healthy_before,
        coalesce(bool_or(gap) OVER within, false) AS gap_before,
        stretch > 0 OR carried AS breached_before
    FROM stretched
    WINDOW within AS (
        PARTITION BY key, split_value, stretch ORDER BY window_number ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING
    )
),
flagged AS (
    -- is_open: an alert of the series is open when this window comes (before it counts)
    SELECT *, breached_before AND NOT gap_before AND healthy_before < {{ life.recover_after }} AS is_open
    FROM counted
),
decided AS (
    SELECT
        *,
        is_open AND gap AS expires_here,
        is_open AND NOT gap AND healthy AND healthy_before + 1 >= {{ life.recover_after }} AS recovers_here,
        breach AND NOT (is_open AND NOT gap) AS opens_here,
        breach AND is_open AND NOT gap AS continues_here
    FROM flagged
),
closing AS (
    -- the series' last close before this window: in this run, else the prior alert's recovery
    SELECT
        *,
        last_value(CASE WHEN recovers_here THEN 'recovered' WHEN expires_here THEN 'expired' END IGNORE NULLS)
            OVER before AS last_close,
        last_value(CASE WHEN recovers_here THEN window_end END IGNORE NULLS) OVER before AS last_run_recovery
    FROM decided
    WINDOW before AS (
        PARTITION BY key, split_value ORDER BY window_number ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING
    )
),
recovered AS (
    SELECT
        * EXCLUDE (last_close, last_run_recovery),
        CASE WHEN last_close IS NULL THEN prior_recovery WHEN last_close = 'recovered' THEN last_run_recovery END
            AS last_recovery
    FROM closing
)
SELECT
    *,
    -- reopens_here: a breach with no alert open whose window starts within reopen_within of the
    -- series' last close, a recovery
    opens_here AND NOT expires_here
        AND coalesce(window_start < last_recovery + {{ life.reopen_within | interval }}, false) AS reopens_here
FROM recovered;

CREATE OR REPLACE TEMP TABLE episode_steps AS
WITH numbered AS (
    SELECT
        *,
        -- episode n: the n-th new alert of this run; episode 0 is the series' alert from before this run
        -- (open, or recovered and reopened here). A reopening stays in the episode it reopens.
        sum((opens_here AND NOT reopens_here)::INTEGER) OVER (
            PARTITION BY key, split_value ORDER BY window_number ROWS UNBOUNDED PRECEDING
        ) AS episode,
        coalesce(sum((opens_here AND NOT reopens_here)::INTEGER) OVER (
            PARTITION BY key, split_value ORDER BY window_number ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING
        ), 0) AS episode_before
    FROM steps
)
SELECT
    n.*,
    -- the alert's affected sessions once this window counts
    CASE WHEN n.episode = 0 THEN coalesce(p.affected_sessions, 0) ELSE 0 END + sum(n.window_affected) OVER (
        PARTITION BY n.key, n.split_value, n.episode ORDER BY n.window_number ROWS UNBOUNDED PRECEDING
    ) AS affected_so_far,
    CASE WHEN n.episode = 0 THEN coalesce(p.excess_sessions, 0) ELSE 0 END + coalesce(sum(n.window_excess) OVER (
        PARTITION BY n.key, n.split_value, n.episode ORDER BY n.window_number ROWS UNBOUNDED PRECEDING
    ), 0) AS excess_so_far
FROM numbered AS n
LEFT JOIN prior_alerts AS p ON {{ m.same_series("n", "p") }};

CREATE OR REPLACE TEMP TABLE episodes AS
WITH breaches AS (
    SELECT
        key, any_value(key_text) AS key_text, split_value, episode,
        min(window_end) FILTER (WHERE opens_here AND NOT reopens_here) AS opened_at,
        min(window_start) FILTER (WHERE opens_here AND NOT reopens_here) AS breach_started_at,
        min(window_number) FILTER (WHERE opens_here AND NOT reopens_here) AS opened_window,
        arg_min(threshold, window_number) FILTER (WHERE opens_here AND NOT reopens_here) AS open_threshold,
        count(*) AS breach_windows,
        sum(window_affected) AS affected_sessions,
        sum(window_excess) AS excess_sessions,
        {{ "max" if check.direction == "up" else "min" }}(value) AS peak_value,
        max(window_end) AS last_breach_at,
        max(window_number) AS last_breach_window
    FROM episode_steps
    WHERE breach
    GROUP BY key, split_value, episode
),
{% if source.viewer_id %}
sketches AS (
    -- each episode's viewer sketch: the largest point of each register over its breaching windows'
    -- sketches (and the sketch of the alert open before this run)
    SELECT key, split_value, episode, list(point ORDER BY point) AS viewer_sketch
    FROM (
        SELECT key, split_value, episode, max(point) AS point
        FROM (
            SELECT key, split_value, episode, unnest(viewer_sketch) AS point FROM episode_steps WHERE breach
            UNION ALL
            SELECT key, split_value, 0, unnest(viewer_sketch) FROM prior_alerts
        )
        GROUP BY key, split_value, episode, point // 64
    )
    GROUP BY key, split_value, episode
),
{% endif %}
closes AS (
    -- an episode's last close (a reopened alert closes more than once); it ends the alert when no
    -- breach of the episode came after it
    SELECT
        key, split_value, episode_before AS episode, window_number AS close_window,
        CASE WHEN expires_here THEN prev_end + {{ life.expire_after | interval }} ELSE window_end END AS closed_at,
        CASE WHEN expires_here THEN 'expired' ELSE 'recovered' END AS close_reason
    FROM episode_steps
    WHERE expires_here OR recovers_here
    QUALIFY row_number() OVER (PARTITION BY key, split_value, episode_before ORDER BY window_number DESC) = 1
),
all_episodes AS (
    SELECT key, split_value, episode FROM breaches
    UNION
    SELECT key, split_value, 0 FROM open_alerts
),
series_end AS (
    SELECT s.key, s.split_value, coalesce(max(j.window_end), max(l.last_end)) AS last_window_end
    FROM all_episodes AS s
    LEFT JOIN judged AS j ON {{ m.same_series("j", "s") }}
    LEFT JOIN key_state AS l ON l.check_name = {{ check_lit }} AND l.key = s.key
    GROUP BY s.key, s.split_value
),
healthy_tail AS (
    -- healthy windows after the last breach of a series: the streak an open alert carries on
    SELECT e.key, e.split_value, count(*) FILTER (WHERE e.healthy AND e.window_number > coalesce(b.last_window, -1)) AS n
    FROM episode_steps AS e
    LEFT JOIN (SELECT key, split_value, max(last_breach_window) AS last_window FROM breaches GROUP BY ALL) AS b
        ON {{ m.same_series("e", "b") }}
    GROUP BY e.key, e.split_value
),
merged AS (
    SELECT
        a.key, a.split_value, a.episode,
        coalesce(o.alert_id, NULL) AS prior_alert_id,
        coalesce(b.key_text, o.key_text) AS key_text,
        coalesce(o.opened_at, b.opened_at) AS opened_at,
        coalesce(o.breach_started_at, b.breach_started_at) AS breach_started_at,
        b.opened_window,
        coalesce(o.threshold, b.open_threshold) AS threshold,
        coalesce(o.breach_windows, 0) + coalesce(b.breach_windows, 0) AS breach_windows,
        coalesce(o.affected_sessions, 0) + coalesce(b.affected_sessions, 0) AS affected_sessions,
        {% if measure.kind == "rate" %}coalesce(o.excess_sessions, 0) + coalesce(b.excess_sessions, 0){% else %}NULL::DOUBLE{% endif %} AS excess_sessions,
        {% if source.viewer_id %}coalesce(v.viewer_sketch, []::INTEGER[]){% else %}NULL::INTEGER[]{% endif %} AS viewer_sketch,
        {{ peak }}(o.peak_value, b.peak_value) AS peak_value,
        coalesce(b.last_breach_at, o.last_breach_at) AS last_breach_at,
        o.first_run_id,
        c.closed_at, c.close_reason,
        CASE
            WHEN b.episode IS NULL THEN o.healthy_streak + coalesce(t.n, 0)
            ELSE coalesce(t.n, 0)
        END AS healthy_streak,
        e.last_window_end,
        b.episode IS NOT NULL OR c.episode IS NOT NULL OR t.n > 0 AS touched
    FROM all_episodes AS a
    LEFT JOIN breaches AS b ON {{ m.same_series("a", "b") }} AND a.episode = b.episode
    LEFT JOIN prior_alerts AS o ON {{ m.same_series("a", "o") }} AND a.episode = 0
    LEFT JOIN closes AS c ON {{ m.same_series("a", "c") }} AND a.episode = c.episode
        AND c.close_window > coalesce(b.last_breach_window, c.close_window - 1)
    LEFT JOIN healthy_tail AS t ON {{ m.same_series("a", "t") }}
    LEFT JOIN series_end AS e ON {{ m.same_series("a", "e") }}
{% if source.viewer_id %}
    LEFT JOIN sketches AS v ON {{ m.same_series("a", "v") }} AND a.episode = v.episode
{% endif %}
)
SELECT
    *,
    -- silent_too_long: an alert still open whose series has had no window for expire_after at the
    -- watermark expires
    closed_at IS NULL
        AND last_window_end + {{ life.expire_after | interval }} < (SELECT current FROM watermarks) AS silent_too_long
FROM merged;

CREATE OR REPLACE TEMP TABLE alert_rows AS
SELECT
    coalesce(prior_alert_id, substr(md5(to_json({
        'check': {{ check_lit }}, 'key': key, 'split': split_value, 'opened_at': opened_at, 'window_number': opened_window,
        'definition': $definition
    })::VARCHAR), 1, 16)) AS alert_id,
    {{ check_lit }} AS check_name,
    {{ check.severity | literal }} AS severity,
    key,
    key_text,
    split_value,
    CASE WHEN closed_at IS NOT NULL OR silent_too_long THEN 'closed' ELSE 'open' END AS status,
    CASE WHEN closed_at IS NOT NULL THEN close_reason WHEN silent_too_long THEN 'expired' END AS close_reason,
    opened_at,
    breach_started_at,
    last_breach_at,
    CASE
        WHEN closed_at IS NOT NULL THEN closed_at
        WHEN silent_too_long THEN last_window_end + {{ life.expire_after | interval }}
    END AS closed_at,
    breach_windows,
    affected_sessions,
    -- sessions hit per hour of data time, over the breaching windows' span (at least one minute)
    affected_sessions / greatest(epoch(last_breach_at - breach_started_at) / 3600.0, 1 / 60.0) AS affected_per_hour,
    excess_sessions,
    -- an estimate: never more viewers than sessions (every affected session has one viewer)
    CASE WHEN viewer_sketch IS NOT NULL THEN least({{ m.hll_estimate("viewer_sketch") }}, affected_sessions) END AS affected_viewers,
    viewer_sketch,
    peak_value,
    threshold,
    substr(md5(to_json({'check': {{ check_lit }}, 'key': key, 'split': split_value})::VARCHAR), 1, 16) AS fingerprint,
    coalesce(first_run_id, $run_id) AS first_run_id,
    $run_id AS last_run_id,
    CASE WHEN closed_at IS NULL AND NOT silent_too_long THEN healthy_streak END AS healthy_streak,
    $definition AS definition_hash,
    episode,
    touched OR silent_too_long AS touched,
    closed_at IS NULL AND silent_too_long AS closed_silently
FROM episodes;

CREATE OR REPLACE TEMP TABLE event_rows AS
WITH step_events AS (
    SELECT
        key, split_value, episode, window_number, window_end AS occurred_at,
        CASE
            WHEN reopens_here THEN 'reopened'
            WHEN opens_here THEN 'opened'
            ELSE 'updated'
        END AS event,
        value, threshold, affected_so_far AS affected_sessions, excess_so_far AS excess_sessions
    FROM episode_steps
    WHERE breach
    UNION ALL
    -- every close, including those of an alert this run reopens after; a window that expires an
    -- alert may open the next one, so a close belongs to the episode open before its window
    SELECT
        key, split_value, episode_before,
        -- the episode's last breaching window before the close, for its viewers
        max(window_number) FILTER (WHERE breach) OVER (
            PARTITION BY key, split_value ORDER BY window_number ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING
        ),
        CASE WHEN expires_here THEN prev_end + {{ life.expire_after | interval }} ELSE window_end END,
        'closed',
        CASE WHEN expires_here THEN NULL ELSE value END,
        threshold,
        CASE WHEN episode = episode_before THEN affected_so_far - window_affected END,
        CASE WHEN episode = episode_before THEN excess_so_far - coalesce(window_excess, 0) END
    FROM episode_steps
    QUALIFY expires_here OR recovers_here
){% if source.viewer_id %},
event_viewers AS (
    -- the viewers as of each breach: the episode's sketches up to that window, merged
    SELECT key, split_value, episode, window_number, {{ m.hll_count("count(*)", "sum(2.0 ^ -(point % 64))") }} AS affected_viewers
    FROM (
        SELECT e.key, e.split_value, e.episode, e.window_number, max(p.point) AS point
        FROM (SELECT key, split_value, episode, window_number FROM episode_steps WHERE breach) AS e
        JOIN (
            SELECT key, split_value, episode, window_number, unnest(viewer_sketch) AS point FROM episode_steps WHERE breach
            UNION ALL
            SELECT key, split_value, 0, NULL, unnest(viewer_sketch) FROM prior_alerts
        ) AS p ON {{ m.same_series("p", "e") }} AND p.episode = e.episode
            AND (p.window_number IS NULL OR p.window_number <= e.window_number)
        GROUP BY e.key, e.split_value, e.episode, e.window_number, p.point // 64
    )
    GROUP BY key, split_value, episode, window_number
){% endif +%}
SELECT a.alert_id, $run_id AS run_id, e.occurred_at, e.event, e.value, e.threshold,
       coalesce(e.affected_sessions, a.affected_sessions) AS affected_sessions,
       {% if measure.kind == "rate" %}coalesce(e.excess_sessions, a.excess_sessions){% else %}NULL::DOUBLE{% endif %} AS excess_sessions,
       {% if source.viewer_id %}least(coalesce(v.affected_viewers, CASE WHEN e.window_number IS NULL AND e.event = 'closed' THEN a.affected_viewers END, 0), coalesce(e.affected_sessions, a.affected_sessions)){% else %}NULL::BIGINT{% endif %} AS affected_viewers
FROM step_events AS e
JOIN alert_rows AS a ON {{ m.same_series("e", "a") }} AND e.episode = a.episode
{% if source.viewer_id %}
LEFT JOIN event_viewers AS v ON {{ m.same_series("e", "v") }} AND e.episode = v.episode AND e.window_number = v.window_number
{% endif %}
UNION ALL
-- an open alert whose series has been silent for expire_after at the watermark
SELECT alert_id, $run_id, closed_at, 'closed', NULL, NULL, affected_sessions, excess_sessions, affected_viewers
FROM alert_rows
WHERE closed_silently;
