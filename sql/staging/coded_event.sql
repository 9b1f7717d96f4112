-- Stage a procedure or diagnosis export (dated codes of a person).
-- Grain: one row per source record. Key: all columns; a row seen again is a duplicate.
-- Input: view src, temp table ingest_param; parameters $date_formats and $default_code_system.
-- Output: temp table stage_typed (row-local checks; exposed as view stage_checked;
-- coded_event_refs.sql checks the person). No hash join between src and the output: rows stay
-- in file order.
CREATE OR REPLACE TEMP TABLE stage_typed AS
WITH typed AS (
    SELECT
        s.row_k,
        s.line_problem,
        s.line_raw,
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
        CASE WHEN t.line_problem IS NOT NULL THEN [dromos_line_problem(t.line_problem, t.line_raw)] ELSE list_filter([
            dromos_problem('person_key', t.person_key, t.person_key IS NULL, 'missing required value'),
            dromos_problem('date', t.date_raw, dromos_text(t.date_raw) IS NULL, 'missing required value'),
            dromos_problem('date', t.date_raw, dromos_text(t.date_raw) IS NOT NULL AND t.date IS NULL, 'unparseable date'),
            dromos_problem('date', t.date_raw, t.date < p.earliest_date OR t.date > p.latest_date, 'date out of range'),
            dromos_problem('code', t.code, t.code IS NULL, 'missing required value')
        ], lambda x: x IS NOT NULL) END AS problems
    FROM typed AS t
    CROSS JOIN ingest_param AS p
)
SELECT
    c.* EXCLUDE (person_key_raw, date_raw, line_problem, line_raw),
    CAST([] AS STRUCT(field VARCHAR, raw_value VARCHAR, repaired_value VARCHAR, rule VARCHAR)[]) AS repairs
FROM checked AS c;

-- The staged rows as the checks see them (classify.sql): the record's row_k (its position for a
-- CSV source, see loader._check_positions), its key (and a hash of it) and a hash of its content,
-- computed when used.
CREATE OR REPLACE TEMP VIEW stage_checked AS
SELECT
    * REPLACE (dromos_row_k(row_k, rowid) AS row_k),
    rowid AS position,
    row(person_key, date, code_system, code) AS dedup_key,
    hash(person_key, date, code_system, code) AS key_hash,
    hash(person_key, date, code_system, code) AS content_hash
FROM stage_typed;
