-- Stage a beat-level wave export (P and QRS onset times of a tracing).
-- Grain: one row per source record. Key: (ecg_key, t_ms, kind); a key seen again is a duplicate.
-- Input: view src, temp tables code_map and ingest_param. Output: temp table stage_typed
-- (row-local checks; exposed as view stage_checked; wave_event_refs.sql checks the tracing
-- exists). No hash join between src and the output: rows stay in file order.
CREATE OR REPLACE TEMP TABLE stage_typed AS
WITH kind_codes AS (
    SELECT codes, dromos_exact_codes(codes) AS exact
    FROM (SELECT map_from_entries(list((source_value, code))) AS codes FROM code_map WHERE field = 'kind')
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
        dromos_code(s.kind, kc.codes, kc.exact) AS kind
    FROM src AS s
    CROSS JOIN kind_codes AS kc
),
found AS (
    -- clean: every check below passes (cheap tests); only other rows get the full list
    SELECT
        t.*,
        t.line_problem IS NULL AND t.ecg_key IS NOT NULL AND t.kind IS NOT NULL
            AND t.t_ms >= p.t_ms_lo AND t.t_ms <= p.t_ms_hi AS clean
    FROM typed AS t
    CROSS JOIN ingest_param AS p
)
-- Problem lists are built only for rows that have one (most rows are clean).
SELECT
    f.row_k, f.ecg_key, f.t_ms, f.kind,
    CASE WHEN f.line_problem IS NOT NULL THEN [dromos_line_problem(f.line_problem, f.line_raw)]
         WHEN f.clean THEN []
         ELSE list_filter([
            dromos_problem('ecg_key', f.ecg_key, f.ecg_key IS NULL, 'missing required value'),
            dromos_problem('t_ms', f.t_ms_raw, dromos_text(f.t_ms_raw) IS NULL, 'missing required value'),
            dromos_number_problem('t_ms', f.t_ms_raw, f.t_ms, p.t_ms_lo, p.t_ms_hi),
            dromos_problem('kind', f.kind_raw, f.kind IS NULL, 'unknown wave kind (expected P or QRS)')
         ], lambda x: x IS NOT NULL)
    END AS problems,
    CAST([] AS STRUCT(field VARCHAR, raw_value VARCHAR, repaired_value VARCHAR, rule VARCHAR)[]) AS repairs
FROM found AS f
CROSS JOIN ingest_param AS p;

-- The staged rows as the checks see them (classify.sql): the record's row_k (its position for a
-- CSV source, see loader._check_positions), its key (and a hash of it) and a hash of its content,
-- computed when used.
CREATE OR REPLACE TEMP VIEW stage_checked AS
SELECT
    * REPLACE (dromos_row_k(row_k, rowid) AS row_k),
    rowid AS position,
    row(ecg_key, t_ms, kind) AS dedup_key,
    hash(ecg_key, t_ms, kind) AS key_hash,
    hash(ecg_key, t_ms, kind) AS content_hash
FROM stage_typed;
