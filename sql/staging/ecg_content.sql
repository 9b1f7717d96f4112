-- Content hashes of the staged ECG reads in stage_content_needed (few): the same expression as
-- the registry side in ecg_refs.sql, over the statement lists split from their text. Computed
-- here, after the join on storage position, so that the lists of the millions of other rows are
-- never split or hashed for this (they are split once, when copied into the registry).
-- Output: temp table stage_content (row_k, content_hash).
CREATE OR REPLACE TEMP TABLE stage_content AS
SELECT
    n.row_k,
    hash(t.person_key, t.acquired_at, t.site, t.ventricular_rate, t.atrial_rate, t.pr_ms, t.qrs_ms,
         t.qt_ms, t.qtc_ms, t.p_axis, t.qrs_axis, t.t_axis,
         dromos_split(t.statements_text, getvariable('dromos_statement_separator')),
         dromos_split(t.statement_codes_text, getvariable('dromos_code_separator'))) AS content_hash
FROM stage_content_needed AS n
JOIN stage_typed AS t ON t.rowid = n.position;
