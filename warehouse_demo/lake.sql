-- The Fernhill Broadcasting demo lake: three weeks of playback sessions and the labels of the
-- incidents hidden in them.
--
-- Every pseudo-random value is a pure function of (seed, row number, salt) through hash(), never
-- random(), so one seed gives the same rows whatever the thread count. Categorical draws are exact
-- inverse CDFs over integer weights, looked up by equality joins on bin tables; continuous draws
-- use Box-Muller. Categorical columns are ENUMs until written: they pass through joins and the
-- sort as small integers and are stored in Parquet as plain strings.
--
-- generate.py runs the steps below in order, one statement per step, binding $seed and $sessions
-- in the first; later steps read them from the params table. It then writes the sessions view to
-- Parquet and reads the labels table into labels.csv.

-- step: params
CREATE OR REPLACE TEMP TABLE params AS
SELECT $seed::BIGINT AS seed, $sessions::BIGINT AS sessions, $days::INTEGER AS days;

-- step: macro draw_bits
-- 64 pseudo-random bits for (seed, number, salt). DuckDB combines the hashes of several
-- arguments with xor, so draws that differ only in salt would be correlated; hashing the
-- combined value again scrambles that away.
CREATE OR REPLACE TEMP MACRO draw_bits(seed, i, salt) AS hash(hash(seed, i, salt));

-- step: macro unit
-- A uniform draw in [0, 1): the top 53 bits, times 2^-53.
CREATE OR REPLACE TEMP MACRO unit(seed, i, salt) AS
    (draw_bits(seed, i, salt) >> 11) * 1.1102230246251565e-16;

-- step: macro gauss
-- A standard normal draw (Box-Muller over two uniforms).
CREATE OR REPLACE TEMP MACRO gauss(seed, i, salt) AS
    sqrt(-2 * ln(1 - unit(seed, i, salt || '/radius')))
    * cos(2 * pi() * unit(seed, i, salt || '/angle'));

-- step: macro below
-- An integer draw in [0, n): keeps inverse CDFs over integer weights exact.
CREATE OR REPLACE TEMP MACRO below(seed, i, salt, n) AS
    (draw_bits(seed, i, salt) % n::UBIGINT)::BIGINT;

-- step: macro xorshift
CREATE OR REPLACE TEMP MACRO xorshift(x, bits) AS xor(x, x >> bits);

-- step: macro permute32
-- A bijection on 32-bit numbers (xor-shifts and odd multipliers modulo 2^32).
CREATE OR REPLACE TEMP MACRO permute32(x) AS
    xorshift((xorshift((xorshift(x::UBIGINT, 16) * 2146121005::UBIGINT) & 4294967295, 15)
              * 2221713035::UBIGINT) & 4294967295, 16);

-- step: macro hex_id
-- A 16-hex-digit identifier: a hashed high half and a keyed bijection of the number in the low
-- half, so ids look random yet two numbers below 2^32 never share one.
CREATE OR REPLACE TEMP MACRO hex_id(prefix, x, key) AS
    printf(prefix || '%016x',
           (draw_bits(key, x, prefix) & 18446744069414584320)
           | permute32(xor(x::UBIGINT, key & 4294967295)));

-- step: scenario
-- Every date and size of the story in one row, so that the data and the labels cannot disagree.
CREATE OR REPLACE TEMP TABLE scenario AS
SELECT
    TIMESTAMP '2026-11-02 00:00:00' AS lake_from,
    -- three weeks by default; a longer span only adds ordinary days after the story
    TIMESTAMP '2026-11-02 00:00:00' + to_days((SELECT days FROM params)) AS lake_to,
    -- (a) one CDN failing in one country; the CDN is preferred there, so that the pair is large
    'birch' AS outage_cdn,
    'DE' AS outage_country,
    1.8::DOUBLE AS outage_cdn_preference,
    TIMESTAMP '2026-11-16 14:00:00' AS outage_from,
    TIMESTAMP '2026-11-16 17:00:00' AS outage_to,
    'CDN-5XX' AS outage_code,
    0.38::DOUBLE AS outage_fail_share,
    0.85::DOUBLE AS outage_before_start_share,
    -- (b) a new kids title, popular from release, whose encoding breaks after 12 hours
    3001 AS release_title_no,
    'kids' AS release_site,
    TIMESTAMP '2026-11-17 00:00:00' AS release_at,
    0.14::DOUBLE AS release_share,
    TIMESTAMP '2026-11-17 12:00:00' AS decode_from,
    TIMESTAMP '2026-11-19 12:00:00' AS decode_to,
    'DECODE-ERR' AS decode_code,
    0.30::DOUBLE AS decode_fail_share,
    0.30::DOUBLE AS decode_before_start_share,
    -- (c) a smart_tv player release that doubles start-up time, rolled back
    'smart_tv' AS rollout_family,
    '9.0.0' AS rollout_version,
    TIMESTAMP '2026-11-12 06:00:00' AS rollout_from,
    INTERVAL 3 HOUR AS rollout_ramp,
    0.75::DOUBLE AS rollout_share,
    2.1::DOUBLE AS rollout_startup_factor,
    TIMESTAMP '2026-11-13 18:00:00' AS rollback_at,
    -- (e) an android player release broken from its first hour: it fails about three times as
    -- often as the family's other releases and starts videos about twice as slowly, at a share too
    -- small to move the family as a whole; its own history is all bad, its peers are not
    'android' AS launch_family,
    '8.4.0' AS launch_version,
    TIMESTAMP '2026-11-19 15:00:00' AS launch_from,
    TIMESTAMP '2026-11-21 00:00:00' AS launch_to,
    0.15::DOUBLE AS launch_share,
    3.4::DOUBLE AS launch_fail_factor,
    2.15::DOUBLE AS launch_startup_factor,
    -- (d) a live match: extra viewers on one live sport title, and congestion for all of sport
    'sport' AS match_site,
    4 AS match_title_rank,
    TIMESTAMP '2026-11-20 19:00:00' AS match_from,
    TIMESTAMP '2026-11-20 22:00:00' AS match_to,
    2.0::DOUBLE AS match_extra_traffic,
    3.0::DOUBLE AS match_stall_factor,
    1.6::DOUBLE AS match_stall_depth,
    -- decoy: a crawler burst on news, half of it not flagged as bots
    TIMESTAMP '2026-11-09 03:00:00' AS burst_from,
    TIMESTAMP '2026-11-09 04:00:00' AS burst_to,
    'news' AS burst_site,
    3 AS burst_titles,
    'cedar' AS burst_cdn,
    'US' AS burst_country,
    0.0025::DOUBLE AS burst_share,
    0.80::DOUBLE AS burst_fail_share,
    0.5::DOUBLE AS burst_flag_share,
    -- decoy: a tiny title whose few sessions mostly fail
    3002 AS tiny_title_no,
    'kids' AS tiny_site,
    TIMESTAMP '2026-11-14 10:00:00' AS tiny_from,
    TIMESTAMP '2026-11-14 11:00:00' AS tiny_to,
    3 AS tiny_sessions,
    2 AS tiny_failures,
    'DRM-LICENSE' AS tiny_code,
    -- the stationary background
    0.003::DOUBLE AS crawler_share,
    0.35::DOUBLE AS crawler_fail_share,
    0.5::DOUBLE AS crawler_exit_share,
    0.0125::DOUBLE AS fatal_share,
    0.5::DOUBLE AS before_start_share,
    0.025::DOUBLE AS exit_share,
    0.18::DOUBLE AS stall_share,
    7 AS sessions_per_viewer;

