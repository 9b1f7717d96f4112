-- endpoint_time: follow-up of each study person for each endpoint, with competing events coded.
-- Grain: one row per (person_key, endpoint) for the persons of study_cohort (the included
-- persons) and the endpoints of study_endpoint_def.
-- Inputs (registered by cohort.study.builder): study_cohort (person_key, index_date,
-- birth_date, followup_end), study_person_event (sql/study/person_event.sql) and
-- study_endpoint_def (endpoint, role 'event' | 'competing' | 'censor', code, event_kind,
-- source): code is 1 for the endpoint's own events and 2, 3, ... for its competing endpoints
-- in declared order. Times are whole days since the index date (day 0).
-- Rules: follow-up ends at the earliest of followup_end, $end_date and index + $horizon_days
-- (NULL = none). Entry is day $lag_days. A person is not at risk (status NULL, reason in
-- not_at_risk) when, on or before the entry day, the endpoint's event (first occurrences, so
-- also any before index), a competing or a censoring event happened, or follow-up ended.
-- Otherwise stop_day is the earliest of event, competing event, censoring event and end of
-- follow-up; status is 1 when the event is on stop_day (the event wins ties), else the code of
-- the first competing endpoint on stop_day (declared order), else 0 (censored). Events after
-- the end of follow-up do not count. Ages (years, days / 365.25) serve the age time scale.
WITH
cohort AS (
    SELECT
        person_key,
        index_date,
        birth_date,
        date_diff('day', index_date, least(
            followup_end,
            coalesce($end_date::DATE, followup_end),
            coalesce(CAST(index_date + to_days(CAST($horizon_days AS INTEGER)) AS DATE), followup_end)
        )) AS exit_day
    FROM study_cohort
),
endpoints AS (
    SELECT DISTINCT endpoint FROM study_endpoint_def
),
role_days AS (
    SELECT
        c.person_key,
        d.endpoint,
        d.role,
        d.code,
        min(date_diff('day', c.index_date, e.event_date)) AS first_day
    FROM cohort AS c
    JOIN study_person_event AS e ON e.person_key = c.person_key
    JOIN study_endpoint_def AS d ON d.event_kind = e.event_kind AND d.source = e.source
    GROUP BY c.person_key, d.endpoint, d.role, d.code
),
event_day AS (
    SELECT person_key, endpoint, min(first_day) AS day
    FROM role_days WHERE role = 'event'
    GROUP BY person_key, endpoint
),
censor_day AS (
    SELECT person_key, endpoint, min(first_day) AS day
    FROM role_days WHERE role = 'censor'
    GROUP BY person_key, endpoint
),
competing_ranked AS (
    SELECT
        person_key, endpoint, code, first_day,
        row_number() OVER (PARTITION BY person_key, endpoint ORDER BY first_day, code) AS rn
    FROM role_days WHERE role = 'competing'
),
competing_day AS (
    SELECT person_key, endpoint, first_day AS day, code
    FROM competing_ranked WHERE rn = 1
),
combined AS (
    SELECT
        c.person_key,
        n.endpoint,
        c.index_date,
        c.birth_date,
        c.exit_day,
        ev.day AS event_day,
        cp.day AS competing_day,
        cp.code AS competing_code,
        ce.day AS censor_day
    FROM cohort AS c
    CROSS JOIN endpoints AS n
    LEFT JOIN event_day AS ev ON ev.person_key = c.person_key AND ev.endpoint = n.endpoint
    LEFT JOIN competing_day AS cp ON cp.person_key = c.person_key AND cp.endpoint = n.endpoint
    LEFT JOIN censor_day AS ce ON ce.person_key = c.person_key AND ce.endpoint = n.endpoint
),
decided AS (
    SELECT
        *,
        CASE
            WHEN event_day <= $lag_days THEN 'event_before_entry'
            WHEN competing_day <= $lag_days THEN 'competing_before_entry'
            WHEN censor_day <= $lag_days THEN 'censored_before_entry'
            WHEN exit_day <= $lag_days THEN 'no_follow_up_after_entry'
        END AS not_at_risk,
        least(exit_day, event_day, competing_day, censor_day) AS first_day
    FROM combined
)
SELECT
    person_key,
    endpoint,
    not_at_risk IS NULL AS at_risk,
    not_at_risk,
    CAST($lag_days AS INTEGER) AS start_day,
    CASE WHEN not_at_risk IS NULL THEN first_day END AS stop_day,
    CASE
        WHEN not_at_risk IS NOT NULL THEN NULL
        WHEN event_day = first_day THEN 1
        WHEN competing_day = first_day THEN competing_code
        ELSE 0
    END AS status,
    (date_diff('day', birth_date, index_date) + $lag_days) / 365.25 AS entry_age,
    CASE WHEN not_at_risk IS NULL
        THEN (date_diff('day', birth_date, index_date) + first_day) / 365.25 END AS exit_age
FROM decided
ORDER BY person_key, endpoint
