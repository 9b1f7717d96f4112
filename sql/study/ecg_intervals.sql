-- ecg_intervals: the censoring interval of an ECG-detected endpoint, for interval-censored
-- (Turnbull) estimates: a block is seen only when an ECG is taken.
-- Grain: one row per person_key at risk for endpoint $endpoint in study_endpoint_time.
-- Days are whole days since the index date. For a person whose endpoint event was first seen
-- on stop_day (status 1), the event happened in (left_day, right_day] with right_day =
-- stop_day and left_day the day of the last ECG before stop_day whose AV conduction could be
-- graded (ecg_conduction.av_grade not NULL: an ECG in atrial fibrillation or paced rhythm says
-- nothing about AV block). For everyone else (censored or a competing event) right_day is NULL
-- and left_day is the last gradable ECG on or before stop_day: the endpoint is known to be
-- absent only up to then. ECGs before the entry day count as the entry day (start_day: the
-- person was at risk, so the event had not been seen by then); without any gradable ECG in
-- follow-up left_day is start_day. n_ecg counts the gradable ECGs in (start_day, left_day].
-- Inputs: study_endpoint_time (sql/study/endpoint_time.sql), study_cohort (person_key,
-- index_date); ECGs of rule set $rule_set_id from ecg_conduction.
WITH
spans AS (
    SELECT t.person_key, t.start_day, t.stop_day, t.status, c.index_date
    FROM study_endpoint_time AS t
    JOIN study_cohort AS c ON c.person_key = t.person_key
    WHERE t.endpoint = $endpoint AND t.at_risk
),
graded AS (
    SELECT
        s.person_key,
        date_diff('day', s.index_date, CAST(e.acquired_at AS DATE)) AS day
    FROM ecg_conduction AS e
    JOIN spans AS s ON s.person_key = e.person_key
    WHERE e.rule_set_id = $rule_set_id AND e.av_grade IS NOT NULL
),
last_without AS (
    SELECT
        s.person_key,
        max(g.day) AS last_day,
        count(*) FILTER (WHERE g.day > s.start_day) AS n_ecg
    FROM spans AS s
    JOIN graded AS g ON g.person_key = s.person_key
    WHERE (s.status = 1 AND g.day < s.stop_day) OR (s.status <> 1 AND g.day <= s.stop_day)
    GROUP BY s.person_key
)
SELECT
    s.person_key,
    s.start_day,
    s.stop_day,
    s.status,
    greatest(coalesce(l.last_day, s.start_day), s.start_day) AS left_day,
    CASE WHEN s.status = 1 THEN s.stop_day END AS right_day,
    coalesce(l.n_ecg, 0) AS n_ecg
FROM spans AS s
LEFT JOIN last_without AS l ON l.person_key = s.person_key
ORDER BY s.person_key