-- step: sites
-- Traffic share (percent), evening peak hour, typical play time and how many catalogue titles.
CREATE OR REPLACE TEMP TABLE sites AS
SELECT * REPLACE (peak_hour::DOUBLE AS peak_hour, play_median_s::DOUBLE AS play_median_s)
FROM (VALUES
    (1, 'news',   0, 45, 20, 150, 33,    0, 1200),
    (2, 'kids',  45, 25, 18, 540,  0, 1200,  900),
    (3, 'sport', 70, 30, 20, 780, 10, 2100,  900)
) AS t(site_no, site, share_from, share, peak_hour, play_median_s, live_every, title_from, titles);

-- step: devices
-- Start-up median and bitrate differ by device family; error and stall multipliers are mild.
CREATE OR REPLACE TEMP TABLE devices AS
SELECT * REPLACE (bitrate_kbps::DOUBLE AS bitrate_kbps, error_mult::DOUBLE AS error_mult,
                  stall_mult::DOUBLE AS stall_mult)
FROM (VALUES
    (1, 'web',         26,  700, 3600, 0.90, 0.90, ['desktop', 'laptop']),
    (2, 'ios',         17,  750, 3200, 0.80, 0.80, ['phone', 'tablet']),
    (3, 'android',     21,  900, 2600, 1.20, 1.30, ['phone', 'tablet']),
    (4, 'smart_tv',    20, 1150, 6800, 1.10, 0.90, ['panel-2023', 'panel-2024', 'stick']),
    (5, 'console',      5,  950, 6200, 0.90, 0.80, ['console']),
    (6, 'set_top_box', 11, 1300, 5200, 1.30, 1.10, ['box-v3', 'box-v4'])
) AS t(device_no, device_family, weight, startup_median_ms, bitrate_kbps, error_mult,
       stall_mult, hardware);

-- step: player versions
-- Two or three versions live per family; the older ones fade linearly over the three weeks.
CREATE OR REPLACE TEMP TABLE player_versions AS
SELECT * REPLACE (oldest_from::DOUBLE AS oldest_from, oldest_to::DOUBLE AS oldest_to,
                  middle_from::DOUBLE AS middle_from, middle_to::DOUBLE AS middle_to)
FROM (VALUES
    ('web',         '8.1.0', 0.10, 0.02, '8.2.4', 0.40, 0.18, '8.3.1'),
    ('ios',         '8.2.2', 0.15, 0.06, '8.3.0', 0.55, 0.30, '8.3.3'),
    ('android',     '8.1.7', 0.12, 0.08, '8.2.5', 0.50, 0.35, '8.3.2'),
    ('smart_tv',    '7.9.4', 0.10, 0.07, '8.2.4', 0.35, 0.30, '8.3.1'),
    ('console',     '8.0.2', 0.00, 0.00, '8.2.0', 0.40, 0.25, '8.3.0'),
    ('set_top_box', '7.6.3', 0.20, 0.15, '8.0.9', 0.30, 0.28, '8.2.1')
) AS t(device_family, oldest, oldest_from, oldest_to, middle, middle_from, middle_to, newest);

-- step: cdns
CREATE OR REPLACE TEMP TABLE cdns AS
SELECT * REPLACE (error_mult::DOUBLE AS error_mult, stall_mult::DOUBLE AS stall_mult,
                  startup_mult::DOUBLE AS startup_mult)
FROM (VALUES
    (1, 'alder', 40, 1.00, 1.00, 1.00),
    (2, 'birch', 28, 1.10, 1.05, 1.03),
    (3, 'cedar', 20, 0.90, 0.90, 0.97),
    (4, 'rowan', 12, 1.20, 1.20, 1.06)
) AS t(cdn_no, cdn, weight, error_mult, stall_mult, startup_mult);

-- step: country list
-- A few large markets and a long tail.
CREATE OR REPLACE TEMP TABLE country_list AS
SELECT * FROM (VALUES
    (1, 'GB', 200), (2, 'US', 130), (3, 'DE', 100), (4, 'FR', 70), (5, 'NL', 50),
    (6, 'ES', 45), (7, 'IT', 40), (8, 'IE', 35), (9, 'CA', 30), (10, 'AU', 28),
    (11, 'SE', 20), (12, 'PL', 20), (13, 'BE', 18), (14, 'NO', 16), (15, 'DK', 15),
    (16, 'CH', 14), (17, 'FI', 12), (18, 'AT', 12), (19, 'IN', 12), (20, 'PT', 10),
    (21, 'BR', 9), (22, 'CZ', 8), (23, 'NZ', 8), (24, 'JP', 8), (25, 'GR', 7),
    (26, 'ZA', 7), (27, 'AE', 7), (28, 'HU', 6), (29, 'RO', 6), (30, 'SG', 6),
    (31, 'MX', 6), (32, 'TR', 5), (33, 'IL', 4), (34, 'HR', 3), (35, 'SK', 3),
    (36, 'SI', 2), (37, 'LT', 2), (38, 'LV', 2), (39, 'EE', 2), (40, 'IS', 1)
) AS t(country_no, country, weight);

-- step: error mix
-- Which fatal error a session gets, by when it struck (before or after the first frame).
CREATE OR REPLACE TEMP TABLE error_mix AS
SELECT * FROM (VALUES
    ('before_start', 'NET-TIMEOUT', 30), ('before_start', 'DRM-LICENSE', 20),
    ('before_start', 'MANIFEST-404', 20), ('before_start', 'CDN-5XX', 20),
    ('before_start', 'PLAYER-CRASH', 10),
    ('after_start', 'NET-TIMEOUT', 35), ('after_start', 'DECODE-ERR', 25),
    ('after_start', 'CDN-5XX', 20), ('after_start', 'PLAYER-CRASH', 20),
    ('crawler', 'MANIFEST-404', 60), ('crawler', 'NET-TIMEOUT', 30), ('crawler', 'CDN-5XX', 10)
) AS t(mix, error_code, weight);

-- step: crawler list
-- Invented crawlers; only some of them announce themselves, so that is_bot gets set.
CREATE OR REPLACE TEMP TABLE crawler_list AS
SELECT * REPLACE (flag_share::DOUBLE AS flag_share)
FROM (VALUES
    (0, 'Tarnwick-crawler/2.0 (+https://tarnwick.example/about)', 0.5, true),
    (1, 'Ploverbot/1.4 (+https://plover.example/bot)', 1.0, false),
    (2, 'Heathspider/3.1', 0.0, false),
    (3, 'Ousel-crawler/0.9 (compatible)', 0.0, true)
) AS t(agent_no, user_agent, flag_share, in_burst);

