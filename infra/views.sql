-- changekind's views for BI and on-call tools.
--
-- The migrations create these views (infra/migrations/versions/); this file is
-- the readable copy of the current definitions, and a test checks that it
-- matches what the migrations build, on SQLite and on PostgreSQL.
--
-- Each view starts at a line "-- view: NAME (DIALECTS)".  Where SQLite and
-- PostgreSQL need different SQL the view appears once per dialect.
-- Timestamps are UTC (SQLite keeps them as 'YYYY-MM-DD HH:MM:SS.ffffff' text).


-- view: open_level_shifts (sqlite, postgresql)
-- The level shift each series currently stands at: its latest confirmed LS
-- that nobody dismissed (one row per series; 'explained' shifts stay open).
CREATE VIEW open_level_shifts AS
SELECT series_id, event_time, event_ts, effect, effect_pct, effect_sigma, t_stat,
       duration, level, model, triage_state, triage_reason, first_seen, last_seen
FROM (
    SELECT e.*,
           ROW_NUMBER() OVER (
               PARTITION BY e.series_id
               ORDER BY CASE WHEN e.event_ts IS NULL THEN 1 ELSE 0 END,
                        e.event_ts DESC, e.event_time DESC
           ) AS recency
    FROM series_events e
    WHERE e.event_type = 'LS'
      AND e.status = 'confirmed'
      AND (e.triage_state IS NULL OR e.triage_state <> 'dismissed')
) ranked
WHERE recency = 1;


-- view: daily_event_counts (sqlite)
-- Events per UTC day and type (retracted events and events without a
-- date-time left out).
CREATE VIEW daily_event_counts AS
SELECT date(event_ts) AS day,
       event_type,
       COUNT(*) AS n_events,
       SUM(CASE WHEN status = 'confirmed' THEN 1 ELSE 0 END) AS n_confirmed,
       SUM(CASE WHEN status = 'provisional' THEN 1 ELSE 0 END) AS n_provisional
FROM series_events
WHERE status <> 'retracted' AND event_ts IS NOT NULL
GROUP BY date(event_ts), event_type;


-- view: daily_event_counts (postgresql)
CREATE VIEW daily_event_counts AS
SELECT CAST(event_ts AT TIME ZONE 'UTC' AS DATE) AS day,
       event_type,
       COUNT(*) AS n_events,
       SUM(CASE WHEN status = 'confirmed' THEN 1 ELSE 0 END) AS n_confirmed,
       SUM(CASE WHEN status = 'provisional' THEN 1 ELSE 0 END) AS n_provisional
FROM series_events
WHERE status <> 'retracted' AND event_ts IS NOT NULL
GROUP BY CAST(event_ts AT TIME ZONE 'UTC' AS DATE), event_type;


-- view: events_needing_triage (sqlite, postgresql)
-- Confirmed events nobody has looked at yet.
CREATE VIEW events_needing_triage AS
SELECT series_id, event_time, event_ts, event_type, effect, effect_pct, effect_sigma,
       t_stat, duration, level, model, first_seen, last_seen, last_run_id
FROM series_events
WHERE status = 'confirmed' AND triage_state IS NULL;


-- view: events_by_verdict (sqlite, postgresql)
-- Events that are not retracted, by their current verdict ('none' where nobody
-- has judged them yet); every verdict given is in the table triage_history.
CREATE VIEW events_by_verdict AS
SELECT COALESCE(triage_state, 'none') AS verdict,
       series_id, event_time, event_ts, event_type, status, effect, effect_pct, t_stat,
       triage_reason, triage_at, last_seen
FROM series_events
WHERE status <> 'retracted';


-- view: level_shifts_in_force (sqlite, postgresql)
-- Every confirmed level shift nobody dismissed, netted per series: the net
-- level change since the level before the first of them (reference_level,
-- since_time), in the series' units and in percent, with the latest shift
-- beside it (open_level_shifts shows the latest one alone).
CREATE VIEW level_shifts_in_force AS
WITH shifts AS (
    SELECT series_id, event_time, event_ts, effect, level,
           ROW_NUMBER() OVER (
               PARTITION BY series_id
               ORDER BY CASE WHEN event_ts IS NULL THEN 1 ELSE 0 END, event_ts, event_time
           ) AS oldest,
           ROW_NUMBER() OVER (
               PARTITION BY series_id
               ORDER BY CASE WHEN event_ts IS NULL THEN 1 ELSE 0 END,
                        event_ts DESC, event_time DESC
           ) AS newest,
           COUNT(*) OVER (PARTITION BY series_id) AS n_shifts,
           SUM(effect) OVER (PARTITION BY series_id) AS net_effect
    FROM series_events
    WHERE event_type = 'LS'
      AND status = 'confirmed'
      AND (triage_state IS NULL OR triage_state <> 'dismissed')
)
SELECT f.series_id,
       f.n_shifts,
       f.net_effect,
       CASE WHEN f.level <> 0 THEN 100.0 * f.net_effect / f.level END AS net_pct,
       f.level AS reference_level,
       f.event_time AS since_time,
       f.event_ts AS since_ts,
       l.event_time AS latest_time,
       l.event_ts AS latest_ts,
       l.effect AS latest_effect
FROM shifts f
JOIN shifts l ON l.series_id = f.series_id AND l.newest = 1
WHERE f.oldest = 1;


-- view: open_incidents (sqlite, postgresql)
-- Incidents that can still change on their own: a member is provisional, or
-- the incident ended within the grouping margin of the newest scan (later
-- scans may add members).  shared_labels is a JSON object label -> value.
CREATE VIEW open_incidents AS
SELECT incident_id, quantity, direction, start_ts, end_ts, n_series, fleet_size,
       share_of_fleet, dominant_type, median_effect_pct, n_provisional, shared_labels,
       first_seen, last_seen, last_run_id
FROM incidents
WHERE state = 'open';


-- view: event_labels (sqlite, postgresql)
-- Each event with the current labels of its series (one row per event and
-- label; events of series without labels are not listed).
CREATE VIEW event_labels AS
SELECT e.series_id, e.event_time, e.event_ts, e.event_type, e.status, e.effect,
       e.effect_pct, e.t_stat, l.label, l.value
FROM series_events e
JOIN series_labels l ON l.series_id = e.series_id;
