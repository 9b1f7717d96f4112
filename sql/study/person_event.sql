-- person_event: dated events of each person that endpoints are built from, long form.
-- Grain: one row per (person_key, event_kind, source) that has a date, for rule set
-- $rule_set_id. Dates are first occurrences (person_conduction keeps the first date of each
-- category), so a date on or before a person's index date means the event is prevalent there.
-- event_kind / source pairs (cohort.study.spec.EVENT_SOURCES lists the same ones):
--   first_degree_block: ecg (first ECG with first-degree or marked first-degree block),
--                       diagnosis (first ICD-10-CM code of first-degree block)
--   higher_grade_block: ecg / diagnosis (the rule set's higher-grade list; Mobitz I excluded)
--   third_degree_block: ecg / diagnosis
--   av_block:           ecg (any grade >= first degree) / diagnosis (any AV block code)
--   pacemaker:          procedure (first implant code), ecg (first paced ECG)
--   death:              registry (person.death_date)
WITH
timeline AS (
    SELECT * FROM person_conduction WHERE rule_set_id = $rule_set_id
),
long AS (
    SELECT person_key, 'first_degree_block' AS event_kind, 'ecg' AS source,
        first_first_degree_or_marked_ecg_date AS event_date FROM timeline
    UNION ALL
    SELECT person_key, 'first_degree_block', 'diagnosis', first_first_degree_dx_date FROM timeline
    UNION ALL
    SELECT person_key, 'higher_grade_block', 'ecg', first_higher_grade_ecg_date FROM timeline
    UNION ALL
    SELECT person_key, 'higher_grade_block', 'diagnosis', first_higher_grade_dx_date FROM timeline
    UNION ALL
    SELECT person_key, 'third_degree_block', 'ecg', first_third_degree_ecg_date FROM timeline
    UNION ALL
    SELECT person_key, 'third_degree_block', 'diagnosis', first_third_degree_dx_date FROM timeline
    UNION ALL
    SELECT person_key, 'av_block', 'ecg', first_av_block_ecg_date FROM timeline
    UNION ALL
    SELECT person_key, 'av_block', 'diagnosis', first_av_block_dx_date FROM timeline
    UNION ALL
    SELECT person_key, 'pacemaker', 'procedure', pacemaker_procedure_date FROM timeline
    UNION ALL
    SELECT person_key, 'pacemaker', 'ecg', pacemaker_ecg_date FROM timeline
    UNION ALL
    SELECT person_key, 'death', 'registry', death_date FROM person
)
SELECT person_key, event_kind, source, event_date
FROM long
WHERE event_date IS NOT NULL
ORDER BY person_key, event_kind, source
