-- Stage a beat-level wave export (P and QRS onset times of a tracing).
-- Grain: one row per source record. Key: (ecg_key, t_ms, kind); a key seen again is a duplicate.
-- Input: view src, temp tables code_map and ingest_param. Output: temp table stage_typed
-- (row-local checks; exposed as view stage_checked; wave_event_refs.sql checks the tracing
-- exists). No hash join between src and the output: rows stay in file order.
CREATE OR REPLACE TEMP TABLE stage_typed AS
WITH kind_codes AS (
    SELECT map_from_entries(list((source_value, code))) AS codes FROM code_map WHERE field = 'kind'
),
typed AS (
    SELECT
        s.row_k,
        s.line_problem,
        s.line_raw,
        dromos_text(s.ecg_key) AS ecg_key,
        s.t_ms AS t_ms_raw,
        dromos_number(s.t_ms) AS t_ms,
        s.kind AS kind_raw,
        kc.codes[lower(dromos_text(s.kind))] AS kind
    FROM src AS s
    CROSS JOIN kind_codes AS kc
),
found AS (
    SELECT
        t.*,
        dromos_line_problem(t.line_problem, t.line_raw) AS f0,
        dromos_problem('ecg_key', t.ecg_key, t.ecg_key IS NULL, 'missing required value') AS f1,
        dromos_problem('t_ms', t.t_ms_raw, dromos_text(t.t_ms_raw) IS NULL, 'missing required value') AS f2,
        dromos_number_problem('t_ms', t.t_ms_raw, t.t_ms, p.t_ms_lo, p.t_ms_hi) AS f3,
        dromos_problem('kind', t.kind_raw, t.kind IS NULL, 'unknown wave kind (expected P or QRS)') AS f4
    FROM typed AS t
    CROSS JOIN ingest_param AS p
)
-- Problem lists are built only for rows that have one (most rows are clean).
SELECT
    row_k, ecg_key, t_ms, kind,
    CASE WHEN f0 IS NOT NULL THEN [f0]
         WHEN coalesce(f1, f2, f3, f4) IS NULL THEN []
         ELSE list_filter([f1, f2, f3, f4], lambda x: x IS NOT NULL)
    END AS problems,
    CAST([] AS STRUCT(field VARCHAR, raw_value VARCHAR, repaired_value VARCHAR, rule VARCHAR)[]) AS repairs
FROM found;

-- The staged rows as the checks see them (classify.sql): the record's row_k (its position for a
-- CSV source, see loader._check_positions), its key (and a hash of it) and a hash of its content,
-- computed when used.
CREATE OR REPLACE TEMP VIEW stage_checked AS
SELECT
    * REPLACE (dromos_row_k(row_k, rowid) AS row_k),
    row(ecg_key, t_ms, kind) AS dedup_key,
    hash(ecg_key, t_ms, kind) AS key_hash,
    hash(ecg_key, t_ms, kind) AS content_hash
FROM stage_typed;
