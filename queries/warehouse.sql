-- The warehouse: one DuckDB file that analysts query directly. Created if missing; never dropped.
CREATE TABLE IF NOT EXISTS runs (
    run_id BIGINT PRIMARY KEY,
    started_at TIMESTAMP,            -- wall clock: the only place it is used
    finished_at TIMESTAMP,
    status VARCHAR,                  -- 'ok' | 'failed'
    checks VARCHAR[],
    rebuild BOOLEAN,
    files_read BIGINT,
    rows_read BIGINT,
    rows_excluded BIGINT,
    duplicate_rows BIGINT,
    late_rows BIGINT,
    invalid_rows BIGINT,
    changed_files BIGINT,            -- files found changed after an earlier run read them (not re-read)
    windows_written BIGINT,
    alerts_opened BIGINT,
    alerts_closed BIGINT,
    error VARCHAR
);

CREATE TABLE IF NOT EXISTS run_checks (
    run_id BIGINT,
    check_name VARCHAR,
    files_read BIGINT,
    rows_read BIGINT,
    invalid_rows BIGINT,
    rows_excluded BIGINT,
    rows_filtered BIGINT,
    duplicate_rows BIGINT,
    late_rows BIGINT,
    windows_written BIGINT,
    breach_windows BIGINT,
    alerts_opened BIGINT,
    alerts_closed BIGINT,
    watermark TIMESTAMP,
    rounds INTEGER,
    PRIMARY KEY (run_id, check_name)
);

CREATE TABLE IF NOT EXISTS files_read (
    check_name VARCHAR,
    path VARCHAR,
    size BIGINT,
    modified_at TIMESTAMP,
    run_id BIGINT,
    rows BIGINT,
    PRIMARY KEY (check_name, path)
);

