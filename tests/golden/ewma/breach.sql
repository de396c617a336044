-- ── stage 5 · breach ───────────────────────────────────────────────────────────────────────
-- A window breaches when it has a threshold, its EWMA statistic is above it, and it passes the guard
-- (at least 10 sessions and 0 bad); every other window with a threshold and a value is
-- healthy. A window without a value (a zero denominator, no session with a value) gives no verdict.
-- @repeat (with stage 4): until no breach flag changes
CREATE OR REPLACE TEMP TABLE decided AS
SELECT
    *,
    coalesce(
        threshold IS NOT NULL
        AND value IS NOT NULL
        AND statistic > threshold
        AND sessions >= 10
        AND bad >= 0
    , false) AS breach
FROM (
    SELECT
        j.key, j.split_value, j.seq, j.value, j.statistic, j.sessions, j.bad, v.baseline, v.history_windows,
        CASE WHEN v.history_windows >= 3 THEN
            v.baseline + 3.0 * v.spread * sqrt(0.3 / (2 - 0.3))
        END AS threshold
    FROM judged AS j
    JOIN verdicts AS v ON j.key = v.key AND j.split_value IS NOT DISTINCT FROM v.split_value AND j.seq = v.seq
);

UPDATE judged SET changed = false WHERE changed;

UPDATE judged
SET
    baseline = d.baseline,
    history_windows = d.history_windows,
    threshold = d.threshold,
    changed = judged.breach IS DISTINCT FROM d.breach,
    breach = d.breach
FROM decided AS d
WHERE judged.key = d.key AND judged.split_value IS NOT DISTINCT FROM d.split_value AND judged.seq = d.seq;

SELECT count(*) FILTER (WHERE changed) AS still_changing FROM judged;