-- step: player agent list
-- Every user agent the player can send: one per family, version and hardware.
CREATE OR REPLACE TEMP TABLE player_agent_list AS
WITH versions AS (
    SELECT device_family, unnest([oldest, middle, newest]) AS player_version FROM player_versions
    UNION
    SELECT rollout_family, rollout_version FROM scenario
    UNION
    SELECT launch_family, launch_version FROM scenario
)
SELECT v.device_family, v.player_version, h.hardware,
       'FernhillPlayer/' || v.player_version || ' (' || v.device_family || '; ' || h.hardware || ')'
           AS user_agent
FROM versions AS v
JOIN (SELECT device_family, unnest(hardware) AS hardware FROM devices) AS h USING (device_family);

-- step: type session_kind
CREATE TYPE session_kind AS ENUM ('viewer', 'match', 'crawler', 'burst', 'tiny');

-- step: type site_name
CREATE TYPE site_name AS ENUM (SELECT site FROM sites ORDER BY site_no);

-- step: type device_name
CREATE TYPE device_name AS ENUM (SELECT device_family FROM devices ORDER BY device_no);

-- step: type hardware_name
CREATE TYPE hardware_name AS ENUM (
    SELECT DISTINCT hardware FROM (SELECT unnest(hardware) AS hardware FROM devices)
    ORDER BY hardware);

-- step: type cdn_name
CREATE TYPE cdn_name AS ENUM (SELECT cdn FROM cdns ORDER BY cdn_no);

-- step: type country_code
CREATE TYPE country_code AS ENUM (SELECT country FROM country_list ORDER BY country_no);

-- step: type title_code
-- The catalogue t-0001 .. t-3000 and the scenario's extra titles.
CREATE TYPE title_code AS ENUM (
    SELECT printf('t-%04d', n)
    FROM (SELECT unnest(range(1, 3001)) AS n
          UNION SELECT release_title_no FROM scenario
          UNION SELECT tiny_title_no FROM scenario)
    ORDER BY n);

-- step: type version_name
CREATE TYPE version_name AS ENUM (
    SELECT DISTINCT player_version FROM player_agent_list ORDER BY player_version);

-- step: type error_name
CREATE TYPE error_name AS ENUM (SELECT DISTINCT error_code FROM error_mix ORDER BY error_code);

-- step: type agent_string
CREATE TYPE agent_string AS ENUM (
    SELECT user_agent FROM (SELECT user_agent FROM player_agent_list
                            UNION SELECT user_agent FROM crawler_list)
    ORDER BY user_agent);

-- step: typed scenario
-- The scenario's names as the lake's types, so comparisons with the data stay integer compares.
CREATE OR REPLACE TEMP TABLE scenario AS
SELECT printf('t-%04d', release_title_no)::title_code AS release_title,
       printf('t-%04d', tiny_title_no)::title_code AS tiny_title,
       * REPLACE (
    outage_cdn::cdn_name AS outage_cdn,
    outage_country::country_code AS outage_country,
    outage_code::error_name AS outage_code,
    release_site::site_name AS release_site,
    decode_code::error_name AS decode_code,
    rollout_family::device_name AS rollout_family,
    rollout_version::version_name AS rollout_version,
    launch_family::device_name AS launch_family,
    launch_version::version_name AS launch_version,
    match_site::site_name AS match_site,
    burst_site::site_name AS burst_site,
    burst_cdn::cdn_name AS burst_cdn,
    burst_country::country_code AS burst_country,
    tiny_site::site_name AS tiny_site,
    tiny_code::error_name AS tiny_code)
FROM scenario;

-- step: site bins
CREATE OR REPLACE TEMP TABLE site_bins AS
SELECT r.bin, s.site::site_name AS site
FROM range(100) AS r(bin)
JOIN sites AS s ON r.bin >= s.share_from AND r.bin < s.share_from + s.share;

-- step: device bins
CREATE OR REPLACE TEMP TABLE device_bins AS
WITH cumulative AS (
    SELECT device_family, hardware,
           sum(weight) OVER (ORDER BY device_no ROWS UNBOUNDED PRECEDING) - weight AS lo,
           sum(weight) OVER (ORDER BY device_no ROWS UNBOUNDED PRECEDING) AS hi,
           sum(weight) OVER () AS total
    FROM devices
)
SELECT r.bin, c.device_family::device_name AS device_family, c.hardware::hardware_name[] AS hardware
FROM range(1000) AS r(bin)
JOIN cumulative AS c ON r.bin >= 1000 * c.lo // c.total AND r.bin < 1000 * c.hi // c.total;

-- step: countries
-- Small per-country differences in errors and start-up, and the cumulative shares.
CREATE OR REPLACE TEMP TABLE countries AS
SELECT l.country_no, l.country::country_code AS country, l.weight,
       sum(l.weight) OVER (ORDER BY l.country_no ROWS UNBOUNDED PRECEDING) - l.weight AS lo,
       sum(l.weight) OVER (ORDER BY l.country_no ROWS UNBOUNDED PRECEDING) AS hi,
       sum(l.weight) OVER () AS total,
       exp(0.10 * gauss(p.seed, l.country_no, 'country-errors')) AS error_mult,
       exp(0.06 * gauss(p.seed, l.country_no, 'country-startup')) AS startup_mult
FROM country_list AS l, params AS p;

-- step: country bins
CREATE OR REPLACE TEMP TABLE country_bins AS
SELECT r.bin, c.country_no, c.country
FROM range(10000) AS r(bin)
JOIN countries AS c ON r.bin >= 10000 * c.lo // c.total AND r.bin < 10000 * c.hi // c.total;

-- step: cdn bins
-- CDN steering per country: the global shares, perturbed per country, with the outage CDN
-- preferred in the outage country. One integer key (1000 * country_no + bin) keeps the join a
-- single equality that the optimiser cannot split from the viewer join.
CREATE OR REPLACE TEMP TABLE cdn_bins AS
WITH steered AS (
    SELECT c.country_no, n.cdn_no, n.cdn::cdn_name AS cdn,
           round(1000 * n.weight
                 * (0.7 + 0.6 * unit(p.seed, 4 * c.country_no + n.cdn_no, 'cdn-mix'))
                 * CASE WHEN c.country = sc.outage_country AND n.cdn = sc.outage_cdn
                        THEN sc.outage_cdn_preference ELSE 1.0 END)::BIGINT AS weight
    FROM countries AS c, cdns AS n, params AS p, scenario AS sc
), cumulative AS (
    SELECT country_no, cdn,
           sum(weight) OVER w - weight AS lo,
           sum(weight) OVER w AS hi,
           sum(weight) OVER (PARTITION BY country_no) AS total
    FROM steered
    WINDOW w AS (PARTITION BY country_no ORDER BY cdn_no ROWS UNBOUNDED PRECEDING)
)
SELECT 1000 * c.country_no + r.bin AS slot, c.cdn
FROM range(1000) AS r(bin)
JOIN cumulative AS c ON r.bin >= 1000 * c.lo // c.total AND r.bin < 1000 * c.hi // c.total;