-- What each check has read of a Delta or Iceberg source: every commit up to table_version (a Delta
-- version, an Iceberg snapshot's sequence number; snapshot_id names the Iceberg snapshot), written in
-- the run's transaction with the files read. complete is false while a first read of the table's
-- snapshot at that version is left in part to the next runs (a backlog).
CREATE TABLE IF NOT EXISTS table_versions (
    check_name VARCHAR PRIMARY KEY,
    source_name VARCHAR,
    table_format VARCHAR,            -- 'delta' | 'iceberg'
    table_version BIGINT,
    snapshot_id BIGINT,
    complete BOOLEAN,
    run_id BIGINT
);

CREATE TABLE IF NOT EXISTS changed_files (  -- a file whose size or time differs from when it was read
    run_id BIGINT,                   -- the run that noticed it
    check_name VARCHAR,
    path VARCHAR,
    size_read BIGINT,
    modified_read TIMESTAMP,
    size_now BIGINT,
    modified_now TIMESTAMP
);

CREATE TABLE IF NOT EXISTS source_columns (  -- each read column's type, as the source's first file had it
    source_name VARCHAR,
    column_name VARCHAR,
    column_type VARCHAR,
    first_path VARCHAR,
    PRIMARY KEY (source_name, column_name)
);

CREATE TABLE IF NOT EXISTS session_ids (     -- every session id read, hashed, with the file it came from
    source_name VARCHAR,
    id_hash UHUGEINT,                -- md5_number of the session id: repeats are found without keeping ids
    first_path VARCHAR
);

CREATE TABLE IF NOT EXISTS check_state (
    check_name VARCHAR,
    watermark TIMESTAMP,
    definition_hash VARCHAR,
    last_run_id BIGINT
);

CREATE TABLE IF NOT EXISTS key_state (
    check_name VARCHAR,
    key MAP(VARCHAR, VARCHAR),
    last_window_number BIGINT,       -- the window_number of the key's last closed window
    last_end TIMESTAMP,
    windows BIGINT                   -- how many windows the key has closed
);

CREATE TABLE IF NOT EXISTS carry (
    check_name VARCHAR,
    key MAP(VARCHAR, VARCHAR),
    key_text VARCHAR,
    event_time TIMESTAMP,
    session_id VARCHAR,
    is_bad BOOLEAN,
    split_value VARCHAR,
    numerator DOUBLE,                -- ratio measures: the session's numerator and denominator
    denominator DOUBLE,
    quantile_input DOUBLE            -- quantile measures: the session's value
);

CREATE TABLE IF NOT EXISTS key_windows (   -- every closed window of a key, whatever its split values
    check_name VARCHAR,
    key MAP(VARCHAR, VARCHAR),
    key_text VARCHAR,
    key_window BIGINT,
    window_number BIGINT,            -- as in windows
    window_start TIMESTAMP,
    window_end TIMESTAMP,
    sessions BIGINT,
    bad BIGINT,
    run_id BIGINT
);

CREATE TABLE IF NOT EXISTS windows (
    check_name VARCHAR,
    key MAP(VARCHAR, VARCHAR),
    key_text VARCHAR,
    split_value VARCHAR,
    window_number BIGINT,            -- count windows: 1, 2, 3 … in the series; time windows: how many
                                     -- windows of its length lie between 1970-01-01 and its start
    key_window BIGINT,               -- ordinal among the key's windows, 1, 2, 3 …
    window_start TIMESTAMP,
    window_end TIMESTAMP,
    sessions BIGINT,
    bad BIGINT,
    value DOUBLE,
    statistic DOUBLE,                -- what is compared with the threshold when it is not value (EWMA)
    baseline DOUBLE,
    history_windows BIGINT,
    threshold DOUBLE,
    breach BOOLEAN,
    run_id BIGINT
);

CREATE TABLE IF NOT EXISTS alerts (
    alert_id VARCHAR,
    check_name VARCHAR,
    severity VARCHAR,
    key MAP(VARCHAR, VARCHAR),
    key_text VARCHAR,
    split_value VARCHAR,
    status VARCHAR,                  -- 'open' | 'closed'
    close_reason VARCHAR,            -- 'recovered' | 'expired' | 'check changed' | 'check removed' | NULL
    opened_at TIMESTAMP,             -- data time of the first breaching window's end
    breach_started_at TIMESTAMP,     -- start of the first breaching window
    last_breach_at TIMESTAMP,
    closed_at TIMESTAMP,
    breach_windows BIGINT,
    affected_sessions BIGINT,
    affected_per_hour DOUBLE,        -- affected_sessions over the breaching windows' span in data time
    peak_value DOUBLE,
    threshold DOUBLE,
    fingerprint VARCHAR,
    first_run_id BIGINT,
    last_run_id BIGINT,
    healthy_streak BIGINT,
    definition_hash VARCHAR          -- the check's compiled definition when the alert opened
);

CREATE TABLE IF NOT EXISTS alert_events (
    alert_id VARCHAR,
    run_id BIGINT,
    occurred_at TIMESTAMP,
    event VARCHAR,                   -- 'opened' | 'updated' | 'closed'
    value DOUBLE,
    threshold DOUBLE,
    affected_sessions BIGINT
);

CREATE TABLE IF NOT EXISTS outbox (  -- one row per alert event and webhook: what `plimsoll notify` sends
    idempotency_key VARCHAR PRIMARY KEY,  -- also the Idempotency-Key header: same on every attempt
    webhook VARCHAR,                 -- the webhook's name (its url's scheme://host:port when it has none)
    url VARCHAR,                     -- its url's scheme://host:port, never the path or query (they can hold a token)
    alert_id VARCHAR,
    run_id BIGINT,
    event VARCHAR,                   -- 'opened' | 'updated' | 'closed'
    occurred_at TIMESTAMP,           -- data time of the event
    affected_sessions BIGINT,
    payload VARCHAR,                 -- the JSON body, fixed when queued so every attempt sends the same bytes
    status VARCHAR,                  -- 'queued' | 'delivered' | 'abandoned' | 'skipped' (see skip_reason)
    attempts INTEGER,                -- failed and successful POSTs made
    last_error VARCHAR,
    seq BIGINT,                      -- queue order
    enqueued_at TIMESTAMP,           -- wall clock (UTC), like the times below: delivery is not data time
    last_attempt_at TIMESTAMP,
    next_attempt_at TIMESTAMP,
    delivered_at TIMESTAMP
);

-- Columns added after the first release; ADD COLUMN IF NOT EXISTS keeps older files readable and
-- gives new and old files the same column order.
ALTER TABLE runs ADD COLUMN IF NOT EXISTS nonfinite_values BIGINT;  -- measure inputs that were NaN or ±infinity, left out
ALTER TABLE runs ADD COLUMN IF NOT EXISTS warning VARCHAR;          -- what a scheduler's log should shout about
ALTER TABLE run_checks ADD COLUMN IF NOT EXISTS nonfinite_values BIGINT;
ALTER TABLE run_checks ADD COLUMN IF NOT EXISTS beyond_horizon BIGINT;  -- late by more than dedup_horizon: left out
ALTER TABLE run_checks ADD COLUMN IF NOT EXISTS seconds DOUBLE;         -- wall clock: the check's own stages, scan to persist
ALTER TABLE files_read ADD COLUMN IF NOT EXISTS source_name VARCHAR;
ALTER TABLE files_read ADD COLUMN IF NOT EXISTS invalid_rows BIGINT;   -- rows without id or a sane event time
ALTER TABLE session_ids ADD COLUMN IF NOT EXISTS event_time TIMESTAMP; -- the session's data time: ids are kept within dedup_horizon
-- outbox rows from before: NULL until `plimsoll notify` fills them from the alerts
ALTER TABLE outbox ADD COLUMN IF NOT EXISTS fingerprint VARCHAR;      -- the incident: the alert's fingerprint ...
ALTER TABLE outbox ADD COLUMN IF NOT EXISTS opened_at TIMESTAMP;      -- ... and its opening (data time)
ALTER TABLE outbox ADD COLUMN IF NOT EXISTS event_identity VARCHAR;   -- the event whatever the alert_id: a rebuild's alerts share it
ALTER TABLE outbox ADD COLUMN IF NOT EXISTS skip_reason VARCHAR;      -- 'growth' | 'rebuilt' | 'catch_up'
-- layout 4: impact. Sessions beyond the baseline, affected sessions of every measure, and distinct
-- viewers as HyperLogLog sketches (lists of register × 64 + rank, see queries/macros.sql), never ids
ALTER TABLE carry ADD COLUMN IF NOT EXISTS viewer_point INTEGER;      -- the session's viewer in the sketch (with viewer_id)
ALTER TABLE windows ADD COLUMN IF NOT EXISTS affected_sessions BIGINT; -- breaching windows: bad, or sessions beyond the threshold
ALTER TABLE windows ADD COLUMN IF NOT EXISTS excess_sessions DOUBLE;  -- breaching rate windows: bad − sessions × baseline, at least 0
ALTER TABLE windows ADD COLUMN IF NOT EXISTS viewer_sketch INTEGER[]; -- breaching windows, with viewer_id: the affected sessions' viewers
ALTER TABLE alerts ADD COLUMN IF NOT EXISTS excess_sessions DOUBLE;
ALTER TABLE alerts ADD COLUMN IF NOT EXISTS affected_viewers BIGINT;  -- estimated from viewer_sketch
ALTER TABLE alerts ADD COLUMN IF NOT EXISTS viewer_sketch INTEGER[];  -- its breaching windows' sketches merged
ALTER TABLE alert_events ADD COLUMN IF NOT EXISTS excess_sessions DOUBLE;
ALTER TABLE alert_events ADD COLUMN IF NOT EXISTS affected_viewers BIGINT;

-- layout 5: causes and incidents (queries/causes.sql, queries/incidents.sql)
ALTER TABLE alerts ADD COLUMN IF NOT EXISTS incident_id VARCHAR;     -- the incident the alert belongs to
ALTER TABLE outbox ADD COLUMN IF NOT EXISTS incident_id VARCHAR;     -- an incident's event (webhooks with `per: incident`)

CREATE TABLE IF NOT EXISTS alert_causes (  -- where an alert's excess lies in the attributes, best first
    alert_id VARCHAR,
    rank INTEGER,                    -- 1, 2, 3 … in the order the rounds chose them
    key MAP(VARCHAR, VARCHAR),       -- the combination: attribute -> value (NULL for a missing value)
    key_text VARCHAR,                -- 'cdn=birch, country=DE'
    bad DOUBLE,                      -- its bad sessions in the explained windows (Σ numerator for a ratio)
    expected DOUBLE,                 -- what its own history's rate gives on its sessions there
    sessions DOUBLE,                 -- its sessions there (Σ denominator for a ratio)
    excess_share DOUBLE,             -- (bad − expected) ÷ the explained windows' whole excess
    score DOUBLE,                    -- the expectation-based Poisson scan statistic
    significant BOOLEAN,             -- an answer: significant once the answers above it are set aside
    windows BIGINT,                  -- the breaching windows explained (the alert's latest ones)
    history_windows BIGINT,          -- the earlier healthy windows they were compared with
    run_id BIGINT                    -- the run that computed them (when the alert opened or last grew)
);

CREATE TABLE IF NOT EXISTS incidents (     -- alerts of one problem: one cause, the alerts it explains
    incident_id VARCHAR,
    status VARCHAR,                  -- 'open' while any of its alerts is open, else 'closed'
    opened_at TIMESTAMP,             -- data time: its first alert's opening
    closed_at TIMESTAMP,             -- data time: its last alert's closing
    cause_alert_id VARCHAR,
    cause_check VARCHAR,
    cause_key MAP(VARCHAR, VARCHAR),
    cause_key_text VARCHAR,
    cause_split_value VARCHAR,
    severity VARCHAR,                -- the highest of its alerts'
    alerts BIGINT,
    alert_ids VARCHAR[],             -- in order of opening
    affected_sessions BIGINT,        -- the cause alert's: its series holds the others' excess
    affected_viewers BIGINT,
    excess_sessions DOUBLE,
    first_run_id BIGINT,
    last_run_id BIGINT               -- the last run that changed it
);

CREATE TABLE IF NOT EXISTS incident_events (
    incident_id VARCHAR,
    run_id BIGINT,
    occurred_at TIMESTAMP,           -- data time
    event VARCHAR,                   -- 'opened' | 'updated' | 'closed'
    status VARCHAR,
    cause_alert_id VARCHAR,
    alerts BIGINT,
    alert_ids VARCHAR[],
    affected_sessions BIGINT,
    affected_viewers BIGINT
);

-- ── layout 6: source alarms (queries/alarms.sql) ──────────────────────────────────────────────
-- An alert about a source itself, not about a check's series: 'silent' (no new file for the
-- source's max_silence) or 'lagging' (its newest data time more than max_lag behind the clock). Its
-- check_name is NULL, its key {source: NAME}; its times are wall clock (UTC), its value and
-- threshold seconds (how long silent or behind, and the limit).
ALTER TABLE alerts ADD COLUMN IF NOT EXISTS alarm VARCHAR;              -- 'silent' | 'lagging'; NULL: a check's alert
ALTER TABLE alerts ADD COLUMN IF NOT EXISTS source_name VARCHAR;        -- the source a source alarm is about
ALTER TABLE alerts ADD COLUMN IF NOT EXISTS last_file_at TIMESTAMP;     -- wall clock: when its newest file arrived
ALTER TABLE alerts ADD COLUMN IF NOT EXISTS newest_data_at TIMESTAMP;   -- data time: the newest sane event time read from it
ALTER TABLE alert_events ADD COLUMN IF NOT EXISTS last_file_at TIMESTAMP;   -- source alarms: as of the event
ALTER TABLE alert_events ADD COLUMN IF NOT EXISTS newest_data_at TIMESTAMP;
ALTER TABLE incidents ADD COLUMN IF NOT EXISTS cause_alarm VARCHAR;     -- the cause alert's alarm, if a source alarm
-- ── end of layout 6 ───────────────────────────────────────────────────────────────────────────

-- What `plimsoll notify` sends when it is not the JSON payload: a webhook's body template rendered, or
-- a mail message, fixed when queued so every attempt sends the same bytes. NULL: the payload is sent.
ALTER TABLE outbox ADD COLUMN IF NOT EXISTS body VARCHAR;
ALTER TABLE outbox ADD COLUMN IF NOT EXISTS content_type VARCHAR;   -- of body: the webhook's, or message/rfc822 for mail

-- ── layout 7: what the next windows' baselines read, per series ─────────────────────────────────
-- A run's baselines and measures read a row per series that changed, never the series' whole
-- history in `windows`: persist.sql keeps these up to date from each run's windows.
CREATE TABLE IF NOT EXISTS series_state (    -- every series (check, key, split value) with a window
    check_name VARCHAR,
    key MAP(VARCHAR, VARCHAR),
    split_value VARCHAR,
    recent STRUCT(window_number BIGINT, value DOUBLE, sessions BIGINT, bad BIGINT)[],  -- its last `history` windows that are history (no breach, a value; and a split value's quiet windows), oldest first
    statistic DOUBLE,                -- EWMA and CUSUM: the statistic of its last window that has one
    statistic_window BIGINT          -- that window's window_number
);
-- the key's last `history` closed windows of at least guard.min_sessions sessions: the quiet
-- history of a split value first seen in the key's next windows
ALTER TABLE key_state ADD COLUMN IF NOT EXISTS recent STRUCT(key_window BIGINT, window_number BIGINT, sessions BIGINT)[];
-- ── end of layout 7 ───────────────────────────────────────────────────────────────────────────

-- The warehouse's layout, so a later release can migrate a file written by an earlier one and a
-- file written by a later one is refused with a clear message. Paths in files_read,
-- changed_files, session_ids and source_columns are relative to their source's path from version 2.
CREATE TABLE IF NOT EXISTS schema_version (
    version INTEGER
);
