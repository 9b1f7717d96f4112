-- ecg_year: each study person's first ECG of each calendar year, for yearly prevalence.
-- Grain: one row per (person_key, year) for the persons of study_cohort (included persons)
-- with an ECG of rule set $rule_set_id in that year, within [$cal_start, $cal_end] (NULL =
-- open) and at a completed age in [$age_from, $age_below) (NULL = no upper limit). Persons are
-- selected once, at their index; their first ECG of each later year counts again.
WITH
ecgs AS (
    SELECT
        c.person_key,
        year(CAST(c.acquired_at AS DATE)) AS year,
        CAST(c.acquired_at AS DATE) AS ecg_date,
        c.rhythm_class,
        c.av_category,
        c.ventricular_conduction,
        p.sex,
        p.birth_date,
        row_number() OVER (
            PARTITION BY c.person_key, year(CAST(c.acquired_at AS DATE))
            ORDER BY c.acquired_at, c.ecg_key
        ) AS rn
    FROM ecg_conduction AS c
    JOIN study_cohort AS p ON p.person_key = c.person_key
    WHERE c.rule_set_id = $rule_set_id
        AND CAST(c.acquired_at AS DATE) >= coalesce($cal_start::DATE, CAST(c.acquired_at AS DATE))
        AND CAST(c.acquired_at AS DATE) <= coalesce($cal_end::DATE, CAST(c.acquired_at AS DATE))
),
aged AS (
    SELECT
        *,
        date_sub('year', birth_date, ecg_date) AS age_completed
    FROM ecgs
    WHERE rn = 1
)
SELECT
    person_key,
    year,
    ecg_date,
    age_completed,
    sex,
    rhythm_class,
    av_category,
    ventricular_conduction
FROM aged
WHERE age_completed >= $age_from AND age_completed < coalesce($age_below, age_completed + 1)
ORDER BY person_key, year
