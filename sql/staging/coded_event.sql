-- Stage a procedure or diagnosis export (dated codes of a person).
-- Grain: one row per source record. Key: all columns; a row seen again is a duplicate.
-- Input: view src, temp tables ingest_param and target_rows (the registry rows of the target
-- table, procedure or diagnosis); parameters $date_formats and $default_code_system.
-- Output: temp table stage_checked.
CREATE OR REPLACE TEMP TABLE stage_checked AS
WITH typed AS (
    SELECT
        s.row_k,
        dromos_text(s.person_key) AS person_key_raw,
        dromos_person_key(dromos_text(s.person_key)) AS person_key,
        s.date AS date_raw,
        dromos_date(s.date, $date_formats) AS date,
        coalesce(upper(dromos_text(s.code_system)), $default_code_system) AS code_system,
        upper(dromos_text(s.code)) AS code
    FROM src AS s
),
checked AS (
    SELECT
        t.*,
        list_filter([
            dromos_problem('person_key', t.person_key_raw, t.person_key IS NULL, 'missing required value'),
            dromos_problem('person_key', t.person_key_raw, t.person_key IS NOT NULL AND pe.person_key IS NULL, 'unknown person (not in the registry; load the person file first)'),
            dromos_problem('date', t.date_raw, dromos_text(t.date_raw) IS NULL, 'missing required value'),
            dromos_problem('date', t.date_raw, dromos_text(t.date_raw) IS NOT NULL AND t.date IS NULL, 'unparseable date'),
            dromos_problem('date', t.date_raw, t.date < p.earliest_date OR t.date > p.latest_date, 'date out of range'),
            dromos_problem('date', t.date_raw, t.date < pe.birth_date, 'dated before birth'),
            dromos_problem('code', t.code, t.code IS NULL, 'missing required value')
        ], lambda x: x IS NOT NULL) AS problems,
        concat_ws('/', t.person_key, CAST(t.date AS VARCHAR), t.code_system, t.code) AS dedup_key,
        concat_ws('/', t.person_key_raw, t.date_raw, t.code_system, t.code) AS key_raw,
        hash(t.person_key, t.date, t.code_system, t.code) AS content_hash
    FROM typed AS t
    CROSS JOIN ingest_param AS p
    LEFT JOIN person AS pe ON pe.person_key = t.person_key
),
registry AS (
    SELECT concat_ws('/', person_key, CAST(date AS VARCHAR), code_system, code) AS dedup_key,
           any_value(hash(person_key, date, code_system, code)) AS registry_hash,
           any_value(source_id) AS registry_source
    FROM target_rows
    GROUP BY ALL
)
SELECT
    c.*,
    g.registry_hash,
    g.registry_source,
    CAST([] AS STRUCT(field VARCHAR, raw_value VARCHAR, repaired_value VARCHAR, rule VARCHAR)[]) AS repairs
FROM checked AS c
LEFT JOIN registry AS g ON g.dedup_key = c.dedup_key;