-- step: error bins
CREATE OR REPLACE TEMP TABLE error_bins AS
WITH cumulative AS (
    SELECT mix, error_code,
           sum(weight) OVER w - weight AS lo,
           sum(weight) OVER w AS hi,
           sum(weight) OVER (PARTITION BY mix) AS total
    FROM error_mix
    WINDOW w AS (PARTITION BY mix ORDER BY error_code ROWS UNBOUNDED PRECEDING)
)
SELECT c.mix, r.bin, c.error_code::error_name AS error_code
FROM range(100) AS r(bin)
JOIN cumulative AS c ON r.bin >= 100 * c.lo // c.total AND r.bin < 100 * c.hi // c.total;

-- step: crawler agents
CREATE OR REPLACE TEMP TABLE crawler_agents AS
SELECT agent_no, user_agent::agent_string AS user_agent, flag_share, in_burst,
       row_number() OVER (PARTITION BY in_burst ORDER BY agent_no) - 1 AS burst_pick
FROM crawler_list;

-- step: player agents
CREATE OR REPLACE TEMP TABLE player_agents AS
SELECT device_family::device_name AS device_family, player_version::version_name AS player_version,
       hardware::hardware_name AS hardware, user_agent::agent_string AS user_agent
FROM player_agent_list;

-- step: family versions
CREATE OR REPLACE TEMP TABLE family_versions AS
SELECT device_family::device_name AS device_family,
       oldest::version_name AS oldest, oldest_from, oldest_to,
       middle::version_name AS middle, middle_from, middle_to,
       newest::version_name AS newest
FROM player_versions;

