-- Content hashes of the records in stage_content_needed, for tables whose view stage_checked
-- has a cheap content_hash column (person, wave_event, procedure, diagnosis; ECG reads have
-- their own statement, ecg_content.sql). Output: temp table stage_content (row_k, content_hash).
CREATE OR REPLACE TEMP TABLE stage_content AS
SELECT s.row_k, s.content_hash
FROM stage_content_needed AS n
JOIN stage_checked AS s ON s.row_k = n.row_k;
