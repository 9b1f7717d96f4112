-- Stage a beat-level wave export (P and QRS onset times of a tracing).
-- Grain: one row per source record. Key: (ecg_key, t_ms, kind); a key seen again is a duplicate.
-- Input: view src, temp tables code_map and ingest_param. Output: temp table stage_checked
-- (row-local checks; wave_event_refs.sql checks the tracing exists).
CREATE OR REPLACE TEMP TABLE stage_checked AS
WITH typed AS (
    SELECT
        s.row_k,
        dromos_text(s.ecg_key) AS ecg_key,
        s.t_ms AS t_ms_raw,
        dromos_number(s.t_ms) AS t_ms,
        s.kind AS kind_raw,
        kind_code.code AS kind
    FROM src AS s
    LEFT JOIN code_map AS kind_code
        ON kind_code.field = 'kind' AND kind_code.source_value = lower(dromos_text(s.kind))
)
SELECT
    t.row_k, t.ecg_key, t.t_ms, t.kind,
    list_filter([
        dromos_problem('ecg_key', t.ecg_key, t.ecg_key IS NULL, 'missing required value'),
        dromos_problem('t_ms', t.t_ms_raw, dromos_text(t.t_ms_raw) IS NULL, 'missing required value'),
        dromos_number_problem('t_ms', t.t_ms_raw, t.t_ms, p.t_ms_lo, p.t_ms_hi),
        dromos_problem('kind', t.kind_raw, t.kind IS NULL, 'unknown wave kind (expected P or QRS)')
    ], lambda x: x IS NOT NULL) AS problems,
    CAST([] AS STRUCT(field VARCHAR, raw_value VARCHAR, repaired_value VARCHAR, rule VARCHAR)[]) AS repairs,
    row(t.ecg_key, t.t_ms, t.kind) AS dedup_key,
    hash(t.ecg_key, t.t_ms, t.kind) AS content_hash
FROM typed AS t
CROSS JOIN ingest_param AS p;
