-- lexis_age: follow-up split by attained age band (Lexis expansion on the age axis).
-- Grain: one row per (person_key, endpoint, age band) with person-time in the band, for the
-- at-risk rows of study_endpoint_time. Bands start at the completed ages in $age_edges
-- (ascending; the last band is open). A band is entered on the birthday that starts it
-- (birth_date + lower years, as DuckDB adds years: 29 February -> 28 February), so person-time
-- is in whole days: days in (start, stop] that fall in (band entry, band exit]. The endpoint
-- status is counted in the band holding stop_day (status_in_band; 0 in earlier bands).
-- Inputs: study_endpoint_time (sql/study/endpoint_time.sql), study_cohort (birth_date,
-- index_date).
WITH
edges AS (
    SELECT unnest($age_edges::INTEGER[]) AS lower
),
bands AS (
    SELECT
        lower,
        lead(lower) OVER (ORDER BY lower) AS upper
    FROM edges
),
spans AS (
    SELECT t.person_key, t.endpoint, t.start_day, t.stop_day, t.status, c.birth_date, c.index_date
    FROM study_endpoint_time AS t
    JOIN study_cohort AS c ON c.person_key = t.person_key
    WHERE t.at_risk
),
crossed AS (
    SELECT
        s.*,
        b.lower,
        b.upper,
        date_diff('day', s.index_date, CAST(s.birth_date + to_years(b.lower) AS DATE)) AS band_start,
        CASE WHEN b.upper IS NOT NULL
            THEN date_diff('day', s.index_date, CAST(s.birth_date + to_years(b.upper) AS DATE))
        END AS band_stop
    FROM spans AS s
    CROSS JOIN bands AS b
),
band_days AS (
    SELECT
        *,
        least(stop_day, coalesce(band_stop, stop_day)) - greatest(start_day, band_start) AS days
    FROM crossed
)
SELECT
    person_key,
    endpoint,
    lower AS age_lower,
    upper AS age_upper,
    CASE WHEN upper IS NULL THEN CAST(lower AS VARCHAR) || '+'
        ELSE CAST(lower AS VARCHAR) || '-' || CAST(upper - 1 AS VARCHAR) END AS age_band,
    days,
    CASE WHEN stop_day > band_start AND (band_stop IS NULL OR stop_day <= band_stop)
        THEN status ELSE 0 END AS status_in_band
FROM band_days
WHERE days > 0
ORDER BY person_key, endpoint, lower