-- step: minute cdf
-- Traffic per minute and site: a diurnal curve (trough 04:00, the site's peak, peak/trough 5),
-- weekends 20 % higher, and a little hourly noise. Integer weights keep the inverse CDF exact;
-- [lo, hi) is the minute's interval on one axis shared by all sites.
CREATE OR REPLACE TEMP TABLE minute_cdf AS
WITH grid AS (
    SELECT s.site::site_name AS site, s.site_no, s.peak_hour, m.minute_at,
           hour(m.minute_at) + minute(m.minute_at) / 60.0 AS h,
           datediff('hour', sc.lake_from, m.minute_at) AS hour_no
    FROM sites AS s, scenario AS sc,
         (SELECT unnest(generate_series(lake_from, lake_to - INTERVAL 1 MINUTE, INTERVAL 1 MINUTE))
                 AS minute_at
          FROM scenario) AS m
), shaped AS (
    SELECT g.site, g.site_no, g.minute_at,
           CASE WHEN g.h >= 4 AND g.h < g.peak_hour
                THEN (1 - cos(pi() * (g.h - 4) / (g.peak_hour - 4))) / 2
                ELSE (1 + cos(pi() * ((g.h - g.peak_hour + 24) % 24) / (28 - g.peak_hour))) / 2
           END AS rise,
           CASE WHEN isodow(g.minute_at) >= 6 THEN 1.2 ELSE 1.0 END AS weekend,
           greatest(0.9, least(1.1, 1 + 0.03 * gauss(p.seed, 10 * g.hour_no + g.site_no,
                                                     'traffic-noise'))) AS noise
    FROM grid AS g, params AS p
), weighted AS (
    SELECT site, site_no, minute_at,
           round(10000 * (1 + 4 * rise) * weekend * noise)::BIGINT AS weight
    FROM shaped
)
SELECT site, minute_at, weight,
       (sum(weight) OVER w - weight)::BIGINT AS lo,
       (sum(weight) OVER w)::BIGINT AS hi
FROM weighted
WINDOW w AS (ORDER BY site_no, minute_at ROWS UNBOUNDED PRECEDING);

-- step: titles
-- The catalogue: 3000 titles shuffled over the sites; within a site popularity is Zipf-like
-- (exponent 1.1) by a shuffled rank. Ranks 4, 4 + live_every, ... are live channels. [lo, hi)
-- is the title's interval on one axis shared by all sites.
CREATE OR REPLACE TEMP TABLE titles AS
WITH shuffled AS (
    SELECT r.n, row_number() OVER (ORDER BY draw_bits(p.seed, r.n, 'title-site'), r.n) AS slot
    FROM range(1, 3001) AS r(n), params AS p
), placed AS (
    SELECT t.n, s.site::site_name AS site, s.site_no, s.live_every,
           row_number() OVER (PARTITION BY s.site
                              ORDER BY draw_bits(p.seed, t.n, 'title-rank'), t.n)
               AS popularity_rank
    FROM shuffled AS t
    JOIN sites AS s ON t.slot > s.title_from AND t.slot <= s.title_from + s.titles
    CROSS JOIN params AS p
), weighted AS (
    SELECT pl.*,
           round(1e9 * pow(pl.popularity_rank, -1.1))::BIGINT AS weight,
           CASE WHEN pl.live_every > 0 THEN pl.popularity_rank % pl.live_every = 4 ELSE false END
               AS is_live,
           exp(0.15 * gauss(p.seed, pl.n, 'title-errors')) AS error_mult
    FROM placed AS pl, params AS p
)
SELECT printf('t-%04d', n)::title_code AS title_id, site, popularity_rank, is_live, error_mult,
       weight,
       (sum(weight) OVER w - weight)::BIGINT AS lo,
       (sum(weight) OVER w)::BIGINT AS hi
FROM weighted
WINDOW w AS (ORDER BY site_no, popularity_rank ROWS UNBOUNDED PRECEDING);

-- step: minute bins
-- An equality-join index over the minute axis, so that a draw finds its minute by a hash join
-- rather than a sort. Bins are as wide as the lightest minute, so a bin meets at most two
-- minutes: a draw below the bin's split is in the first, otherwise in the last. Still exact.
CREATE OR REPLACE TEMP TABLE minute_bins AS
WITH axis AS (
    SELECT min(weight) AS width FROM minute_cdf
), spans AS (
    SELECT unnest(range(m.lo // a.width, (m.hi - 1) // a.width + 1)) AS bin, a.width,
           m.lo, m.hi, m.minute_at
    FROM minute_cdf AS m, axis AS a
)
SELECT bin, any_value(width) AS width, min(hi) AS split,
       arg_min(minute_at, lo) AS first_minute, arg_max(minute_at, lo) AS last_minute
FROM spans
GROUP BY bin;

-- step: title bins
-- The same index over the title axis, carrying the title attributes the draws need.
CREATE OR REPLACE TEMP TABLE title_bins AS
WITH axis AS (
    SELECT min(weight) AS width FROM titles
), spans AS (
    SELECT unnest(range(t.lo // a.width, (t.hi - 1) // a.width + 1)) AS bin, a.width,
           t.lo, t.hi, t.title_id, t.is_live, t.error_mult
    FROM titles AS t, axis AS a
)
SELECT bin, any_value(width) AS width, min(hi) AS split,
       arg_min(title_id, lo) AS first_title, arg_max(title_id, lo) AS last_title,
       arg_min(is_live, lo) AS first_live, arg_max(is_live, lo) AS last_live,
       arg_min(error_mult, lo) AS first_error_mult, arg_max(error_mult, lo) AS last_error_mult
FROM spans
GROUP BY bin;

-- step: site totals
-- Where each site's stretch of the minute and title axes starts, and how long it is.
CREATE OR REPLACE TEMP TABLE site_totals AS
WITH minutes AS (
    SELECT site, min(lo) AS minute_offset, max(hi) - min(lo) AS minute_total
    FROM minute_cdf GROUP BY site
), catalogue AS (
    SELECT site, min(lo) AS title_offset, max(hi) - min(lo) AS title_total
    FROM titles GROUP BY site
)
SELECT m.site, m.minute_offset, m.minute_total,
       (SELECT any_value(width) FROM minute_bins) AS minute_width,
       c.title_offset, c.title_total,
       (SELECT any_value(width) FROM title_bins) AS title_width,
       s.titles AS catalogue_titles
FROM minutes AS m
JOIN catalogue AS c USING (site)
JOIN sites AS s ON s.site::site_name = m.site;

-- step: plan
-- How many rows each kind of session gets, and where each kind's row numbers start. The match
-- adds match_extra_traffic times the sport sessions expected in its window, so the base count
-- is solved for to keep the requested total.
CREATE OR REPLACE TEMP TABLE plan AS
WITH match_window AS (
    SELECT sum(m.weight)::DOUBLE / any_value(t.minute_total) AS time_share
    FROM minute_cdf AS m, scenario AS sc, site_totals AS t
    WHERE m.site = sc.match_site AND t.site = sc.match_site
      AND m.minute_at >= sc.match_from AND m.minute_at < sc.match_to
), counts AS (
    SELECT p.sessions,
           round(p.sessions * sc.burst_share)::BIGINT AS burst_sessions,
           round(p.sessions * sc.crawler_share)::BIGINT AS crawler_sessions,
           sc.tiny_sessions::BIGINT AS tiny_sessions,
           sc.match_extra_traffic * s.share / 100.0 * w.time_share AS match_factor,
           greatest(100, p.sessions // sc.sessions_per_viewer)::BIGINT AS viewers
    FROM params AS p, scenario AS sc, match_window AS w, sites AS s
    WHERE s.site::site_name = sc.match_site
), solved AS (
    SELECT *,
           round((sessions - burst_sessions - crawler_sessions - tiny_sessions)
                 / (1 + match_factor))::BIGINT AS base_sessions
    FROM counts
), sized AS (
    SELECT *, round(base_sessions * match_factor)::BIGINT AS match_sessions FROM solved
)
SELECT *,
       base_sessions AS match_first,
       base_sessions + match_sessions AS crawler_first,
       base_sessions + match_sessions + crawler_sessions AS burst_first,
       base_sessions + match_sessions + crawler_sessions + burst_sessions AS tiny_first,
       base_sessions + match_sessions + crawler_sessions + burst_sessions + tiny_sessions
           AS total_rows
FROM sized;

-- step: row numbers
-- One row per session to be drawn, tagged with its kind. Materialised because a table scan runs
-- on every thread while range() runs on one.
CREATE OR REPLACE TEMP TABLE row_numbers AS
SELECT r.i AS row_no,
       CASE WHEN r.i < pl.match_first THEN 'viewer'
            WHEN r.i < pl.crawler_first THEN 'match'
            WHEN r.i < pl.burst_first THEN 'crawler'
            WHEN r.i < pl.tiny_first THEN 'burst'
            ELSE 'tiny'
       END::session_kind AS kind,
       CASE WHEN r.i < pl.tiny_first THEN 0 ELSE r.i - pl.tiny_first END AS seq
FROM plan AS pl
CROSS JOIN range(pl.total_rows) AS r(i);

-- step: session key
-- Keys of the identifier bijections; variables, so that using them needs no join.
SET VARIABLE session_key = (SELECT draw_bits(seed, 0, 'session-ids') FROM params);

-- step: viewer key
SET VARIABLE viewer_key = (SELECT draw_bits(seed, 0, 'viewer-ids') FROM params);

-- step: viewer draws
-- Ordinary audience sessions: site, then end minute from that site's curve, then title from
-- that site's popularity; after release a share of kids sessions go to the new title. Viewer
-- numbers are a power of a uniform, so that some viewers watch far more often than others.
CREATE OR REPLACE TEMP VIEW viewer_draws AS
WITH picked AS (
    SELECT r.row_no, p.seed, s.site, t.minute_width, t.title_width,
           t.minute_offset + below(p.seed, r.row_no, 'minute', t.minute_total) AS minute_pick,
           t.title_offset + below(p.seed, r.row_no, 'title', t.title_total) AS title_pick,
           floor(pl.viewers * pow(unit(p.seed, r.row_no, 'viewer'), 1.3))::BIGINT AS viewer_no
    FROM row_numbers AS r
    CROSS JOIN plan AS pl
    CROSS JOIN params AS p
    JOIN site_bins AS s ON s.bin = below(p.seed, r.row_no, 'site', 100)
    JOIN site_totals AS t ON t.site = s.site
    WHERE r.kind = 'viewer'
), placed AS (
    SELECT k.row_no, k.seed, k.viewer_no, k.site,
           CASE WHEN k.minute_pick < m.split THEN m.first_minute ELSE m.last_minute END
               + to_milliseconds(below(k.seed, k.row_no, 'second', 60000)) AS ended_at,
           k.title_pick < c.split AS in_first,
           c.first_title, c.last_title, c.first_live, c.last_live,
           c.first_error_mult, c.last_error_mult
    FROM picked AS k
    JOIN minute_bins AS m ON m.bin = k.minute_pick // k.minute_width
    JOIN title_bins AS c ON c.bin = k.title_pick // k.title_width
), released AS (
    SELECT pl.row_no, pl.seed, pl.viewer_no, pl.site, pl.ended_at,
           CASE WHEN pl.in_first THEN pl.first_title ELSE pl.last_title END AS title_id,
           CASE WHEN pl.in_first THEN pl.first_live ELSE pl.last_live END AS is_live,
           CASE WHEN pl.in_first THEN pl.first_error_mult ELSE pl.last_error_mult END
               AS title_error_mult,
           pl.site = sc.release_site AND pl.ended_at >= sc.release_at
               AND unit(pl.seed, pl.row_no, 'release') < sc.release_share AS on_release
    FROM placed AS pl, scenario AS sc
)
SELECT r.row_no, r.seed, 'viewer'::session_kind AS kind, 0 AS seq, r.viewer_no, r.site,
       CASE WHEN r.on_release THEN sc.release_title ELSE r.title_id END AS title_id,
       CASE WHEN r.on_release THEN false ELSE r.is_live END AS is_live,
       CASE WHEN r.on_release THEN 1.0 ELSE r.title_error_mult END AS title_error_mult,
       r.ended_at
FROM released AS r, scenario AS sc;

-- step: match draws
-- The match's extra viewers: one live sport title, sessions ending through the match and a
-- crowd leaving in its last 20 minutes.
CREATE OR REPLACE TEMP VIEW match_draws AS
WITH timed AS (
    SELECT r.row_no, p.seed,
           floor(pl.viewers * pow(unit(p.seed, r.row_no, 'viewer'), 1.3))::BIGINT AS viewer_no,
           CASE WHEN unit(p.seed, r.row_no, 'final-whistle') < 0.4
                THEN sc.match_to - INTERVAL 20 MINUTE
                     + to_milliseconds(below(p.seed, r.row_no, 'second', 20 * 60000))
                ELSE sc.match_from
                     + to_milliseconds(below(p.seed, r.row_no, 'second',
                                             epoch_ms(sc.match_to) - epoch_ms(sc.match_from)))
           END AS ended_at
    FROM row_numbers AS r, plan AS pl, params AS p, scenario AS sc
    WHERE r.kind = 'match'
)
SELECT t.row_no, t.seed, 'match'::session_kind AS kind, 0 AS seq, t.viewer_no, c.site,
       c.title_id, c.is_live, c.error_mult AS title_error_mult, t.ended_at
FROM timed AS t
CROSS JOIN scenario AS sc
JOIN titles AS c ON c.site = sc.match_site AND c.popularity_rank = sc.match_title_rank;

-- step: crawler draws
-- Background crawlers: flat over time, any site and title, a few hosting countries and a few
-- dozen client ids numbered after the viewers.
CREATE OR REPLACE TEMP VIEW crawler_draws AS
WITH placed AS (
    SELECT r.row_no, p.seed, s.site,
           pl.viewers + below(p.seed, r.row_no, 'crawler-id', 40) AS viewer_no,
           sc.lake_from + to_milliseconds(below(p.seed, r.row_no, 'second',
                                                epoch_ms(sc.lake_to) - epoch_ms(sc.lake_from)))
               AS ended_at,
           (['US', 'NL', 'IE', 'DE'][1 + below(p.seed, r.row_no, 'crawler-country', 4)])
               ::country_code
               AS country,
           1 + below(p.seed, r.row_no, 'crawler-title', st.catalogue_titles) AS title_rank,
           below(p.seed, r.row_no, 'crawler-agent', 4) AS agent_no
    FROM row_numbers AS r
    CROSS JOIN plan AS pl
    CROSS JOIN params AS p
    CROSS JOIN scenario AS sc
    JOIN site_bins AS s ON s.bin = below(p.seed, r.row_no, 'site', 100)
    JOIN site_totals AS st ON st.site = s.site
    WHERE r.kind = 'crawler'
)
SELECT k.row_no, 'crawler'::session_kind AS kind, 0 AS seq, k.viewer_no, k.site, c.title_id,
       c.is_live, c.error_mult AS title_error_mult, k.ended_at, k.country, n.cdn,
       'web'::device_name AS device_family, 'desktop'::hardware_name AS hardware,
       a.user_agent AS crawler_agent,
       unit(k.seed, k.row_no, 'bot-flag') < a.flag_share AS is_bot
FROM placed AS k
JOIN titles AS c ON c.site = k.site AND c.popularity_rank = k.title_rank
JOIN crawler_agents AS a ON a.agent_no = k.agent_no
JOIN countries AS ct ON ct.country = k.country
JOIN cdn_bins AS n ON n.slot = 1000 * ct.country_no + below(k.seed, k.row_no, 'cdn', 1000);

-- step: burst draws
-- The crawler burst decoy: one hour, a few top news titles, one CDN and country, half flagged.
CREATE OR REPLACE TEMP VIEW burst_draws AS
WITH placed AS (
    SELECT r.row_no, p.seed,
           pl.viewers + 40 + below(p.seed, r.row_no, 'crawler-id', 6) AS viewer_no,
           sc.burst_from + to_milliseconds(below(p.seed, r.row_no, 'second',
                                                 epoch_ms(sc.burst_to) - epoch_ms(sc.burst_from)))
               AS ended_at,
           1 + below(p.seed, r.row_no, 'burst-title', sc.burst_titles) AS title_rank,
           below(p.seed, r.row_no, 'burst-agent', 2) AS agent_pick
    FROM row_numbers AS r, plan AS pl, params AS p, scenario AS sc
    WHERE r.kind = 'burst'
)
SELECT k.row_no, 'burst'::session_kind AS kind, 0 AS seq, k.viewer_no, sc.burst_site AS site,
       c.title_id, c.is_live, c.error_mult AS title_error_mult, k.ended_at,
       sc.burst_country AS country, sc.burst_cdn AS cdn, 'web'::device_name AS device_family,
       'desktop'::hardware_name AS hardware, a.user_agent AS crawler_agent,
       unit(k.seed, k.row_no, 'bot-flag') < sc.burst_flag_share AS is_bot
FROM placed AS k
CROSS JOIN scenario AS sc
JOIN titles AS c ON c.site = sc.burst_site AND c.popularity_rank = k.title_rank
JOIN crawler_agents AS a ON a.in_burst AND a.burst_pick = k.agent_pick;

-- step: tiny draws
-- The tiny-title decoy: exactly tiny_sessions sessions in one hour from ordinary viewers.
CREATE OR REPLACE TEMP VIEW tiny_draws AS
WITH placed AS (
    SELECT r.row_no, r.seq, p.seed,
           below(p.seed, r.row_no, 'viewer', pl.viewers) AS viewer_no,
           sc.tiny_from + to_milliseconds(below(p.seed, r.row_no, 'second',
                                                epoch_ms(sc.tiny_to) - epoch_ms(sc.tiny_from)))
               AS ended_at
    FROM row_numbers AS r, plan AS pl, params AS p, scenario AS sc
    WHERE r.kind = 'tiny'
)
SELECT k.row_no, k.seed, 'tiny'::session_kind AS kind, k.seq, k.viewer_no, sc.tiny_site AS site,
       sc.tiny_title AS title_id, false AS is_live, 1.0::DOUBLE AS title_error_mult, k.ended_at
FROM placed AS k, scenario AS sc;

-- step: audience draws
-- The sessions of ordinary viewers, with what each viewer keeps: one country, device family
-- and piece of hardware, all drawn from the viewer number (so no table of viewers is needed),
-- and a CDN picked per session by the country's steering.
CREATE OR REPLACE TEMP VIEW audience_draws AS
WITH audience AS (
    SELECT * FROM viewer_draws
    UNION ALL BY NAME SELECT * FROM match_draws
    UNION ALL BY NAME SELECT * FROM tiny_draws
)
SELECT a.row_no, a.kind, a.seq, a.viewer_no, a.site, a.title_id, a.is_live, a.title_error_mult,
       a.ended_at, c.country, n.cdn, d.device_family,
       d.hardware[1 + below(a.seed, a.viewer_no, 'viewer-hardware', len(d.hardware))] AS hardware,
       NULL::agent_string AS crawler_agent, false AS is_bot
FROM audience AS a
JOIN country_bins AS c ON c.bin = below(a.seed, a.viewer_no, 'viewer-country', 10000)
JOIN device_bins AS d ON d.bin = below(a.seed, a.viewer_no, 'viewer-device', 1000)
JOIN cdn_bins AS n ON n.slot = 1000 * c.country_no + below(a.seed, a.row_no, 'cdn', 1000);

-- step: draws
CREATE OR REPLACE TEMP VIEW draws AS
SELECT * FROM audience_draws
UNION ALL BY NAME SELECT * FROM crawler_draws
UNION ALL BY NAME SELECT * FROM burst_draws;

-- step: outcomes
-- What happened in each session. A fatal error before the first frame is a video start failure;
-- otherwise the viewer may exit before start; otherwise it started (and may still fail later).
-- Durations and bitrate are log-normal, median * exp(sigma * z), with the sigmas inline below;
-- rebuffering is a stall probability times a log-normal share of the play time.
CREATE OR REPLACE TEMP VIEW outcomes AS
WITH aged AS (
    SELECT d.*, p.seed,
           epoch(d.ended_at - sc.lake_from) / epoch(sc.lake_to - sc.lake_from) AS age,
           unit(p.seed, d.row_no, 'version') AS version_pick
    FROM draws AS d, params AS p, scenario AS sc
), versioned AS (
    SELECT a.*,
           CASE
               WHEN a.device_family = sc.rollout_family
                    AND a.ended_at >= sc.rollout_from AND a.ended_at < sc.rollback_at
                    AND unit(a.seed, a.row_no, 'rollout')
                        < sc.rollout_share
                          * least(1.0, epoch(a.ended_at - sc.rollout_from) / epoch(sc.rollout_ramp))
                   THEN sc.rollout_version
               WHEN a.device_family = sc.launch_family
                    AND a.ended_at >= sc.launch_from AND a.ended_at < sc.launch_to
                    AND unit(a.seed, a.row_no, 'launch') < sc.launch_share
                   THEN sc.launch_version
               WHEN a.version_pick < f.oldest_from + (f.oldest_to - f.oldest_from) * a.age
                   THEN f.oldest
               WHEN a.version_pick < f.oldest_from + (f.oldest_to - f.oldest_from) * a.age
                                     + f.middle_from + (f.middle_to - f.middle_from) * a.age
                   THEN f.middle
               ELSE f.newest
           END AS player_version
    FROM aged AS a
    CROSS JOIN scenario AS sc
    JOIN family_versions AS f ON f.device_family = a.device_family
), hazards AS (
    SELECT v.*,
           v.ended_at >= sc.outage_from AND v.ended_at < sc.outage_to
               AND v.country = sc.outage_country AND v.cdn = sc.outage_cdn AS in_outage,
           v.ended_at >= sc.decode_from AND v.ended_at < sc.decode_to
               AND v.title_id = sc.release_title AS in_decode,
           v.ended_at >= sc.match_from AND v.ended_at < sc.match_to
               AND v.site = sc.match_site AS in_match,
           d.startup_median_ms * n.startup_mult * c.startup_mult
               * CASE WHEN v.player_version = sc.rollout_version THEN sc.rollout_startup_factor
                      WHEN v.player_version = sc.launch_version THEN sc.launch_startup_factor
                      ELSE 1.0 END AS startup_median_ms,
           d.bitrate_kbps AS bitrate_base,
           sc.stall_share * d.stall_mult * n.stall_mult AS base_stall_share,
           s.play_median_s * 1000 * CASE WHEN v.is_live THEN 3.0 ELSE 1.0 END AS play_median_ms,
           CASE v.kind
               WHEN 'crawler' THEN sc.crawler_fail_share
               WHEN 'burst' THEN sc.burst_fail_share
               WHEN 'tiny' THEN 0.0
               ELSE sc.fatal_share * d.error_mult * n.error_mult * c.error_mult * v.title_error_mult
                    * CASE WHEN v.player_version = sc.launch_version THEN sc.launch_fail_factor ELSE 1.0 END
           END AS fatal_share,
           CASE WHEN v.kind IN ('viewer', 'match') THEN sc.exit_share
                WHEN v.kind = 'tiny' THEN 0.0
                ELSE sc.crawler_exit_share END AS exit_share
    FROM versioned AS v
    CROSS JOIN scenario AS sc
    JOIN devices AS d ON d.device_family::device_name = v.device_family
    JOIN cdns AS n ON n.cdn::cdn_name = v.cdn
    JOIN countries AS c ON c.country = v.country
    JOIN sites AS s ON s.site::site_name = v.site
), failed AS (
    SELECT h.*,
           CASE
               WHEN h.kind = 'tiny' AND h.seq < sc.tiny_failures THEN sc.tiny_code
               WHEN h.in_outage AND unit(h.seed, h.row_no, 'incident') < sc.outage_fail_share
                   THEN sc.outage_code
               WHEN h.in_decode AND unit(h.seed, h.row_no, 'incident') < sc.decode_fail_share
                   THEN sc.decode_code
           END AS forced_code,
           unit(h.seed, h.row_no, 'before-start')
               < CASE WHEN h.kind IN ('crawler', 'burst', 'tiny') THEN 1.0
                      WHEN h.in_outage THEN sc.outage_before_start_share
                      WHEN h.in_decode THEN sc.decode_before_start_share
                      ELSE sc.before_start_share END AS error_before_start,
           CASE WHEN h.in_match THEN sc.match_stall_factor ELSE 1.0 END * h.base_stall_share
               AS stall_share,
           CASE WHEN h.in_match THEN sc.match_stall_depth ELSE 1.0 END AS stall_depth
    FROM hazards AS h, scenario AS sc
), states AS (
    SELECT f.*,
           f.forced_code IS NOT NULL OR unit(f.seed, f.row_no, 'fatal') < f.fatal_share AS has_error
    FROM failed AS f
), classified AS (
    SELECT st.*,
           CASE WHEN st.has_error AND st.error_before_start THEN 'start_failure'
                WHEN unit(st.seed, st.row_no, 'exit') < st.exit_share THEN 'exit_before_start'
                ELSE 'started'
           END AS state
    FROM states AS st
), coded AS (
    SELECT c.*,
           CASE WHEN c.has_error AND c.state <> 'exit_before_start'
                THEN coalesce(c.forced_code, e.error_code) END AS error_code
    FROM classified AS c
    LEFT JOIN error_bins AS e
        ON e.mix = CASE WHEN c.kind IN ('crawler', 'burst') THEN 'crawler'
                        WHEN c.error_before_start THEN 'before_start'
                        ELSE 'after_start' END
       AND e.bin = below(c.seed, c.row_no, 'error-code', 100)
), timed AS (
    SELECT c.*,
           CASE WHEN c.state = 'started'
                THEN greatest(120, round(c.startup_median_ms
                                         * exp(0.5 * gauss(c.seed, c.row_no, 'startup'))))
           END::INTEGER AS startup_ms,
           CASE c.state
               WHEN 'start_failure' THEN least(60000, greatest(200,
                   4000 * exp(0.6 * gauss(c.seed, c.row_no, 'attempt'))))
               WHEN 'exit_before_start' THEN least(120000, greatest(300,
                   5000 * exp(0.7 * gauss(c.seed, c.row_no, 'attempt'))))
               ELSE 0
           END::BIGINT AS attempt_ms,
           CASE WHEN c.state <> 'started' THEN 0
                WHEN c.kind IN ('crawler', 'burst')
                     THEN 8000 * exp(0.5 * gauss(c.seed, c.row_no, 'play'))
                WHEN c.kind = 'match'
                     THEN least(3000000 * exp(0.6 * gauss(c.seed, c.row_no, 'play')),
                                epoch_ms(c.ended_at) - epoch_ms(sc.match_from - INTERVAL 10 MINUTE))
                ELSE least(4 * 3600 * 1000, greatest(3000, c.play_median_ms
                                                     * exp(gauss(c.seed, c.row_no, 'play'))))
           END
           * CASE WHEN c.state = 'started' AND c.error_code IS NOT NULL
                  THEN unit(c.seed, c.row_no, 'failure-point') ELSE 1.0 END AS play_raw
    FROM coded AS c, scenario AS sc
), played AS (
    SELECT t.*,
           round(t.play_raw)::BIGINT AS play_ms,
           t.state = 'started' AND t.kind NOT IN ('crawler', 'burst')
               AND unit(t.seed, t.row_no, 'stall') < t.stall_share AS stalled
    FROM timed AS t
)
SELECT p.*,
       CASE WHEN p.stalled
            THEN round(p.play_ms * least(0.5, 0.024 * p.stall_depth
                                             * exp(0.7 * gauss(p.seed, p.row_no, 'stall-depth'))))
            ELSE 0
       END::BIGINT AS rebuffer_ms,
       CASE WHEN p.state = 'started' AND p.kind NOT IN ('crawler', 'burst')
                 AND unit(p.seed, p.row_no, 'pause') < CASE WHEN p.is_live THEN 0.08 ELSE 0.3 END
            THEN round(least(3600000, 45000 * exp(1.1 * gauss(p.seed, p.row_no, 'pause-length'))))
            ELSE 0
       END::BIGINT AS pause_ms,
       CASE WHEN p.state = 'started'
            THEN round(p.bitrate_base * exp(0.12 * gauss(p.seed, p.row_no, 'bitrate'))
                       * CASE WHEN p.stalled THEN 0.82 ELSE 1.0 END, 1)
       END::DOUBLE AS bitrate_kbps
FROM played AS p;

-- step: sorted sessions
-- The rows in event order (the row number breaks ties, so the order is total). Identifiers are
-- left out of the sort: they are functions of the row and viewer numbers, cheaper to add after.
CREATE OR REPLACE TEMP TABLE sorted_sessions AS
SELECT o.row_no, o.viewer_no,
       make_timestamp(epoch_us(o.ended_at)
                      - 1000 * (coalesce(o.startup_ms, 0) + o.attempt_ms + o.play_ms
                                + o.rebuffer_ms + o.pause_ms)) AS started_at,
       o.ended_at, o.site, o.title_id, o.is_live, o.cdn, o.country, o.device_family,
       o.player_version, coalesce(o.crawler_agent, a.user_agent) AS user_agent, o.is_bot,
       o.startup_ms, o.error_code, o.play_ms, o.rebuffer_ms, o.pause_ms, o.bitrate_kbps
FROM outcomes AS o
JOIN player_agents AS a
    ON a.device_family = o.device_family AND a.player_version = o.player_version
   AND a.hardware = o.hardware
ORDER BY o.ended_at, o.row_no;

-- step: sessions
-- The lake's rows and columns; a projection, so the sorted order is kept. The ENUM columns are
-- written to Parquet as plain strings.
CREATE OR REPLACE TEMP VIEW sessions AS
SELECT hex_id('s', row_no, getvariable('session_key')) AS session_id,
       hex_id('v', viewer_no, getvariable('viewer_key')) AS viewer_id,
       started_at, ended_at, site, title_id, is_live, cdn, country, device_family,
       player_version, user_agent, is_bot, startup_ms, error_code, play_ms, rebuffer_ms,
       pause_ms, bitrate_kbps,
       ended_at::DATE AS day
FROM sorted_sessions;

-- step: labels
-- What the demo's checks must find (incidents) and must stay quiet about (decoys).
CREATE OR REPLACE TEMP TABLE labels AS
SELECT * FROM (
    SELECT 'incident' AS kind, 'cdn_country_errors' AS check_name,
           printf('cdn=%s, country=%s', outage_cdn, outage_country) AS key,
           outage_from AS start_at, outage_to AS end_at,
           printf('about %.0f%% of %s sessions in %s fail with %s, mostly before the first frame',
                  100 * outage_fail_share, outage_cdn, outage_country, outage_code) AS note
    FROM scenario
    UNION ALL
    SELECT 'incident', 'title_errors',
           printf('site=%s, title_id=%s', release_site, release_title),
           decode_from, decode_to,
           printf('new title %s (released %s) fails with %s in about %.0f%% of sessions',
                  release_title, strftime(release_at, '%Y-%m-%d %H:%M'), decode_code,
                  100 * decode_fail_share)
    FROM scenario
    UNION ALL
    SELECT 'incident', 'startup_time_by_device', printf('device_family=%s', rollout_family),
           rollout_from, rollback_at,
           printf('player %s reaches %.0f%% of %s sessions within %.0f hours and makes '
                  || 'start-up %.1fx slower until rolled back',
                  rollout_version, 100 * rollout_share, rollout_family,
                  epoch(rollout_ramp) / 3600, rollout_startup_factor)
    FROM scenario
    UNION ALL
    SELECT 'incident', 'release_errors_against_peers',
           printf('device_family=%s, player_version=%s', launch_family, launch_version),
           launch_from, launch_to,
           printf('player %s on %s, on %.0f%% of the family''s sessions from its first hour, fails '
                  || '%.1fx as often as the family''s other releases and starts %.2fx slower',
                  launch_version, launch_family, 100 * launch_share, launch_fail_factor,
                  launch_startup_factor)
    FROM scenario
    UNION ALL
    SELECT 'incident', 'rebuffering_by_site', printf('site=%s', match_site), match_from, match_to,
           printf('live match: %.0fx the usual %s traffic on one live title, rebuffering '
                  || 'several times normal',
                  1 + match_extra_traffic, match_site)
    FROM scenario
    UNION ALL
    SELECT 'decoy', '*', printf('site=%s', burst_site), burst_from, burst_to,
           printf('crawler burst on %s: %.2f%% of all sessions, about %.0f%% failing, '
                  || 'half not flagged is_bot',
                  burst_site, 100 * burst_share, 100 * burst_fail_share)
    FROM scenario
    UNION ALL
    SELECT 'decoy', '*', printf('title_id=%s', tiny_title), tiny_from, tiny_to,
           printf('tiny title: %d sessions, %d failing with %s', tiny_sessions, tiny_failures,
                  tiny_code)
    FROM scenario
)
ORDER BY start_at, check_name;
