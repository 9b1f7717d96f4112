-- counting_process: follow-up for one endpoint split at each new PR reading, PR carried forward.
-- Grain: one row per (person_key, interval) for the at-risk persons of study_endpoint_time with
-- endpoint = $endpoint; intervals (start_day, stop_day] are contiguous and do not overlap, the
-- first starts at the entry day and the last stops at stop_day.
-- A reading is the last ECG of a calendar day whose PR is measurable (pr_assessable, PR measured
-- and an AV category in $pr_categories: 1:1 conduction), from ecg_conduction of $rule_set_id.
-- Readings on or before the entry day set the value at entry (the latest one); each reading
-- strictly inside follow-up starts a new interval; readings on or after stop_day are ignored.
-- An ECG without a measurable PR (e.g. atrial fibrillation) changes nothing: the last PR is
-- carried forward. event is the endpoint status on the last interval and 0 before it.
-- Inputs: study_endpoint_time (sql/study/endpoint_time.sql) and study_cohort (index_date).
WITH
spans AS (
    SELECT t.person_key, t.start_day, t.stop_day, t.status, c.index_date
    FROM study_endpoint_time AS t
    JOIN study_cohort AS c ON c.person_key = t.person_key
    WHERE t.endpoint = $endpoint AND t.at_risk
),
daily AS (
    SELECT
        e.person_key,
        date_diff('day', s.index_date, CAST(e.acquired_at AS DATE)) AS day,
        e.pr_ms,
        e.ventricular_rate AS heart_rate,
        row_number() OVER (
            PARTITION BY e.person_key, CAST(e.acquired_at AS DATE)
            ORDER BY e.acquired_at DESC, e.ecg_key DESC
        ) AS rn
    FROM ecg_conduction AS e
    JOIN spans AS s ON s.person_key = e.person_key
    WHERE e.rule_set_id = $rule_set_id
        AND e.pr_assessable AND e.pr_ms IS NOT NULL
        AND list_contains($pr_categories::VARCHAR[], e.av_category)
),
readings AS (
    SELECT d.person_key, greatest(d.day, s.start_day) AS cut_day, d.day, d.pr_ms, d.heart_rate
    FROM daily AS d
    JOIN spans AS s ON s.person_key = d.person_key
    WHERE d.rn = 1 AND d.day < s.stop_day
),
latest AS (
    -- readings on or before entry all map to the entry day: keep the latest of them
    SELECT person_key, cut_day, pr_ms, heart_rate
    FROM (
        SELECT
            *,
            row_number() OVER (PARTITION BY person_key, cut_day ORDER BY day DESC) AS rn
        FROM readings
    ) AS r
    WHERE rn = 1
),
cuts AS (
    SELECT person_key, start_day AS cut_day FROM spans
    UNION
    SELECT person_key, cut_day FROM latest
),
intervals AS (
    SELECT
        k.person_key,
        k.cut_day AS start_day,
        coalesce(lead(k.cut_day) OVER w, s.stop_day) AS stop_day,
        lead(k.cut_day) OVER w IS NULL AS is_last,
        s.status,
        row_number() OVER w AS interval
    FROM cuts AS k
    JOIN spans AS s ON s.person_key = k.person_key
    WINDOW w AS (PARTITION BY k.person_key ORDER BY k.cut_day)
)
SELECT
    i.person_key,
    i.interval,
    i.start_day,
    i.stop_day,
    CASE WHEN i.is_last THEN i.status ELSE 0 END AS event,
    l.pr_ms,
    l.heart_rate
FROM intervals AS i
LEFT JOIN latest AS l ON l.person_key = i.person_key AND l.cut_day = i.start_day
ORDER BY i.person_key, i.interval
