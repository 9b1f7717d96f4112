-- study_cohort: every person of the registry with their index ECG, the values at index and the
-- first inclusion or exclusion criterion they fail (NULL = in the study).
-- Grain: one row per person_key of table `person`, for rule set $rule_set_id.
--
-- Index ECG: the earliest ECG (acquired_at, then ecg_key) of ecg_conduction that qualifies for
-- $index_kind: 'first_ecg' (any), 'first_assessable_pr' (PR measurable: pr_assessable, PR
-- measured and an AV category in $pr_categories, i.e. 1:1 conduction), or
-- 'first_ecg_in_window' (acquired between $index_start and $index_end).
-- Ages: age_completed = completed years at the index date (birthdays, as date_sub counts
-- them); age = days since birth / 365.25 (the unit of the phenotype stage).
-- "Before index" means on or before the index date.
-- Criteria are the codes below; $steps lists the active ones in the order the spec applies
-- them, and first_failed is the first of them that the person fails. Parameters: thresholds
-- ($age_from, $age_below, $qrs_min_ms, $min_followup_days), lists ($sexes, $sites; NULL = all),
-- dates ($cal_start, $cal_end, $end_date; NULL = open), $hgb_source ('ecg', 'diagnosis',
-- 'either'), and the exposure's needs: $exposure_needs ('none', 'pr', 'pr_hr', 'category')
-- with $exposure_categories for 'category'.
WITH
ecgs AS (
    SELECT
        c.person_key,
        c.ecg_key,
        c.acquired_at,
        CAST(c.acquired_at AS DATE) AS ecg_date,
        c.rhythm_class,
        c.av_category,
        c.ventricular_conduction,
        c.pr_ms,
        c.qrs_ms,
        c.qrs_axis,
        c.ventricular_rate,
        coalesce(c.pr_assessable AND c.pr_ms IS NOT NULL
            AND list_contains($pr_categories::VARCHAR[], c.av_category), false) AS pr_usable
    FROM ecg_conduction AS c
    WHERE c.rule_set_id = $rule_set_id
),
qualifying AS (
    SELECT *
    FROM ecgs
    WHERE CASE $index_kind
        WHEN 'first_ecg' THEN true
        WHEN 'first_assessable_pr' THEN pr_usable
        WHEN 'first_ecg_in_window' THEN ecg_date BETWEEN $index_start::DATE AND $index_end::DATE
        ELSE false
    END
),
ranked AS (
    SELECT
        *,
        row_number() OVER (PARTITION BY person_key ORDER BY acquired_at, ecg_key) AS rn
    FROM qualifying
),
index_ecg AS (
    SELECT * FROM ranked WHERE rn = 1
),
timeline AS (
    SELECT * FROM person_conduction WHERE rule_set_id = $rule_set_id
),
joined AS (
    SELECT
        p.person_key,
        p.sex,
        p.site,
        p.birth_date,
        p.death_date,
        p.followup_end,
        i.ecg_key AS index_ecg_key,
        i.ecg_date AS index_date,
        year(i.ecg_date) AS index_year,
        date_sub('year', p.birth_date, i.ecg_date) AS age_completed,
        date_diff('day', p.birth_date, i.ecg_date) / 365.25 AS age,
        i.rhythm_class,
        i.av_category,
        i.ventricular_conduction,
        i.pr_ms,
        i.qrs_ms,
        i.qrs_axis,
        i.ventricular_rate AS heart_rate,
        i.pr_usable,
        least(p.followup_end, coalesce($end_date::DATE, p.followup_end)) AS possible_end,
        t.pacemaker_date,
        t.first_higher_grade_ecg_date,
        t.first_higher_grade_dx_date
    FROM person AS p
    LEFT JOIN index_ecg AS i ON i.person_key = p.person_key
    LEFT JOIN timeline AS t ON t.person_key = p.person_key
),
flagged AS (
    SELECT
        j.*,
        date_diff('day', j.index_date, j.possible_end) AS possible_followup_days,
        list_filter([
            CASE WHEN j.index_date IS NULL THEN 'index_ecg' END,
            CASE WHEN j.index_date > j.followup_end THEN 'index_within_followup' END,
            CASE WHEN $sexes::VARCHAR[] IS NOT NULL
                AND NOT list_contains($sexes::VARCHAR[], j.sex) THEN 'sex' END,
            CASE WHEN $sites::VARCHAR[] IS NOT NULL
                AND NOT coalesce(list_contains($sites::VARCHAR[], j.site), false) THEN 'site' END,
            CASE WHEN j.index_date < coalesce($cal_start::DATE, j.index_date)
                OR j.index_date > coalesce($cal_end::DATE, j.index_date) THEN 'calendar_window' END,
            CASE WHEN j.age_completed < $age_from
                OR j.age_completed >= coalesce($age_below, j.age_completed + 1) THEN 'age' END,
            CASE WHEN j.pacemaker_date <= j.index_date THEN 'pacemaker_before_index' END,
            CASE WHEN ($hgb_source IN ('ecg', 'either') AND j.first_higher_grade_ecg_date <= j.index_date)
                OR ($hgb_source IN ('diagnosis', 'either') AND j.first_higher_grade_dx_date <= j.index_date)
                THEN 'higher_grade_before_index' END,
            CASE WHEN j.rhythm_class = 'atrial_fibrillation' THEN 'af_at_index' END,
            CASE WHEN j.qrs_ms >= $qrs_min_ms THEN 'qrs_at_least_ms' END,
            CASE WHEN date_diff('day', j.index_date, j.possible_end) < $min_followup_days
                THEN 'min_followup_days' END,
            CASE
                WHEN $exposure_needs = 'pr' AND NOT j.pr_usable THEN 'exposure_missing'
                WHEN $exposure_needs = 'pr_hr'
                    AND NOT (j.pr_usable AND coalesce(j.heart_rate > 0, false)) THEN 'exposure_missing'
                WHEN $exposure_needs = 'category'
                    AND NOT coalesce(list_contains($exposure_categories::VARCHAR[], j.av_category), false)
                    THEN 'exposure_missing'
            END
        ], lambda c: c IS NOT NULL) AS failed
    FROM joined AS j
)
SELECT
    f.* EXCLUDE (failed),
    list_filter($steps::VARCHAR[], lambda s: list_contains(f.failed, s))[1] AS first_failed
FROM flagged AS f
ORDER BY f.person_key
