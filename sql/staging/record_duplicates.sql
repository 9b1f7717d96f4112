-- Records not loaded because the registry or an earlier row of the file already holds them.
-- Grain: one row per duplicate record.
INSERT INTO duplicate
SELECT $source_id, record, dedup_key, duplicate_reason
FROM stage_outcome
WHERE status = 'duplicate';
