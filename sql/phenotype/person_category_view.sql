-- person_category (view): for each person, each category seen on their ECGs (long form).
-- Grain: one row per (person_key, axis, category) with at least one ECG, per rule_set_id.
-- Computed when read (a filter on rule_set_id reaches the per-ECG scan); person_conduction.sql
-- reads it once per run. axis is 'av' (av_category), 'vc' (ventricular_conduction) or
-- 'rhythm' (rhythm_class). Findings counted in parts (rbbb, lafb, ...) are per ECG in
-- ecg_conduction. persistent: seen on >= persist_min_ecgs ECGs whose first and last are
-- >= persist_min_days apart (rule file [persistence]); one pair that far apart exists exactly
-- when first and last are.
WITH
ecgs AS (
    SELECT
        rule_set_id, person_key, CAST(acquired_at AS DATE) AS ecg_date, av_category,
        ventricular_conduction, rhythm_class
    FROM ecg_conduction
),
long AS (
    SELECT rule_set_id, person_key, 'av' AS axis, av_category AS category, ecg_date FROM ecgs
    UNION ALL
    SELECT rule_set_id, person_key, 'vc' AS axis, ventricular_conduction AS category, ecg_date
    FROM ecgs
    UNION ALL
    SELECT rule_set_id, person_key, 'rhythm' AS axis, rhythm_class AS category, ecg_date FROM ecgs
),
grouped AS (
    SELECT
        rule_set_id, person_key, axis, category,
        min(ecg_date) AS first_date,
        max(ecg_date) AS last_date,
        count(*) AS n_ecg
    FROM long
    GROUP BY rule_set_id, person_key, axis, category
)
SELECT
    g.person_key,
    g.rule_set_id,
    g.axis,
    g.category,
    g.first_date,
    g.last_date,
    g.n_ecg,
    g.n_ecg >= p.persist_min_ecgs
        AND date_diff('day', g.first_date, g.last_date) >= p.persist_min_days AS persistent
FROM grouped AS g
JOIN rule_param AS p ON p.rule_set_id = g.rule_set_id
