-- Stage a person export.
-- Grain: one row per source record (row_k = its position among the rows the reader parsed).
-- Input: view src (row_k + canonical columns as text), temp tables code_map, ingest_param;
-- parameter $date_formats. Output: temp table stage_typed (typed columns, problems; the loader
-- exposes it as view stage_checked); the registry is consulted next by person_refs.sql, then
-- classify.sql decides. No hash join between src and the output: rows stay in file order.
CREATE OR REPLACE TEMP TABLE stage_typed AS
WITH sex_codes AS (
    SELECT codes, dromos_exact_codes(codes) AS exact
    FROM (SELECT map_from_entries(list((source_value, code))) AS codes FROM code_map WHERE field = 'sex')
),
typed AS (
    SELECT
        s.row_k,
        s.line_problem,
        s.line_raw,
        dromos_text(s.person_key) AS person_key_raw,
        dromos_person_key(dromos_text(s.person_key)) AS person_key,
        s.birth_date AS birth_date_raw,
        dromos_date(s.birth_date, $date_formats) AS birth_date,
        s.sex AS sex_raw,
        coalesce(dromos_code(s.sex, sc.codes, sc.exact), CASE WHEN dromos_text(s.sex) IS NULL THEN 'U' END) AS sex,
        dromos_text(s.site) AS site,
        s.death_date AS death_date_raw,
        dromos_date(s.death_date, $date_formats) AS death_date,
        s.followup_end AS followup_end_raw,
        dromos_date(s.followup_end, $date_formats) AS followup_end
    FROM src AS s
    CROSS JOIN sex_codes AS sc
),
found AS (
    SELECT
        t.*,
        dromos_line_problem(t.line_problem, t.line_raw) AS f0,
        dromos_problem('person_key', t.person_key, t.person_key IS NULL, 'missing required value') AS f1,
        dromos_problem('birth_date', t.birth_date_raw, dromos_text(t.birth_date_raw) IS NULL, 'missing required value') AS f2,
        dromos_problem('birth_date', t.birth_date_raw, dromos_text(t.birth_date_raw) IS NOT NULL AND t.birth_date IS NULL, 'unparseable date') AS f3,
        dromos_problem('birth_date', t.birth_date_raw, t.birth_date < p.earliest_date OR t.birth_date > p.latest_date, 'date out of range') AS f4,
        dromos_problem('sex', t.sex_raw, t.sex IS NULL, 'unknown sex code') AS f5,
        dromos_problem('death_date', t.death_date_raw, dromos_text(t.death_date_raw) IS NOT NULL AND t.death_date IS NULL, 'unparseable date') AS f6,
        dromos_problem('death_date', t.death_date_raw, t.death_date < t.birth_date, 'death before birth') AS f7,
        dromos_problem('death_date', t.death_date_raw, t.death_date > p.latest_date, 'date out of range') AS f8,
        dromos_problem('followup_end', t.followup_end_raw, dromos_text(t.followup_end_raw) IS NULL, 'missing required value') AS f9,
        dromos_problem('followup_end', t.followup_end_raw, dromos_text(t.followup_end_raw) IS NOT NULL AND t.followup_end IS NULL, 'unparseable date') AS f10,
        dromos_problem('followup_end', t.followup_end_raw, t.followup_end < t.birth_date, 'end of follow-up before birth') AS f11,
        dromos_problem('death_date', t.death_date_raw, t.death_date > t.followup_end, 'death after end of follow-up') AS f12
    FROM typed AS t
    CROSS JOIN ingest_param AS p
),
-- Problem lists are built only for rows that have one (most rows are clean).
checked AS (
    SELECT
        t.* EXCLUDE (person_key_raw, birth_date_raw, sex_raw, death_date_raw, followup_end_raw, line_problem, line_raw,
                     f0, f1, f2, f3, f4, f5, f6, f7, f8, f9, f10, f11, f12),
        CASE WHEN t.f0 IS NOT NULL THEN [t.f0]
             WHEN coalesce(f1, f2, f3, f4, f5, f6, f7, f8, f9, f10, f11, f12) IS NULL THEN []
             ELSE list_filter([f1, f2, f3, f4, f5, f6, f7, f8, f9, f10, f11, f12], lambda x: x IS NOT NULL)
        END AS problems
    FROM found AS t
)
SELECT
    c.*,
    CAST([] AS STRUCT(field VARCHAR, raw_value VARCHAR, repaired_value VARCHAR, rule VARCHAR)[]) AS repairs
FROM checked AS c;

-- The staged rows as the checks see them (classify.sql): the record's row_k (its position for a
-- CSV source, see loader._check_positions), its key (and a hash of it) and a hash of its content,
-- computed when used.
CREATE OR REPLACE TEMP VIEW stage_checked AS
SELECT
    * REPLACE (dromos_row_k(row_k, rowid) AS row_k),
    rowid AS position,
    row(person_key) AS dedup_key,
    hash(person_key) AS key_hash,
    hash(person_key, birth_date, sex, site, death_date, followup_end) AS content_hash
FROM stage_typed;
